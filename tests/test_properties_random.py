"""The fast (p, h) and (p, s) paths against the independent `iapws` package on random states.

twin starts its forward-equation refinement of T(p, h) and T(p, s) from a table
(:mod:`twin.properties.guess`) instead of CoolProp's backward-equation flash,
takes (∂v/∂T)_p and (∂v/∂p)_T analytically from cv and the speed of sound in
region-1 liquid, and computes (∂x/∂p)_h on first access. None of that may change
a result: 1 000 random single-phase states in IAPWS-IF97 regions 1 and 2 are
compared with `iapws` (J. J. Peña, pure-Python IAPWS-IF97: ``IAPWS97(P, T)``,
analytic alpha_v, kappa_T, cp), values to 1e-9 relative.

References: IAPWS R7-97(2012), Revised Release on IAPWS-IF97 (2007).
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from iapws import IAPWS97

from twin.properties import P_CRIT, Water

MPa, kJ = 1e6, 1e3
N_STATES = 1000


def _states() -> list[tuple[float, float, IAPWS97]]:
    rng = np.random.default_rng(20261202)
    out: list[tuple[float, float, IAPWS97]] = []
    while len(out) < N_STATES:
        p = float(np.exp(rng.uniform(math.log(700.0), math.log(99e6))))
        T = float(rng.uniform(273.2, 1073.0))
        ref = IAPWS97(P=p / MPa, T=T)  # iapws forward equations
        if ref.region not in (1, 2):
            continue  # region 3: CoolProp and iapws take different routes (see test_properties)
        if p < P_CRIT and abs(T - IAPWS97(P=p / MPa, x=0.0).T) < 0.01:
            continue  # the lines themselves: tests/test_properties_saturation.py
        out.append((p, T, ref))
    return out


STATES = _states()


@pytest.fixture(scope="module")
def w() -> Water:
    return Water()


def test_ph_state_matches_iapws_on_random_states(w):
    worst: dict[str, float] = {}

    def check(name: str, got: float, want: float, rel: float, scale: float = 0.0) -> None:
        err = abs(got - want) / max(abs(want), scale)
        worst[name] = max(worst.get(name, 0.0), err)
        assert err <= rel, (name, got, want)

    for p, T, ref in STATES:
        h = ref.h * kJ
        st = w.ph(p, h)
        assert not st.two_phase
        v, cp, alpha, kappa = ref.v, ref.cp * kJ, ref.alfav, ref.xkappa / MPa
        check("T", st.T, T, 1e-11)
        check("s", st.s, ref.s * kJ, 1e-9, scale=1.0)  # s ~ 0 near the triple point
        check("v", st.v, v, 1e-9)
        check("cp", st.cp, cp, 1e-9)
        # derivatives from iapws' analytic alpha_v = (1/v)(∂v/∂T)_p, kappa_T = -(1/v)(∂v/∂p)_T;
        # twin's central differences (vapour, region 3, (∂v/∂T)_p of cold liquid) differ
        # from them by up to ~1e-7 (measured: dT_dp 1.4e-7, dv_dp 1e-7; dv_dh 9e-7 next to
        # the density maximum, where alpha_v ~ 0), hence 1e-6 and the scales
        dv_dT, dv_dp_T = v * alpha, -v * kappa
        dT_dp = -(v - T * dv_dT) / cp
        check("dT_dh", st.dT_dh, 1.0 / cp, 1e-9)
        check("dT_dp", st.dT_dp, dT_dp, 1e-6, scale=v / cp)
        check("dv_dh", st.dv_dh, dv_dT / cp, 1e-6, scale=1e-5 * v / cp)  # alpha_v ~ 0 near 277 K
        check("dv_dp", st.dv_dp, dv_dp_T + dv_dT * dT_dp, 1e-6, scale=abs(dv_dp_T))
        check("ds_dp", st.ds_dp, -v / T, 1e-9)
        assert w.T_ph(p, h) == st.T
        check("h_ps", w.h_ps(p, ref.s * kJ), h, 1e-9, scale=1e3)
        if p <= 16.5e6:  # equivalent quality from iapws' saturated enthalpies (regions 1, 2)
            hf, hg = IAPWS97(P=p / MPa, x=0.0).h * kJ, IAPWS97(P=p / MPa, x=1.0).h * kJ
            check("x", st.x, (h - hf) / (hg - hf), 1e-9, scale=1e-3)
            check("dx_dh", st.dx_dh, 1.0 / (hg - hf), 1e-9)
            assert math.isfinite(st.dx_dp)
        elif p < P_CRIT:  # saturated phases in region 3, where the two differ (test_properties)
            assert math.isfinite(st.x) and math.isfinite(st.dx_dp)
        else:
            assert math.isnan(st.x) and math.isnan(st.dx_dp)
    print("worst relative errors:", {k: f"{v:.1e}" for k, v in worst.items()})


def test_lazy_quality_derivative_equals_the_saturation_line_form(w):
    # (∂x/∂p)_h = -(dh_f/dp (1 - x) + x dh_g/dp)/(h_g - h_f) (definition of x), with
    # iapws' Clapeyron-consistent line derivatives by wide central differences
    for p, h in ((1e6, 3.2e6), (6e3, 1.5e5), (16e6, 3.4e6), (1e5, 4.0e5)):
        st = w.ph(p, h)
        d = 1e-3 * p
        lines = [(IAPWS97(P=q / MPa, x=0.0).h * kJ, IAPWS97(P=q / MPa, x=1.0).h * kJ) for q in (p - d, p, p + d)]
        dhf = (lines[2][0] - lines[0][0]) / (2 * d)
        dhg = (lines[2][1] - lines[0][1]) / (2 * d)
        hf, hg = lines[1]
        x = (h - hf) / (hg - hf)
        assert st.dx_dp == pytest.approx(-(dhf * (1 - x) + x * dhg) / (hg - hf), rel=1e-5)
        assert st.dx_dp == st.dx_dp  # the first access stores it
    # dataclasses.replace (the model's first-order moved states) keeps working and copies
    # the lazy fields as they stand at the original (p, h); x from the lever rule of
    # iapws' saturated enthalpies (IAPWS-IF97 region 4, regions 1 and 2 on the line)
    st = w.ph(1e6, 3.2e6)
    moved = dataclasses.replace(st, p=1.01e6)
    assert moved.p == 1.01e6 and moved.T == st.T and math.isfinite(moved.dx_dp)
    assert moved.x == st.x and moved.dx_dh == st.dx_dh and moved.dx_dp == st.dx_dp
    hf, hg = IAPWS97(P=1.0, x=0.0).h * kJ, IAPWS97(P=1.0, x=1.0).h * kJ
    assert st.x == pytest.approx((3.2e6 - hf) / (hg - hf), rel=1e-9)
    moved = dataclasses.replace(w.ph(1e6, 3.2e6), x=2.0)  # a replaced lazy field is the given one
    assert moved.x == 2.0 and moved.dx_dh == st.dx_dh


@pytest.mark.parametrize(("p", "T"), [(25e6, 1176.66), (26.4e6, 2207.05), (24.6e6, 1413.2), (10e6, 1500.0)])
def test_region5_states_by_h_and_by_s(w, p, T):
    # IF97 region 5 (1073.15-2273.15 K, p <= 50 MPa), also above the critical pressure,
    # where the previous (p, s) fallback bracket stopped at 1073.15 K; iapws IAPWS97(P, T)
    ref = IAPWS97(P=p / MPa, T=T)
    assert ref.region == 5
    assert w.T_ph(p, ref.h * kJ) == pytest.approx(T, rel=1e-10)
    assert w.h_ps(p, ref.s * kJ) == pytest.approx(ref.h * kJ, rel=1e-10)
    assert pytest.approx(T, rel=1e-10) == w.ps(p, ref.s * kJ).T
