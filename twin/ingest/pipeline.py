"""Glue from raw messages to the tag store: decode, count rejections, rate-limit reports.

:class:`Ingestor` is the ``on_message`` callback the MQTT adapter calls on its
network thread. It holds no policy beyond counting: the daemon reads the
counters for metrics and decides what to log from the reports it is handed.
"""

from __future__ import annotations

import math
import threading
from collections.abc import Callable

from twin.ingest.decode import REJECT_REASONS, DecodeOutcome, Rejection, TopicMap
from twin.ingest.sparkplug import SPARKPLUG_PREFIX, SparkplugOutcome, SparkplugSession
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
# on_sparkplug(outcome): events to log, commands to publish, historical samples to route
SparkplugReport = Callable[[SparkplugOutcome], None]


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
    horizon : float
        Samples stamped more than this before the receive time are rejected
        as ``too_old`` [s] (the daemon passes window + cycle + grace: no
        window still to be closed could use them); ``inf`` = no limit.
    future_tolerance : float
        Samples stamped more than this after the receive time are rejected
        as ``future_timestamp`` [s] (a publisher clock running fast would
        otherwise push good samples out of the ring buffer); ``inf`` = no limit.
    sparkplug : SparkplugSession, optional
        Takes every message whose topic starts with ``spBv1.0/``: its live
        samples go to the store like any other, deaths and births mark tags
        offline and online in the store at once.
    on_sparkplug : callable, optional
        ``on_sparkplug(outcome)`` after each Sparkplug message that produced
        events, commands or historical samples; runs on the network thread.

    Rejected samples never reach the store, so they cannot displace good ones.
    """

    def __init__(
        self,
        topic_map: TopicMap,
        store: TagStore,
        on_reject: RejectReport | None = None,
        limiter: LogRateLimiter | None = None,
        horizon: float = math.inf,
        future_tolerance: float = math.inf,
        sparkplug: SparkplugSession | None = None,
        on_sparkplug: SparkplugReport | None = None,
    ) -> None:
        if not (horizon > 0 and future_tolerance >= 0):
            raise ValueError(
                f"horizon {horizon!r} must be > 0 and future_tolerance {future_tolerance!r} >= 0 [s]"
            )
        self.horizon = float(horizon)
        self.future_tolerance = float(future_tolerance)
        bound = set(topic_map.bindings) | (set(sparkplug.bindings) if sparkplug is not None else set())
        missing = sorted(bound - set(store.tags))
        if missing:
            raise ValueError(f"the tag store does not hold bound tags {missing}")
        self.topic_map = topic_map
        self.store = store
        self.on_reject = on_reject
        self.limiter = limiter if limiter is not None else LogRateLimiter()
        self.rejects = RejectCounter()
        self.sparkplug = sparkplug
        self.on_sparkplug = on_sparkplug
        self._decode_one = topic_map.decode_one
        self._add = store.add
        self.messages = 0
        self.samples = 0
        self.last_message_time = math.nan  # receive time of the newest message [s]

    def __call__(self, topic: str, payload: bytes, now: float) -> None:
        self.last_message_time = now
        if self.sparkplug is not None and topic.startswith(SPARKPLUG_PREFIX):
            self._sparkplug_message(self.sparkplug, topic, payload, now)
            return
        one = self._decode_one(topic, payload, now)
        if one is not None and now - self.horizon <= one[1] <= now + self.future_tolerance:
            self._add(*one)  # the common case: one valid sample of a plausible time
            self.messages += 1
            self.samples += 1
            return
        self._take(self.topic_map.decode(topic, payload, now), now)

    def _sparkplug_message(self, session: SparkplugSession, topic: str, payload: bytes, now: float) -> None:
        sp = session.decode(topic, payload, now)
        if sp.offline:
            self.store.set_offline(sp.offline, True)
        if sp.online:
            self.store.set_offline(sp.online, False)
        self._take(DecodeOutcome(sp.samples, sp.rejections), now)
        if self.on_sparkplug is not None and (sp.events or sp.commands or sp.historical):
            self.on_sparkplug(sp)

    def _take(self, out: DecodeOutcome, now: float) -> None:
        """Store the samples of one decoded message; count and report its rejections."""
        if out.samples:
            self._check_times(out, now)
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

    def _check_times(self, out: DecodeOutcome, now: float) -> None:
        """Move samples stamped outside ``[now - horizon, now + future_tolerance]`` to the rejections."""
        lo, hi = now - self.horizon, now + self.future_tolerance
        if all(lo <= s.time <= hi for s in out.samples):
            return
        kept = []
        for s in out.samples:
            if s.time < lo:
                out.rejections.append(Rejection(s.tag, "too_old", f"{now - s.time:.0f} s before receipt"))
            elif s.time > hi:
                out.rejections.append(Rejection(s.tag, "future_timestamp", f"{s.time - now:.0f} s after receipt"))
            else:
                kept.append(s)
        out.samples[:] = kept
