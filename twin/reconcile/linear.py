"""Linear data reconciliation in closed form, with unmeasured variables.

The constraints are ``A x + B u = c`` with ``x`` the measured variables (measurements
``y``, covariance ``V``) and ``u`` the unmeasured ones. The unmeasured variables are
eliminated by projection (Crowe, Garcia Campos & Hrymak 1983): a column-pivoted QR
factorisation of ``B`` gives a matrix ``P`` whose rows span the left null space of
``B`` (``P B = 0``), the measured variables are reconciled against ``P A x = P c``,
and the observable unmeasured variables follow by least squares from
``B u = c − A x̂``.

All rank decisions use one relative tolerance ``rank_tol`` (default
:data:`DEFAULT_RANK_TOL`) on problems that are first equilibrated: measured columns
are scaled by their standard deviation, unmeasured columns to unit norm, and every
constraint row to unit norm. See :func:`classify` for the exact rules.

References
----------
.. [1] C. M. Crowe, Y. A. Garcia Campos, A. Hrymak, "Reconciliation of process flow
   rates by matrix projection. Part I: linear case", AIChE J. 29(6), 881–888 (1983).
.. [2] VDI 2048 Blatt 1, "Messunsicherheiten bei Abnahmemessungen — Grundlagen" (2017).
.. [3] S. Narasimhan, C. Jordache, *Data Reconciliation and Gross Error Detection*,
   Gulf Publishing (2000), ch. 3 and 7.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp
from scipy.special import chdtrc

#: Default relative tolerance for every rank decision (see :func:`classify`).
DEFAULT_RANK_TOL = 1e-9

#: Relative tolerance on the projected constraint residual after reconciliation;
#: larger means the constraints contradict each other.
_CONSISTENCY_TOL = 1e-7


class InconsistentConstraintsError(ValueError):
    """The constraints have no solution for any value of the measured variables."""


#: Redundancy ``h = 1 − Var(x̂)/Var(y)`` at or below which a measurement gets no normalised
#: adjustment (``z`` NaN: not tested). ``σ(a) = sqrt(h)·σ``, so at ``h = 1e-3`` the
#: adjustment's standard deviation is 3 % of the instrument's σ: below that ``z`` divides
#: rounding, solver-tolerance and linearisation residues by a vanishing σ (a thermometer
#: with ``h = 1.4e-9`` got ``z = −41`` from a 0.0004 K adjustment), and a bias would have
#: to exceed about 110 σ to be detected with 90 % power at the Šidák limit anyway.
REDUNDANCY_FLOOR = 1e-3


@dataclass(frozen=True)
class Classification:
    """Redundancy of measurements and observability of unmeasured variables.

    Attributes
    ----------
    measured : ndarray of int
        Indices (into the full variable vector) of the measured variables, in the
        order of the measurement vector; for a plain ``A x + B u = c`` problem this is
        ``arange(n)``.
    unmeasured : ndarray of int
        Indices of the unmeasured variables, in the order of ``u``.
    redundant : ndarray of bool, shape (n,)
        True where the measurement takes part in at least one projected constraint,
        i.e. it could be estimated from the other measurements.
    observable : ndarray of bool, shape (p,)
        True where the unmeasured variable is uniquely determined by the measurements.
    dof : int
        Number of independent projected constraints (redundancy of the system); the
        degrees of freedom of the global test.
    rank_unmeasured : int
        Rank of the unmeasured-variable block ``B``.
    rank_tol : float
        The relative tolerance used.
    """

    measured: np.ndarray
    unmeasured: np.ndarray
    redundant: np.ndarray
    observable: np.ndarray
    dof: int
    rank_unmeasured: int
    rank_tol: float

    @property
    def determined(self) -> np.ndarray:
        """Boolean mask over all variables: measured, or unmeasured and observable."""
        n_vars = len(self.measured) + len(self.unmeasured)
        out = np.zeros(n_vars, dtype=bool)
        out[self.measured] = True
        out[self.unmeasured[self.observable]] = True
        return out


@dataclass(frozen=True)
class LinearResult:
    """Outcome of :func:`reconcile_linear`.

    Attributes
    ----------
    x_hat : ndarray, shape (n,)
        Reconciled measured variables.
    cov_x : ndarray, shape (n, n)
        Full covariance of ``x_hat``.
    adjustments : ndarray, shape (n,)
        ``a = y − x_hat``.
    cov_a : ndarray, shape (n, n)
        Covariance of the adjustments; ``V = cov_x + cov_a``.
    u_hat : ndarray, shape (p,)
        Estimated unmeasured variables, NaN where unobservable.
    cov_u : ndarray, shape (p, p)
        Covariance of ``u_hat``, NaN in rows/columns of unobservable entries.
    cov_xu : ndarray, shape (n, p)
        Cross-covariance of ``x_hat`` and ``u_hat`` (NaN columns where unobservable).
    gamma : float
        Global test statistic ``aᵀ V⁻¹ a`` (χ² with ``dof`` degrees of freedom).
    dof : int
        Rank of the projected constraints.
    p_value : float
        ``P(χ²(dof) ≥ gamma)``; NaN when ``dof == 0`` (nothing to test).
    z : ndarray, shape (n,)
        Normalised adjustments ``a_j / sqrt(cov_a_jj)``; NaN where not redundant or where the
        redundancy is at or below :data:`REDUNDANCY_FLOOR` (not tested).
    redundant : ndarray of bool, shape (n,)
    observable : ndarray of bool, shape (p,)
    redundancy : ndarray, shape (n,)
        ``h_j = 1 − Var(x̂_j) / V_jj`` (0 for non-redundant measurements).
    classification : Classification
    """

    x_hat: np.ndarray
    cov_x: np.ndarray
    adjustments: np.ndarray
    cov_a: np.ndarray
    u_hat: np.ndarray
    cov_u: np.ndarray
    cov_xu: np.ndarray
    gamma: float
    dof: int
    p_value: float
    z: np.ndarray
    redundant: np.ndarray
    observable: np.ndarray
    redundancy: np.ndarray
    classification: Classification


# --------------------------------------------------------------------------- helpers


def _dense(M) -> np.ndarray:
    if sp.issparse(M):
        return np.asarray(M.toarray(), dtype=float)
    return np.array(M, dtype=float, copy=True)


def _check_y(y, n: int) -> np.ndarray:
    """``y`` as a finite 1-D float array of length ``n``, else a ValueError naming what is wrong."""
    y = np.asarray(y, dtype=float).reshape(-1)
    if y.shape != (n,):
        raise ValueError(f"y has shape {y.shape}, expected ({n},) to match A columns")
    bad = np.flatnonzero(~np.isfinite(y))
    if bad.size:
        raise ValueError(f"y contains non-finite values at indices {bad.tolist()}")
    return y


def _check_inputs(A, y, V, B, c):
    A = _dense(A)
    if A.ndim != 2:
        raise ValueError(f"A must be 2-D, got shape {A.shape}")
    m, n = A.shape
    if n == 0:
        raise ValueError("no measurements: A has no columns (all measurements removed?)")
    y = _check_y(y, n)
    V = _dense(V)
    if V.ndim == 1:
        V = np.diag(V)
    if V.shape != (n, n):
        raise ValueError(f"V has shape {V.shape}, expected ({n}, {n})")
    if not np.all(np.isfinite(V)):
        raise ValueError("V contains non-finite values")
    B = np.zeros((m, 0)) if B is None else _dense(B)
    if B.ndim != 2 or B.shape[0] != m:
        raise ValueError(f"B has shape {B.shape}, expected ({m}, p)")
    c = np.zeros(m) if c is None else np.asarray(c, dtype=float).reshape(-1)
    if c.shape != (m,):
        raise ValueError(f"c has shape {c.shape}, expected ({m},)")
    if not (np.all(np.isfinite(A)) and np.all(np.isfinite(B)) and np.all(np.isfinite(c))):
        raise ValueError("A, B or c contains non-finite values")
    return A, y, V, B, c


def _cov_factor(V: np.ndarray) -> tuple[np.ndarray, bool]:
    """Return (L, is_diagonal): V = L Lᵀ; for diagonal V, L is the vector of σ."""
    d = np.diag(V)
    diagonal = np.count_nonzero(V) == np.count_nonzero(d)
    if diagonal:
        bad = np.flatnonzero(d <= 0.0)
        if bad.size:
            raise ValueError(f"V is singular: non-positive variance at indices {bad.tolist()}")
        return np.sqrt(d), True
    if not np.allclose(V, V.T, rtol=1e-10, atol=0.0):
        raise ValueError("V is not symmetric")
    try:
        L = sla.cholesky(V, lower=True)
    except sla.LinAlgError as exc:
        raise ValueError("V is singular or not positive definite") from exc
    if np.min(np.abs(np.diag(L))) <= 1e-12 * np.max(np.abs(np.diag(L))):
        raise ValueError("V is numerically singular")
    return L, False


def _left_mul(M: np.ndarray, A: np.ndarray) -> np.ndarray:
    """``M @ A`` exploiting the sparsity of a large network matrix ``A``."""
    if A.size < 40_000:
        return M @ A
    return np.asarray((sp.csr_matrix(A).T @ M.T).T)


@dataclass
class _Projection:
    """Everything the projection of one problem produces (internal)."""

    Ap: np.ndarray  # projected, row-scaled constraint matrix (q, n)
    cp: np.ndarray  # projected right-hand side (q,)
    T: np.ndarray  # u = T (c − A x), shape (p, m), zero rows where not basic
    redundant: np.ndarray
    observable: np.ndarray
    rank_b: int


def _project(A, B, c, sigma, rank_tol) -> _Projection:
    """Equilibrate, QR-factorise B with column pivoting, and project A and c."""
    m, n = A.shape
    p = B.shape[1]
    bnorm = np.linalg.norm(B, axis=0)
    dB = np.where(bnorm > 0.0, 1.0 / np.where(bnorm > 0, bnorm, 1.0), 1.0)
    Bs = B * dB
    rows = np.sqrt(np.sum((A * sigma) ** 2, axis=1) + np.sum(Bs**2, axis=1))
    dr = np.where(rows > 0.0, 1.0 / np.where(rows > 0, rows, 1.0), 1.0)
    As = A * dr[:, None]
    Bs = Bs * dr[:, None]
    cs = c * dr
    if p == 0 or not np.any(Bs):
        rank_b = 0
        Ap, cp = As, cs
        T = np.zeros((p, m))
        observable = np.zeros(p, dtype=bool)
    else:
        Q, R, piv = sla.qr(Bs, mode="full", pivoting=True)
        diag = np.abs(np.diag(R))
        rank_b = int(np.count_nonzero(diag > rank_tol * diag[0]))
        Q2 = Q[:, rank_b:]
        Ap = _left_mul(Q2.T, As)
        cp = Q2.T @ cs
        R11 = R[:rank_b, :rank_b]
        # null space of B: basic = −R11⁻¹ R12 · nonbasic; a basic variable is
        # observable iff its row of R11⁻¹ R12 vanishes; non-basic ones never are.
        N = sla.solve_triangular(R11, R[:rank_b, rank_b:])
        scale = max(1.0, float(np.max(np.abs(N)))) if N.size else 1.0
        obs_basic = np.all(np.abs(N) <= rank_tol * scale, axis=1)
        observable = np.zeros(p, dtype=bool)
        observable[piv[:rank_b]] = obs_basic
        Ts = np.zeros((p, m))
        Ts[piv[:rank_b]] = sla.solve_triangular(R11, Q[:, :rank_b].T)
        T = (dB[:, None] * Ts) * dr[None, :]
    colA = np.linalg.norm(As, axis=0)
    colP = np.linalg.norm(Ap, axis=0) if Ap.shape[0] else np.zeros(n)
    redundant = colP > np.sqrt(rank_tol) * np.where(colA > 0, colA, 1.0)
    redundant &= colA > 0
    return _Projection(Ap, cp, T, redundant, observable, rank_b)


def _reduce_rows(Ap, cp, Lfac, diagonal, rank_tol):
    """Orthonormal independent constraints in whitened space (internal).

    Returns ``LG`` (n, k) = L Gᵀ and the whitened residual ``r`` (k,) such that
    ``x̂ = y − LG r`` given ``r = R⁻ᵀ (Ap[sel] y − cp[sel])``, plus (R11, sel).
    """
    n = Ap.shape[1]
    if Ap.shape[0] == 0:
        return np.zeros((n, 0)), np.zeros((0, 0)), np.zeros(0, dtype=int)
    W = (Ap * Lfac).T if diagonal else (Ap @ Lfac).T  # (n, q) = (Ap L)ᵀ
    if W.shape[1] <= W.shape[0]:
        # fast path: unpivoted QR is enough when no diagonal entry of R is small
        Q, R = sla.qr(W, mode="economic")
        diag = np.abs(np.diag(R))
        if diag.size and np.all(diag > rank_tol * np.max(diag)):
            LG = Lfac[:, None] * Q if diagonal else Lfac @ Q
            return LG, R, np.arange(W.shape[1])
    Q, R, piv = sla.qr(W, mode="economic", pivoting=True)
    diag = np.abs(np.diag(R))
    if diag.size == 0 or diag[0] == 0.0:
        return np.zeros((n, 0)), np.zeros((0, 0)), np.zeros(0, dtype=int)
    k = int(np.count_nonzero(diag > rank_tol * diag[0]))
    G_T = Q[:, :k]
    LG = Lfac[:, None] * G_T if diagonal else Lfac @ G_T
    return LG, R[:k, :k], piv[:k]


# --------------------------------------------------------------------------- classify


def classify(J, measured, *, sigma=None, var_scale=None, residual_scale=None,
             rank_tol: float | None = None) -> Classification:
    """Classify measurements (redundant or not) and unmeasured variables (observable or not).

    Parameters
    ----------
    J : array_like or sparse matrix, shape (m, n_vars)
        Constraint matrix (or Jacobian of nonlinear constraints) over all variables.
    measured : array_like of int
        Indices of the measured variables; all others are unmeasured.
    sigma : array_like, shape (n,), optional
        Standard deviations of the measurements, used as column scales [unit of the
        variable]. Default: ``var_scale`` of those columns, else 1.
    var_scale, residual_scale : array_like, optional
        Typical magnitudes of the variables (n_vars,) and of the constraint residuals
        (m,); columns are multiplied and rows divided by them before any rank
        decision. Unmeasured columns are further normalised to unit norm.
    rank_tol : float, optional
        Relative tolerance (default :data:`DEFAULT_RANK_TOL`). After equilibration
        (every row of the scaled ``[A B]`` has unit norm): the rank of ``B`` counts
        diagonal entries of its pivoted ``R`` above ``rank_tol·|R₁₁|``; an unmeasured
        variable is unobservable when its row of the null-space basis ``R₁₁⁻¹R₁₂`` has
        an entry above ``rank_tol·max(1, max|R₁₁⁻¹R₁₂|)`` or it is a non-basic column;
        a measurement is redundant when its projected column keeps more than
        ``sqrt(rank_tol)`` of its norm; the degrees of freedom count pivoted-QR
        diagonal entries of the projected, whitened constraints above ``rank_tol``.

    Returns
    -------
    Classification

    Notes
    -----
    Cost: one pivoted QR of the unmeasured block (m×p) and one of the projected
    measured block; no covariance is formed, so it is cheap to re-run whenever the
    set of valid measurements changes.

    References
    ----------
    .. [1] Crowe, Garcia Campos & Hrymak, AIChE J. 29(6) 881 (1983).
    """
    J = _dense(J)
    m, n_vars = J.shape
    measured = np.asarray(measured, dtype=int).reshape(-1)
    unmeasured = np.setdiff1d(np.arange(n_vars), measured)
    tol = DEFAULT_RANK_TOL if rank_tol is None else float(rank_tol)
    vs = np.ones(n_vars) if var_scale is None else np.asarray(var_scale, dtype=float)
    rs = np.ones(m) if residual_scale is None else np.asarray(residual_scale, dtype=float)
    Js = J / rs[:, None]
    A = Js[:, measured]
    B = Js[:, unmeasured] * vs[unmeasured]
    sig = vs[measured] if sigma is None else np.asarray(sigma, dtype=float)
    proj = _project(A, B, np.zeros(m), sig, tol)
    LG, _, _ = _reduce_rows(proj.Ap, proj.cp, sig, True, tol)
    return Classification(measured, unmeasured, proj.redundant, proj.observable,
                          LG.shape[1], proj.rank_b, tol)


# --------------------------------------------------------------------------- solve


@dataclass
class _Core:
    """Internal linear solution: estimates and what covariances need."""

    x_hat: np.ndarray
    u_part: np.ndarray  # a particular solution (0 in non-basic directions)
    LG: np.ndarray
    gamma: float
    proj: _Projection
    V: np.ndarray


def _solve(A, y, V, B, c, rank_tol, factor=None) -> _Core:
    Lfac, diagonal = _cov_factor(V) if factor is None else factor
    sigma = Lfac if diagonal else np.sqrt(np.diag(V))
    proj = _project(A, B, c, sigma, rank_tol)
    LG, R11, sel = _reduce_rows(proj.Ap, proj.cp, Lfac, diagonal, rank_tol)
    if LG.shape[1]:
        r = sla.solve_triangular(R11, proj.Ap[sel] @ y - proj.cp[sel], trans="T")
        x_hat = y - LG @ r
        gamma = float(r @ r)
    else:
        x_hat = y.copy()
        gamma = 0.0
    if proj.Ap.shape[0]:
        resid = proj.Ap @ x_hat - proj.cp
        size = np.abs(proj.Ap) @ np.abs(x_hat) + np.abs(proj.cp) + np.abs(proj.Ap) @ sigma
        if np.any(np.abs(resid) > _CONSISTENCY_TOL * np.maximum(size, 1e-300)):
            raise InconsistentConstraintsError(
                "constraints are inconsistent: no measured values satisfy them "
                f"(worst projected residual {float(np.max(np.abs(resid))):.3g})"
            )
    u_part = proj.T @ (c - A @ x_hat)
    return _Core(x_hat, u_part, LG, gamma, proj, V)


def _statistics(core: _Core, A, redundant=None, observable=None) -> dict:
    """Covariances, tests and redundancy from a core solution (internal)."""
    V, LG, proj = core.V, core.LG, core.proj
    redundant = proj.redundant if redundant is None else redundant
    observable = proj.observable if observable is None else observable
    if LG.shape[1]:
        low = sla.blas.dsyrk(1.0, LG, lower=True)  # LG LGᵀ in the lower triangle, zeros above
        cov_a = low + low.T
        cov_a[np.diag_indices_from(cov_a)] *= 0.5
    else:
        cov_a = np.zeros_like(V)
    cov_x = V - cov_a
    K = _left_mul(proj.T, A)  # u = T c − K x̂
    KLG = K @ LG
    VK = V @ K.T
    cov_xu = -(VK - LG @ KLG.T)
    cov_u = K @ VK - KLG @ KLG.T
    u_hat = core.u_part.copy()
    u_hat[~observable] = np.nan
    cov_u[~observable, :] = np.nan
    cov_u[:, ~observable] = np.nan
    cov_xu[:, ~observable] = np.nan
    Vd = np.diag(V)
    va = np.diag(cov_a)
    z = np.full(len(Vd), np.nan)
    ok = redundant & (va > 0)
    dof = LG.shape[1]
    return dict(cov_x=cov_x, cov_a=cov_a, u_hat=u_hat, cov_u=cov_u, cov_xu=cov_xu,
                z_ok=ok, va=va, Vd=Vd, dof=dof, redundant=redundant, observable=observable,
                z=z)


def reconcile_linear(A, y, V, B=None, c=None, *, rank_tol: float | None = None,
                     classification: Classification | None = None) -> LinearResult:
    """Reconcile measurements against linear constraints ``A x + B u = c``.

    Parameters
    ----------
    A : array_like or sparse matrix, shape (m, n)
        Coefficients of the measured variables [constraint unit / variable unit].
    y : array_like, shape (n,)
        Measured values [variable units].
    V : array_like, shape (n, n) or (n,)
        Covariance of the measurement errors [variable unit²]; a 1-D array is taken
        as its diagonal. Full (correlated) covariances are allowed.
    B : array_like or sparse matrix, shape (m, p), optional
        Coefficients of the unmeasured variables; none if omitted.
    c : array_like, shape (m,), optional
        Right-hand side [constraint unit]; zero if omitted.
    rank_tol : float, optional
        Relative rank tolerance, see :func:`classify`.
    classification : Classification, optional
        Precomputed classification whose redundancy/observability flags are reported
        (and used to mask NaN) instead of the ones decided here.

    Returns
    -------
    LinearResult

    Raises
    ------
    ValueError
        On non-finite inputs, mismatched shapes, a singular or indefinite ``V``, no
        measurements, or contradictory constraints
        (:class:`InconsistentConstraintsError`).

    Notes
    -----
    ``x̂ = y − V Aₚᵀ (Aₚ V Aₚᵀ)⁻¹ (Aₚ y − cₚ)`` and ``Cov(x̂) = V − V Aₚᵀ (Aₚ V Aₚᵀ)⁻¹ Aₚ V``
    with ``Aₚ = P A``, evaluated through an orthonormal basis of the whitened projected
    constraints. With correlated ``V`` a non-redundant measurement may still be
    adjusted through its correlation with redundant ones.

    References
    ----------
    .. [1] Crowe, Garcia Campos & Hrymak, AIChE J. 29(6) 881 (1983).
    .. [2] VDI 2048 Blatt 1 (2017).
    """
    A, y, V, B, c = _check_inputs(A, y, V, B, c)
    tol = DEFAULT_RANK_TOL if rank_tol is None else float(rank_tol)
    core = _solve(A, y, V, B, c, tol)
    return _build_result(core, A, y, classification, np.arange(A.shape[1]),
                         np.arange(A.shape[1], A.shape[1] + B.shape[1]), tol)


def _build_result(core: _Core, A, y, classification, measured, unmeasured, tol) -> LinearResult:
    if classification is None:
        classification = Classification(measured, unmeasured, core.proj.redundant,
                                         core.proj.observable, core.LG.shape[1],
                                         core.proj.rank_b, tol)
    red = classification.redundant
    obs = classification.observable
    if red.shape != core.x_hat.shape or obs.shape != core.u_part.shape:
        raise ValueError("classification does not match the problem's measured/unmeasured split")
    s = _statistics(core, A, red, obs)
    a = y - core.x_hat
    z = s["z"]
    h = np.where(red, 1.0 - np.diag(s["cov_x"]) / s["Vd"], 0.0)
    ok = s["z_ok"] & (h > REDUNDANCY_FLOOR)
    z[ok] = a[ok] / np.sqrt(s["va"][ok])
    dof = s["dof"]
    p_value = float(chdtrc(dof, core.gamma)) if dof > 0 else float("nan")
    return LinearResult(
        x_hat=core.x_hat, cov_x=s["cov_x"], adjustments=a, cov_a=s["cov_a"],
        u_hat=s["u_hat"], cov_u=s["cov_u"], cov_xu=s["cov_xu"], gamma=core.gamma,
        dof=dof, p_value=p_value, z=z, redundant=red.copy(), observable=obs.copy(),
        redundancy=h, classification=classification,
    )
