"""The demo scenario as a historian export (``twin simulate``).

The same simulated plant as the live demo (:class:`twin.demo.simulator.Simulator`:
forward-model truth, VDI 2048 noise, the drifting transmitter's bias, the HP
efficiency loss, the cold-water episode) sampled every ``sample_interval``
simulated seconds from ``start`` and written as a CSV (optionally gzip) or
Parquet file in the engineering units of the plant file, long
(``timestamp,tag,value,quality``) or wide (``timestamp,<TAG>,...``). The
readings at each time are exactly those the live demo would publish with the
same seed.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from twin.demo.plant import to_engineering
from twin.demo.simulator import Simulator
from twin.history.writers import FLOAT, STRING, TableWriter

LAYOUTS = ("long", "wide")
TIME_KINDS = ("rfc3339", "epoch_s", "epoch_ms")


@dataclass(frozen=True)
class HistoryWritten:
    path: Path
    rows: int
    samples: int
    steps: int
    t_start: float  # [s] Unix time of the first sample
    t_end: float  # [s] Unix time after the last sample


def _stamp(epoch_s: float, kind: str) -> Any:
    if kind == "epoch_ms":
        return float(round(epoch_s * 1000.0))
    if kind == "epoch_s":
        return round(epoch_s, 3)
    ms = round(epoch_s * 1000.0)
    return str(np.datetime64(ms, "ms")) + "Z"


def write_history(config: Any, out: str | Path, *, hours: float, start: float, sample_interval: float = 5.0,
                  seed: int = 1, layout: str = "long", timestamps: str = "rfc3339", model_interval: float = 15.0,
                  progress: Callable[[int, int], None] | None = None) -> HistoryWritten:
    """Write ``hours`` of the demo scenario from Unix time ``start`` [s] to ``out``.

    Parameters
    ----------
    config : PlantConfig
    out : str or Path
        ``.csv``, ``.csv.gz`` or ``.parquet``.
    hours : float
        Simulated span [h].
    start : float
        Unix time of scenario time 0 [s].
    sample_interval : float
        Seconds between readings of every sensor [s].
    seed : int
        Noise seed.
    layout : str
        ``long`` or ``wide``.
    timestamps : str
        ``rfc3339`` (UTC, milliseconds), ``epoch_s`` or ``epoch_ms``.
    model_interval : float
        Simulated seconds between forward solves of the truth [s].
    progress : callable, optional
        Called as ``progress(steps_done, steps_total)``.
    """
    if layout not in LAYOUTS:
        raise ValueError(f"layout {layout!r}; expected one of {', '.join(LAYOUTS)}")
    if timestamps not in TIME_KINDS:
        raise ValueError(f"timestamps {timestamps!r}; expected one of {', '.join(TIME_KINDS)}")
    if not (hours > 0 and math.isfinite(hours)):
        raise ValueError(f"hours {hours!r}; expected a positive number")
    if not sample_interval > 0:
        raise ValueError(f"sample_interval {sample_interval!r}; expected a positive number of seconds")
    sim = Simulator(config, client=None, start_time=start, rng_seed=seed, sample_interval=sample_interval,
                    model_interval=model_interval)
    tags = [s.tag for s in config.sensors]
    steps = math.floor(hours * 3600.0 / sample_interval + 1e-9)
    tcol = STRING if timestamps == "rfc3339" else FLOAT
    if layout == "long":
        schema = [("timestamp", tcol), ("tag", STRING), ("value", FLOAT), ("quality", STRING)]
    else:
        schema = [("timestamp", tcol), *((t, FLOAT) for t in tags)]
    samples = 0
    with TableWriter(out, schema) as w:
        for k in range(steps):
            t = k * sample_interval
            truth, readings = sim.readings_at(t)
            baro = truth.state.barometric_pressure
            stamp = _stamp(start + t, timestamps)
            eng = [float(to_engineering(config, tag, readings[tag], baro)) for tag in tags if tag in readings]
            if layout == "long":
                for tag, v in zip((t_ for t_ in tags if t_ in readings), eng, strict=True):
                    w.write_row(stamp, tag, v, "good")
            else:
                row = iter(eng)
                w.write_row(stamp, *(next(row) if tag in readings else None for tag in tags))
            samples += len(eng)
            if progress is not None and (k % 500 == 0 or k == steps - 1):
                progress(k + 1, steps)
        rows = w.rows + len(w._cols[0])
    return HistoryWritten(Path(out), rows, samples, steps, start, start + steps * sample_interval)
