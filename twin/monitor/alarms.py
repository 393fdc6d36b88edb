"""Alarm state machines: thresholds with deadband, delays, suppression, severities.

Each alarm level is a small state machine driven by window values and the
window time; it has no clock of its own. Every :meth:`update` returns the
list of :class:`Transition` records it made, so the orchestrator can log them
and publish events.

States (plain words):

``normal``
    The value is on the good side of the set threshold.
``pending``
    The value has crossed the set threshold; the on-delay is running.
``active``
    The alarm is raised.
``clearing``
    The value has crossed back past the clear threshold; the off-delay is
    running. The alarm still counts as raised.
``suppressed``
    The caller suppressed evaluation (plant not steady, load below minimum).
    This is a distinct state rather than a frozen copy of the last one: an
    alarm raised before a shutdown would otherwise stay on display with no
    evidence behind it. When suppression is lifted the alarm is evaluated
    afresh, and a value beyond the set threshold goes through the on-delay
    again.
``unavailable``
    The input has been missing (NaN) for longer than ``unavailable_after``
    seconds. A shorter gap neither sets nor clears: the state is held and the
    next valid value is judged against the delays counted from their start.

Thresholds follow ISA-18.2 / IEC 62682 practice (from memory): a ``high``
alarm sets at ``value >= set_at`` and clears at ``value < clear_at`` with
``clear_at <= set_at`` (the deadband); a ``low`` alarm mirrors this.

Advisory monitoring only: default limits here are common practice, not
manufacturer limits, and nothing here may trip or operate equipment.
"""

from __future__ import annotations

import itertools
import math
from collections import deque
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

NORMAL = "normal"
PENDING = "pending"
ACTIVE = "active"
CLEARING = "clearing"
SUPPRESSED = "suppressed"
UNAVAILABLE = "unavailable"
STATES = (NORMAL, PENDING, ACTIVE, CLEARING, SUPPRESSED, UNAVAILABLE)
RAISED = (ACTIVE, CLEARING)

HIGH = "high"
LOW = "low"
DIRECTIONS = (HIGH, LOW)


@dataclass(frozen=True)
class Transition:
    """One state change of one alarm level.

    Attributes
    ----------
    alarm : str
        Alarm name (or tag, for suspect alarms).
    level : str
        Severity level name (e.g. ``"warning"``, ``"alarm"``).
    old, new : str
        States before and after.
    time : float
        Window time [s] of the change.
    value : float
        Input value that caused it (NaN if unavailable), unit of the input.
    reason : str
        Plain-words cause.
    """

    alarm: str
    level: str
    old: str
    new: str
    time: float
    value: float
    reason: str


@dataclass(frozen=True)
class Level:
    """One severity level: its name and its set and clear thresholds (unit of the input)."""

    name: str
    set_at: float
    clear_at: float


def _check_delay(name: str, v: float) -> float:
    if v is None or not (math.isfinite(v) and v >= 0.0):
        raise ValueError(f"{name} must be a finite number of seconds >= 0, got {v!r}")
    return float(v)


def suppression_reason(
    steady: bool | None = None, load: float | None = None, min_load: float | None = None
) -> str | None:
    """Reason to suppress alarms this window, or None.

    Parameters
    ----------
    steady : bool or None
        Steady-state verdict; ``False`` suppresses, ``None`` is not checked.
    load : float or None
        Present load [W] (or any unit shared with ``min_load``); NaN suppresses.
    min_load : float or None
        Minimum load below which alarms are suppressed; ``None`` disables the check.
    """
    if steady is False:
        return "plant not steady"
    if min_load is not None and load is not None:
        if not math.isfinite(load):
            return "load unavailable"
        if load < min_load:
            return f"load {load:g} below minimum {min_load:g}"
    return None


class ThresholdAlarm:
    """State machine of one alarm level.

    Parameters
    ----------
    name : str
        Alarm name carried in the transitions.
    level : Level
        Level name and thresholds (unit of the input).
    direction : str
        ``"high"`` (alarm above) or ``"low"`` (alarm below).
    on_delay : float
        Window time [s] the set condition must hold before the alarm is raised.
    off_delay : float
        Window time [s] the clear condition must hold before the alarm clears.
    unavailable_after : float or None
        Window time [s] of missing input after which the state becomes
        ``"unavailable"``; None keeps holding the last state.

    Notes
    -----
    Delays are measured between window times: with windows every 10 s and
    ``on_delay = 30``, a value first beyond the set threshold at t = 0 raises
    the alarm at the window of t = 30 if every valid window since has stayed
    beyond it. A delay of 0 acts in the same window.
    """

    def __init__(
        self,
        name: str,
        level: Level,
        direction: str = HIGH,
        on_delay: float = 0.0,
        off_delay: float = 0.0,
        unavailable_after: float | None = None,
    ) -> None:
        if direction not in DIRECTIONS:
            raise ValueError(f"direction must be one of {DIRECTIONS}, got {direction!r}")
        s, c = float(level.set_at), float(level.clear_at)
        if not (math.isfinite(s) and math.isfinite(c)):
            raise ValueError(f"thresholds of level {level.name!r} must be finite")
        if (direction == HIGH and c > s) or (direction == LOW and c < s):
            side = "above" if direction == HIGH else "below"
            raise ValueError(
                f"level {level.name!r} of {direction} alarm {name!r}: clear_at {c!r} must not be "
                f"{side} set_at {s!r}"
            )
        self.name = name
        self.level = level
        self.direction = direction
        self.on_delay = _check_delay("on_delay", on_delay)
        self.off_delay = _check_delay("off_delay", off_delay)
        self.unavailable_after = (
            None
            if unavailable_after is None
            else _check_delay("unavailable_after", unavailable_after)
        )
        self.reset()

    def reset(self) -> None:
        """Back to ``normal`` with no timers."""
        self.state = NORMAL
        self.since: float | None = None  # time the current state was entered
        self.missing_since: float | None = None
        self.last_time: float | None = None

    def snapshot(self) -> dict[str, Any]:
        """State and timers as a JSON-able dict (see :meth:`restore`)."""
        return {"state": self.state, "since": self.since, "missing_since": self.missing_since,
                "last_time": self.last_time}

    def restore(self, snap: Mapping[str, Any]) -> None:
        """Take back a :meth:`snapshot`; ValueError on an unknown state."""
        state = snap.get("state")
        if state not in STATES:
            raise ValueError(f"alarm {self.name!r}: unknown state {state!r}; expected one of {', '.join(STATES)}")
        self.state = str(state)
        self.since, self.missing_since, self.last_time = (
            None if snap.get(k) is None else float(snap[k]) for k in ("since", "missing_since", "last_time"))

    @property
    def raised(self) -> bool:
        """The alarm counts as raised (``active`` or ``clearing``)."""
        return self.state in RAISED

    def _beyond_set(self, v: float) -> bool:
        return v >= self.level.set_at if self.direction == HIGH else v <= self.level.set_at

    def _past_clear(self, v: float) -> bool:
        return v < self.level.clear_at if self.direction == HIGH else v > self.level.clear_at

    def _go(self, out: list[Transition], new: str, t: float, v: float, reason: str) -> None:
        out.append(Transition(self.name, self.level.name, self.state, new, t, v, reason))
        self.state = new
        self.since = t

    def _fresh(self, out: list[Transition], t: float, v: float, why: str) -> None:
        """Evaluate from scratch (after suppression or unavailability)."""
        if self._beyond_set(v):
            if self.on_delay == 0.0:
                self._go(out, ACTIVE, t, v, f"{why}; beyond set threshold {self.level.set_at:g}")
            else:
                self._go(out, PENDING, t, v, f"{why}; beyond set threshold, on-delay started")
        else:
            self._go(out, NORMAL, t, v, why)

    def update(self, value: float, time: float, suppress: str | None = None) -> list[Transition]:
        """Feed one window.

        Parameters
        ----------
        value : float
            Window value (unit of the thresholds); NaN means input unavailable.
        time : float
            Window time [s]; must not decrease.
        suppress : str or None
            Reason to suppress this window (see :func:`suppression_reason`);
            None evaluates normally.

        Returns
        -------
        list of Transition
            Zero or more state changes, in order.
        """
        t = float(time)
        if not math.isfinite(t):
            raise ValueError(f"time must be finite, got {time!r}")
        if self.last_time is not None and t < self.last_time:
            raise ValueError(f"time went backwards: {t!r} < previous {self.last_time!r}")
        self.last_time = t
        v = math.nan if value is None else float(value)
        missing = not math.isfinite(v)
        if missing:
            if self.missing_since is None:
                self.missing_since = t
        else:
            self.missing_since = None
        out: list[Transition] = []

        if suppress:
            if self.state != SUPPRESSED:
                self._go(out, SUPPRESSED, t, v, f"suppressed: {suppress}")
            return out

        if missing:
            gap = t - self.missing_since  # type: ignore[operator]
            long_gap = self.unavailable_after is not None and gap >= self.unavailable_after
            if long_gap and self.state != UNAVAILABLE:
                self._go(out, UNAVAILABLE, t, v, f"input missing for {gap:g} s")
            elif self.state == SUPPRESSED:
                self._go(out, NORMAL, t, v, "suppression lifted; input missing")
            return out

        if self.state == SUPPRESSED:
            self._fresh(out, t, v, "suppression lifted")
            return out
        if self.state == UNAVAILABLE:
            self._fresh(out, t, v, "input restored")
            return out

        since = self.since if self.since is not None else t
        if self.state == NORMAL:
            if self._beyond_set(v):
                if self.on_delay == 0.0:
                    self._go(out, ACTIVE, t, v, f"beyond set threshold {self.level.set_at:g}")
                else:
                    self._go(out, PENDING, t, v, "beyond set threshold, on-delay started")
        elif self.state == PENDING:
            if not self._beyond_set(v):
                self._go(out, NORMAL, t, v, "back within set threshold before on-delay elapsed")
            elif t - since >= self.on_delay:
                self._go(out, ACTIVE, t, v, f"beyond set threshold for {t - since:g} s")
        elif self.state == ACTIVE:
            if self._past_clear(v):
                if self.off_delay == 0.0:
                    self._go(out, NORMAL, t, v, f"past clear threshold {self.level.clear_at:g}")
                else:
                    self._go(out, CLEARING, t, v, "past clear threshold, off-delay started")
        elif self.state == CLEARING:
            if not self._past_clear(v):
                self._go(out, ACTIVE, t, v, "back beyond clear threshold before off-delay elapsed")
            elif t - since >= self.off_delay:
                self._go(out, NORMAL, t, v, f"past clear threshold for {t - since:g} s")
        return out


class GradedAlarm:
    """An alarm with several severity levels on one input, same direction.

    Parameters
    ----------
    name : str
        Alarm name.
    levels : sequence of Level
        From least to most severe; for a high alarm the set thresholds must
        increase, for a low alarm decrease.
    direction, on_delay, off_delay, unavailable_after
        As for :class:`ThresholdAlarm`, shared by all levels.
    """

    def __init__(
        self,
        name: str,
        levels: Sequence[Level],
        direction: str = HIGH,
        on_delay: float = 0.0,
        off_delay: float = 0.0,
        unavailable_after: float | None = None,
    ) -> None:
        if direction not in DIRECTIONS:
            raise ValueError(f"direction must be one of {DIRECTIONS}, got {direction!r}")
        if not levels:
            raise ValueError(f"alarm {name!r} needs at least one level")
        names = [lv.name for lv in levels]
        if len(set(names)) != len(names):
            raise ValueError(f"alarm {name!r} has duplicate level names: {names!r}")
        sign = 1.0 if direction == HIGH else -1.0
        for a, b in itertools.pairwise(levels):
            if not sign * (b.set_at - a.set_at) > 0.0:
                raise ValueError(
                    f"alarm {name!r}: level {b.name!r} (set_at {b.set_at!r}) must be more severe "
                    f"than {a.name!r} (set_at {a.set_at!r}) for a {direction} alarm"
                )
        self.name = name
        self.direction = direction
        self.levels = {
            lv.name: ThresholdAlarm(name, lv, direction, on_delay, off_delay, unavailable_after)
            for lv in levels
        }

    def update(self, value: float, time: float, suppress: str | None = None) -> list[Transition]:
        """Feed one window to every level; transitions in level order (least severe first)."""
        out: list[Transition] = []
        for lv in self.levels.values():
            out.extend(lv.update(value, time, suppress))
        return out

    @property
    def states(self) -> dict[str, str]:
        """State per level name."""
        return {k: lv.state for k, lv in self.levels.items()}

    @property
    def severity(self) -> str | None:
        """Name of the most severe raised level, or None."""
        raised = [k for k, lv in self.levels.items() if lv.raised]
        return raised[-1] if raised else None

    def reset(self) -> None:
        for lv in self.levels.values():
            lv.reset()

    def snapshot(self) -> dict[str, Any]:
        """Every level's state and timers (JSON-able)."""
        return {k: lv.snapshot() for k, lv in self.levels.items()}

    def restore(self, snap: Mapping[str, Any]) -> None:
        """Take back a :meth:`snapshot`; levels it does not name start normal."""
        for k, lv in self.levels.items():
            if k in snap:
                lv.restore(snap[k])
            else:
                lv.reset()


def exhaust_moisture_alarm(
    name: str = "exhaust_moisture",
    warning: float = 0.10,
    alarm: float = 0.12,
    deadband: float = 0.005,
    on_delay: float = 60.0,
    off_delay: float = 120.0,
    unavailable_after: float | None = 600.0,
) -> GradedAlarm:
    """Two-level high alarm on LP exhaust moisture ``1 − x``.

    Parameters
    ----------
    warning, alarm : float
        Set thresholds of the ``"warning"`` and ``"alarm"`` levels, moisture
        fraction [-]; defaults 10 % and 12 % are common practice, not a
        manufacturer limit.
    deadband : float
        Clear threshold = set threshold − deadband [-].
    on_delay, off_delay, unavailable_after : float
        [s], as for :class:`ThresholdAlarm`.
    """
    return GradedAlarm(
        name,
        [Level("warning", warning, warning - deadband), Level("alarm", alarm, alarm - deadband)],
        HIGH,
        on_delay,
        off_delay,
        unavailable_after,
    )


class LevelAlarm:
    """Alarm when a value falls below its expected value by more than a margin.

    For example an efficiency below the expected efficiency at the present
    load: a low alarm on ``actual − expected`` that sets at ``−margin`` and
    clears above ``−(margin − deadband)``.

    Parameters
    ----------
    name : str
        Alarm name.
    margin : float
        Shortfall that raises the alarm (unit of the compared values), > 0.
    deadband : float
        How far the shortfall must recover past the margin to clear, >= 0 and < margin.
    level : str
        Severity name carried in the transitions.
    on_delay, off_delay, unavailable_after
        As for :class:`ThresholdAlarm`.
    """

    def __init__(
        self,
        name: str,
        margin: float,
        deadband: float = 0.0,
        level: str = "warning",
        on_delay: float = 0.0,
        off_delay: float = 0.0,
        unavailable_after: float | None = None,
    ) -> None:
        if not (math.isfinite(margin) and margin > 0.0):
            raise ValueError(f"margin must be positive, got {margin!r}")
        if not (math.isfinite(deadband) and 0.0 <= deadband < margin):
            raise ValueError(f"deadband must be in [0, margin), got {deadband!r}")
        self.alarm = ThresholdAlarm(
            name,
            Level(level, -margin, -margin + deadband),
            LOW,
            on_delay,
            off_delay,
            unavailable_after,
        )

    @property
    def state(self) -> str:
        return self.alarm.state

    @property
    def raised(self) -> bool:
        return self.alarm.raised

    def update(
        self, actual: float, expected: float, time: float, suppress: str | None = None
    ) -> list[Transition]:
        """Feed one window; either value NaN means input unavailable. Transitions carry ``actual − expected``."""
        a = math.nan if actual is None else float(actual)
        e = math.nan if expected is None else float(expected)
        return self.alarm.update(a - e, time, suppress)

    def reset(self) -> None:
        self.alarm.reset()

    def snapshot(self) -> dict[str, Any]:
        """State and timers (JSON-able)."""
        return self.alarm.snapshot()

    def restore(self, snap: Mapping[str, Any]) -> None:
        self.alarm.restore(snap)


class SuspectTracker:
    """Per-tag suspect-instrument alarms with persistence across steady windows.

    A tag's alarm is raised when it was a suspect in at least ``persistence``
    of its last ``window`` tested steady windows, and cleared after
    ``clear_after`` consecutive clean tested windows.

    Parameters
    ----------
    persistence : int
        N, suspect windows needed, >= 1.
    window : int or None
        M, the number of recent windows looked at (N of M); None means N
        consecutive windows.
    clear_after : int or None
        Consecutive clean windows that clear a raised alarm; None uses ``window``.
    level : str
        Severity name carried in the transitions.
    """

    def __init__(
        self,
        persistence: int,
        window: int | None = None,
        clear_after: int | None = None,
        level: str = "suspect",
    ) -> None:
        if persistence < 1:
            raise ValueError(f"persistence must be at least 1, got {persistence!r}")
        window = persistence if window is None else window
        if window < persistence:
            raise ValueError(f"window ({window!r}) must be >= persistence ({persistence!r})")
        clear_after = window if clear_after is None else clear_after
        if clear_after < 1:
            raise ValueError(f"clear_after must be at least 1, got {clear_after!r}")
        self.persistence = int(persistence)
        self.window = int(window)
        self.clear_after = int(clear_after)
        self.level = level
        self.reset()

    def reset(self) -> None:
        self._history: dict[str, deque[bool]] = {}
        self._clean_run: dict[str, int] = {}
        self._raised: set[str] = set()

    def snapshot(self) -> dict[str, Any]:
        """Per-tag history, clean runs and raised alarms (JSON-able)."""
        return {"history": {t: [bool(b) for b in h] for t, h in self._history.items()},
                "clean_run": dict(self._clean_run), "raised": sorted(self._raised)}

    def restore(self, snap: Mapping[str, Any]) -> None:
        """Take back a :meth:`snapshot`."""
        self.reset()
        for tag, hist in dict(snap.get("history", {})).items():
            self._history[str(tag)] = deque((bool(b) for b in hist), maxlen=self.window)
        self._clean_run = {str(t): int(n) for t, n in dict(snap.get("clean_run", {})).items()}
        self._raised = {str(t) for t in snap.get("raised", [])}

    @property
    def raised(self) -> frozenset[str]:
        """Tags whose suspect alarm is raised."""
        return frozenset(self._raised)

    def state(self, tag: str) -> str:
        return ACTIVE if tag in self._raised else NORMAL

    def update(
        self,
        suspects: Iterable[str],
        time: float,
        steady: bool = True,
        tested: Iterable[str] | None = None,
    ) -> list[Transition]:
        """Feed one window's suspect tags.

        Parameters
        ----------
        suspects : iterable of str
            Tags flagged as suspect in this window.
        time : float
            Window time [s].
        steady : bool
            Unsteady windows are ignored.
        tested : iterable of str or None
            Tags that were tested this window; a tracked tag not tested (and
            not suspect) is skipped rather than counted clean. None means
            every tracked tag was tested.

        Returns
        -------
        list of Transition
            ``value`` is the number of suspect windows among the last ``window``.
        """
        if not steady:
            return []
        t = float(time)
        bad = set(suspects)
        seen = set(self._history) | bad
        if tested is not None:
            seen &= set(tested) | bad
        out: list[Transition] = []
        for tag in sorted(seen):
            hist = self._history.setdefault(tag, deque(maxlen=self.window))
            hist.append(tag in bad)
            self._clean_run[tag] = 0 if tag in bad else self._clean_run.get(tag, 0) + 1
            count = sum(hist)
            if tag not in self._raised and count >= self.persistence:
                self._raised.add(tag)
                out.append(
                    Transition(
                        tag,
                        self.level,
                        NORMAL,
                        ACTIVE,
                        t,
                        float(count),
                        f"suspect in {count} of the last {len(hist)} steady windows",
                    )
                )
            elif tag in self._raised and self._clean_run[tag] >= self.clear_after:
                self._raised.discard(tag)
                hist.clear()
                out.append(
                    Transition(
                        tag,
                        self.level,
                        ACTIVE,
                        NORMAL,
                        t,
                        0.0,
                        f"clean in {self._clean_run[tag]} consecutive steady windows",
                    )
                )
            if tag not in self._raised and not any(hist):
                # nothing left to remember: stop tracking the tag
                del self._history[tag]
                self._clean_run.pop(tag, None)
        return out
