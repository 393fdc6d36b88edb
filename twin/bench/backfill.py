"""``twin bench backfill``: back-fill windows per second (1 and N workers), live per-window cost, reading rate.

Three parts, one JSON document:

* ``reading``: rows per second of :class:`twin.history.HistoryReader` on a
  synthetic long-layout CSV (``--read-rows`` rows over the plant's tags, epoch
  seconds and RFC 3339 timestamps, the latter also gzip, and the same samples
  in the wide layout), one process, CPU
  seconds beside wall time, the median of ``--read-repeats`` reads; beside it
  the line-by-line rate (``fast=False``, the path of a block with a bad row);
* ``backfill``: the simulated demo scenario (``--hours`` at ``--sample-interval``)
  back-filled at ``--cycle`` second windows with 1 and ``--workers`` worker
  processes; windows per second (wall, including reading, process start-up
  and the one-off model build per worker) and the rate from the chunks' own
  compute time (``windows_per_s_excluding_startup``), the cost per kept window
  (``per_window_ms``: cycle, reconciliation inside it, the back-fill's own
  overhead), where the busy time went (``time_shares``: reconciliation, rest of
  the cycle, back-fill overhead, chunk set-up, warm-up, the serial drift pass),
  peak resident memory of the main process and of the largest worker, and the
  projected time of a unit-year of 1-minute windows with twin backfill's
  default chunks (``unit_year_minutes_projected``, a projection);
* ``memory``: peak resident memory of whole ``twin backfill`` runs (one process,
  one-hour chunks, each run its own child process reporting its own peak, VmHWM,
  at exit: ``ru_maxrss`` would carry the bench process's own peak across the exec)
  over histories of ``--memory-hours`` spans: memory bounded by a chunk shows
  as the same peak for a span several times longer (``growth_mb_per_hour``
  between the two longest spans; the caches of the first hours, e.g. the expected
  model's solved grid nodes, fill up to their bounds);
* ``live``: the cost of one live window in the same run (the daemon's tag
  store window + :class:`twin.cycle.UnitCycle` on the same history), and
  where it goes (reconciliation share).

The goal of the issue is 500 windows/s on 2 cores; the figures say by how
much it is missed (``goal_ratio``). A week at 1-minute windows is 10 080
windows: ``week_minutes`` extrapolates from the measured rate (marked as an
extrapolation, not a measurement).
"""

from __future__ import annotations

import argparse
import gzip
import math
import os
import shutil
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

from twin.bench import DEFAULT_CONFIG

GOAL_WINDOWS_PER_S = 500.0
GOAL_ROWS_PER_S = 5e6  # CSV rows per second per core (CPU time of the reading process)
READING_HOW = ("median of `repeats` reads of the same file by one HistoryReader each (CPU seconds of the process, "
               "pyarrow's threads included); line_by_line: the same with fast=False (every block read line by "
               "line, the path a block with a bad row takes)")
WEEK_WINDOWS_1MIN = 7 * 24 * 60
YEAR_WINDOWS_1MIN = 365 * 24 * 60


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--config", default=str(DEFAULT_CONFIG), help="plant config (default demo-u1)")
    parser.add_argument("--hours", type=float, default=2.0, help="simulated span back-filled [h] (default 2)")
    parser.add_argument("--cycle", type=float, default=60.0, help="window grid and length [s] (default 60)")
    parser.add_argument("--sample-interval", type=float, default=10.0, help="history sample interval [s] (default 10)")
    parser.add_argument("--workers", type=int, default=2, help="workers of the parallel run (default 2)")
    parser.add_argument("--read-rows", type=int, default=2_000_000, help="rows of the reading benchmark (default 2e6)")
    parser.add_argument("--read-repeats", type=int, default=3, help="reads per file in the reading benchmark (default 3)")
    parser.add_argument("--live-windows", type=int, default=10, help="windows of the live-path measurement (default 10)")
    parser.add_argument("--warmup-windows", type=int, default=10,
                        help="warm-up windows per chunk in the measured runs (default 10; the unit-year projection "
                             "uses the defaults of twin backfill)")
    parser.add_argument("--memory-hours", default="4,16",
                        help="history spans [h] of the memory part, comma-separated ('' skips it; default 4,16)")
    parser.add_argument("--skip-backfill", action="store_true", help="reading rate only")


def _read_once(config: Any, path: Path, fast: bool) -> tuple[float, float, Any]:
    from twin.history import HistoryReader

    reader = HistoryReader(config, fast=fast)
    c0, w0 = time.process_time(), time.perf_counter()
    for _ in reader.read(path):
        pass
    wall, cpu = time.perf_counter() - w0, time.process_time() - c0
    rep = reader.reports[str(path)]
    return wall, cpu, rep


def _reading(config: Any, rows: int, d: Path, repeats: int = 3) -> dict[str, Any]:
    tags = [s.tag for s in config.sensors]
    rng = np.random.default_rng(1)
    n_t = max(1, rows // len(tags))
    t = 1767571200.0 + np.repeat(np.arange(n_t, dtype=float), len(tags))
    tag = np.tile(np.array(tags), n_t)
    lo = np.array([(s.range or s.span or (0.0, 1.0))[0] for s in config.sensors])
    hi = np.array([(s.range or s.span or (0.0, 1.0))[1] for s in config.sensors])
    v = np.tile(lo + 0.5 * (hi - lo), n_t) * (1 + 1e-3 * rng.standard_normal(n_t * len(tags)))
    out: dict[str, Any] = {"rows": int(n_t * len(tags)), "repeats": repeats,
                           "goal_rows_per_s_cpu": GOAL_ROWS_PER_S, "how": READING_HOW}
    kinds = ("epoch_s", "rfc3339", "rfc3339.gz", "wide_rfc3339")
    for kind in kinds:
        p = d / f"read-{kind}.csv{'.gz' if kind.endswith('.gz') else ''}"
        if kind == "wide_rfc3339":  # the same samples, one line per time, one column per tag
            base = np.datetime64("2026-01-05T00:00:00", "s")
            with open(p, "w") as f:
                f.write("timestamp," + ",".join(tags) + "\n")
                vals = v.reshape(n_t, len(tags)).tolist()
                f.writelines(str(base + np.timedelta64(k, "s")) + "Z," + ",".join(map(repr, vals[k])) + "\n"
                             for k in range(n_t))
        elif kind.endswith(".gz"):
            with open(d / "read-rfc3339.csv", "rb") as src, gzip.open(p, "wb", compresslevel=6) as dst:
                shutil.copyfileobj(src, dst, 1 << 20)
        else:
            with open(p, "w") as f:
                f.write("timestamp,tag,value\n")
                if kind == "epoch_s":
                    stamps = [repr(x) for x in t.tolist()]
                else:
                    base = np.datetime64("2026-01-05T00:00:00", "s")
                    stamps = [str(base + np.timedelta64(int(x - 1767571200.0), "s")) + "Z" for x in t]
                f.writelines(f"{a},{b},{c!r}\n" for a, b, c in zip(stamps, tag, v.tolist(), strict=True))
        size = p.stat().st_size
        fast = [_read_once(config, p, True) for _ in range(max(1, repeats))]
        slow = [_read_once(config, p, False) for _ in range(max(1, repeats))]
        wall = float(np.median([f[0] for f in fast]))
        cpu = float(np.median([f[1] for f in fast]))
        cpu_slow = float(np.median([f[1] for f in slow]))
        rep = fast[0][2]
        n = rep.rows  # data lines (a wide line holds one sample per tag)
        out[kind] = {"rows": n, "samples": rep.samples, "wall_s": round(wall, 3), "cpu_s": round(cpu, 3),
                     "rows_per_s_wall": round(n / wall), "rows_per_s_cpu": round(n / cpu),
                     "samples_per_s_cpu": round(rep.samples / cpu),
                     "first_read_rows_per_s_cpu": round(n / fast[0][1]),
                     "line_by_line_rows_per_s_cpu": round(n / cpu_slow),
                     "fast_blocks": rep.fast_blocks, "slow_blocks": rep.slow_blocks,
                     "mb_per_s_cpu": round(size / 1e6 / cpu, 1), "file_mb": round(size / 1e6, 1)}
        if not kind.startswith("wide"):
            out[kind]["goal_ratio"] = round(n / cpu / GOAL_ROWS_PER_S, 3)
    for kind in kinds:
        (d / f"read-{kind}.csv{'.gz' if kind.endswith('.gz') else ''}").unlink()
    return out


def _live(config_path: str, history: Path, cycle: float, n: int) -> dict[str, Any]:
    """The daemon's per-window cost on the same history: tag-store window + UnitCycle.run."""
    from twin.config import load_config
    from twin.daemon import Daemon, DaemonOptions, ManualClock
    from twin.history import HistoryReader, read_samples
    from twin.performance.plant_reconcile import PlantReconciler

    cfg = load_config(config_path)
    cfg.monitoring.cycle = cfg.monitoring.window = cycle
    samples = read_samples(HistoryReader(cfg), [history])
    t0 = math.ceil(float(samples.t.min()) / cycle) * cycle
    daemon = Daemon(cfg, clock=ManualClock(t0), options=DaemonOptions(metrics=False, republish=False),
                    reconciler=PlantReconciler(cfg, time_budget=math.inf))
    tags = [s.tag for s in cfg.sensors]
    order = np.argsort(samples.t, kind="stable")
    k, per, rec = 0, [], []
    for j in range(1, n + 1):
        t_end = t0 + j * cycle
        while k < len(order) and samples.t[order[k]] < t_end:
            i = order[k]
            daemon.store.add(tags[samples.tag[i]], float(samples.t[i]), float(samples.value[i]), bool(samples.ok[i]))
            k += 1
        w0 = time.perf_counter()
        outp = daemon.cycle.run(daemon.window_input(t_end))
        per.append(time.perf_counter() - w0)
        rec.append(outp.reconcile_seconds)
    return {"windows": n, "per_window_ms_median": round(1e3 * float(np.median(per)), 1),
            "per_window_ms_mean": round(1e3 * float(np.mean(per)), 1),
            "reconcile_share": round(float(np.sum(rec) / np.sum(per)), 3)}


def _run_figures(s: Any, wall: float, workers: int) -> dict[str, Any]:
    """Rates, where the chunk time went, memory, and the unit-year projection of one measured back-fill."""
    from twin.backfill import DEFAULT_CHUNK_WINDOWS, DEFAULT_WARMUP_WINDOWS

    n = max(s.windows, 1)
    busy = s.chunk_seconds + s.drift_seconds
    overhead = s.chunk_seconds - s.setup_seconds - s.warmup_seconds - s.cycle_seconds
    shares = {"reconciliation": s.reconcile_seconds, "rest_of_cycle": s.cycle_seconds - s.reconcile_seconds,
              "backfill_overhead": overhead, "chunk_setup": s.setup_seconds, "warmup": s.warmup_seconds,
              "drift_pass": s.drift_seconds}
    per_cycle = s.cycle_seconds / n
    per_kept = (s.cycle_seconds + overhead) / n
    setup_per_chunk = s.setup_seconds / max(s.chunks, 1)
    year = YEAR_WINDOWS_1MIN
    chunks = math.ceil(year / DEFAULT_CHUNK_WINDOWS)
    per_drift = s.drift_seconds / n  # serial, after the chunks: added to the wall time, not divided
    year_cpu = year * per_kept + chunks * (DEFAULT_WARMUP_WINDOWS * per_cycle + setup_per_chunk)
    return {"windows": s.windows, "chunks": s.chunks, "wall_s": round(wall, 1),
            "windows_per_s": round(s.windows / wall, 3),
            "chunk_compute_s": round(s.chunk_seconds, 1),
            "windows_per_s_excluding_startup": round(s.windows / max(busy / min(workers, s.chunks), 1e-9), 3),
            "per_window_ms": {"cycle": round(1e3 * per_cycle, 2), "reconciliation": round(1e3 * s.reconcile_seconds / n, 2),
                              "backfill_overhead": round(1e3 * overhead / n, 2)},
            "time_shares": {k: round(v / max(busy, 1e-9), 3) for k, v in shares.items()},
            "warmup_windows_run": s.warmup_windows, "drift_pass_ms_per_window": round(1e3 * per_drift, 4),
            "worker_peak_rss_mb": round(s.worker_peak_rss_mb, 1),
            "goal_ratio": round(s.windows / wall / GOAL_WINDOWS_PER_S, 5),
            "week_minutes_extrapolated": round(WEEK_WINDOWS_1MIN / (s.windows / wall) / 60, 1),
            "unit_year_minutes_projected": round((year_cpu / workers + year * per_drift) / 60, 1),
            "unit_year_how": (f"{year} one-minute windows in chunks of {DEFAULT_CHUNK_WINDOWS} with "
                              f"{DEFAULT_WARMUP_WINDOWS} warm-up windows (twin backfill's defaults): kept windows at this "
                              "run's cycle + overhead cost, warm-up windows at its cycle cost, this run's set-up per "
                              "chunk (includes the workers' model build), divided by the workers, plus the serial "
                              "drift pass at this run's cost a window; a projection, not a measurement (start-up of the workers not included)")}


#: ``python -c`` program: twin's CLI, then this process's own peak RSS (VmHWM) on stderr at exit.
_PEAK_AT_EXIT = ("import atexit, sys\n"
                 "from twin.backfill import _peak_rss_mb\n"
                 "atexit.register(lambda: print('twin-peak-rss-mb', _peak_rss_mb(), file=sys.stderr))\n"
                 "from twin.cli import main\n"
                 "sys.exit(main(sys.argv[1:]))\n")


def _memory(config_path: str, spans: list[float], cycle: float, sample_interval: float, d: Path) -> dict[str, Any]:
    """Peak RSS of one-process back-fills (one-hour chunks) over histories of several spans, each run a child."""
    import subprocess
    import sys

    from twin.config import load_config
    from twin.demo.history import write_history

    config = load_config(config_path)
    runs = []
    for hours in spans:
        hist = d / f"memory-{hours:g}h.csv.gz"
        write_history(config, hist, hours=hours, start=1767571200.0, sample_interval=sample_interval, seed=2,
                      model_interval=max(15.0, cycle))
        cmd = [sys.executable, "-c", _PEAK_AT_EXIT, "backfill", config_path, str(hist), "--out", str(d / f"mem-{hours:g}"),
               "--cycle", str(cycle), "--window", str(cycle), "--chunk", "1", "--warmup", str(10 * cycle / 60),
               "--workers", "1", "--format", "csv,openmetrics"]
        w0 = time.perf_counter()
        proc = subprocess.run(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True, check=False)
        peak = [ln.split()[1] for ln in proc.stderr.splitlines() if ln.startswith("twin-peak-rss-mb ")]
        if proc.returncode != 0 or not peak:
            raise RuntimeError(f"twin backfill over {hours:g} h failed ({proc.returncode}): {proc.stderr.strip()[-300:]}")
        runs.append({"hours": hours, "windows": round(hours * 3600 / cycle), "wall_s": round(time.perf_counter() - w0, 1),
                     "peak_rss_mb": round(float(peak[-1]), 1)})
    runs.sort(key=lambda r: r["hours"])
    growth = ((runs[-1]["peak_rss_mb"] - runs[-2]["peak_rss_mb"]) / (runs[-1]["hours"] - runs[-2]["hours"])
              if len(runs) > 1 and runs[-1]["hours"] != runs[-2]["hours"] else None)
    return {"runs": runs, "growth_mb_per_hour": None if growth is None else round(growth, 2),
            "how": "twin backfill --workers 1 --chunk 1 (one-hour chunks, 10 warm-up windows) in a child process each; "
                   "peak resident memory of that process (VmHWM at its exit: reading, chunks, drift pass, assembly)"}


def run(args: argparse.Namespace) -> dict[str, Any]:
    from twin.backfill import BackfillOptions, backfill
    from twin.config import load_config
    from twin.demo.history import write_history

    config = load_config(args.config)
    result: dict[str, Any] = {"openblas_num_threads": os.environ.get("OPENBLAS_NUM_THREADS"),
                              "cpu_count": os.cpu_count(), "load_average": [round(x, 2) for x in os.getloadavg()]}
    with tempfile.TemporaryDirectory(prefix="twin-bench-backfill-") as tmp:
        d = Path(tmp)
        if args.skip_backfill:
            result["reading"] = _reading(config, args.read_rows, d, args.read_repeats)
            return result
        hist = d / "history.csv.gz"
        w0 = time.perf_counter()
        write_history(config, hist, hours=args.hours, start=1767571200.0, sample_interval=args.sample_interval,
                      seed=1, model_interval=max(15.0, args.cycle))
        result["history"] = {"hours": args.hours, "sample_interval_s": args.sample_interval,
                             "simulate_s": round(time.perf_counter() - w0, 1)}
        runs = {}
        for workers in sorted({1, args.workers}):
            out = d / f"out-{workers}"
            chunk = args.hours * 3600.0 / 2  # two chunks, with either worker count
            opts = BackfillOptions(cycle=args.cycle, window=args.cycle, workers=workers, chunk_seconds=chunk,
                                   warmup_seconds=args.warmup_windows * args.cycle, formats=("csv", "openmetrics"))
            w0 = time.perf_counter()
            s = backfill(args.config, [hist], out, opts, echo=lambda _: None)
            wall = time.perf_counter() - w0
            runs[str(workers)] = _run_figures(s, wall, workers)
        result["backfill"] = runs
        spans = [float(h) for h in str(args.memory_hours).split(",") if h.strip()]
        if spans:
            result["memory"] = _memory(args.config, spans, args.cycle, args.sample_interval, d)
        result["live"] = _live(args.config, hist, args.cycle, args.live_windows)
        live_rate = 1e3 / result["live"]["per_window_ms_median"]
        result["live"]["windows_per_s_one_core"] = round(live_rate, 3)
        # main process peak before the reading part (which builds its synthetic file in memory)
        from twin.backfill import _peak_rss_mb

        result["main_peak_rss_mb"] = round(_peak_rss_mb(), 1)
        result["reading"] = _reading(config, args.read_rows, d, args.read_repeats)
    result["goal_windows_per_s"] = GOAL_WINDOWS_PER_S
    return result
