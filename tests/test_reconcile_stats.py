"""Statistics: Monte Carlo truth for covariance, global test, measurement-test power, GLR;
derived uncertainty; serial elimination."""

from __future__ import annotations

from statistics import NormalDist

import numpy as np
import pytest

from twin.reconcile import (
    chi2_quantile,
    chi2_sf,
    derived_uncertainty,
    detection_power,
    eliminate_suspects_linear,
    global_test,
    glr_bias,
    minimum_detectable_bias,
    numerical_gradient,
    reconcile_linear,
    synthetic_network,
)

# Network of our own: 1: F1→F2+F3, 2: F2→F4+F5, 3: F3+F4→F6, 4: F5+F6→F7, 5: F7→F8+F9
NET = np.zeros((5, 9))
for row, (ins, outs) in enumerate([((0,), (1, 2)), ((1,), (3, 4)), ((2, 3), (5,)),
                                   ((4, 5), (6,)), ((6,), (7, 8))]):
    NET[row, list(ins)] = 1.0
    NET[row, list(outs)] = -1.0
UNMEASURED = [3, 7]  # F4, F8
MEAS = [i for i in range(9) if i not in UNMEASURED]
F_TRUE = np.array([100.0, 60.0, 40.0, 25.0, 35.0, 65.0, 100.0, 45.0, 55.0])
SIGMA = np.array([2.0, 1.5, 1.0, 1.0, 1.5, 2.0, 1.0])
A, B = NET[:, MEAS], NET[:, UNMEASURED]


@pytest.mark.slow
def test_monte_carlo_covariance_and_global_test_false_alarms():
    assert np.allclose(NET @ F_TRUE, 0.0)
    rng = np.random.default_rng(20240601)
    N = 6000
    xs = np.empty((N, len(MEAS)))
    us = np.empty((N, 2))
    rejected = 0
    for k in range(N):
        y = F_TRUE[MEAS] + SIGMA * rng.standard_normal(len(MEAS))
        r = reconcile_linear(A, y, SIGMA**2, B)
        xs[k], us[k] = r.x_hat, r.u_hat
        rejected += not global_test(r.gamma, r.dof, 0.05).passed
    ref = reconcile_linear(A, F_TRUE[MEAS], SIGMA**2, B)
    # Monte Carlo truth: empirical variances within 5 % of the analytic covariance
    emp = np.cov(xs.T)
    np.testing.assert_allclose(np.diag(emp), np.diag(ref.cov_x), rtol=0.05)
    emp_u = np.cov(us.T)
    np.testing.assert_allclose(np.diag(emp_u), np.diag(ref.cov_u), rtol=0.05)
    # and correlations within 0.05
    d = np.sqrt(np.diag(ref.cov_x))
    np.testing.assert_allclose(np.corrcoef(xs.T), ref.cov_x / np.outer(d, d), atol=0.05)
    # Monte Carlo truth: unbiased estimates
    assert np.all(np.abs(xs.mean(axis=0) - F_TRUE[MEAS]) < 4 * d / np.sqrt(N))
    # Monte Carlo truth: global test false-alarm rate 5 % ± 1.5 %
    assert abs(rejected / N - 0.05) < 0.015


@pytest.mark.slow
@pytest.mark.parametrize("k", [3.0, 5.0])
def test_monte_carlo_power_and_glr_bias(k):
    ref = reconcile_linear(A, F_TRUE[MEAS], SIGMA**2, B)
    j = int(np.argmax(ref.redundancy))  # most redundant measurement
    h = ref.redundancy[j]
    bias = k * SIGMA[j]
    rng = np.random.default_rng(7 + int(k))
    N = 2500
    hits = 0
    b_hat = np.empty(N)
    for n in range(N):
        y = F_TRUE[MEAS] + SIGMA * rng.standard_normal(len(MEAS))
        y[j] += bias
        r = reconcile_linear(A, y, SIGMA**2, B)
        hits += abs(r.z[j]) > 1.96
        b_hat[n] = glr_bias(r.adjustments, r.cov_a, SIGMA**2, r.redundant)[0][j]
    # Monte Carlo truth vs Φ(k√h − z_c) + Φ(−k√h − z_c) (DOMAIN §4), within ±5 points
    assert abs(hits / N - float(detection_power(k, h, 1.96))) < 0.05
    # Monte Carlo truth: the GLR bias estimate is unbiased (sd of b̂ is σ/√h)
    assert abs(b_hat.mean() - bias) < 4 * SIGMA[j] / np.sqrt(h) / np.sqrt(N)


def test_detection_power_and_minimum_detectable_bias():
    # textbook power of a two-sided z-test: at k = 0 the power is the size α (common practice)
    assert float(detection_power(0.0, 0.7, 1.96)) == pytest.approx(0.05, abs=5e-4)
    # MDB at 90 % with h = 1: z_c + Φ⁻¹(0.9) when the far tail is negligible (common practice)
    nd = NormalDist()
    assert minimum_detectable_bias(1.0, 1.96) == pytest.approx(1.96 + nd.inv_cdf(0.9), abs=1e-6)
    mdb = minimum_detectable_bias(np.array([0.25, 0.5, 0.0]), 2.5)
    assert float(detection_power(mdb[1], 0.5, 2.5)) == pytest.approx(0.9, abs=1e-9)
    assert mdb[0] == pytest.approx(2 * mdb[1] / np.sqrt(2))  # scales as 1/√h
    assert np.isinf(mdb[2])  # non-redundant: no bias is detectable


def test_glr_equals_squared_z_for_diagonal_v():
    y = np.array([101.91, 64.45, 34.65, 64.20, 36.44, 98.88])
    net6 = np.array([[1, -1, -1, 0, 0, 0], [0, 1, 0, -1, 0, 0], [0, 0, 1, 0, -1, 0],
                     [0, 0, 0, 1, 1, -1]], dtype=float)
    r = reconcile_linear(net6, y, np.ones(6))
    b, drop = glr_bias(r.adjustments, r.cov_a, np.ones(6), r.redundant)
    # Narasimhan & Jordache (2000) §7.4: for uncorrelated errors the GLR statistic
    # for a measurement bias equals the squared measurement-test statistic
    np.testing.assert_allclose(drop, r.z**2, rtol=1e-10)
    # removing measurement 1 with its estimated bias reduces γ by exactly that amount
    r2 = reconcile_linear(net6, y - np.r_[b[0], 0, 0, 0, 0, 0], np.ones(6))
    assert r.gamma - r2.gamma == pytest.approx(drop[0], rel=1e-9)


def test_glr_with_variances_equals_the_covariance_form_and_squared_z():
    # unequal variances: the 1-D form (variances of measurements and adjustments) gives the
    # numbers of the full-matrix form, and both the squared measurement-test statistic
    # (Narasimhan & Jordache (2000) §7.4, uncorrelated errors)
    y = np.array([101.91, 64.45, 34.65, 64.20, 36.44, 98.88])
    v = np.array([1.0, 2.0, 0.5, 1.5, 1.0, 3.0])
    net6 = np.array([[1, -1, -1, 0, 0, 0], [0, 1, 0, -1, 0, 0], [0, 0, 1, 0, -1, 0],
                     [0, 0, 0, 1, 1, -1]], dtype=float)
    r = reconcile_linear(net6, y, np.diag(v))
    b_full, drop_full = glr_bias(r.adjustments, r.cov_a, np.diag(v), r.redundant)
    b_diag, drop_diag = glr_bias(r.adjustments, np.diag(r.cov_a), v, r.redundant)
    np.testing.assert_allclose(b_diag, b_full, rtol=1e-12)
    np.testing.assert_allclose(drop_diag, drop_full, rtol=1e-12)
    np.testing.assert_allclose(drop_diag, r.z**2, rtol=1e-10)
    with pytest.raises(ValueError, match="1-D"):
        glr_bias(r.adjustments, np.diag(r.cov_a), np.diag(v))


def test_derived_uncertainty_of_sum_equals_reconciled_total():
    net6 = np.array([[1, -1, -1, 0, 0, 0], [0, 1, 0, -1, 0, 0], [0, 0, 1, 0, -1, 0],
                     [0, 0, 0, 1, 1, -1]], dtype=float)
    V = np.diag([1.0, 2.0, 0.5, 1.5, 1.0, 3.0])
    r = reconcile_linear(net6, [101.91, 64.45, 34.65, 64.20, 36.44, 98.88], V)
    # the balance F1 = F2 + F3 holds for reconciled values, so u(F2 + F3) = u(F1) (identity)
    g = np.array([0, 1, 1, 0, 0, 0.0])
    assert derived_uncertainty(g, r.cov_x) == pytest.approx(np.sqrt(r.cov_x[0, 0]), rel=1e-10)
    grad = numerical_gradient(lambda x: x[1] * x[2], r.x_hat)
    np.testing.assert_allclose(grad, [0, r.x_hat[2], r.x_hat[1], 0, 0, 0], rtol=1e-8, atol=1e-8)
    # NaN rows of unobservable variables do not matter where the gradient is zero
    C = r.cov_x.copy()
    C[3, :] = C[:, 3] = np.nan
    assert np.isfinite(derived_uncertainty(g, C))
    assert np.isnan(derived_uncertainty(np.ones(6), C))


def test_serial_elimination_finds_bias_and_respects_protection():
    y = F_TRUE[MEAS].copy()
    y[0] += 8 * SIGMA[0]  # gross error on F1
    e = eliminate_suspects_linear(A, y, SIGMA**2, B, max_eliminations=2)
    assert [m.position for m in e.eliminated] == [0]
    assert e.reason == "no measurement flagged"
    assert e.eliminated[0].bias == pytest.approx(8 * SIGMA[0], abs=3 * SIGMA[0])
    # re-estimate = reconciliation with F1 treated as unmeasured (independent call)
    alt = reconcile_linear(np.delete(A, 0, axis=1), np.delete(y, 0), np.delete(SIGMA, 0) ** 2,
                           np.column_stack([B, A[:, 0]]))
    assert e.eliminated[0].re_estimate == pytest.approx(alt.u_hat[-1], rel=1e-9)
    assert e.eliminated[0].re_estimate_sigma == pytest.approx(np.sqrt(alt.cov_u[-1, -1]), rel=1e-9)
    # a caller that insists the F1 meter stays in use blocks its elimination
    keep_f1 = eliminate_suspects_linear(A, y, SIGMA**2, B, protected=lambda cls: 0 in cls.measured)
    assert keep_f1.eliminated == () and "protected" in keep_f1.reason
    none = eliminate_suspects_linear(A, y, SIGMA**2, B, max_eliminations=0)
    assert none.eliminated == () and "max_eliminations" in none.reason


def test_synthetic_network_is_consistent():
    net = synthetic_network(60, seed=2, kind="bilinear")
    # exact by construction: the true values satisfy the balances
    f = net.system.residuals(net.z_true)
    assert np.max(np.abs(f)) < 1e-6 * np.max(np.abs(net.z_true))
    assert 40 <= len(net.measured) <= 80


@pytest.mark.parametrize(("dof", "q95"), [(1, 3.841), (2, 5.991), (10, 18.307), (30, 43.773)])
def test_chi2_helpers_against_the_table_and_scipy(dof, q95):
    # upper 5 % points of chi-square, the table in every statistics handbook
    # (e.g. NIST/SEMATECH e-Handbook of Statistical Methods, section 1.3.6.7.4) [memory]
    from scipy import stats

    assert chi2_quantile(0.95, dof) == pytest.approx(q95, abs=6e-4)
    assert chi2_quantile(0.95, dof) == float(stats.chi2.ppf(0.95, dof))
    assert chi2_sf(q95, dof) == pytest.approx(0.05, abs=2e-5)
    # the same special function as scipy's distribution object: the same bits
    rng = np.random.default_rng(dof)
    for g in rng.uniform(0.0, 4.0 * q95, 50):
        assert chi2_sf(float(g), dof) == float(stats.chi2.sf(g, dof))
