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


class KKTFactorisationError(ArithmeticError):
    """The augmented system could not be factored (numerically singular)."""


class ScaledKKT:
    """The factored augmented system of one linearisation (internal helper).

    Parameters
    ----------
    Cw : sparse matrix, shape (m, n)
        Scaled Jacobian of the measured variables, ``D_r J_M L``.
    Cv : sparse matrix, shape (m, p)
        Scaled Jacobian of the unmeasured variables, ``D_r J_U S_u``.
    """

    def __init__(self, Cw: sp.spmatrix, Cv: sp.spmatrix) -> None:
        m, n = Cw.shape
        p = Cv.shape[1]
        self.n, self.p, self.m = n, p, m
        C = sp.hstack([Cw, Cv], format="csr")
        H = sp.diags(np.r_[np.ones(n), np.full(p, EPS_UNMEASURED)])
        self.K0 = sp.bmat([[H, C.T], [C, None]], format="csc")
        K = self.K0 + sp.diags(np.r_[np.zeros(n + p), np.full(m, -DELTA_CONSTRAINTS)], format="csc")
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("error", spla.MatrixRankWarning)
                # symmetric ordering with a small pivot threshold keeps the fill low
                self.lu = spla.splu(K, permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.01,
                                    options={"SymmetricMode": True})
        except (RuntimeError, spla.MatrixRankWarning) as exc:
            raise KKTFactorisationError(f"KKT system is singular: {exc}") from None

    def solve(self, rhs: np.ndarray) -> np.ndarray:
        """Solve ``K0 s = rhs`` (one or many columns) with iterative refinement."""
        s = self.lu.solve(rhs)
        for _ in range(REFINE_SWEEPS):
            s = s + self.lu.solve(rhs - self.K0 @ s)
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
        rhs = np.zeros((self.n + self.p + self.m, self.n))
        rhs[: self.n] = np.eye(self.n)
        s = self.solve(rhs)
        return s[: self.n], s[self.n: self.n + self.p]


def scaled_blocks(J: sp.spmatrix, measured: np.ndarray, unmeasured: np.ndarray,
                  Lfac: np.ndarray, diagonal: bool, var_scale_u: np.ndarray,
                  residual_scale: np.ndarray) -> tuple[sp.csr_matrix, sp.csr_matrix]:
    """``(D_r J_M L, D_r J_U S_u)`` as sparse matrices."""
    J = sp.csr_matrix(J)
    Dr = sp.diags(1.0 / residual_scale)
    JM = Dr @ J[:, measured]
    if diagonal:
        Cw = JM @ sp.diags(Lfac)
    else:
        Cw = sp.csr_matrix(JM @ Lfac)
    Cv = Dr @ J[:, unmeasured] @ sp.diags(var_scale_u)
    return sp.csr_matrix(Cw), sp.csr_matrix(Cv)
