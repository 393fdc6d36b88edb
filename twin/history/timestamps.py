"""Timestamps of historian exports → Unix seconds [s], with the kind detected and stated.

Accepted kinds (:data:`KINDS`):

* ``rfc3339``: ISO 8601 / RFC 3339 with a zone offset (``2026-03-29T01:30:00.250+01:00``,
  ``...Z``); a space may replace the ``T``;
* ``local``: the same without an offset, read as wall-clock time in a configured
  IANA time zone (``Europe/Berlin``). At the autumn change the repeated hour is
  resolved by file order (the first pass is the earlier UTC hour, rows after
  the clock jumps back the later one) and counted; the missing hour of the
  spring change does not exist: its rows are refused and counted;
* ``epoch_s`` / ``epoch_ms``: numbers of seconds or milliseconds since
  1970-01-01 UTC. Detected from their magnitude (seconds 1e8..1e10, years 1973
  to 2286; milliseconds 1e11..1e13). A declared kind that does not fit the
  magnitude is refused, never reinterpreted: a file in milliseconds read as
  seconds would put the data in the year 50 000.

Parsing is vectorised with pyarrow; a batch with an unparseable value falls back
to one value at a time so only the bad rows are lost.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

KINDS = ("auto", "rfc3339", "local", "epoch_s", "epoch_ms")

# Magnitudes of plausible epoch values (years 1973 .. 2286).
EPOCH_S_RANGE = (1e8, 1e10)
EPOCH_MS_RANGE = (1e11, 1e13)


class TimestampError(ValueError):
    """A file's timestamps cannot be read as asked (message names the file and what was expected)."""


@dataclass
class TimeReport:
    """What the timestamp parser found in one file.

    Attributes
    ----------
    kind : str
        The kind used (detected or declared).
    how : str
        ``"detected"`` or ``"declared"``.
    repeated_hour_rows : int
        Rows in a repeated local hour (autumn DST change), resolved by file order.
    second_pass_rows : int
        Of those, rows taken as the later UTC hour (after the clock went back).
    missing_hour_rows : int
        Rows with a local time that does not exist (spring DST gap), refused.
    dst_notes : list of str
        One line per DST change met.
    """

    kind: str = ""
    how: str = ""
    repeated_hour_rows: int = 0
    second_pass_rows: int = 0
    missing_hour_rows: int = 0
    dst_notes: list[str] = field(default_factory=list)


def _is_numeric(t: pa.DataType) -> bool:
    return pa.types.is_integer(t) or pa.types.is_floating(t)


def detect_kind(sample: pa.Array, where: str) -> str:
    """Kind of a timestamp column from its first non-null values.

    Raises
    ------
    TimestampError
        If the values are numbers of no plausible epoch magnitude, or mix magnitudes.
    """
    if pa.types.is_timestamp(sample.type):
        return "rfc3339" if sample.type.tz else "local"
    vals = sample.drop_null()
    if len(vals) == 0:
        raise TimestampError(f"{where}: no timestamps to detect the kind from; expected RFC 3339 text or epoch numbers")
    if pa.types.is_string(vals.type) or pa.types.is_large_string(vals.type):
        head = [v for v in vals.slice(0, 200).to_pylist() if v and v.strip()]
        nums = []
        for v in head:
            try:
                nums.append(float(v))
            except ValueError:
                break
        else:
            if nums:
                return _epoch_kind(np.abs(np.asarray(nums)), where)
        text = head[0].strip() if head else ""
        if len(text) >= 10 and text[4] == "-" and text[7] == "-":
            tail = text[10:]
            has_zone = tail.endswith(("Z", "z")) or (len(tail) >= 6 and tail[-6] in "+-" and tail[-3] == ":") or (
                len(tail) >= 5 and tail[-5] in "+-" and tail[-4:].isdigit() and len(text) > 19)
            return "rfc3339" if has_zone else "local"
        raise TimestampError(f"{where}: timestamp {text!r} is neither RFC 3339 nor an epoch number; "
                             "expected e.g. 2026-03-29T01:30:00Z, a local time with --timezone, or epoch s/ms")
    if _is_numeric(vals.type):
        x = np.abs(vals.slice(0, 1000).to_numpy(zero_copy_only=False).astype(float))
        return _epoch_kind(x, where)
    raise TimestampError(f"{where}: timestamp column of type {vals.type}; expected text, numbers or timestamps")


def _epoch_kind(x: np.ndarray, where: str) -> str:
    s = (x >= EPOCH_S_RANGE[0]) & (x < EPOCH_S_RANGE[1])
    ms = (x >= EPOCH_MS_RANGE[0]) & (x < EPOCH_MS_RANGE[1])
    if s.all():
        return "epoch_s"
    if ms.all():
        return "epoch_ms"
    if s.any() and ms.any():
        raise TimestampError(f"{where}: epoch timestamps mix seconds and milliseconds magnitudes; "
                             "expected one kind per file")
    raise TimestampError(f"{where}: epoch timestamp {x[~(s | ms)][0]:.6g} has no plausible magnitude; expected "
                         "seconds (1e8..1e10) or milliseconds (1e11..1e13) since 1970")


def check_declared(kind: str, sample: pa.Array, where: str) -> None:
    """Refuse a declared epoch kind whose magnitudes say the other one (the ms/s trap)."""
    if kind not in ("epoch_s", "epoch_ms"):
        return
    try:
        found = detect_kind(sample, where)
    except TimestampError:
        return  # per-row checks below count the implausible ones
    if found in ("epoch_s", "epoch_ms") and found != kind:
        unit = "milliseconds" if found == "epoch_ms" else "seconds"
        raise TimestampError(f"{where}: timestamps declared {kind} but their magnitude says {unit} since 1970; "
                             f"refusing to guess: declare --timestamps {found} (or auto) if that is what they are")


class TimestampParser:
    """Stateful parser of one file's timestamp column (keeps file order across batches).

    Parameters
    ----------
    kind : str
        One of :data:`KINDS` (``auto`` detects from the first batch).
    timezone : str, optional
        IANA zone for ``local`` timestamps.
    where : str
        File name for messages.
    """

    def __init__(self, kind: str = "auto", timezone: str | None = None, where: str = "") -> None:
        if kind not in KINDS:
            raise TimestampError(f"timestamp kind {kind!r}; expected one of {', '.join(KINDS)}")
        self.declared = kind
        self.timezone = timezone
        self.where = where
        self.report = TimeReport()
        self._max_local = -np.inf  # running maximum of local wall time seen [s]
        self._last_second = False  # the last row was in the second pass of a repeated hour
        self._noted: set[tuple[str, str]] = set()

    def parse(self, col: pa.Array) -> tuple[np.ndarray, np.ndarray, list[tuple[int, str]]]:
        """Unix seconds of a batch's column.

        Returns
        -------
        t : ndarray of float
            [s]; NaN for refused rows.
        ok : ndarray of bool
            Rows with a usable time.
        problems : list of (row index, text)
            Why each refused row was refused.
        """
        if isinstance(col, pa.ChunkedArray):
            col = col.combine_chunks()
        if not self.report.kind:
            if self.declared == "auto":
                self.report.kind, self.report.how = detect_kind(col, self.where), "detected"
            else:
                check_declared(self.declared, col, self.where)
                self.report.kind, self.report.how = self.declared, "declared"
            if self.report.kind == "local" and not self.timezone:
                raise TimestampError(f"{self.where}: timestamps have no zone offset; expected --timezone ZONE "
                                     "(e.g. Europe/Berlin) for local times, or RFC 3339 with an offset")
        kind = self.report.kind
        if kind in ("epoch_s", "epoch_ms"):
            return self._epoch(col, kind)
        return self._text(col, kind)

    # ---------------------------------------------------------------- epoch
    def _epoch(self, col: pa.Array, kind: str) -> tuple[np.ndarray, np.ndarray, list[tuple[int, str]]]:
        problems: list[tuple[int, str]] = []
        if _is_numeric(col.type):
            x = col.cast(pa.float64()).to_numpy(zero_copy_only=False)
        else:
            x = robust_cast(pc.utf8_trim_whitespace(col.cast(pa.string())), pa.float64()).to_numpy(
                zero_copy_only=False).astype(float)
        lo, hi = EPOCH_S_RANGE if kind == "epoch_s" else EPOCH_MS_RANGE
        ok = (np.abs(x) >= lo) & (np.abs(x) < hi)
        for i in np.flatnonzero(~ok)[:1000]:
            v = col[int(i)].as_py()
            problems.append((int(i), f"timestamp {v!r} is not {_KIND_TEXT[kind]}" if v not in (None, "")
                             else "no timestamp"))
        t = x / 1000.0 if kind == "epoch_ms" else x.copy()
        t[~ok] = np.nan
        return t, ok, problems

    # ---------------------------------------------------------------- text
    def _text(self, col: pa.Array, kind: str) -> tuple[np.ndarray, np.ndarray, list[tuple[int, str]]]:
        problems: list[tuple[int, str]] = []
        if pa.types.is_timestamp(col.type):
            ts = col
        else:
            target = pa.timestamp("us", tz="UTC") if kind == "rfc3339" else pa.timestamp("us")
            strings = pc.utf8_trim_whitespace(col.cast(pa.string()))
            ts = robust_cast(strings, target)
        if kind == "local" and ts.type.tz is None:
            t, okl, extra = self._localise(ts)
            nulls = np.asarray(ts.is_null().to_numpy(zero_copy_only=False))
            for i in np.flatnonzero(nulls)[:1000]:
                problems.append((int(i), _bad_text(col[int(i)].as_py(), kind)))
            problems.extend(extra)
            return t, okl & ~nulls, problems
        if kind == "local":  # typed timestamps with a zone: exact
            pass
        us = ts.cast(pa.timestamp("us", tz="UTC")).cast(pa.int64())
        nulls = np.asarray(us.is_null().to_numpy(zero_copy_only=False))
        t = us.to_numpy(zero_copy_only=False).astype(float) / 1e6
        t[nulls] = np.nan
        for i in np.flatnonzero(nulls)[:1000]:
            problems.append((int(i), _bad_text(col[int(i)].as_py(), kind)))
        return t, ~nulls, problems

    def _localise(self, naive: pa.Array) -> tuple[np.ndarray, np.ndarray, list[tuple[int, str]]]:
        """Local wall times → UTC, DST hours resolved (see the module docstring)."""
        assert self.timezone is not None
        problems: list[tuple[int, str]] = []
        wall = naive.cast(pa.timestamp("us"))
        w = wall.cast(pa.int64()).to_numpy(zero_copy_only=False).astype(float) / 1e6
        valid = ~np.isnan(w) if w.dtype == float else np.ones(len(w), bool)
        try:
            early = pc.assume_timezone(wall, self.timezone, ambiguous="earliest", nonexistent="earliest")
            late = pc.assume_timezone(wall, self.timezone, ambiguous="latest", nonexistent="latest")
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError) as exc:
            raise TimestampError(f"{self.where}: time zone {self.timezone!r}: {exc}; expected an IANA zone name") from None
        te = early.cast(pa.int64()).to_numpy(zero_copy_only=False).astype(float) / 1e6
        tl = late.cast(pa.int64()).to_numpy(zero_copy_only=False).astype(float) / 1e6
        back = pc.local_timestamp(early).cast(pa.int64()).to_numpy(zero_copy_only=False).astype(float) / 1e6
        missing = valid & (back != w)
        ambiguous = valid & ~missing & (te != tl)
        # file order: rows of the repeated hour after the clock went back are the later pass
        run_max = np.maximum.accumulate(np.where(valid, w, -np.inf))
        prev_max = np.maximum(np.concatenate(([self._max_local], run_max[:-1])), self._max_local)
        second = ambiguous & (w < prev_max)
        # a row back at the highest wall time seen continues the pass of the row before it
        # (the last sample of the repeated hour's second pass, or another tag at the same time)
        level = ambiguous & (w == prev_max)
        if level.any():
            i = np.arange(len(w))
            before = np.maximum.accumulate(np.where(level, -1, i))  # last row at or before i not at that level
            carried = np.where(before >= 0, second[np.maximum(before, 0)], self._last_second)
            second = second | (level & carried)
        t = np.where(second, tl, te)
        if len(w):
            self._max_local = max(self._max_local, float(run_max[-1]))
            self._last_second = bool(second[-1])
        t[missing | ~valid] = np.nan
        nm, na = int(missing.sum()), int(ambiguous.sum())
        self.report.missing_hour_rows += nm
        self.report.repeated_hour_rows += na
        self.report.second_pass_rows += int(second.sum())
        if nm:
            day = _day(w[missing][0])
            if ("gap", day) not in self._noted:
                self._noted.add(("gap", day))
                self.report.dst_notes.append(f"{self.where}: local times in the spring DST gap on {day} "
                                             f"({self.timezone}) do not exist; rows refused")
        if na:
            day = _day(w[ambiguous][0])
            if ("rep", day) not in self._noted:
                self._noted.add(("rep", day))
                self.report.dst_notes.append(f"{self.where}: repeated local hour on {day} ({self.timezone}) "
                                             "resolved by file order (first pass earlier, after the jump back later)")
        for i in np.flatnonzero(missing)[:1000]:
            problems.append((int(i), f"local time {_wall_text(w[i])} does not exist in {self.timezone} "
                                     "(spring DST gap); expected an existing local time"))
        return t, valid & ~missing, problems


_KIND_TEXT = {"epoch_s": "epoch seconds of a plausible magnitude (1e8..1e10)",
              "epoch_ms": "epoch milliseconds of a plausible magnitude (1e11..1e13)"}


def _bad_text(v: object, kind: str) -> str:
    if v is None or (isinstance(v, str) and not v.strip()):
        return "no timestamp"
    want = "RFC 3339 with a zone offset" if kind == "rfc3339" else "a local date-time (YYYY-MM-DD HH:MM:SS)"
    return f"timestamp {v!r} is not {want}"


def robust_cast(arr: pa.Array, target: pa.DataType) -> pa.Array:
    """Cast ``arr`` to ``target``; values that do not convert become null.

    One vectorised cast when the whole array converts; otherwise the array is
    halved until the bad values are isolated (cost grows with the number of bad
    values, not with the array).
    """
    try:
        return pc.cast(arr, target)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        if len(arr) <= 1:
            return pa.nulls(len(arr), type=target)
    half = len(arr) // 2
    return pa.concat_arrays([robust_cast(arr.slice(0, half), target), robust_cast(arr.slice(half), target)])


def _day(wall_s: float) -> str:
    return np.datetime64(int(wall_s), "s").astype("datetime64[D]").astype(str)


def _wall_text(wall_s: float) -> str:
    return str(np.datetime64(int(wall_s), "s")).replace("T", " ")
