"""Linear reconciliation against published worked examples and exact identities."""

from __future__ import annotations

from statistics import NormalDist

import numpy as np
import pytest
import scipy.linalg as sla

from twin.reconcile import (
    InconsistentConstraintsError,
    classify,
    global_test,
    measurement_test,
    reconcile_linear,
)

# Heat exchanger with bypass: F1 − F2 − F3 = 0, F2 − F4 = 0, F3 − F5 = 0, F4 + F5 − F6 = 0.
NETWORK = np.array(
    [
        [1, -1, -1, 0, 0, 0],
        [0, 1, 0, -1, 0, 0],
        [0, 0, 1, 0, -1, 0],
        [0, 0, 0, 1, 1, -1],
    ],
    dtype=float,
)
NJ_Y = np.array([101.91, 64.45, 34.65, 64.20, 36.44, 98.88])


def test_heat_exchanger_bypass_matches_narasimhan_jordache_ch1():
    r = reconcile_linear(NETWORK, NJ_Y, np.ones(6))
    # Narasimhan & Jordache, Data Reconciliation and Gross Error Detection (2000), ch. 1
    expected = [100.22, 64.50, 35.72, 64.50, 35.72, 100.22]
    np.testing.assert_allclose(r.x_hat, expected, atol=0.005)
    assert r.dof == 4
    # same source: the global test passes at 95 %, yet |z1| ≈ 2.07 > 1.96
    assert global_test(r.gamma, r.dof, 0.05).passed
    assert r.z[0] == pytest.approx(2.07, abs=0.005)
    mt = measurement_test(r.z, alpha=0.05)
    assert mt.flagged_vdi[0] and mt.flagged_vdi.sum() == 1  # VDI 2048: |z| > 1.96
    # Šidák (1967) over 6 redundant measurements: β = 1 − 0.95^(1/6), z_c = Φ⁻¹(1 − β/2)
    # (evaluated with the standard library's NormalDist, ≈ 2.63 > 2.07)
    assert mt.n_tested == 6
    beta = 1 - 0.95 ** (1 / 6)
    assert mt.critical_sidak == pytest.approx(NormalDist().inv_cdf(1 - beta / 2), rel=1e-9)
    assert not mt.flagged_sidak.any()


def test_projection_example_matches_ncsu_ottawa_module_ch3():
    A = NETWORK[:, [0, 2, 4]]
    B = NETWORK[:, [1, 3, 5]]
    sigma = np.array([0.82, 0.46, 0.45])
    r = reconcile_linear(A, [110.5, 35.0, 38.6], sigma**2, B)
    # "Basic Concepts in Data Reconciliation", NC State / U. Ottawa module (2003), ch. 3
    assert not r.redundant[0]
    assert r.x_hat[0] == 110.5  # non-redundant: left exactly unchanged
    assert np.isnan(r.z[0])  # and no test statistic
    assert r.redundancy[0] == 0.0
    np.testing.assert_allclose(r.x_hat[1:], [36.84, 36.84], atol=0.005)
    assert r.observable.all()
    np.testing.assert_allclose(r.u_hat, [73.66, 73.66, 110.5], atol=0.005)  # F2, F4, F6
    assert r.dof == 1


def test_only_f1_and_f6_measured_leaves_f2_to_f5_unobservable():
    # NC State / U. Ottawa module (2003), ch. 3: with only F1 and F6 measured
    cls = classify(NETWORK, [0, 5])
    assert not cls.observable.any()  # F2..F5
    assert cls.redundant.all() and cls.dof == 1
    r = reconcile_linear(NETWORK[:, [0, 5]], [110.5, 109.0], [1.0, 1.0], NETWORK[:, 1:5])
    assert np.isnan(r.u_hat).all()
    assert np.isnan(r.cov_u).all() and np.isnan(r.cov_xu).all()


def _random_problem(seed, correlated):
    rng = np.random.default_rng(seed)
    m, n, p = 7, 12, 4
    A = rng.normal(size=(m, n))
    B = rng.normal(size=(m, p))
    c = rng.normal(size=m)
    if correlated:
        L = np.tril(rng.normal(size=(n, n))) * 0.3 + np.eye(n)
        V = L @ L.T
    else:
        V = np.diag(rng.uniform(0.5, 2.0, n))
    y = rng.normal(size=n) * 3
    return A, B, c, V, y


@pytest.mark.parametrize("correlated", [False, True])
def test_identities_covariance_split_and_global_statistic(correlated):
    A, B, c, V, y = _random_problem(11, correlated)
    r = reconcile_linear(A, y, V, B, c)
    # exact identity (Narasimhan & Jordache 2000, ch. 3): Cov(y) = Cov(x̂) + Cov(a)
    np.testing.assert_allclose(r.cov_x + r.cov_a, V, atol=1e-12)
    # projection computed independently (SVD null space instead of pivoted QR)
    P = sla.null_space(B.T).T
    Ap, cp = P @ A, P @ c
    rr = Ap @ y - cp
    S = Ap @ V @ Ap.T
    gamma_r = float(rr @ np.linalg.solve(S, rr))
    gamma_a = float(r.adjustments @ np.linalg.solve(V, r.adjustments))
    # γ = rᵀS⁻¹r = aᵀV⁻¹a (identity of the WLS solution, DOMAIN §4 closed form)
    assert r.gamma == pytest.approx(gamma_r, rel=1e-10)
    assert r.gamma == pytest.approx(gamma_a, rel=1e-10)
    x_closed = y - V @ Ap.T @ np.linalg.solve(S, rr)
    np.testing.assert_allclose(r.x_hat, x_closed, atol=1e-10)
    cov_closed = V - V @ Ap.T @ np.linalg.solve(S, Ap @ V)
    np.testing.assert_allclose(r.cov_x, cov_closed, atol=1e-10)
    # reconciled values satisfy the constraints with the estimated unmeasured ones
    np.testing.assert_allclose(A @ r.x_hat + B @ r.u_hat, c, atol=1e-10)
    assert r.dof == A.shape[0] - B.shape[1]


def test_no_unmeasured_closed_form_and_redundancy_definition():
    V = np.diag([1.0, 4.0, 0.25, 1.0, 2.0, 1.0])
    r = reconcile_linear(NETWORK, NJ_Y, V)
    S = NETWORK @ V @ NETWORK.T
    res = NETWORK @ NJ_Y
    # DOMAIN §4 closed form x̂ = y − V Aᵀ (A V Aᵀ)⁻¹ (A y − c)
    np.testing.assert_allclose(r.x_hat, NJ_Y - V @ NETWORK.T @ np.linalg.solve(S, res), atol=1e-10)
    np.testing.assert_allclose(r.redundancy, 1 - np.diag(r.cov_x) / np.diag(V), atol=1e-12)
    assert r.gamma == pytest.approx(float(res @ np.linalg.solve(S, res)), rel=1e-12)


def test_zero_rows_are_harmless_but_contradictions_raise():
    A = np.vstack([NETWORK, np.zeros(6)])
    r0 = reconcile_linear(NETWORK, NJ_Y, np.ones(6))
    r1 = reconcile_linear(A, NJ_Y, np.ones(6))
    np.testing.assert_allclose(r1.x_hat, r0.x_hat, atol=1e-12)
    assert r1.dof == r0.dof
    with pytest.raises(InconsistentConstraintsError, match="inconsistent"):
        reconcile_linear(A, NJ_Y, np.ones(6), c=[0, 0, 0, 0, 1.0])
    # a duplicated balance does not add a degree of freedom
    r2 = reconcile_linear(np.vstack([NETWORK, NETWORK[:1]]), NJ_Y, np.ones(6))
    assert r2.dof == 4


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"y": [np.nan, 64.45, 34.65, 64.20, 36.44, 98.88]}, r"non-finite values at indices \[0\]"),
        ({"V": np.diag([1, 1, 0, 1, 1, 1.0])}, "singular"),
        ({"V": np.ones((6, 6))}, "not positive definite|singular"),
        ({"y": NJ_Y[:5]}, "y has shape"),
        ({"A": np.zeros((4, 0)), "y": [], "V": np.zeros((0, 0))}, "no measurements"),
    ],
)
def test_bad_input_raises_clear_value_error(kwargs, match):
    args = {"A": NETWORK, "y": NJ_Y, "V": np.ones(6)} | kwargs
    with pytest.raises(ValueError, match=match):
        reconcile_linear(args["A"], args["y"], args["V"])


def test_precomputed_classification_is_reported():
    A, B = NETWORK[:, [0, 2, 4]], NETWORK[:, [1, 3, 5]]
    cls = classify(np.hstack([A, B]), [0, 1, 2], sigma=[0.82, 0.46, 0.45])
    r = reconcile_linear(A, [110.5, 35.0, 38.6], np.array([0.82, 0.46, 0.45]) ** 2, B,
                         classification=cls)
    assert r.classification is cls
    np.testing.assert_array_equal(r.redundant, [False, True, True])
