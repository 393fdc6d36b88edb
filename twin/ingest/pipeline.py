"""Glue from raw messages to the tag store: decode, count rejections, rate-limit reports.

:class:`Ingestor` is the ``on_message`` callback the MQTT adapter calls on its
network thread. It holds no policy beyond counting: the daemon reads the
counters for metrics and decides what to log from the reports it is handed.
"""

from __future__ import annotations

import threading
from collections.abc import Callable

from twin.ingest.decode import REJECT_REASONS, Rejection, TopicMap
from twin.ingest.store import TagStore


class RejectCounter:
    """Thread-safe counts of rejections per reason (the fixed set only)."""

    def __init__(self) -> None:
        self._counts = dict.fromkeys(REJECT_REASONS, 0)
        self._lock = threading.Lock()

    def add(self, rejections: list[Rejection]) -> None:
        if not rejections:
            return
        with self._lock:
            for r in rejections:
                self._counts[r.reason] += 1  # KeyError here means a decoder bug

    def counts(self) -> dict[str, int]:
        """A copy of the counts, every reason present."""
        with self._lock:
            return dict(self._counts)

    @property
    def total(self) -> int:
        with self._lock:
            return sum(self._counts.values())


class LogRateLimiter:
    """Says whether to report an event for ``(key, reason)``: once per interval.

    Parameters
    ----------
    interval : float
        Minimum time between two reports of the same key and reason [s].
    max_keys : int
        Bound on remembered keys; past it, entries older than ``interval``
        are forgotten, and if none are, further new keys share one slot.
    """

    _OVERFLOW = ("*", "*")

    def __init__(self, interval: float = 60.0, max_keys: int = 10_000) -> None:
        if not interval >= 0:
            raise ValueError(f"interval {interval!r} must be >= 0")
        self.interval = float(interval)
        self.max_keys = int(max_keys)
        self._last: dict[tuple[str, str], float] = {}
        self._suppressed: dict[tuple[str, str], int] = {}
        self._lock = threading.Lock()

    def should_log(self, key: str, reason: str, now: float) -> tuple[bool, int]:
        """``(True, n_suppressed_since_last_report)`` or ``(False, 0)``."""
        k = (key, reason)
        with self._lock:
            if k not in self._last and len(self._last) >= self.max_keys:
                cutoff = now - self.interval
                for old in [x for x, t in self._last.items() if t <= cutoff]:
                    del self._last[old]
                    self._suppressed.pop(old, None)
                if len(self._last) >= self.max_keys:
                    k = self._OVERFLOW
            last = self._last.get(k)
            if last is not None and now - last < self.interval:
                self._suppressed[k] = self._suppressed.get(k, 0) + 1
                return False, 0
            self._last[k] = now
            return True, self._suppressed.pop(k, 0)


# on_reject(rejection, n_suppressed_since_last_report)
RejectReport = Callable[[Rejection, int], None]


class Ingestor:
    """Receive → decode → store, with rejection counts and rate-limited reports.

    Parameters
    ----------
    topic_map : TopicMap
        Decoder for the subscribed topics.
    store : TagStore
        Destination; must hold every bound tag.
    on_reject : callable, optional
        ``on_reject(rejection, n_suppressed)`` called at most once per key,
        reason and ``limiter.interval``; runs on the network thread, keep it short.
    limiter : LogRateLimiter, optional
        Defaults to one report per minute per key and reason.
    """

    def __init__(
        self,
        topic_map: TopicMap,
        store: TagStore,
        on_reject: RejectReport | None = None,
        limiter: LogRateLimiter | None = None,
    ) -> None:
        missing = sorted(set(topic_map.bindings) - set(store.tags))
        if missing:
            raise ValueError(f"the tag store does not hold bound tags {missing}")
        self.topic_map = topic_map
        self.store = store
        self.on_reject = on_reject
        self.limiter = limiter if limiter is not None else LogRateLimiter()
        self.rejects = RejectCounter()
        self._decode_one = topic_map.decode_one
        self._add = store.add
        self.messages = 0
        self.samples = 0

    def __call__(self, topic: str, payload: bytes, now: float) -> None:
        one = self._decode_one(topic, payload, now)
        if one is not None:  # the common case: one valid sample
            self._add(*one)
            self.messages += 1
            self.samples += 1
            return
        out = self.topic_map.decode(topic, payload, now)
        if out.samples:
            self.store.add_many(out.samples)
        self.messages += 1
        self.samples += len(out.samples)
        if out.rejections:
            self.rejects.add(out.rejections)
            if self.on_reject is not None:
                for r in out.rejections:
                    log, n = self.limiter.should_log(r.key, r.reason, now)
                    if log:
                        self.on_reject(r, n)
