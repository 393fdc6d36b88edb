"""Steady-state detection with the Cao & Rhinehart R-statistic.

Each key signal (one value per window, e.g. the window mean of main-steam
flow) feeds three first-order filters:

* the filtered mean ``x_f,i = λ1·x_i + (1 − λ1)·x_f,i−1``;
* the filtered squared deviation from the *previous* filtered mean
  ``ν²_f,i = λ2·(x_i − x_f,i−1)² + (1 − λ2)·ν²_f,i−1``;
* the filtered squared successive difference
  ``δ²_f,i = λ3·(x_i − x_i−1)² + (1 − λ3)·δ²_f,i−1``.

Both filtered variances estimate the noise variance when the signal is at
steady state, so their ratio ``R = (2 − λ1)·ν²_f / δ²_f`` sits near 1; a ramp
or a step inflates ``ν²_f`` far more than ``δ²_f`` and drives R up. The
signal is judged steady when R is below a critical value.

The objects here hold explicit state and have no clock or I/O: the caller
passes each window's values and time. Missing samples (NaN) are skipped so
they never reach the filters.

References
----------
.. [1] Cao, S. and Rhinehart, R. R. (1995). An efficient method for on-line
   identification of steady state. Journal of Process Control 5(6), 363–374.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass

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

    def update(self, value: float) -> float:
        """Feed one sample; a NaN or infinite sample is skipped. Returns :attr:`r`."""
        x = float(value)
        if not math.isfinite(x):
            return self.r
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


@dataclass(frozen=True)
class SteadyVerdict:
    """Outcome of one window of :class:`SteadyStateDetector`.

    Attributes
    ----------
    steady : bool
        Every key signal has had R below the critical value for the hold time.
    status : str
        ``"steady"``, ``"transient"`` (some signal has R at or above the
        critical value, or the hold time is still running) or
        ``"insufficient_data"`` (some signal is missing in this window or not
        yet warmed up).
    r : dict of str to float
        R [-] per signal (NaN when not warmed up), for metrics.
    failing : tuple of str
        Signals that are missing, not warmed up, or at/above the critical value.
    candidate_since : float or None
        Window time [s] since which every signal has passed, if it does now.
    """

    steady: bool
    status: str
    r: dict[str, float]
    failing: tuple[str, ...]
    candidate_since: float | None


class SteadyStateDetector:
    """Plant steady when every key signal's R stays below critical for a hold time.

    Parameters
    ----------
    signals : iterable of str
        Names of the key signals (e.g. main-steam flow, generator power).
    lambdas : three floats
        Filter factors (λ1, λ2, λ3) [-], default (0.2, 0.1, 0.1).
    r_critical : float or mapping of str to float
        Critical R [-], one value or one per signal.
    hold_windows : int or None
        Number of consecutive passing windows before steady is declared
        (1 = at once). Give this or ``hold_seconds``, not both.
    hold_seconds : float or None
        Window time [s] that every signal must keep passing before steady is
        declared, counted from the first passing window (0 = at once).
    warmup : int or None
        Filter updates per signal before its R counts; see :class:`RStatistic`.

    Notes
    -----
    A window in which a key signal is missing (NaN) cannot confirm steady
    state: the verdict is ``"insufficient_data"`` and the hold restarts, but
    the filters of that signal keep their state. Critical values near 1.4
    (95 %) to 1.7 (99 %) suit white noise with the default filters; noise
    that is correlated from window to window raises R and needs a larger
    critical value or longer windows.

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
    ) -> None:
        names = tuple(signals)
        if not names:
            raise ValueError("signals must name at least one key signal")
        if len(set(names)) != len(names):
            raise ValueError(f"signals contains duplicates: {names!r}")
        lam = _check_lambdas(lambdas)
        if isinstance(r_critical, Mapping):
            unknown = set(r_critical) - set(names)
            missing = set(names) - set(r_critical)
            if unknown or missing:
                raise ValueError(
                    f"r_critical must give one value per signal; unknown {sorted(unknown)}, "
                    f"missing {sorted(missing)}"
                )
            crit = {k: float(r_critical[k]) for k in names}
        else:
            crit = dict.fromkeys(names, float(r_critical))
        for k, v in crit.items():
            if not v > 0.0:
                raise ValueError(f"r_critical for {k!r} must be positive, got {v!r}")
        if (hold_windows is None) == (hold_seconds is None):
            raise ValueError("give exactly one of hold_windows and hold_seconds")
        if hold_windows is not None and hold_windows < 1:
            raise ValueError(f"hold_windows must be at least 1, got {hold_windows!r}")
        if hold_seconds is not None and not hold_seconds >= 0.0:
            raise ValueError(f"hold_seconds must be >= 0, got {hold_seconds!r}")
        self.signals = names
        self.r_critical = crit
        self.hold_windows = hold_windows
        self.hold_seconds = hold_seconds
        self._stats = {k: RStatistic(*lam, warmup=warmup) for k in names}
        self.reset()

    def reset(self) -> None:
        """Forget all samples and the hold."""
        for s in self._stats.values():
            s.reset()
        self._since: float | None = None
        self._passing_windows = 0
        self._last_time: float | None = None
        self.steady = False

    @property
    def r_values(self) -> dict[str, float]:
        """Current R [-] per signal (NaN when not warmed up)."""
        return {k: s.r for k, s in self._stats.items()}

    def update(self, values: Mapping[str, float], time: float) -> SteadyVerdict:
        """Feed one window.

        Parameters
        ----------
        values : mapping of str to float
            Window value per key signal; a missing key or NaN counts as missing.
            Keys that are not key signals are ignored.
        time : float
            Window time [s] (e.g. Unix seconds of the window end); must not
            decrease.

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
        failing: list[str] = []
        for k in self.signals:
            v = values.get(k, math.nan)
            v = math.nan if v is None else float(v)
            stat = self._stats[k]
            r[k] = stat.update(v)
            if not math.isfinite(v) or not stat.warmed_up:
                missing.append(k)
            elif not r[k] < self.r_critical[k]:
                failing.append(k)
        if missing or failing:
            self._since = None
            self._passing_windows = 0
            self.steady = False
            status = INSUFFICIENT_DATA if missing else TRANSIENT
            return SteadyVerdict(False, status, r, tuple(missing + failing), None)
        if self._since is None:
            self._since = t
        self._passing_windows += 1
        if self.hold_windows is not None:
            held = self._passing_windows >= self.hold_windows
        else:
            held = t - self._since >= float(self.hold_seconds)  # type: ignore[arg-type]
        self.steady = held
        return SteadyVerdict(held, STEADY if held else TRANSIENT, r, (), self._since)
