"""(p, h) and (p, s) inversion: forward-consistent temperatures on the right phase."""

from __future__ import annotations

import math
from math import isfinite

from twin.properties.backend import HP as _HP
from twin.properties.backend import PQ as _PQ
from twin.properties.backend import PS as _PS
from twin.properties.backend import PT as _PT
from twin.properties.base import WaterBase
from twin.properties.guess import line_side, start_T
from twin.properties.states import (
    _LIQ,
    _NAN,
    _NOLINE,
    _T_HI,
    _T_LO,
    _TOL_T,
    _VAP,
    _WET,
    P_CRIT,
    P_TRIPLE,
    SAT_MARGIN,
    X_SATURATED,
    PropertyError,
    PSState,
    _check,
    _error,
    _range_error,
)


class WaterInverse(WaterBase):
    """:class:`WaterBase` plus T(p, h), s(p, h), v(p, h), x(p, h) and h(p, s)."""

    __slots__ = ()

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
        wet. _NOLINE (x, f_f, f_g, T_sat NaN) at p >= P_CRIT or p < P_TRIPLE. Where
        the line table (:func:`~twin.properties.guess.line_side`) shows the state
        well inside one phase, only T_sat is evaluated and x, f_f, f_g are NaN.
        """
        if not P_TRIPLE <= p < P_CRIT:
            return _NOLINE, _NAN, _NAN, _NAN, _NAN
        up, get = self._up, (self._s if by_s else self._h)
        side = line_side(p, target, by_s)
        if side >= 0:
            up(_PQ, p, 0.0)
            return side, _NAN, _NAN, _NAN, self._t()
        up(_PQ, p, 0.0)
        tsat, ff = self._t(), get()
        up(_PQ, p, 1.0)
        fg = get()
        x = (target - ff) / (fg - ff)
        if -X_SATURATED <= x <= 1.0 + X_SATURATED:
            return _WET, x, ff, fg, tsat
        return (_LIQ if x < 0.0 else _VAP), x, ff, fg, tsat

    def _single_T(self, func: str, p: float, target: float, by_s: bool, phase: int, tsat: float,
                  T_guess: float | None = None) -> float:
        """Forward-consistent single-phase T [K] at (p, h) (or (p, s)); leaves the state there.

        Starts from T_guess [K] if it is given and inside the phase's bracket
        (which keeps SAT_MARGIN from T_sat), else (or if that does not converge
        in a few steps) from the table of :mod:`twin.properties.guess`, and
        refines on the forward equation; if that does not converge either,
        starts again from CoolProp's backward-equation flash with a bracketed
        Newton.
        """
        key = "s" if by_s else "h"
        top = 2273.15 if p <= 50e6 else _T_HI
        if phase == _LIQ:
            lo, hi = _T_LO, tsat * (1.0 - SAT_MARGIN)
        elif phase == _VAP:
            lo, hi = tsat * (1.0 + SAT_MARGIN), top
        else:
            lo, hi = _T_LO, top
        if T_guess is not None and lo <= T_guess <= hi:
            T = self._chord(p, target, by_s, T_guess, lo, hi)
            if T == T:
                return T
        T = self._chord(p, target, by_s, start_T(p, target, by_s, phase), lo, hi)
        if T == T:
            return T
        # the table start did not converge quickly: CoolProp's flash, then a bracketed Newton
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

    def _chord(self, p: float, target: float, by_s: bool, T0: float, lo: float, hi: float) -> float:
        """T [K] in [lo, hi] with h(p, T) (or s) = target, by chord steps from T0; NaN if not quick.

        The slope cp (cp/T for s) is taken at T0 and re-taken only when a step
        shrinks by less than 100 times; accepted when a step is below _TOL_T, as
        the Newton solve. Leaves the state at the result.
        """
        if T0 != T0:
            return _NAN
        up, get, cp = self._up, (self._s if by_s else self._h), self._cp
        T = min(max(T0, lo), hi)
        try:
            up(_PT, p, T)
            f = get()
            c = cp() / T if by_s else cp()
            last = math.inf
            for _ in range(8):
                dT = (target - f) / c
                T_new = T + dT
                if not lo <= T_new <= hi:
                    return _NAN
                a = abs(dT)
                if a <= _TOL_T:
                    up(_PT, p, T_new)
                    return T_new
                T = T_new
                up(_PT, p, T)
                f = get()
                if a > 1e-2 * last:
                    c = cp() / T if by_s else cp()
                last = a
        except (ValueError, IndexError):
            return _NAN
        return _NAN

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

    # ------------------------------------------------------------ (p, s)
    def _ps_common(self, func: str, p: float, s: float,
                   T_guess: float | None) -> tuple[float, float, float, float, tuple[float, ...] | None]:
        """(h, T, v, x, line) at pressure p [Pa] and entropy s [J/(kg K)].

        ``line`` is None in single phase; two-phase, the saturated values
        (T, h_f, h_g, s_f, s_g, v_f, v_g) at p that the lever rule used.
        """
        _check(func, p=p, s=s)
        phase, x, sf, sg, tsat = self._phase(p, s, True)
        if phase == _WET:
            up = self._up
            up(_PQ, p, 0.0)
            hf, vf = self._h(), 1.0 / self._rho()
            up(_PQ, p, 1.0)
            hg, vg = self._h(), 1.0 / self._rho()
            return hf + x * (hg - hf), tsat, vf + x * (vg - vf), x, (tsat, hf, hg, sf, sg, vf, vg)
        T = self._single_T(func, p, s, True, phase, tsat, T_guess)
        h = self._h()
        v = 1.0 / self._rho()
        if phase != _NOLINE:
            _, hf, hg = self._sat_h(p)
            x = (h - hf) / (hg - hf)
        return h, T, v, x, None

    def h_ps(self, p: float, s: float, T_guess: float | None = None) -> float:
        """Specific enthalpy [J/kg] at pressure p [Pa] and specific entropy s [J/(kg K)].

        Two-phase states use the lever rule on the saturation line (fast);
        single phase starts from ``T_guess`` [K] if given (as :meth:`ph`, e.g.
        the previous evaluation's isentropic end temperature ``ps(...).T``), else
        from the table of :mod:`twin.properties.guess` (or CoolProp's (p, s)
        flash), and refines on the forward equation.
        """
        _check("h_ps", p=p, s=s)
        phase, x, _, _, tsat = self._phase(p, s, True)
        if phase == _WET:
            up = self._up
            up(_PQ, p, 0.0)
            hf = self._h()
            up(_PQ, p, 1.0)
            return hf + x * (self._h() - hf)
        self._single_T("h_ps", p, s, True, phase, tsat, T_guess)
        return self._h()

    def ps(self, p: float, s: float, T_guess: float | None = None) -> PSState:
        """State at pressure p [Pa] and specific entropy s [J/(kg K)]: h, T, v, x, partials.

        ``T_guess`` [K], optional: a start temperature, as in :meth:`h_ps`.

        dh_dp = v [m3/kg] at constant s and dh_ds = T [K] at constant p (dh = T ds + v dp)
        in single phase; in two-phase the partials of the lever rule that computes h.
        """
        h, T, v, x, line = self._ps_common("ps", p, s, T_guess)
        if line is None:
            return PSState(p, s, h, T, v, x, False, v, T)
        # two-phase: partials of the lever rule h = h_f + x (h_g - h_f), x = (s - s_f)/(s_g - s_f),
        # the line's slopes around the saturated values just used (as sat(p))
        st = self._sat_state(p, line)
        sfg, hfg = st.s_g - st.s_f, st.h_g - st.h_f
        dx_dp = -((1.0 - x) * st.ds_f_dp + x * st.ds_g_dp) / sfg
        dh_dp = (1.0 - x) * st.dh_f_dp + x * st.dh_g_dp + hfg * dx_dp
        return PSState(p, s, h, T, v, x, True, dh_dp, hfg / sfg)
