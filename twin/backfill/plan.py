"""The back-fill's window grid and chunks (a pure function of the range and the settings)."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np


class BackfillError(ValueError):
    """The back-fill cannot do its job (message says what and what was expected)."""


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

