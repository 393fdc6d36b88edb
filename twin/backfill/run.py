"""The back-fill run: spool the history into chunks, run them (process pool or Dask), assemble, resume."""

from __future__ import annotations

import hashlib
import json
import logging
import math
import os
import shutil
import sys
import time
from collections.abc import Callable, Iterable, Sequence
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from twin.backfill.chunk import _MEASURED, run_chunk
from twin.backfill.drift import DRIFT_INPUTS, drift_pass
from twin.backfill.plan import BackfillError, ChunkSpec, Plan, make_plan
from twin.backfill.rows import EVENTS_HEADER, RECONCILED_COLUMNS, RECONCILED_HEADER, rfc3339
from twin.history import HistoryReader

log = logging.getLogger("twin.backfill")

FORMATS = ("csv", "parquet", "openmetrics")
#: Default chunk: a day of 1-minute windows (4 h at 10 s); with the default warm-up the overlap is 4 %.
#: Memory per worker is bounded by one chunk (its samples, window statistics and OpenMetrics values):
#: a one-day demo-u1 run at 1-minute windows peaked at 386 MB.
DEFAULT_CHUNK_WINDOWS = 1440
#: Default warm-up: measured on the demo scenario (60 s windows, starts across load ramps, the
#: moisture warning, the bias and the efficiency loss), a fresh cycle's steady gate agrees with one
#: sequential pass after at most 15 windows, alarm states and events after at most 16, KPIs
#: from the first window (warm start at 1e-10); 60 windows leave a factor of 4.
DEFAULT_WARMUP_WINDOWS = 60
MANIFEST_VERSION = 3  # 3: drift charts in one sequential pass after the chunks (chunks hold its inputs)


@dataclass
class BackfillOptions:
    """Policy of one back-fill run."""

    t_from: float | None = None
    t_to: float | None = None
    formats: tuple[str, ...] = ("csv", "openmetrics")
    workers: int = 0  # 0: the core count
    scheduler: str | None = None  # tcp://... of a Dask distributed scheduler
    chunk_seconds: float | None = None  # None: DEFAULT_CHUNK_WINDOWS windows
    warmup_seconds: float | None = None  # None: DEFAULT_WARMUP_WINDOWS windows
    cycle: float | None = None  # default: the config's monitoring cycle
    window: float | None = None  # default: the config's monitoring window
    timestamps: str = "auto"
    timezone: str | None = None
    good_quality: tuple[str, ...] = ()
    block_size: int = 4 << 20  # CSV bytes per read block (twin.history.readers.DEFAULT_BLOCK_SIZE)


@dataclass
class BackfillSummary:
    windows: int = 0
    steady: int = 0
    not_converged: int = 0
    transitions: int = 0
    alarms_raised: int = 0
    suspects_raised: int = 0
    chunks: int = 0
    chunks_skipped: int = 0
    samples: int = 0
    bad_rows: int = 0
    rejected: dict[str, int] = field(default_factory=dict)
    seconds: float = 0.0
    chunk_seconds: float = 0.0  # compute time inside the chunks run now (no start-up, no reading)
    worker_peak_rss_mb: float = 0.0
    drift_alarms_raised: int = 0  # of alarms_raised: by the sequential drift pass
    drift_seconds: float = 0.0  # the drift pass (every run, all chunks)
    # where the chunks run now spent their time (sums over chunks, see run_chunk)
    setup_seconds: float = 0.0
    warmup_seconds: float = 0.0
    cycle_seconds: float = 0.0
    reconcile_seconds: float = 0.0
    warmup_windows: int = 0
    t_first: float = math.nan
    t_last: float = math.nan

    def line(self) -> str:
        share = 100.0 * self.steady / self.windows if self.windows else 0.0
        rej = ", ".join(f"{k} {v}" for k, v in sorted(self.rejected.items())) or "none"
        return (f"back-fill done: {self.windows} windows in {self.chunks} chunks ({self.chunks_skipped} already done), "
                f"steady {share:.1f} %, not converged {self.not_converged}, alarms raised {self.alarms_raised} "
                f"({self.drift_alarms_raised} drift), "
                f"suspects raised {self.suspects_raised}, {self.transitions} transitions; {self.samples} samples read, "
                f"{self.bad_rows} bad rows, rejected: {rej}; {self.seconds:.1f} s")


class Progress:
    """A progress bar on a terminal, periodic log lines otherwise."""

    def __init__(self, total: int, stream: Any = None, every: float = 10.0, clock: Callable[[], float] = time.monotonic) -> None:
        self.total, self.done, self.clock = total, 0, clock
        self.stream = stream or sys.stderr
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.every, self.t0, self.last = every, clock(), -math.inf
        self.computed = 0

    def add(self, windows: int, computed: bool = True) -> None:
        self.done += windows
        if computed:
            self.computed += windows
        now = self.clock()
        if not self.tty and now - self.last < self.every and self.done < self.total:
            return
        self.last = now
        el = max(now - self.t0, 1e-9)
        rate = self.computed / el
        eta = (self.total - self.done) / rate if rate > 0 else math.inf
        eta_s = f"{eta / 60:.1f} min" if math.isfinite(eta) else "?"
        if self.tty:
            width = 30
            fill = int(width * self.done / max(self.total, 1))
            self.stream.write(f"\r[{'#' * fill}{'.' * (width - fill)}] {self.done}/{self.total} windows "
                              f"{rate:.1f}/s ETA {eta_s}   ")
            if self.done >= self.total:
                self.stream.write("\n")
            self.stream.flush()
        else:
            log.info("event=backfill_progress windows_done=%d windows_total=%d windows_per_s=%.2f eta_s=%.0f",
                     self.done, self.total, rate, eta if math.isfinite(eta) else -1)


def _input_key(config_path: Path, histories: Sequence[Path], plan: Plan, opts: BackfillOptions) -> str:
    h = hashlib.sha256()
    h.update(config_path.read_bytes())
    for p in histories:
        st = p.stat()
        h.update(f"{p.resolve()}|{st.st_size}|{st.st_mtime_ns}".encode())
    h.update(json.dumps([asdict(plan), opts.timestamps, opts.timezone, list(opts.good_quality),
                         sorted(opts.formats)], sort_keys=True).encode())
    return h.hexdigest()


def _write_json_atomic(path: Path, doc: Any) -> None:
    tmp = path.with_name(path.name + ".tmp")
    tmp.write_text(json.dumps(doc, indent=1, sort_keys=True), encoding="utf-8")
    os.replace(tmp, path)


def _spool(reader: HistoryReader, histories: Sequence[Path], specs: list[ChunkSpec], t_from: float,
           t_to: float, spool_dir: Path) -> tuple[list[int], BackfillSummary]:
    """Read every file once; append samples to the spool of each chunk whose span they fall in."""
    shutil.rmtree(spool_dir, ignore_errors=True)
    spool_dir.mkdir(parents=True)
    starts = np.array([s.read_from for s in specs])
    stops = np.array([s.read_to for s in specs])
    # samples before each chunk's first window start (the cumulative message counter)
    first_starts = np.array([s.first_end - s.window for s in specs])
    before = np.zeros(len(specs), np.int64)
    part = 0
    summary = BackfillSummary()
    for path in histories:
        for block in reader.read(path, float(starts.min()), float(stops.max())):
            if not len(block):
                continue
            summary.samples += len(block)
            before += np.searchsorted(np.sort(block.t), first_starts, "left") - np.searchsorted(
                np.sort(block.t), t_from, "left")
            lo, hi = float(block.t.min()), float(block.t.max())
            for i in np.flatnonzero((starts <= hi) & (stops >= lo)):
                s = specs[int(i)]
                m = (block.t >= s.read_from) & (block.t < s.read_to)
                if m.any():
                    d = spool_dir / s.name
                    d.mkdir(exist_ok=True)
                    np.savez(d / f"part-{part:08d}.npz", t=block.t[m], tag=block.tag[m], value=block.value[m],
                             ok=block.ok[m])
            part += 1
    for rep in reader.reports.values():
        summary.bad_rows += rep.bad_rows
        for k, v in rep.rejected.items():
            summary.rejected[k] = summary.rejected.get(k, 0) + v
    return [max(int(b), 0) for b in before], summary


def backfill(config_path: str | Path, histories: Sequence[str | Path], out_dir: str | Path,
             options: BackfillOptions | None = None, *, config: Any = None,
             echo: Callable[[str], None] = print) -> BackfillSummary:
    """Back-fill ``histories`` into ``out_dir`` (see the module docstring).

    Raises
    ------
    BackfillError
        For inputs that cannot be back-filled (no data in the range, a
        different back-fill already in ``out_dir``...); the message says why.
    twin.history.HistoryError, FileNotFoundError
        For a history file that cannot be read at all.
    """
    opts = options or BackfillOptions()
    config_path = Path(config_path)
    if config is None:
        from twin.config import load_config

        config = load_config(config_path)
    paths = [Path(p) for p in histories]
    for p in paths:
        if not p.exists():
            raise FileNotFoundError(str(p))
    bad = [f for f in opts.formats if f not in FORMATS]
    if bad:
        raise BackfillError(f"--format {','.join(bad)}; expected some of {','.join(FORMATS)}")
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    started = time.monotonic()
    mon = config.monitoring
    cycle = float(opts.cycle or mon.cycle)
    window = float(opts.window or mon.window or cycle)
    reader_kw: dict[str, Any] = {"timestamps": opts.timestamps, "timezone": opts.timezone,
                                 "block_size": opts.block_size}
    if opts.good_quality:
        reader_kw["good_quality"] = opts.good_quality
    t_from, t_to = opts.t_from, opts.t_to
    if t_from is None or t_to is None:  # the span of the data
        probe = HistoryReader(config, **reader_kw)
        lo, hi = math.inf, -math.inf
        for p in paths:
            for b in probe.read(p):
                lo, hi = min(lo, float(b.t.min())), max(hi, float(b.t.max()))
        if not math.isfinite(lo):
            raise BackfillError("the history files hold no usable sample; expected rows of configured tags")
        t_from = lo if t_from is None else t_from
        t_to = hi + 1e-6 if t_to is None else t_to
    lookback = max(float(s.max_age) for s in config.sensors if math.isfinite(float(s.max_age))) if any(
        math.isfinite(float(s.max_age)) for s in config.sensors) else window
    lookback = min(max(lookback, cycle), 3600.0)
    chunk_windows = DEFAULT_CHUNK_WINDOWS if opts.chunk_seconds is None else max(1, round(opts.chunk_seconds / cycle))
    warmup = DEFAULT_WARMUP_WINDOWS if opts.warmup_seconds is None else round(opts.warmup_seconds / cycle)
    plan = make_plan(t_from, t_to, cycle, window, chunk_windows, warmup)
    key = _input_key(config_path, paths, plan, opts)
    manifest_path = out / "manifest.json"
    manifest: dict[str, Any] = {"version": MANIFEST_VERSION, "key": key, "chunks": {}, "spooled": False}
    if manifest_path.exists():
        try:
            old = json.loads(manifest_path.read_text(encoding="utf-8"))
        except (OSError, json.JSONDecodeError) as exc:
            raise BackfillError(f"{manifest_path}: unreadable ({exc}); expected a twin back-fill manifest "
                                "(remove the directory to start afresh)") from None
        if old.get("key") != key or old.get("version") != MANIFEST_VERSION:
            raise BackfillError(f"{out}: holds a back-fill of other inputs or settings; expected the same config, "
                                "history files and options to resume (use another --out or remove it)")
        manifest = old
    chunk_dir, spool_dir = out / "chunks", out / "spool"
    chunk_dir.mkdir(exist_ok=True)
    raw = plan.chunks()
    proto = [ChunkSpec(i, first, n, warmup, cycle, window, lookback, str(config_path.resolve()), "", "",
                       tuple(opts.formats), 0, ()) for i, first, n in raw]
    proto = [replace(s, spool=str(spool_dir / s.name), out=str(chunk_dir / s.name)) for s in proto]
    reader = HistoryReader(config, **reader_kw)
    # a recorded chunk is done when its outputs are there, its drift inputs too (the drift pass reads them)
    done_before = {s.name for s in proto if s.name in manifest["chunks"] and (Path(s.out) / DRIFT_INPUTS).exists()}
    # the spool is removed once every chunk is done: a chunk to run again then needs it read again
    if manifest.get("spooled") and (spool_dir.exists() or len(done_before) == len(proto)):
        before, summary = manifest["before"], BackfillSummary(**manifest["read"])
    else:
        echo(f"reading {len(paths)} file(s) for {plan.ends[2]} windows "
             f"({rfc3339(plan.ends[0])} .. {rfc3339(plan.ends[1])}, {cycle:g} s cycle, {window:g} s window)")
        before, summary = _spool(reader, paths, proto, plan.t_from, plan.t_to, spool_dir)
        for rep in reader.reports.values():
            echo(rep.summary())
            for line in rep.errors:
                echo(line)
            for note in rep.time.dst_notes:
                echo(note)
        # chunk records stay: the same key means the same inputs, so the spool is read to the same samples
        manifest.update(spooled=True, before=before, read=asdict(summary),
                        chunks={k: v for k, v in manifest["chunks"].items() if k in done_before})
        _write_json_atomic(manifest_path, manifest)
    rejected = tuple(sorted(summary.rejected.items()))
    specs = [replace(s, messages_before=before[s.index], rejected=rejected) for s in proto]
    todo = [s for s in specs if s.name not in done_before]
    progress = Progress(plan.ends[2])
    for s in specs:
        if s not in todo:
            summary.chunks_skipped += 1
            progress.add(s.n, computed=False)
    results: dict[str, dict[str, Any]] = dict(manifest["chunks"])

    def finished(s: ChunkSpec, res: dict[str, Any]) -> None:
        results[s.name] = {k: v for k, v in res.items() if k not in _MEASURED}
        summary.chunk_seconds += float(res.get("seconds", 0.0))
        for k in ("setup_seconds", "warmup_seconds", "cycle_seconds", "reconcile_seconds"):
            setattr(summary, k, getattr(summary, k) + float(res.get(k, 0.0)))
        summary.warmup_windows += s.warmup
        summary.worker_peak_rss_mb = max(summary.worker_peak_rss_mb, float(res.get("peak_rss_mb", 0.0)))
        manifest["chunks"] = results
        _write_json_atomic(manifest_path, manifest)
        progress.add(s.n)

    if todo:
        echo(f"{len(todo)} chunk(s) to run ({summary.chunks_skipped} done before), "
             f"{'Dask scheduler ' + opts.scheduler if opts.scheduler else str(_workers(opts)) + ' worker process(es)'}")
    if opts.scheduler:
        runner: _Runner = _DaskRunner(opts.scheduler)
    elif _workers(opts) == 1 or len(todo) <= 1:
        runner = _Runner()
    else:
        runner = _PoolRunner(min(_workers(opts), len(todo)))
    with runner:
        pending = {runner.submit(run_chunk, s, s.name): s for s in todo}
        while pending:
            for fut in runner.first_done(list(pending)):
                spec = pending.pop(fut)
                finished(spec, _task_result(f"chunk {spec.name} ({rfc3339(spec.first_end)}, {spec.n} windows)", fut))
    summary.chunks = len(specs)
    for s in specs:
        res = results[s.name]
        for k in ("windows", "steady", "not_converged", "transitions", "alarms_raised", "suspects_raised"):
            setattr(summary, k, getattr(summary, k) + int(res.get(k, 0)))
    drift = drift_pass(config, specs, out, opts.formats)  # sequential, over every chunk, on every run
    summary.drift_seconds = drift.seconds
    summary.transitions += drift.transitions
    summary.alarms_raised += drift.raised
    summary.drift_alarms_raised = drift.raised
    _assemble(out, specs, opts.formats, drift.rows)
    summary.seconds = time.monotonic() - started
    summary.t_first, summary.t_last = plan.ends[0], plan.ends[1]
    if len(results) == len(specs):
        shutil.rmtree(spool_dir, ignore_errors=True)
    return summary


def _workers(opts: BackfillOptions) -> int:
    return opts.workers if opts.workers > 0 else (os.cpu_count() or 1)


def _task_result(what: str, fut: Any) -> dict[str, Any]:
    try:
        return dict(fut.result())
    except Exception as exc:  # a worker's failure becomes one line naming the chunk
        raise BackfillError(f"{what} failed in its worker: {type(exc).__name__}: {exc}; finished chunks are kept, "
                            "run again to resume") from None


class _Runner:
    """Runs tasks in this process, one at a time in submission order, each when its result is waited for.

    So each finished chunk is recorded in the manifest before the next one starts.
    """

    def __init__(self) -> None:
        self.queue: list[tuple[Future[dict[str, Any]], Callable[[ChunkSpec], dict[str, Any]], ChunkSpec]] = []

    def __enter__(self) -> _Runner:
        return self

    def __exit__(self, *exc: object) -> None:
        pass

    def submit(self, fn: Callable[[ChunkSpec], dict[str, Any]], spec: ChunkSpec, name: str) -> Any:
        fut: Future[dict[str, Any]] = Future()
        self.queue.append((fut, fn, spec))
        return fut

    def first_done(self, futures: list[Any]) -> Iterable[Any]:
        fut, fn, spec = self.queue.pop(0)
        try:
            fut.set_result(fn(spec))
        except Exception as exc:
            fut.set_exception(exc)
        return [fut]


class _PoolRunner(_Runner):
    """Worker processes (spawned: a fresh interpreter, no inherited state)."""

    def __init__(self, workers: int) -> None:
        import multiprocessing as mp

        self.pool = ProcessPoolExecutor(max_workers=workers, mp_context=mp.get_context("spawn"))

    def __exit__(self, *exc: object) -> None:
        self.pool.shutdown(cancel_futures=True)

    def submit(self, fn: Callable[[ChunkSpec], dict[str, Any]], spec: ChunkSpec, name: str) -> Any:
        return self.pool.submit(fn, spec)

    def first_done(self, futures: list[Any]) -> Iterable[Any]:
        return wait(futures, return_when=FIRST_COMPLETED)[0]


class _DaskRunner(_Runner):
    """The same tasks on a Dask distributed scheduler (``twin[cluster]``)."""

    def __init__(self, address: str) -> None:
        try:
            from distributed import Client
            from distributed import wait as dask_wait
        except ImportError:
            raise BackfillError("--scheduler needs Dask distributed; expected it installed: "
                                "pip install 'twin[cluster]'") from None
        try:
            self.client = Client(address, timeout=30)
        except (OSError, TimeoutError) as exc:
            raise BackfillError(f"--scheduler {address}: cannot connect ({exc}); expected a running Dask scheduler") from None
        self._wait = dask_wait

    def __exit__(self, *exc: object) -> None:
        self.client.close()

    def submit(self, fn: Callable[[ChunkSpec], dict[str, Any]], spec: ChunkSpec, name: str) -> Any:
        return self.client.submit(fn, spec, key=f"twin-backfill-{name}-{spec.first_end:.0f}", pure=False)

    def first_done(self, futures: list[Any]) -> Iterable[Any]:
        return self._wait(futures, return_when="FIRST_COMPLETED").done


def _assemble(out: Path, specs: Sequence[ChunkSpec], formats: Sequence[str],
              drift_rows: dict[str, list[tuple[float, str]]]) -> None:
    """Concatenate finished chunks in time order into the final files (atomic renames).

    ``drift_rows``: the drift pass's events per chunk, merged into the chunk's events
    by time (after the chunk's own events of the same window, as the live cycle orders them).
    """
    if "csv" in formats or "parquet" in formats:
        tmp = out / "reconciled.csv.tmp"
        with open(tmp, "w", encoding="utf-8", newline="") as f:
            f.write(RECONCILED_HEADER)
            for s in specs:
                with open(Path(s.out) / "reconciled.csv", encoding="utf-8") as part:
                    shutil.copyfileobj(part, f)
        if "parquet" in formats:
            from twin.history.writers import csv_to_parquet

            csv_to_parquet(tmp, out / "reconciled.parquet", RECONCILED_COLUMNS)
        if "csv" in formats:
            os.replace(tmp, out / "reconciled.csv")
        else:
            tmp.unlink()
    tmp = out / "events.csv.tmp"
    with open(tmp, "w", encoding="utf-8", newline="") as f:
        f.write(EVENTS_HEADER)
        for s in specs:
            lines = Path(s.out, "events.csv").read_text(encoding="utf-8").splitlines(keepends=True)
            rows = [(_event_time(ln), 0, k, ln) for k, ln in enumerate(lines)]
            rows += [(t, 1, k, ln) for k, (t, ln) in enumerate(drift_rows.get(s.name, []))]
            f.writelines(ln for *_, ln in sorted(rows))
    os.replace(tmp, out / "events.csv")
    if "openmetrics" in formats:
        om = out / "openmetrics"
        om.mkdir(exist_ok=True)
        for s in specs:
            src = Path(s.out) / "metrics.om"
            if src.exists():
                dst = om / f"{s.name}.om"
                shutil.copyfile(src, dst.with_suffix(".tmp"))
                os.replace(dst.with_suffix(".tmp"), dst)


def _event_time(row: str) -> float:
    """The time [s] of an events.csv row (its first field, RFC 3339)."""
    from datetime import datetime

    return datetime.fromisoformat(row.split(",", 1)[0]).timestamp()


def output_digest(out_dir: str | Path) -> str:
    """SHA-256 over the final output files (reconciled, events, OpenMetrics), for resume checks."""
    out = Path(out_dir)
    h = hashlib.sha256()
    files = [out / n for n in ("reconciled.csv", "reconciled.parquet", "events.csv")]
    files += sorted((out / "openmetrics").glob("*.om")) if (out / "openmetrics").exists() else []
    for p in files:
        if p.exists():
            h.update(p.name.encode())
            h.update(p.read_bytes() if p.suffix != ".parquet" else b"")
    return h.hexdigest()
