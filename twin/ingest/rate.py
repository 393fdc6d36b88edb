"""Expected sample rates per tag, and the samples missing against them.

A broker that drops messages under load (a full per-client queue) does so
silently: the subscriber just sees fewer samples. :class:`SampleRateMonitor`
makes that loss visible. Each tag has an expected sample period, configured or
learned from the median spacing of its first minutes of samples; every closed
interval then adds its expected count and its received count to running
totals, and ``missing = floor(expected - received - slack)`` (never
decreasing) is exported as ``twin_sensor_samples_missing_total``.

Running totals let timing jitter cancel (an interval with one sample fewer is
followed by one with one more); a surplus beyond one sample per interval is
not carried forward, so a burst cannot hide a later loss.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from typing import Any

import numpy as np


class SampleRateMonitor:
    """Per-tag expected sample period and cumulative missing samples.

    Parameters
    ----------
    tags : iterable of str
        Tags watched.
    periods : mapping of str to float, optional
        Configured sample periods [s]; tags left out (or None) are learned.
    learn_seconds : float
        How long a tag's samples are watched before its period is learned [s].
    min_samples : int
        Fewest samples to learn a period from.
    slack : float
        Samples of shortfall tolerated before any are counted missing.
    """

    def __init__(self, tags: Iterable[str], periods: Mapping[str, float | None] | None = None,
                 learn_seconds: float = 120.0, min_samples: int = 10, slack: float = 1.0) -> None:
        self.tags = list(tags)
        periods = dict(periods or {})
        unknown = sorted(set(periods) - set(self.tags))
        if unknown:
            raise ValueError(f"sample periods name unknown tags {unknown}")
        self.period: dict[str, float] = {}
        for tag, p in periods.items():
            if p is None:
                continue
            if not (math.isfinite(p) and p > 0):
                raise ValueError(f"tag {tag!r}: sample period {p!r} must be a positive number of seconds")
            self.period[tag] = float(p)
        self.configured = frozenset(self.period)
        if not learn_seconds > 0 or min_samples < 2 or slack < 0:
            raise ValueError("learn_seconds must be > 0, min_samples >= 2 and slack >= 0")
        self.learn_seconds = float(learn_seconds)
        self.min_samples = int(min_samples)
        self.slack = float(slack)
        self._first_seen: dict[str, float] = {}
        self._expected = dict.fromkeys(self.tags, 0.0)
        self._received = dict.fromkeys(self.tags, 0.0)
        self.missing = dict.fromkeys(self.tags, 0)

    def learning(self) -> list[str]:
        """Tags whose period is not known yet."""
        return [t for t in self.tags if t not in self.period]

    def learned(self) -> list[str]:
        """Tags whose period is not configured (learned, or still to learn)."""
        return [t for t in self.tags if t not in self.configured]

    def learn(self, tag: str, times: np.ndarray, now: float) -> float | None:
        """Offer a tag's held sample times [s]; returns its period once known.

        First estimate, once ``learn_seconds`` have passed since the tag's
        first sample: the median spacing ``m`` of the distinct times. Then,
        and on every later call (refinement), the period is the time span
        divided by the number of sample intervals on that grid, each spacing
        counting ``max(1, round(d / m))`` intervals: timing jitter averages
        out over the span, and a lost sample (a double spacing) does not
        lengthen the period. Configured periods are never changed.
        """
        if tag in self.configured:
            return self.period[tag]
        if times.size == 0:
            return self.period.get(tag)
        first = self._first_seen.setdefault(tag, float(times.min()))
        if tag not in self.period and now - first < self.learn_seconds:
            return None
        t = np.unique(times[times <= now])
        if t.size < self.min_samples:
            return self.period.get(tag)
        d = np.diff(t)
        m = self.period.get(tag) or float(np.median(d))
        if not m > 0:
            return self.period.get(tag)
        intervals = np.maximum(1.0, np.round(d / m)).sum()
        self.period[tag] = float((t[-1] - t[0]) / intervals)
        return self.period[tag]

    def update(self, seconds: float, counts: Mapping[str, int]) -> None:
        """Account one closed interval of ``seconds`` [s]: samples that arrived per tag."""
        for tag, period in self.period.items():
            expected = seconds / period
            got = min(float(counts.get(tag, 0)), expected + 1.0)
            self._expected[tag] += expected
            self._received[tag] += got
            short = math.floor(self._expected[tag] - self._received[tag] - self.slack)
            if short > self.missing[tag]:
                self.missing[tag] = short

    # ------------------------------------------------------------ state ---
    def snapshot(self) -> dict[str, Any]:
        """JSON-able state: learned periods and running totals."""
        return {
            "period": {t: p for t, p in self.period.items() if t not in self.configured},
            "first_seen": dict(self._first_seen),
            "expected": dict(self._expected),
            "received": dict(self._received),
            "missing": dict(self.missing),
        }

    def restore(self, d: Mapping[str, Any]) -> None:
        """Resume from :meth:`snapshot` output (unknown tags are ignored)."""
        known = set(self.tags)
        for tag, p in d.get("period", {}).items():
            if tag in known and tag not in self.configured and float(p) > 0:
                self.period[tag] = float(p)
        for name, target in (("expected", self._expected), ("received", self._received)):
            for tag, v in d.get(name, {}).items():
                if tag in known:
                    target[tag] = float(v)
        for tag, v in d.get("missing", {}).items():
            if tag in known:
                self.missing[tag] = int(v)
        for tag, v in d.get("first_seen", {}).items():
            if tag in known:
                self._first_seen[tag] = float(v)
