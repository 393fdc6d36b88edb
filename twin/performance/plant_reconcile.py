"""Reconcile one window of plant measurements: values, suspects, unmeasured estimates, KPIs ± U.

``PlantReconciler`` owns the plant's reconciliation problem
(:class:`twin.performance.plant.PlantSystem`), a warm start and a cache of
the classification per set of valid tags. ``reconcile(values)`` takes the
window means of the valid tags in SI and returns a
:class:`PlantReconciliation` with one :class:`twin.result.TagResult` per
sensor, reconciled stream states and KPI estimates with expanded (95 %)
uncertainties. It never raises for bad data: missing, NaN or unknown tags
are reported, and a failed solve returns a status with no numbers.

References
----------
VDI 2048 Blatt 1 (2017); S. Narasimhan, C. Jordache, *Data Reconciliation and
Gross Error Detection*, Gulf (2000), ch. 7–8 (measurement test, serial elimination).
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from twin.model.core import Context
from twin.model.flowsheet import Flowsheet
from twin.model.solve import HeatBalance, Operation, SolveError, solve_design, solve_off_design
from twin.performance import kpi_propagation
from twin.performance.kpi import CyclePerformanceSettings, KpiDef, kpi_definitions
from twin.performance.plant import K95, PlantSystem
from twin.reconcile import (
    Classification,
    Result,
    SolveOptions,
    chi2_quantile,
    classify,
    eliminate_again,
    eliminate_suspects,
    measurement_test,
    reconcile,
)
from twin.result import Estimate, StreamState, TagResult

#: KPIs whose observability serial elimination must never break.
PROTECTED_KPIS = ("gross_efficiency", "turbine_heat_rate", "exhaust_quality_ueep")

#: A derived value is ``model_based`` (not ``reconciled``) when at least this share of its
#: variance comes from the soft model relations: its instruments are invalid or missing and
#: the model carries it. demo-u1 at design: LP efficiency 0.47 with every instrument,
#: 0.998 without the generator-power measurements.
MODEL_BASED_SHARE = 0.9

DEFAULT_OPTIONS = SolveOptions(max_iter=40, step_tol=1e-6, residual_tol=1e-6, objective_tol=1e-9)


class _BoundedCache(dict):
    """A dict that starts over when it would hold more than :attr:`LIMIT` entries (a cache of classifications)."""

    LIMIT = 64

    def __setitem__(self, key: Any, value: Any) -> None:
        if key not in self and len(self) >= self.LIMIT:
            self.clear()
        super().__setitem__(key, value)


@dataclass(frozen=True)
class PlantReconciliation:
    """The outcome of one plant reconciliation (SI units; uncertainties expanded, ≈95 %)."""

    status: str
    message: str = ""
    iterations: int = 0
    z: np.ndarray | None = None  # reconciled variables (NaN where unobservable)
    cov: np.ndarray | None = None
    tags: Mapping[str, TagResult] = field(default_factory=dict)
    streams: Mapping[str, StreamState] = field(default_factory=dict)
    kpis: Mapping[str, Estimate] = field(default_factory=dict)
    global_test: float = math.nan
    dof: int = 0
    p_value: float = math.nan
    global_test_critical: float = math.nan  # χ²(dof) 95 % quantile
    suspects: tuple[str, ...] = ()  # instruments (tags) eliminated or flagged (Šidák)
    model_suspects: tuple[str, ...] = ()  # soft model relations flagged (Šidák)
    depends_on: tuple[str, ...] = ()  # soft model relations in use
    unmeasured: Mapping[str, Estimate] = field(default_factory=dict)  # LP exhaust enthalpy, extraction flows...
    kpi_seconds: float = math.nan  # wall time of the KPIs and unmeasured estimates ± U [s] (for the bench)

    @property
    def converged(self) -> bool:
        return self.status == "converged"


class PlantReconciler:
    """Reconciles windows of tag values for one unit.

    Parameters
    ----------
    config : PlantConfig
    flowsheet, design : optional
        Reuse an existing flowsheet and solved design point.
    alpha : float
        Family-wise significance of the measurement test (Šidák) [-].
    max_eliminations : int
        Bound on serially eliminated suspects per window (0 disables elimination).
    options : SolveOptions, optional
    time_budget : float
        Seconds after which no further restart or elimination is started in a window [s]
        (a solve under way finishes; the window then reports what it has).
    """

    def __init__(self, config: Any, *, flowsheet: Flowsheet | None = None, design: HeatBalance | None = None,
                 alpha: float = 0.05, max_eliminations: int = 3, options: SolveOptions | None = None,
                 time_budget: float = 5.0) -> None:
        self.time_budget = float(time_budget)
        self.config = config
        self.fs = flowsheet or Flowsheet.from_config(config)
        self.op = Operation.from_config(config)
        self.design = design or solve_design(self.fs, self.op)
        self.system = PlantSystem(self.fs, config.sensors, self.design)
        self.settings = CyclePerformanceSettings.from_config(config)
        self.kpi_defs: list[KpiDef] = kpi_definitions(
            self.fs, self.settings, cooling_water_columns=self.system.cooling_water_columns
        )
        self.alpha = alpha
        self.max_eliminations = max_eliminations
        self.options = options or DEFAULT_OPTIONS
        self.sensor_configs = {s.tag: s for s in config.sensors}
        # classifications by measured set (and elimination trial sets, keyed ("trial", ...)), kept across windows
        self._classifications: dict[tuple, Classification] = _BoundedCache()
        self._sigma_rules: dict[str, tuple[Callable[[float], float], float]] = {}  # tag -> (σ of a reading, floor)
        self._z_warm: np.ndarray | None = None
        # the last window's solution with every valid tag, when eliminations followed it (its measured set, z)
        self._z_first: tuple[tuple[int, ...], np.ndarray] | None = None
        # the last window's measured set and the position in it of its one eliminated measurement
        # (re-tested first in the next window of that set, see _reconcile)
        self._retest: tuple[tuple[int, ...], int] | None = None
        self._soft_cols = np.array([r.column for r in self.system.soft], dtype=int)
        self._soft_set = frozenset(self._soft_cols.tolist())
        protected = {c for d in self.kpi_defs if d.name in PROTECTED_KPIS for c in d.columns}
        self._protected_cols = np.array(sorted(protected), dtype=int)

    # ------------------------------------------------------------------ helpers
    def sigma(self, tag: str, value_si: float) -> float:
        """Standard uncertainty (1 σ) of a sensor's reading [SI].

        A percent-of-reading uncertainty vanishes at a zero reading; the floor is
        0.1 % of the sensor's valid range (95 %), so a zero flow still has a variance.
        """
        rule = self._sigma_rules.get(tag)
        if rule is None:
            s = self.sensor_configs[tag]
            rng = s.range_si
            floor = 0.001 * abs(rng[1] - rng[0]) / 1.96 if rng is not None else 1e-9
            rule = self._sigma_rules[tag] = (s.sigma_rule(), floor)
        sig = float(rule[0](value_si))
        floor = rule[1]
        return sig if math.isfinite(sig) and sig >= floor else max(floor, 1e-9)

    def start_point(self, load: float | None = None) -> np.ndarray:
        """Starting state: the forward model at ``load`` (or the design point)."""
        if load is None or not 0.2 <= load <= 1.2:
            return self.system.initial_point(self.design.z)
        try:
            hb = solve_off_design(self.fs, self.op, self.design, float(load), "sliding")
        except (SolveError, ValueError):
            return self.system.initial_point(self.design.z)
        return self.system.initial_point(hb.z)

    def _estimate_load(self, values: Mapping[str, float]) -> float | None:
        flows = [v for t, v in values.items()
                 if t in self.system.sensor_by_tag and self.system.sensor_by_tag[t].kind == "m"
                 and self.system.sensor_by_tag[t].target in (self.op.load_stream, "feedwater")]
        if not flows:
            return None
        return float(np.median(flows)) / self.settings.design_flow

    def classification(self, measured: np.ndarray, sigma: np.ndarray, z: np.ndarray) -> Classification:
        """Classification for this set of valid tags, computed once per set."""
        key = tuple(int(i) for i in measured)
        cls = self._classifications.get(key)
        if cls is None:
            vs, rs = self.system.scales()
            cls = classify(self.system.jacobian(z), measured, sigma=sigma, var_scale=vs, residual_scale=rs)
            self._classifications[key] = cls
        return cls

    def reset(self) -> None:
        """Forget the warm starts (e.g. after a unit trip)."""
        self._z_warm = None
        self._z_first = None
        self._retest = None

    @property
    def warm_start(self) -> np.ndarray | None:
        """The last converged solution, the next window's starting point (None: none yet)."""
        return None if self._z_warm is None else self._z_warm.copy()

    @warm_start.setter
    def warm_start(self, z: Sequence[float] | np.ndarray | None) -> None:
        self._z_warm = self._finite_point(z)
        self._z_first = None
        self._retest = None

    @property
    def retest(self) -> tuple[tuple[int, ...], int] | None:
        """``(measured columns, position)``: the last window's measured set and the position in it of
        the one measurement it eliminated (None: none, or more than one).

        The next window over the same set solves it without that measurement first and
        re-tests the measurement there (:func:`twin.reconcile.eliminate_again`); the set with
        it is solved only when the re-test does not confirm the elimination. Set it after
        :attr:`warm_start`.
        """
        return self._retest

    @retest.setter
    def retest(self, value: tuple[Sequence[int], int] | None) -> None:
        self._retest = None if value is None else (tuple(int(c) for c in value[0]), int(value[1]))

    @property
    def first_warm_start(self) -> tuple[tuple[int, ...], np.ndarray] | None:
        """``(measured columns, z)``: the last window's solution with every valid tag, kept when
        suspects were eliminated after it (None otherwise).

        The next window's first solve, over the same measured set, starts from it: it is a
        window's noise away from that solve's answer, where the final solution (without the
        eliminated tags) is a whole gross error away. Set it after :attr:`warm_start`.
        """
        return None if self._z_first is None else (self._z_first[0], self._z_first[1].copy())

    @first_warm_start.setter
    def first_warm_start(self, value: tuple[Sequence[int], Sequence[float] | np.ndarray] | None) -> None:
        z = None if value is None else self._finite_point(value[1])
        self._z_first = None if value is None or z is None else (tuple(int(c) for c in value[0]), z)

    def _finite_point(self, z: Sequence[float] | np.ndarray | None) -> np.ndarray | None:
        if z is None:
            return None
        arr = np.asarray(z, dtype=float)
        return arr.copy() if arr.shape == (self.system.n_vars,) and np.all(np.isfinite(arr)) else None

    # ------------------------------------------------------------------ main
    def reconcile(self, values: Mapping[str, float], *, excluded: Mapping[str, str] | None = None,
                  z0: np.ndarray | None = None, kpis: Sequence[str] | None = None,
                  pseudo: Mapping[str, float] | None = None) -> PlantReconciliation:
        """Reconcile one window; see :meth:`_reconcile`. Never raises for bad data or model trouble."""
        try:
            return self._reconcile(values, excluded=excluded, z0=z0, kpis=kpis, pseudo=pseudo)
        except (ValueError, ArithmeticError, SolveError) as exc:  # property range, singular system...
            self._z_warm = self._z_first = self._retest = None
            tags = {t: TagResult(t, b.quantity, measured=float(values.get(t, math.nan)),
                                 valid=t in values, reason=(excluded or {}).get(t, ""))
                    for t, b in self.system.sensor_by_tag.items()}
            return PlantReconciliation("model_error", f"{type(exc).__name__}: {exc}", tags=tags)

    def _reconcile(self, values: Mapping[str, float], *, excluded: Mapping[str, str] | None = None,
                   z0: np.ndarray | None = None, kpis: Sequence[str] | None = None,
                   pseudo: Mapping[str, float] | None = None) -> PlantReconciliation:
        """Reconcile one window.

        Parameters
        ----------
        values : mapping
            Window mean of each valid tag [SI]. Non-finite values are excluded.
        excluded : mapping, optional
            Tags the caller left out and why (``stale``, ``out_of_range``...), for the report.
        z0 : ndarray, optional
            Starting point; default the previous solution, else the forward model at the
            measured load.
        kpis : sequence of str, optional
            Evaluate only these KPIs (default all; the uncertainty propagation is the
            costly part).
        pseudo : mapping, optional
            Values of the soft relations' pseudo-measurements by relation name (default 0,
            i.e. the model relation holds); Monte Carlo studies draw them.
        """
        excluded = dict(excluded or {})
        sysm = self.system
        valid: list[str] = []
        for tag in sysm.sensor_by_tag:
            v = values.get(tag)
            if v is None:
                excluded.setdefault(tag, "no_data")
            elif not math.isfinite(v):
                excluded[tag] = "not_finite"
            else:
                valid.append(tag)
        tags_out = {t: TagResult(t, b.quantity, valid=False, reason=excluded.get(t, "no_data"))
                    for t, b in sysm.sensor_by_tag.items() if t not in valid}
        if not valid:
            return PlantReconciliation("insufficient_data", "no valid sensor in this window", tags=tags_out)
        cols = np.array([sysm.sensor_by_tag[t].column for t in valid], dtype=int)
        y_s = np.array([values[t] for t in valid], dtype=float)
        sig_s = np.array([self.sigma(t, values[t]) for t in valid])
        measured = np.concatenate([cols, self._soft_cols])
        y_soft = np.array([float((pseudo or {}).get(r.name, 0.0)) for r in sysm.soft])
        y = np.concatenate([y_s, y_soft])
        sig = np.concatenate([sig_s, [r.sigma for r in sysm.soft]])
        V = sig**2
        fresh_cache: list[np.ndarray] = []

        def fresh() -> np.ndarray:
            """The forward model at the measured load: solved only when a start is needed."""
            if not fresh_cache:
                fresh_cache.append(self.start_point(self._estimate_load(values)))
            return fresh_cache[0]

        cls_key = tuple(int(i) for i in measured)
        started = time.perf_counter()
        # the classification of this set of valid tags, decided at the first converged solution
        cached = self._classifications.get(cls_key)
        eliminated: dict[int, Any] = {}
        res: Result | None = None
        first: Result | None = None
        retest = self._retest
        if (retest is not None and retest[0] == cls_key and z0 is None and cached is not None
                and self._z_warm is not None):
            # the last window of this set eliminated one measurement: solve without it first and
            # re-test it there; the set with it is solved only when the re-test does not confirm it
            again = eliminate_again(sysm, measured, y, V, retest[1], full=cached,
                                    max_eliminations=self.max_eliminations, alpha=self.alpha, criterion="sidak",
                                    protected=self._keep_ok, options=self.options, restart=fresh,
                                    warm=self._z_warm, classifications=self._classifications)
            if again is not None and again.result.converged and again.first_redundancy is not None:
                res = again.result
                eliminated = {e.position: e for e in again.eliminated}
                first_redundancy = again.first_redundancy
        if res is None:
            first, res, eliminated = self._solve_all(sysm, measured, y, V, cls_key, cached, z0, fresh, fresh_cache,
                                                     started, len(valid))
            if res is None:
                status = "model_error" if first.status == "model_error" else "not_converged"
                return PlantReconciliation(status, first.message, first.iterations, tags=tags_out)
            first_redundancy = first.redundancy
        self._z_warm = res.z_warm.copy()
        self._z_first = (cls_key, first.z_warm.copy()) if first is not None and res is not first else None
        self._retest = (cls_key, next(iter(eliminated))) if len(eliminated) == 1 else None
        # ---- tags
        final_pos = {int(v): i for i, v in enumerate(res.measured)}
        mt_final = measurement_test(res.z, self.alpha)
        suspects = []
        for i, tag in enumerate(valid):
            col = int(cols[i])
            e = eliminated.get(i)
            adjustment = math.nan
            if e is not None:
                # re-estimated without it: z = (y − x̂) / sqrt(σ² + Var(x̂)), the same sign
                # as the adjustment, and tested where it was tested when eliminated
                rec, rec_sig = e.re_estimate, e.re_estimate_sigma
                adjustment = float(y_s[i] - rec)
                suspect = True
                red = float(first_redundancy[i])
                zj = adjustment / math.sqrt(sig_s[i] ** 2 + rec_sig**2) if math.isfinite(rec_sig) else math.nan
            else:
                j = final_pos[col]
                rec = float(res.x_hat[j])
                rec_sig = float(math.sqrt(max(res.cov_z[col, col], 0.0)))
                adjustment = float(res.adjustments[j])
                suspect = bool(mt_final.flagged_sidak[j])
                red = float(res.redundancy[j])
                zj = float(res.z[j])  # NaN when not redundant (or below the redundancy floor)
            if suspect:
                suspects.append(tag)
            tags_out[tag] = TagResult(
                tag, sysm.sensor_by_tag[tag].quantity, measured=float(y_s[i]), valid=True,
                sigma=float(sig_s[i]), reconciled=rec, reconciled_sigma=rec_sig,
                adjustment=adjustment, normalised_adjustment=zj,
                redundancy=red, suspect=suspect,
                flagged_vdi=bool(math.isfinite(zj) and abs(zj) > 1.96),
                reason="eliminated" if e is not None else "",
            )
        model_suspects = tuple(
            r.name for k, r in enumerate(sysm.soft)
            if bool(mt_final.flagged_sidak[final_pos[r.column]])
        )
        # ---- states, KPIs
        z_hat, cov = res.z_hat, res.cov_z
        streams = self._streams(z_hat)
        t_kpi = time.perf_counter()
        share = _SoftShare(res.gain, np.isin(res.measured, self._soft_cols))
        kpi_values = self._kpis(z_hat, cov, kpis, share)
        unmeasured = self._unmeasured(z_hat, cov, share)
        t_kpi = time.perf_counter() - t_kpi
        return PlantReconciliation(
            "converged", res.message, res.iterations, z_hat, cov, tags_out, streams, kpi_values,
            float(res.gamma), int(res.dof), float(res.p_value),
            chi2_quantile(0.95, res.dof) if res.dof > 0 else math.nan,
            tuple(suspects), model_suspects, tuple(r.name for r in sysm.soft), unmeasured, t_kpi,
        )

    def _keep_ok(self, cls: Classification) -> bool:
        """An elimination trial set is allowed: it keeps every soft relation and the protected KPIs determined."""
        if not self._soft_set.issubset(cls.measured.tolist()):
            return False
        protected = self._protected_cols
        return bool(np.all(cls.determined[protected])) if protected.size else True

    def _solve_all(self, sysm: PlantSystem, measured: np.ndarray, y: np.ndarray, V: np.ndarray,
                   cls_key: tuple[int, ...], cached: Classification | None, z0: np.ndarray | None,
                   fresh: Callable[[], np.ndarray], fresh_cache: list[np.ndarray], started: float,
                   n_s: int) -> tuple[Result, Result | None, dict[int, Any]]:
        """The set with every valid tag solved, then serial elimination: ``(first, final, eliminated)``;
        final None when the first solve did not converge (``first`` says why)."""
        # the previous window's solution with every tag, when it eliminated suspects from this same set
        z_all = self._z_first[1] if self._z_first is not None and self._z_first[0] == cls_key else None
        if z0 is None:
            z0 = z_all if z_all is not None else self._z_warm if self._z_warm is not None else fresh()
        from_warm = z0 is z_all or z0 is self._z_warm
        res = reconcile(sysm, z0, measured, y, V, options=self.options, classification=cached)
        # the previous window's solution, when it served this one: a start for the re-solves of elimination
        warm = self._z_warm if res.converged and from_warm else None
        if not res.converged and time.perf_counter() - started < self.time_budget:
            # a stale warm start (after a load change): restart from the previous final solution
            # (when the first try was the solution with every tag), the forward model,
            # and the design point as a last resort
            starts = [self._z_warm] if z_all is not None and z0 is z_all and self._z_warm is not None else []
            starts += ([] if fresh_cache and z0 is fresh_cache[0] else [fresh()])
            for start in [*starts, self.system.initial_point(self.design.z)]:
                res = reconcile(sysm, start, measured, y, V, options=self.options, classification=cached)
                if res.converged or time.perf_counter() - started > self.time_budget:
                    break
        if res.converged and cached is None and res.classification is not None:
            self._classifications[cls_key] = res.classification
        if not res.converged:
            return res, None, {}
        first = res
        flagged = measurement_test(first.z, self.alpha).flagged_sidak
        eliminated: dict[int, Any] = {}
        if self.max_eliminations > 0 and np.any(flagged[:n_s]) and time.perf_counter() - started < self.time_budget:
            elim = eliminate_suspects(sysm, first.z_warm, measured, y, V, max_eliminations=self.max_eliminations,
                                      alpha=self.alpha, criterion="sidak", protected=self._keep_ok,
                                      options=self.options, restart=fresh, first=first, warm=warm,
                                      classifications=self._classifications)
            if elim.result.converged:
                res = elim.result
                eliminated = {e.position: e for e in elim.eliminated}
        return first, res, eliminated

    # ------------------------------------------------------------------ outputs
    def _streams(self, z: np.ndarray) -> dict[str, StreamState]:
        out = {}
        ctx = self.system.context(z)  # the solve's property states where they apply
        for sid in self.fs.layout.streams:
            m, p, h = ctx.m(sid), ctx.p(sid), ctx.h(sid)
            T = x = math.nan
            if math.isfinite(p) and math.isfinite(h):
                try:
                    st = ctx.ph(sid)
                    T, x = st.T, (st.x if st.two_phase else math.nan)
                except ValueError:
                    pass
            out[sid] = StreamState(m, p, T, h, x)
        return out

    def _kpi_estimate(self, d: KpiDef, z: np.ndarray, cov: np.ndarray,
                      base: Context | None = None, shifted: dict[tuple[int, int], Context] | None = None,
                      share: _SoftShare | None = None) -> Estimate:
        """A KPI and its expanded uncertainty by linear propagation (central differences).

        ``base`` is a context at ``z``; ``shifted`` caches the contexts at ``z ± step·e_c`` by
        ``(column, ±1)``, shared by every KPI that reads column ``c``. A moved stream's
        property state is the base state extended to first order by its own derivatives
        (:meth:`twin.model.core.Context.nudged`), so the difference quotient is the chain
        rule through the analytic state derivatives and costs no property call for it.
        ``share`` gives the soft-relation share of the variance (and so the status).
        """
        # a column listed twice (a flow read by two terms of the KPI) enters the
        # gradient once: the difference quotient already carries both terms
        cols = list(dict.fromkeys(d.columns))
        if any(not math.isfinite(z[c]) for c in cols):
            return Estimate()
        base = base if base is not None else self.system.context(z)
        shifted = {} if shifted is None else shifted

        def at(c: int, sign: int, step: float) -> Context:
            ctx = shifted.get((c, sign))
            if ctx is None:
                ctx = shifted[(c, sign)] = base.nudged(c, z[c] + sign * step)
            return ctx

        try:
            value = float(d.func(base))
            grad = np.zeros(len(cols))
            for k, c in enumerate(cols):
                step = 1e-6 * max(abs(z[c]), 1.0)
                grad[k] = (d.func(at(c, 1, step)) - d.func(at(c, -1, step))) / (2 * step)
        except (ValueError, ZeroDivisionError, ArithmeticError):
            return Estimate()
        C = cov[np.ix_(cols, cols)]
        var = float(grad @ C @ grad)
        if not (math.isfinite(value) and math.isfinite(var)):
            return Estimate()
        soft_share = share(cols, grad) if share is not None else math.nan
        return Estimate(value, K95 * math.sqrt(max(var, 0.0)), True, status=_status(soft_share),
                        soft_share=soft_share)

    def _kpis(self, z: np.ndarray, cov: np.ndarray, names: Sequence[str] | None = None,
              share: _SoftShare | None = None) -> dict[str, Estimate]:
        """Every wanted KPI ± U: analytic gradients, propagated together (:mod:`kpi_propagation`).

        A definition without an analytic gradient goes through :meth:`_kpi_estimate`
        (central differences over nudged contexts).
        """
        wanted = None if names is None else set(names)
        base = self.system.context(z)
        shifted: dict[tuple[int, int], Context] = {}
        out: dict[str, Estimate] = {}
        rows: list[tuple[str, float, list[int], dict[int, float]]] = []
        for d in self.kpi_defs:
            if wanted is not None and d.name not in wanted:
                continue
            if d.grad is None:
                out[d.name] = self._kpi_estimate(d, z, cov, base, shifted, share)
                continue
            out[d.name] = Estimate()  # unless it has a value and a variance below
            cols = list(dict.fromkeys(d.columns))  # a column listed twice enters once
            if any(not math.isfinite(z[c]) for c in cols):
                continue
            try:
                value = float(d.func(base))
                grad = d.grad(base)
            except (ValueError, ZeroDivisionError, ArithmeticError):
                continue
            if math.isfinite(value):
                rows.append((d.name, value, cols, grad))
        if not rows:
            return out
        used, G = kpi_propagation.gradient_matrix([(cols, g) for _, _, cols, g in rows])
        var = kpi_propagation.variances(used, G, cov)
        shares = (kpi_propagation.soft_shares(used, G, share.gain, share.soft) if share is not None
                  else np.full(len(rows), math.nan))
        for (name, value, _, _), v, sh in zip(rows, var, shares, strict=True):
            if math.isfinite(v):
                soft_share = float(sh)
                out[name] = Estimate(value, K95 * math.sqrt(max(float(v), 0.0)), True, status=_status(soft_share),
                                     soft_share=soft_share)
        return out

    def _unmeasured(self, z: np.ndarray, cov: np.ndarray, share: _SoftShare | None = None) -> dict[str, Estimate]:
        """Unmeasured quantities worth reporting: LP exhaust enthalpies, line factors."""
        out = {}
        lay = self.fs.layout
        for s in self.settings.sections:
            col = lay.h(s.outlet)
            out[f"{s.outlet}.enthalpy"] = self._var_estimate(z, cov, col, share)
        for e in self.fs.of_kind("exhaust_loss"):
            out[f"{e.port('outlet')}.enthalpy"] = self._var_estimate(z, cov, lay.h(e.port("outlet")), share)
        for key, col in self.system.line_columns.items():
            out[f"{key}.efficiency_factor"] = self._var_estimate(z, cov, col, share)
        return out

    @staticmethod
    def _var_estimate(z: np.ndarray, cov: np.ndarray, col: int, share: _SoftShare | None = None) -> Estimate:
        if not math.isfinite(z[col]) or not math.isfinite(cov[col, col]):
            return Estimate()
        soft_share = share([col], np.ones(1)) if share is not None else math.nan
        return Estimate(float(z[col]), K95 * math.sqrt(max(cov[col, col], 0.0)), True,
                        status=_status(soft_share), soft_share=soft_share)


def _status(soft_share: float) -> str:
    """``model_based`` when the soft relations carry at least :data:`MODEL_BASED_SHARE` of the variance."""
    return "model_based" if math.isfinite(soft_share) and soft_share >= MODEL_BASED_SHARE else "reconciled"


class _SoftShare:
    """Share of a derived quantity's variance that comes from the soft relations [-].

    With the whitened gain ``G`` of the solution (``δẑ = G δw``, ``Cov(ẑ) = G Gᵀ``) a
    quantity with gradient ``g`` has ``Var = Σ_j r_j²``, ``r = gᵀ G``; the soft
    relations' pseudo-measurements are uncorrelated with the instruments, so their
    terms sum to the part of the variance they contribute.
    """

    def __init__(self, gain: np.ndarray | None, soft: np.ndarray) -> None:
        self.gain, self.soft = gain, soft

    def __call__(self, cols: Sequence[int], grad: np.ndarray) -> float:
        if self.gain is None:
            return math.nan
        r = np.asarray(grad, dtype=float) @ self.gain[list(cols)]
        total = float(r @ r)
        if not math.isfinite(total) or total <= 0.0:
            return math.nan
        return float(np.sum(r[self.soft] ** 2) / total)
