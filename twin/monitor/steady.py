"""Steady-state detection with the Cao & Rhinehart R-statistic, and frozen signals.

Each key signal (one value per window, e.g. the cycle mean of main-steam
flow) feeds three first-order filters:

* the filtered mean ``x_f,i = λ1·x_i + (1 − λ1)·x_f,i−1``;
* the filtered squared deviation from the *previous* filtered mean
  ``ν²_f,i = λ2·(x_i − x_f,i−1)² + (1 − λ2)·ν²_f,i−1``;
* the filtered squared successive difference
  ``δ²_f,i = λ3·(x_i − x_i−1)² + (1 − λ3)·δ²_f,i−1``.

Both filtered variances estimate the noise variance when the signal is at
steady state, so their ratio ``R = (2 − λ1)·ν²_f / δ²_f`` sits near 1; a ramp
or a step inflates ``ν²_f`` far more than ``δ²_f`` and drives R up. The
plant is judged steady when every key signal's R has stayed below a critical
value for a hold time, and stays steady until some R reaches a (higher) exit
value: the gap is a hysteresis, so one noisy window does not drop the gate.

A signal whose spread stays at or below its noise floor for several windows
is *frozen* (a stuck transmitter, a tripped unit): its R is 0/0 and would
otherwise pass as perfectly steady. A frozen key signal keeps the gate
closed and is named in the verdict.

The objects here hold explicit state and have no clock or I/O: the caller
passes each window's values and time. Missing samples (NaN) are skipped so
they never reach the filters. The state is one JSON-able dict
(:meth:`SteadyStateDetector.snapshot` / :meth:`~SteadyStateDetector.restore`).

References
----------
.. [1] Cao, S. and Rhinehart, R. R. (1995). An efficient method for on-line
   identification of steady state. Journal of Process Control 5(6), 363–374.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

# Default filter factors recommended by Cao & Rhinehart (1995).
DEFAULT_LAMBDAS: tuple[float, float, float] = (0.2, 0.1, 0.1)

# Default critical R: about the 99th percentile of R for white noise with the
# default filters (Cao & Rhinehart 1995, from memory; tests/test_monitor_steady.py
# checks the percentile by Monte Carlo).
DEFAULT_R_CRITICAL = 1.7

STEADY = "steady"
TRANSIENT = "transient"
INSUFFICIENT_DATA = "insufficient_data"
FROZEN = "frozen"

#: Every status a :class:`SteadyVerdict` can carry (for metrics enums).
STEADY_STATUSES: tuple[str, ...] = (STEADY, TRANSIENT, INSUFFICIENT_DATA, FROZEN)


def _check_lambdas(lambdas: Iterable[float]) -> tuple[float, float, float]:
    lam = tuple(float(v) for v in lambdas)
    if len(lam) != 3:
        raise ValueError(f"lambdas must be three filter factors (λ1, λ2, λ3), got {lam!r}")
    for name, v in zip(("lambda1", "lambda2", "lambda3"), lam, strict=True):
        if not 0.0 < v <= 1.0:
            raise ValueError(f"{name} must be in (0, 1], got {v!r}")
    return lam


def default_warmup(lambda2: float, lambda3: float) -> int:
    """Default number of filter updates before R is reported: ``ceil(2/min(λ2, λ3))``."""
    return math.ceil(2.0 / min(lambda2, lambda3))


def _num(x: float) -> float | None:
    """A float for JSON: NaN and infinities become None."""
    return float(x) if math.isfinite(x) else None


def _float(x: Any) -> float:
    """Inverse of :func:`_num`."""
    return math.nan if x is None else float(x)


def _ratio(lambda1: float, nu2: float, delta2: float) -> float:
    """R from the filtered variances; a perfectly flat signal (0/0) gives R = 0."""
    if delta2 > 0.0:
        return (2.0 - lambda1) * nu2 / delta2
    return 0.0 if nu2 == 0.0 else math.inf


class RStatistic:
    """Cao & Rhinehart filters and R-statistic for one signal.

    Parameters
    ----------
    lambda1, lambda2, lambda3 : float
        Filter factors [-] for the mean, the deviation variance and the
        successive-difference variance, each in (0, 1].
    warmup : int or None
        Number of filter updates (valid samples after the first) before R is
        reported; ``None`` uses ``ceil(2/min(λ2, λ3))`` (20 with the defaults,
        by when the upper percentiles of R at steady state are within about
        10 % of their long-run values).

    Notes
    -----
    While a filter has seen fewer than ``1/λ`` samples it uses the weight
    ``1/n`` instead of ``λ`` (a running average), so the estimates start
    unbiased instead of from zero. The units of R are [-]; the filtered mean
    has the unit of the signal.

    :attr:`jump` is a step test on the newest sample against the state
    *before* it, ``J = (2 − λ1)·(x_i − x_f,i−1)² / δ²_f,i−1`` [-]: at steady
    state ``x_i − x_f,i−1`` has variance ``2σ²/(2 − λ1)`` and ``δ²_f``
    estimates ``2σ²``, so J is about χ²(1) with heavier tails (δ²_f is itself
    an estimate). A step of a few σ gives a large J in the window it
    happens, where R, which needs the filtered mean to lag, barely moves when
    λ1 is large. NaN until warmed up.

    References
    ----------
    .. [1] Cao, S. and Rhinehart, R. R. (1995). J. Process Control 5(6), 363–374.
    """

    def __init__(
        self,
        lambda1: float = DEFAULT_LAMBDAS[0],
        lambda2: float = DEFAULT_LAMBDAS[1],
        lambda3: float = DEFAULT_LAMBDAS[2],
        warmup: int | None = None,
    ) -> None:
        self.lambda1, self.lambda2, self.lambda3 = _check_lambdas((lambda1, lambda2, lambda3))
        if warmup is None:
            warmup = default_warmup(self.lambda2, self.lambda3)
        if warmup < 1:
            raise ValueError(f"warmup must be at least 1 update, got {warmup!r}")
        self.warmup = int(warmup)
        self.reset()

    def reset(self) -> None:
        """Forget all samples."""
        self.mean = math.nan  # filtered mean x_f
        self.nu2 = math.nan  # filtered squared deviation ν²_f
        self.delta2 = math.nan  # filtered squared successive difference δ²_f
        self.last = math.nan  # previous valid sample
        self.samples = 0  # valid samples seen since reset
        self.jump = math.nan  # step statistic of the last sample

    @property
    def updates(self) -> int:
        """Number of variance-filter updates (valid samples after the first)."""
        return max(self.samples - 1, 0)

    @property
    def warmed_up(self) -> bool:
        return self.updates >= self.warmup

    @property
    def r(self) -> float:
        """Current R [-]; NaN until warmed up."""
        if not self.warmed_up:
            return math.nan
        return _ratio(self.lambda1, self.nu2, self.delta2)

    def _jump(self, x: float) -> float:
        e2 = (x - self.mean) ** 2
        if self.delta2 > 0.0:
            return (2.0 - self.lambda1) * e2 / self.delta2
        return 0.0 if e2 == 0.0 else math.inf

    def snapshot(self) -> dict[str, Any]:
        """Filter state as a JSON-able dict (NaN as None)."""
        return {"mean": _num(self.mean), "nu2": _num(self.nu2), "delta2": _num(self.delta2),
                "last": _num(self.last), "samples": self.samples, "jump": _num(self.jump)}

    def restore(self, d: Mapping[str, Any]) -> None:
        """Set the filter state from :meth:`snapshot` output."""
        self.mean, self.nu2 = _float(d["mean"]), _float(d["nu2"])
        self.delta2, self.last = _float(d["delta2"]), _float(d["last"])
        self.samples = int(d["samples"])
        self.jump = _float(d.get("jump"))
        if self.samples < 0:
            raise ValueError(f"samples {self.samples!r}; expected a count >= 0")

    def update(self, value: float) -> float:
        """Feed one sample; a NaN or infinite sample is skipped. Returns :attr:`r`."""
        x = float(value)
        if not math.isfinite(x):
            self.jump = math.nan
            return self.r
        self.jump = self._jump(x) if self.warmed_up else math.nan
        self.samples += 1
        if self.samples == 1:
            self.mean = x
            self.last = x
            self.nu2 = 0.0
            self.delta2 = 0.0
            return self.r
        n = self.samples - 1  # update count of the variance filters
        w1 = max(self.lambda1, 1.0 / self.samples)
        w2 = max(self.lambda2, 1.0 / n)
        w3 = max(self.lambda3, 1.0 / n)
        self.nu2 = w2 * (x - self.mean) ** 2 + (1.0 - w2) * self.nu2
        self.delta2 = w3 * (x - self.last) ** 2 + (1.0 - w3) * self.delta2
        self.mean = w1 * x + (1.0 - w1) * self.mean
        self.last = x
        return self.r


def r_statistic_series(
    x: np.ndarray,
    lambdas: Iterable[float] = DEFAULT_LAMBDAS,
    warmup: int | None = None,
) -> np.ndarray:
    """R-statistic of whole series at once, vectorised over columns.

    Same filters and start-up as :class:`RStatistic`, for back-fill and for
    Monte Carlo studies. NaN samples are skipped per column.

    Parameters
    ----------
    x : array_like, shape (n,) or (n, m)
        Samples in time order along axis 0 (any unit).
    lambdas : three floats
        Filter factors (λ1, λ2, λ3) [-].
    warmup : int or None
        As for :class:`RStatistic`.

    Returns
    -------
    numpy.ndarray
        R [-] after each sample, same shape as ``x``; NaN before warm-up.

    References
    ----------
    .. [1] Cao, S. and Rhinehart, R. R. (1995). J. Process Control 5(6), 363–374.
    """
    l1, l2, l3 = _check_lambdas(lambdas)
    if warmup is None:
        warmup = default_warmup(l2, l3)
    arr = np.asarray(x, dtype=float)
    one_d = arr.ndim == 1
    if one_d:
        arr = arr[:, None]
    if arr.ndim != 2:
        raise ValueError(f"x must be 1-D or 2-D, got shape {arr.shape}")
    m = arr.shape[1]
    mean = np.full(m, np.nan)
    last = np.full(m, np.nan)
    nu2 = np.zeros(m)
    delta2 = np.zeros(m)
    samples = np.zeros(m, dtype=int)
    out = np.full(arr.shape, np.nan)
    for i, row in enumerate(arr):
        ok = np.isfinite(row)
        samples = samples + ok
        first = ok & (samples == 1)
        mean = np.where(first, row, mean)
        last = np.where(first, row, last)
        upd = ok & (samples > 1)
        n = np.maximum(samples - 1, 1)
        w1 = np.maximum(l1, 1.0 / np.maximum(samples, 1))
        w2 = np.maximum(l2, 1.0 / n)
        w3 = np.maximum(l3, 1.0 / n)
        xv = np.where(upd, row, 0.0)
        nu2 = np.where(upd, w2 * (xv - mean) ** 2 + (1.0 - w2) * nu2, nu2)
        delta2 = np.where(upd, w3 * (xv - last) ** 2 + (1.0 - w3) * delta2, delta2)
        mean = np.where(upd, w1 * xv + (1.0 - w1) * mean, mean)
        last = np.where(upd, xv, last)
        with np.errstate(divide="ignore", invalid="ignore"):
            r = (2.0 - l1) * nu2 / delta2
        r = np.where(delta2 > 0.0, r, np.where(nu2 == 0.0, 0.0, np.inf))
        out[i] = np.where(samples - 1 >= warmup, r, np.nan)
    return out[:, 0] if one_d else out


#: A noise floor [unit of the signal]: a constant, or a function of the reading.
NoiseFloor = float | Callable[[float], float]


@dataclass(frozen=True)
class SteadyVerdict:
    """Outcome of one window of :class:`SteadyStateDetector`.

    Attributes
    ----------
    steady : bool
        Every key signal has had R below the critical value for the hold time
        (and, once steady, below the exit value since), none is frozen.
    status : str
        ``"steady"``; ``"transient"`` (some signal's R is at or above its
        threshold, or the hold time is still running); ``"insufficient_data"``
        (some signal is missing in this window or not yet warmed up);
        ``"frozen"`` (some signal's spread has stayed at or below its noise
        floor for ``frozen_windows`` windows). Frozen takes precedence over
        missing, missing over transient.
    r : dict of str to float
        R [-] per signal (NaN when not warmed up), for metrics.
    failing : tuple of str
        Signals that are missing, not warmed up, frozen or at/above their threshold.
    candidate_since : float or None
        Window time [s] since which every signal has passed, if it does now.
    frozen : tuple of str
        The frozen signals (a subset of ``failing``).
    """

    steady: bool
    status: str
    r: dict[str, float]
    failing: tuple[str, ...]
    candidate_since: float | None
    frozen: tuple[str, ...] = field(default=())


def _per_signal(name: str, value: Any, names: tuple[str, ...]) -> dict[str, Any]:
    if isinstance(value, Mapping):
        unknown = set(value) - set(names)
        missing = set(names) - set(value)
        if unknown or missing:
            raise ValueError(
                f"{name} must give one value per signal; unknown {sorted(unknown)}, missing {sorted(missing)}"
            )
        return {k: value[k] for k in names}
    return dict.fromkeys(names, value)


class SteadyStateDetector:
    """Plant steady when every key signal's R stays below critical for a hold time.

    Parameters
    ----------
    signals : iterable of str
        Names of the key signals (e.g. main-steam flow, generator power).
    lambdas : three floats
        Filter factors (λ1, λ2, λ3) [-], default (0.2, 0.1, 0.1).
    r_critical : float or mapping of str to float
        Critical R [-] to *become* steady, one value or one per signal.
    hold_windows : int or None
        Number of consecutive passing windows before steady is declared
        (1 = at once). Give this or ``hold_seconds``, not both.
    hold_seconds : float or None
        Window time [s] that every signal must keep passing before steady is
        declared, counted from the first passing window (0 = at once).
    warmup : int or None
        Filter updates per signal before its R counts; see :class:`RStatistic`.
    r_exit : float, mapping of str to float, or None
        R [-] at or above which a steady plant becomes transient; at least
        ``r_critical``. Default ``r_critical`` (no hysteresis).
    noise_floor : float, callable, mapping of str to either, or None
        Spread [unit of the signal] at or below which a window counts as flat;
        a callable gets the window value and returns the floor (e.g. a fraction
        of the instrument's stated standard uncertainty at that reading).
        ``None`` disables the frozen check.
    frozen_windows : int
        Consecutive flat windows after which a signal is frozen.
    jump_critical : float, mapping of str to float, or None
        Step test: a window whose :attr:`RStatistic.jump` is at or above this
        value [-] is transient for that signal (a step R would miss). ``None``
        disables the test.

    Notes
    -----
    A window in which a key signal is missing (NaN) cannot confirm steady
    state: the verdict is ``"insufficient_data"`` and the hold restarts, but
    the filters of that signal keep their state. Critical values near 1.4
    (95 %) to 1.7 (99 %) suit white noise with the default filters; larger
    filter factors (a shorter memory, a faster return to steady after a
    transient) widen the distribution of R and need larger critical values
    (the README gives them by Monte Carlo). Noise that is correlated from
    window to window raises R and needs a larger critical value or longer
    windows.

    The spread used by the frozen check is the one passed to :meth:`update`
    (e.g. the sample standard deviation within the window); without it, the
    change from the previous window value divided by √2, which for window
    means is smaller than the sample spread, so a floor meant for samples
    then flags less reliably.

    References
    ----------
    .. [1] Cao, S. and Rhinehart, R. R. (1995). J. Process Control 5(6), 363–374.
    """

    def __init__(
        self,
        signals: Iterable[str],
        lambdas: Iterable[float] = DEFAULT_LAMBDAS,
        r_critical: float | Mapping[str, float] = DEFAULT_R_CRITICAL,
        hold_windows: int | None = None,
        hold_seconds: float | None = None,
        warmup: int | None = None,
        *,
        r_exit: float | Mapping[str, float] | None = None,
        noise_floor: NoiseFloor | Mapping[str, NoiseFloor] | None = None,
        frozen_windows: int = 3,
        jump_critical: float | Mapping[str, float] | None = None,
    ) -> None:
        names = tuple(signals)
        if not names:
            raise ValueError("signals must name at least one key signal")
        if len(set(names)) != len(names):
            raise ValueError(f"signals contains duplicates: {names!r}")
        lam = _check_lambdas(lambdas)
        crit = {k: float(v) for k, v in _per_signal("r_critical", r_critical, names).items()}
        for k, v in crit.items():
            if not v > 0.0:
                raise ValueError(f"r_critical for {k!r} must be positive, got {v!r}")
        exit_r = crit if r_exit is None else {
            k: float(v) for k, v in _per_signal("r_exit", r_exit, names).items()}
        for k, v in exit_r.items():
            if not v >= crit[k]:
                raise ValueError(f"r_exit for {k!r} must be at least r_critical {crit[k]!r}, got {v!r}")
        if (hold_windows is None) == (hold_seconds is None):
            raise ValueError("give exactly one of hold_windows and hold_seconds")
        if hold_windows is not None and hold_windows < 1:
            raise ValueError(f"hold_windows must be at least 1, got {hold_windows!r}")
        if hold_seconds is not None and not hold_seconds >= 0.0:
            raise ValueError(f"hold_seconds must be >= 0, got {hold_seconds!r}")
        jump = None if jump_critical is None else {
            k: float(v) for k, v in _per_signal("jump_critical", jump_critical, names).items()}
        for k, v in (jump or {}).items():
            if not v > 0.0:
                raise ValueError(f"jump_critical for {k!r} must be positive, got {v!r}")
        if frozen_windows < 1:
            raise ValueError(f"frozen_windows must be at least 1, got {frozen_windows!r}")
        floors = None if noise_floor is None else _per_signal("noise_floor", noise_floor, names)
        if floors is not None:
            for k, f in floors.items():
                if not callable(f) and not float(f) >= 0.0:
                    raise ValueError(f"noise_floor for {k!r} must be >= 0 or a function, got {f!r}")
        self.signals = names
        self.r_critical = crit
        self.r_exit = exit_r
        self.hold_windows = hold_windows
        self.hold_seconds = hold_seconds
        self.noise_floor: dict[str, NoiseFloor] | None = floors
        self.frozen_windows = int(frozen_windows)
        self.jump_critical = jump
        self._stats = {k: RStatistic(*lam, warmup=warmup) for k in names}
        self.reset()

    def reset(self) -> None:
        """Forget all samples, the hold and the frozen counters."""
        for s in self._stats.values():
            s.reset()
        self._since: float | None = None
        self._passing_windows = 0
        self._last_time: float | None = None
        self._flat = dict.fromkeys(self.signals, 0)
        self.steady = False

    @property
    def r_values(self) -> dict[str, float]:
        """Current R [-] per signal (NaN when not warmed up)."""
        return {k: s.r for k, s in self._stats.items()}

    @property
    def jump_values(self) -> dict[str, float]:
        """Step statistic J [-] of the last window per signal (NaN when not warmed up)."""
        return {k: s.jump for k, s in self._stats.items()}

    @property
    def frozen(self) -> tuple[str, ...]:
        """Signals frozen as of the last window."""
        return tuple(k for k in self.signals if self._flat[k] >= self.frozen_windows)

    def _floor(self, k: str, value: float) -> float:
        assert self.noise_floor is not None
        f = self.noise_floor[k]
        return float(f(value)) if callable(f) else float(f)

    def update(
        self, values: Mapping[str, float], time: float, spreads: Mapping[str, float] | None = None
    ) -> SteadyVerdict:
        """Feed one window.

        Parameters
        ----------
        values : mapping of str to float
            Window value per key signal; a missing key or NaN counts as missing.
            Keys that are not key signals are ignored.
        time : float
            Window time [s] (e.g. Unix seconds of the window end); must not
            decrease.
        spreads : mapping of str to float, optional
            Spread per key signal in this window [unit of the signal], e.g. the
            sample standard deviation, for the frozen check; a missing key or
            NaN (fewer than two samples) leaves that signal's flat count as it
            is. Without the mapping the change from the previous value / √2 is
            used.

        Returns
        -------
        SteadyVerdict
        """
        t = float(time)
        if not math.isfinite(t):
            raise ValueError(f"time must be finite, got {time!r}")
        if self._last_time is not None and t < self._last_time:
            raise ValueError(f"time went backwards: {t!r} < previous {self._last_time!r}")
        self._last_time = t
        r: dict[str, float] = {}
        missing: list[str] = []
        frozen: list[str] = []
        failing: list[str] = []
        for k in self.signals:
            v = values.get(k, math.nan)
            v = math.nan if v is None else float(v)
            stat = self._stats[k]
            previous = stat.last if stat.samples else math.nan
            r[k] = stat.update(v)
            if self.noise_floor is not None and math.isfinite(v):
                if spreads is not None:
                    sp = spreads.get(k, math.nan)
                    spread = math.nan if sp is None else float(sp)
                else:
                    spread = abs(v - previous) / math.sqrt(2.0)
                if math.isfinite(spread):
                    self._flat[k] = self._flat[k] + 1 if spread <= self._floor(k, v) else 0
            threshold = self.r_exit[k] if self.steady else self.r_critical[k]
            if self._flat[k] >= self.frozen_windows:
                frozen.append(k)
            elif not math.isfinite(v) or not stat.warmed_up:
                missing.append(k)
            elif not r[k] < threshold or (self.jump_critical is not None
                                          and stat.jump >= self.jump_critical[k]):
                failing.append(k)
        if missing or failing or frozen:
            self._since = None
            self._passing_windows = 0
            self.steady = False
            status = FROZEN if frozen else INSUFFICIENT_DATA if missing else TRANSIENT
            return SteadyVerdict(False, status, r, tuple(missing + frozen + failing), None, tuple(frozen))
        if self._since is None:
            self._since = t
        self._passing_windows += 1
        if self.steady:
            held = True
        elif self.hold_windows is not None:
            held = self._passing_windows >= self.hold_windows
        else:
            held = t - self._since >= float(self.hold_seconds)  # type: ignore[arg-type]
        self.steady = held
        return SteadyVerdict(held, STEADY if held else TRANSIENT, r, (), self._since)

    # ------------------------------------------------------------------ state
    def snapshot(self) -> dict[str, Any]:
        """The detector's state as a JSON-able dict (filters, hold, frozen counters).

        Settings (signals, filter factors, thresholds, floors) are not part of
        it: :meth:`restore` it into a detector built from the same settings.
        """
        return {
            "version": 1,
            "signals": list(self.signals),
            "filters": {k: s.snapshot() for k, s in self._stats.items()},
            "flat_windows": dict(self._flat),
            "since": self._since,
            "passing_windows": self._passing_windows,
            "last_time": self._last_time,
            "steady": self.steady,
        }

    def restore(self, d: Mapping[str, Any]) -> None:
        """Continue from a :meth:`snapshot` (e.g. after a restart).

        Raises
        ------
        ValueError
            The snapshot is of another version or another set of key signals.
        """
        if d.get("version") != 1:
            raise ValueError(f"steady-state snapshot version {d.get('version')!r}; expected 1")
        if list(d.get("signals", ())) != list(self.signals):
            raise ValueError(
                f"steady-state snapshot is for signals {d.get('signals')!r}; expected {list(self.signals)!r}"
            )
        for k, s in self._stats.items():
            s.restore(d["filters"][k])
        self._flat = {k: int(d["flat_windows"][k]) for k in self.signals}
        self._since = None if d["since"] is None else float(d["since"])
        self._passing_windows = int(d["passing_windows"])
        self._last_time = None if d["last_time"] is None else float(d["last_time"])
        self.steady = bool(d["steady"])


def steady_detector(config: Any) -> SteadyStateDetector | None:
    """The steady-state gate of a plant file's ``[monitoring]``, or None without key signals.

    The noise floor of each key signal is ``steady_frozen_fraction`` times the
    sensor's stated standard uncertainty (VDI 2048 σ = U95 / 1.96) at the
    window value.

    Parameters
    ----------
    config : PlantConfig
    """
    mon = config.monitoring
    if not mon.steady_signals:
        return None
    sensors = config.sensors_by_tag
    frac = float(mon.steady_frozen_fraction)

    def floor_of(tag: str) -> Callable[[float], float]:
        sigma = sensors[tag].sigma_rule()  # the sensor's σ rule, read once (called every window)
        return lambda v: frac * float(sigma(v))

    return SteadyStateDetector(
        mon.steady_signals, mon.steady_lambdas, mon.steady_critical_r,
        hold_seconds=float(mon.steady_hold), warmup=mon.steady_warmup,
        r_exit=mon.steady_exit_r, noise_floor={t: floor_of(t) for t in mon.steady_signals},
        frozen_windows=mon.steady_frozen_windows, jump_critical=mon.steady_jump_critical,
    )
