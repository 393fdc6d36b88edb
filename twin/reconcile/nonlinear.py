"""Nonlinear data reconciliation by successive linearisation (Gauss-Newton SQP).

Problem: ``min (y − z_M)ᵀ V⁻¹ (y − z_M)`` subject to ``f(z) = 0``, with ``z`` all variables
and ``M`` the measured ones. Each iteration linearises ``f`` at ``z_k``, solves the linear
reconciliation problem (unmeasured variables eliminated by projection, as in
:mod:`twin.reconcile.linear`), and moves along the step with a backtracking line
search on the ℓ₁ merit function ``½ aᵀV⁻¹a + μ ‖f(z)/s_f‖₁``.

References
----------
.. [1] J. Nocedal, S. J. Wright, *Numerical Optimization*, 2nd ed., Springer (2006),
   §18.3 (merit functions) and eq. 18.36 (penalty update).
.. [2] C. M. Crowe, "Reconciliation of process flow rates by matrix projection. Part II:
   the nonlinear case", AIChE J. 32(4), 616–623 (1986).
.. [3] VDI 2048 Blatt 1 (2017).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Protocol, runtime_checkable

import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp

from twin.reconcile.covariance import (
    LinearisedCovariance,
    _final_dense,
    _final_sparse,
    covariance_fields,
    dense_functional_covariance,
)
from twin.reconcile.kkt import KKTFactorisationError, ScaledKKT
from twin.reconcile.linear import (
    DEFAULT_RANK_TOL,
    Classification,
    InconsistentConstraintsError,
    _check_inputs,
    _check_y,
    _cov_factor,
    _solve,
)
from twin.reconcile.stats import chi2_sf

#: Exceptions from the model callbacks that are treated as "no value here".
MODEL_ERRORS = (ValueError, ArithmeticError)


@runtime_checkable
class ConstraintSystem(Protocol):
    """Constraints ``f(z) = 0`` over all variables ``z`` (measured and unmeasured).

    Implementations may also define ``scales() -> (variable_scales, residual_scales)``,
    typical magnitudes of the variables (n_vars,) and residuals (m,), used for the
    convergence tests and the merit function.
    """

    @property
    def n_vars(self) -> int:
        """Number of variables in ``z``."""
        ...

    def residuals(self, z: np.ndarray) -> np.ndarray:
        """Constraint residuals f(z), shape (m,)."""
        ...

    def jacobian(self, z: np.ndarray) -> sp.spmatrix | np.ndarray:
        """Jacobian ∂f/∂z, shape (m, n_vars)."""
        ...


@dataclass(frozen=True)
class LinearSystem:
    """Adapter: linear constraints ``J z = c`` as a :class:`ConstraintSystem`."""

    J: np.ndarray
    c: np.ndarray

    @property
    def n_vars(self) -> int:
        return self.J.shape[1]

    def residuals(self, z: np.ndarray) -> np.ndarray:
        return self.J @ z - self.c

    def jacobian(self, z: np.ndarray) -> np.ndarray:
        return self.J


#: Valid values of :attr:`SolveOptions.method` and :attr:`SolveOptions.covariance`.
METHODS = ("sparse", "dense")
COVARIANCES = ("full", "measured", "diagonal", "none")


@dataclass(frozen=True)
class SolveOptions:
    """Settings of :func:`reconcile`.

    Attributes
    ----------
    max_iter : int
        Maximum number of SQP iterations.
    step_tol : float
        Converged when the largest scaled step ``|Δz_i| / s_i`` is below this
        (measured variables are scaled by their σ; unmeasured ones by the system's
        variable scales; when a ``classification`` is passed, unobservable unmeasured
        variables are left out of the test) ...
    residual_tol : float
        ... and the largest scaled residual ``|f_i| / s_f,i`` is below this (relative
        to the system's residual scales; models whose properties come from iterative
        routines have a floor near 1e-8).
    objective_tol : float
        Alternatively converged after a full step below ``100·step_tol`` that changed
        ``½ aᵀV⁻¹a`` by less than ``objective_tol·max(1, objective)`` with the residual
        test met (ends the iteration at a model's noise floor).
    armijo : float
        Sufficient-decrease constant of the line search.
    backtrack : float
        Step-length reduction factor on each backtrack.
    max_backtracks : int
        Backtracks before the line search gives up.
    min_step : float
        Floor on the step length: a search that would need ``α < min_step`` has failed
        at once (status ``line_search_failed``, unless the iterate is at the model's
        noise floor), so a hopeless start fails in a few evaluations and the caller's
        restart logic takes over instead of creeping along until ``max_iter``.
    rank_tol : float or None
        Relative rank tolerance (see :func:`twin.reconcile.linear.classify`).
    method : {"sparse", "dense"}
        How each Gauss-Newton step is solved: a sparse LU of the augmented (KKT)
        system (:mod:`twin.reconcile.kkt`), or the dense projection by pivoted QR of
        the unmeasured block (:mod:`twin.reconcile.linear`), kept as a reference.
    noise_tol : float
        A model evaluated through iterative property routines has a residual floor;
        when the line search can no longer make progress (it fails, or only a step
        shorter than 1e-3 of the full step is accepted) with the scaled residual below
        ``noise_tol``, a remaining Gauss-Newton step under 1 % of every measurement's σ
        and the objective unchanged to ``1e-6`` relative, the iterate is accepted as
        converged at that floor (the message says so).
    covariance : {"full", "measured", "diagonal", "none"}
        Which covariances the result carries: all of ``cov_z``; only the measured
        block of ``cov_z`` and ``cov_a`` (unmeasured rows/columns NaN); only the
        measured variances ``var_x`` and ``var_a`` (with ``z`` and ``redundancy``;
        ``cov_z`` and ``cov_a`` read-only all-NaN placeholders), the mode for callers
        that read the covariance of a few quantities through
        :meth:`Result.functional_covariance`; or none (``cov_z``, ``cov_a``,
        ``var_x``, ``var_a``, ``z`` and ``redundancy`` NaN). The sparse method then
        skips the corresponding solves. ``var_x``/``var_a`` come with every mode but
        ``"none"``; :meth:`Result.functional_covariance` works in every mode.
    """

    max_iter: int = 50
    step_tol: float = 1e-8
    residual_tol: float = 1e-8
    objective_tol: float = 1e-10
    armijo: float = 1e-4
    backtrack: float = 0.5
    max_backtracks: int = 40
    min_step: float = 1e-6
    rank_tol: float | None = None
    method: str = "sparse"
    covariance: str = "full"
    noise_tol: float = 1e-4

    def __post_init__(self) -> None:
        if self.method not in METHODS:
            raise ValueError(f"method must be one of {METHODS}, got {self.method!r}")
        if not 0.0 < self.min_step <= 1.0:
            raise ValueError(f"min_step must lie in (0, 1], got {self.min_step!r}")
        if self.covariance not in COVARIANCES:
            raise ValueError(f"covariance must be one of {COVARIANCES}, got {self.covariance!r}")


@dataclass(frozen=True)
class Result:
    """Outcome of :func:`reconcile`; every number is NaN unless ``status == "converged"``.

    Attributes
    ----------
    status : str
        ``"converged"``, ``"max_iter"``, ``"line_search_failed"``, ``"model_error"``
        or ``"inconsistent"``.
    iterations : int
    z_hat : ndarray, shape (n_vars,)
        Reconciled values of all variables; NaN for unobservable unmeasured ones.
    x_hat : ndarray, shape (n,)
        Reconciled measured variables (order of ``y``).
    cov_z : ndarray, shape (n_vars, n_vars)
        Full covariance of ``z_hat`` from the linearisation at the solution; NaN in
        rows/columns of unobservable variables.
    adjustments : ndarray, shape (n,)
        ``y − x_hat``.
    cov_a : ndarray, shape (n, n)
        Covariance of the adjustments.
    gamma, dof, p_value : float, int, float
        Global test ``aᵀV⁻¹a`` against χ²(dof); p_value NaN when dof is 0.
    z : ndarray, shape (n,)
        Normalised adjustments ``adjustments / sqrt(diag(cov_a))``, from the same final
        iterate as ``adjustments`` (so they share their sign); NaN where not redundant
        or where ``redundancy`` is at or below
        :data:`~twin.reconcile.linear.REDUNDANCY_FLOOR` (not tested).
    redundant : ndarray of bool, shape (n,)
    observable : ndarray of bool, shape (n_vars − n,)
        For the unmeasured variables, in increasing index order (``unmeasured``).
    redundancy : ndarray, shape (n,)
        ``1 − Var(x̂_j)/V_jj``.
    message : str
    measured, unmeasured : ndarray of int
    z_warm : ndarray, shape (n_vars,)
        The final iterate with every entry finite (unobservable entries keep a
        feasible but arbitrary value): pass it as ``z0`` next time. NaN on failure.
    classification : Classification or None
    var_x, var_a : ndarray, shape (n,), or None
        ``diag Cov(x̂)`` and ``diag Cov(a)``; NaN with ``covariance="none"``.
    covariance_operator : LinearisedCovariance or None
        The final factorisation behind :meth:`functional_covariance` (sparse method).
    gain : ndarray, shape (n_vars, n), or None
        Whitened sensitivity of the solution to the data at the solution: with
        ``y = L w`` (``V = L Lᵀ``), ``δẑ = gain · δw`` and ``cov_z = gain · gainᵀ``
        (unobservable rows NaN). Column ``j`` is the contribution of measurement ``j``
        (or of a group of measurements uncorrelated with the rest, such as the
        pseudo-measurements of soft relations); ``None`` unless the sparse method ran
        with ``covariance="full"``.
    """

    status: str
    iterations: int
    z_hat: np.ndarray
    x_hat: np.ndarray
    cov_z: np.ndarray
    adjustments: np.ndarray
    cov_a: np.ndarray
    gamma: float
    dof: int
    p_value: float
    z: np.ndarray
    redundant: np.ndarray
    observable: np.ndarray
    redundancy: np.ndarray
    message: str
    measured: np.ndarray
    unmeasured: np.ndarray
    z_warm: np.ndarray
    classification: Classification | None = field(default=None)
    gain: np.ndarray | None = field(default=None)
    var_x: np.ndarray | None = field(default=None)
    var_a: np.ndarray | None = field(default=None)
    covariance_operator: LinearisedCovariance | None = field(default=None, repr=False, compare=False)

    @property
    def converged(self) -> bool:
        return self.status == "converged"

    def functional_covariance(self, G) -> np.ndarray:
        """Covariance ``G Cov(ẑ) Gᵀ`` (k, k) of linear functionals ``G z`` of the solution.

        ``G`` (k, n_vars), dense or sparse (a 1-D array is one row): e.g. the gradients
        of k KPIs, or unit rows for single variables. The sparse method computes it from
        the final KKT factorisation with 2k solves, whatever ``SolveOptions.covariance``
        was (``"diagonal"`` is the cheap mode for callers that read only this and the
        measured variances); the dense method from ``cov_z`` (needs ``"full"``). Rows and
        columns of functionals with a non-zero coefficient on an unobservable variable
        are NaN (as those variables' rows of ``cov_z``); all NaN when the solve failed
        or the final system cannot be factored.
        """
        k = 1 if np.ndim(G) == 1 else G.shape[0]
        if not self.converged:
            return np.full((k, k), np.nan)
        if self.covariance_operator is not None:
            try:
                return self.covariance_operator.functional_covariance(G)
            except KKTFactorisationError:  # "none" mode: the final system is factored on first use
                return np.full((k, k), np.nan)
        return dense_functional_covariance(G, self.cov_z, self.unmeasured, self.observable)

    def functional_gain(self, G) -> np.ndarray:
        """Whitened gain ``G · gain`` (k, n) of functionals ``G z``: ``Cov(G ẑ) = R Rᵀ``.

        Column ``j`` is the part of each functional's response that comes from
        measurement ``j`` (see ``gain``), e.g. to split a KPI's variance between the
        instruments and the soft relations. Sparse method only (any covariance mode),
        else ``G · gain`` when ``gain`` is there; NaN rows as in
        :meth:`functional_covariance`.
        """
        if self.covariance_operator is not None and self.converged:
            return self.covariance_operator.functional_gain(G)
        if self.gain is None:
            raise ValueError("functional_gain needs the sparse method or covariance='full'")
        Gd = G.toarray() if sp.issparse(G) else np.atleast_2d(np.asarray(G, dtype=float))
        return Gd @ self.gain


def _failed(status, message, iterations, n_vars, measured, unmeasured) -> Result:
    n, p = len(measured), len(unmeasured)
    nan = np.full
    return Result(
        status=status, iterations=iterations, z_hat=nan(n_vars, np.nan),
        x_hat=nan(n, np.nan), cov_z=nan((n_vars, n_vars), np.nan),
        adjustments=nan(n, np.nan), cov_a=nan((n, n), np.nan), gamma=float("nan"),
        dof=0, p_value=float("nan"), z=nan(n, np.nan), redundant=np.zeros(n, bool),
        observable=np.zeros(p, bool), redundancy=nan(n, np.nan), message=message,
        measured=measured, unmeasured=unmeasured, z_warm=nan(n_vars, np.nan),
        var_x=nan(n, np.nan), var_a=nan(n, np.nan),
    )


def _evaluate(system, z, m_expected=None, dense=True):
    """Residuals and Jacobian at z (dense array or CSR); ValueError on non-finite output."""
    f = np.asarray(system.residuals(z), dtype=float).reshape(-1)
    if m_expected is not None and f.shape != (m_expected,):
        raise ValueError(f"residuals changed length: {f.shape[0]} != {m_expected}")
    if not np.all(np.isfinite(f)):
        raise ValueError(f"non-finite residuals at rows {np.flatnonzero(~np.isfinite(f))[:10].tolist()}")
    J = system.jacobian(z)
    if dense:
        J = np.asarray(J.toarray() if sp.issparse(J) else J, dtype=float)
        finite = bool(np.all(np.isfinite(J)))
    else:
        if not (sp.issparse(J) and J.format == "csr" and J.dtype == np.float64):
            J = sp.csr_matrix(J, dtype=float)
        finite = bool(np.all(np.isfinite(J.data)))
    if J.shape != (f.shape[0], len(z)):
        raise ValueError(f"jacobian has shape {J.shape}, expected {(f.shape[0], len(z))}")
    if not finite:
        raise ValueError("non-finite jacobian entries")
    return f, J


class _SparseStep:
    """Gauss-Newton steps by the sparse KKT system (internal)."""

    def __init__(self, measured, unmeasured, Lfac, diagonal, vs, rs):
        self.measured, self.unmeasured = measured, unmeasured
        self.Lfac, self.diagonal = Lfac, diagonal
        self.su, self.rs = vs[unmeasured], rs
        self.kkt: ScaledKKT | None = None
        self._factored: object | None = None  # the Jacobian self.kkt was built from

    def factor(self, J) -> ScaledKKT:
        """The factored KKT system of ``J``; the last one again when ``J`` is the same matrix."""
        if self.kkt is None or J is not self._factored:
            self.kkt = ScaledKKT(J, self.measured, self.unmeasured, self.Lfac, self.diagonal,
                                 self.su, self.rs)
            self._factored = J
        return self.kkt

    def __call__(self, J, z, f, a, n_vars) -> np.ndarray:
        kkt = self.factor(J)
        g = a / self.Lfac if self.diagonal else sla.solve_triangular(self.Lfac, a, lower=True)
        fs = f / self.rs
        dw, dv = kkt.step(g, fs)
        d = np.zeros(n_vars)
        d[self.measured] = self.Lfac * dw if self.diagonal else self.Lfac @ dw
        d[self.unmeasured] = self.su * dv
        lin = (J @ d + f) / self.rs
        if np.max(np.abs(lin)) > _LINEAR_CONSISTENCY * max(1.0, float(np.max(np.abs(fs)))):
            raise InconsistentConstraintsError(
                "constraints are inconsistent: the linearised step cannot satisfy them "
                f"(worst scaled residual {float(np.max(np.abs(lin))):.3g})")
        return d


#: Largest scaled residual of the linearised constraints a sparse step may leave.
_LINEAR_CONSISTENCY = 1e-6


def reconcile(system: ConstraintSystem, z0, measured, y, V, *,
              options: SolveOptions | None = None,
              classification: Classification | None = None) -> Result:
    """Reconcile measurements against nonlinear constraints ``f(z) = 0``.

    Parameters
    ----------
    system : ConstraintSystem
        Residuals and Jacobian of the constraints over all variables.
    z0 : array_like, shape (n_vars,)
        Starting point (warm start: the previous solution's ``z_warm``).
    measured : array_like of int, shape (n,)
        Indices of the measured variables in ``z``, in the order of ``y``.
    y : array_like, shape (n,)
        Measured values [variable units].
    V : array_like, shape (n, n) or (n,)
        Measurement covariance [variable unit²] (1-D: its diagonal).
    options : SolveOptions, optional
    classification : Classification, optional
        Precomputed classification (e.g. from :func:`~twin.reconcile.linear.classify`
        when the set of valid tags last changed) whose flags are reported instead of
        the ones decided at the solution; keeps flags stable near the rank tolerance.

    Returns
    -------
    Result
        ``status == "converged"`` or NaN-filled numbers with a message.

    Raises
    ------
    ValueError
        On invalid inputs (shapes, non-finite ``y`` or ``z0``, singular ``V``, empty or
        duplicate ``measured``). Errors raised by the model callbacks (``ValueError``,
        ``ArithmeticError``) never escape: at ``z0`` they give ``status="model_error"``,
        during the line search they shorten the step.
    """
    opts = options or SolveOptions()
    dense = opts.method == "dense"
    n_vars = int(system.n_vars)
    z0 = np.asarray(z0, dtype=float).reshape(-1)
    if z0.shape != (n_vars,):
        raise ValueError(f"z0 has shape {z0.shape}, expected ({n_vars},)")
    if not np.all(np.isfinite(z0)):
        raise ValueError(f"z0 contains non-finite values at {np.flatnonzero(~np.isfinite(z0)).tolist()}")
    measured = np.asarray(measured, dtype=int).reshape(-1)
    if measured.size == 0:
        raise ValueError("no measurements: 'measured' is empty (all measurements removed?)")
    if measured.min() < 0 or measured.max() >= n_vars:
        raise ValueError(f"'measured' indices must lie in [0, {n_vars})")
    is_unmeasured = np.ones(n_vars, dtype=bool)
    is_unmeasured[measured] = False
    if n_vars - np.count_nonzero(is_unmeasured) != measured.size:
        raise ValueError("'measured' contains duplicate indices")
    unmeasured = np.flatnonzero(is_unmeasured)
    if classification is not None and not np.array_equal(classification.measured, measured):
        raise ValueError("classification was computed for a different measured set")
    tol = DEFAULT_RANK_TOL if opts.rank_tol is None else float(opts.rank_tol)

    fail = lambda status, msg, it: _failed(status, msg, it, n_vars, measured, unmeasured)  # noqa: E731

    try:
        f, J = _evaluate(system, z0, dense=dense)
    except MODEL_ERRORS as exc:
        return fail("model_error", f"model error at the starting point: {type(exc).__name__}: {exc}", 0)
    m = f.shape[0]
    y, V = _check_measurements(y, V, measured.size)
    factor = (np.sqrt(V), True) if V.ndim == 1 else _cov_factor(V)
    Lfac, diagonal = factor
    sigma = Lfac if diagonal else np.sqrt(np.diag(V))

    vs = np.maximum(np.abs(z0), 1.0)
    rs = None
    if hasattr(system, "scales"):
        vs_sys, rs_sys = system.scales()
        vs = np.asarray(vs_sys, dtype=float).reshape(-1).copy()
        rs = np.asarray(rs_sys, dtype=float).reshape(-1)
        if vs.shape != (n_vars,) or rs.shape != (m,) or np.any(vs <= 0) or np.any(rs <= 0):
            raise ValueError("system.scales() must return positive arrays of shapes (n_vars,), (m,)")
    vs[measured] = sigma
    if rs is None:
        # row norms of J·diag(vs)
        J2 = (J * J) if dense else J.multiply(J)
        rs = np.sqrt(np.asarray(J2 @ vs**2, dtype=float).reshape(-1))
        rs[rs == 0.0] = 1.0
    # the step test covers measured and (when known) observable unmeasured variables
    tested = classification.determined if classification is not None else np.ones(n_vars, bool)

    def objective(z):
        a = y - z[measured]
        w = a / Lfac if diagonal else sla.solve_triangular(Lfac, a, lower=True)
        return 0.5 * float(w @ w), a

    def vinv(a):
        return a / Lfac**2 if diagonal else sla.cho_solve((Lfac, True), a)

    V2 = np.diag(V) if (dense and V.ndim == 1) else V
    sparse_step = None if dense else _SparseStep(measured, unmeasured, Lfac, diagonal, vs, rs)

    def step(J, z, f, a):
        if sparse_step is not None:
            return sparse_step(J, z, f, a, n_vars)
        JM, JU = J[:, measured], J[:, unmeasured]
        core = _solve(JM, y, V2, JU, JM @ z[measured] - f, tol, factor)
        d = np.zeros(n_vars)
        d[measured] = core.x_hat - z[measured]
        d[unmeasured] = core.u_part
        return d

    z = z0.copy()
    mu = 0.0
    obj, a = objective(z)
    status, message = "max_iter", f"no convergence in {opts.max_iter} iterations"
    it = 0
    for it in range(1, opts.max_iter + 1):
        try:
            d = step(J, z, f, a)
        except (InconsistentConstraintsError, KKTFactorisationError) as exc:
            return fail("inconsistent", f"linearised constraints inconsistent: {exc}", it)
        fs = f / rs
        if (np.max(np.abs(d[tested]) / vs[tested]) <= opts.step_tol
                and np.max(np.abs(fs)) <= opts.residual_tol):
            status, message = "converged", f"converged in {it} iterations (step test)"
            break
        # l1 merit function with penalty update (Nocedal & Wright eq. 18.36, rho = 1/2)
        dx = d[measured]
        gd = -float(vinv(a) @ dx)
        dHd = float(dx @ vinv(dx))
        fn1 = float(np.sum(np.abs(fs)))
        if fn1 > 0.0:
            mu = max(mu, 1.1 * (gd + 0.5 * dHd) / (0.5 * fn1))
        phi = obj + mu * fn1
        slope = gd - mu * fn1
        alpha, accepted, last_err = 1.0, False, ""
        for _ in range(opts.max_backtracks + 1):
            if alpha < opts.min_step:
                break
            zt = z + alpha * d
            try:
                ft, Jt = _evaluate(system, zt, m, dense=dense)
            except MODEL_ERRORS as exc:
                last_err = f"{type(exc).__name__}: {exc}"
                alpha *= opts.backtrack
                continue
            objt, at = objective(zt)
            phit = objt + mu * float(np.sum(np.abs(ft / rs)))
            # the slack admits merit changes at the rounding-error level near the solution
            slack = 1e-13 * max(1.0, abs(phi))
            if phit <= phi + opts.armijo * alpha * min(slope, 0.0) + slack:
                accepted = True
                break
            alpha *= opts.backtrack
        # at the floor: constraints met to noise_tol and the remaining Gauss-Newton step moves
        # no measured value by more than 1 % of its σ (statistically negligible)
        at_floor = (np.max(np.abs(fs)) <= opts.noise_tol
                    and np.max(np.abs(d[measured]) / vs[measured]) <= 0.01)
        if not accepted:
            if at_floor:
                status, message = "converged", f"converged in {it} iterations (at the model's noise floor)"
                break
            status = "line_search_failed"
            message = f"line search failed to reduce the merit function (step floor {opts.min_step:g})" + (
                f" (last model error: {last_err})" if last_err else "")
            break
        if (alpha < 1e-3 and at_floor and np.max(np.abs(ft / rs)) <= opts.noise_tol
                and abs(objt - obj) <= 1e-6 * max(1.0, obj)):
            z, f, J, obj, a = zt, ft, Jt, objt, at
            status, message = "converged", f"converged in {it} iterations (at the model's noise floor)"
            break
        obj_change = abs(objt - obj)
        small_step = np.max(np.abs(d[tested]) / vs[tested]) <= 100.0 * opts.step_tol
        z, f, J, obj, a = zt, ft, Jt, objt, at
        if (alpha == 1.0 and small_step and obj_change <= opts.objective_tol * max(1.0, obj)
                and np.max(np.abs(f / rs)) <= opts.residual_tol):
            status, message = "converged", f"converged in {it} iterations (objective test)"
            break
    if status != "converged":
        return fail(status, message, it)
    try:
        if dense:
            stats = _final_dense(J, z, f, y, np.diag(V) if V.ndim == 1 else V, factor, measured, unmeasured, classification, tol)
        else:
            stats = _final_sparse(J, y, V, sigma, vs, rs, sparse_step, measured, unmeasured,
                                  classification, tol, opts.covariance)
    except (InconsistentConstraintsError, KKTFactorisationError) as exc:
        return fail("inconsistent", f"linearised constraints inconsistent: {exc}", it)
    cls, cov_x, cov_xu, cov_u, gain_parts = stats
    # statistics at the accepted iterate z (the final linear step is below tolerance)
    adj = y - z[measured]
    gamma = float(adj @ vinv(adj))
    observable = cls.observable
    fields = covariance_fields(opts.covariance, V, cov_x, cov_xu, cov_u, gain_parts, adj, cls,
                               measured, unmeasured)
    operator = None
    if sparse_step is not None:
        operator = LinearisedCovariance(lambda J=J: sparse_step.factor(J), measured, unmeasured,
                                        sparse_step.Lfac, sparse_step.diagonal, sparse_step.su,
                                        observable.copy())
    z_hat = z.copy()
    z_hat[unmeasured[~observable]] = np.nan
    p_value = chi2_sf(gamma, cls.dof) if cls.dof > 0 else float("nan")
    return Result(
        status=status, iterations=it, z_hat=z_hat, x_hat=z[measured].copy(),
        adjustments=adj, gamma=gamma, dof=cls.dof, p_value=p_value,
        redundant=cls.redundant.copy(), observable=observable.copy(), message=message,
        measured=measured, unmeasured=unmeasured, z_warm=z.copy(), classification=cls,
        covariance_operator=operator, **fields,
    )


def _check_measurements(y, V, n):
    """``y`` (n,) and ``V``: 1-D (variances, kept 1-D so large problems stay linear) or (n, n)."""
    Va = np.asarray(V.toarray() if sp.issparse(V) else V, dtype=float)
    if Va.ndim != 1:
        _, y, Va, _, _ = _check_inputs(np.zeros((1, n)), y, Va, None, None)
        return y, Va
    y = _check_y(y, n)
    if Va.shape != (n,):
        raise ValueError(f"V has shape {Va.shape}, expected ({n}, {n})")
    if not np.all(np.isfinite(Va)):
        raise ValueError("V contains non-finite values")
    bad = np.flatnonzero(Va <= 0.0)
    if bad.size:
        raise ValueError(f"V is singular: non-positive variance at indices {bad.tolist()}")
    return y, Va
