"""Historian back-fill: the live per-window cycle over a span of history, in chunks, resumable.

Stages:

1. **Spool** (one pass, main process): every history file is read once in
   blocks (:class:`twin.history.HistoryReader`) and its SI samples are
   appended to the spool files of the chunks whose span (warm-up included)
   they fall in. Memory is bounded by one block.
2. **Chunks** (worker processes, or Dask workers with ``scheduler``): each
   chunk is a run of consecutive windows on the configured cycle grid. Its
   worker computes, per window, the same :class:`twin.ingest.store.WindowStats`
   the live tag store produces (window ``[t_end - window, t_end)``, gate means
   over the last cycle, staleness from the newest good sample held) and feeds
   them to :class:`twin.cycle.UnitCycle` as the daemon does.
3. **Assemble**: finished chunks are concatenated in time order into
   ``reconciled.csv``/``.parquet`` and ``events.csv``; ``openmetrics/`` holds
   one OpenMetrics file per chunk.

Sequential state (steady-state gate, alarm delays, suspect persistence, drift
charts, the reconciler's warm start): **each chunk starts with a warm-up
overlap**. A fresh cycle object runs the ``warmup`` windows before the chunk
and their output is discarded; the chunk's windows then see monitor states
built from the same recent history as a single sequential pass. The filters
and delays forget their start within the warm-up (steady-gate filters with
λ = 0.1 decay as 0.9^n; alarm delays and suspect persistence are a few
windows); what can still differ from one uninterrupted pass is stated in
the README (a CUSUM that has not come back to zero across a chunk boundary,
and the reconciler's warm start at solver tolerance). Chunks are a fixed
grid of the range, so the output does not depend on the number of workers,
on Dask versus local processes, or on interruptions.

Each finished chunk is written to ``DIR/chunks/<id>/`` under a temporary name
and renamed, then recorded in ``DIR/manifest.json`` (rewritten atomically);
a run started again with the same inputs skips recorded chunks. Output bytes
are a function of the inputs only: wall-clock figures (compute time) are not
written, and the reconciler runs without its wall-clock time budget.

Advisory monitoring only: back-filled alarms describe the past; nothing here
trips, interlocks or operates equipment.
"""

from __future__ import annotations

import hashlib
import json
import logging
import math
import os
import shutil
import sys
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from dataclasses import asdict, dataclass, field, replace
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from twin.history import HistoryReader, Samples
from twin.ingest.store import WindowStats
from twin.result import CycleResult, InputStats

log = logging.getLogger("twin.backfill")

FORMATS = ("csv", "parquet", "openmetrics")
MANIFEST_VERSION = 1
RECONCILED_HEADER = "window_end,name,value,uncertainty_95,unit,status,steady\n"
EVENTS_HEADER = "time,alarm,level,old,new,value,reason\n"
_QUANTITY_UNITS = {"mass_flow": "kg/s", "pressure": "Pa", "temperature": "K", "power": "W",
                   "cooling_water_inlet_temperature": "K", "cooling_water_outlet_temperature": "K"}


class BackfillError(ValueError):
    """The back-fill cannot do its job (message says what and what was expected)."""


# ----------------------------------------------------------------------------- plan
@dataclass(frozen=True)
class ChunkSpec:
    """One chunk: windows ending at ``first_end + k * cycle`` for ``k < n``, plus warm-up before."""

    index: int
    first_end: float  # [s]
    n: int
    warmup: int  # windows before first_end run and discarded
    cycle: float  # [s]
    window: float  # [s]
    lookback: float  # [s] samples held before the first window's start (staleness)
    config_path: str
    spool: str  # directory of this chunk's samples
    out: str  # final directory of this chunk's outputs
    formats: tuple[str, ...]
    messages_before: int  # samples before the chunk's first window (cumulative counter base)
    rejected: tuple[tuple[str, int], ...]  # read-time rejections of the whole run, by reason

    @property
    def ends(self) -> np.ndarray:
        k = np.arange(-self.warmup, self.n)
        return self.first_end + k * self.cycle

    @property
    def read_from(self) -> float:
        return self.first_end - (self.warmup + 1) * self.cycle - self.window - self.lookback

    @property
    def read_to(self) -> float:
        return self.first_end + (self.n - 1) * self.cycle

    @property
    def name(self) -> str:
        return f"chunk-{self.index:06d}"


@dataclass(frozen=True)
class Plan:
    """The window grid of a back-fill and its chunks."""

    t_from: float
    t_to: float
    cycle: float
    window: float
    ends: tuple[float, float, int]  # first end, last end, count
    chunk_windows: int
    warmup: int

    def chunks(self) -> list[tuple[int, float, int]]:
        first, _, count = self.ends
        out = []
        for i, k0 in enumerate(range(0, count, self.chunk_windows)):
            out.append((i, first + k0 * self.cycle, min(self.chunk_windows, count - k0)))
        return out


def make_plan(t_from: float, t_to: float, cycle: float, window: float, chunk_windows: int, warmup: int) -> Plan:
    """Windows ending on the cycle grid (multiples of ``cycle`` since the epoch) in ``(t_from + window, t_to]``."""
    if not (math.isfinite(t_from) and math.isfinite(t_to) and t_to > t_from):
        raise BackfillError(f"range {t_from!r}..{t_to!r}; expected a start before the end")
    if chunk_windows < 1 or warmup < 0:
        raise BackfillError("chunk must hold at least one window and the warm-up may not be negative")
    first = math.ceil((t_from + window) / cycle) * cycle
    last = math.floor(t_to / cycle) * cycle
    count = round((last - first) / cycle) + 1 if last >= first else 0
    if count <= 0:
        raise BackfillError(f"the range holds no whole {window:g} s window on the {cycle:g} s grid")
    return Plan(t_from, t_to, cycle, window, (first, last, count), chunk_windows, warmup)


# ----------------------------------------------------------------------------- window statistics
def _stats(tg: np.ndarray, vg: np.ndarray, tb: np.ndarray, t_end: float, width: float, held_from: float,
           max_age: float) -> WindowStats:
    """:meth:`twin.ingest.store.TagStore.window` of one tag over ``[t_end - width, t_end)`` on sorted arrays."""
    hi = int(np.searchsorted(tg, t_end, "left"))
    lo = int(np.searchsorted(tg, t_end - width, "left"))
    held = hi > 0 and tg[hi - 1] >= held_from
    n_bad = int(np.searchsorted(tb, t_end, "left") - np.searchsorted(tb, t_end - width, "left"))
    count = hi - lo
    last_time = float(tg[hi - 1]) if held else math.nan
    age = t_end - last_time if held else math.inf
    if count:
        x = vg[lo:hi]
        mean, mn, mx = float(x.mean()), float(x.min()), float(x.max())
        std = float(x.std(ddof=1)) if count > 1 else math.nan
    else:
        mean = std = mn = mx = math.nan
    return WindowStats(mean, std, count, n_bad, last_time, age, mn, mx, age > max_age)


def window_inputs(samples: Samples, tags: Sequence[str], ends: np.ndarray, window: float, cycle: float,
                  max_age: Sequence[float], gate_tags: Sequence[str],
                  lookback: float) -> list[tuple[float, dict[str, WindowStats], dict[str, WindowStats]]]:
    """Per window end: (t_end, stats by tag, gate stats), as the daemon computes them from its tag store.

    ``stats`` follow :meth:`twin.ingest.store.TagStore.window` over
    ``[t_end - window, t_end)``; the gate statistics are over the last cycle
    ``[t_end - cycle, t_end)`` (the steady-state key signals only). A sample
    counts as held for staleness when it is at most ``lookback`` seconds
    before the window start (the live ring holds the newest samples).
    """
    order = np.lexsort((samples.t, samples.tag))
    tag_sorted = samples.tag[order]
    bounds = np.searchsorted(tag_sorted, np.arange(len(tags) + 1))
    per_tag = []
    for i in range(len(tags)):
        sl = order[bounds[i]:bounds[i + 1]]
        t, v, ok = samples.t[sl], samples.value[sl], samples.ok[sl]
        per_tag.append((t[ok], v[ok], t[~ok]))
    gate_idx = [(tags.index(g), g) for g in gate_tags if g in tags]
    out = []
    for t_end in ends:
        t_end = float(t_end)
        held_from = t_end - window - lookback
        stats = {tag: _stats(*per_tag[i], t_end, window, held_from, max_age[i]) for i, tag in enumerate(tags)}
        gate = {tag: _stats(*per_tag[i], t_end, cycle, held_from, max_age[i]) for i, tag in gate_idx}
        out.append((t_end, stats, gate))
    return out


# ----------------------------------------------------------------------------- rows
def rfc3339(t: float) -> str:
    """Unix seconds → ``YYYY-MM-DDTHH:MM:SS[.ffffff]Z``."""
    dt = datetime.fromtimestamp(t, UTC)
    text = dt.strftime("%Y-%m-%dT%H:%M:%S")
    if dt.microsecond:
        text += f".{dt.microsecond:06d}".rstrip("0")
    return text + "Z"


def _num(x: float) -> str:
    return repr(float(x)) if x is not None and math.isfinite(x) else ""


def result_rows(r: CycleResult, kpi_units: Mapping[str, str]) -> Iterable[str]:
    """The reconciled.csv lines of one window (see the README for the names)."""
    when = rfc3339(r.window_end)
    tail = f"{r.reconcile_status},{'true' if r.steady else 'false'}\n"
    for key, e in r.kpis.items():
        if e.available and math.isfinite(e.value):
            yield f"{when},{key},{_num(e.value)},{_num(e.uncertainty)},{kpi_units.get(key, '1')},{tail}"
    for tag, t in r.tags.items():
        if math.isfinite(t.reconciled):
            yield (f"{when},tag:{tag},{_num(t.reconciled)},{_num(1.96 * t.reconciled_sigma)},"
                   f"{_QUANTITY_UNITS.get(t.quantity, '')},{tail}")
    for key, v in r.expected.items():
        if math.isfinite(v):
            yield f"{when},expected:{key},{_num(v)},,{kpi_units.get(key, '1')},{tail}"
    if math.isfinite(r.heat_rate_deviation):
        yield f"{when},deviation:total,{_num(r.heat_rate_deviation)},,1,{tail}"
    for cause, v in r.heat_rate_deviation_by_cause.items():
        if math.isfinite(v):
            yield f"{when},deviation:{cause},{_num(v)},,1,{tail}"


def event_row(tr: Any) -> str:
    reason = str(tr.reason).replace('"', "'")
    return (f"{rfc3339(tr.time)},{tr.alarm},{tr.level},{tr.old},{tr.new},{_num(tr.value)},"
            f"\"{reason}\"\n")


def _go_float(d: float) -> str:
    """A sample value as the Prometheus client writes it (Go's float formatting)."""
    if d == math.inf:
        return "+Inf"
    if d == -math.inf:
        return "-Inf"
    if math.isnan(d):
        return "NaN"
    text = repr(d)
    dot = text.find(".")
    if d > 0 and dot > 6:
        mantissa = f"{text[0]}.{text[1:dot]}{text[dot + 1:]}".rstrip("0.")
        return f"{mantissa}e+{dot - 1:02d}"
    return text


def _esc(text: str) -> str:
    return text.replace("\\", "\\\\").replace("\n", "\\n").replace('"', '\\"')


def openmetrics_text(results: Sequence[CycleResult]) -> str:
    """OpenMetrics text of several results, samples stamped with each window end [s].

    The families come from the live collector (:func:`twin.metrics.build_families`,
    so the names are the live ones); this writer only formats them, once per
    family, series grouped in time order, ``# EOF`` at the end — the same text
    as :func:`twin.metrics.openmetrics_lines`, written without building one
    registry per chunk (about 10 times faster on a day of windows).
    """
    from twin.metrics import build_families

    families: dict[str, tuple[str, str, str, dict[tuple[str, tuple[tuple[str, str], ...]], list[str]]]] = {}
    for r in sorted(results, key=lambda r: r.window_end):
        if not math.isfinite(r.window_end):
            raise ValueError(f"result of unit {r.unit_id!r} has no finite window_end")
        for fam in build_families(r, r.window_end):
            if fam.name == "twin_cycle_result_available":
                continue  # a live-endpoint liveness signal, meaningless in history
            entry = families.get(fam.name)
            if entry is None:
                entry = families[fam.name] = (fam.type, fam.documentation, fam.unit, {})
            series = entry[3]
            for smp in fam.samples:
                key = (smp.name, tuple(sorted(smp.labels.items())))
                lines = series.get(key)
                if lines is None:
                    labels = ",".join(f'{k}="{_esc(v)}"' for k, v in key[1])
                    lines = series[key] = [f"{smp.name}{{{labels}}}" if labels else smp.name]
                lines.append(f"{lines[0]} {_go_float(float(smp.value))} {smp.timestamp}\n")
    out: list[str] = []
    for name, (kind, doc, unit, series) in families.items():
        out.append(f"# HELP {name} {_esc(doc)}\n# TYPE {name} {kind}\n")
        if unit:
            out.append(f"# UNIT {name} {unit}\n")
        for lines in series.values():
            out.extend(lines[1:])
    out.append("# EOF\n")
    return "".join(out)


# ----------------------------------------------------------------------------- the chunk function
_WORKER: dict[str, Any] = {}
_MEASURED = ("seconds", "peak_rss_mb")  # machine figures of a chunk: reported, never written to outputs


def _model_for(config_path: str, cycle: float, window: float) -> tuple[Any, Any, dict[str, str], Any]:
    """(config, reconciler, KPI units, expected model), built once per process and grid (the costly part)."""
    key = f"{config_path}|{cycle!r}|{window!r}"
    if key not in _WORKER:
        os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
        from twin.config import load_config
        from twin.performance.plant_reconcile import PlantReconciler

        config = load_config(config_path)
        config.monitoring.cycle, config.monitoring.window = cycle, window
        # no wall-clock time budget: the result must not depend on the machine's load
        reconciler = PlantReconciler(config, time_budget=math.inf)
        units = {d.name: {"ratio": "1"}.get(d.unit, d.unit) for d in reconciler.kpi_defs}
        from twin.model.solve import Operation
        from twin.performance.expected import ExpectedModel

        # its operating-point grid is solved from the design point (not from the windows),
        # so the chunks of one process share it; each chunk starts it over
        expected = ExpectedModel.from_config(config, reconciler.fs, Operation.from_config(config),
                                             reconciler.design, reconciler.settings)
        _WORKER.clear()
        _WORKER[key] = (config, reconciler, units, expected)
    return _WORKER[key]


def fresh_cycle(config_path: str, cycle: float, window: float) -> tuple[Any, Any, dict[str, str]]:
    """A new :class:`twin.cycle.UnitCycle` in its initial state on the process's reconciler.

    New for every chunk: every warm start and filter (also those not in the
    snapshot, e.g. the expected model's previous point) starts from the same state, so
    a chunk's output does not depend on which chunks its process ran before. The
    expected model's grid is kept (:meth:`ExpectedModel.start_over`): its nodes are
    solved from the design point, so keeping them changes the time, not the numbers.
    """
    from twin.cycle import UnitCycle

    config, reconciler, units, expected = _model_for(config_path, cycle, window)
    reconciler.reset()
    return config, UnitCycle(config, reconciler=reconciler, expected_model=expected), units


def _peak_rss_mb() -> float:
    """This process's peak resident memory [MiB] (VmHWM; unlike ru_maxrss it is not inherited across exec)."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return float(line.split()[1]) / 1024.0
    except OSError:
        pass
    return math.nan


def load_spool(spool: str | Path) -> Samples:
    parts = sorted(Path(spool).glob("*.npz")) if Path(spool).exists() else []
    if not parts:
        return Samples(np.zeros(0), np.zeros(0, np.int32), np.zeros(0), np.zeros(0, bool))
    arrays = [np.load(p) for p in parts]
    return Samples(*(np.concatenate([a[k] for a in arrays]) for k in ("t", "tag", "value", "ok")))


def run_chunk(spec: ChunkSpec) -> dict[str, Any]:
    """Run one chunk and write its outputs atomically to ``spec.out``; returns its summary.

    A pure function of the spec and the spool files: the same chunk run twice
    (another process, another machine of a Dask cluster) writes the same bytes.
    """
    from twin.cycle import WindowInput

    config, cyc, units = fresh_cycle(spec.config_path, spec.cycle, spec.window)
    samples = load_spool(spec.spool)
    tags = [s.tag for s in config.sensors]
    max_age = [float(s.max_age) for s in config.sensors]
    gate_tags = list(config.monitoring.steady_signals)
    inputs = window_inputs(samples, tags, spec.ends, spec.window, spec.cycle, max_age, gate_tags, spec.lookback)
    sample_t = np.sort(samples.t)
    base_index = int(np.searchsorted(sample_t, spec.first_end - spec.window, "left"))
    rejected = dict(spec.rejected)
    tmp = Path(spec.out + ".tmp")
    shutil.rmtree(tmp, ignore_errors=True)
    tmp.mkdir(parents=True)
    results: list[CycleResult] = []
    summary = {"index": spec.index, "windows": 0, "steady": 0, "converged": 0, "not_converged": 0,
               "transitions": 0, "alarms_raised": 0, "suspects_raised": 0, "seconds": 0.0}
    started = time.perf_counter()
    with open(tmp / "reconciled.csv", "w", encoding="utf-8", newline="") as rec_f, \
            open(tmp / "events.csv", "w", encoding="utf-8", newline="") as ev_f:
        for k, (t_end, stats, gate) in enumerate(inputs):
            warm = k < spec.warmup
            msgs = spec.messages_before + int(np.searchsorted(sample_t, t_end, "left")) - base_index
            out = cyc.run(WindowInput(t_end=t_end, window_seconds=spec.window, stats=stats, gate_stats=gate,
                                      inputs=InputStats(messages=max(msgs, 0), rejected=rejected)))
            if warm:
                continue
            r = replace(out.result, compute_seconds=math.nan)
            summary["windows"] += 1
            summary["steady"] += int(r.steady)
            summary["converged"] += int(r.reconcile_status == "converged")
            summary["not_converged"] += int(r.reconcile_status not in ("converged", "not_steady"))
            if "csv" in spec.formats or "parquet" in spec.formats:
                rec_f.writelines(result_rows(r, units))
            for tr in out.transitions:
                ev_f.write(event_row(tr))
                summary["transitions"] += 1
                if tr.new == "active":
                    summary["suspects_raised" if str(tr.level) == "suspect" else "alarms_raised"] += 1
            if "openmetrics" in spec.formats:
                results.append(r)
    if "openmetrics" in spec.formats and results:
        (tmp / "metrics.om").write_text(openmetrics_text(results), encoding="utf-8")
    summary["seconds"] = time.perf_counter() - started
    (tmp / "summary.json").write_text(json.dumps({k: v for k, v in summary.items() if k not in _MEASURED},
                                                 sort_keys=True), encoding="utf-8")
    summary["peak_rss_mb"] = _peak_rss_mb()
    final = Path(spec.out)
    shutil.rmtree(final, ignore_errors=True)
    os.replace(tmp, final)
    return summary


# ----------------------------------------------------------------------------- orchestration
@dataclass
class BackfillOptions:
    """Policy of one back-fill run."""

    t_from: float | None = None
    t_to: float | None = None
    formats: tuple[str, ...] = ("csv", "openmetrics")
    workers: int = 0  # 0: the core count
    scheduler: str | None = None  # tcp://... of a Dask distributed scheduler
    chunk_seconds: float = 6 * 3600.0
    warmup_seconds: float = 3600.0
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
    t_first: float = math.nan
    t_last: float = math.nan

    def line(self) -> str:
        share = 100.0 * self.steady / self.windows if self.windows else 0.0
        rej = ", ".join(f"{k} {v}" for k, v in sorted(self.rejected.items())) or "none"
        return (f"back-fill done: {self.windows} windows in {self.chunks} chunks ({self.chunks_skipped} already done), "
                f"steady {share:.1f} %, not converged {self.not_converged}, alarms raised {self.alarms_raised}, "
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
    chunk_windows = max(1, round(opts.chunk_seconds / cycle))
    warmup = round(opts.warmup_seconds / cycle)
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
    if manifest.get("spooled"):
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
        manifest.update(spooled=True, before=before, read=asdict(summary), chunks={})
        _write_json_atomic(manifest_path, manifest)
    rejected = tuple(sorted(summary.rejected.items()))
    specs = [replace(s, messages_before=before[s.index], rejected=rejected) for s in proto]
    todo = [s for s in specs if s.name not in manifest["chunks"] or not Path(s.out).exists()]
    progress = Progress(plan.ends[2])
    for s in specs:
        if s not in todo:
            summary.chunks_skipped += 1
            progress.add(s.n, computed=False)
    results: dict[str, dict[str, Any]] = dict(manifest["chunks"])

    def finished(s: ChunkSpec, res: dict[str, Any]) -> None:
        results[s.name] = {k: v for k, v in res.items() if k not in _MEASURED}
        summary.chunk_seconds += float(res.get("seconds", 0.0))
        summary.worker_peak_rss_mb = max(summary.worker_peak_rss_mb, float(res.get("peak_rss_mb", 0.0)))
        manifest["chunks"] = results
        _write_json_atomic(manifest_path, manifest)
        progress.add(s.n)

    if todo:
        echo(f"{len(todo)} chunk(s) to run ({summary.chunks_skipped} done before), "
             f"{'Dask scheduler ' + opts.scheduler if opts.scheduler else str(_workers(opts)) + ' worker process(es)'}")
    if opts.scheduler:
        _run_dask(opts.scheduler, todo, finished)
    elif _workers(opts) == 1 or len(todo) <= 1:
        for s in todo:
            finished(s, run_chunk(s))
    else:
        _run_pool(_workers(opts), todo, finished)
    summary.chunks = len(specs)
    for s in specs:
        res = results[s.name]
        for k in ("windows", "steady", "not_converged", "transitions", "alarms_raised", "suspects_raised"):
            setattr(summary, k, getattr(summary, k) + int(res.get(k, 0)))
    _assemble(out, specs, opts.formats)
    summary.seconds = time.monotonic() - started
    summary.t_first, summary.t_last = plan.ends[0], plan.ends[1]
    if len(results) == len(specs):
        shutil.rmtree(spool_dir, ignore_errors=True)
    return summary


def _workers(opts: BackfillOptions) -> int:
    return opts.workers if opts.workers > 0 else (os.cpu_count() or 1)


def _run_pool(workers: int, todo: list[ChunkSpec], finished: Callable[[ChunkSpec, dict[str, Any]], None]) -> None:
    import multiprocessing as mp

    with ProcessPoolExecutor(max_workers=min(workers, len(todo)), mp_context=mp.get_context("spawn")) as pool:
        pending = {pool.submit(run_chunk, s): s for s in todo}
        while pending:
            done, _ = wait(pending, return_when=FIRST_COMPLETED)
            for f in done:
                s = pending.pop(f)
                finished(s, _chunk_result(s, f))


def _chunk_result(s: ChunkSpec, fut: Any) -> dict[str, Any]:
    try:
        return dict(fut.result())
    except Exception as exc:  # a worker's failure becomes one line naming the chunk
        raise BackfillError(f"chunk {s.name} ({rfc3339(s.first_end)}, {s.n} windows) failed in its worker: "
                            f"{type(exc).__name__}: {exc}; finished chunks are kept, run again to resume") from None


def _run_dask(address: str, todo: list[ChunkSpec], finished: Callable[[ChunkSpec, dict[str, Any]], None]) -> None:
    try:
        from distributed import Client, as_completed
    except ImportError:
        raise BackfillError("--scheduler needs Dask distributed; expected it installed: pip install 'twin[cluster]'") from None
    try:
        client = Client(address, timeout=30)
    except (OSError, TimeoutError) as exc:
        raise BackfillError(f"--scheduler {address}: cannot connect ({exc}); expected a running Dask scheduler") from None
    try:
        futures = {client.submit(run_chunk, s, key=f"twin-backfill-{s.name}-{s.first_end:.0f}", pure=False): s
                   for s in todo}
        for fut in as_completed(list(futures)):
            finished(futures[fut], _chunk_result(futures[fut], fut))
    finally:
        client.close()


def _assemble(out: Path, specs: Sequence[ChunkSpec], formats: Sequence[str]) -> None:
    """Concatenate finished chunks in time order into the final files (atomic renames)."""
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
            with open(Path(s.out) / "events.csv", encoding="utf-8") as part:
                shutil.copyfileobj(part, f)
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


RECONCILED_COLUMNS = (("window_end", "timestamp"), ("name", "string"), ("value", "float"),
                      ("uncertainty_95", "float"), ("unit", "string"), ("status", "string"), ("steady", "bool"))


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
