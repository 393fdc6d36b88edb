"""The fast plant evaluation gives the same numbers as the straightforward one.

Reference: the evaluation as it was written before the speed work (kept here):
every residual from a fresh evaluation context per part (flowsheet, sensors), the
Jacobian assembled from coordinate triplets by ``scipy.sparse`` (repeated entries
summed) with no structure kept between calls. The fast path shares one context
and reuses a fixed CSR structure; both must agree to 1e-9 relative on random
demo-u1 states (wet, superheated and near-saturated streams alike).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp

from tests.model_helpers import demo_config, demo_design
from twin.bench.reconcile_profile import straightforward_evaluation
from twin.performance.plant import PlantSystem

REL = 1e-9


@pytest.fixture(scope="module")
def system() -> PlantSystem:
    fs, _, design = demo_design()
    return PlantSystem(fs, demo_config().sensors, design)


def reference_evaluation(ps: PlantSystem, z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Residuals and dense Jacobian, the straightforward way (independent contexts, COO assembly)."""
    f, J = straightforward_evaluation(ps, z)
    return f, J.toarray()


def random_states(ps: PlantSystem, n: int, seed: int) -> list[np.ndarray]:
    """Random demo-u1 states around the design point (flows ±5 %, pressures ±2 %, enthalpies ±8 kJ/kg)."""
    rng = np.random.default_rng(seed)
    z0 = ps.initial_point(ps.design.z)
    n_s = len(ps.fs.layout.streams)
    out = []
    for _ in range(n):
        z = z0 * (1.0 + 0.02 * rng.uniform(-1, 1, z0.size))
        m = 3 * np.arange(n_s)
        z[m] = z0[m] * (1.0 + 0.05 * rng.uniform(-1, 1, n_s))
        z[m + 2] = z0[m + 2] + 8000.0 * rng.uniform(-1, 1, n_s)
        out.append(z)
    return out


def _compare(ps: PlantSystem, states: list[np.ndarray]) -> int:
    compared = 0
    for z in states:
        try:
            f_ref, J_ref = reference_evaluation(ps, z)
        except ValueError:  # outside the property range: the fast path must refuse too
            with pytest.raises(ValueError):
                ps.residuals(z)
            continue
        f = ps.residuals(z)
        J = ps.jacobian(z)
        assert isinstance(J, sp.csr_matrix) and J.has_canonical_format
        Jd = J.toarray()
        np.testing.assert_allclose(f, f_ref, rtol=REL, atol=REL * np.max(np.abs(f_ref)))
        # entries relative to themselves, tiny ones relative to their row's largest entry
        row_scale = np.max(np.abs(J_ref), axis=1, keepdims=True)
        assert np.all(np.abs(Jd - J_ref) <= REL * np.maximum(np.abs(J_ref), 1e-6 * row_scale))
        assert np.array_equal(Jd != 0, J_ref != 0)
        compared += 1
    return compared


def test_fast_evaluation_matches_reference(system):
    # the same structure is reused across calls; states spread wide enough to cross phase lines
    assert _compare(system, random_states(system, 60, seed=11)) >= 50


@pytest.mark.slow
def test_fast_evaluation_matches_reference_1000_states(system):
    assert _compare(system, random_states(system, 1000, seed=12)) >= 900


def test_kpi_uncertainty_matches_straightforward_differences():
    """KPIs ± U on a reconciled window agree with central differences over fresh contexts.

    Reference: every KPI evaluated at ``z ± step·e_c`` with a fresh context per evaluation
    (every property state recomputed), step 1e-6 relative, propagated through the same
    covariance. The fast path shares contexts and extends the moved stream's state to first
    order by its analytic derivatives, so the two agree to the difference-quotient error.
    """
    from twin.performance.plant_reconcile import PlantReconciler

    fs, _, design = demo_design()
    pr = PlantReconciler(demo_config(), flowsheet=fs, design=design, max_eliminations=0)
    z0 = pr.system.initial_point(design.z)
    rng = np.random.default_rng(5)
    values = {}
    for b in pr.system.sensors:
        v = float(z0[b.column])
        values[b.tag] = v + pr.sigma(b.tag, v) * rng.standard_normal()
    rec = pr.reconcile(values)
    assert rec.converged, rec.message
    constants = pr.system.constants
    checked = 0
    for d in pr.kpi_defs:
        cols = list(d.columns)
        if not all(np.isfinite(rec.z[c]) for c in cols):
            assert not rec.kpis[d.name].available
            continue
        value = d.func(fs.context(rec.z, constants))
        grad = np.zeros(len(cols))
        for k, c in enumerate(cols):
            step = 1e-6 * max(abs(rec.z[c]), 1.0)
            zp, zm = rec.z.copy(), rec.z.copy()
            zp[c] += step
            zm[c] -= step
            grad[k] = (d.func(fs.context(zp, constants)) - d.func(fs.context(zm, constants))) / (2 * step)
        u = 1.96 * np.sqrt(max(float(grad @ rec.cov[np.ix_(cols, cols)] @ grad), 0.0))
        got = rec.kpis[d.name]
        assert got.available
        assert got.value == pytest.approx(value, rel=1e-12, abs=1e-12)
        assert got.uncertainty == pytest.approx(u, rel=1e-6, abs=1e-12), d.name
        checked += 1
    assert checked >= 30


def test_kept_evaluations_answer_as_a_fresh_evaluation(system):
    """The last few evaluations kept by z: a point asked again (after others) gives what the
    straightforward evaluation gives there, and a point nudged by one ulp is evaluated anew."""
    from twin.performance.plant import EVALUATIONS_KEPT

    states = random_states(system, EVALUATIONS_KEPT + 2, seed=21)
    for z in states:
        system.residuals(z)
    for z in [*states[-EVALUATIONS_KEPT:], states[0]]:  # kept ones, then one pushed out
        f, J = system.residuals(z), system.jacobian(z).toarray()
        f_ref, J_ref = reference_evaluation(system, z)
        np.testing.assert_allclose(f, f_ref, rtol=REL, atol=REL * np.abs(f_ref).max())
        np.testing.assert_allclose(J, J_ref, rtol=REL, atol=REL * np.abs(J_ref).max())
    z = states[-1].copy()
    z[0] = np.nextafter(z[0], np.inf)
    assert system.residuals(z) is not system.residuals(states[-1])
