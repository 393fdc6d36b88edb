"""The full (p, h) state with partial derivatives, and the public :class:`Water`."""

from __future__ import annotations

import functools
import math
from collections.abc import Callable
from typing import Any

from twin.properties.backend import PQ as _PQ
from twin.properties.backend import PT as _PT
from twin.properties.base import _diff
from twin.properties.guess import line_side
from twin.properties.inverse import WaterInverse
from twin.properties.states import (
    _DP_REL,
    _DT,
    _LIQ,
    _NAN,
    _NOLINE,
    _T_LO,
    _UNSET,
    _VAP,
    P_CRIT,
    P_TRIPLE,
    T_CRIT,
    X_SATURATED,
    PHState,
    PropertyError,
    SatState,
    _check,
    _range_error,
)

# Analytic (∂v/∂T)_p and (∂v/∂p)_T from cv and the speed of sound in region-1 liquid only:
# there they cost less than four (p, T) stencil evaluations; in vapour CoolProp's IF97
# cv and w getters cost more than the stencil (measured with twin bench properties).
_T_REGION13 = 623.15  # [K] IAPWS-IF97 region 1 / 3 boundary
# [K] below this, liquid (∂v/∂T)_p may be negative (density maximum 277.13 K at 0.1 MPa,
# lower at higher pressure [memory]); there it comes from central differences
_T_DENSITY_MAX = 300.0
_INF = math.inf
# [K] beyond this from T_sat neither derivative stencil reaches the saturation line (the T
# step is 0.01 K; p_sat(T) is more than 1 % from p there, the p step 0.01 %), so ph() skips
# the p_sat(T) bound of _dv_stencils
_FAR_K = 1.0


class Water(WaterInverse):
    """One IAPWS-IF97 ``AbstractState`` wrapper. Not thread-safe: one per thread/process.

    All methods take and return SI base units and raise :class:`PropertyError`
    for NaN or out-of-range input.

    References
    ----------
    IAPWS R7-97(2012), Revised Release on IAPWS-IF97.
    """

    __slots__ = ()

    def ph(self, p: float, h: float, T_guess: float | None = None) -> PHState:
        """Full state and partial derivatives at pressure p [Pa], enthalpy h [J/kg].

        ``T_guess`` [K], optional: a temperature near the answer, typically the
        ``T`` of the same stream's state at the previous evaluation
        (``water.ph(p, h, T_guess=previous.T)``). The forward-equation
        refinement then starts from it instead of the start table; the result
        is the same state (T to the refinement's tolerance, 1e-7 K, which
        leaves every field within ~1e-10 relative). A guess on the other side
        of the saturation line, NaN, or one that does not converge quickly is
        ignored (the table start is used), so any number is safe to pass.

        Single phase: the forward-equation temperature (start, chord
        refinement; see :meth:`_single_T`), then (p, T) getters. Derivatives
        from dh = T ds + v dp (ds_dh = 1/T, ds_dp = -v/T), dT_dh = 1/cp,
        dT_dp = -(∂h/∂p)_T/cp with (∂h/∂p)_T = v - T(∂v/∂T)_p; in region-1
        liquid (∂v/∂p)_T = -(cp/cv) v²/w² and (∂v/∂T)_p = sqrt(-(∂v/∂p)_T (cp - cv)/T)
        (a central difference in T below 300 K, where its sign is not known),
        elsewhere central differences for (∂v/∂T)_p (±0.01 K) and (∂v/∂p)_T
        (±1e-4 p), one-sided where a step would cross the saturation line.
        Where the line table of :mod:`twin.properties.guess` shows the state
        well inside one phase, the saturation line is not evaluated: x, dx_dh
        and dx_dp are computed on first access (the same numbers); next to the
        lines the exact phase test on the line decides, x and dx_dh are eager
        and dx_dp on first access.
        Two-phase (|x| up to X_SATURATED outside [0, 1] included, so that a
        saturated state a rounding error off the line reads as saturated): lever
        rule on the saturation line (s, v and their partials
        differentiate the lever rule itself), dT_dh = 0,
        dT_dp = dT_sat/dp, v = v_f + x(v_g - v_f). Below the critical pressure x
        is the (extrapolated) equivalent quality, dx_dh = 1/(h_g - h_f),
        dx_dp = -(dh_f/dp (1 - x) + x dh_g/dp)/(h_g - h_f); NaN at p >= P_CRIT.
        """
        if not (-_INF < p < _INF and -_INF < h < _INF):
            _check("ph", p=p, h=h)
        try:
            return self._ph(p, h, T_guess)
        except (ValueError, IndexError) as exc:  # CoolProp range errors
            if isinstance(exc, PropertyError):
                raise
            raise _range_error("ph", exc, p=p, h=h) from None

    def _ph(self, p: float, h: float, T_guess: float | None) -> PHState:
        x = dx_dh = dx_dp = _UNSET
        up, rho = self._up, self._rho
        if P_TRIPLE <= p < P_CRIT:
            phase = line_side(p, h, False)
            if phase < 0 and p in self._sat_cache:  # next to a line, known: the exact test
                st = self._sat_cache[p]
                tsat, hf, hg = st.T, st.h_f, st.h_g
                hfg = hg - hf
                x = (h - hf) / hfg
                dx_dh = 1.0 / hfg
                if -X_SATURATED <= x <= 1.0 + X_SATURATED:
                    return self._ph_wet(p, h, x, dx_dh, st)
                phase = _LIQ if x < 0.0 else _VAP
            elif phase < 0:  # next to a line: the exact test on the saturation line
                up(_PQ, p, 0.0)
                tsat, hf = self._t(), self._h()
                up(_PQ, p, 1.0)
                hg = self._h()
                hfg = hg - hf
                x = (h - hf) / hfg
                dx_dh = 1.0 / hfg
                if -X_SATURATED <= x <= 1.0 + X_SATURATED:
                    # the saturation state at p from these updates (still at Q = 1), then its slopes
                    sg, vg = self._s(), 1.0 / rho()
                    up(_PQ, p, 0.0)
                    mid = (tsat, hf, hg, self._s(), sg, 1.0 / rho(), vg)
                    return self._ph_wet(p, h, x, dx_dh, self._sat_state(p, mid))
                phase = _LIQ if x < 0.0 else _VAP
            else:
                up(_PQ, p, 0.0)
                tsat = self._t()
        else:
            phase, tsat = _NOLINE, _NAN
            x = dx_dh = dx_dp = _NAN
        T = self._single_T("ph", p, h, False, phase, tsat, T_guess)
        up(_PT, p, T)
        s, v, cp = self._s(), 1.0 / rho(), self._cp()
        if phase != _VAP and T <= _T_REGION13:
            # region-1 liquid: (∂v/∂p)_T = -(cp/cv) v^2/w^2 and (∂v/∂T)_p =
            # sqrt(-(∂v/∂p)_T (cp - cv)/T), from w^2 = -v^2 (∂p/∂v)_s and
            # cp - cv = -T (∂v/∂T)_p^2 / (∂v/∂p)_T. The root has no sign, so below
            # _T_DENSITY_MAX (∂v/∂T)_p comes from a central difference in T
            cv, ws = self._cv(), self._w()
            dv_dp_T = -(cp / cv) * v * v / (ws * ws)
            if T >= _T_DENSITY_MAX:
                dv_dT = math.sqrt(max(-dv_dp_T * (cp - cv) / T, 0.0))
            else:
                dv_dT = self._dv_dT_stencil(p, T, tsat if tsat == tsat else math.inf)
        elif abs(T - tsat) > _FAR_K or tsat != tsat:
            # central differences as in _dv_stencils (which see), inlined: no bound is reached
            dp = _DP_REL * p
            up(_PT, p, T + _DT)
            a = 1.0 / rho()
            up(_PT, p, T - _DT)
            dv_dT = (a - 1.0 / rho()) / (2.0 * _DT)
            up(_PT, p + dp, T)
            a = 1.0 / rho()
            up(_PT, p - dp, T)
            dv_dp_T = (a - 1.0 / rho()) / (2.0 * dp)
        else:
            dv_dT, dv_dp_T = self._dv_stencils(p, T, tsat, phase == _LIQ)
        dT_dp = -(v - T * dv_dT) / cp
        return PHState(p, h, T, s, v, x, cp, False,
                       dT_dp, 1.0 / cp, -v / T, 1.0 / T,
                       dv_dp_T + dv_dT * dT_dp, dv_dT / cp, dx_dp, dx_dh, self)

    def _dv_dT_stencil(self, p: float, T: float, hi_T: float) -> float:
        """(∂v/∂T)_p [m3/(kg K)] of liquid by a central difference (±0.01 K), inside [273.15 K, hi_T]."""
        up, rho = self._up, self._rho

        def v_of_T(tt: float) -> float:
            up(_PT, p, tt)
            return 1.0 / rho()

        return _diff(v_of_T, T, _DT, _T_LO, hi_T)

    def _dv_stencils(self, p: float, T: float, tsat: float, liquid: bool) -> tuple[float, float]:
        """((∂v/∂T)_p [m3/(kg K)], (∂v/∂p)_T [m3/(kg Pa)]) by central differences on (p, T).

        Steps ±0.01 K and ±1e-4 p, one-sided where a step would cross the
        saturation line. Used outside region-1 liquid (vapour, region 3 and
        above), where CoolProp's cv and speed-of-sound getters cost more than
        these four evaluations.
        """
        up, rho = self._up, self._rho
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

        return _diff(v_of_T, T, _DT, lo_T, hi_T), _diff(v_of_p, p, _DP_REL * p, lo_p, hi_p)

    def _ph_wet(self, p: float, h: float, x: float, dx_dh: float, st: SatState | None = None) -> PHState:
        if st is None:
            st = self.sat(p)
        dx_dp = -(st.dh_f_dp * (1.0 - x) + x * st.dh_g_dp) * dx_dh  # as _dx_dp, from sat()'s line
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


def _guarded(name: str, method: Callable[..., Any]) -> Callable[..., Any]:
    """Turn any CoolProp range error escaping ``method`` into a PropertyError naming the inputs."""

    @functools.wraps(method)
    def wrapper(self: Water, *args: float, **kwargs: float | None) -> Any:
        try:
            return method(self, *args, **kwargs)
        except PropertyError:
            raise
        except (ValueError, IndexError) as exc:
            names = ("p", "T") if name.endswith("pT") else ("p", "s") if name in ("h_ps", "ps") else ("p", "h")
            raise _range_error(name, exc, **dict(zip(names, args, strict=False))) from None

    return wrapper


for _name in ("s_pT", "v_pT", "cp_pT", "w_pT", "dh_dp_T", "T_ph", "s_ph", "v_ph", "x_ph", "h_ps",
              "T_sat", "p_sat", "h_f", "h_g", "s_f", "s_g", "v_f", "v_g", "sat", "ps"):  # h_pT, ph map their own
    setattr(Water, _name, _guarded(_name, getattr(Water, _name)))
