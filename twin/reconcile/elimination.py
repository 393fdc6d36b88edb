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

from collections.abc import Callable, Iterable, MutableMapping
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from twin.reconcile.linear import Classification, _dense, classify
from twin.reconcile.nonlinear import ConstraintSystem, LinearSystem, Result, SolveOptions, reconcile
from twin.reconcile.stats import glr_bias, measurement_test

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
    keep = np.arange(measured.size)
    diagonal_v = np.count_nonzero(V) == np.count_nonzero(np.diag(V))
    given = options
    if options is not None and options.covariance == "diagonal" and not diagonal_v:
        options = replace(options, covariance="measured")  # GLR needs Cov(a) with correlated V
    if first is not None and first.converged and options is given:
        res = first
    else:
        res = reconcile(system, z0, measured, y, V, options=options)
    log: list[tuple[int, float, float]] = []
    reason = f"reached max_eliminations={max_eliminations}"
    while True:
        if not res.converged:
            reason = f"reconciliation failed: {res.status}: {res.message}"
            break
        mt = measurement_test(res.z, alpha)
        flags = mt.flagged_sidak if criterion == "sidak" else mt.flagged_vdi
        if not np.any(flags):
            reason = "no measurement flagged"
            break
        if len(log) >= max_eliminations:
            break
        Vk = V[np.ix_(keep, keep)]
        # with a diagonal V the GLR test reads only the variances of measurements and adjustments
        if diagonal_v and res.var_a is not None:
            bias, drop = glr_bias(res.adjustments, res.var_a, np.diag(Vk), np.isfinite(res.z))
        else:
            bias, drop = glr_bias(res.adjustments, res.cov_a, Vk, np.isfinite(res.z))
        order = [j for j in np.argsort(-np.nan_to_num(drop, nan=-1.0)) if flags[j]]
        J = _dense(system.jacobian(res.z_warm))
        chosen = None
        for j in order:
            trial = np.delete(measured[keep], j)
            if trial.size == 0:
                continue
            key = ("trial", *(int(v) for v in trial))
            cls = classifications.get(key) if classifications is not None else None
            if cls is None:
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
        previous = res.z_warm
        starts: list[Any] = [s for s in (warm, restart) if s is not None] + [previous]
        keep = np.delete(keep, chosen)
        set_key = tuple(int(v) for v in measured[keep])
        known = classifications.get(set_key) if classifications is not None else None
        for z_start in starts:
            res = reconcile(system, z_start() if callable(z_start) else z_start, measured[keep], y[keep],
                            V[np.ix_(keep, keep)], options=options, classification=known)
            if res.converged:
                if classifications is not None and known is None and res.classification is not None:
                    classifications[set_key] = res.classification
                break
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
    return Elimination(res, tuple(out), keep, reason)


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
