"""The fast (p, h) paths of twin.properties against the straightforward evaluation and `iapws`.

``Water.ph`` skips the saturation line far from it (the line table of
:mod:`twin.properties.guess`, x and dx_dh on first access), starts its
forward-equation refinement from an optional previous temperature (``T_guess``)
and inlines its derivative stencils. None of that may change a result: on 1 000
random demo-u1-range states (compressed liquid, superheated steam, wet steam,
states next to the saturation lines, next to the IF97 region boundaries) every
field agrees with :func:`tests.properties_reference.reference_ph` (the
evaluation as it was before) to 1e-9 relative, cold and warm-started, and the
single-phase temperatures with `iapws` (J. J. Peña, pure-Python IAPWS-IF97,
``IAPWS97(P, T)``) to 1e-11 as in tests/test_properties_random.py.

References: IAPWS R7-97(2012), Revised Release on IAPWS-IF97 (2007).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from iapws import IAPWS97

from tests.properties_reference import reference_ph, reference_ps
from twin.properties import P_CRIT, P_TRIPLE, X_SATURATED, Water
from twin.properties.guess import line_side
from twin.properties.states import _LIQ, _VAP

MPa, kJ = 1e6, 1e3
N_STATES = 1000
FIELDS = ("T", "s", "v", "x", "cp", "dT_dp", "dT_dh", "ds_dp", "ds_dh", "dv_dp", "dv_dh", "dx_dp", "dx_dh")


def _states(w: Water) -> list[tuple[str, float, float, float]]:
    """(kind, p [Pa], h [J/kg], T [K] or NaN) over the demo-u1 range (5 kPa - 25 MPa, up to 870 K)."""
    rng = np.random.default_rng(20261202)
    out: list[tuple[str, float, float, float]] = []

    def logp(lo: float, hi: float) -> float:
        return float(np.exp(rng.uniform(math.log(lo), math.log(hi))))

    def single(kind: str, p: float, T: float) -> None:
        out.append((kind, p, w.h_pT(p, T), T))

    def wet(kind: str, p: float, x: float) -> None:
        hf, hg = w.h_f(p), w.h_g(p)
        out.append((kind, p, hf + x * (hg - hf), math.nan))

    for _ in range(250):  # compressed liquid (above P_CRIT: below the region-1/3 boundary)
        p = logp(3e3, 25e6)
        top = w.T_sat(p) - 0.01 if p < P_CRIT else 620.0
        single("liquid", p, float(rng.uniform(274.0, top)))
    for _ in range(250):  # superheated steam
        p = logp(3e3, 20e6)
        single("vapour", p, float(rng.uniform(w.T_sat(p) + 0.01, 870.0)))
    for _ in range(150):  # wet steam
        wet("wet", logp(3e3, 20e6), float(rng.uniform(0.0, 1.0)))
    for i in range(200):  # next to the lines: x a little inside or outside [0, 1]
        d = float(10.0 ** rng.uniform(-12.0, -2.0)) * (1.0 if i % 2 else -1.0)
        wet("near line", logp(3e3, 20e6), d if i % 4 < 2 else 1.0 + d)
    for i in range(150):  # next to IF97 region boundaries
        j = i % 5
        if j == 0:  # region 1/3 at 623.15 K, above the saturation pressure there
            single("region 1/3", float(rng.uniform(16.6e6, 25e6)), 623.15 + float(rng.uniform(-0.5, 0.5)))
        elif j == 1:  # region 2/3 (B23): T = 623.15-863 K at pressures around the line
            T = float(rng.uniform(624.0, 860.0))
            p_b23 = (0.34805185628969e3 - 0.11671859879975e1 * T + 0.10192970039326e-2 * T * T) * MPa  # IF97 Eq. (5)
            single("region 2/3", p_b23 * float(rng.uniform(0.97, 1.03)), T)
        elif j == 2:  # 273.15 K end of region 1
            single("273 K", logp(1e5, 25e6), 273.15 + float(rng.uniform(0.0, 0.5)))
        elif j == 3:  # saturation line in region 3 (p > 16.529 MPa) and next to the critical point
            p = float(rng.uniform(16.4e6, 21e6))  # demo-u1 tops out near 19.3 MPa
            wet("region 3 line", p, float(rng.choice([-1e-3, -1e-7, 1e-11, 0.5, 1.0 - 1e-9, 1.0 + 1e-6, 1.002])))
        else:  # just above the critical pressure
            single("above P_CRIT", float(rng.uniform(P_CRIT * (1 + 1e-9), 23e6)), float(rng.uniform(600.0, 800.0)))
    assert len(out) == N_STATES
    return out


@pytest.fixture(scope="module")
def waters() -> tuple[Water, Water]:
    return Water(), Water()


def _agree(got: object, want: object, kind: str, p: float, h: float) -> None:
    for name in FIELDS:
        a, b = getattr(got, name), getattr(want, name)
        if math.isnan(b):
            assert math.isnan(a), (kind, p, h, name, a, b)
            continue
        # scales for fields that pass through zero or cancel: s (0 at the triple point; 1e-9
        # of 100 J/(kg K) is what 2e-8 K of T makes, inside the refinement tolerance of
        # 1e-7 K that both evaluations stop at), x (on the line), dv_dh = (∂v/∂T)_p/cp (liquid density maximum near 277 K, where the warm
        # start's T, equal to ~1e-12, moves a central difference of v by ~1e-17 m3/(kg K):
        # relative to max(|value|, the value at alpha_v = 1e-4 1/K)) and
        # dT_dp = -(v - T (∂v/∂T)_p)/cp, relative to its terms v/cp (near the ideal gas the
        # difference cancels to ~1 %, and one ulp of T moves it by ~1e-9 of itself)
        vc = want.v / want.cp if want.cp == want.cp else 0.0  # type: ignore[attr-defined]
        scale = {"s": 100.0, "x": 1e-6, "dv_dh": 1e-4 * vc, "dT_dp": vc}.get(name, 0.0)
        err = abs(a - b) / max(abs(b), scale) if a != b else 0.0  # exact zeros (two-phase dT_dh)
        assert err <= 1e-9, (kind, p, h, name, a, b, err)
    assert got.two_phase == want.two_phase  # type: ignore[attr-defined]


def test_fast_ph_equals_the_straightforward_evaluation(waters):
    w, ref_w = waters
    states = _states(ref_w)
    rng = np.random.default_rng(7)
    kinds: dict[str, int] = {}
    prev_T = 300.0
    for kind, p, h, _ in states:
        want = reference_ph(ref_w, p, h)  # before the fast paths (tests/properties_reference.py)
        kinds[kind] = kinds.get(kind, 0) + 1
        _agree(w.ph(p, h), want, kind, p, h)  # cold
        T = want.T
        for guess in (T, T + float(rng.normal(0.0, 0.3)), T + 40.0, prev_T, math.nan, 5000.0):
            _agree(w.ph(p, h, T_guess=guess), want, kind, p, h)  # warm, good and bad guesses
        prev_T = T
    assert min(kinds.values()) >= 30, kinds


def test_fast_ps_equals_the_straightforward_evaluation(waters):
    # the same states by (p, s): h_ps and ps, cold and warm-started, against reference_ps
    w, ref_w = waters
    n = 0
    for kind, p, h, _ in _states(ref_w):
        s = ref_w.ph(p, h).s
        want = reference_ps(ref_w, p, s)
        for guess in (None, want.T, want.T + 0.2, want.T - 40.0, math.nan):
            got = w.ps(p, s) if guess is None else w.ps(p, s, T_guess=guess)
            h_only = w.h_ps(p, s) if guess is None else w.h_ps(p, s, T_guess=guess)
            assert got.two_phase == want.two_phase, (kind, p, s)
            assert h_only == pytest.approx(want.h, rel=1e-9, abs=1e-4), (kind, p, s)
            # h ~ 0 at the triple point, x ~ 0 on the line: absolute floors 1e-4 J/kg and 1e-11
            # (1e-11 h_fg is what ~1e-9 K of T makes, inside the refinement tolerance)
            for name, floor in (("h", 1e-4), ("T", 0.0), ("v", 0.0), ("x", 1e-11), ("dh_dp", 0.0), ("dh_ds", 0.0)):
                a, b = getattr(got, name), getattr(want, name)
                assert (math.isnan(a) and math.isnan(b)) or a == pytest.approx(b, rel=1e-9, abs=floor), (kind, p, s, name)
        n += 1
    assert n == N_STATES


def test_warm_started_temperature_matches_iapws(waters):
    # IAPWS97(P, T): iapws' forward equations; h from them, T back from twin's warm path
    w, _ = waters
    rng = np.random.default_rng(11)
    n = 0
    for kind, p, _, T in _states(w):
        if T != T or kind in ("region 1/3", "region 2/3", "above P_CRIT"):
            continue  # region 3: CoolProp and iapws take different routes (tests/test_properties.py)
        ref = IAPWS97(P=p / MPa, T=T)
        if ref.region not in (1, 2):
            continue
        st = w.ph(p, ref.h * kJ, T_guess=T + float(rng.normal(0.0, 0.5)))
        assert pytest.approx(T, rel=1e-11) == st.T
        assert st.v == pytest.approx(ref.v, rel=1e-9)
        assert st.s == pytest.approx(ref.s * kJ, rel=1e-9, abs=1e-9)
        n += 1
    assert n > 400


def test_line_table_decides_a_phase_only_where_the_exact_test_agrees(waters):
    # brute force: the exact equivalent quality from the saturation line at p
    w, _ = waters
    rng = np.random.default_rng(3)
    decided = outside = 0
    for _ in range(3000):
        p = float(np.exp(rng.uniform(math.log(P_TRIPLE), math.log(P_CRIT))))
        by_s = bool(rng.integers(2))
        ff, fg = (w.s_f(p), w.s_g(p)) if by_s else (w.h_f(p), w.h_g(p))
        base = ff if rng.integers(2) else fg
        f = base + (fg - ff) * float(rng.choice([-1.0, 1.0])) * float(10.0 ** rng.uniform(-10.0, 0.0))
        side = line_side(p, f, by_s)
        x = (f - ff) / (fg - ff)
        if side == _LIQ:
            assert x < -X_SATURATED, (p, f, by_s, x)
        elif side == _VAP:
            assert x > 1.0 + X_SATURATED, (p, f, by_s, x)
        if abs(x - 0.5) > 0.5 + 1e-3:
            outside += 1
            decided += side >= 0
    assert outside > 300 and decided >= 0.9 * outside  # it decides states 0.1 % of h_fg off the lines
    for p in (P_TRIPLE * 0.5, P_CRIT, P_CRIT * (1 - 1e-6), 30e6, math.nan):
        assert line_side(p, 1e6, False) == -1


def test_saturation_cache_gives_the_fresh_numbers(waters):
    # the same pressure asked for again (wet stream, isentropic end state, condenser line):
    # a Water whose saturation cache holds p gives what fresh Waters give, every field
    w, _ = waters
    rng = np.random.default_rng(5)
    pressures = [float(np.exp(rng.uniform(math.log(3e3), math.log(20e6)))) for _ in range(30)]
    for i in range(600):
        p = pressures[i % 30]
        x = float(rng.uniform(-1e-3, 1.0 + 1e-3))
        hf, hg, sf, sg = w.h_f(p), w.h_g(p), w.s_f(p), w.s_g(p)
        assert w.sat(p) == Water().sat(p)
        assert w.ph(p, hf + x * (hg - hf)) == reference_ph(Water(), p, hf + x * (hg - hf))
        assert w.ps(p, sf + x * (sg - sf)) == reference_ps(Water(), p, sf + x * (sg - sf))
