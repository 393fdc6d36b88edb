"""Drift detection on KPIs: EWMA chart and tabular CUSUM.

Both charts compare a KPI (one value per steady window, e.g. an HP section
efficiency) with an in-control target ``μ0`` and the standard deviation
``σ`` of a single window's value. The caller decides which windows are
steady; :meth:`DriftMonitor.update` ignores the others, so transients never
enter the statistics.

The step functions (:func:`ewma_step`, :func:`cusum_step`,
:func:`ewma_halfwidth`) work elementwise on arrays, so the same arithmetic
serves one live chart and a vectorised Monte Carlo of many charts.

References
----------
.. [1] Montgomery, D. C. Introduction to Statistical Quality Control, chapter
   on cumulative-sum and exponentially weighted moving-average control charts
   (from memory).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass

import numpy as np

UP = "up"
DOWN = "down"
NONE = "none"


def ewma_step(z, x, lam: float):
    """One EWMA update ``z_t = λ·x_t + (1 − λ)·z_{t−1}``.

    Parameters
    ----------
    z : float or ndarray
        Previous statistic (start with the target ``μ0``), unit of the KPI.
    x : float or ndarray
        New observation, unit of the KPI.
    lam : float
        Smoothing factor λ [-] in (0, 1].

    References
    ----------
    .. [1] Montgomery, Introduction to Statistical Quality Control (from memory).
    """
    return lam * x + (1.0 - lam) * z


def ewma_halfwidth(sigma: float, lam: float, L: float, t):
    """Half-width of the EWMA control limits after ``t`` observations.

    ``L·σ·sqrt(λ/(2 − λ)·[1 − (1 − λ)^(2t)])``; the limits are ``μ0 ± halfwidth``.

    Parameters
    ----------
    sigma : float
        Standard deviation σ of one observation, unit of the KPI.
    lam : float
        Smoothing factor λ [-].
    L : float
        Width of the limits in standard deviations of z [-].
    t : int or ndarray
        Number of observations since the start (1 for the first).

    References
    ----------
    .. [1] Montgomery, Introduction to Statistical Quality Control (from memory).
    """
    return L * sigma * np.sqrt(lam / (2.0 - lam) * (1.0 - (1.0 - lam) ** (2 * np.asarray(t))))


def cusum_step(c_high, c_low, x, target: float, K: float):
    """One tabular CUSUM update.

    ``C⁺ = max(0, x − μ0 − K + C⁺)``, ``C⁻ = max(0, μ0 − K − x + C⁻)``.

    Parameters
    ----------
    c_high, c_low : float or ndarray
        Previous upper and lower sums (start at 0), unit of the KPI.
    x : float or ndarray
        New observation, unit of the KPI.
    target : float
        In-control mean μ0, unit of the KPI.
    K : float
        Reference value (allowance) ``k·σ``, unit of the KPI.

    Returns
    -------
    (c_high, c_low)

    References
    ----------
    .. [1] Montgomery, Introduction to Statistical Quality Control (from memory).
    """
    return np.maximum(0.0, x - target - K + c_high), np.maximum(0.0, target - K - x + c_low)


@dataclass(frozen=True)
class DriftStatus:
    """State of one KPI's drift charts after a window.

    Attributes
    ----------
    used : bool
        This window entered the statistics (steady and a finite value).
    count : int
        Observations since the last reset.
    ewma : float
        EWMA statistic z (unit of the KPI); the target before any observation.
    ewma_lower, ewma_upper : float
        Current EWMA limits (unit of the KPI); equal to the target before any
        observation.
    cusum_high, cusum_low : float
        CUSUM sums C⁺ and C⁻ (unit of the KPI).
    cusum_limit : float
        Decision interval H = h·σ (unit of the KPI).
    ewma_signal, cusum_signal : str
        ``"up"``, ``"down"`` or ``"none"`` per chart.
    direction : str
        ``"up"``, ``"down"`` or ``"none"``: up if a chart signals up and none
        signals down, and vice versa; if the charts disagree, the side of the
        EWMA statistic relative to the target decides.
    """

    used: bool
    count: int
    ewma: float
    ewma_lower: float
    ewma_upper: float
    cusum_high: float
    cusum_low: float
    cusum_limit: float
    ewma_signal: str
    cusum_signal: str
    direction: str

    @property
    def alarm(self) -> bool:
        return self.direction != NONE


class DriftMonitor:
    """EWMA and CUSUM drift charts for one KPI, fed only steady windows.

    Parameters
    ----------
    target : float
        In-control mean μ0 (unit of the KPI).
    sigma : float
        Standard deviation σ of one window's value (unit of the KPI), > 0.
    lam : float
        EWMA smoothing factor λ [-] in (0, 1]; default 0.1.
    L : float
        EWMA limit width [-]; default 2.814, which with λ = 0.1 and the
        asymptotic limits gives an in-control average run length of about 500
        windows (Lucas & Saccucci's table as reprinted by Montgomery, from
        memory). The time-varying limits used here tighten the first few
        windows, which lowers it slightly (about 490 by Monte Carlo).
    k : float
        CUSUM reference value in units of σ [-]; default 0.5 (tuned to a 1σ shift).
    h : float
        CUSUM decision interval in units of σ [-]; default 5 (in-control
        average run length about 465 windows, Montgomery, from memory).

    Notes
    -----
    After a signal the charts keep running; :meth:`reset` restarts them (for
    example after the cause has been found, or with a new target).

    References
    ----------
    .. [1] Montgomery, Introduction to Statistical Quality Control (from memory).
    """

    def __init__(
        self,
        target: float,
        sigma: float,
        lam: float = 0.1,
        L: float = 2.814,
        k: float = 0.5,
        h: float = 5.0,
    ) -> None:
        target = float(target)
        if not math.isfinite(target):
            raise ValueError(f"target must be finite, got {target!r}")
        if not (math.isfinite(sigma) and sigma > 0.0):
            raise ValueError(f"sigma must be positive and finite, got {sigma!r}")
        if not 0.0 < lam <= 1.0:
            raise ValueError(f"lam must be in (0, 1], got {lam!r}")
        if not L > 0.0:
            raise ValueError(f"L must be positive, got {L!r}")
        if not k >= 0.0:
            raise ValueError(f"k must be >= 0, got {k!r}")
        if not h > 0.0:
            raise ValueError(f"h must be positive, got {h!r}")
        self.target = target
        self.sigma = float(sigma)
        self.lam = float(lam)
        self.L = float(L)
        self.k = float(k)
        self.h = float(h)
        self.reset()

    @property
    def K(self) -> float:
        """CUSUM reference value k·σ (unit of the KPI)."""
        return self.k * self.sigma

    @property
    def H(self) -> float:
        """CUSUM decision interval h·σ (unit of the KPI)."""
        return self.h * self.sigma

    def reset(self, target: float | None = None) -> None:
        """Restart both charts, optionally with a new target μ0."""
        if target is not None:
            target = float(target)
            if not math.isfinite(target):
                raise ValueError(f"target must be finite, got {target!r}")
            self.target = target
        self.count = 0
        self.ewma = self.target
        self.cusum_high = 0.0
        self.cusum_low = 0.0
        self.last_time: float | None = None

    def status(self, used: bool = False) -> DriftStatus:
        """Current statistics without feeding a window."""
        if self.count:
            hw = float(ewma_halfwidth(self.sigma, self.lam, self.L, self.count))
        else:
            hw = 0.0
        lo, hi = self.target - hw, self.target + hw
        if self.count and self.ewma > hi:
            e_sig = UP
        elif self.count and self.ewma < lo:
            e_sig = DOWN
        else:
            e_sig = NONE
        if self.cusum_high > self.H:
            c_sig = UP
        elif self.cusum_low > self.H:
            c_sig = DOWN
        else:
            c_sig = NONE
        signals = {e_sig, c_sig} - {NONE}
        if not signals:
            direction = NONE
        elif len(signals) == 1:
            direction = signals.pop()
        else:
            direction = UP if self.ewma > self.target else DOWN
        return DriftStatus(
            used=used,
            count=self.count,
            ewma=self.ewma,
            ewma_lower=lo,
            ewma_upper=hi,
            cusum_high=self.cusum_high,
            cusum_low=self.cusum_low,
            cusum_limit=self.H,
            ewma_signal=e_sig,
            cusum_signal=c_sig,
            direction=direction,
        )

    def update(self, value: float, steady: bool, time: float | None = None) -> DriftStatus:
        """Feed one window.

        Parameters
        ----------
        value : float
            KPI value of the window (unit of the KPI); NaN is ignored.
        steady : bool
            Whether the plant was steady in this window; unsteady windows are ignored.
        time : float or None
            Window time [s], kept as :attr:`last_time` of the last used window;
            must not decrease.
        """
        if time is not None:
            time = float(time)
            if self.last_time is not None and time < self.last_time:
                raise ValueError(f"time went backwards: {time!r} < previous {self.last_time!r}")
        x = float(value)
        if not steady or not math.isfinite(x):
            return self.status(used=False)
        self.count += 1
        self.ewma = float(ewma_step(self.ewma, x, self.lam))
        hi, lo = cusum_step(self.cusum_high, self.cusum_low, x, self.target, self.K)
        self.cusum_high, self.cusum_low = float(hi), float(lo)
        if time is not None:
            self.last_time = time
        return self.status(used=True)


@dataclass(frozen=True)
class DriftSettings:
    """Parameters of one KPI's drift charts; see :class:`DriftMonitor`."""

    target: float
    sigma: float
    lam: float = 0.1
    L: float = 2.814
    k: float = 0.5
    h: float = 5.0


class DriftBank:
    """Drift monitors for several KPIs, keyed by name.

    Parameters
    ----------
    settings : mapping of str to DriftSettings or DriftMonitor
        One entry per KPI.
    """

    def __init__(self, settings: Mapping[str, DriftSettings | DriftMonitor]) -> None:
        self.monitors: dict[str, DriftMonitor] = {}
        for name, s in settings.items():
            if isinstance(s, DriftMonitor):
                self.monitors[name] = s
            elif isinstance(s, DriftSettings):
                self.monitors[name] = DriftMonitor(s.target, s.sigma, s.lam, s.L, s.k, s.h)
            else:
                raise TypeError(
                    f"drift settings for {name!r} must be DriftSettings or DriftMonitor, "
                    f"got {type(s).__name__}"
                )

    def __getitem__(self, name: str) -> DriftMonitor:
        try:
            return self.monitors[name]
        except KeyError:
            raise KeyError(
                f"no drift monitor named {name!r}; known: {sorted(self.monitors)}"
            ) from None

    def __iter__(self):
        return iter(self.monitors)

    def __len__(self) -> int:
        return len(self.monitors)

    def update(
        self, values: Mapping[str, float], steady: bool, time: float | None = None
    ) -> dict[str, DriftStatus]:
        """Feed one window to every monitor; a KPI absent from ``values`` counts as NaN."""
        return {
            name: m.update(values.get(name, math.nan), steady, time)
            for name, m in self.monitors.items()
        }

    def statuses(self) -> dict[str, DriftStatus]:
        """Current statistics of every monitor, for metrics."""
        return {name: m.status() for name, m in self.monitors.items()}

    def reset(self, names: Iterable[str] | None = None) -> None:
        """Restart the named monitors (all when ``names`` is None)."""
        for name in self.monitors if names is None else names:
            self[name].reset()
