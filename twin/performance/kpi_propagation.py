"""Variances of many derived quantities at once, from their gradients and the reconciled covariance.

A derived quantity (a KPI) with gradient ``g`` over the state has ``Var = gᵀ C g``
(linear propagation, GUM (JCGM 100:2008) eq. 13). The gradients of all KPIs of a
window form one matrix ``G`` over the columns they read; ``diag(G C Gᵀ)`` is one
dense product on those columns instead of one small product per KPI. With the
whitened gain ``K`` of the solution (``Cov(ẑ) = K Kᵀ``) the rows of ``R = G K`` give
each variance as a sum of squares, and the soft relations' share of it
(:class:`twin.performance.plant_reconcile._SoftShare` does the same for one row).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np


def gradient_matrix(grads: Sequence[tuple[Sequence[int], Mapping[int, float]]]) -> tuple[np.ndarray, np.ndarray]:
    """(used columns, G): one row per ``(columns, gradient)``, the gradient taken over its columns only."""
    used = np.array(sorted({c for cols, _ in grads for c in cols}), dtype=int)
    pos = {int(c): k for k, c in enumerate(used)}
    G = np.zeros((len(grads), used.size))
    for i, (cols, g) in enumerate(grads):
        for c in cols:
            G[i, pos[c]] = g.get(c, 0.0)
    return used, G


def variances(used: np.ndarray, G: np.ndarray, cov: np.ndarray) -> np.ndarray:
    """diag(G C Gᵀ) over the ``used`` columns; NaN for a row that reads a non-finite covariance entry."""
    C = cov[np.ix_(used, used)]
    bad = ~np.isfinite(C)
    C = np.where(bad, 0.0, C)
    var = np.einsum("ij,ij->i", G @ C, G)
    if bad.any():
        S = (G != 0.0).astype(float)
        var[np.einsum("ij,ij->i", S @ bad.astype(float), S) > 0] = np.nan
    return var


def soft_shares(used: np.ndarray, G: np.ndarray, gain: np.ndarray | None, soft: np.ndarray) -> np.ndarray:
    """Share of each row's variance from the soft relations (columns ``soft`` of the gain) [-]; NaN without a gain."""
    if gain is None:
        return np.full(G.shape[0], np.nan)
    K = gain[used]
    bad = ~np.all(np.isfinite(K), axis=1)
    K = np.where(bad[:, None], 0.0, K)
    R = G @ K
    total = np.einsum("ij,ij->i", R, R)
    part = np.einsum("ij,ij->i", R[:, soft], R[:, soft])
    with np.errstate(invalid="ignore", divide="ignore"):
        out = part / total
    out[~(np.isfinite(total) & (total > 0.0))] = np.nan
    if bad.any():
        out[(G[:, bad] != 0.0).any(axis=1)] = np.nan
    return out
