"""Synthetic steam-metering-like networks for benchmarks and tests.

A random header network: node 0 takes one feed from outside, every other node is fed
from an earlier node (a tree), some nodes pass small cross flows to later nodes, and
every node sends one product stream out. Streams carry a mass flow and, in the
bilinear variant, a specific enthalpy mixed adiabatically at each node (all outlets
of a node leave at the mixed enthalpy). A fraction of the variables is unmeasured,
so some are unobservable and some measurements are not redundant, as in a plant.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from twin.reconcile.nonlinear import ConstraintSystem, LinearSystem


@dataclass(frozen=True)
class SyntheticNetwork:
    """A synthetic reconciliation problem.

    Attributes
    ----------
    system : ConstraintSystem
        Linear (``LinearSystem``) or bilinear (``BilinearNetwork``) constraints.
    z_true : ndarray
        True values of all variables (satisfy the constraints).
    z0 : ndarray
        Starting point: measurements where measured, true values perturbed by 5 % else.
    measured : ndarray of int
    y : ndarray
        One noisy draw of the measurements.
    V : ndarray
        Diagonal measurement covariance (full matrix).
    """

    system: ConstraintSystem
    z_true: np.ndarray
    z0: np.ndarray
    measured: np.ndarray
    y: np.ndarray
    V: np.ndarray


class BilinearNetwork:
    """Mass and enthalpy balances of a mixing network; variables ``[F (E), h (E)]``.

    Rows: one mass balance per node; per node with several inlets the energy balance
    ``Σ F h = 0``, per node with a single inlet ``h_out − h_in = 0`` for its first
    outlet (there the energy balance would follow from the mass balance and make the
    Jacobian rank-deficient); and ``h_k − h_first = 0`` for every further outlet.
    """

    def __init__(self, src: np.ndarray, dst: np.ndarray, n_nodes: int):
        self.src, self.dst, self.n_nodes = src, dst, n_nodes
        E = src.size
        self.n_streams = E
        self.n_vars = 2 * E
        inc = np.zeros((n_nodes, E))
        for e in range(E):
            if dst[e] >= 0:
                inc[dst[e], e] += 1.0
            if src[e] >= 0:
                inc[src[e], e] -= 1.0
        self.inc = sp.csr_matrix(inc)
        mixing = [i for i in range(n_nodes) if np.count_nonzero(dst == i) > 1]
        self.energy = sp.csr_matrix(inc[mixing])
        pairs = []
        for node in range(n_nodes):
            outs = np.flatnonzero(src == node)
            ins = np.flatnonzero(dst == node)
            if ins.size == 1:
                pairs.append((ins[0], outs[0]))
            pairs += [(outs[0], o) for o in outs[1:]]
        self.pairs = np.asarray(pairs, dtype=int).reshape(-1, 2)
        P = np.zeros((len(pairs), E))
        for r, (a, b) in enumerate(pairs):
            P[r, a], P[r, b] = -1.0, 1.0
        self.P = sp.csr_matrix(P)

    def residuals(self, z: np.ndarray) -> np.ndarray:
        E = self.n_streams
        F, h = z[:E], z[E:]
        return np.concatenate([self.inc @ F, self.energy @ (F * h), self.P @ h])

    def jacobian(self, z: np.ndarray) -> sp.csr_matrix:
        E = self.n_streams
        F, h = z[:E], z[E:]
        zero = sp.csr_matrix((self.inc.shape[0], E))
        return sp.vstack([
            sp.hstack([self.inc, zero]),
            sp.hstack([self.energy @ sp.diags(h), self.energy @ sp.diags(F)]),
            sp.hstack([sp.csr_matrix((self.P.shape[0], E)), self.P]),
        ]).tocsr()


def _random_tree(n_nodes: int, rng: np.random.Generator):
    """Streams (src, dst; −1 = outside) and positive true flows [kg/s]."""
    parent = np.array([-1] + [int(rng.integers(max(0, i - 8), i)) for i in range(1, n_nodes)])
    n_cross = round(0.3 * n_nodes)
    cross = []
    for _ in range(n_cross):
        a = int(rng.integers(0, n_nodes - 1))
        b = int(rng.integers(a + 1, n_nodes))
        cross.append((a, b))
    product = rng.uniform(2.0, 20.0, n_nodes)
    cross_flow = rng.uniform(0.2, 1.0, n_cross)
    # tree edge into node i carries (all outflows of i) − (cross inflows of i)
    feed = np.zeros(n_nodes)
    for i in range(n_nodes - 1, -1, -1):
        out = product[i] + feed[parent == i].sum() + sum(
            f for (a, _b), f in zip(cross, cross_flow, strict=True) if a == i)
        cin = sum(f for (_a, b), f in zip(cross, cross_flow, strict=True) if b == i)
        feed[i] = out - cin
    src = np.concatenate([parent, np.arange(n_nodes), [a for a, _ in cross]]).astype(int)
    dst = np.concatenate([np.arange(n_nodes), np.full(n_nodes, -1), [b for _, b in cross]]).astype(int)
    flow = np.concatenate([feed, product, cross_flow])
    return src, dst, flow


def synthetic_network(n_measurements: int, seed: int = 0, *, kind: str = "linear",
                      unmeasured_fraction: float = 0.15) -> SyntheticNetwork:
    """Build a random metering network with about ``n_measurements`` measurements.

    Parameters
    ----------
    n_measurements : int
        Approximate number of measured variables.
    seed : int
        Seed of the random generator (network, true values and noise).
    kind : {"linear", "bilinear"}
        Mass balances only, or mass and enthalpy balances (flow × enthalpy).
    unmeasured_fraction : float
        Fraction of variables left unmeasured [-].
    """
    if kind not in ("linear", "bilinear"):
        raise ValueError(f"kind must be 'linear' or 'bilinear', got {kind!r}")
    if n_measurements < 4:
        raise ValueError(f"n_measurements must be >= 4, got {n_measurements!r}")
    rng = np.random.default_rng(seed)
    per_stream = 1 if kind == "linear" else 2
    n_streams = n_measurements / (1.0 - unmeasured_fraction) / per_stream
    n_nodes = max(2, round(n_streams / 2.3))
    src, dst, flow = _random_tree(n_nodes, rng)
    E = src.size
    if kind == "linear":
        inc = np.zeros((n_nodes, E))
        for e in range(E):
            if dst[e] >= 0:
                inc[dst[e], e] += 1.0
            if src[e] >= 0:
                inc[src[e], e] -= 1.0
        system: ConstraintSystem = LinearSystem(inc, np.zeros(n_nodes))
        z_true = flow
        sigma = 0.01 * flow + 0.02
    else:
        system = BilinearNetwork(src, dst, n_nodes)
        feed_h = rng.uniform(2.9e6, 3.3e6)
        node_h = np.zeros(n_nodes)
        for i in range(n_nodes):  # DAG in index order: inflows come from lower nodes
            ins = np.flatnonzero(dst == i)
            hin = np.where(src[ins] < 0, feed_h, node_h[np.maximum(src[ins], 0)])
            node_h[i] = float(flow[ins] @ hin / flow[ins].sum())
        h = np.where(src < 0, feed_h, node_h[np.maximum(src, 0)])
        z_true = np.concatenate([flow, h])
        sigma = np.concatenate([0.01 * flow + 0.02, np.full(E, 3e3)])
    n_vars = z_true.size
    n_meas = min(n_vars - 1, max(1, round(n_vars * (1.0 - unmeasured_fraction))))
    measured = np.sort(rng.choice(n_vars, size=n_meas, replace=False))
    V = np.diag(sigma[measured] ** 2)
    y = z_true[measured] + rng.standard_normal(n_meas) * sigma[measured]
    z0 = z_true * (1.0 + 0.05 * rng.standard_normal(n_vars))
    z0[measured] = y
    return SyntheticNetwork(system, z_true, z0, measured, y, V)
