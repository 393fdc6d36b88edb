"""Water and steam properties (IAPWS-IF97) for the rest of twin.

This is the only module that imports CoolProp. It wraps one low-level
``AbstractState("IF97", "Water")`` per :class:`Water` object and adds what the
plant model needs on top of it:

* forward consistency: CoolProp's ``T(p, h)`` and ``T(p, s)`` are the IF97
  backward polynomials, whose error is up to about 25 mK (``h_pT(p, T_ph(p, h))``
  off by up to ~80 J/kg). Every (p, h) and (p, s) function here refines that
  temperature with Newton steps on the forward equation, so that
  ``h_pT(p, T_ph(p, h)) == h`` to ~1e-9 relative and all derivatives are
  consistent with the functions they differentiate;
* two-phase states from the saturation line (region 4) with the lever rule;
* exact phase selection at the saturation lines: a (p, h) or (p, s) state whose
  quality lies within ``X_SATURATED`` (1e-9) of [0, 1] is saturated, and every
  single-phase temperature keeps a relative margin ``SAT_MARGIN`` (1e-12) from
  T_sat, because CoolProp's IF97 region choice in a (p, T) update (p against its
  p_sat(T)) matches its T_sat(p) only to ~20 ulps and can otherwise return the
  other phase or fail with "Cannot use Region 4". Public (p, T) functions return
  the phase of T's side of T_sat(p), the saturated liquid on the line itself;
* partial derivatives (CoolProp has none for IF97) from exact thermodynamic
  identities plus a few central differences on cheap (p, T) updates;
* :class:`PropertyError` naming the function and its inputs for NaN or
  out-of-range input, never a silent number;
* ``*_array`` variants that return NaN ("no valid state") instead of raising.

Units are SI base units throughout: pressure [Pa] (absolute), temperature [K],
specific enthalpy [J/kg], specific entropy [J/(kg K)], specific volume [m3/kg].

Cost measured with ``twin bench properties`` on the 2-core development machine
under load: ``h_pT`` ~1.6 µs (raw CoolProp update+getter 1.5 µs); ``T_ph`` ~22 µs
(raw backward-only update 14 µs; the forward refinement costs two (p, T)
updates); ``ph()`` ~45 µs in single phase, above the 25 µs aim: one (p, h)
update, three (p, T) evaluations for T, s, v, cp, four for the (∂v/∂T)_p and
(∂v/∂p)_T stencils and six saturation updates for x and its derivatives.

References
----------
IAPWS R7-97(2012), Revised Release on the IAPWS Industrial Formulation 1997 for
the Thermodynamic Properties of Water and Steam (IAPWS-IF97), 2007/2012.
"""

from __future__ import annotations

import functools
import math
import threading
from collections.abc import Callable
from dataclasses import dataclass
from math import isfinite
from typing import Any

import CoolProp.CoolProp as _CP
import numpy as np

FORMULATION: str = "IAPWS-IF97"
P_CRIT: float = 22.064e6  # [Pa], IAPWS-IF97 Eq. (3)
T_CRIT: float = 647.096  # [K]
P_TRIPLE: float = 611.657  # [Pa], lowest pressure of the saturation line
_NAN = math.nan

_PT = _CP.PT_INPUTS
_HP = _CP.HmassP_INPUTS  # argument order (h, p)
_PS = _CP.PSmass_INPUTS  # argument order (p, s)
_PQ = _CP.PQ_INPUTS
_QT = _CP.QT_INPUTS  # argument order (Q, T)
_LIQUID, _VAPOUR = 1, 2

_DT = 0.01  # [K] temperature step of central differences
_DP_REL = 1e-4  # [-] relative pressure step of central differences
_TOL_T = 1e-7  # [K] accepted residual of the forward refinement (as dh/cp or ds*T/cp)
_T_LO, _T_HI = 273.15, 1073.15  # [K] bracket of the fallback solver (regions 1-3)
# Saturation lines. CoolProp's IF97 (p, T) update picks region 1 or 2 by comparing p with
# its p_sat(T), which agrees with its T_sat(p) only to ~20 ulps (measured): a temperature
# one ulp from T_sat(p) can get the other phase, or "Cannot use Region 4" on the line.
X_SATURATED = 1e-9  # [-] |x| (or |x - 1|) up to this is read as saturated (lever rule)
SAT_MARGIN = 1e-12  # [-] relative distance from T_sat kept by single-phase temperatures
_T_SAT_TOP = T_CRIT * (1.0 + 2.0 * SAT_MARGIN)  # [K] no saturation line above
_WET, _LIQ, _VAP, _NOLINE = 0, 1, 2, 3  # phase of a (p, h) or (p, s) state


class PropertyError(ValueError):
    """Input outside the IAPWS-IF97 range (or NaN); the message names function and inputs."""


def _fmt(inputs: dict[str, float]) -> str:
    units = {"p": "Pa", "T": "K", "h": "J/kg", "s": "J/(kg K)"}
    return ", ".join(f"{k}={v:.9g} {units[k]}" for k, v in inputs.items())


def _error(func: str, reason: str, **inputs: float) -> PropertyError:
    return PropertyError(f"{func}({_fmt(inputs)}): {reason}")


def _range_error(func: str, exc: Exception | None = None, **inputs: float) -> PropertyError:
    detail = f" ({exc})" if exc is not None else ""
    return _error(func, f"outside IAPWS-IF97 range{detail}", **inputs)


def _check(func: str, **inputs: float) -> None:
    for value in inputs.values():
        if not isfinite(value):
            raise _error(func, "input is not a finite number", **inputs)


@dataclass(frozen=True, slots=True)
class SatState:
    """Saturation line at one pressure, with derivatives along it.

    Attributes: p [Pa]; T [K]; h_f, h_g [J/kg]; s_f, s_g [J/(kg K)]; v_f, v_g
    [m3/kg]; dT_dp [K/Pa]; dh_f_dp, dh_g_dp [m3/kg]; ds_f_dp, ds_g_dp
    [J/(kg K Pa)]; dv_f_dp, dv_g_dp [m3/(kg Pa)]. Derivatives are central
    differences of the IF97 saturation states (one-sided next to the triple or
    critical point).
    """

    p: float
    T: float
    h_f: float
    h_g: float
    s_f: float
    s_g: float
    v_f: float
    v_g: float
    dT_dp: float
    dh_f_dp: float
    dh_g_dp: float
    ds_f_dp: float
    ds_g_dp: float
    dv_f_dp: float
    dv_g_dp: float


@dataclass(frozen=True, slots=True)
class PHState:
    """State fixed by pressure p [Pa] and specific enthalpy h [J/kg].

    T [K], s [J/(kg K)], v [m3/kg], x [-] (equivalent quality (h-h_f)/(h_g-h_f),
    not clipped, NaN for p >= P_CRIT), cp [J/(kg K)] (NaN in two-phase),
    two_phase. Partial derivatives at constant h (``d*_dp``, per Pa) and at
    constant p (``d*_dh``, per J/kg) of T, s, v and x.
    """

    p: float
    h: float
    T: float
    s: float
    v: float
    x: float
    cp: float
    two_phase: bool
    dT_dp: float
    dT_dh: float
    ds_dp: float
    ds_dh: float
    dv_dp: float
    dv_dh: float
    dx_dp: float
    dx_dh: float


@dataclass(frozen=True, slots=True)
class PSState:
    """State fixed by pressure p [Pa] and specific entropy s [J/(kg K)].

    h [J/kg], T [K], v [m3/kg], x [-] (equivalent quality, NaN for p >= P_CRIT),
    two_phase, and the exact partials dh_dp = v [m3/kg] (at constant s) and
    dh_ds = T [K] (at constant p), from dh = T ds + v dp.
    """

    p: float
    s: float
    h: float
    T: float
    v: float
    x: float
    two_phase: bool
    dh_dp: float
    dh_ds: float


def _diff(f: Callable[[float], float], x0: float, step: float, lo: float, hi: float) -> float:
    """Derivative of f at x0: central difference, one-sided (3 points) near lo/hi."""
    if x0 - step <= lo:
        return (-3.0 * f(x0) + 4.0 * f(x0 + step) - f(x0 + 2.0 * step)) / (2.0 * step)
    if x0 + step >= hi:
        return (3.0 * f(x0) - 4.0 * f(x0 - step) + f(x0 - 2.0 * step)) / (2.0 * step)
    return (f(x0 + step) - f(x0 - step)) / (2.0 * step)


class Water:
    """One IAPWS-IF97 ``AbstractState`` wrapper. Not thread-safe: one per thread/process.

    All methods take and return SI base units and raise :class:`PropertyError`
    for NaN or out-of-range input.

    References
    ----------
    IAPWS R7-97(2012), Revised Release on IAPWS-IF97.
    """

    __slots__ = ("_cp", "_h", "_p", "_q", "_rho", "_s", "_st", "_t", "_up", "_w")

    def __init__(self) -> None:
        st = _CP.AbstractState("IF97", "Water")
        self._st = st
        self._up = st.update
        self._h = st.hmass
        self._s = st.smass
        self._rho = st.rhomass
        self._cp = st.cpmass
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
        self._pt("h_pT", p, T)
        return self._h()

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
            if P_TRIPLE <= p < P_CRIT and T <= _T_SAT_TOP:
                self._up(_PQ, p, 0.0)
                tsat = self._t()
                if abs(T - tsat) <= SAT_MARGIN * tsat:  # CoolProp's region pick is unsure here
                    T = tsat * (1.0 - SAT_MARGIN) if tsat >= T else tsat * (1.0 + SAT_MARGIN)
            self._up(_PT, p, T)
        except (ValueError, IndexError) as exc:
            raise _range_error(func, exc, p=p, T=T) from None
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
        self._pq("sat", p, 0.0)
        up, th, ts, tr = self._up, self._h, self._s, self._rho

        def line(pp: float) -> tuple[float, ...]:
            up(_PQ, pp, 0.0)
            t, hf, sf, vf = self._t(), th(), ts(), 1.0 / tr()
            up(_PQ, pp, 1.0)
            return t, hf, th(), sf, ts(), vf, 1.0 / tr()

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

    def _sat_h(self, p: float) -> tuple[float, float, float, float, float]:
        """(T_sat, h_f, h_g, dh_f/dp, dh_g/dp) for p < P_CRIT; cheaper than sat()."""
        up, th = self._up, self._h
        up(_PQ, p, 0.0)
        tsat, hf = self._t(), th()
        up(_PQ, p, 1.0)
        hg = th()
        dp = _DP_REL * p
        if p - dp <= P_TRIPLE or p + dp >= P_CRIT:
            s = self.sat(p)
            return tsat, hf, hg, s.dh_f_dp, s.dh_g_dp
        up(_PQ, p + dp, 0.0)
        hf1 = th()
        up(_PQ, p - dp, 0.0)
        hf0 = th()
        up(_PQ, p + dp, 1.0)
        hg1 = th()
        up(_PQ, p - dp, 1.0)
        hg0 = th()
        return tsat, hf, hg, (hf1 - hf0) / (2.0 * dp), (hg1 - hg0) / (2.0 * dp)

    # ------------------------------------------------------------ (p, h)
    def _solve_T(self, func: str, p: float, target: float, by_s: bool, T0: float,
                 lo: float, hi: float) -> float:
        """Temperature [K] where h(p, T) (or s(p, T)) equals target, T in [lo, hi].

        Newton on the forward equation from T0 with slope cp (or cp/T), kept
        inside [lo, hi] (the phase's side of the saturation line); bisection
        steps when Newton leaves the bracket. Leaves the state at the result.
        """
        try:
            return self._solve_T_loop(func, p, target, by_s, T0, lo, hi)
        except (ValueError, IndexError) as exc:  # CoolProp range errors (e.g. on the saturation line)
            if isinstance(exc, PropertyError):
                raise
            raise _range_error(func, exc, p=p, **{("s" if by_s else "h"): target}) from None

    def _solve_T_loop(self, func: str, p: float, target: float, by_s: bool, T0: float,
                      lo: float, hi: float) -> float:
        up, get, cp = self._up, (self._s if by_s else self._h), self._cp
        T = min(max(T0, lo), hi)
        for _ in range(60):
            up(_PT, p, T)
            r = target - get()
            slope = cp() / T if by_s else cp()
            dT = r / slope
            if abs(dT) <= _TOL_T:
                if lo <= T + dT <= hi:
                    T += dT
                    up(_PT, p, T)
                return T
            if r > 0.0:
                lo = T
            else:
                hi = T
            T_new = T + dT
            T = T_new if lo < T_new < hi else 0.5 * (lo + hi)
            if hi - lo <= _TOL_T:
                up(_PT, p, T)
                return T
        inputs = {"p": p, ("s" if by_s else "h"): target}
        raise _error(func, "no IAPWS-IF97 temperature found", **inputs)

    def _bracketed_T(self, func: str, p: float, target: float, by_s: bool) -> float:
        """Fallback where CoolProp's (p, h)/(p, s) flash fails (supercritical region 3)."""
        get = self._s if by_s else self._h
        key = "s" if by_s else "h"
        try:
            self._up(_PT, p, _T_LO)
            f_lo = get()
            self._up(_PT, p, _T_HI)
            f_hi = get()
        except (ValueError, IndexError) as exc:
            raise _range_error(func, exc, p=p, **{key: target}) from None
        if not f_lo <= target <= f_hi:
            raise _range_error(func, None, p=p, **{key: target})
        T0 = _T_LO + (_T_HI - _T_LO) * (target - f_lo) / (f_hi - f_lo)
        return self._solve_T(func, p, target, by_s, T0, _T_LO, _T_HI)

    def _phase(self, p: float, target: float, by_s: bool) -> tuple[int, float, float, float, float]:
        """(phase, x, f_f, f_g, T_sat) of the state (p, h) (or (p, s) if by_s).

        x = (f - f_f)/(f_g - f_f) with f = h (or s) and the saturated values f_f,
        f_g [J/kg or J/(kg K)] at p; a state with x within X_SATURATED of [0, 1] is
        wet. _NOLINE (x, f_f, f_g, T_sat NaN) at p >= P_CRIT or p < P_TRIPLE.
        """
        if not P_TRIPLE <= p < P_CRIT:
            return _NOLINE, _NAN, _NAN, _NAN, _NAN
        up, get = self._up, (self._s if by_s else self._h)
        up(_PQ, p, 0.0)
        tsat, ff = self._t(), get()
        up(_PQ, p, 1.0)
        fg = get()
        x = (target - ff) / (fg - ff)
        if -X_SATURATED <= x <= 1.0 + X_SATURATED:
            return _WET, x, ff, fg, tsat
        return (_LIQ if x < 0.0 else _VAP), x, ff, fg, tsat

    def _single_T(self, func: str, p: float, target: float, by_s: bool, phase: int, tsat: float) -> float:
        """Forward-consistent single-phase T [K] at (p, h) (or (p, s)); leaves the state there.

        Starts from CoolProp's backward-equation flash and refines on the forward
        equation inside the phase's bracket, which keeps SAT_MARGIN from T_sat.
        """
        key = "s" if by_s else "h"
        top = 2273.15 if p <= 50e6 else _T_HI
        if phase == _LIQ:
            lo, hi = _T_LO, tsat * (1.0 - SAT_MARGIN)
        elif phase == _VAP:
            lo, hi = tsat * (1.0 + SAT_MARGIN), top
        else:
            lo, hi = _T_LO, top
        up = self._up
        try:
            if by_s:
                up(_PS, p, target)
            else:
                up(_HP, target, p)
            T0 = self._t()
        except (ValueError, IndexError) as exc:
            if phase == _NOLINE:
                if not P_CRIT <= p <= 100e6:
                    raise _range_error(func, exc, p=p, **{key: target}) from None
                return self._bracketed_T(func, p, target, by_s)
            T0 = self._start_in(func, p, target, by_s, lo, hi, exc)
        if not isfinite(T0):
            T0 = self._start_in(func, p, target, by_s, lo, hi, None)
        T = min(max(T0, lo), hi)
        if by_s:
            return self._solve_T(func, p, target, True, T, lo, hi)
        # fast path: one Newton step from the backward-equation temperature
        try:
            up(_PT, p, T)
            cp0 = self._cp()
            T1 = T + (target - self._h()) / cp0
            if lo <= T1 <= hi:
                up(_PT, p, T1)
                dT = (target - self._h()) / cp0
                if abs(dT) <= _TOL_T and lo <= T1 + dT <= hi:
                    return T1 + dT
        except (ValueError, IndexError) as exc:
            raise _range_error(func, exc, p=p, h=target) from None
        return self._solve_T(func, p, target, False, T, lo, hi)

    def _start_in(self, func: str, p: float, target: float, by_s: bool, lo: float, hi: float,
                  exc: Exception | None) -> float:
        """Start temperature [K] in [lo, hi] where CoolProp's flash failed; range error if outside."""
        get = self._s if by_s else self._h
        key = "s" if by_s else "h"
        try:
            self._up(_PT, p, lo)
            f_lo = get()
            self._up(_PT, p, hi)
            f_hi = get()
        except (ValueError, IndexError) as exc2:
            raise _range_error(func, exc2, p=p, **{key: target}) from None
        if not f_lo <= target <= f_hi:
            raise _range_error(func, exc, p=p, **{key: target})
        return lo if target - f_lo <= f_hi - target else hi

    def T_ph(self, p: float, h: float) -> float:
        """Temperature [K] at pressure p [Pa] and specific enthalpy h [J/kg]."""
        _check("T_ph", p=p, h=h)
        phase, _, _, _, tsat = self._phase(p, h, False)
        if phase == _WET:
            return tsat
        return self._single_T("T_ph", p, h, False, phase, tsat)

    def s_ph(self, p: float, h: float) -> float:
        """Specific entropy [J/(kg K)] at pressure p [Pa] and specific enthalpy h [J/kg]."""
        _check("s_ph", p=p, h=h)
        phase, x, _, _, tsat = self._phase(p, h, False)
        if phase == _WET:
            sf = self.s_f(p)
            return sf + x * (self.s_g(p) - sf)
        self._up(_PT, p, self._single_T("s_ph", p, h, False, phase, tsat))
        return self._s()

    def v_ph(self, p: float, h: float) -> float:
        """Specific volume [m3/kg] at pressure p [Pa] and specific enthalpy h [J/kg]."""
        _check("v_ph", p=p, h=h)
        phase, x, _, _, tsat = self._phase(p, h, False)
        if phase == _WET:
            vf = self.v_f(p)
            return vf + x * (self.v_g(p) - vf)
        self._up(_PT, p, self._single_T("v_ph", p, h, False, phase, tsat))
        return 1.0 / self._rho()

    def _lever(self, p: float, h: float) -> tuple[float, float, float]:
        self._up(_PQ, p, 0.0)
        hf = self._h()
        self._up(_PQ, p, 1.0)
        hg = self._h()
        return (h - hf) / (hg - hf), hf, hg

    def x_ph(self, p: float, h: float) -> float:
        """Equivalent quality [-] (h - h_f)/(h_g - h_f) at pressure p [Pa], enthalpy h [J/kg].

        Not clipped: < 0 for subcooled liquid, > 1 for superheated vapour.
        Only defined below the critical pressure.
        """
        _check("x_ph", p=p, h=h)
        if not (P_TRIPLE <= p < P_CRIT):
            raise _error("x_ph", "quality needs P_TRIPLE <= p < P_CRIT", p=p, h=h)
        return self._lever(p, h)[0]

    def ph(self, p: float, h: float) -> PHState:
        """Full state and partial derivatives at pressure p [Pa], enthalpy h [J/kg].

        Single phase: one CoolProp (p, h) update for the backward-equation
        temperature, Newton refinement on the forward equation, then (p, T)
        getters. Derivatives from dh = T ds + v dp (ds_dh = 1/T, ds_dp = -v/T),
        dT_dh = 1/cp, dT_dp = -(∂h/∂p)_T/cp with (∂h/∂p)_T = v - T(∂v/∂T)_p,
        and central differences for (∂v/∂T)_p (±0.01 K) and (∂v/∂p)_T
        (±1e-4 p), one-sided where a step would cross the saturation line.
        Two-phase (|x| up to X_SATURATED outside [0, 1] included, so that a
        saturated state a rounding error off the line reads as saturated): lever
        rule on the saturation line (s, v and their partials
        differentiate the lever rule itself), dT_dh = 0,
        dT_dp = dT_sat/dp, v = v_f + x(v_g - v_f). Below the critical pressure x
        is the (extrapolated) equivalent quality, dx_dh = 1/(h_g - h_f),
        dx_dp = -(dh_f/dp (1 - x) + x dh_g/dp)/(h_g - h_f); NaN at p >= P_CRIT.
        """
        _check("ph", p=p, h=h)
        x = dx_dp = dx_dh = _NAN
        if P_TRIPLE <= p < P_CRIT:
            try:
                tsat, hf, hg, dhf, dhg = self._sat_h(p)
            except (ValueError, IndexError) as exc:
                raise _range_error("ph", exc, p=p, h=h) from None
            hfg = hg - hf
            x = (h - hf) / hfg
            dx_dh = 1.0 / hfg
            dx_dp = -(dhf * (1.0 - x) + x * dhg) / hfg
            if -X_SATURATED <= x <= 1.0 + X_SATURATED:
                return self._ph_wet(p, h, x, dx_dp, dx_dh)
            phase = _LIQ if x < 0.0 else _VAP
        else:
            phase, tsat = _NOLINE, _NAN
        T = self._single_T("ph", p, h, False, phase, tsat)
        liquid = phase == _LIQ
        up, rho = self._up, self._rho
        up(_PT, p, T)
        s, v, cp = self._s(), 1.0 / rho(), self._cp()
        lo_T, hi_T, lo_p, hi_p = -math.inf, math.inf, 0.0, math.inf
        if tsat == tsat:  # a saturation line exists: keep the stencils on this side
            psat = self.p_sat(T) if T <= T_CRIT else P_CRIT
            if liquid:
                hi_T, lo_p = tsat, psat
            else:
                lo_T, hi_p = tsat, psat

        def v_of_T(tt: float) -> float:
            up(_PT, p, tt)
            return 1.0 / rho()

        def v_of_p(pp: float) -> float:
            up(_PT, pp, T)
            return 1.0 / rho()

        dv_dT = _diff(v_of_T, T, _DT, lo_T, hi_T)
        dv_dp_T = _diff(v_of_p, p, _DP_REL * p, lo_p, hi_p)
        dT_dp = -(v - T * dv_dT) / cp
        return PHState(p, h, T, s, v, x, cp, False,
                       dT_dp, 1.0 / cp, -v / T, 1.0 / T,
                       dv_dp_T + dv_dT * dT_dp, dv_dT / cp, dx_dp, dx_dh)

    def _ph_wet(self, p: float, h: float, x: float, dx_dp: float, dx_dh: float) -> PHState:
        st = self.sat(p)
        s = st.s_f + x * (st.s_g - st.s_f)
        vfg = st.v_g - st.v_f
        v = st.v_f + x * vfg
        T = st.T
        dv_dp = (1.0 - x) * st.dv_f_dp + x * st.dv_g_dp + vfg * dx_dp
        # entropy partials of the lever rule itself (IF97's saturation line meets
        # dh = T ds + v dp only to ~1e-4 in these terms at low pressure, so the
        # identity would not be the derivative of the s that is computed)
        sfg = st.s_g - st.s_f
        ds_dp = (1.0 - x) * st.ds_f_dp + x * st.ds_g_dp + sfg * dx_dp
        return PHState(p, h, T, s, v, x, _NAN, True,
                       st.dT_dp, 0.0, ds_dp, sfg * dx_dh, dv_dp, vfg * dx_dh, dx_dp, dx_dh)

    # ------------------------------------------------------------ (p, s)
    def _ps_common(self, func: str, p: float, s: float) -> tuple[float, float, float, float, bool]:
        """(h, T, v, x, two_phase) at pressure p [Pa] and entropy s [J/(kg K)]."""
        _check(func, p=p, s=s)
        phase, x, _, _, tsat = self._phase(p, s, True)
        if phase == _WET:
            up = self._up
            up(_PQ, p, 0.0)
            hf, vf = self._h(), 1.0 / self._rho()
            up(_PQ, p, 1.0)
            hg, vg = self._h(), 1.0 / self._rho()
            return hf + x * (hg - hf), tsat, vf + x * (vg - vf), x, True
        T = self._single_T(func, p, s, True, phase, tsat)
        h = self._h()
        v = 1.0 / self._rho()
        if phase != _NOLINE:
            x = (h - self.h_f(p)) / (self.h_g(p) - self.h_f(p))
        return h, T, v, x, False

    def h_ps(self, p: float, s: float) -> float:
        """Specific enthalpy [J/kg] at pressure p [Pa] and specific entropy s [J/(kg K)].

        Two-phase states use the lever rule on the saturation line (fast);
        single phase starts from CoolProp's (p, s) flash and refines on the
        forward equation.
        """
        return self._ps_common("h_ps", p, s)[0]

    def ps(self, p: float, s: float) -> PSState:
        """State at pressure p [Pa] and specific entropy s [J/(kg K)]: h, T, v, x, partials.

        dh_dp = v [m3/kg] at constant s and dh_ds = T [K] at constant p (dh = T ds + v dp)
        in single phase; in two-phase the partials of the lever rule that computes h.
        """
        h, T, v, x, wet = self._ps_common("ps", p, s)
        if not wet:
            return PSState(p, s, h, T, v, x, wet, v, T)
        # two-phase: partials of the lever rule h = h_f + x (h_g - h_f), x = (s - s_f)/(s_g - s_f)
        st = self.sat(p)
        sfg, hfg = st.s_g - st.s_f, st.h_g - st.h_f
        dx_dp = -((1.0 - x) * st.ds_f_dp + x * st.ds_g_dp) / sfg
        dh_dp = (1.0 - x) * st.dh_f_dp + x * st.dh_g_dp + hfg * dx_dp
        return PSState(p, s, h, T, v, x, wet, dh_dp, hfg / sfg)


def _guarded(name: str, method: Callable[..., Any]) -> Callable[..., Any]:
    """Turn any CoolProp range error escaping ``method`` into a PropertyError naming the inputs."""

    @functools.wraps(method)
    def wrapper(self: Water, *args: float) -> Any:
        try:
            return method(self, *args)
        except PropertyError:
            raise
        except (ValueError, IndexError) as exc:
            names = ("p", "T") if name.endswith("pT") else ("p", "s") if name in ("h_ps", "ps") else ("p", "h")
            raise _range_error(name, exc, **dict(zip(names, args, strict=False))) from None

    return wrapper


for _name in ("h_pT", "s_pT", "v_pT", "cp_pT", "w_pT", "dh_dp_T", "T_ph", "s_ph", "v_ph", "x_ph", "h_ps",
              "T_sat", "p_sat", "h_f", "h_g", "s_f", "s_g", "v_f", "v_g", "sat", "ph", "ps"):
    setattr(Water, _name, _guarded(_name, getattr(Water, _name)))


# ---------------------------------------------------------------- module level
_local = threading.local()


def water() -> Water:
    """The calling thread's default :class:`Water` instance (created on first use)."""
    w: Water | None = getattr(_local, "water", None)
    if w is None:
        w = _local.water = Water()
    return w


def h_pT(p: float, T: float) -> float: return water().h_pT(p, T)
def s_pT(p: float, T: float) -> float: return water().s_pT(p, T)
def v_pT(p: float, T: float) -> float: return water().v_pT(p, T)
def cp_pT(p: float, T: float) -> float: return water().cp_pT(p, T)
def w_pT(p: float, T: float) -> float: return water().w_pT(p, T)
def dh_dp_T(p: float, T: float) -> float: return water().dh_dp_T(p, T)
def T_ph(p: float, h: float) -> float: return water().T_ph(p, h)
def s_ph(p: float, h: float) -> float: return water().s_ph(p, h)
def v_ph(p: float, h: float) -> float: return water().v_ph(p, h)
def x_ph(p: float, h: float) -> float: return water().x_ph(p, h)
def h_ps(p: float, s: float) -> float: return water().h_ps(p, s)
def T_sat(p: float) -> float: return water().T_sat(p)
def p_sat(T: float) -> float: return water().p_sat(T)
def h_f(p: float) -> float: return water().h_f(p)
def h_g(p: float) -> float: return water().h_g(p)
def s_f(p: float) -> float: return water().s_f(p)
def s_g(p: float) -> float: return water().s_g(p)
def v_f(p: float) -> float: return water().v_f(p)
def v_g(p: float) -> float: return water().v_g(p)
def sat(p: float) -> SatState: return water().sat(p)
def ph(p: float, h: float) -> PHState: return water().ph(p, h)
def ps(p: float, s: float) -> PSState: return water().ps(p, s)


for _f in (h_pT, s_pT, v_pT, cp_pT, w_pT, dh_dp_T, T_ph, s_ph, v_ph, x_ph, h_ps, T_sat, p_sat,
           h_f, h_g, s_f, s_g, v_f, v_g, sat, ph, ps):
    _f.__doc__ = f"Module-level :meth:`Water.{_f.__name__}` on the thread's default instance.\n\n" + (
        getattr(Water, _f.__name__).__doc__ or "")


# ----------------------------------------------------------- vectorised (NaN)
def _vectorised(name: str, *arrays: np.typing.ArrayLike) -> np.ndarray:
    method = getattr(water(), name)
    args = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in arrays))
    out = np.empty(args[0].shape)
    flat = out.reshape(-1)
    for i, values in enumerate(zip(*(a.ravel().tolist() for a in args), strict=True)):
        try:
            flat[i] = method(*values)
        except PropertyError:
            flat[i] = _NAN
    return out


def h_pT_array(p: np.typing.ArrayLike, T: np.typing.ArrayLike) -> np.ndarray:
    """Vectorised :func:`h_pT`: h [J/kg] from p [Pa], T [K]; broadcasting; NaN = no valid state."""
    return _vectorised("h_pT", p, T)


def T_ph_array(p: np.typing.ArrayLike, h: np.typing.ArrayLike) -> np.ndarray:
    """Vectorised :func:`T_ph`: T [K] from p [Pa], h [J/kg]; broadcasting; NaN = no valid state."""
    return _vectorised("T_ph", p, h)


def s_ph_array(p: np.typing.ArrayLike, h: np.typing.ArrayLike) -> np.ndarray:
    """Vectorised :func:`s_ph`: s [J/(kg K)] from p [Pa], h [J/kg]; NaN = no valid state."""
    return _vectorised("s_ph", p, h)


def h_ps_array(p: np.typing.ArrayLike, s: np.typing.ArrayLike) -> np.ndarray:
    """Vectorised :func:`h_ps`: h [J/kg] from p [Pa], s [J/(kg K)]; NaN = no valid state."""
    return _vectorised("h_ps", p, s)


def x_ph_array(p: np.typing.ArrayLike, h: np.typing.ArrayLike) -> np.ndarray:
    """Vectorised :func:`x_ph`: x [-] from p [Pa], h [J/kg]; NaN = no valid state."""
    return _vectorised("x_ph", p, h)


def T_sat_array(p: np.typing.ArrayLike) -> np.ndarray:
    """Vectorised :func:`T_sat`: T_sat [K] from p [Pa]; NaN = no valid state."""
    return _vectorised("T_sat", p)
