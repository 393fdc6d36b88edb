"""Serial elimination of suspect measurements.

Repeatedly remove the measurement that the GLR statistic blames most among those the
measurement test flags, re-reconcile without it, and stop when nothing is flagged, the
bound on eliminations is reached, or every suspect is needed to keep a protected
quantity observable.

References
----------
.. [1] S. Narasimhan, C. Jordache, *Data Reconciliation and Gross Error Detection*,
   Gulf Publishing (2000), §8.2 (serial elimination strategies).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, MutableMapping
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from twin.reconcile.linear import REDUNDANCY_FLOOR, Classification, _dense, classify
from twin.reconcile.nonlinear import ConstraintSystem, LinearSystem, Result, SolveOptions, reconcile
from twin.reconcile.stats import glr_bias, measurement_test

Restart = np.ndarray | Callable[[], np.ndarray] | None

Protected = Callable[[Classification], bool] | Iterable[int] | None


@dataclass(frozen=True)
class EliminatedMeasurement:
    """One eliminated measurement.

    Attributes
    ----------
    position : int
        Position in the original measurement vector ``y``.
    variable : int
        Index of the variable in ``z``.
    measured_value : float
    z : float
        Its normalised adjustment when it was eliminated.
    bias : float
        GLR bias estimate when it was eliminated [measurement units].
    re_estimate : float
        Its reconciled value without the eliminated measurements (final result).
    re_estimate_sigma : float
        Standard uncertainty of ``re_estimate``.
    """

    position: int
    variable: int
    measured_value: float
    z: float
    bias: float
    re_estimate: float
    re_estimate_sigma: float


@dataclass(frozen=True)
class Elimination:
    """Outcome of :func:`eliminate_suspects`.

    Attributes
    ----------
    result : Result
        Reconciliation without the eliminated measurements.
    eliminated : tuple of EliminatedMeasurement
    kept : ndarray of int
        Positions (in the original ``y``) still used.
    reason : str
        Why the elimination stopped.
    """

    result: Result
    eliminated: tuple[EliminatedMeasurement, ...]
    kept: np.ndarray
    reason: str
    #: the full set's redundancy of every measurement, linearised from the solution without the
    #: one re-tested (:func:`eliminate_again`, which does not solve the full set); None otherwise
    first_redundancy: np.ndarray | None = None


def _protection_check(protected: Protected) -> Callable[[Classification], bool]:
    if protected is None:
        return lambda cls: True
    if callable(protected):
        return protected
    idx = np.asarray(sorted({int(i) for i in protected}), dtype=int)
    return lambda cls: bool(np.all(cls.determined[idx]))


def eliminate_suspects(system: ConstraintSystem, z0, measured, y, V, *,
                       max_eliminations: int = 3, alpha: float = 0.05,
                       criterion: str = "sidak", protected: Protected = None,
                       options: SolveOptions | None = None,
                       restart: np.ndarray | Callable[[], np.ndarray] | None = None, first: Result | None = None,
                       warm: np.ndarray | None = None,
                       classifications: MutableMapping[tuple, Classification] | None = None) -> Elimination:
    """Serially eliminate suspect measurements (bounded count, protected observability).

    Parameters
    ----------
    system, z0, measured, y, V, options
        As for :func:`twin.reconcile.nonlinear.reconcile`.
    restart : ndarray or callable, optional
        A fresh starting point for the re-solves (tried before the previous solution,
        which the gross error may have pulled far from the consistent state); a
        callable is called only when a re-solve needs it (a costly forward solve).
    warm : ndarray, optional
        A starting point tried before ``restart``, e.g. the previous window's
        solution: when that window eliminated the same measurement it is already the
        consistent state without it.
    classifications : mutable mapping, optional
        A cache the caller keeps across calls (windows): the trial sets'
        classifications under ``("trial", *variables)`` and the re-solves' under
        ``tuple(variables)``, reused instead of computed again (the plant reconciler's
        own cache of the full set's classification works the same way: the rank
        decisions of a measurement set are taken once).
    first : Result, optional
        A converged solution of this very problem (same ``measured``, ``y``, ``V`` and
        ``options``), e.g. the caller's own first solve: used instead of solving the full
        set again from ``z0``.
    max_eliminations : int
        Upper bound on the number of measurements removed.
    alpha : float
        Family-wise significance of the measurement test [-].
    criterion : {"sidak", "vdi"}
        Which limit flags a suspect: the Šidák-corrected one or VDI 2048's 1.96.
    protected : set of int, or callable, optional
        Variable indices (into ``z``) that must stay determined (measured, or
        observable), or ``protected(classification) -> bool`` called with the
        :class:`Classification` of the trial measurement set (``.measured``,
        ``.redundant``, ``.observable``, ``.determined``). A suspect whose removal
        breaks it is kept and the next suspect is tried.

    Notes
    -----
    Only redundant measurements are ever flagged, and in the linearisation removing a
    redundant measurement leaves every variable observable (its column lies outside
    the range of the unmeasured block). A set of protected indices therefore guards
    against rank decisions that change at the new point; a callable can demand more,
    e.g. that a key quantity stays measured or redundant.

    Returns
    -------
    Elimination
    """
    given = options
    ok, measured, y, V, diagonal_v, options = _prepare(measured, y, V, criterion, max_eliminations,
                                                        protected, options)
    if first is not None and first.converged and options is given:
        res = first
    else:
        res = reconcile(system, z0, measured, y, V, options=options)
    return _serial(system, measured, y, V, diagonal_v, options, res, np.arange(measured.size), [],
                   max_eliminations=max_eliminations, alpha=alpha, criterion=criterion, ok=ok,
                   restart=restart, warm=warm, classifications=classifications)


def _prepare(measured, y, V, criterion: str, max_eliminations: int, protected: Protected,
             options: SolveOptions | None) -> tuple[Callable[[Classification], bool], np.ndarray, np.ndarray,
                                                    np.ndarray, bool, SolveOptions | None]:
    """Checked arguments: (protection test, measured, y, V (2-D), V diagonal?, options for the solves)."""
    if criterion not in ("sidak", "vdi"):
        raise ValueError(f"criterion must be 'sidak' or 'vdi', got {criterion!r}")
    if max_eliminations < 0:
        raise ValueError(f"max_eliminations must be >= 0, got {max_eliminations!r}")
    ok = _protection_check(protected)
    measured = np.asarray(measured, dtype=int).reshape(-1)
    y = np.asarray(y, dtype=float).reshape(-1)
    V = _dense(V)
    if V.ndim == 1:
        V = np.diag(V)
    diagonal_v = np.count_nonzero(V) == np.count_nonzero(np.diag(V))
    if options is not None and options.covariance == "diagonal" and not diagonal_v:
        options = replace(options, covariance="measured")  # GLR needs Cov(a) with correlated V
    return ok, measured, y, V, diagonal_v, options


def _first_choice(z: np.ndarray, adjustments: np.ndarray, var_a: np.ndarray | None, cov_a: np.ndarray | None,
                  Vk: np.ndarray, diagonal_v: bool, alpha: float, criterion: str) -> tuple[list[int], np.ndarray] | None:
    """The flagged measurements in order of blame (largest GLR drop first) and the GLR bias
    estimates; None when the measurement test flags none."""
    mt = measurement_test(z, alpha)
    flags = mt.flagged_sidak if criterion == "sidak" else mt.flagged_vdi
    if not np.any(flags):
        return None
    # with a diagonal V the GLR test reads only the variances of measurements and adjustments
    if diagonal_v and var_a is not None:
        bias, drop = glr_bias(adjustments, var_a, np.diag(Vk), np.isfinite(z))
    else:
        bias, drop = glr_bias(adjustments, cov_a, Vk, np.isfinite(z))
    return [j for j in np.argsort(-np.nan_to_num(drop, nan=-1.0)) if flags[j]], bias


def _trial_key(trial: np.ndarray) -> tuple:
    """The key of an elimination trial set's classification in the caller's cache."""
    return ("trial", *(int(v) for v in trial))


def _solve_without(system: ConstraintSystem, measured: np.ndarray, y: np.ndarray, V: np.ndarray, keep: np.ndarray,
                   starts: list[Any], options: SolveOptions | None,
                   classifications: MutableMapping[tuple, Classification] | None) -> Result:
    """Reconcile the measurements ``keep``, trying the starts in order until one converges."""
    set_key = tuple(int(v) for v in measured[keep])
    known = classifications.get(set_key) if classifications is not None else None
    res: Result | None = None
    for z_start in starts:
        res = reconcile(system, z_start() if callable(z_start) else z_start, measured[keep], y[keep],
                        V[np.ix_(keep, keep)], options=options, classification=known)
        if res.converged:
            if classifications is not None and known is None and res.classification is not None:
                classifications[set_key] = res.classification
            break
    assert res is not None  # the caller gives at least one start
    return res


def _serial(system: ConstraintSystem, measured: np.ndarray, y: np.ndarray, V: np.ndarray, diagonal_v: bool,
            options: SolveOptions | None, res: Result, keep: np.ndarray, log: list[tuple[int, float, float]], *,
            max_eliminations: int, alpha: float, criterion: str, ok: Callable[[Classification], bool],
            restart: Restart, warm: np.ndarray | None,
            classifications: MutableMapping[tuple, Classification] | None,
            first_redundancy: np.ndarray | None = None) -> Elimination:
    """The elimination loop from the solution ``res`` over ``keep`` (``log``: eliminated so far)."""
    reason = f"reached max_eliminations={max_eliminations}"
    while True:
        if not res.converged:
            reason = f"reconciliation failed: {res.status}: {res.message}"
            break
        Vk = V[np.ix_(keep, keep)]
        choice = _first_choice(res.z, res.adjustments, res.var_a, res.cov_a, Vk, diagonal_v, alpha, criterion)
        if choice is None:
            reason = "no measurement flagged"
            break
        if len(log) >= max_eliminations:
            break
        order, bias = choice
        J = None  # the Jacobian at the solution, only for a trial set not classified before
        chosen = None
        for j in order:
            trial = np.delete(measured[keep], j)
            if trial.size == 0:
                continue
            key = _trial_key(trial)
            cls = classifications.get(key) if classifications is not None else None
            if cls is None:
                if J is None:
                    J = _dense(system.jacobian(res.z_warm))
                cls = classify(J, trial, sigma=np.sqrt(np.diag(np.delete(np.delete(Vk, j, 0), j, 1))))
                if classifications is not None:
                    classifications[key] = cls
            if ok(cls):
                chosen = j
                break
        if chosen is None:
            reason = "every flagged measurement is needed for a protected quantity"
            break
        log.append((int(keep[chosen]), float(res.z[chosen]), float(bias[chosen])))
        # the previous solution was pulled by the gross error: a given fresh start point
        # is tried first, the previous solution second
        starts: list[Any] = [s for s in (warm, restart) if s is not None] + [res.z_warm]
        keep = np.delete(keep, chosen)
        res = _solve_without(system, measured, y, V, keep, starts, options, classifications)
    out = []
    n_vars = int(system.n_vars)
    for pos, zj, bj in log:
        v = int(measured[pos])
        var = float(res.functional_covariance(np.eye(1, n_vars, v))[0, 0])
        out.append(EliminatedMeasurement(
            position=pos, variable=v, measured_value=float(y[pos]), z=zj, bias=bj,
            re_estimate=float(res.z_hat[v]),
            re_estimate_sigma=float(np.sqrt(var)) if var >= 0 else float("nan"),
        ))
    return Elimination(res, tuple(out), keep, reason, first_redundancy)


@dataclass(frozen=True)
class Readmitted:
    """Statistics of the full measurement set, linearised from the solution without one of them.

    Adding measurement ``e`` (value ``y_e``, variance ``σ²``) to a linear(ised) reconciliation
    with estimate ``ẑ`` and covariance ``P`` is one update with the gain ``k = P[:, e] / (σ² +
    P[e, e])``: ``ẑ⁺ = ẑ + k (y_e − ẑ_e)``, ``P⁺ = P − k P[e, :]``. For linear constraints these are
    exactly the full set's solution and covariance; the adjustments, their variances, the
    redundancies and the normalised adjustments follow as in the full set's own result.
    """

    z: np.ndarray  # normalised adjustments (NaN where not tested)
    adjustments: np.ndarray
    var_a: np.ndarray
    redundancy: np.ndarray


def readmit(res: Result, position: int, variable: int, y: np.ndarray, Vd: np.ndarray,
            classification: Classification) -> Readmitted | None:
    """The full set's statistics from ``res``, its solution without the measurement at ``position``.

    ``y``, ``Vd`` (variances) and ``classification`` are the full set's; ``variable`` is the
    measured variable at ``position``. None when that variable is not observable without its
    measurement (it could not have been flagged) or the covariance needed is not finite.
    """
    P, zhat = res.cov_z, res.z_hat
    measured = np.insert(res.measured, position, variable)
    if not np.array_equal(measured, classification.measured):
        raise ValueError("classification is not the full set's")
    d = float(Vd[position] + P[variable, variable])
    pe = P[measured, variable]
    if not (math.isfinite(d) and d > 0.0 and math.isfinite(zhat[variable]) and np.all(np.isfinite(pe))):
        return None
    x = zhat[measured] + pe / d * (y[position] - zhat[variable])
    var_x = P[measured, measured] - pe * pe / d
    adjustments = y - x
    var_a = Vd - var_x
    redundancy = np.where(classification.redundant, 1.0 - var_x / Vd, 0.0)
    tested = classification.redundant & (var_a > 0) & (redundancy > REDUNDANCY_FLOOR)
    z = np.full(measured.size, np.nan)
    z[tested] = adjustments[tested] / np.sqrt(var_a[tested])
    return Readmitted(z, adjustments, var_a, redundancy)


def eliminate_again(system: ConstraintSystem, measured, y, V, position: int, *, full: Classification,
                    max_eliminations: int = 3, alpha: float = 0.05, criterion: str = "sidak",
                    protected: Protected = None, options: SolveOptions | None = None,
                    restart: Restart = None, warm: np.ndarray | None = None,
                    classifications: MutableMapping[tuple, Classification] | None = None) -> Elimination | None:
    """:func:`eliminate_suspects` for a set whose measurement at ``position`` was eliminated last time.

    Solves the set without that measurement first (from ``warm``, then ``restart``) and
    re-tests it there: the full set's normalised adjustments and GLR statistics come from
    :func:`readmit` (the measurement test in its deleted-residual form, exact for linear
    constraints) instead of a solve of the full set. When the serial elimination would
    again remove that measurement first (flagged, the largest GLR drop among the flagged,
    its removal allowed by ``protected`` as classified before), the elimination goes on from
    that solution as :func:`eliminate_suspects` does, and the result is the one it gives;
    otherwise None: the caller solves the full set (:func:`eliminate_suspects`).

    ``full`` is the full set's classification (from an earlier solve of it); the trial
    sets' classifications must be in ``classifications`` (None otherwise). The result's
    ``first_redundancy`` holds the full set's redundancies from the re-test.
    """
    ok, measured, y, V, diagonal_v, options = _prepare(measured, y, V, criterion, max_eliminations,
                                                        protected, options)
    if max_eliminations < 1 or not diagonal_v or classifications is None or not 0 <= position < measured.size:
        return None
    starts = [s for s in (warm, restart) if s is not None]
    if not starts:
        return None
    keep = np.delete(np.arange(measured.size), position)
    res = _solve_without(system, measured, y, V, keep, starts, options, classifications)
    if not res.converged or res.cov_z is None:
        return None
    stats = readmit(res, position, int(measured[position]), y, np.diag(V), full)
    if stats is None:
        return None
    choice = _first_choice(stats.z, stats.adjustments, stats.var_a, None, V, True, alpha, criterion)
    if choice is None:
        return None
    order, bias = choice
    for j in order:  # the first flagged measurement whose removal is allowed must be this one
        trial = np.delete(measured, j)
        cls = classifications.get(_trial_key(trial)) if trial.size else None
        if cls is None:
            return None  # not classified before: the full set decides
        if ok(cls):
            if j != position:
                return None
            break
    else:
        return None
    log = [(position, float(stats.z[position]), float(bias[position]))]
    return _serial(system, measured, y, V, diagonal_v, options, res, keep, log,
                   max_eliminations=max_eliminations, alpha=alpha, criterion=criterion, ok=ok,
                   restart=restart, warm=warm, classifications=classifications, first_redundancy=stats.redundancy)


def eliminate_suspects_linear(A, y, V, B=None, c=None, **kwargs) -> Elimination:
    """:func:`eliminate_suspects` for linear constraints ``A x + B u = c``.

    Variables are ordered ``z = [x, u]``; measured positions are ``0..n−1`` and the
    unmeasured variable ``i`` is ``z[n + i]``. Keyword arguments are passed on.
    """
    A = _dense(A)
    m, n = A.shape
    B = np.zeros((m, 0)) if B is None else _dense(B)
    c = np.zeros(m) if c is None else np.asarray(c, dtype=float)
    system = LinearSystem(np.hstack([A, B]), c)
    z0 = np.concatenate([np.asarray(y, dtype=float), np.zeros(B.shape[1])])
    return eliminate_suspects(system, z0, np.arange(n), y, V, **kwargs)
