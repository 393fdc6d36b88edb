"""The augmented (KKT) matrix assembled into a kept CSC structure equals the one built from coordinates.

Reference: the coordinate-format assembly of the same matrix (the general path of
:class:`twin.reconcile.kkt.ScaledKKT`, taken for a Jacobian that is not canonical CSR),
entry for entry after the kept structure's symmetric ordering, on the demo-u1 plant
Jacobian and on a synthetic network; the factorisations solve the same steps, and the
steps solve the augmented system as numpy's dense LU (LAPACK) does.
"""

from __future__ import annotations

import numpy as np
import pytest

from tests.model_helpers import demo_config, demo_design
from twin.performance.plant import PlantSystem
from twin.reconcile import kkt, synthetic_network


def _problem_demo():
    fs, _, design = demo_design()
    ps = PlantSystem(fs, demo_config().sensors, design)
    z = ps.initial_point(design.z)
    measured = np.array([b.column for b in ps.sensors] + [r.column for r in ps.soft])
    vs, rs = ps.scales()
    return ps.jacobian(z), measured, ps.n_vars, vs, rs


def _problem_synthetic():
    net = synthetic_network(200, seed=3, kind="bilinear")
    J = net.system.jacobian(net.z0)
    import scipy.sparse as sp

    J = sp.csr_matrix(J)
    J.sum_duplicates()
    J.sort_indices()
    vs = np.maximum(np.abs(net.z0), 1.0)
    rs = np.ones(J.shape[0])
    return J, np.asarray(net.measured), net.system.n_vars, vs, rs


def _with_sigma(make, seed: int):
    """The problem, its unmeasured columns and measurement σ drawn around the variable scales."""
    J, measured, n_vars, vs, rs = make()
    unmeasured = np.setdiff1d(np.arange(n_vars), measured)
    rng = np.random.default_rng(seed)
    sigma = vs[measured] * (0.5 + rng.random(measured.size))
    return J, measured, unmeasured, vs, rs, sigma, rng


@pytest.mark.parametrize("make", [_problem_demo, _problem_synthetic])
def test_kept_structure_gives_the_coordinate_matrix(make):
    J, measured, unmeasured, vs, rs, sigma, rng = _with_sigma(make, 2)
    assert J.format == "csr" and J.has_canonical_format
    for k in range(2):  # the second call reuses the kept structure
        Jk = J.copy()
        Jk.data = Jk.data * (1.0 + 0.1 * k)
        fast = kkt.ScaledKKT(Jk, measured, unmeasured, sigma, True, vs[unmeasured], rs)
        ref = kkt.ScaledKKT(Jk.tocsc(), measured, unmeasured, sigma, True, vs[unmeasured], rs)
        order = fast._order
        assert order is not None and ref._order is None  # the kept structure is ordered once
        assert np.array_equal(fast.K.toarray(), ref.K.toarray()[np.ix_(order, order)])
        g = rng.standard_normal(measured.size)
        f = rng.standard_normal(J.shape[0])
        for a, b in zip(fast.step(g, f), ref.step(g, f), strict=True):
            np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-12 * max(1.0, float(np.max(np.abs(b)))))
        # LAPACK's dense LU of the system without the -δ block (what the refinement solves)
        K0 = ref.K.toarray() + np.diag(ref._delta)
        rhs = np.concatenate([g, np.zeros(unmeasured.size), -f])
        dense = np.linalg.solve(K0, rhs)
        n = measured.size
        dw, _ = fast.step(g, f)
        np.testing.assert_allclose(dw, dense[:n], rtol=1e-8, atol=1e-8 * float(np.max(np.abs(dense[:n]))))


@pytest.mark.parametrize("make", [_problem_demo, _problem_synthetic])
def test_the_kept_ordering_is_a_function_of_the_sparsity_alone(make):
    # the order taken from a structure's first matrix serves every later one: SuperLU orders
    # a matrix of the same sparsity with quite different values the same way
    import scipy.sparse.linalg as spla

    J, measured, n_vars, vs, rs = make()
    unmeasured = np.setdiff1d(np.arange(n_vars), measured)
    rng = np.random.default_rng(5)
    perms = []
    for _ in range(3):
        Jk = J.copy()
        Jk.data = Jk.data * rng.uniform(0.2, 5.0, Jk.data.size)
        sigma = vs[measured] * rng.uniform(0.1, 10.0, measured.size)
        K = kkt.ScaledKKT(Jk.tocsc(), measured, unmeasured, sigma, True, vs[unmeasured], rs).K
        perms.append(spla.splu(K, permc_spec=kkt.ORDERING, **kkt._LU_OPTIONS).perm_c)
    assert all(np.array_equal(perms[0], q) for q in perms[1:])


@pytest.mark.parametrize("make", [_problem_demo, _problem_synthetic])
def test_unit_solves_are_the_columns_of_the_inverse(make):
    # the covariance's unit-column solves, set up in the factored matrix's order: the same
    # numbers as the general solve with one refinement sweep, on an ordered and on an unordered
    # matrix; and the columns of K0⁻¹ as numpy's dense LU (LAPACK) gives them
    J, measured, unmeasured, vs, rs, sigma, _ = _with_sigma(make, 7)
    n, p = measured.size, unmeasured.size
    j0, j1 = 3, min(n, 40)
    for Jk in (J, J.tocsc()):  # kept structure (ordered), coordinate assembly (unordered)
        k = kkt.ScaledKKT(Jk, measured, unmeasured, sigma, True, vs[unmeasured], rs)
        size = n + p + k.m
        rhs = np.zeros((size, j1 - j0))
        rhs[np.arange(j0, j1), np.arange(j1 - j0)] = 1.0
        general = k.solve(rhs, sweeps=1)[: n + p]
        units = k.unit_solves(j0, j1)
        assert units.shape == (n + p, j1 - j0)
        assert np.array_equal(units, general)
        K0 = k.K.toarray() + np.diag(k._delta)
        where = k._where
        dense = np.linalg.solve(K0, np.eye(size)[:, where[j0:j1]])[where[: n + p]]
        scale = float(np.max(np.abs(dense[:n])))
        np.testing.assert_allclose(units[:n], dense[:n], rtol=0, atol=1e-8 * scale)
