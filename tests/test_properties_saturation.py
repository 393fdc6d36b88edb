"""Phase selection at, and one ulp either side of, the bubble and dew lines.

Every call path of :mod:`twin.properties` ((p, h), (p, T), (p, s) and the
derivatives of ``ph()``) is evaluated on the saturation line and one ulp either
side of it, over 611.657 Pa - 22.06 MPa, and compared with the independent
`iapws` package (J. J. Peña, pure-Python IAPWS-IF97, ``iapws.IAPWS97`` with
``x=0``/``x=1``, region 4). A state one ulp from the line must carry the
properties of the saturated phase on its side (which are continuous there); a
wrong phase is off by the latent heat.

References: IAPWS R7-97(2012), Revised Release on IAPWS-IF97 (2007), Eqs. (30),
(31) (saturation line), verification tables 35 and 36 (used in
tests/test_properties.py).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from iapws import IAPWS97

from twin.properties import Water

MPa, kJ = 1e6, 1e3
# Up to p_sat(623.15 K) = 16.53 MPa both saturated phases lie in IF97 regions 1 and 2,
# where twin (CoolProp) and iapws evaluate the same equations: measured agreement
# ~1e-12. Above it they lie in region 3, where the two implementations take different
# routes to the saturated volumes (up to 8 kJ/kg apart at 22 MPa, measured), so there
# the check is only that the phase is right: within 25 % of the latent heat of iapws
# (measured up to 13 % at 22.06 MPa; the wrong phase is off by the whole latent heat).
P_REGION4_12 = 16.5291643e6  # [Pa], p_sat(623.15 K), IAPWS-IF97 (2007) Eq. (30)
PRESSURES = [float(p) for p in np.geomspace(611.657, 22.06e6, 60)]
# demo-u1 (invented plant) deaerator outlet and hotwell: saturated liquid, from its
# forward heat balance at design, 75 % and 50 % load (the model puts h on h_f(p) to
# within rounding; these (p, h) pairs are the solved ones).
DEMO_U1_SATURATED_LIQUID = [
    (608000.0, 672753.1229770097),  # deaerator outlet, design
    (6200.0, 153998.63192234054),  # hotwell, design
    (467328.669327752, 629261.4626387095),  # deaerator outlet, 75 % sliding
    (5064.512166376548, 138719.67548624353),  # hotwell, 75 %
    (320801.4237828435, 571304.5525858356),  # deaerator outlet, 50 %
    (4062.2487501405694, 122520.65628927623),  # hotwell, 50 %
]


@pytest.fixture(scope="module")
def w() -> Water:
    return Water()


def _ref(p: float) -> tuple[IAPWS97, IAPWS97]:
    return IAPWS97(P=p / MPa, x=0.0), IAPWS97(P=p / MPa, x=1.0)  # iapws region 4


def _near(value: float, ref: float, p: float, latent: float, rel: float = 1e-9) -> bool:
    """value == ref to rel (and 1e-9 of the latent difference, for values near 0)."""
    if p <= P_REGION4_12:
        return abs(value - ref) <= rel * abs(ref) + 1e-9 * abs(latent)
    return abs(value - ref) <= 0.25 * abs(latent)


def _ulps(x: float) -> list[float]:
    return [math.nextafter(x, -math.inf), x, math.nextafter(x, math.inf)]


@pytest.mark.parametrize("p", PRESSURES)
def test_ph_paths_pick_the_saturated_phase_at_and_next_to_the_lines(w, p):
    liq, vap = _ref(p)
    hfg, sfg = (vap.h - liq.h) * kJ, (vap.s - liq.s) * kJ
    for side, ref, h_line in (("liquid", liq, w.h_f(p)), ("vapour", vap, w.h_g(p))):
        for h in _ulps(h_line):
            st = w.ph(p, h)
            where = f"{side} p={p!r} h={h!r}"
            assert _near(st.T, ref.T, p, 1e3, rel=1e-10), where  # iapws region 4 T_sat
            assert _near(st.s, ref.s * kJ, p, sfg), where
            assert _near(st.v, ref.v, p, abs(vap.v - liq.v)), where
            assert _near(w.T_ph(p, h), ref.T, p, 1e3, rel=1e-10), where
            assert _near(w.s_ph(p, h), ref.s * kJ, p, sfg), where
            assert _near(w.v_ph(p, h), ref.v, p, abs(vap.v - liq.v)), where
            # a saturated state reads the line's dT/dp; Clapeyron with iapws values
            # dT/dp = T (v_g - v_f) / (h_g - h_f) (thermodynamic identity; IF97's region-4
            # line meets it to ~1e-5, measured in tests/test_properties.py)
            clapeyron = ref.T * (vap.v - liq.v) / hfg
            assert st.dT_dp == pytest.approx(clapeyron, rel=1e-3), where
            assert st.dT_dh == 0.0, where
            assert abs(st.x - (0.0 if side == "liquid" else 1.0)) <= 1e-9, where


@pytest.mark.parametrize("p", PRESSURES)
def test_ps_path_picks_the_saturated_phase_at_and_next_to_the_lines(w, p):
    liq, vap = _ref(p)
    hfg = (vap.h - liq.h) * kJ
    for side, ref, s_line in (("liquid", liq, w.s_f(p)), ("vapour", vap, w.s_g(p))):
        for s in _ulps(s_line):
            where = f"{side} p={p!r} s={s!r}"
            assert _near(w.h_ps(p, s), ref.h * kJ, p, hfg), where
            st = w.ps(p, s)
            assert _near(st.h, ref.h * kJ, p, hfg), where
            assert _near(st.T, ref.T, p, 1e3, rel=1e-10), where


@pytest.mark.parametrize("p", PRESSURES)
def test_pT_paths_pick_the_phase_of_their_side_of_T_sat(w, p):
    liq, vap = _ref(p)
    hfg = (vap.h - liq.h) * kJ
    T_sat = w.T_sat(p)
    below, on, above = _ulps(T_sat)
    for T, ref, side in ((below, liq, "liquid"), (on, liq, "on the line: liquid, as iapws"), (above, vap, "vapour")):
        where = f"{side} p={p!r} T={T!r}"
        assert _near(w.h_pT(p, T), ref.h * kJ, p, hfg), where
        assert _near(w.s_pT(p, T), ref.s * kJ, p, (vap.s - liq.s) * kJ), where
        assert _near(w.v_pT(p, T), ref.v, p, abs(vap.v - liq.v)), where
        assert math.isfinite(w.cp_pT(p, T)) and math.isfinite(w.w_pT(p, T)), where
        # (∂h/∂p)_T = v (1 - T alpha_v) on the phase's side: iapws' analytic alpha_v
        if p <= P_REGION4_12:
            assert w.dh_dp_T(p, T) == pytest.approx(ref.v * (1.0 - ref.T * ref.alfav), rel=1e-4), where


@pytest.mark.parametrize(("p", "h"), DEMO_U1_SATURATED_LIQUID)
def test_demo_u1_deaerator_and_hotwell_states(w, p, h):
    liq, vap = _ref(p)
    hfg, vfg = (vap.h - liq.h) * kJ, vap.v - liq.v
    for hh in (*_ulps(h), h * (1 - 1e-12), h * (1 + 1e-12)):
        st = w.ph(p, hh)
        assert st.two_phase and abs(st.x) <= 1e-9
        assert pytest.approx(liq.T, rel=1e-10) == st.T  # iapws region 4 T_sat
        assert st.s == pytest.approx(liq.s * kJ, rel=1e-9)  # iapws saturated liquid
        # lever rule with iapws' saturated volumes; x is known to the rounding of h_f
        # (~1e-12), which the large v_g - v_f of low pressures turns into ~1e-11 vfg
        x = (hh - liq.h * kJ) / hfg
        assert st.v == pytest.approx(liq.v + x * vfg, rel=1e-9, abs=1e-11 * vfg)
        clapeyron = liq.T * vfg / hfg  # thermodynamic identity
        assert st.dT_dp == pytest.approx(clapeyron, rel=1e-3)
        assert w.T_ph(p, hh) == pytest.approx(liq.T, rel=1e-10)
        assert w.s_ph(p, hh) == pytest.approx(liq.s * kJ, rel=1e-9)
    # slightly subcooled (x = -1e-6): single phase; iapws IAPWS97(P, h) in region 1
    hf = w.h_f(p)
    hs = hf - 1e-6 * (w.h_g(p) - hf)
    st, ref = w.ph(p, hs), IAPWS97(P=p / MPa, h=hs / kJ)
    assert not st.two_phase and ref.region == 1
    assert pytest.approx(ref.T, rel=1e-10) == st.T
    assert st.s == pytest.approx(ref.s * kJ, rel=1e-9)
    assert st.v == pytest.approx(ref.v, rel=1e-9)
    assert st.dT_dh == pytest.approx(1.0 / (ref.cp * kJ), rel=1e-9)


def test_states_just_off_the_line_are_single_phase_and_continuous(w):
    # |x| > X_SATURATED = 1e-9 is single phase (iapws IAPWS97(P, h), regions 1 and 2);
    # within it the state is saturated (iapws T_sat, lever rule)
    for p in (5e3, 1e5, 1e6, 1e7):
        liq, vap = _ref(p)
        hf, hg = w.h_f(p), w.h_g(p)
        for h, ref, wet in ((hf - 2e-9 * (hg - hf), None, False), (hg + 2e-9 * (hg - hf), None, False),
                            (hf - 0.5e-9 * (hg - hf), liq, True), (hg + 0.5e-9 * (hg - hf), vap, True)):
            st = w.ph(p, h)
            assert st.two_phase is wet
            if ref is None:
                ref = IAPWS97(P=p / MPa, h=h / kJ)
                assert ref.region in (1, 2)
                s_ref = ref.s * kJ
            else:  # lever rule on iapws' saturated entropies
                s_ref = (liq.s + (h - liq.h * kJ) / ((vap.h - liq.h) * kJ) * (vap.s - liq.s)) * kJ
            assert pytest.approx(ref.T, rel=1e-10) == st.T
            assert st.s == pytest.approx(s_ref, rel=1e-10)


def test_near_line_buckets_cover_the_saturation_line():
    # (p, T) calls check T against T_sat(p) exactly only when p lies in the kelvin bucket
    # [p_sat(k), p_sat(k + 1)] of T, k = int(T); every point of the line must be inside its
    # bucket (iapws' IAPWS-IF97 Eq. (30) p_sat(T)), and so p < P_CRIT there; the buckets
    # of every other kelvin are empty
    from iapws.iapws97 import _PSat_T

    from twin.properties import base

    for T in np.linspace(273.15, 647.096, 20000):
        k = int(T)
        ps = _PSat_T(T) * MPa
        if 611.657 <= ps < 22.064e6:  # T_sat(p) exists from the triple to the critical point
            assert base._P_SAT_LO[k] <= ps <= base._P_SAT_HI[k] * (1 + 1e-15), T
    line = range(273, 648)
    assert min(base._P_SAT_LO[k] for k in line) >= 611.657  # where T_sat(p) exists
    assert max(base._P_SAT_HI[k] for k in line) < 22.064e6
    assert all(base._P_SAT_LO[k] > base._P_SAT_HI[k] for k in range(len(base._P_SAT_LO)) if k not in line)
    w = Water()  # just outside the line's pressure range, (p, T) works as before
    assert w.h_pT(611.5, 273.155) == pytest.approx(IAPWS97(P=611.5 / MPa, T=273.155).h * kJ, rel=1e-9)
    assert w.h_pT(22.064e6 * (1 + 1e-10), 647.09) == pytest.approx(w.h_pT(22.064e6, 647.09), rel=1e-6)
