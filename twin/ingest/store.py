"""Tag store: one bounded ring buffer of (time, value, quality) per tag.

The MQTT network thread adds samples, the cycle thread closes windows. Memory
is fixed at construction (``capacity`` samples per tag, three numpy arrays
each); when a buffer is full the oldest sample is overwritten. The lock is
held only to write one sample or to copy the buffers; statistics are computed
on the copies outside the lock.
"""

from __future__ import annotations

import math
import threading
from collections.abc import Iterable, Mapping
from dataclasses import dataclass

import numpy as np

DEFAULT_CAPACITY = 4096


@dataclass(frozen=True)
class WindowStats:
    """Statistics of one tag over a window ``[t_start, t_end)``.

    Attributes
    ----------
    mean, std, min, max : float
        Of the good-quality samples in the window (SI units of the tag); NaN
        when there are none; ``std`` is the sample standard deviation
        (``ddof=1``), NaN below two samples.
    count : int
        Good-quality samples in the window.
    n_bad : int
        Bad-quality samples in the window (not used in the statistics).
    last_time : float
        Time of the newest good sample before ``t_end`` [s], in or before the
        window; NaN if none is held.
    age : float
        ``t_end - last_time`` [s]; ``inf`` if no good sample is held.
    stale : bool
        ``age`` exceeds the tag's maximum age, or the tag's source is offline
        (its Sparkplug edge node or device died; see :meth:`TagStore.set_offline`).
    """

    mean: float
    std: float
    count: int
    n_bad: int
    last_time: float
    age: float
    min: float
    max: float
    stale: bool


class _Ring:
    __slots__ = ("n", "ok", "t", "v")

    def __init__(self, capacity: int) -> None:
        self.t = np.zeros(capacity)
        self.v = np.zeros(capacity)
        self.ok = np.zeros(capacity, dtype=bool)
        self.n = 0  # samples ever written


class TagStore:
    """Per-tag bounded ring buffers, safe for one writer and many readers.

    Parameters
    ----------
    tags : iterable of str
        The tags held; adding any other tag raises ``KeyError``.
    capacity : int
        Samples kept per tag (the newest ones).
    max_age : float or mapping of tag to float
        Maximum age [s] of a tag's last good sample at window close before it
        is reported stale; a mapping may leave tags out (no limit).
    """

    def __init__(
        self,
        tags: Iterable[str],
        capacity: int = DEFAULT_CAPACITY,
        max_age: float | Mapping[str, float] = math.inf,
    ) -> None:
        if capacity < 1:
            raise ValueError(f"capacity {capacity!r} must be at least 1")
        self.capacity = int(capacity)
        self._rings: dict[str, _Ring] = {tag: _Ring(self.capacity) for tag in tags}
        if isinstance(max_age, Mapping):
            unknown = sorted(set(max_age) - set(self._rings))
            if unknown:
                raise ValueError(f"max_age names tags the store does not hold: {unknown}")
            self._max_age = {tag: float(max_age.get(tag, math.inf)) for tag in self._rings}
        else:
            self._max_age = dict.fromkeys(self._rings, float(max_age))
        for tag, a in self._max_age.items():
            if not a > 0:
                raise ValueError(f"tag {tag!r}: max_age {a!r} must be positive")
        self._offline: set[str] = set()
        self._lock = threading.Lock()

    @property
    def tags(self) -> list[str]:
        return list(self._rings)

    def add(self, tag: str, t: float, v: float, ok: bool = True) -> None:
        """Append one sample (time [s], SI value, quality) to ``tag``'s buffer."""
        ring = self._rings[tag]
        with self._lock:
            i = ring.n % self.capacity
            ring.t[i] = t
            ring.v[i] = v
            ring.ok[i] = ok
            ring.n += 1

    def add_many(self, samples: Iterable[tuple[str, float, float, bool]]) -> None:
        """Append several ``(tag, time, value, quality_ok)`` samples under one lock."""
        rings = self._rings
        cap = self.capacity
        with self._lock:
            for tag, t, v, ok in samples:
                ring = rings[tag]
                i = ring.n % cap
                ring.t[i] = t
                ring.v[i] = v
                ring.ok[i] = ok
                ring.n += 1

    def set_offline(self, tags: Iterable[str], offline: bool = True) -> None:
        """Mark tags whose source went away (a Sparkplug death) stale until cleared (its next birth)."""
        tags = list(tags)
        unknown = sorted(set(tags) - set(self._rings))
        if unknown:
            raise KeyError(f"the tag store does not hold {unknown}")
        with self._lock:
            if offline:
                self._offline.update(tags)
            else:
                self._offline.difference_update(tags)

    def offline(self) -> frozenset[str]:
        """Tags marked offline now."""
        with self._lock:
            return frozenset(self._offline)

    def overwritten(self) -> dict[str, int]:
        """Samples per tag lost to ring overflow since start."""
        with self._lock:
            return {tag: max(0, r.n - self.capacity) for tag, r in self._rings.items()}

    def latest_times(self) -> dict[str, float]:
        """Per tag, the time of the newest held sample (any quality) [s]; NaN if none."""
        with self._lock:
            held = {tag: (r.n, r.t.copy()) for tag, r in self._rings.items()}
        return {tag: float(t[: min(n, self.capacity)].max()) if n else math.nan for tag, (n, t) in held.items()}

    def counts(self) -> dict[str, int]:
        """Per tag, samples ever written (including those later overwritten)."""
        with self._lock:
            return {tag: r.n for tag, r in self._rings.items()}

    def snapshot(self, tag: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Copies of ``tag``'s held (time, value, quality) arrays, oldest first."""
        ring = self._rings[tag]
        with self._lock:
            n, t, v, ok = ring.n, ring.t.copy(), ring.v.copy(), ring.ok.copy()
        if n <= self.capacity:
            return t[:n], v[:n], ok[:n]
        i = n % self.capacity
        order = np.r_[i : self.capacity, 0:i]
        return t[order], v[order], ok[order]

    def window(self, t_start: float, t_end: float) -> dict[str, WindowStats]:
        """Statistics of every tag over ``[t_start, t_end)`` [s].

        Samples are selected by their own timestamp, so late or out-of-order
        arrivals still land in the right window while the buffer holds them.
        """
        if not t_end > t_start:
            raise ValueError(f"window end {t_end!r} must be after its start {t_start!r}")
        copies: dict[str, tuple[int, np.ndarray, np.ndarray, np.ndarray]] = {}
        with self._lock:
            for tag, r in self._rings.items():
                copies[tag] = (r.n, r.t.copy(), r.v.copy(), r.ok.copy())
            offline = frozenset(self._offline)
        out: dict[str, WindowStats] = {}
        for tag, (n, t, v, ok) in copies.items():
            if n < self.capacity:
                t, v, ok = t[:n], v[:n], ok[:n]
            before_end = t < t_end
            in_win = before_end & (t >= t_start)
            good = in_win & ok
            count = int(np.count_nonzero(good))
            n_bad = int(np.count_nonzero(in_win)) - count
            held_good = before_end & ok
            last_time = float(t[held_good].max()) if held_good.any() else math.nan
            age = t_end - last_time if held_good.any() else math.inf
            if count:
                x = v[good]
                mean, lo, hi = float(x.mean()), float(x.min()), float(x.max())
                std = float(x.std(ddof=1)) if count > 1 else math.nan
            else:
                mean = std = lo = hi = math.nan
            out[tag] = WindowStats(
                mean, std, count, n_bad, last_time, age, lo, hi, age > self._max_age[tag] or tag in offline
            )
        return out


def stale_tags(stats: Mapping[str, WindowStats]) -> list[str]:
    """Tags whose window statistics say stale, sorted."""
    return sorted(tag for tag, s in stats.items() if s.stale)
