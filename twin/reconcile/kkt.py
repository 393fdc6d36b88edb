"""Sparse KKT solves for the Gauss-Newton steps and the linearised covariance.

One step of :func:`twin.reconcile.nonlinear.reconcile` solves, in scaled variables
(measured ``w = L⁻¹x`` with ``V = L Lᵀ``, unmeasured ``v = u / s_u``, rows divided by
the residual scales)::

    min ½‖g − dw‖² + ½ ε‖dv‖²   subject to   C_w dw + C_v dv = −f̃

through the symmetric quasi-definite augmented system::

    [ I    0    C_wᵀ ] [dw]   [  g ]
    [ 0    εI   C_vᵀ ] [dv] = [  0 ]
    [ C_w  C_v  −δI  ] [λ ]   [ −f̃ ]

factored once by sparse LU (``scipy.sparse.linalg.splu``) and polished by iterative
refinement against the system with ``δ = 0``. The tiny ``ε`` gives unobservable
directions the minimum-norm (zero) step; ``δ`` keeps the factorisation defined when
constraints are linearly dependent. Neither changes a converged solution: at a fixed
point the step is zero and the conditions above are the exact optimality conditions.

References
----------
.. [1] R. J. Vanderbei, "Symmetric quasidefinite matrices", SIAM J. Optim. 5(1),
   100–113 (1995).
.. [2] J. Nocedal, S. J. Wright, *Numerical Optimization*, 2nd ed., Springer (2006),
   §16.1–16.2 (KKT systems of equality-constrained quadratic programs).
"""

from __future__ import annotations

import warnings

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

#: Regularisation of the unmeasured block (relative to the unit weight of measurements).
EPS_UNMEASURED = 1e-9
#: Regularisation of the constraint block (allows dependent constraint rows).
DELTA_CONSTRAINTS = 1e-11
#: Iterative-refinement sweeps against the system without ``δ``.
REFINE_SWEEPS = 2
#: Right-hand sides solved at a time for many columns (above twice this many): each
#: column's solve is independent (same numbers), and blocks of this width stay in cache
#: (n = 2 000 synthetic networks: 0.4-0.5x the time of one wide solve; demo-u1's 118
#: columns stay one solve, where two blocks measured 1.04-1.2x).
SOLVE_CHUNK = 64


def column_blocks(n: int) -> list[tuple[int, int]]:
    """``[(j0, j1), …]`` covering ``range(n)`` in blocks of :data:`SOLVE_CHUNK` (one block up to 2×)."""
    width = n if n <= 2 * SOLVE_CHUNK else SOLVE_CHUNK
    return [(j0, min(n, j0 + width)) for j0 in range(0, max(n, 1), max(width, 1))]


class KKTFactorisationError(ArithmeticError):
    """The augmented system could not be factored (numerically singular)."""


#: Fill-reducing ordering of the augmented matrix (SuperLU's ``permc_spec``).
ORDERING = "MMD_AT_PLUS_A"
_LU_OPTIONS: dict = {"diag_pivot_thresh": 0.01, "options": {"SymmetricMode": True}}


class _Structure:
    """CSC structure of the augmented matrix for one Jacobian sparsity and measured set (diagonal V),
    symmetrically permuted by the matrix's fill-reducing ordering.

    ``perm`` takes the entries in the order ``[diagonal, C (lower block), Cᵀ (upper block)]``
    to their CSC positions; ``rows`` is the row of every Jacobian entry (CSR order);
    ``order[i]`` is the unknown (``[w, v, λ]`` numbering) at row and column ``i`` of the
    permuted matrix. The ordering is SuperLU's :data:`ORDERING` with its elimination-tree
    postorder, a function of the sparsity alone: taken once from the structure's first
    matrix (:meth:`take_order`), every later matrix of this structure is factored in that
    order without ordering it again (``permc_spec="NATURAL"``: 0.29 instead of 0.50 ms
    for demo-u1's 515 unknowns, the same fill).
    """

    __slots__ = ("hd", "indices", "indptr", "order", "perm", "pos", "rc", "rows", "shape")

    def __init__(self, J: sp.csr_matrix, measured: np.ndarray, unmeasured: np.ndarray) -> None:
        m, n_vars = J.shape
        n, p = measured.size, unmeasured.size
        N = n + p
        self.rows = np.repeat(np.arange(m, dtype=np.int64), np.diff(J.indptr))
        pos = np.empty(n_vars, dtype=np.int64)
        pos[measured] = np.arange(n)
        pos[unmeasured] = np.arange(n, N)
        self.pos = pos
        self.hd = np.r_[np.ones(n), np.full(p, EPS_UNMEASURED), np.full(m, -DELTA_CONSTRAINTS)]
        ci, cj = self.rows, pos[J.indices]
        diag = np.arange(N + m)
        self.rc = (np.r_[diag, N + ci, cj], np.r_[diag, cj, N + ci])
        self.shape = (N + m, N + m)
        self.order: np.ndarray | None = None
        self._build(*self.rc)

    def _build(self, r: np.ndarray, c: np.ndarray) -> None:
        # the entries' own positions, carried through the conversion (no entry repeats)
        csc = sp.csc_matrix((np.arange(1, r.size + 1, dtype=float), (r, c)), shape=self.shape)
        self.perm = csc.data.astype(np.int64) - 1
        self.indices, self.indptr = csc.indices, csc.indptr

    def take_order(self, K: sp.csc_matrix) -> None:
        """Order this structure as SuperLU orders ``K`` (its first matrix, unpermuted)."""
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("error", spla.MatrixRankWarning)
                lu = spla.splu(K, permc_spec=ORDERING, **_LU_OPTIONS)
        except (RuntimeError, spla.MatrixRankWarning):
            return  # singular: stays unordered (ScaledKKT orders each matrix itself and reports it)
        # splu's perm_c takes unknown j to position perm_c[j]
        r, c = self.rc
        self._build(lu.perm_c[r], lu.perm_c[c])
        self.order = np.argsort(lu.perm_c)

    def matrix(self, J: sp.csr_matrix, measured: np.ndarray, unmeasured: np.ndarray, sigma: np.ndarray,
               var_scale_u: np.ndarray, residual_scale: np.ndarray) -> sp.csc_matrix:
        colscale = np.empty(J.shape[1])
        colscale[unmeasured] = var_scale_u
        colscale[measured] = sigma
        cv = J.data / residual_scale[self.rows] * colscale[J.indices]
        data = np.concatenate([self.hd, cv, cv])[self.perm]
        return sp.csc_matrix((data, self.indices.copy(), self.indptr.copy()), shape=self.shape)


_STRUCTURES: dict[tuple, _Structure] = {}


def _assemble_diagonal(J: sp.csr_matrix, measured: np.ndarray, unmeasured: np.ndarray, sigma: np.ndarray,
                       var_scale_u: np.ndarray, residual_scale: np.ndarray) -> tuple[sp.csc_matrix, np.ndarray | None]:
    """The augmented matrix (diagonal ``V``) in a CSC structure built once per sparsity and measured set,
    and its order (see :class:`_Structure`; None: unordered). Entry for entry the matrix assembled
    from coordinates, rows and columns taken in that order.
    """
    key = (J.shape, measured.tobytes(), J.indptr.tobytes(), J.indices.tobytes())
    st = _STRUCTURES.get(key)
    args = (J, measured, unmeasured, sigma, var_scale_u, residual_scale)
    if st is None:
        if len(_STRUCTURES) >= 16:
            _STRUCTURES.clear()
        st = _Structure(J, measured, unmeasured)
        K = st.matrix(*args)
        st.take_order(K)
        if st.order is None:  # singular: not kept, so the structure's order never depends on which matrix came first
            return K, None
        _STRUCTURES[key] = st
    return st.matrix(*args), st.order


class ScaledKKT:
    """The factored augmented system of one linearisation (internal helper).

    Parameters
    ----------
    J : sparse matrix, shape (m, n_vars)
        Jacobian over all variables.
    measured, unmeasured : ndarray of int
        Column indices; the KKT unknowns are ordered ``[w (measured), v (unmeasured), λ]``.
    Lfac : ndarray
        ``σ`` of the measurements (diagonal ``V``) or the Cholesky factor ``L``.
    diagonal : bool
    var_scale_u : ndarray, shape (p,)
        Scales ``s_u`` of the unmeasured variables.
    residual_scale : ndarray, shape (m,)
        Scales of the constraint rows.
    """

    def __init__(self, J: sp.spmatrix, measured: np.ndarray, unmeasured: np.ndarray,
                 Lfac: np.ndarray, diagonal: bool, var_scale_u: np.ndarray,
                 residual_scale: np.ndarray) -> None:
        m, n_vars = J.shape
        n, p = measured.size, unmeasured.size
        self.n, self.p, self.m = n, p, m
        N = n + p
        #: the unknown at each row/column of K (None: K in the [w, v, λ] numbering, SuperLU orders it)
        self._order: np.ndarray | None = None
        if diagonal and J.format == "csr" and J.has_canonical_format:
            K, self._order = _assemble_diagonal(J, measured, unmeasured, Lfac, var_scale_u, residual_scale)
        else:
            Jc = sp.coo_matrix(J)
            rows, cols, vals = Jc.row, Jc.col, Jc.data / residual_scale[Jc.row]
            pos = np.empty(n_vars, dtype=np.int64)
            pos[measured] = np.arange(n)
            pos[unmeasured] = np.arange(n, N)
            colscale = np.empty(n_vars)
            colscale[unmeasured] = var_scale_u
            if diagonal:
                colscale[measured] = Lfac
                keep = np.ones(rows.size, dtype=bool)
            else:  # C_w = D_r J_M L is formed densely (correlated measurements are few)
                colscale[measured] = 1.0
                keep = np.isin(cols, unmeasured)
            ci, cj, cv = rows[keep], pos[cols[keep]], vals[keep] * colscale[cols[keep]]
            if not diagonal:
                Dr = sp.diags(1.0 / residual_scale)
                Cw = np.asarray((Dr @ sp.csr_matrix(J)[:, measured]) @ Lfac)
                wi, wj = np.nonzero(Cw)
                ci, cj, cv = np.r_[ci, wi], np.r_[cj, wj], np.r_[cv, Cw[wi, wj]]
            diag = np.arange(N + m)
            hd = np.r_[np.ones(n), np.full(p, EPS_UNMEASURED), np.full(m, -DELTA_CONSTRAINTS)]
            K = sp.csc_matrix((np.r_[hd, cv, cv], (np.r_[diag, N + ci, cj], np.r_[diag, cj, N + ci])),
                              shape=(N + m, N + m))
        self.K = K
        delta = np.r_[np.zeros(N), np.full(m, DELTA_CONSTRAINTS)]
        self._delta = delta if self._order is None else delta[self._order]
        #: the row of K holding each unknown (``[w, v, λ]`` numbering)
        self._where = np.arange(N + m) if self._order is None else np.argsort(self._order)
        self._factor()

    def _factor(self) -> None:
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("error", spla.MatrixRankWarning)
                # symmetric ordering with a small pivot threshold keeps the fill low; a K already
                # in its structure's order is factored in that order
                self.lu = spla.splu(self.K, permc_spec=ORDERING if self._order is None else "NATURAL", **_LU_OPTIONS)
        except (RuntimeError, spla.MatrixRankWarning) as exc:
            raise KKTFactorisationError(f"KKT system is singular: {exc}") from None

    def __getstate__(self) -> dict:
        state = dict(self.__dict__)
        del state["lu"]  # a SuperLU object does not pickle: factored again on load
        return state

    def __setstate__(self, state: dict) -> None:
        self.__dict__.update(state)
        self._factor()

    def solve(self, rhs: np.ndarray, sweeps: int = REFINE_SWEEPS) -> np.ndarray:
        """Solve ``K0 s = rhs`` (one or many columns) with iterative refinement.

        ``K0`` is the factored matrix without the ``−δI`` block.
        """
        order = self._order
        if order is None:
            return self._refined(rhs, sweeps)
        s = self._refined(rhs[order], sweeps)
        out = np.empty_like(s)  # in s's memory layout, which the callers' products see
        out[order] = s
        return out

    def _refined(self, rhs: np.ndarray, sweeps: int) -> np.ndarray:
        """``K0 s = rhs`` with ``rhs`` and ``s`` in the rows of the factored matrix, refined ``sweeps`` times."""
        s = self.lu.solve(rhs)
        delta = self._delta if rhs.ndim == 1 else self._delta[:, None]
        for _ in range(sweeps):
            s = s + self.lu.solve(rhs - (self.K @ s + delta * s))
        if not np.all(np.isfinite(s)):
            raise KKTFactorisationError("KKT solve produced non-finite values")
        return s

    def step(self, g: np.ndarray, f_scaled: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Scaled step ``(dw, dv)`` for the whitened residual ``g`` and scaled ``f``."""
        rhs = np.concatenate([g, np.zeros(self.p), -f_scaled])
        s = self.solve(rhs)
        return s[: self.n], s[self.n: self.n + self.p]

    def sensitivities(self) -> tuple[np.ndarray, np.ndarray]:
        """``(X, U)``: ``ŵ = X g`` and ``v̂ = U g`` for whitened data ``g`` (linear problem).

        ``X`` (n, n) is the orthogonal projector onto the whitened measurement space
        allowed by the constraints, so ``Cov(ŵ) = X``, ``Cov(v̂, ŵ) = U`` and
        ``Cov(v̂) = U Uᵀ`` (minimum-norm values in unobservable directions).
        """
        n, p = self.n, self.p
        X = np.empty((n, n))
        U = np.empty((p, n))
        for j0, j1 in column_blocks(n):
            s = self.unit_solves(j0, j1)
            X[:, j0:j1] = s[:n]
            U[:, j0:j1] = s[n:]
        return X, U

    def unit_solves(self, j0: int, j1: int) -> np.ndarray:
        """Rows ``[w, v]`` of the solutions of ``K0 s = e_j`` for the measured unknowns ``j0 ≤ j < j1``.

        The numbers of :meth:`solve` with one refinement sweep on those unit columns,
        the right-hand side set up in the factored matrix's order and in the column
        layout SuperLU solves in, and only the rows asked for taken back.
        """
        k = j1 - j0
        where = self._where
        rhs = np.zeros((self.n + self.p + self.m, k), order="F")
        rhs[where[j0:j1], np.arange(k)] = 1.0
        return self._refined(rhs, 1)[where[: self.n + self.p]]
