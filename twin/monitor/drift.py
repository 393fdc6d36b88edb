"""Drift detection on KPIs: EWMA chart and tabular CUSUM.

Both charts compare a KPI (one value per steady window, e.g. an HP section
efficiency) with an in-control target ``μ0`` and the standard deviation
``σ`` of a single window's value. The caller decides which windows are
steady; :meth:`DriftMonitor.update` ignores the others, so transients never
enter the statistics.

The step functions (:func:`ewma_step`, :func:`cusum_step`,
:func:`ewma_halfwidth`) work elementwise on arrays, so the same arithmetic
serves one live chart and a vectorised Monte Carlo of many charts.

Calibration (:class:`DriftBank` in learning mode): μ0 and σ come from the
unit's own steady windows over a reference period (``reference_windows``
non-overlapping windows): μ0 their mean (the as-built offset from expected),
σ the window-to-window random part from the average moving range,
σ = MR̄/1.128 (Montgomery's individuals chart), so slow changes and the
instruments' systematic uncertainty do not enter it. Windows that overlap the
last one used are skipped (overlapping windows are autocorrelated and
shorten the in-control run length). The whole bank is one JSON-able value
(:meth:`DriftBank.snapshot` / :meth:`DriftBank.restore`) and can be reset to
learn again.

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


#: d2 of the moving range of two observations: E|x_t − x_{t−1}| = 1.128 σ (Montgomery, from memory).
D2_MOVING_RANGE = 1.128


def reference_estimate(values):
    """In-control mean μ0 and σ from a reference period, along the last axis.

    μ0 = mean; σ = mean |x_t − x_{t−1}| / 1.128 (average moving range), the
    window-to-window random part (Montgomery's individuals chart, from memory).

    Parameters
    ----------
    values : array_like
        Reference observations (unit of the KPI), at least two along the last axis.

    Returns
    -------
    (mu0, sigma)
    """
    x = np.asarray(values, dtype=float)
    if x.shape[-1] < 2:
        raise ValueError(f"a reference period needs at least 2 observations, got {x.shape[-1]}")
    return x.mean(axis=-1), np.abs(np.diff(x, axis=-1)).mean(axis=-1) / D2_MOVING_RANGE


def chart_signals(ewma, count, c_high, c_low, target, sigma, lam: float, L: float, h: float):
    """Which charts signal: (EWMA up, EWMA down, CUSUM up, CUSUM down), elementwise.

    The EWMA limits are the time-varying ones of :func:`ewma_halfwidth` after
    ``count`` observations; the CUSUM decision interval is ``h·σ``.
    """
    hw = np.where(np.asarray(count) > 0, ewma_halfwidth(sigma, lam, L, np.maximum(count, 1)), 0.0)
    live = np.asarray(count) > 0
    return (live & (ewma > target + hw), live & (ewma < target - hw),
            np.asarray(c_high) > h * sigma, np.asarray(c_low) > h * sigma)


#: Charted windows without a signal before a raised drift alarm clears, as the unit's
#: pipeline uses it (``DriftBank(clear_windows=...)``; see there).
CLEAR_WINDOWS = 10


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
    phase: str = "monitoring"  # or "learning" (reference period not complete: no chart yet)

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

    def snapshot(self) -> dict:
        """Parameters and statistics as a JSON-able dict (see :meth:`restore`)."""
        return {"target": self.target, "sigma": self.sigma, "lam": self.lam, "L": self.L, "k": self.k,
                "h": self.h, "count": self.count, "ewma": self.ewma, "cusum_high": self.cusum_high,
                "cusum_low": self.cusum_low, "last_time": self.last_time}

    @classmethod
    def from_snapshot(cls, d: Mapping) -> DriftMonitor:
        """A monitor in the state of a :meth:`snapshot`."""
        m = cls(d["target"], d["sigma"], d["lam"], d["L"], d["k"], d["h"])
        m.count, m.ewma = int(d["count"]), float(d["ewma"])
        m.cusum_high, m.cusum_low = float(d["cusum_high"]), float(d["cusum_low"])
        m.last_time = None if d.get("last_time") is None else float(d["last_time"])
        return m

    def status(self, used: bool = False) -> DriftStatus:
        """Current statistics without feeding a window."""
        if self.count:
            hw = float(ewma_halfwidth(self.sigma, self.lam, self.L, self.count))
        else:
            hw = 0.0
        lo, hi = self.target - hw, self.target + hw
        eu, ed, cu, cd = chart_signals(self.ewma, self.count, self.cusum_high, self.cusum_low, self.target,
                                       self.sigma, self.lam, self.L, self.h)
        e_sig = UP if eu else (DOWN if ed else NONE)
        c_sig = UP if cu else (DOWN if cd else NONE)
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


#: Layout version of :meth:`DriftBank.snapshot`.
SNAPSHOT_VERSION = 1


class DriftBank:
    """Drift monitors for several KPIs, keyed by name, optionally calibrated on the unit's own data.

    Parameters
    ----------
    settings : mapping of str to DriftSettings or DriftMonitor, optional
        KPIs with a known target and σ (charts start at once).
    learn : iterable of str
        KPIs whose μ0 and σ are learned from the first ``reference_windows`` used
        windows (:func:`reference_estimate`); until then their status has
        ``phase = "learning"`` and no chart.
    params : DriftSettings, optional
        Chart parameters (λ, L, k, h) of the learned KPIs; its target and σ are not used.
    reference_windows : int
        Length of the reference period in used windows (≥ 2).
    sigma_floor : float
        Smallest σ a reference period may give (unit of the KPI); a flatter
        reference (a frozen signal) keeps the KPI learning.
    clear_windows : int
        A KPI's drift alarm (:meth:`raised`) is raised in the window a chart
        signals and cleared only after this many consecutive charted windows
        without a signal (0: as soon as the charts stop signalling). An EWMA
        hovering at its limit would otherwise raise and clear it window after
        window; windows not charted (not steady) are no evidence either way.
    """

    def __init__(self, settings: Mapping[str, DriftSettings | DriftMonitor] | None = None, *,
                 learn: Iterable[str] = (), params: DriftSettings | None = None, reference_windows: int = 100,
                 sigma_floor: float = 1e-9, clear_windows: int = 0) -> None:
        self.monitors: dict[str, DriftMonitor] = {}
        for name, s in (settings or {}).items():
            if isinstance(s, DriftMonitor):
                self.monitors[name] = s
            elif isinstance(s, DriftSettings):
                self.monitors[name] = DriftMonitor(s.target, s.sigma, s.lam, s.L, s.k, s.h)
            else:
                raise TypeError(
                    f"drift settings for {name!r} must be DriftSettings or DriftMonitor, "
                    f"got {type(s).__name__}"
                )
        if int(reference_windows) < 2:
            raise ValueError(f"reference_windows must be at least 2, got {reference_windows!r}")
        self.params = params or DriftSettings(0.0, 1.0)
        DriftMonitor(0.0, 1.0, self.params.lam, self.params.L, self.params.k, self.params.h)  # validates them
        self.reference_windows = int(reference_windows)
        self.sigma_floor = float(sigma_floor)
        self.learned = tuple(learn)
        self.reference: dict[str, list[float]] = {n: [] for n in self.learned if n not in self.monitors}
        self.last_end: float | None = None  # end of the last window used [s]
        self.skipped_overlapping = 0  # steady windows left out because they overlap the last one used
        if int(clear_windows) < 0:
            raise ValueError(f"clear_windows must be >= 0, got {clear_windows!r}")
        self.clear_windows = int(clear_windows)
        #: raised drift alarms: KPI -> [charted windows without a signal since the last one, its direction]
        self._raised: dict[str, list] = {}

    def __getitem__(self, name: str) -> DriftMonitor:
        try:
            return self.monitors[name]
        except KeyError:
            raise KeyError(
                f"no drift monitor named {name!r}; known: {sorted(self.monitors)}"
            ) from None

    def names(self) -> list[str]:
        """Every KPI of the bank, learning or monitoring."""
        return [*self.monitors, *(n for n in self.reference if n not in self.monitors)]

    def __iter__(self):
        return iter(self.names())

    def __len__(self) -> int:
        return len(self.names())

    def _learning_status(self, name: str, used: bool) -> DriftStatus:
        nan = math.nan
        return DriftStatus(used, len(self.reference[name]), nan, nan, nan, nan, nan, nan, NONE, NONE, NONE,
                           "learning")

    def update(
        self, values: Mapping[str, float], steady: bool, time: float | None = None,
        window_start: float | None = None,
    ) -> dict[str, DriftStatus]:
        """Feed one window to every chart; a KPI absent from ``values`` counts as NaN.

        Parameters
        ----------
        values : mapping
            KPI name → value of the window (unit of the KPI).
        steady : bool
            Whether the window was steady (others are ignored).
        time : float, optional
            Window end [s].
        window_start : float, optional
            Window start [s]; a window starting before the end of the last used one
            overlaps it and is skipped (counted in :attr:`skipped_overlapping`).
        """
        use = bool(steady)
        if use and window_start is not None and self.last_end is not None and window_start < self.last_end - 1e-9:
            use = False
            self.skipped_overlapping += 1
        if use and time is not None and any(math.isfinite(float(values.get(n, math.nan))) for n in self.names()):
            self.last_end = float(time)
        out = {name: m.update(values.get(name, math.nan), use, time) for name, m in self.monitors.items()}
        for name in [n for n in self.reference if n not in self.monitors]:
            x = float(values.get(name, math.nan))
            ref = self.reference[name]
            if use and math.isfinite(x):
                ref.append(x)
            if len(ref) >= self.reference_windows:
                mu, sig = reference_estimate(ref)
                if float(sig) > self.sigma_floor:
                    p = self.params
                    self.monitors[name] = DriftMonitor(float(mu), float(sig), p.lam, p.L, p.k, p.h)
                    self.monitors[name].last_time = None if time is None else float(time)
                    del self.reference[name]
                    out[name] = self.monitors[name].status(used=use and math.isfinite(x))
                    continue
                del ref[: len(ref) - self.reference_windows + 1]  # too flat: keep a sliding reference
            out[name] = self._learning_status(name, use and math.isfinite(x))
        self._latch(out)
        return out

    def _latch(self, statuses: Mapping[str, DriftStatus]) -> None:
        for name, st in statuses.items():
            if st.alarm:
                self._raised[name] = [0, st.direction]
            elif name in self._raised:
                if self.clear_windows == 0:
                    del self._raised[name]
                elif st.used:
                    self._raised[name][0] += 1
                    if self._raised[name][0] >= self.clear_windows:
                        del self._raised[name]

    def raised(self) -> dict[str, str]:
        """The KPIs whose drift alarm is raised, with the direction of their last signal (see ``clear_windows``)."""
        return {name: str(v[1]) for name, v in self._raised.items()}

    def statuses(self) -> dict[str, DriftStatus]:
        """Current statistics of every KPI, for metrics (learning ones with ``phase = "learning"``)."""
        out = {name: m.status() for name, m in self.monitors.items()}
        out.update({n: self._learning_status(n, False) for n in self.reference if n not in self.monitors})
        return out

    def reset(self, names: Iterable[str] | None = None, *, relearn: bool = False) -> None:
        """Restart the named charts (all when ``names`` is None).

        ``relearn=True`` drops their μ0 and σ too: a new reference period starts
        (for example after an overhaul changed the as-built offset).
        """
        for name in list(self.names()) if names is None else list(names):
            self._raised.pop(name, None)
            if relearn:
                if name not in self.monitors and name not in self.reference:
                    raise KeyError(f"no drift chart named {name!r}; known: {sorted(self.names())}")
                self.monitors.pop(name, None)
                self.reference[name] = []
            elif name in self.monitors:
                self.monitors[name].reset()
            elif name in self.reference:
                self.reference[name] = []
            else:
                raise KeyError(f"no drift chart named {name!r}; known: {sorted(self.names())}")
        if names is None:
            self.last_end = None

    def snapshot(self) -> dict:
        """The whole bank as one JSON-able value (charts, reference periods, last window used)."""
        p = self.params
        return {
            "version": SNAPSHOT_VERSION,
            "params": {"lam": p.lam, "L": p.L, "k": p.k, "h": p.h},
            "reference_windows": self.reference_windows,
            "monitors": {n: m.snapshot() for n, m in self.monitors.items()},
            "reference": {n: list(v) for n, v in self.reference.items()},
            "last_end": self.last_end,
            "skipped_overlapping": self.skipped_overlapping,
            "raised": {n: list(v) for n, v in self._raised.items()},
        }

    def restore(self, d: Mapping) -> None:
        """Resume from a :meth:`snapshot`; ValueError for another layout version."""
        if d.get("version") != SNAPSHOT_VERSION:
            raise ValueError(f"drift snapshot version {d.get('version')!r}; expected {SNAPSHOT_VERSION}")
        self.monitors = {n: DriftMonitor.from_snapshot(m) for n, m in d["monitors"].items()}
        self.reference = {n: [float(x) for x in v] for n, v in d["reference"].items()}
        for n in self.learned:
            if n not in self.monitors and n not in self.reference:
                self.reference[n] = []
        self.last_end = None if d.get("last_end") is None else float(d["last_end"])
        self.skipped_overlapping = int(d.get("skipped_overlapping", 0))
        self._raised = {str(n): [int(v[0]), str(v[1])] for n, v in dict(d.get("raised", {})).items()}
