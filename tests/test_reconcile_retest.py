"""Re-testing an eliminated measurement from the solution without it (``readmit``, ``eliminate_again``).

Reference: for linear constraints the full set's solution is the solution without one
measurement updated by that measurement (the recursive least-squares / Kalman update), so
the normalised adjustment of a measurement in the full set equals its deleted residual,
the measurement against the estimate of the others, ``(y − x̂₋)/sqrt(σ² + Var(x̂₋))``
(Narasimhan & Jordache, *Data Reconciliation and Gross Error Detection* (2000), ch. 7,
measurement test and GLR [memory]). The check is the engine's own solve of the full set,
an independent computation; the engine itself is checked against published examples in
``test_reconcile_linear.py`` and ``test_reconcile_nonlinear.py``.
"""

from __future__ import annotations

import numpy as np
import pytest

from twin.reconcile import LinearSystem, eliminate_again, eliminate_suspects, readmit, reconcile

# a network of our own: 1: F1→F2+F3, 2: F2→F4+F5, 3: F3+F4→F6, 4: F5+F6→F7, 5: F7→F8+F9
NET = np.zeros((5, 9))
for row, (ins, outs) in enumerate([((0,), (1, 2)), ((1,), (3, 4)), ((2, 3), (5,)),
                                   ((4, 5), (6,)), ((6,), (7, 8))]):
    NET[row, list(ins)] = 1.0
    NET[row, list(outs)] = -1.0
MEASURED = np.array([0, 1, 2, 4, 5, 6, 8])  # F4, F8 unmeasured
F_TRUE = np.array([100.0, 60.0, 40.0, 25.0, 35.0, 65.0, 100.0, 45.0, 55.0])
SIGMA = np.array([2.0, 1.5, 1.0, 1.5, 2.0, 1.0, 1.2])
SYSTEM = LinearSystem(NET, np.zeros(5))


def _data(seed: int, bias: dict[int, float] | None = None) -> np.ndarray:
    rng = np.random.default_rng(seed)
    y = F_TRUE[MEASURED] + SIGMA * rng.standard_normal(MEASURED.size)
    for pos, b in (bias or {}).items():
        y[pos] += b * SIGMA[pos]
    return y


def _z0(y: np.ndarray) -> np.ndarray:
    z = np.zeros(NET.shape[1])
    z[MEASURED] = y
    return z


@pytest.mark.parametrize("position", [0, 3, 5])
def test_readmitted_statistics_are_the_full_sets_for_linear_constraints(position: int) -> None:
    y = _data(1, {0: 6.0})
    V = SIGMA**2
    full = reconcile(SYSTEM, _z0(y), MEASURED, y, V)
    keep = np.delete(np.arange(MEASURED.size), position)
    without = reconcile(SYSTEM, _z0(y), MEASURED[keep], y[keep], V[keep])
    assert full.converged and without.converged
    stats = readmit(without, position, int(MEASURED[position]), y, V, full.classification)
    assert stats is not None
    np.testing.assert_allclose(stats.adjustments, full.adjustments, rtol=0, atol=1e-7 * SIGMA.max())
    np.testing.assert_allclose(stats.var_a, full.var_a, rtol=1e-7)
    np.testing.assert_allclose(stats.redundancy, full.redundancy, rtol=1e-7)
    np.testing.assert_allclose(stats.z, full.z, rtol=1e-7)
    # the deleted-residual form of the measurement test, from the solution without it
    x_without = without.z_hat[MEASURED[position]]
    var_without = without.cov_z[MEASURED[position], MEASURED[position]]
    deleted = (y[position] - x_without) / np.sqrt(V[position] + var_without)
    assert stats.z[position] == pytest.approx(deleted, rel=1e-7)


def test_a_measurement_not_redundant_in_the_full_set_is_not_readmitted() -> None:
    # F9 (with F8 unmeasured): without its meter only F8 + F9 is known, so its variable is not
    # observable there; in the full set it is not redundant, never tested, never eliminated
    y = _data(7, {0: 6.0})
    V = SIGMA**2
    full = reconcile(SYSTEM, _z0(y), MEASURED, y, V)
    assert not full.classification.redundant[6] and np.isnan(full.z[6])
    keep = np.arange(MEASURED.size - 1)
    without = reconcile(SYSTEM, _z0(y), MEASURED[keep], y[keep], V[keep])
    assert readmit(without, 6, int(MEASURED[6]), y, V, full.classification) is None


def test_eliminating_again_gives_the_serial_elimination_result() -> None:
    V = SIGMA**2
    cache: dict = {}
    y = _data(2, {0: 8.0})
    serial = eliminate_suspects(SYSTEM, _z0(y), MEASURED, y, V, classifications=cache)
    assert [e.position for e in serial.eliminated] == [0]
    full_cls = reconcile(SYSTEM, _z0(y), MEASURED, y, V).classification
    # the next window: new noise, the same gross error, the previous solution as the start
    y2 = _data(3, {0: 8.0})
    ref = eliminate_suspects(SYSTEM, _z0(y2), MEASURED, y2, V, classifications=cache)
    again = eliminate_again(SYSTEM, MEASURED, y2, V, 0, full=full_cls, warm=serial.result.z_warm,
                            classifications=cache)
    assert again is not None
    assert [e.position for e in again.eliminated] == [e.position for e in ref.eliminated] == [0]
    assert again.reason == ref.reason
    np.testing.assert_allclose(again.result.z_hat, ref.result.z_hat, rtol=1e-10)
    a, r = again.eliminated[0], ref.eliminated[0]
    assert a.re_estimate == pytest.approx(r.re_estimate, rel=1e-10)
    assert a.re_estimate_sigma == pytest.approx(r.re_estimate_sigma, rel=1e-10)
    # the statistics it was eliminated with: those of the full set's solve
    first = reconcile(SYSTEM, _z0(y2), MEASURED, y2, V)
    assert a.z == pytest.approx(first.z[0], rel=1e-7)
    assert a.bias == pytest.approx(r.bias, rel=1e-7)
    assert again.first_redundancy is not None
    np.testing.assert_allclose(again.first_redundancy, first.redundancy, rtol=1e-7)


def test_an_elimination_that_would_not_be_repeated_is_not_confirmed() -> None:
    V = SIGMA**2
    cache: dict = {}
    y = _data(4, {0: 8.0})
    full_cls = reconcile(SYSTEM, _z0(y), MEASURED, y, V).classification
    eliminate_suspects(SYSTEM, _z0(y), MEASURED, y, V, classifications=cache)
    # the meter was repaired: nothing is flagged in the full set any more
    clean = _data(5)
    assert eliminate_again(SYSTEM, MEASURED, clean, V, 0, full=full_cls, warm=_z0(clean),
                           classifications=cache) is None
    # the gross error moved to another meter: the serial elimination would remove that one first
    moved = _data(6, {4: -9.0})
    assert eliminate_suspects(SYSTEM, _z0(moved), MEASURED, moved, V).eliminated[0].position == 4
    assert eliminate_again(SYSTEM, MEASURED, moved, V, 0, full=full_cls, warm=_z0(moved),
                           classifications=cache) is None
    # trial sets never classified: the full set decides
    assert eliminate_again(SYSTEM, MEASURED, y, V, 0, full=full_cls, warm=_z0(y), classifications={}) is None
