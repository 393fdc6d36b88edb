"""One-window value files (``twin reconcile``).

A values file holds one window of tag values in the engineering units of the
plant configuration: CSV with a ``tag,value`` header (one tag per line) or a
JSON object ``{"TAG": value, ...}``. Reading converts to SI once (gauge
pressures with the barometric reading in the same file when the unit has a
barometric tag, else the configured barometric pressure) and checks each
value against the sensor's valid range. Bad lines are reported with file and
line and skipped; nothing else is lost.
"""

from __future__ import annotations

import csv
import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from twin.units import strict_float


@dataclass
class ValuesFile:
    """Tag values of one window read from a file.

    Attributes
    ----------
    values : dict
        SI value of every valid tag.
    excluded : dict
        Tags left out and why (``out_of_range``, ``not_finite``).
    errors : list of str
        One line per unreadable entry: ``<file>:<line>: <problem>; expected <what>``.
    raw : dict
        The value as written (engineering units) of every tag read.
    """

    values: dict[str, float] = field(default_factory=dict)
    excluded: dict[str, str] = field(default_factory=dict)
    errors: list[str] = field(default_factory=list)
    raw: dict[str, float] = field(default_factory=dict)


def _entries(path: Path) -> list[tuple[int, str, Any]]:
    """(line, tag, raw value) from a CSV or JSON file; raises ValueError for an unreadable file."""
    text = path.read_text(encoding="utf-8")
    if path.suffix.lower() == ".json" or text.lstrip().startswith("{"):
        try:
            doc = json.loads(text)
        except json.JSONDecodeError as exc:
            raise ValueError(f"{path}:{exc.lineno}:{exc.colno}: not valid JSON ({exc.msg}); expected an object {{tag: value}}") from None
        if not isinstance(doc, dict):
            raise ValueError(f"{path}: top level is {type(doc).__name__}; expected an object {{tag: value}}")
        lines = {}
        for i, line in enumerate(text.splitlines(), 1):
            for key in doc:
                if f'"{key}"' in line and key not in lines:
                    lines[key] = i
        return [(lines.get(k, 0), str(k), v) for k, v in doc.items()]
    rows = list(csv.reader(text.splitlines()))
    out: list[tuple[int, str, Any]] = []
    header_seen = False
    for i, row in enumerate(rows, 1):
        if not row or not "".join(row).strip() or row[0].strip().startswith("#"):
            continue
        if not header_seen:
            header_seen = True
            if row[0].strip().lower() == "tag":
                continue
        if len(row) < 2:
            out.append((i, row[0].strip(), None))
            continue
        out.append((i, row[0].strip(), row[1].strip()))
    return out


def read_values_file(path: str | Path, config: Any) -> ValuesFile:
    """Read one window of tag values and convert them to SI.

    Raises
    ------
    FileNotFoundError
        If the file does not exist.
    ValueError
        If the file as a whole cannot be parsed (message names file and position).
    """
    path = Path(path)
    out = ValuesFile()
    sensors = {s.tag: s for s in config.sensors}
    parsed: dict[str, float] = {}
    entries = _entries(path)
    if not entries:
        raise ValueError(f"{path}: no tag values; expected a CSV header 'tag,value' and one row per tag, "
                         "or a JSON object {tag: value}")
    for line, tag, raw in entries:
        where = f"{path}:{line}" if line else str(path)
        if tag not in sensors:
            out.errors.append(f"{where}: unknown tag {tag!r}; expected a sensor tag of unit {config.unit.id!r}")
            continue
        if isinstance(raw, bool) or raw is None:
            out.errors.append(f"{where}: tag {tag!r} has no value; expected a number")
            continue
        try:
            value = strict_float(raw) if isinstance(raw, str) else float(raw)
        except (TypeError, ValueError):
            out.errors.append(f"{where}: tag {tag!r} value {raw!r} is not a number; expected a number in {sensors[tag].unit}")
            continue
        if tag in parsed:
            out.errors.append(f"{where}: tag {tag!r} given twice; expected one value per tag (the first is kept)")
            continue
        parsed[tag] = value
    out.raw = dict(parsed)
    barometric = None
    baro_tag = getattr(config.unit, "barometric_tag", None)
    if baro_tag and baro_tag in parsed and math.isfinite(parsed[baro_tag]):
        barometric = float(sensors[baro_tag].conversion.to_si(parsed[baro_tag]))
    for tag, value in parsed.items():
        s = sensors[tag]
        if not math.isfinite(value):
            out.excluded[tag] = "not_finite"
            continue
        conv = s.conversion
        if conv.gauge and barometric is not None:
            conv = conv.with_barometric(barometric)
        si = float(conv.to_si(value))
        rng = s.range_si
        if rng is not None and not (rng[0] <= si <= rng[1]):
            out.excluded[tag] = "out_of_range"
            continue
        out.values[tag] = si
    return out
