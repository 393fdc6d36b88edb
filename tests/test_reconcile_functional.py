"""Covariance of linear functionals ``G z`` from the final factorisation, and the "diagonal" mode.

References beside each check:
- ``G · cov_z · Gᵀ`` from the full linearised covariance of the same solve (the product
  the functional covariance replaces), to 1e-10 relative, on demo-u1 and on synthetic
  linear and bilinear networks;
- the dense closed form :func:`twin.reconcile.reconcile_linear` (pivoted-QR projection,
  an independent implementation) on a linear network;
- Monte Carlo truth: the sample covariance of ``G ẑ`` over noisy draws of a linear
  network (exact linear estimator) and of the bilinear mixer-splitter.
"""

from __future__ import annotations

import pickle

import numpy as np
import pytest
import scipy.sparse as sp

from tests.model_helpers import demo_config, demo_design
from twin.performance.plant import PlantSystem
from twin.reconcile import (
    SolveOptions,
    eliminate_suspects,
    reconcile,
    reconcile_linear,
    synthetic_network,
)

from .test_reconcile_nonlinear import MEASURED, SIGMA, Z0, MixerSplitter, Y


def _demo():
    fs, _, design = demo_design()
    cfg = demo_config()
    ps = PlantSystem(fs, cfg.sensors, design)
    z0 = ps.initial_point(design.z)
    measured = np.array([b.column for b in ps.sensors] + [r.column for r in ps.soft])
    sigma = np.array([cfg.sensors_by_tag[b.tag].sigma_si(float(z0[b.column])) for b in ps.sensors]
                     + [r.sigma for r in ps.soft])
    y = z0[measured].copy()
    y[len(ps.sensors):] = 0.0
    rng = np.random.default_rng(11)
    return ps, z0, measured, y + sigma * rng.standard_normal(sigma.size), sigma**2


def _synthetic(kind):
    net = synthetic_network(300, seed=2, kind=kind)
    return net.system, net.z0, net.measured, net.y, np.diag(net.V)


def _functionals(r, n_vars, rng, k=20, density=1.0):
    """``k`` random rows over the determined variables (KPI-like gradients), a few unit rows."""
    determined = np.ones(n_vars, bool)
    determined[r.unmeasured[~r.observable]] = False
    G = rng.standard_normal((k, n_vars)) * determined * (rng.random((k, n_vars)) < density)
    G /= np.maximum(np.abs(r.z_warm), 1.0)
    G[0] = 0.0
    G[0, r.measured[0]] = 1.0
    G[1] = 0.0
    G[1, r.unmeasured[r.observable][0]] = 1.0
    return G


def _assert_close(C, ref, rtol):
    d = np.sqrt(np.abs(np.diag(ref)))
    np.testing.assert_array_less(np.abs(C - ref), rtol * np.outer(d, d) + 1e-300)


@pytest.mark.parametrize("make", [_demo, lambda: _synthetic("linear"), lambda: _synthetic("bilinear")],
                         ids=["demo-u1", "linear", "bilinear"])
def test_functional_covariance_equals_the_full_product(make):
    system, z0, measured, y, V = make()
    r = reconcile(system, z0, measured, y, V)
    assert r.converged, r.message
    rng = np.random.default_rng(5)
    G = _functionals(r, system.n_vars, rng, density=1.0 if system.n_vars < 400 else 0.1)
    ref = G @ np.nan_to_num(r.cov_z) @ G.T  # reference: the full linearised covariance
    _assert_close(r.functional_covariance(G), ref, 1e-10)
    _assert_close(r.functional_covariance(sp.csr_matrix(G)), ref, 1e-10)
    R = r.functional_gain(G)
    _assert_close(R @ R.T, ref, 1e-5)  # gain·gainᵀ = cov (projector identity, to the ε regularisation)
    np.testing.assert_allclose(R, G @ r.gain, rtol=0, atol=1e-9 * np.max(np.abs(R)))
    # the cheap mode: same measured variances and tests, same functionals
    d = reconcile(system, z0, measured, y, V, options=SolveOptions(covariance="diagonal"))
    assert d.converged
    np.testing.assert_allclose(d.var_x, np.diag(r.cov_z)[measured], rtol=1e-10)
    np.testing.assert_allclose(d.var_a, np.diag(r.cov_a), rtol=1e-9, atol=1e-12 * np.max(V))
    np.testing.assert_allclose(d.z, r.z, rtol=1e-9, atol=1e-12, equal_nan=True)
    np.testing.assert_allclose(d.redundancy, r.redundancy, rtol=1e-9, atol=1e-12, equal_nan=True)
    _assert_close(d.functional_covariance(G), ref, 1e-10)
    assert np.isnan(d.cov_z[0, 0]) and np.isnan(d.cov_a[0, 0])


def test_unobservable_functionals_are_nan_and_pickled_results_still_answer():
    net = synthetic_network(200, seed=4, kind="linear")
    r = reconcile(net.system, net.z0, net.measured, net.y, np.diag(net.V))
    assert r.converged and not r.observable.all()
    G = np.zeros((3, net.system.n_vars))
    G[0, r.measured[0]] = 1.0
    G[1, r.unmeasured[~r.observable][0]] = 1.0
    G[2, r.measured[1]] = 1.0
    C = r.functional_covariance(G)
    assert np.isnan(C[1]).all() and np.isnan(C[:, 1]).all()
    np.testing.assert_allclose(C[np.ix_([0, 2], [0, 2])],
                               r.cov_z[np.ix_(r.measured[:2], r.measured[:2])], rtol=1e-10)
    again = pickle.loads(pickle.dumps(r))
    np.testing.assert_array_equal(again.functional_covariance(G), C)
    # a "none" solve factors its final system on the first request, also after pickling
    none = reconcile(net.system, net.z0, net.measured, net.y, np.diag(net.V), options=SolveOptions(covariance="none"))
    assert np.isnan(none.var_x).all()
    for res in (none, pickle.loads(pickle.dumps(none))):
        np.testing.assert_allclose(res.functional_covariance(G), C, rtol=1e-9, equal_nan=True)


def test_functional_covariance_matches_the_dense_closed_form():
    net = synthetic_network(150, seed=6, kind="linear")
    J = net.system.J
    M, U = net.measured, np.setdiff1d(np.arange(J.shape[1]), net.measured)
    lin = reconcile_linear(J[:, M], net.y, net.V, J[:, U], net.system.c)
    r = reconcile(net.system, net.z0, M, net.y, np.diag(net.V), options=SolveOptions(covariance="diagonal"))
    assert r.converged
    rng = np.random.default_rng(8)
    G = _functionals(r, J.shape[1], rng)
    GM, GU = G[:, M], G[:, U]
    ok = lin.observable
    cov_u = np.nan_to_num(lin.cov_u)
    cov_xu = np.nan_to_num(lin.cov_xu)
    assert np.array_equal(ok, r.observable)
    # reference: dense pivoted-QR projection (twin.reconcile.linear), an independent path
    ref = GM @ lin.cov_x @ GM.T + GM @ cov_xu @ GU.T + GU @ cov_xu.T @ GM.T + GU @ cov_u @ GU.T
    # (to 1e-6 of σ_i σ_j: the sparse factorisation carries a 1e-11 regularisation of dependent rows)
    _assert_close(r.functional_covariance(G), ref, 1e-6)
    np.testing.assert_allclose(r.var_x, np.diag(lin.cov_x), rtol=1e-6)


def _mc_check(samples, C, n_se=4.5):
    """Sample covariance within ``n_se`` standard errors of ``C`` entry by entry.

    Monte Carlo truth; standard error of a Gaussian sample covariance from the Wishart
    moments, Var(s_ij) = (σ_ij² + σ_ii σ_jj)/(N − 1) (from memory).
    """
    N = samples.shape[0]
    S = np.cov(samples, rowvar=False)
    d = np.diag(C)
    se = np.sqrt((C**2 + np.outer(d, d)) / (N - 1))
    np.testing.assert_array_less(np.abs(S - C), n_se * se)


def test_monte_carlo_truth_of_functionals_on_a_linear_network():
    net = synthetic_network(100, seed=9, kind="linear")
    V = np.diag(net.V)
    y_true = net.z_true[net.measured]
    ref = reconcile(net.system, net.z_true, net.measured, y_true, V, options=SolveOptions(covariance="diagonal"))
    rng = np.random.default_rng(3)
    G = _functionals(ref, net.system.n_vars, rng, k=6)
    C = ref.functional_covariance(G)
    N = 1500
    out = np.empty((N, G.shape[0]))
    for k in range(N):
        y = y_true + np.sqrt(V) * rng.standard_normal(V.size)
        r = reconcile(net.system, net.z_true, net.measured, y, V, classification=ref.classification,
                      options=SolveOptions(covariance="none"))
        assert r.converged
        out[k] = G @ r.z_warm
    _mc_check(out, C)


@pytest.mark.slow
def test_monte_carlo_truth_of_functionals_on_the_bilinear_mixer_splitter():
    system = MixerSplitter()
    z_true = reconcile(system, Z0, MEASURED, Y, SIGMA**2).z_hat  # a consistent state
    y_true = z_true[MEASURED]
    lin = reconcile(system, z_true, MEASURED, y_true, SIGMA**2, options=SolveOptions(covariance="diagonal"))
    rng = np.random.default_rng(13)
    G = rng.standard_normal((5, system.n_vars)) / np.maximum(np.abs(z_true), 1.0)
    C = lin.functional_covariance(G)
    N = 1000
    out = np.empty((N, G.shape[0]))
    for k in range(N):
        y = y_true + SIGMA * rng.standard_normal(SIGMA.size)
        r = reconcile(system, z_true, MEASURED, y, SIGMA**2, options=SolveOptions(covariance="none"))
        assert r.converged
        out[k] = G @ r.z_hat
    _mc_check(out, C, n_se=5.0)  # linearisation error is small at σ of ~1 %


def test_elimination_in_the_diagonal_mode_matches_the_full_one():
    net = synthetic_network(120, seed=1, kind="linear")
    y = net.y.copy()
    y[5] += 12.0 * np.sqrt(net.V[5, 5])  # a gross error
    runs = [eliminate_suspects(net.system, net.z0, net.measured, y, net.V,
                               options=SolveOptions(covariance=mode)) for mode in ("full", "diagonal")]
    full, diag = runs
    assert [e.position for e in full.eliminated] == [e.position for e in diag.eliminated]
    assert full.eliminated
    for a, b in zip(full.eliminated, diag.eliminated, strict=True):
        assert b.bias == pytest.approx(a.bias, rel=1e-9)
        assert b.re_estimate_sigma == pytest.approx(a.re_estimate_sigma, rel=1e-9)


def test_blocked_many_column_solves_equal_one_wide_solve():
    """Reference: the straightforward solve of all n unit columns at once (column solves are independent)."""
    from twin.reconcile import kkt

    net = synthetic_network(400, seed=3, kind="bilinear")
    J = sp.csr_matrix(net.system.jacobian(net.z0))
    M = np.asarray(net.measured)
    U = np.setdiff1d(np.arange(J.shape[1]), M)
    vs = np.maximum(np.abs(net.z0), 1.0)
    K = kkt.ScaledKKT(J, M, U, np.sqrt(np.diag(net.V)), True, vs[U], np.ones(J.shape[0]))
    assert K.n > 2 * kkt.SOLVE_CHUNK
    rhs = np.zeros((K.n + K.p + K.m, K.n))
    rhs[: K.n] = np.eye(K.n)
    wide = K.solve(rhs, sweeps=1)
    X, Uu = K.sensitivities()
    # identical here; 1e-12 leaves room for a BLAS that blocks by the number of columns
    scale = np.max(np.abs(wide))
    np.testing.assert_allclose(X, wide[: K.n], rtol=0, atol=1e-12 * scale)
    np.testing.assert_allclose(Uu, wide[K.n: K.n + K.p], rtol=0, atol=1e-12 * scale)
    from twin.reconcile.covariance import measured_variances

    sig = np.sqrt(np.diag(net.V))
    np.testing.assert_allclose(measured_variances(K, sig, True), sig**2 * np.diag(wide[: K.n]), rtol=1e-12)


def test_elimination_given_the_first_solve_finds_what_it_finds_from_scratch():
    """Truth: the gross error injected at one measurement (12 σ); a caller's own first
    solve handed in as ``first`` must give the same eliminations as solving it again."""
    net = synthetic_network(120, seed=1, kind="linear")
    y = net.y.copy()
    y[5] += 12.0 * np.sqrt(net.V[5, 5])
    opts = SolveOptions(covariance="full")
    first = reconcile(net.system, net.z0, net.measured, y, net.V, options=opts)
    assert first.converged
    scratch = eliminate_suspects(net.system, first.z_warm, net.measured, y, net.V, options=opts)
    given = eliminate_suspects(net.system, first.z_warm, net.measured, y, net.V, options=opts, first=first)
    assert [e.position for e in given.eliminated] == [e.position for e in scratch.eliminated]
    assert given.eliminated and given.eliminated[0].position == 5  # the injected error goes first
    for a, b in zip(scratch.eliminated, given.eliminated, strict=True):
        assert b.bias == pytest.approx(a.bias, rel=1e-6)
        assert b.re_estimate == pytest.approx(a.re_estimate, rel=1e-9)


def test_elimination_from_the_previous_window_with_cached_classifications_finds_the_same():
    """Truth: the gross error injected at one measurement (12 σ) in two successive windows.

    The second window's elimination started from the first window's reduced-set
    solution (``warm``), with a lazily computed restart and the classifications the
    first window cached, must eliminate what a from-scratch elimination eliminates,
    with the same estimates (solver tolerance) and without calling the restart.
    """
    net = synthetic_network(120, seed=1, kind="linear")
    rng = np.random.default_rng(4)
    sig = np.sqrt(np.diag(net.V))
    opts = SolveOptions(covariance="full")
    cache: dict = {}
    windows = []
    for _ in range(2):
        y = net.y + 0.3 * sig * rng.standard_normal(sig.size)
        y[5] += 12.0 * sig[5]
        windows.append(y)
    first = eliminate_suspects(net.system, net.z0, net.measured, windows[0], net.V, options=opts,
                               classifications=cache)
    assert first.eliminated and first.eliminated[0].position == 5
    assert any(k[0] == "trial" for k in cache) and any(k and k[0] != "trial" for k in cache)
    calls = []

    def restart():
        calls.append(1)
        return net.z0

    scratch = eliminate_suspects(net.system, net.z0, net.measured, windows[1], net.V, options=opts)
    warm = eliminate_suspects(net.system, net.z0, net.measured, windows[1], net.V, options=opts,
                              warm=first.result.z_warm, restart=restart, classifications=cache)
    assert [e.position for e in warm.eliminated] == [e.position for e in scratch.eliminated]
    assert warm.eliminated[0].position == 5 and not calls  # the warm start served: no restart solved
    for a, b in zip(scratch.eliminated, warm.eliminated, strict=True):
        assert b.re_estimate == pytest.approx(a.re_estimate, rel=1e-7)
        assert b.re_estimate_sigma == pytest.approx(a.re_estimate_sigma, rel=1e-6)
    np.testing.assert_allclose(warm.result.z_hat, scratch.result.z_hat, rtol=1e-7, atol=1e-9)
