"""Streaming readers of historian exports: CSV and Parquet, long and wide layouts.

Layouts (detected from the header / schema):

* **long**: ``timestamp,tag,value[,quality]``, one sample per row;
* **wide**: ``timestamp,<TAG>,<TAG>,...``, one row per time, an empty cell is no sample.

Files may be gzip-compressed (``.gz``; decompressed with ISA-L through
``isal.igzip``, about 2.8 times less CPU than zlib, so a gzip file reads nearly
as fast as a plain one). Values are in the engineering units of
the plant file and are converted to SI with each sensor's conversion, as the
live ingest does (``si = value * scale + offset``; gauge pressures with the
configured barometric pressure, corrected per window by the live barometer).
A non-finite or out-of-range value is rejected and counted by reason, as live.

Memory is bounded by one block (``block_size`` bytes of CSV, ``batch_rows``
Parquet rows), never by the file. A CSV block of whole lines is split in one
vectorised pass when every line in it has the header's number of fields
(:mod:`twin.history.csvblocks`); a block with a blank or comment line or a row
of the wrong shape is read line by line instead. Either way every bad row is
reported with its exact line number: one line
``<file>:<line>: <problem>; expected <what>``, counted, skipped; a bad row never
stops the read. Blank lines and lines starting with ``#`` are ignored. Both
paths give the same samples, counts and messages (``fast=False`` forces the
line-by-line one).
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, cast

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
from isal import igzip, igzip_lib

from twin.history import csvblocks
from twin.history.timestamps import TimeReport, TimestampError, TimestampParser, robust_cast

_ISAL_ERROR = cast("type[Exception]", igzip_lib.IsalError)  # a corrupt gzip stream (the stub types it as an instance)

#: Quality values counted as good (case-insensitive); OPC DA "good" is 192 (0xC0).
DEFAULT_GOOD_QUALITY = ("good", "192", "0xc0", "ok")
TIME_COLUMNS = ("timestamp", "time", "ts", "datetime", "date_time")
MAX_ERROR_LINES = 50  # error lines kept per file (all are counted)
# CSV bytes per block: 4 MiB reads faster than 16 MiB (the block's columns stay in cache,
# `twin bench backfill --skip-backfill`) and keeps the per-block cost under 1 % of it
DEFAULT_BLOCK_SIZE = 4 << 20


class HistoryError(ValueError):
    """A file cannot be read at all (message names it and what was expected)."""


@dataclass
class Samples:
    """One block of samples, SI, in file order.

    Attributes
    ----------
    t : ndarray of float
        Unix time [s].
    tag : ndarray of int32
        Index into :attr:`HistoryReader.tags`.
    value : ndarray of float
        SI value.
    ok : ndarray of bool
        Good quality.
    """

    t: np.ndarray
    tag: np.ndarray
    value: np.ndarray
    ok: np.ndarray

    def __len__(self) -> int:
        return len(self.t)

    def select(self, mask: np.ndarray) -> Samples:
        return Samples(self.t[mask], self.tag[mask], self.value[mask], self.ok[mask])


@dataclass
class FileReport:
    """Counts of one file's read (nothing dropped without a count)."""

    path: str
    layout: str = ""
    format: str = ""
    rows: int = 0  # data rows read
    samples: int = 0  # samples kept (after range filter)
    bad_rows: int = 0  # unreadable rows (one error line each)
    outside: int = 0  # samples outside the requested time range
    rejected: Counter = field(default_factory=Counter)  # by reason (out_of_range, not_finite, unknown_tag)
    bad_quality: int = 0
    errors: list[str] = field(default_factory=list)  # first MAX_ERROR_LINES lines
    time: TimeReport = field(default_factory=TimeReport)
    t_first: float = math.inf
    t_last: float = -math.inf
    fast_blocks: int = 0  # CSV blocks split in one vectorised pass
    slow_blocks: int = 0  # CSV blocks read line by line (a blank, comment or bad row in them)

    def error(self, line: str) -> None:
        self.bad_rows += 1
        if len(self.errors) < MAX_ERROR_LINES:
            self.errors.append(line)

    def summary(self) -> str:
        rej = ", ".join(f"{k} {v}" for k, v in sorted(self.rejected.items())) or "none"
        t = self.time
        kind = f"{t.kind} ({t.how})" if t.kind else "-"
        return (f"{self.path}: {self.format} {self.layout}, timestamps {kind}; {self.rows} rows, "
                f"{self.samples} samples kept, {self.bad_rows} bad rows, rejected: {rej}, "
                f"bad quality {self.bad_quality}, outside the range {self.outside}")


class HistoryReader:
    """Reads historian exports for one plant configuration.

    Parameters
    ----------
    config : PlantConfig
    timestamps : str
        Timestamp kind (``auto``, ``rfc3339``, ``local``, ``epoch_s``, ``epoch_ms``).
    timezone : str, optional
        IANA zone of naive local timestamps.
    good_quality : sequence of str
        Quality values taken as good (case-insensitive); an empty quality is good.
    block_size : int
        CSV bytes per block.
    batch_rows : int
        Parquet rows per batch.
    fast : bool
        Split clean CSV blocks in one vectorised pass (default); False reads
        every block line by line (same samples, counts and messages, slower).
    """

    def __init__(self, config: Any, *, timestamps: str = "auto", timezone: str | None = None,
                 good_quality: Sequence[str] = DEFAULT_GOOD_QUALITY, block_size: int = DEFAULT_BLOCK_SIZE,
                 batch_rows: int = 1 << 20, fast: bool = True) -> None:
        self.config = config
        self.timestamps = timestamps
        self.timezone = timezone
        self.good_quality = pa.array(sorted({q.strip().lower() for q in good_quality} | {""}))
        self.block_size = int(block_size)
        self.batch_rows = int(batch_rows)
        self.fast = bool(fast)
        self.tags = [s.tag for s in config.sensors]
        self._tag_array = pa.array(self.tags)
        self._scale = np.array([s.conversion.scale for s in config.sensors], float)
        self._offset = np.array([s.conversion.offset for s in config.sensors], float)
        rng = [s.range_si if s.range_si is not None else (-math.inf, math.inf) for s in config.sensors]
        self._lo = np.array([min(a, b) for a, b in rng], float)
        self._hi = np.array([max(a, b) for a, b in rng], float)
        self.reports: dict[str, FileReport] = {}

    # ------------------------------------------------------------------ public
    def read(self, path: str | Path, t_from: float = -math.inf, t_to: float = math.inf) -> Iterator[Samples]:
        """Blocks of SI samples with ``t_from <= t < t_to`` from one file.

        Raises
        ------
        FileNotFoundError
            If the file does not exist.
        HistoryError
            If the file as a whole cannot be read (no header, unknown layout,
            timestamps of no usable kind); the message names the file.
        """
        path = Path(path)
        if not path.exists():
            raise FileNotFoundError(str(path))
        rep = FileReport(str(path))
        self.reports[str(path)] = rep
        name = path.name.lower()
        base = name[:-3] if name.endswith(".gz") else name
        try:
            if base.endswith((".parquet", ".pq")):
                rep.format = "parquet"
                blocks = self._parquet(path, rep)
            else:
                rep.format = "csv" + (".gz" if name.endswith(".gz") else "")
                blocks = self._csv(path, rep)
            for s in blocks:
                keep = (s.t >= t_from) & (s.t < t_to)
                n_out = int(len(s) - np.count_nonzero(keep))
                rep.outside += n_out
                if n_out:
                    s = s.select(keep)
                if len(s):
                    rep.samples += len(s)
                    rep.bad_quality += int(len(s) - np.count_nonzero(s.ok))
                    rep.t_first = min(rep.t_first, float(s.t.min()))
                    rep.t_last = max(rep.t_last, float(s.t.max()))
                    yield s
        except TimestampError as exc:
            raise HistoryError(str(exc)) from None
        except (pa.ArrowInvalid, OSError, EOFError, _ISAL_ERROR) as exc:
            if isinstance(exc, FileNotFoundError):
                raise
            raise HistoryError(f"{path}: cannot be read ({_short(exc)}); expected CSV (optionally gzip) or Parquet") from None

    # ------------------------------------------------------------------ CSV
    def _csv(self, path: Path, rep: FileReport) -> Iterator[Samples]:
        with _open_csv(path) as stream:
            yield from self._csv_stream(path, stream, rep)

    def _csv_stream(self, path: Path, stream: Any, rep: FileReport) -> Iterator[Samples]:
        st = _CsvState(TimestampParser(self.timestamps, self.timezone, str(path)))
        rep.time = st.parser.report
        for data in csvblocks.blocks(stream, self.block_size):
            if st.layout is None:  # header not met yet: lines before it and the header, line by line
                end = csvblocks.header_end(data, file_start=st.line0 == 1)
                head, data = (data, b"") if end is None else (data[:end], data[end:])
                yield from self._csv_slow(path, head, st, rep)
            if not data:
                continue
            layout = st.layout
            cols = self._csv_fast(data, layout) if self.fast and layout is not None else None
            if cols is None or layout is None:
                rep.slow_blocks += 1
                yield from self._csv_slow(path, data, st, rep)
                continue
            rep.fast_blocks += 1
            n = len(cols[0])
            rep.rows += n
            yield from self._decode(layout, cols, st.line0 + np.arange(n), st.parser, rep, path)
            st.line0 += n
        if st.header is None:
            raise HistoryError(f"{path}: empty file; expected a header line {_LONG_EXPECT} or timestamp,<TAG>,...")

    def _csv_fast(self, data: bytes, layout: _Layout) -> list[Any] | None:
        """A clean block's columns in one vectorised split (None: read it line by line)."""
        if layout.kind == "long":  # a row without its optional quality refuses the block
            return csvblocks.split_clean(data, layout.n_columns, numeric=frozenset({2}))
        skip = frozenset(j for j, idx in enumerate(layout.index, start=1) if idx < 0)
        numeric = frozenset(range(1, layout.n_columns)) - skip
        return csvblocks.split_clean(data, layout.n_columns, numeric=numeric, empty_is_null=True, skip=skip)

    def _csv_slow(self, path: Path, data: bytes, st: _CsvState, rep: FileReport) -> Iterator[Samples]:
        """One block line by line: blank and comment lines skipped, each bad row named by its line."""
        if not data:
            return
        lines = csvblocks.split_lines(data, self.block_size)
        n = len(lines)
        line0 = st.line0
        st.line0 += n
        stripped = pc.utf8_trim(lines, characters=" \t\r")
        skip = pc.or_(pc.equal(stripped, ""), pc.starts_with(stripped, "#")).to_numpy(zero_copy_only=False)
        rows = np.flatnonzero(~skip)
        if st.header is None and len(rows):
            i0 = int(rows[0])
            st.header = [h.strip().strip('"').strip() for h in stripped[i0].as_py().split(",")]
            st.layout = self._layout(st.header, path, line0 + i0, rep)
            rows = rows[1:]
        layout = st.layout
        if layout is None or not len(rows):
            return
        body = stripped if len(rows) == n else stripped.take(pa.array(rows))
        fields = pc.split_pattern(body, ",")
        nf = pc.list_value_length(fields).to_numpy(zero_copy_only=False)
        want = layout.n_columns
        good = nf == want
        if layout.kind == "long" and layout.optional_quality:
            good |= nf == want - 1
        for i in np.flatnonzero(~good)[: MAX_ERROR_LINES + 1]:
            rep.error(f"{path}:{line0 + int(rows[i])}: {int(nf[i])} fields; expected {layout.expect}")
        rep.bad_rows += max(0, int(np.count_nonzero(~good)) - min(MAX_ERROR_LINES + 1, int(np.count_nonzero(~good))))
        if not good.all():
            fields = fields.filter(pa.array(good))
            rows = rows[good]
            nf = nf[good]
        rep.rows += len(rows)
        if not len(rows):
            return
        cols = [pc.list_element(fields, j) if j < want - 1 or not layout.optional_quality
                else _element_or_empty(fields, j, nf) for j in range(want)]
        cols = [pc.utf8_trim(c, characters=csvblocks.FIELD_TRIM) for c in cols]
        yield from self._decode(layout, cols, line0 + rows, st.parser, rep, path)

    # ------------------------------------------------------------------ Parquet
    def _parquet(self, path: Path, rep: FileReport) -> Iterator[Samples]:
        try:
            pf = pq.ParquetFile(str(path))
        except (pa.ArrowInvalid, OSError) as exc:
            raise HistoryError(f"{path}: not a readable Parquet file ({_short(exc)}); expected Parquet") from None
        header = list(pf.schema_arrow.names)
        layout = self._layout(header, path, 0, rep)
        parser = TimestampParser(self.timestamps, self.timezone, str(path))
        rep.time = parser.report
        row0 = 1
        for batch in pf.iter_batches(batch_size=self.batch_rows):
            n = batch.num_rows
            rep.rows += n
            cols = []
            for j in range(layout.n_columns):
                if j >= batch.num_columns:
                    cols.append(pa.array([""] * n))
                    continue
                c = batch.column(j)
                if j == 0 and (pa.types.is_timestamp(c.type) or pa.types.is_integer(c.type) or pa.types.is_floating(c.type)):
                    cols.append(c)
                elif pa.types.is_floating(c.type) or pa.types.is_integer(c.type):
                    cols.append(c.cast(pa.float64()))
                else:
                    cols.append(pc.utf8_trim_whitespace(c.cast(pa.string())))
            yield from self._decode(layout, cols, row0 + np.arange(n), parser, rep, path, unit="row")
            row0 += n

    # ------------------------------------------------------------------ shared
    def _layout(self, header: list[str], path: Path, line: int, rep: FileReport) -> _Layout:
        low = [h.lower() for h in header]
        if not header or low[0] not in TIME_COLUMNS:
            where = f"{path}:{line}" if line else str(path)
            raise HistoryError(f"{where}: header {','.join(header)!r}; expected {_LONG_EXPECT} (long) or "
                               "timestamp,<TAG>,<TAG>,... (wide)")
        if len(low) >= 3 and low[1] == "tag" and low[2] == "value":
            rep.layout = "long"
            if len(low) > 4 or (len(low) == 4 and low[3] != "quality"):
                raise HistoryError(f"{path}: long layout header {','.join(header)!r}; expected {_LONG_EXPECT}")
            return _Layout("long", len(low), len(low) == 4, [])
        rep.layout = "wide"
        known = set(self.tags)
        index = []
        for name in header[1:]:
            if name in known:
                index.append(self.tags.index(name))
            else:
                index.append(-1)
                rep.rejected["unknown_tag"] += 0
                where = f"{path}:{line}" if line else str(path)
                rep.errors.append(f"{where}: column {name!r} is not a sensor tag of unit {self.config.unit.id!r}; "
                                  "expected a configured tag (column skipped)")
        if all(i < 0 for i in index):
            raise HistoryError(f"{path}: no column names a configured sensor tag; expected timestamp,<TAG>,...")
        return _Layout("wide", len(header), False, index)

    def _decode(self, layout: _Layout, cols: list[pa.Array], lines: np.ndarray, parser: TimestampParser,
                rep: FileReport, path: Path, unit: str = "line") -> Iterator[Samples]:
        def where(i: int) -> str:
            return f"{path}:{int(lines[i])}" if unit == "line" else f"{path}: row {int(lines[i])}"

        t, t_ok, problems = parser.parse(cols[0])
        for i, text in problems:
            rep.error(f"{where(i)}: {text}")
        rep.bad_rows += max(0, int(np.count_nonzero(~t_ok)) - len(problems))
        if layout.kind == "long":
            found = pc.index_in(cols[1], value_set=self._tag_array)
            if found.null_count == 0:
                tag_idx = found.to_numpy(zero_copy_only=False).astype(np.int64)
                unknown = np.zeros(len(tag_idx), bool)
            else:
                unknown = np.asarray(found.is_null().to_numpy(zero_copy_only=False), bool)
                tag_idx = found.fill_null(-1).to_numpy(zero_copy_only=False).astype(np.int64)
            values = cols[2]
            ok_q = np.ones(len(tag_idx), bool)
            if layout.n_columns == 4:
                q = pc.utf8_lower(cols[3].cast(pa.string()))
                ok_q = pc.is_in(q, value_set=self.good_quality).to_numpy(zero_copy_only=False)
            row_ok = t_ok.copy()
            for i in np.flatnonzero(unknown & t_ok)[:MAX_ERROR_LINES]:
                name = cols[1][int(i)].as_py()
                if rep.rejected["unknown_tag"] < 5:
                    rep.errors.append(f"{where(int(i))}: unknown tag {name!r}; expected a sensor tag of unit "
                                      f"{self.config.unit.id!r} (row skipped, counted as unknown_tag)")
                rep.rejected["unknown_tag"] += 1
            n_unknown = int(np.count_nonzero(unknown & t_ok))
            rep.rejected["unknown_tag"] += max(0, n_unknown - min(n_unknown, MAX_ERROR_LINES))
            row_ok &= ~unknown
            yield from self._values([(values, tag_idx, row_ok, ok_q)], t, where, rep)
            return
        parts = []
        for j, idx in enumerate(layout.index, start=1):
            if idx < 0:
                continue
            col = cols[j]
            present = pc.not_equal(col, "").to_numpy(zero_copy_only=False) if pa.types.is_string(col.type) else \
                ~np.asarray(col.is_null().to_numpy(zero_copy_only=False))
            present = np.asarray(present, bool) & t_ok
            parts.append((col, np.full(len(t), idx, np.int64), present, np.ones(len(t), bool)))
        yield from self._values(parts, t, where, rep)

    def _values(self, parts: list[tuple[pa.Array, np.ndarray, np.ndarray, np.ndarray]], t: np.ndarray,
                where: Any, rep: FileReport) -> Iterator[Samples]:
        out_t, out_tag, out_v, out_ok = [], [], [], []
        for col, tag_idx, row_ok, ok_q in parts:
            if pa.types.is_floating(col.type):
                raw = col.to_numpy(zero_copy_only=False).astype(float)
                num_ok = ~np.asarray(col.is_null().to_numpy(zero_copy_only=False))
            else:
                cast = robust_cast(col, pa.float64())
                num_ok = ~np.asarray(cast.is_null().to_numpy(zero_copy_only=False))
                raw = cast.to_numpy(zero_copy_only=False).astype(float)
            bad = row_ok & ~num_ok
            nb = int(np.count_nonzero(bad))
            if nb:
                for i in np.flatnonzero(bad)[:MAX_ERROR_LINES]:
                    rep.error(f"{where(int(i))}: value {col[int(i)].as_py()!r} of tag "
                              f"{self.tags[int(tag_idx[i])]!r} is not a number; expected a number in "
                              f"{self.config.sensors[int(tag_idx[i])].unit}")
                rep.bad_rows += max(0, nb - MAX_ERROR_LINES)
            keep = row_ok & num_ok
            all_kept = bool(keep.all())  # the common case: no copies through a mask
            idx = tag_idx if all_kept else tag_idx[keep]
            v = (raw if all_kept else raw[keep]) * self._scale[idx] + self._offset[idx]
            finite = np.isfinite(v)
            in_range = finite & (v >= self._lo[idx]) & (v <= self._hi[idx])
            n_in = int(np.count_nonzero(in_range))
            n_finite = int(np.count_nonzero(finite))
            rep.rejected["not_finite"] += len(v) - n_finite
            rep.rejected["out_of_range"] += n_finite - n_in
            tk, qk = (t, ok_q) if all_kept else (t[keep], ok_q[keep])
            if n_in < len(v):
                tk, idx, v, qk = tk[in_range], idx[in_range], v[in_range], qk[in_range]
            out_t.append(tk)
            out_tag.append(idx.astype(np.int32))
            out_v.append(v)
            out_ok.append(qk)
        if len(out_t) == 1:
            s = Samples(out_t[0], out_tag[0], out_v[0], out_ok[0])
            if len(s):
                yield s
        elif out_t:
            s = Samples(np.concatenate(out_t), np.concatenate(out_tag), np.concatenate(out_v), np.concatenate(out_ok))
            if len(s):
                yield s
        for k in [k for k, v in rep.rejected.items() if v == 0]:
            del rep.rejected[k]


@dataclass
class _CsvState:
    """Where one CSV read is: header and layout once met, the timestamp parser, the next block's first line."""

    parser: TimestampParser
    header: list[str] | None = None
    layout: _Layout | None = None
    line0: int = 1


@dataclass
class _Layout:
    kind: str  # long / wide
    n_columns: int
    optional_quality: bool
    index: list[int]  # wide: tag index per column after the timestamp (-1 unknown)

    @property
    def expect(self) -> str:
        return _LONG_EXPECT if self.kind == "long" else f"{self.n_columns} fields (timestamp and one per tag column)"


_LONG_EXPECT = "timestamp,tag,value[,quality]"


def _element_or_empty(fields: pa.Array, j: int, nf: np.ndarray) -> pa.Array:
    """Element ``j`` of each list, or "" where the list is shorter (optional last column)."""
    if (nf > j).all():
        return pc.list_element(fields, j)
    padded = pc.list_slice(fields, 0, j + 1)
    out = []
    for a, n in zip(padded.to_pylist(), nf, strict=True):
        out.append(a[j] if n > j else "")
    return pa.array(out, pa.string())


def _short(exc: BaseException) -> str:
    return str(exc).splitlines()[0][:200] if str(exc) else type(exc).__name__


def read_samples(reader: HistoryReader, paths: Sequence[str | Path], t_from: float = -math.inf,
                 t_to: float = math.inf) -> Samples:
    """All samples of ``paths`` in a time range, concatenated (for tests and small spans)."""
    parts = [s for p in paths for s in reader.read(p, t_from, t_to)]
    if not parts:
        return Samples(np.zeros(0), np.zeros(0, np.int32), np.zeros(0), np.zeros(0, bool))
    return Samples(*(np.concatenate([getattr(s, k) for s in parts]) for k in ("t", "tag", "value", "ok")))


def _open_csv(path: Path) -> Any:
    """A binary stream of the CSV text: gzip through ISA-L (``.gz``), plain files through pyarrow."""
    if path.name.lower().endswith(".gz"):
        return igzip.open(path, "rb")
    return pa.input_stream(str(path))
