"""The back-fill's drift charts: one sequential pass over every chunk's drift inputs, in time order.

A drift chart's state (its learned reference, EWMA and CUSUM) carries the whole
history before a window: a slow efficiency loss shows as a CUSUM that grows over
hours or days. No warm-up overlap brings a fresh chart to that state, so the charts
are not run inside the chunks. Each chunk records, per kept window, what the live
cycle feeds its charts (actual − expected of each drift KPI, and whether the window
may be charted: steady and above the minimum load); after all chunks this pass runs
one :class:`twin.monitor.DriftBank` through those inputs from the first window of
the range to the last, with the live cycle's own step (:func:`twin.cycle.drift_step`).
Its cost is a few microseconds a window, so it runs again in full on every resume.

Outputs: ``openmetrics/<chunk>.drift.om`` (the live drift families, stamped with each
window end) and the drift-alarm transitions, merged into ``events.csv`` by time.
"""

from __future__ import annotations

import math
import os
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from twin.backfill.openmetrics import OpenMetricsWriter
from twin.backfill.plan import BackfillError, ChunkSpec
from twin.backfill.rows import event_row

#: Per chunk: one row per kept window, columns window end [s], used (0/1), then actual − expected per drift KPI.
DRIFT_INPUTS = "drift.npy"


def save_inputs(path: Path, rows: Sequence[tuple[float, dict[str, float], bool]]) -> None:
    """Write a chunk's drift inputs (window end, deviations, used) as :data:`DRIFT_INPUTS`."""
    from twin.cycle import DRIFT_KPIS

    arr = np.array([[t, 1.0 if used else 0.0, *(devs.get(k, math.nan) for k in DRIFT_KPIS)]
                    for t, devs, used in rows], dtype=np.float64).reshape(len(rows), 2 + len(DRIFT_KPIS))
    np.save(path, arr)


@dataclass
class DriftEvents:
    """What the drift pass raised: events.csv rows per chunk (with their times), counts, its time."""

    rows: dict[str, list[tuple[float, str]]] = field(default_factory=dict)
    transitions: int = 0
    raised: int = 0
    seconds: float = 0.0


def drift_pass(config: Any, specs: Sequence[ChunkSpec], out: Path, formats: Sequence[str]) -> DriftEvents:
    """Run the drift charts over all chunks' inputs in time order (see the module docstring)."""
    from twin.cycle import DRIFT_KPIS, drift_bank, drift_step, drift_views
    from twin.metrics import write_drift

    started = time.perf_counter()
    bank = drift_bank(config)
    done = DriftEvents()
    om = out / "openmetrics"
    if "openmetrics" in formats:
        om.mkdir(exist_ok=True)
    unit_id = config.unit.id
    for spec in specs:
        path = Path(spec.out) / DRIFT_INPUTS
        try:
            arr = np.load(path)
            if arr.ndim != 2 or arr.shape[1] != 2 + len(DRIFT_KPIS):
                raise ValueError(f"shape {arr.shape}")
        except (OSError, ValueError) as exc:
            raise BackfillError(f"{path}: unreadable drift inputs ({exc}); expected the chunk's {DRIFT_INPUTS} "
                                f"(remove {spec.out} and run again to recompute the chunk)") from None
        writer = OpenMetricsWriter() if "openmetrics" in formats else None
        rows: list[tuple[float, str]] = []
        for line in arr:
            t = float(line[0])
            devs = {k: float(v) for k, v in zip(DRIFT_KPIS, line[2:], strict=True)}
            for tr in drift_step(bank, devs, bool(line[1]), t, spec.window):
                rows.append((t, event_row(tr)))
                done.transitions += 1
                done.raised += int(tr.new == "active")
            if writer is not None:
                writer.window(unit_id, t)
                write_drift(writer, drift_views(bank))
        done.rows[spec.name] = rows
        if writer is not None and writer.stamps:
            dst = om / f"{spec.name}.drift.om"
            tmp = dst.with_name(dst.name + ".tmp")
            writer.write(tmp)
            os.replace(tmp, dst)
    done.seconds = time.perf_counter() - started
    return done
