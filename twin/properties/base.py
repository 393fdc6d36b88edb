"""(p, T) functions and the saturation line: the base of :class:`twin.properties.Water`."""

from __future__ import annotations

import math
from collections.abc import Callable
from math import floor as _floor
from math import isfinite

from twin.properties.backend import PQ as _PQ
from twin.properties.backend import PT as _PT
from twin.properties.backend import QT as _QT
from twin.properties.backend import new_state
from twin.properties.states import (
    _DP_REL,
    _T_LO,
    P_CRIT,
    P_TRIPLE,
    SAT_MARGIN,
    T_CRIT,
    SatState,
    _check,
    _error,
    _range_error,
)


def _diff(f: Callable[[float], float], x0: float, step: float, lo: float, hi: float) -> float:
    """Derivative of f at x0: central difference, one-sided (3 points) near lo/hi."""
    if x0 - step <= lo:
        return (-3.0 * f(x0) + 4.0 * f(x0 + step) - f(x0 + 2.0 * step)) / (2.0 * step)
    if x0 + step >= hi:
        return (3.0 * f(x0) - 4.0 * f(x0 - step) + f(x0 - 2.0 * step)) / (2.0 * step)
    return (f(x0 + step) - f(x0 - step)) / (2.0 * step)


# Near the saturation line at all? A (p, T) with T in [k, k + 1) K can lie on the line
# only if p_sat(k) <= p <= p_sat(k + 1); only such a (p, T) pays for the exact T_sat(p)
# check. One bucket per kelvin, indexed by floor(T) itself (no range test on the hot path;
# math.floor is ~3x cheaper than int() here):
# 273.15 K - T_CRIT hold the line's pressures, widened by 1e-9 and kept inside
# P_TRIPLE <= p < P_CRIT, where T_sat(p) exists; every other kelvin up to _T_TOP_TABLE an
# empty bucket (+inf, -inf). A T beyond it raises IndexError, read as out of range.
_T_TOP_TABLE = 2300  # [K] above IF97 region 5 (2273.15 K)


def _sat_buckets() -> tuple[list[float], list[float]]:
    st = new_state()
    lo, hi = [math.inf] * _T_TOP_TABLE, [-math.inf] * _T_TOP_TABLE
    for k in range(273, int(T_CRIT) + 1):
        ends = []
        for T in (max(float(k), _T_LO), min(k + 1.0, T_CRIT)):
            st.update(_QT, 0.0, T)
            ends.append(st.p())
        lo[k] = max(ends[0] * (1.0 - 1e-9), P_TRIPLE)  # T_sat(p) exists for P_TRIPLE <= p < P_CRIT
        hi[k] = min(ends[1] * (1.0 + 1e-9), math.nextafter(P_CRIT, 0.0))
    return lo, hi


_P_SAT_LO, _P_SAT_HI = _sat_buckets()
_SAT_CACHE_SIZE = 64  # saturation states kept per Water


class WaterBase:
    """One IAPWS-IF97 ``AbstractState`` wrapper. Not thread-safe: one per thread/process.

    All methods take and return SI base units and raise :class:`PropertyError`
    for NaN or out-of-range input.

    References
    ----------
    IAPWS R7-97(2012), Revised Release on IAPWS-IF97.
    """

    __slots__ = ("_cp", "_cv", "_h", "_p", "_q", "_rho", "_s", "_sat_cache", "_st", "_t", "_up", "_w")

    def __init__(self) -> None:
        st = new_state()
        self._st = st
        # saturation states (with their slopes) by exact pressure: one model evaluation asks
        # for the line at the same pressure several times (a wet stream, the isentropic end
        # state at its pressure, a condenser); bounded, emptied when full
        self._sat_cache: dict[float, SatState] = {}
        self._up = st.update
        self._h = st.hmass
        self._s = st.smass
        self._rho = st.rhomass
        self._cp = st.cpmass
        self._cv = st.cvmass
        self._w = st.speed_sound
        self._t = st.T
        self._p = st.p
        self._q = st.Q

    # ------------------------------------------------------------ (p, T)
    def h_pT(self, p: float, T: float) -> float:
        """Specific enthalpy [J/kg] at pressure p [Pa] and temperature T [K].

        On the saturation line (T == T_sat(p)) the saturated liquid, as for every
        (p, T) function here; one ulp above T_sat(p) the saturated vapour.
        """
        # inlined _pt (the most frequent call; no wrapper, one try, one bucket test)
        try:
            k = _floor(T)
            if _P_SAT_LO[k] <= p <= _P_SAT_HI[k]:
                self._up(_PQ, p, 0.0)
                tsat = self._t()
                if abs(T - tsat) <= SAT_MARGIN * tsat:
                    T = tsat * (1.0 - SAT_MARGIN) if tsat >= T else tsat * (1.0 + SAT_MARGIN)
            self._up(_PT, p, T)
            return self._h()
        except (ValueError, IndexError, OverflowError) as exc:  # floor(nan), T beyond the table, floor(inf)
            if not (isfinite(p) and isfinite(T)):
                raise _error("h_pT", "input is not a finite number", p=p, T=T) from None
            raise _range_error("h_pT", None if isinstance(exc, IndexError) else exc, p=p, T=T) from None

    def s_pT(self, p: float, T: float) -> float:
        """Specific entropy [J/(kg K)] at pressure p [Pa] and temperature T [K]."""
        self._pt("s_pT", p, T)
        return self._s()

    def v_pT(self, p: float, T: float) -> float:
        """Specific volume [m3/kg] at pressure p [Pa] and temperature T [K]."""
        self._pt("v_pT", p, T)
        return 1.0 / self._rho()

    def cp_pT(self, p: float, T: float) -> float:
        """Isobaric heat capacity [J/(kg K)] at pressure p [Pa] and temperature T [K]."""
        self._pt("cp_pT", p, T)
        return self._cp()

    def w_pT(self, p: float, T: float) -> float:
        """Speed of sound [m/s] at pressure p [Pa] and temperature T [K]."""
        self._pt("w_pT", p, T)
        return self._w()

    def dh_dp_T(self, p: float, T: float) -> float:
        """(∂h/∂p)_T [m3/kg] at pressure p [Pa] and temperature T [K].

        Central difference on (p, T) updates with a step of 1e-4 p; one-sided
        where the other side would cross the saturation line.
        """
        T = self._pt("dh_dp_T", p, T)  # the temperature actually evaluated (off the line)
        lo, hi = 0.0, math.inf
        if T < T_CRIT and p < P_CRIT:
            ps = self.p_sat(T)
            if p >= P_TRIPLE and self.T_sat(p) >= T:  # liquid (the side _pt picks): stay above p_sat(T)
                lo = ps
            else:  # vapour: stay below p_sat(T)
                hi = ps
        up, get = self._up, self._h

        def h(pp: float) -> float:
            up(_PT, pp, T)
            return get()

        try:
            return _diff(h, p, _DP_REL * p, lo, hi)
        except (ValueError, IndexError) as exc:
            raise _range_error("dh_dp_T", exc, p=p, T=T) from None

    def _pt(self, func: str, p: float, T: float) -> float:
        """(p, T) update on the phase of T's side of T_sat(p) (liquid on the line).

        Returns the temperature [K] evaluated: T itself, or, within SAT_MARGIN of
        T_sat(p), the temperature SAT_MARGIN from T_sat on T's side.
        """
        if not (isfinite(p) and isfinite(T)):
            raise _error(func, "input is not a finite number", p=p, T=T)
        try:
            k = _floor(T)
            if _P_SAT_LO[k] <= p <= _P_SAT_HI[k]:
                self._up(_PQ, p, 0.0)
                tsat = self._t()
                if abs(T - tsat) <= SAT_MARGIN * tsat:  # CoolProp's region pick is unsure here
                    T = tsat * (1.0 - SAT_MARGIN) if tsat >= T else tsat * (1.0 + SAT_MARGIN)
            self._up(_PT, p, T)
        except (ValueError, IndexError) as exc:  # IndexError: T beyond the bucket table
            raise _range_error(func, None if isinstance(exc, IndexError) else exc, p=p, T=T) from None
        return T

    # ------------------------------------------------------- saturation
    def T_sat(self, p: float) -> float:
        """Saturation temperature [K] at pressure p [Pa] (P_TRIPLE <= p <= P_CRIT)."""
        self._pq("T_sat", p, 0.0)
        return self._t()

    def p_sat(self, T: float) -> float:
        """Saturation pressure [Pa] at temperature T [K] (273.15 K <= T <= T_CRIT)."""
        _check("p_sat", T=T)
        try:
            self._up(_QT, 0.0, T)
        except (ValueError, IndexError) as exc:
            raise _range_error("p_sat", exc, T=T) from None
        return self._p()

    def h_f(self, p: float) -> float:
        """Saturated-liquid specific enthalpy [J/kg] at pressure p [Pa]."""
        self._pq("h_f", p, 0.0)
        return self._h()

    def h_g(self, p: float) -> float:
        """Saturated-vapour specific enthalpy [J/kg] at pressure p [Pa]."""
        self._pq("h_g", p, 1.0)
        return self._h()

    def s_f(self, p: float) -> float:
        """Saturated-liquid specific entropy [J/(kg K)] at pressure p [Pa]."""
        self._pq("s_f", p, 0.0)
        return self._s()

    def s_g(self, p: float) -> float:
        """Saturated-vapour specific entropy [J/(kg K)] at pressure p [Pa]."""
        self._pq("s_g", p, 1.0)
        return self._s()

    def v_f(self, p: float) -> float:
        """Saturated-liquid specific volume [m3/kg] at pressure p [Pa]."""
        self._pq("v_f", p, 0.0)
        return 1.0 / self._rho()

    def v_g(self, p: float) -> float:
        """Saturated-vapour specific volume [m3/kg] at pressure p [Pa]."""
        self._pq("v_g", p, 1.0)
        return 1.0 / self._rho()

    def _pq(self, func: str, p: float, q: float) -> None:
        if not isfinite(p):
            raise _error(func, "input is not a finite number", p=p)
        try:
            self._up(_PQ, p, q)
        except (ValueError, IndexError) as exc:
            raise _range_error(func, exc, p=p) from None

    def sat(self, p: float) -> SatState:
        """Saturation state at pressure p [Pa] with derivatives along the line.

        Derivatives are central differences of PQ updates with a step of
        1e-4 p (one-sided next to the triple and critical points).
        """
        st = self._sat_cache.get(p)
        if st is not None:
            return st
        self._pq("sat", p, 0.0)
        return self._sat_state(p)

    def _sat_state(self, p: float, mid: tuple[float, ...] | None = None) -> SatState:
        """sat(p) for a checked p; ``mid`` = (T, h_f, h_g, s_f, s_g, v_f, v_g) at p if known.

        Kept in the saturation cache (the same numbers on every call with this p).
        """
        cache = self._sat_cache
        st = cache.get(p)
        if st is None:
            st = self._sat_line(p, mid)
            if len(cache) >= _SAT_CACHE_SIZE:
                cache.clear()
            cache[p] = st
        return st

    def _sat_line(self, p: float, mid: tuple[float, ...] | None) -> SatState:
        up, th, ts, tr = self._up, self._h, self._s, self._rho

        def line(pp: float) -> tuple[float, ...]:
            up(_PQ, pp, 0.0)
            t, hf, sf, vf = self._t(), th(), ts(), 1.0 / tr()
            up(_PQ, pp, 1.0)
            return t, hf, th(), sf, ts(), vf, 1.0 / tr()

        if mid is None:
            mid = line(p)
        dp = _DP_REL * p
        if p - dp <= P_TRIPLE:
            a, b = line(p + dp), line(p + 2.0 * dp)
            d = [(-3.0 * m + 4.0 * u - w) / (2.0 * dp) for m, u, w in zip(mid, a, b, strict=True)]
        elif p + dp >= P_CRIT:
            a, b = line(p - dp), line(p - 2.0 * dp)
            d = [(3.0 * m - 4.0 * u + w) / (2.0 * dp) for m, u, w in zip(mid, a, b, strict=True)]
        else:
            a, b = line(p + dp), line(p - dp)
            d = [(u - w) / (2.0 * dp) for u, w in zip(a, b, strict=True)]
        t, hf, hg, sf, sg, vf, vg = mid
        return SatState(p, t, hf, hg, sf, sg, vf, vg, d[0], d[1], d[2], d[3], d[4], d[5], d[6])

    def _sat_h(self, p: float) -> tuple[float, float, float]:
        """(T_sat [K], h_f, h_g [J/kg]) for P_TRIPLE <= p < P_CRIT; cheaper than sat()."""
        up, th = self._up, self._h
        up(_PQ, p, 0.0)
        tsat, hf = self._t(), th()
        up(_PQ, p, 1.0)
        return tsat, hf, th()

    def _sat_dh(self, p: float) -> tuple[float, float]:
        """(dh_f/dp, dh_g/dp) [m3/kg] along the saturation line, as in sat(); p < P_CRIT."""
        up, th = self._up, self._h
        dp = _DP_REL * p
        if p - dp <= P_TRIPLE or p + dp >= P_CRIT:
            s = self.sat(p)
            return s.dh_f_dp, s.dh_g_dp
        up(_PQ, p + dp, 0.0)
        hf1 = th()
        up(_PQ, p - dp, 0.0)
        hf0 = th()
        up(_PQ, p + dp, 1.0)
        hg1 = th()
        up(_PQ, p - dp, 1.0)
        hg0 = th()
        return (hf1 - hf0) / (2.0 * dp), (hg1 - hg0) / (2.0 * dp)

    def _dx_dp(self, p: float, x: float, dx_dh: float) -> float:
        """(∂x/∂p)_h [1/Pa] = -(dh_f/dp (1 - x) + x dh_g/dp)/(h_g - h_f), dx_dh = 1/(h_g - h_f)."""
        dhf, dhg = self._sat_dh(p)
        return -(dhf * (1.0 - x) + x * dhg) * dx_dh
