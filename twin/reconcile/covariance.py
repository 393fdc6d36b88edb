"""Linearised covariance of a sparse reconciliation where it is read.

At the solution the reconciled values respond linearly to the whitened data ``g``
(``y = L g``, ``V = L Lᵀ``): ``ŵ = X g``, ``v̂ = U g`` with ``X``, ``U`` blocks of the
inverse of the augmented (KKT) matrix ``K`` of :class:`twin.reconcile.kkt.ScaledKKT`
(``X = [K⁻¹]_ww``, ``U = [K⁻¹]_vw``). With ``x̂ = L ŵ`` and ``û = S v̂``::

    Cov(x̂) = L X Lᵀ,   Cov(x̂, û) = L Uᵀ S,   Cov(û) = S U Uᵀ S.

The full matrices need ``n`` solves with ``K`` and ``O(n_vars²)`` memory. A caller
that reads only some quantities asks for them: :class:`LinearisedCovariance` gives the
covariance of ``k`` linear functionals ``G z`` (the gradients of KPIs, unit rows for
single variables) from ``2k`` solves with the factorisation the solver already holds::

    a = Lᵀ G_Mᵀ,  b = S G_Uᵀ,  s₁ = K⁻¹[a; 0; 0]_w = X a,  s₂ = K⁻¹[0; b; 0]_w = Uᵀ b
    Cov(G z) = aᵀ s₁ + aᵀ s₂ + s₂ᵀ a + s₂ᵀ s₂

(``K`` symmetric), term by term ``G_M Cov(x̂) G_Mᵀ + G_M Cov(x̂, û) G_Uᵀ + … `` of the
full expression, so it equals ``G cov_z Gᵀ`` to rounding.

References
----------
.. [1] VDI 2048 Blatt 1 (2017), propagation of the reconciled covariance.
.. [2] J. Nocedal, S. J. Wright, *Numerical Optimization*, 2nd ed., Springer (2006),
   §16.1 (the inverse of the KKT matrix).
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from twin.reconcile.kkt import KKTFactorisationError, ScaledKKT, column_blocks
from twin.reconcile.linear import REDUNDANCY_FLOOR, _build_result, _solve, classify


def _unavailable() -> ScaledKKT:
    raise KKTFactorisationError("the final KKT system could not be factored")


class LinearisedCovariance:
    """Covariance of linear functionals of the reconciled variables (sparse method).

    Built by :func:`twin.reconcile.reconcile` at the solution; reached through
    :meth:`twin.reconcile.Result.functional_covariance` and
    :meth:`~twin.reconcile.Result.functional_gain`.

    Parameters
    ----------
    kkt : callable returning ScaledKKT
        The factored augmented system at the solution (called once, on first use).
    measured, unmeasured : ndarray of int
        Column indices of the measured and unmeasured variables.
    Lfac : ndarray
        ``σ`` of the measurements (diagonal ``V``) or the Cholesky factor ``L``.
    diagonal : bool
    su : ndarray, shape (p,)
        Scales ``S`` of the unmeasured variables.
    observable : ndarray of bool, shape (p,)
        Observability of the unmeasured variables.
    """

    def __init__(self, kkt, measured: np.ndarray, unmeasured: np.ndarray, Lfac: np.ndarray,
                 diagonal: bool, su: np.ndarray, observable: np.ndarray) -> None:
        self._kkt_source = kkt
        self._kkt: ScaledKKT | None = None
        self.measured, self.unmeasured = measured, unmeasured
        self.Lfac, self.diagonal, self.su = Lfac, diagonal, su
        self.observable = observable
        self.n_vars = measured.size + unmeasured.size

    @property
    def kkt(self) -> ScaledKKT:
        if self._kkt is None:
            self._kkt = self._kkt_source()
            self._kkt_source = None
        return self._kkt

    def __getstate__(self) -> dict:
        state = dict(self.__dict__)
        state["_kkt_source"] = None
        try:
            state["_kkt"] = self.kkt  # ScaledKKT pickles without its factorisation
        except KKTFactorisationError:
            state["_kkt"] = None  # answers NaN after loading
        return state

    def __setstate__(self, state: dict) -> None:
        self.__dict__.update(state)
        if self._kkt is None:
            self._kkt_source = _unavailable

    def _rhs(self, G) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``a`` (n, k), ``b`` (p, k) and the rows of ``G`` that touch an unobservable variable."""
        if sp.issparse(G):
            Gc = sp.csc_matrix(G, dtype=float)
            if Gc.ndim != 2 or Gc.shape[1] != self.n_vars:
                raise ValueError(f"G must have {self.n_vars} columns, got shape {Gc.shape}")
            GM = Gc[:, self.measured].toarray()
            GU_s = Gc[:, self.unmeasured]
            GU = GU_s.toarray()
            bad = np.asarray(abs(GU_s[:, ~self.observable]).sum(axis=1)).reshape(-1) > 0
        else:
            Gd = np.asarray(G, dtype=float)
            if Gd.ndim == 1:
                Gd = Gd[None, :]
            if Gd.ndim != 2 or Gd.shape[1] != self.n_vars:
                raise ValueError(f"G must have {self.n_vars} columns, got shape {Gd.shape}")
            GM, GU = Gd[:, self.measured], Gd[:, self.unmeasured]
            bad = np.any(GU[:, ~self.observable] != 0.0, axis=1)
        if not (np.all(np.isfinite(GM)) and np.all(np.isfinite(GU))):
            raise ValueError("G contains non-finite entries")
        a = self.Lfac[:, None] * GM.T if self.diagonal else self.Lfac.T @ GM.T
        b = self.su[:, None] * GU.T
        return a, b, bad

    def _solves(self, G) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        a, b, bad = self._rhs(G)
        kkt = self.kkt
        n, p, m = kkt.n, kkt.p, kkt.m
        k = a.shape[1]
        rhs = np.zeros((n + p + m, 2 * k))
        rhs[:n, :k] = a
        rhs[n: n + p, k:] = b
        s = kkt.solve(rhs, sweeps=1)
        return a, s[:n, :k], s[:n, k:], bad

    def functional_covariance(self, G) -> np.ndarray:
        """``Cov(G ẑ)`` (k, k); rows and columns of functionals that touch an unobservable variable NaN."""
        a, s1, s2, bad = self._solves(G)
        cross = a.T @ s2
        C = a.T @ s1 + cross + cross.T + s2.T @ s2
        C = 0.5 * (C + C.T)
        C[bad, :] = np.nan
        C[:, bad] = np.nan
        return C

    def functional_gain(self, G) -> np.ndarray:
        """Whitened gain of the functionals (k, n): ``δ(G ẑ) = R δw``, ``Cov(G ẑ) = R Rᵀ``.

        Column ``j`` is the part that comes from measurement ``j`` (see ``Result.gain``);
        rows of functionals that touch an unobservable variable NaN.
        """
        _, s1, s2, bad = self._solves(G)
        R = (s1 + s2).T
        R[bad, :] = np.nan
        return R


def _final_dense(J, z, f, y, V, factor, measured, unmeasured, classification, tol):
    """Classification and covariances by the dense projection at the solution."""
    JM, JU = J[:, measured], J[:, unmeasured]
    core = _solve(JM, y, V, JU, JM @ z[measured] - f, tol, factor)
    lin = _build_result(core, JM, y, classification, measured, unmeasured, tol)
    return lin.classification, lin.cov_x, lin.cov_xu, lin.cov_u, None


def _final_sparse(J, y, V, sigma, vs, rs, sparse_step, measured, unmeasured,
                  classification, tol, covariance):
    """Classification (unless given) and the linearised covariance from the sparse KKT.

    ``ŵ = X g`` and ``v̂ = U g`` for whitened data ``g``, so ``Cov(x̂) = L X Lᵀ``,
    ``Cov(x̂, û) = L Uᵀ S`` and ``Cov(û) = S U Uᵀ S`` (see :class:`ScaledKKT`).
    With ``covariance="diagonal"`` only ``diag Cov(x̂)`` is returned (as ``cov_x``, 1-D).
    """
    cls = classification
    if cls is None:
        cls = classify(J, measured, sigma=sigma, var_scale=vs, residual_scale=rs, rank_tol=tol)
    n, p = measured.size, unmeasured.size
    if covariance == "none":
        return cls, None, None, None, None
    kkt = sparse_step.factor(J)
    Lfac, diagonal = sparse_step.Lfac, sparse_step.diagonal
    if covariance == "diagonal":
        return cls, measured_variances(kkt, Lfac, diagonal), None, None, None
    X, U = kkt.sensitivities()
    X = 0.5 * (X + X.T)
    if diagonal:
        cov_x = Lfac[:, None] * X * Lfac[None, :]
        LUt = Lfac[:, None] * U.T
    else:
        cov_x = Lfac @ X @ Lfac.T
        LUt = Lfac @ U.T
    if covariance != "full":
        return cls, cov_x, np.zeros((n, p)), np.zeros((p, p)), None
    su = sparse_step.su
    cov_xu = LUt * su[None, :]
    SU = su[:, None] * U
    cov_u = SU @ SU.T
    # whitened gains: δx̂ = L X δw, δû = S U δw (X symmetric)
    gx = Lfac[:, None] * X if diagonal else Lfac @ X
    return cls, cov_x, cov_xu, cov_u, (gx, SU)


def measured_variances(kkt: ScaledKKT, Lfac: np.ndarray, diagonal: bool) -> np.ndarray:
    """``diag Cov(x̂) = diag(L X Lᵀ)`` (n,) from the factored KKT system.

    With a diagonal ``V`` only ``diag X`` is needed: the columns of ``X`` are solved
    :data:`~twin.reconcile.kkt.SOLVE_CHUNK` at a time (each column's solve is independent, so the
    numbers are those of :meth:`ScaledKKT.sensitivities`) and only their diagonal kept.
    """
    if not diagonal:
        X, _ = kkt.sensitivities()
        return np.einsum("ij,ij->i", Lfac @ X, Lfac)
    n = kkt.n
    dX = np.empty(n)
    for j0, j1 in column_blocks(n):
        s = kkt.unit_solves(j0, j1)
        dX[j0:j1] = s[np.arange(j0, j1), np.arange(j1 - j0)]
    return Lfac**2 * dX


def covariance_fields(mode, V, cov_x, cov_xu, cov_u, gain_parts, adj, cls, measured, unmeasured):
    """The covariance fields of a :class:`~twin.reconcile.Result`: ``cov_z``, ``cov_a``,
    ``var_x``, ``var_a``, ``z``, ``redundancy`` and ``gain`` for covariance ``mode``.

    Modes ``"diagonal"`` and ``"none"`` give read-only all-NaN ``cov_z`` and ``cov_a``
    (no memory is spent on them).
    """
    n, p = measured.size, unmeasured.size
    n_vars = n + p
    nan = float("nan")
    observable = cls.observable
    z_norm = np.full(n, nan)
    redundancy = np.full(n, nan)
    var_x = np.full(n, nan)
    var_a = np.full(n, nan)
    Vd = np.diag(V) if V.ndim == 2 else V
    if mode in ("diagonal", "none"):
        cov_z = np.broadcast_to(np.float64(nan), (n_vars, n_vars))
        cov_a = np.broadcast_to(np.float64(nan), (n, n))
    else:
        cov_z = None  # set below: in full mode from all four blocks at once
        cov_a = (np.diag(V) if V.ndim == 1 else V) - cov_x
    if mode != "none":
        var_x = np.diag(cov_x).copy() if cov_x.ndim == 2 else np.asarray(cov_x, dtype=float)
        var_a = Vd - var_x
        redundancy = np.where(cls.redundant, 1.0 - var_x / Vd, 0.0)
        ok = cls.redundant & (var_a > 0) & (redundancy > REDUNDANCY_FLOOR)
        z_norm[ok] = adj[ok] / np.sqrt(var_a[ok])
    if mode == "full":
        # the blocks in [measured, unmeasured] order, NaN rows and columns for the unobservable
        # unmeasured variables, then every variable's row and column taken to its place
        blocks = np.block([[cov_x, cov_xu], [cov_xu.T, cov_u]])
        hidden = n + np.flatnonzero(~observable)
        blocks[hidden, :] = nan
        blocks[:, hidden] = nan
        where = np.empty(n_vars, dtype=np.intp)
        where[measured] = np.arange(n)
        where[unmeasured] = np.arange(n, n_vars)
        cov_z = blocks[np.ix_(where, where)]
    elif cov_z is None:
        cov_z = np.full((n_vars, n_vars), nan)
        cov_z[np.ix_(measured, measured)] = cov_x
    gain = None
    if gain_parts is not None and mode == "full":
        gx, gu = gain_parts
        gain = np.empty((n_vars, n))
        gain[measured] = gx
        gain[unmeasured] = gu
        gain[unmeasured[~observable]] = nan
    return dict(cov_z=cov_z, cov_a=cov_a, var_x=var_x, var_a=var_a, z=z_norm,
                redundancy=redundancy, gain=gain)


def dense_functional_covariance(G, cov_z: np.ndarray, unmeasured: np.ndarray,
                                observable: np.ndarray) -> np.ndarray:
    """``G cov_z Gᵀ`` with the NaN rule of :meth:`LinearisedCovariance.functional_covariance`."""
    Gd = G.toarray() if sp.issparse(G) else np.asarray(G, dtype=float)
    if Gd.ndim == 1:
        Gd = Gd[None, :]
    if Gd.ndim != 2 or Gd.shape[1] != cov_z.shape[0]:
        raise ValueError(f"G must have {cov_z.shape[0]} columns, got shape {Gd.shape}")
    bad = np.any(Gd[:, unmeasured[~observable]] != 0.0, axis=1)
    C = Gd @ np.nan_to_num(cov_z, nan=0.0) @ Gd.T
    C[bad, :] = np.nan
    C[:, bad] = np.nan
    return C
