"""The chunk function: one chunk's windows through a fresh :class:`twin.cycle.UnitCycle` (workers, Dask)."""

from __future__ import annotations

import json
import math
import os
import shutil
import time
from collections.abc import Iterator
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np

from twin.backfill.drift import DRIFT_INPUTS, save_inputs
from twin.backfill.openmetrics import OpenMetricsWriter
from twin.backfill.plan import ChunkSpec
from twin.backfill.rows import event_row, result_rows
from twin.backfill.windows import window_inputs
from twin.history import Samples
from twin.result import InputStats

_WORKER: dict[str, Any] = {}
# machine figures of a chunk: reported, never written to outputs
_MEASURED = ("seconds", "peak_rss_mb", "setup_seconds", "warmup_seconds", "cycle_seconds", "reconcile_seconds")


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


def _window_inputs(spec: ChunkSpec, config: Any) -> Iterator[Any]:
    """The chunk's :class:`twin.cycle.WindowInput` in time order, warm-up first (from its spool)."""
    from twin.cycle import WindowInput

    samples = load_spool(spec.spool)
    tags = [s.tag for s in config.sensors]
    max_age = [float(s.max_age) for s in config.sensors]
    gate_tags = list(config.monitoring.steady_signals)
    inputs = window_inputs(samples, tags, spec.ends, spec.window, spec.cycle, max_age, gate_tags, spec.lookback)
    sample_t = np.sort(samples.t)
    base_index = int(np.searchsorted(sample_t, spec.first_end - spec.window, "left"))
    rejected = dict(spec.rejected)
    for t_end, stats, gate in inputs:
        msgs = spec.messages_before + int(np.searchsorted(sample_t, t_end, "left")) - base_index
        yield WindowInput(t_end=t_end, window_seconds=spec.window, stats=stats, gate_stats=gate,
                          inputs=InputStats(messages=max(msgs, 0), rejected=rejected))


def run_chunk(spec: ChunkSpec) -> dict[str, Any]:
    """Run one chunk and write its outputs atomically to ``spec.out``; returns its summary.

    A pure function of the spec and the spool files: the same chunk run twice
    (another process, another machine of a Dask cluster) writes the same bytes.
    Drift charts are not written here: the kept windows' drift inputs go to
    :data:`twin.backfill.drift.DRIFT_INPUTS` for the sequential drift pass
    (:func:`twin.backfill.drift.drift_pass`), and the cycle's own drift transitions
    and chart values (from a fresh chart) are left out of the chunk's outputs.

    Besides the counts, the summary holds machine figures (never written to the
    outputs): ``seconds`` (all), ``setup_seconds`` (fresh cycle, spool, window
    statistics; the process's first chunk also builds the model), ``warmup_seconds``
    and ``cycle_seconds`` (UnitCycle.run of warm-up and of kept windows),
    ``reconcile_seconds`` (the reconciliation inside the kept windows), and
    ``peak_rss_mb``.
    """
    from twin.cycle import DRIFT_LEVEL

    started = time.perf_counter()
    config, cyc, units = fresh_cycle(spec.config_path, spec.cycle, spec.window)
    windows = list(_window_inputs(spec, config))
    tmp = Path(spec.out + ".tmp")
    shutil.rmtree(tmp, ignore_errors=True)
    tmp.mkdir(parents=True)
    metrics = OpenMetricsWriter() if "openmetrics" in spec.formats else None
    summary: dict[str, Any] = {"index": spec.index, "windows": 0, "steady": 0, "converged": 0, "not_converged": 0,
                               "transitions": 0, "alarms_raised": 0, "suspects_raised": 0}
    clock = {"setup_seconds": time.perf_counter() - started, "warmup_seconds": 0.0, "cycle_seconds": 0.0,
             "reconcile_seconds": 0.0}
    drift_inputs: list[tuple[float, dict[str, float], bool]] = []
    with open(tmp / "reconciled.csv", "w", encoding="utf-8", newline="") as rec_f, \
            open(tmp / "events.csv", "w", encoding="utf-8", newline="") as ev_f:
        for k, w in enumerate(windows):
            t0 = time.perf_counter()
            out = cyc.run(w)
            if k < spec.warmup:
                clock["warmup_seconds"] += time.perf_counter() - t0
                continue
            clock["cycle_seconds"] += time.perf_counter() - t0
            if math.isfinite(out.reconcile_seconds):
                clock["reconcile_seconds"] += out.reconcile_seconds
            r = replace(out.result, compute_seconds=math.nan, drift={})  # the drift pass writes the charts
            if out.drift_input is not None:
                drift_inputs.append((w.t_end, *out.drift_input))
            summary["windows"] += 1
            summary["steady"] += int(r.steady)
            summary["converged"] += int(r.reconcile_status == "converged")
            summary["not_converged"] += int(r.reconcile_status not in ("converged", "not_steady"))
            if "csv" in spec.formats or "parquet" in spec.formats:
                rec_f.writelines(result_rows(r, units))
            for tr in out.transitions:
                if tr.level == DRIFT_LEVEL:  # raised by the drift pass, from the whole history
                    continue
                ev_f.write(event_row(tr))
                summary["transitions"] += 1
                if tr.new == "active":
                    summary["suspects_raised" if str(tr.level) == "suspect" else "alarms_raised"] += 1
            if metrics is not None:
                metrics.add(r)
    if metrics is not None and metrics.stamps:
        metrics.write(tmp / "metrics.om")
    save_inputs(tmp / DRIFT_INPUTS, drift_inputs)
    (tmp / "summary.json").write_text(json.dumps(summary, sort_keys=True), encoding="utf-8")
    final = Path(spec.out)
    shutil.rmtree(final, ignore_errors=True)
    os.replace(tmp, final)
    summary.update(clock, seconds=time.perf_counter() - started, peak_rss_mb=_peak_rss_mb())
    return summary
