"""The per-unit state file: what a restart must not forget.

One JSON document per unit holds the per-window pipeline's state
(:meth:`twin.cycle.UnitCycle.snapshot`: drift charts, alarm state machines,
suspect persistence, steady-gate hold, reconciliation warm start) and the
ingest's learned sample periods and loss totals. It is written atomically
(a temporary file in the same directory, flushed to disk, then renamed over
the old one), so a crash or ``kill -9`` at any moment leaves either the old
or the new file, never a torn one.

Layout (``version`` 1)::

    {"format": "twin-state", "version": 1, "unit_id": "demo-u1",
     "plant_file": "/etc/twin/demo-u1.toml", "plant_sha256": "<hex>",
     "saved_at": 1796194380.0, "saved_at_utc": "2026-12-02T07:33:00.000Z",
     "parts": {"cycle": {...}, "ingest": {...}}}

A file is restored only when its format and version are known, it belongs
to the same unit, it was written for the same plant file (same SHA-256: a
changed plant file starts fresh) and it is recent (``max_age``). Every
refusal comes with a one-line reason for the log.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import math
import os
import tempfile
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from twin.units import rfc3339

FORMAT = "twin-state"
VERSION = 1


class StateError(ValueError):
    """A state file that cannot be read or written; the message is one line naming the file."""


def plant_sha256(path: str | os.PathLike[str]) -> str:
    """SHA-256 (hex) of the plant file's bytes."""
    try:
        return hashlib.sha256(Path(path).read_bytes()).hexdigest()
    except OSError as exc:
        raise StateError(f"{os.fspath(path)}: cannot read the plant file: {exc.strerror or exc}") from exc


@dataclass(frozen=True)
class SavedState:
    """A state file as read: header fields and the saved parts."""

    path: Path
    unit_id: str
    plant_file: str
    plant_sha256: str
    saved_at: float
    parts: Mapping[str, Any]

    def age(self, now: float) -> float:
        """Seconds since it was written [s]."""
        return now - self.saved_at


def write_state(path: str | os.PathLike[str], parts: Mapping[str, Any], *, unit_id: str, plant_file: str,
                plant_hash: str, now: float) -> None:
    """Write the state file atomically (temporary file, fsync, rename, fsync of the directory).

    Parameters
    ----------
    path : path
        The state file; its directory is created if missing.
    parts : mapping
        JSON-able snapshots by name (``cycle``, ``ingest``).
    unit_id, plant_file, plant_hash : str
        Whose state it is, and the SHA-256 of the plant file it was built from.
    now : float
        Time of the snapshot [s since the epoch].
    """
    target = Path(path)
    doc = {"format": FORMAT, "version": VERSION, "unit_id": unit_id, "plant_file": plant_file,
           "plant_sha256": plant_hash, "saved_at": float(now), "saved_at_utc": rfc3339(now),
           "parts": dict(parts)}
    try:
        text = json.dumps(doc, allow_nan=False, separators=(",", ":"))
    except (TypeError, ValueError) as exc:
        raise StateError(f"{target}: state is not JSON-able: {exc}") from exc
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
        try:
            with os.fdopen(fd, "w", encoding="utf-8") as fh:
                fh.write(text)
                fh.flush()
                os.fsync(fh.fileno())
            os.replace(tmp, target)
        except BaseException:
            with contextlib.suppress(OSError):
                os.unlink(tmp)
            raise
        dir_fd = os.open(target.parent, os.O_RDONLY)
        try:
            os.fsync(dir_fd)
        finally:
            os.close(dir_fd)
    except OSError as exc:
        raise StateError(f"{target}: cannot write the state file: {exc.strerror or exc}") from exc


def read_state(path: str | os.PathLike[str]) -> SavedState:
    """Read and check a state file's layout; :class:`StateError` (one line) if unusable.

    ``FileNotFoundError`` passes through (no state yet is not an error).
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise
    except (OSError, UnicodeDecodeError) as exc:
        raise StateError(f"{p}: cannot read the state file: {getattr(exc, 'strerror', None) or exc}") from exc
    try:
        doc = json.loads(text)
    except ValueError as exc:
        raise StateError(f"{p}: not a JSON state file ({exc})") from exc
    if not isinstance(doc, dict) or doc.get("format") != FORMAT:
        raise StateError(f"{p}: not a twin state file (format {doc.get('format') if isinstance(doc, dict) else None!r}"
                         f"; expected {FORMAT!r})")
    if doc.get("version") != VERSION:
        raise StateError(f"{p}: state file version {doc.get('version')!r}; this twin reads version {VERSION}")
    try:
        saved = SavedState(p, str(doc["unit_id"]), str(doc["plant_file"]), str(doc["plant_sha256"]),
                           float(doc["saved_at"]), dict(doc["parts"]))
    except (KeyError, TypeError, ValueError) as exc:
        raise StateError(f"{p}: state file lacks or mangles key {exc}") from exc
    if not math.isfinite(saved.saved_at):
        raise StateError(f"{p}: saved_at {saved.saved_at!r} is not a time")
    return saved


def usable(saved: SavedState, *, unit_id: str, plant_hash: str, now: float, max_age: float) -> str | None:
    """Why a read state must not be restored (one line), or None when it may be."""
    if saved.unit_id != unit_id:
        return f"it belongs to unit {saved.unit_id!r}, not {unit_id!r}"
    if saved.plant_sha256 != plant_hash:
        return f"the plant file changed since it was written (was {saved.plant_sha256[:12]}, now {plant_hash[:12]})"
    age = saved.age(now)
    if age > max_age:
        return f"it is {age:.0f} s old, older than the {max_age:.0f} s limit"
    if age < -60.0:
        return f"it was written {-age:.0f} s in the future (clock changed?)"
    return None


def reset_state(path: str | os.PathLike[str]) -> bool:
    """Delete the state file; True if there was one."""
    p = Path(path)
    try:
        p.unlink()
    except FileNotFoundError:
        return False
    except OSError as exc:
        raise StateError(f"{p}: cannot delete the state file: {exc.strerror or exc}") from exc
    return True
