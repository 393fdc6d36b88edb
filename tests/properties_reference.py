"""The straightforward (p, h) state of twin.properties before the fast paths, kept as a reference.

:func:`reference_ph` is ``Water.ph`` (:func:`reference_ps` ``Water.ps`` in single phase) as it was
before the line table, the warm
start and the lazy quality: the saturation line evaluated for every state below
the critical pressure (exact phase test, x and dx_dh eager), the refinement
started from the start table, and the derivative stencils always bounded by
p_sat(T). ``tests/test_properties_fast.py`` compares the fast paths with it.
"""

from __future__ import annotations

import math

from twin.properties import P_CRIT, P_TRIPLE, X_SATURATED, PHState, PSState, Water
from twin.properties.backend import PT
from twin.properties.base import _diff
from twin.properties.states import _DP_REL, _DT, _LIQ, _NAN, _NOLINE, _VAP, T_CRIT

_T_REGION13 = 623.15  # [K] IAPWS-IF97 region 1 / 3 boundary
_T_DENSITY_MAX = 300.0  # [K] as twin.properties.water


def _dv_stencils(w: Water, p: float, T: float, tsat: float, liquid: bool) -> tuple[float, float]:
    lo_T, hi_T, lo_p, hi_p = -math.inf, math.inf, 0.0, math.inf
    if tsat == tsat:
        psat = w.p_sat(T) if T <= T_CRIT else P_CRIT
        if liquid:
            hi_T, lo_p = tsat, psat
        else:
            lo_T, hi_p = tsat, psat

    def v_of_T(tt: float) -> float:
        w._up(PT, p, tt)
        return 1.0 / w._rho()

    def v_of_p(pp: float) -> float:
        w._up(PT, pp, T)
        return 1.0 / w._rho()

    return _diff(v_of_T, T, _DT, lo_T, hi_T), _diff(v_of_p, p, _DP_REL * p, lo_p, hi_p)


def reference_ph(w: Water, p: float, h: float) -> PHState:
    """The full (p, h) state [SI units] the straightforward way (see the module docstring)."""
    x = dx_dh = _NAN
    dx_dp = _NAN
    lazy_dx = False
    if P_TRIPLE <= p < P_CRIT:
        tsat, hf, hg = w._sat_h(p)
        hfg = hg - hf
        x = (h - hf) / hfg
        dx_dh = 1.0 / hfg
        if -X_SATURATED <= x <= 1.0 + X_SATURATED:
            return w._ph_wet(p, h, x, dx_dh)
        phase = _LIQ if x < 0.0 else _VAP
        lazy_dx = True
    else:
        phase, tsat = _NOLINE, _NAN
    T = w._single_T("ph", p, h, False, phase, tsat)
    w._up(PT, p, T)
    s, v, cp = w._s(), 1.0 / w._rho(), w._cp()
    if phase != _VAP and T <= _T_REGION13:
        cv, ws = w._cv(), w._w()
        dv_dp_T = -(cp / cv) * v * v / (ws * ws)
        if T >= _T_DENSITY_MAX:
            dv_dT = math.sqrt(max(-dv_dp_T * (cp - cv) / T, 0.0))
        else:
            dv_dT = w._dv_dT_stencil(p, T, tsat if tsat == tsat else math.inf)
    else:
        dv_dT, dv_dp_T = _dv_stencils(w, p, T, tsat, phase == _LIQ)
    if lazy_dx:
        dx_dp = w._dx_dp(p, x, dx_dh)
    dT_dp = -(v - T * dv_dT) / cp
    return PHState(p, h, T, s, v, x, cp, False,
                   dT_dp, 1.0 / cp, -v / T, 1.0 / T,
                   dv_dp_T + dv_dT * dT_dp, dv_dT / cp, dx_dp, dx_dh)


def reference_ps(w: Water, p: float, s: float) -> PSState:
    """The (p, s) state [SI units] with the exact phase test on the line for every state below P_CRIT.

    Two-phase with the saturation state from a separate sat(p), as before.
    """
    from twin.properties.backend import PQ

    if P_TRIPLE <= p < P_CRIT:
        w._up(PQ, p, 0.0)
        tsat, sf = w._t(), w._s()
        w._up(PQ, p, 1.0)
        x = (s - sf) / (w._s() - sf)
        if -X_SATURATED <= x <= 1.0 + X_SATURATED:  # two-phase: the lever rule, sat(p)'s slopes
            w._up(PQ, p, 0.0)
            hf, vf = w._h(), 1.0 / w._rho()
            w._up(PQ, p, 1.0)
            hg, vg = w._h(), 1.0 / w._rho()
            st = w.sat(p)
            sfg, hfg = st.s_g - st.s_f, st.h_g - st.h_f
            dx_dp = -((1.0 - x) * st.ds_f_dp + x * st.ds_g_dp) / sfg
            dh_dp = (1.0 - x) * st.dh_f_dp + x * st.dh_g_dp + hfg * dx_dp
            return PSState(p, s, hf + x * (hg - hf), tsat, vf + x * (vg - vf), x, True, dh_dp, hfg / sfg)
        phase = _LIQ if x < 0.0 else _VAP
    else:
        phase, tsat = _NOLINE, _NAN
    T = w._single_T("ps", p, s, True, phase, tsat)
    h, v = w._h(), 1.0 / w._rho()
    x = _NAN
    if phase != _NOLINE:
        _, hf, hg = w._sat_h(p)
        x = (h - hf) / (hg - hf)
    return PSState(p, s, h, T, v, x, False, v, T)
