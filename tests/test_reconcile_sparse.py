"""Sparse KKT solver: same numbers as the dense projection, published examples, Monte Carlo
covariance, convergence and covariance options."""

from __future__ import annotations

import numpy as np
import pytest

from twin.reconcile import LinearSystem, SolveOptions, classify, reconcile, synthetic_network
from twin.reconcile.synthetic import BilinearNetwork

from .test_reconcile_nonlinear import MEASURED, SIGMA, Z0, MixerSplitter, Y

# Heat exchanger with bypass (Narasimhan & Jordache 2000, ch. 1)
NETWORK = np.array(
    [[1, -1, -1, 0, 0, 0], [0, 1, 0, -1, 0, 0], [0, 0, 1, 0, -1, 0], [0, 0, 0, 1, 1, -1]],
    dtype=float,
)
NJ_Y = np.array([101.91, 64.45, 34.65, 64.20, 36.44, 98.88])


def _both(system, z0, measured, y, V, **kw):
    out = []
    for method in ("dense", "sparse"):
        r = reconcile(system, z0, measured, y, V, options=SolveOptions(method=method, **kw))
        assert r.converged, (method, r.message)
        out.append(r)
    return out


def _assert_same(d, s, sd_floor=1e-12):
    """Sparse equals dense to 1e-6 σ in estimates and 1e-5 of σ_i σ_j in covariances
    (the sparse factorisation carries a 1e-11 regularisation of dependent rows)."""
    np.testing.assert_array_equal(d.redundant, s.redundant)
    np.testing.assert_array_equal(d.observable, s.observable)
    assert d.dof == s.dof
    sd = np.sqrt(np.abs(np.diag(np.nan_to_num(d.cov_z)))) + sd_floor
    ok = np.isfinite(d.z_hat)
    np.testing.assert_array_equal(ok, np.isfinite(s.z_hat))
    np.testing.assert_array_less(np.abs(d.z_hat - s.z_hat)[ok], 1e-6 * sd[ok] + 1e-9 * np.abs(d.z_hat[ok]))
    np.testing.assert_array_equal(np.isnan(d.cov_z), np.isnan(s.cov_z))
    fin = np.isfinite(d.cov_z)
    scale = np.outer(sd, sd)[fin]
    np.testing.assert_array_less(np.abs(d.cov_z - s.cov_z)[fin], 1e-5 * scale + 1e-14)
    assert s.gamma == pytest.approx(d.gamma, rel=1e-6, abs=1e-9)
    np.testing.assert_allclose(s.z, d.z, rtol=1e-6, atol=1e-8)


def test_sparse_matches_narasimhan_jordache_ch1_and_dense():
    d, s = _both(LinearSystem(NETWORK, np.zeros(4)), NJ_Y, np.arange(6), NJ_Y, np.ones(6))
    # Narasimhan & Jordache, Data Reconciliation and Gross Error Detection (2000), ch. 1
    np.testing.assert_allclose(s.x_hat, [100.22, 64.50, 35.72, 64.50, 35.72, 100.22], atol=0.005)
    assert s.dof == 4
    assert s.z[0] == pytest.approx(2.07, abs=0.005)  # same source: |z1| ≈ 2.07
    _assert_same(d, s)


def test_sparse_matches_ncsu_ottawa_projection_example_and_dense():
    sigma = np.array([0.82, 0.46, 0.45])
    d, s = _both(LinearSystem(NETWORK, np.zeros(4)), np.full(6, 50.0), [0, 2, 4],
                 [110.5, 35.0, 38.6], sigma**2)
    # "Basic Concepts in Data Reconciliation", NC State / U. Ottawa module (2003), ch. 3
    assert not s.redundant[0] and s.dof == 1
    assert s.x_hat[0] == pytest.approx(110.5, abs=1e-9)
    np.testing.assert_allclose(s.x_hat[1:], [36.84, 36.84], atol=0.005)
    np.testing.assert_allclose(s.z_hat[[1, 3, 5]], [73.66, 73.66, 110.5], atol=0.005)
    _assert_same(d, s)


def test_unobservable_get_no_step_and_match_dense():
    # same module, ch. 3: only F1 and F6 measured leaves F2..F5 unobservable
    z0 = np.full(6, 100.0)
    d, s = _both(LinearSystem(NETWORK, np.zeros(4)), z0, [0, 5], [110.5, 109.0], [1.0, 1.0])
    assert not s.observable.any()
    _assert_same(d, s)
    # minimum-norm steps: a consistent start leaves the unobservable values alone
    # (F2 + F3 and F4 + F5 move by the flow change only, split evenly)
    dz = s.z_warm - z0
    np.testing.assert_allclose(dz[1], dz[2], atol=1e-9)


def test_bilinear_mixer_splitter_sparse_equals_dense():
    d, s = _both(MixerSplitter(), Z0, MEASURED, Y, SIGMA**2)
    _assert_same(d, s)
    # identity Cov(y) = Cov(x̂) + Cov(a) (Narasimhan & Jordache 2000, ch. 3)
    np.testing.assert_allclose(s.cov_z[np.ix_(MEASURED, MEASURED)] + s.cov_a,
                               np.diag(SIGMA**2), atol=1e-12)


@pytest.mark.parametrize("kind", ["linear", "bilinear"])
def test_plant_size_synthetic_sparse_equals_dense(kind):
    net = synthetic_network(240, seed=5, kind=kind)
    d, s = _both(net.system, net.z0, net.measured, net.y, net.V)
    assert s.observable.sum() > 0 and (~s.redundant).sum() > 0  # a mixed classification
    _assert_same(d, s)


def test_synthetic_bilinear_jacobian_has_full_row_rank():
    net = synthetic_network(200, seed=3, kind="bilinear")
    assert isinstance(net.system, BilinearNetwork)
    J = net.system.jacobian(net.z_true).toarray()
    # identity: with h_out = h_in at single-inlet nodes no balance follows from the others
    assert np.linalg.matrix_rank(J) == J.shape[0]
    # and the true state satisfies them (exact by construction, to rounding)
    assert np.max(np.abs(net.system.residuals(net.z_true))) < 1e-12 * np.max(np.abs(net.z_true)) ** 2


def test_warm_start_at_the_solution_returns_in_one_iteration():
    r = reconcile(MixerSplitter(), Z0, MEASURED, Y, SIGMA**2)
    again = reconcile(MixerSplitter(), r.z_warm, MEASURED, Y, SIGMA**2,
                      classification=r.classification)
    assert again.iterations == 1 and again.converged
    assert again.classification is r.classification
    np.testing.assert_allclose(again.z_hat, r.z_hat, rtol=1e-12)


def test_covariance_options_drop_blocks_only():
    full = reconcile(MixerSplitter(), Z0, MEASURED, Y, SIGMA**2)
    meas = reconcile(MixerSplitter(), Z0, MEASURED, Y, SIGMA**2,
                     options=SolveOptions(covariance="measured"))
    none = reconcile(MixerSplitter(), Z0, MEASURED, Y, SIGMA**2,
                     options=SolveOptions(covariance="none"))
    mm = np.ix_(MEASURED, MEASURED)
    np.testing.assert_allclose(meas.cov_z[mm], full.cov_z[mm], rtol=1e-12)
    np.testing.assert_allclose(meas.z, full.z, rtol=1e-12)
    assert np.isnan(np.delete(meas.cov_z, MEASURED, axis=0)).all()
    assert np.isnan(none.cov_z).all() and np.isnan(none.cov_a).all() and np.isnan(none.z).all()
    assert none.gamma == pytest.approx(full.gamma, rel=1e-12) and none.dof == full.dof
    np.testing.assert_allclose(none.z_hat, full.z_hat, rtol=1e-12)


def test_precomputed_classification_matches_the_one_at_the_solution():
    r = reconcile(MixerSplitter(), Z0, MEASURED, Y, SIGMA**2)
    cls = classify(MixerSplitter().jacobian(r.z_warm), MEASURED, sigma=SIGMA)
    np.testing.assert_array_equal(cls.redundant, r.redundant)
    np.testing.assert_array_equal(cls.observable, r.observable)
    assert cls.dof == r.dof


@pytest.mark.slow
def test_monte_carlo_covariance_of_sparse_solution():
    system = MixerSplitter()
    ref = reconcile(system, Z0, MEASURED, Y, SIGMA**2)
    z_true = ref.z_hat  # a consistent state
    y_true = z_true[MEASURED]
    rng = np.random.default_rng(7)
    N = 800
    zs = np.empty((N, system.n_vars))
    warm = z_true
    for k in range(N):
        y = y_true + SIGMA * rng.standard_normal(SIGMA.size)
        r = reconcile(system, warm, MEASURED, y, SIGMA**2, options=SolveOptions(covariance="none"))
        assert r.converged
        zs[k] = r.z_hat
    lin = reconcile(system, z_true, MEASURED, y_true, SIGMA**2)
    # Monte Carlo truth: variances within 20 % (≈ 4 standard errors for N = 800)
    np.testing.assert_allclose(np.var(zs, axis=0, ddof=1), np.diag(lin.cov_z), rtol=0.2)


def test_bad_option_values_raise():
    with pytest.raises(ValueError, match="method must be one of"):
        SolveOptions(method="qr")
    with pytest.raises(ValueError, match="covariance must be one of"):
        SolveOptions(covariance="diag")
