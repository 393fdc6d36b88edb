"""One unit's per-window pipeline: window statistics in, one immutable result out.

:class:`UnitCycle` holds everything between "a window of tag statistics" and
"one :class:`twin.result.CycleResult`": validity of each tag, the steady-state
gate, plant reconciliation (warm start), gross-error tests, KPIs with
uncertainty, expected performance at the present load, heat-rate deviation by
cause, alarms, suspect persistence and drift charts. It has no MQTT, clock,
HTTP or files inside: the live daemon feeds it from the tag store every cycle,
the back-fill feeds it from history files, and both get the same numbers for
the same windows.

Its state (warm start, gate, alarms, suspects, drift) is one JSON-able value,
:meth:`UnitCycle.snapshot`, which :meth:`UnitCycle.restore` takes back, so a
restarted daemon resumes where it stopped and a test can replay it.

Right, or marked: every KPI the plant defines is present in every result; a
window that did not converge (or had too little data) carries its status and
no KPI value (``available`` false), never a stale number.

Advisory monitoring only: nothing here trips, interlocks or operates equipment.
"""

from __future__ import annotations

import math
import time
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from typing import Any

from twin.config import PlantConfig
from twin.ingest.store import WindowStats
from twin.model.solve import Operation, solve_design
from twin.monitor import (
    DriftBank,
    DriftSettings,
    LevelAlarm,
    SteadyStateDetector,
    SuspectTracker,
    Transition,
    exhaust_moisture_alarm,
    steady_detector,
    suppression_reason,
)
from twin.monitor.drift import CLEAR_WINDOWS
from twin.performance.expected import ExpectedModel, WindowDeviation, window_deviation
from twin.performance.plant_reconcile import PlantReconciler, PlantReconciliation
from twin.result import AlarmView, CycleResult, DriftView, Estimate, InputStats, TagResult, evolve

#: KPIs whose deviation from expected feeds the drift charts.
DRIFT_KPIS = ("section_efficiency.HP", "section_efficiency.IP", "section_efficiency.LP", "turbine_heat_rate")

#: Version of :meth:`UnitCycle.snapshot`'s layout; a snapshot of another version is not restored.
SNAPSHOT_VERSION = 1

#: Windows the operating point stays in one cell of the expected model's grid before its
#: expected values are interpolated there; until then they are a direct solve at the point and
#: the cell's stencil is solved a few nodes per window (so no window solves a whole cell).
SETTLE_WINDOWS = 5


#: Level of a drift chart's transitions (events.csv, logs, MQTT events).
DRIFT_LEVEL = "drift"


def suspect_alarm_name(tag: str) -> str:
    """The one name of a tag's suspect alarm: in results, on screen, in logs, metrics and MQTT events."""
    return f"suspect_{tag}"


def drift_alarm_name(kpi: str) -> str:
    """The one name of a KPI's drift alarm in transitions (logs, MQTT events, the back-fill's events.csv)."""
    return f"drift_{kpi}"


def drift_bank(config: PlantConfig) -> DriftBank:
    """Drift charts on actual − expected of :data:`DRIFT_KPIS`; μ0 and σ learned from the unit's own steady windows.

    A raised drift alarm clears after :data:`twin.monitor.drift.CLEAR_WINDOWS` charted windows
    without a signal: a drift is slow, and an EWMA hovering at its limit would otherwise raise
    and clear it window after window (a simulated demo day at 1-minute windows: 20 raises
    without the hold, some a minute apart; 13 with it, each cleared after at least 10 quiet minutes).
    """
    mon = config.monitoring.drift
    return DriftBank(learn=DRIFT_KPIS, params=DriftSettings(0.0, 1.0, mon.ewma_lambda, mon.ewma_L, mon.cusum_k,
                                                            mon.cusum_h),
                     reference_windows=mon.reference_windows, clear_windows=CLEAR_WINDOWS)


def drift_step(bank: DriftBank, devs: Mapping[str, float], used: bool, t: float,
               window_seconds: float) -> list[Transition]:
    """Feed one window's deviations (actual − expected) to the charts; the drift alarms that changed.

    ``used``: the window may enter the charts (steady, above the minimum load). Only
    non-overlapping windows are charted: the bank skips one that starts before the last
    used one ended. The same step runs in the live cycle and in the back-fill's
    sequential drift pass (:mod:`twin.backfill.drift`), so both raise the same alarms.
    """
    before = bank.raised()
    bank.update(devs, used, t, window_start=t - window_seconds)
    after = bank.raised()
    out = []
    for name in bank.names():
        if (name in after) != (name in before):
            new, reason = (("active", f"drift chart signals a shift {after[name]} from the learned reference")
                           if name in after else
                           ("normal", f"drift charts within their limits for {bank.clear_windows} charted windows"))
            out.append(Transition(drift_alarm_name(name), DRIFT_LEVEL, "normal" if new == "active" else "active",
                                  new, float(t), float(devs.get(name, math.nan)), reason))
    return out


def drift_views(bank: DriftBank) -> dict[str, DriftView]:
    """The charts' statistics as the result carries them (learning KPIs with NaN statistics).

    ``alarm`` and ``direction`` are the raised drift alarm's (held until the charts have
    been quiet for ``bank.clear_windows`` charted windows), as its transitions report it.
    """
    raised = bank.raised()
    return {name: DriftView(name, st.ewma, st.ewma_lower, st.ewma_upper, st.cusum_high, st.cusum_low,
                            name in raised, raised.get(name, "none"))
            for name, st in bank.statuses().items()}


@dataclass(frozen=True)
class CycleOptions:
    """Policy knobs of the per-window pipeline that are not plant configuration."""

    max_eliminations: int = 3  # bound on serially eliminated suspects per window
    alpha: float = 0.05  # family-wise significance of the measurement test (Šidák) [-]


@dataclass(frozen=True)
class WindowInput:
    """One window, as the tag store (live) or a history reader (back-fill) sees it.

    Attributes
    ----------
    t_end : float
        Window end, Unix time [s].
    window_seconds : float
        Window length [s]; the window is ``[t_end - window_seconds, t_end)``.
    stats : mapping of str to WindowStats
        Statistics of every tag over the window (SI).
    gate_stats : mapping of str to WindowStats
        Statistics of the steady-state key signals over the last, non-overlapping
        cycle ``[t_end - cycle, t_end)``; they feed the steady-state gate.
    inputs : InputStats, optional
        Cumulative input counters at window close (live only); the pipeline fills
        in ``stale_tags`` itself.
    """

    t_end: float
    window_seconds: float
    stats: Mapping[str, WindowStats]
    gate_stats: Mapping[str, WindowStats] = field(default_factory=dict)
    inputs: InputStats | None = None


@dataclass(frozen=True)
class CycleOutput:
    """What one window produced: the result, the alarm transitions, and notes for the log."""

    result: CycleResult
    transitions: list[Transition]
    notes: list[tuple[str, dict[str, Any]]] = field(default_factory=list)  # (event, fields)
    reconcile_seconds: float = math.nan  # the reconciliation, KPIs ± U included
    deviation_seconds: float = math.nan  # expected model and heat-rate split
    cause_model_runs: int = 0  # causes that needed an exact model run (others from stored sensitivities)
    kpi_seconds: float = math.nan  # the KPIs ± U (part of reconcile_seconds)
    expected_seconds: float = math.nan  # the expected values (part of deviation_seconds)
    monitors_seconds: float = math.nan  # alarms, suspects, drift
    # what this window fed the drift charts: actual − expected per DRIFT_KPIS, and whether it was used
    drift_input: tuple[dict[str, float], bool] | None = None


def window_values(config: PlantConfig, stats: Mapping[str, WindowStats]) -> tuple[dict[str, float], dict[str, str]]:
    """Window means of the valid tags [SI] and the reason each other tag is left out.

    Reasons: ``no_data`` (never heard from, or nothing in the window), ``stale``
    (heard from before, nothing recent enough), ``bad_quality``, ``not_finite``.
    Gauge pressures were converted with the configured barometric pressure; when
    the unit has a live barometer its reading replaces it.
    """
    values: dict[str, float] = {}
    excluded: dict[str, str] = {}
    for s in config.sensors:
        w = stats.get(s.tag)
        if w is None or (w.count == 0 and not math.isfinite(w.last_time)):
            excluded[s.tag] = "no_data"
        elif w.stale:
            excluded[s.tag] = "stale"
        elif w.count == 0:
            excluded[s.tag] = "no_data" if w.n_bad == 0 else "bad_quality"
        elif not math.isfinite(w.mean):
            excluded[s.tag] = "not_finite"
        else:
            values[s.tag] = float(w.mean)
    baro_tag = config.unit.barometric_tag
    if baro_tag and baro_tag in values and config.unit.barometric_pressure is not None:
        delta = values[baro_tag] - float(config.unit.barometric_pressure)
        for s in config.sensors:
            if s.tag in values and s.gauge and s.quantity == "pressure":
                values[s.tag] += delta
    return values, excluded


class UnitCycle:
    """The per-window pipeline of one unit.

    Parameters
    ----------
    config : PlantConfig
    reconciler : PlantReconciler, optional
        Reuse a built reconciler (tests, benchmarks).
    options : CycleOptions, optional
    """

    def __init__(self, config: PlantConfig, *, reconciler: PlantReconciler | None = None,
                 options: CycleOptions | None = None, expected_model: ExpectedModel | None = None) -> None:
        from twin.model.flowsheet import Flowsheet

        self.config = config
        self.options = options or CycleOptions()
        mon = config.monitoring
        self.cycle_seconds = float(mon.cycle)
        self.window_seconds = float(mon.window or mon.cycle)
        fs = reconciler.fs if reconciler else Flowsheet.from_config(config)
        op = Operation.from_config(config)
        design = reconciler.design if reconciler else solve_design(fs, op)
        self.reconciler = reconciler or PlantReconciler(config, flowsheet=fs, design=design, alpha=self.options.alpha,
                                                        max_eliminations=self.options.max_eliminations)
        # gross-error tests and elimination run in every window, steady or not
        self.reconciler.max_eliminations = self.options.max_eliminations
        # the throttle-pressure operation (sliding, fixed, schedule) and fuel price come from the plant file
        # a passed-in model (built for this plant) starts over but keeps its solved grid
        if expected_model is not None:
            expected_model.start_over()
        self.expected_model = expected_model or ExpectedModel.from_config(config, fs, op, design,
                                                                          self.reconciler.settings)
        self.expected_model.settle_windows = SETTLE_WINDOWS
        self.fs, self.op = fs, op
        self.kpi_names = tuple(d.name for d in self.reconciler.kpi_defs)
        self.steady: SteadyStateDetector | None = steady_detector(config)
        self.moisture_alarm = exhaust_moisture_alarm(
            warning=mon.exhaust_moisture_warn, alarm=mon.exhaust_moisture_alarm, deadband=mon.alarm_deadband,
            on_delay=mon.on_delay, off_delay=mon.off_delay, unavailable_after=10 * self.cycle_seconds)
        self.efficiency_alarms = {
            s.id: LevelAlarm(f"efficiency_{s.id}", mon.efficiency_margin, deadband=mon.efficiency_margin / 4,
                             on_delay=mon.on_delay, off_delay=mon.off_delay)
            for s in self.reconciler.settings.sections
        }
        self.suspects = SuspectTracker(mon.suspect_persistence)
        self.drift = drift_bank(config)
        self._steady_windows = 0

    # ------------------------------------------------------------------ one window
    def run(self, window: WindowInput) -> CycleOutput:
        """Process one window; never raises for bad data or model trouble."""
        started = time.perf_counter()
        t_end = float(window.t_end)
        notes: list[tuple[str, dict[str, Any]]] = []
        values, excluded = window_values(self.config, window.stats)
        verdict = None
        if self.steady is not None:
            g = window.gate_stats
            verdict = self.steady.update({t: g[t].mean if t in g and g[t].count else math.nan
                                          for t in self.steady.signals}, t_end,
                                         spreads={t: g[t].std for t in self.steady.signals if t in g})
        steady = bool(verdict.steady) if verdict is not None else True
        t_rec = time.perf_counter()
        rec = self.reconciler.reconcile(values, excluded=excluded)
        t_rec = time.perf_counter() - t_rec
        kpis = self._kpis(rec)
        load = _value(kpis, "load_fraction")
        # total and split from this window's own reconciliation (split on steady windows only)
        t_dev = time.perf_counter()
        dev = self.deviation(rec, steady)
        t_dev = time.perf_counter() - t_dev
        if dev.status.startswith(("unavailable: expected", "partial")):
            notes.append(("heat_rate_deviation", {"window_end": t_end, "status": dev.status}))
        expected = dict(dev.expected)
        if steady:
            self._steady_windows += 1
        t_mon = time.perf_counter()
        transitions, drift_input = self._update_monitors(t_end, steady, load, rec, kpis, expected)
        t_mon = time.perf_counter() - t_mon
        result = CycleResult(
            unit_id=self.config.unit.id, window_start=t_end - window.window_seconds, window_end=t_end,
            steady=steady, steady_status=verdict.status if verdict is not None else "steady",
            steady_r={k: float(v) for k, v in (verdict.r if verdict is not None else {}).items()},
            steady_frozen=tuple(verdict.frozen) if verdict is not None else (),
            reconcile_status=rec.status, reconcile_message=rec.message, iterations=rec.iterations,
            global_test=rec.global_test, global_test_dof=rec.dof, global_test_p_value=rec.p_value,
            tags=self._tags(rec, window.stats, values, excluded), streams=dict(rec.streams), kpis=kpis,
            expected=expected, heat_rate_deviation=dev.total, heat_rate_deviation_by_cause=dict(dev.by_cause),
            heat_rate_deviation_status=dev.status,
            heat_rate_deviation_fuel_power_by_cause=dict(dev.fuel_power_by_cause),
            heat_rate_deviation_cost_by_cause=dict(dev.cost_per_hour_by_cause),
            currency=self.config.performance.currency,
            alarms=self._alarm_views(), drift=drift_views(self.drift),
            inputs=replace(window.inputs or InputStats(),
                           stale_tags=tuple(sorted(t for t, r in excluded.items() if r == "stale"))),
            depends_on=tuple(rec.depends_on), compute_seconds=time.perf_counter() - started,
        )
        if not rec.converged:
            notes.append(("reconcile_failed", {"window_end": t_end, "status": rec.status, "message": rec.message}))
        return CycleOutput(result, transitions, notes, t_rec, t_dev, dev.model_runs, rec.kpi_seconds,
                           dev.expected_seconds, t_mon, drift_input)

    def _kpis(self, rec: PlantReconciliation) -> dict[str, Estimate]:
        """Every KPI of the plant, unavailable where the window gave no value."""
        got = rec.kpis if rec.converged else {}
        return {name: got.get(name, Estimate()) for name in self.kpi_names}

    def _tags(self, rec: PlantReconciliation, stats: Mapping[str, WindowStats], values: Mapping[str, float],
              excluded: Mapping[str, str]) -> dict[str, TagResult]:
        tags = {}
        for s in self.config.sensors:
            w = stats.get(s.tag)
            base = rec.tags.get(s.tag) or TagResult(s.tag, s.quantity, valid=s.tag in values,
                                                   reason=excluded.get(s.tag, ""),
                                                   measured=values.get(s.tag, math.nan))
            if w is not None:
                base = evolve(base, spread=w.std, count=w.count, age_seconds=w.age,
                              measured=values.get(s.tag, base.measured))
            tags[s.tag] = base
        return tags

    def deviation(self, rec: PlantReconciliation, steady: bool) -> WindowDeviation:
        """Expected values and heat-rate deviation of one window, split into causes when steady.

        Every steady window is split from its own reconciled drivers (with the
        sensitivities stored at the nearest operating-point node, exact model runs
        beyond their range), so the split and the total always come from the same
        reconciled state. The expected model's node cache is rebuilt deterministically
        (each node solved from the design point) and is not part of :meth:`snapshot`.
        """
        return window_deviation(self.expected_model, rec, self._cooling_water_inlet(rec), causes=steady)

    def _cooling_water_inlet(self, rec: PlantReconciliation) -> float | None:
        cols = self.reconciler.system.cooling_water_columns
        if not cols or rec.z is None:
            return None
        return _finite_or_none(float(rec.z[next(iter(cols.values()))[0]]))

    def _update_monitors(self, t: float, steady: bool, load: float, rec: PlantReconciliation,
                         kpis: Mapping[str, Estimate], expected: Mapping[str, float],
                         ) -> tuple[list[Transition], tuple[dict[str, float], bool] | None]:
        """Alarms, suspect persistence and drift; they act only on steady windows above the minimum load.

        Returns the transitions (drift alarms last) and what the drift charts were fed.
        """
        mon = self.config.monitoring
        suppress = suppression_reason(steady, load if math.isfinite(load) else None, mon.min_load)
        out: list[Transition] = []
        out += self.moisture_alarm.update(_value(kpis, "exhaust_moisture_elep"), t, suppress)
        for sec, alarm in self.efficiency_alarms.items():
            out += alarm.update(_value(kpis, f"section_efficiency.{sec}"),
                                expected.get(f"section_efficiency.{sec}", math.nan), t, suppress)
        if rec.converged:
            tested = [tag for tag, tr in rec.tags.items() if tr.valid]
            out += [replace(tr, alarm=suspect_alarm_name(tr.alarm))
                    for tr in self.suspects.update(rec.suspects, t, steady=steady and suppress is None, tested=tested)]
        drift_input = None
        if len(self.drift):
            devs = {k: _value(kpis, k) - expected.get(k, math.nan) for k in DRIFT_KPIS}
            drift_input = (devs, steady and suppress is None)
            out += drift_step(self.drift, devs, drift_input[1], t, self.window_seconds)
        return out, drift_input

    def _alarm_views(self) -> dict[str, AlarmView]:
        views = {}
        m = self.moisture_alarm
        sev = m.severity or ""
        states = m.states
        state = states[sev] if sev else states.get("warning", "normal")
        views[m.name] = AlarmView(m.name, state, sev, math.nan, bool(sev))
        for sec, a in self.efficiency_alarms.items():
            views[f"efficiency_{sec}"] = AlarmView(f"efficiency_{sec}", a.state, "warning" if a.raised else "",
                                                   math.nan, a.raised)
        for tag in sorted(self.suspects.raised):
            views[suspect_alarm_name(tag)] = AlarmView(suspect_alarm_name(tag), "active", "suspect", math.nan, True)
        return views

    # ------------------------------------------------------------------ state
    def snapshot(self) -> dict[str, Any]:
        """The pipeline's state as one JSON-able value (see :meth:`restore`)."""
        z = self.reconciler.warm_start
        first = self.reconciler.first_warm_start
        retest = self.reconciler.retest
        return {
            "version": SNAPSHOT_VERSION,
            "unit_id": self.config.unit.id,
            "steady_windows": self._steady_windows,
            "warm_start": None if z is None else [_finite_or_none(v) for v in z],
            # the solution with every valid tag when suspects were eliminated after it (the next first solve's start)
            "warm_start_first": None if first is None else {"measured": list(first[0]),
                                                            "z": [_finite_or_none(v) for v in first[1]]},
            # the measured set of the last window and the position of its one eliminated measurement (re-tested first)
            "retest": None if retest is None else {"measured": list(retest[0]), "position": retest[1]},
            "steady": self.steady.snapshot() if self.steady is not None else None,
            "moisture_alarm": self.moisture_alarm.snapshot(),
            "efficiency_alarms": {k: a.snapshot() for k, a in self.efficiency_alarms.items()},
            "suspects": self.suspects.snapshot(),
            "drift": self.drift.snapshot(),
            # the expected model's previous load (a ramp is solved directly); its node cache is not state
            "expected_last_load": _finite_or_none(self.expected_model.last_load),
            "expected_last_cw_inlet": _finite_or_none(self.expected_model.last_cw_inlet),
            # the grid cell of the last windows and for how many in a row (when values are interpolated)
            "expected_settle": None if self.expected_model.settle is None else list(self.expected_model.settle),
        }

    def restore(self, snap: Mapping[str, Any]) -> None:
        """Resume from a :meth:`snapshot`; ValueError if it is of another version or unit."""
        if snap.get("version") != SNAPSHOT_VERSION:
            raise ValueError(f"state snapshot version {snap.get('version')!r}; expected {SNAPSHOT_VERSION}")
        if snap.get("unit_id") != self.config.unit.id:
            raise ValueError(f"state snapshot of unit {snap.get('unit_id')!r}; expected {self.config.unit.id!r}")
        self._steady_windows = int(snap.get("steady_windows", 0))
        z = snap.get("warm_start")
        self.reconciler.warm_start = None if z is None else [math.nan if v is None else float(v) for v in z]
        first = snap.get("warm_start_first")  # absent from snapshots written before it was kept
        if isinstance(first, Mapping) and first.get("measured") is not None and first.get("z") is not None:
            self.reconciler.first_warm_start = (
                [int(c) for c in first["measured"]], [math.nan if v is None else float(v) for v in first["z"]])
        retest = snap.get("retest")  # absent from snapshots written before it was kept
        if isinstance(retest, Mapping) and retest.get("measured") is not None and retest.get("position") is not None:
            self.reconciler.retest = ([int(c) for c in retest["measured"]], int(retest["position"]))
        if snap.get("steady") is not None and self.steady is not None:
            self.steady.restore(snap["steady"])
        self.moisture_alarm.restore(snap["moisture_alarm"])
        for k, a in self.efficiency_alarms.items():
            if k in snap.get("efficiency_alarms", {}):
                a.restore(snap["efficiency_alarms"][k])
        self.suspects.restore(snap["suspects"])
        if snap.get("drift") is not None:
            self.drift.restore(snap["drift"])
        last = snap.get("expected_last_load")
        self.expected_model.last_load = math.nan if last is None else float(last)
        last = snap.get("expected_last_cw_inlet")
        self.expected_model.last_cw_inlet = math.nan if last is None else float(last)
        settle = snap.get("expected_settle")
        self.expected_model.settle = None if settle is None else (int(settle[0]), int(settle[1]), int(settle[2]))


def _finite_or_none(v: float) -> float | None:
    return float(v) if math.isfinite(v) else None


def _value(kpis: Mapping[str, Estimate], name: str) -> float:
    e = kpis.get(name)
    return e.value if e is not None and e.available else math.nan
