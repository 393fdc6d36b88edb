"""Nonlinear (successive linearisation) reconciliation: independent-solver checks and failure modes."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize

from twin.reconcile import LinearSystem, SolveOptions, reconcile, reconcile_linear

NETWORK = np.array(
    [[1, -1, -1, 0, 0, 0], [0, 1, 0, -1, 0, 0], [0, 0, 1, 0, -1, 0], [0, 0, 0, 1, 1, -1]],
    dtype=float,
)


class MixerSplitter:
    """Bilinear flow × composition balance of our own making (not a published table):
    streams 1 and 2 mix into 3, which splits into 4 and 5 at the mixed composition;
    stream 6 is drawn from 4 through a second splitter into 6 and 7.

    Variables: F1..F7 (0..6), x1..x7 (7..13).
    """

    n_vars = 14

    def residuals(self, z):
        F, x = z[:7], z[7:]
        return np.array([
            F[0] + F[1] - F[2],
            F[0] * x[0] + F[1] * x[1] - F[2] * x[2],
            F[2] - F[3] - F[4],
            x[3] - x[2],
            x[4] - x[2],
            F[3] - F[5] - F[6],
            x[5] - x[3],
            x[6] - x[3],
        ])

    def jacobian(self, z):
        F, x = z[:7], z[7:]
        J = np.zeros((8, 14))
        J[0, [0, 1, 2]] = [1, 1, -1]
        J[1, [0, 1, 2]] = [x[0], x[1], -x[2]]
        J[1, [7, 8, 9]] = [F[0], F[1], -F[2]]
        J[2, [2, 3, 4]] = [1, -1, -1]
        J[3, [10, 9]] = [1, -1]
        J[4, [11, 9]] = [1, -1]
        J[5, [3, 5, 6]] = [1, -1, -1]
        J[6, [12, 10]] = [1, -1]
        J[7, [13, 10]] = [1, -1]
        return J


# invented measurement set: F2 and x4 unmeasured
MEASURED = np.array([0, 2, 3, 4, 5, 6, 7, 8, 9, 11, 12, 13])
Y = np.array([100.0, 152.0, 79.0, 70.5, 41.0, 37.0, 0.20, 0.62, 0.35, 0.37, 0.33, 0.36])
SIGMA = np.array([2.0, 3.0, 1.6, 1.4, 0.8, 0.8, 0.01, 0.015, 0.01, 0.01, 0.01, 0.01])
Z0 = np.array([100, 50, 150, 80, 70, 40, 40, 0.2, 0.6, 0.35, 0.35, 0.35, 0.35, 0.35])


def _slsqp_reference(system, measured, y, sigma, z0):
    """Second, independent solver: SLSQP on the same WLS problem, variables scaled."""
    scale = np.maximum(np.abs(z0), 1e-3)
    scale[measured] = sigma

    def obj(w):
        z = w * scale
        r = (y - z[measured]) / sigma
        return 0.5 * float(r @ r)

    def jac(w):
        z = w * scale
        g = np.zeros_like(z)
        g[measured] = -(y - z[measured]) / sigma**2
        return g * scale

    cons = {"type": "eq", "fun": lambda w: system.residuals(w * scale),
            "jac": lambda w: system.jacobian(w * scale) * scale}
    out = optimize.minimize(obj, z0 / scale, jac=jac, constraints=[cons], method="SLSQP",
                            options={"ftol": 1e-16, "maxiter": 500})
    assert out.success, out.message
    return out.x * scale


def test_bilinear_mixer_splitter_agrees_with_slsqp():
    system = MixerSplitter()
    r = reconcile(system, Z0, MEASURED, Y, SIGMA**2)
    assert r.status == "converged", r.message
    ref = _slsqp_reference(system, MEASURED, Y, SIGMA, Z0)
    # independent check: scipy.optimize.minimize(SLSQP) on the same problem, to 1e-6 σ
    sd = np.sqrt(np.diag(r.cov_z))
    assert np.all(np.isfinite(sd)) and r.observable.all()
    np.testing.assert_array_less(np.abs(r.z_hat - ref), 1e-6 * sd)
    np.testing.assert_allclose(system.residuals(r.z_hat), 0.0, atol=1e-9)
    assert r.dof == 8 - 2  # 8 independent balances, 2 unmeasured determined
    # identity Cov(y) = Cov(x̂) + Cov(a) holds for the linearisation at the solution
    np.testing.assert_allclose(r.cov_z[np.ix_(MEASURED, MEASURED)] + r.cov_a,
                               np.diag(SIGMA**2), atol=1e-12)


def test_nonlinear_on_linear_system_equals_closed_form():
    y = np.array([110.5, 35.0, 38.6])
    V = np.array([0.82, 0.46, 0.45]) ** 2
    lin = reconcile_linear(NETWORK[:, [0, 2, 4]], y, V, NETWORK[:, [1, 3, 5]])
    r = reconcile(LinearSystem(NETWORK, np.zeros(4)), np.full(6, 50.0), [0, 2, 4], y, V)
    assert r.status == "converged"
    # identity: one Gauss-Newton step is exact on linear constraints
    np.testing.assert_allclose(r.x_hat, lin.x_hat, atol=1e-9)
    np.testing.assert_allclose(r.z_hat[[1, 3, 5]], lin.u_hat, atol=1e-9)
    np.testing.assert_allclose(r.cov_z[np.ix_([1, 3, 5], [1, 3, 5])], lin.cov_u, atol=1e-12)
    np.testing.assert_allclose(r.cov_z[np.ix_([0, 2, 4], [0, 2, 4])], lin.cov_x, atol=1e-12)
    assert r.gamma == pytest.approx(lin.gamma, rel=1e-9)
    np.testing.assert_array_equal(np.isnan(r.z), np.isnan(lin.z))


def test_unobservable_are_nan_but_warm_start_is_finite():
    r = reconcile(LinearSystem(NETWORK, np.zeros(4)), np.full(6, 100.0), [0, 5],
                  [110.5, 109.0], [1.0, 1.0])
    assert r.status == "converged"
    assert not r.observable.any()
    assert np.isnan(r.z_hat[1:5]).all() and np.isfinite(r.z_warm).all()
    assert np.isnan(r.cov_z[1:5]).all() and np.isnan(r.cov_z[:, 1:5]).all()
    assert np.isfinite(r.cov_z[np.ix_([0, 5], [0, 5])]).all()


class Flaky(MixerSplitter):
    """Raises like a property routine called out of range, on chosen calls."""

    def __init__(self, fail_on):
        self.calls = 0
        self.fail_on = set(fail_on)

    def residuals(self, z):
        self.calls += 1
        if self.calls in self.fail_on:
            raise ValueError("temperature out of range of IF97 region 1")
        return super().residuals(z)


def test_model_error_during_line_search_backtracks():
    system = Flaky(fail_on={2, 3})  # the first two trial points fail
    r = reconcile(system, Z0, MEASURED, Y, SIGMA**2)
    assert r.status == "converged", r.message
    ref = reconcile(MixerSplitter(), Z0, MEASURED, Y, SIGMA**2)
    np.testing.assert_allclose(r.z_hat, ref.z_hat, rtol=1e-9)


def test_model_error_at_start_is_a_status_not_an_exception():
    r = reconcile(Flaky(fail_on={1}), Z0, MEASURED, Y, SIGMA**2)
    assert r.status == "model_error"
    assert "out of range" in r.message
    assert np.isnan(r.z_hat).all() and np.isnan(r.gamma) and np.isnan(r.cov_z).all()


class Zero(MixerSplitter):
    def residuals(self, z):
        if z[0] < 0:
            raise ZeroDivisionError("division by zero flow")
        return super().residuals(z)


def test_arithmetic_error_is_contained_and_nonconvergence_is_nan():
    r = reconcile(Zero(), np.r_[-1.0, Z0[1:]], MEASURED, Y, SIGMA**2)
    assert r.status == "model_error" and "ZeroDivisionError" in r.message
    r = reconcile(MixerSplitter(), Z0, MEASURED, Y, SIGMA**2, options=SolveOptions(max_iter=1))
    assert r.status == "max_iter" and not r.converged
    for arr in (r.z_hat, r.x_hat, r.z, r.adjustments, r.redundancy, r.z_warm):
        assert np.isnan(arr).all()
    assert np.isnan(r.p_value)


@pytest.mark.parametrize(
    ("measured", "y", "V", "match"),
    [
        ([], [], np.zeros((0, 0)), "no measurements"),
        ([0, 2], [1.0, np.nan], [1.0, 1.0], "non-finite"),
        ([0, 2], [1.0, 2.0], [[1.0, 1.0], [1.0, 1.0]], "singular|positive definite"),
        ([0, 0], [1.0, 2.0], [1.0, 1.0], "duplicate"),
    ],
)
def test_bad_inputs_raise_value_error(measured, y, V, match):
    with pytest.raises(ValueError, match=match):
        reconcile(LinearSystem(NETWORK, np.zeros(4)), np.ones(6), measured, y, V)
