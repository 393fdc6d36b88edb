"""Expected performance at the present load, and heat-rate deviation by cause.

The expected model is the forward heat balance at the present main-steam
flow with design component performance (stage-group efficiencies, heater
TTD/DCA, Stodola constants, condenser UA), the present cooling-water inlet
temperature (which the operators do not control) and the unit's own
throttle-pressure operation from the plant file (``[performance]
pressure_control``: sliding, fixed or a load → pressure schedule).

The deviation of the actual turbine-cycle gross heat rate from it is split
into causes by re-running the model with the actual value of one parameter at
a time, so that ``Σ causes + unaccounted = total`` (a model-based form of the
correction-curve accounting of ASME PTC 6; the causes interact, and what the
one-at-a-time runs do not explain is ``unaccounted``). Each cause inverts the
model at the actual boundary conditions:

- section efficiencies: the factor on the section's stage-group (dry)
  efficiencies that reproduces the actual section outlet enthalpy from the
  actual inlet state and the actual stage pressures (Baumann correction
  included), so a wet LP loss is not mis-scaled; the HP section is compared
  from the first group's inlet, after the control valves;
- ``main_steam_pressure``: the throttle pressure against the one expected at
  the actual conditions (the HP swallowing-capacity pressure when sliding, the
  design or scheduled pressure otherwise), valves as expected;
  ``throttling``: the control-valve pressure ratio against the expected one;
- ``condenser_pressure``: the condenser UA that gives the actual back-pressure
  at the *actual* condenser duty and cooling-water inlet, with the design
  cooling-water flow (extra duty from a turbine loss stays with that loss);
- ``main_steam_temperature``, ``reheat_temperature``, ``feedwater_heaters``
  (actual TTD and DCA of every closed heater);
- ``cycle_isolation``: the actual flow of every ``cycle_loss`` sink (the
  make-up the reconciliation found) against its normal loss, the flow the
  expected model assumes (make-up beyond normal).

A cause run that fails is left out of ``by_cause``; then ``unaccounted`` is
left out too and ``status`` names the failed causes (nothing is folded into
``unaccounted`` silently).

Speed (:mod:`twin.performance.operating_point`): the expected state is solved
once per node of an operating-point grid (load every 0.02, cooling-water inlet
every 1 K) and interpolated between nodes; the cause runs are made at the node
nearest to the window's operating point. At each node the heat-rate
sensitivity to every cause's driver (temperatures, pressure and valve ratios,
condenser UA, section factors, heater TTD/DCA) is computed once, from one
factorisation of the heat-balance Jacobian; a cause whose first-order estimate
is within :data:`twin.performance.cause_sensitivity.LINEAR_LIMIT` is that estimate, a larger one (beyond the
linear range) is an exact model run as before. Every steady window is still
split from its own reconciled drivers, so the split and the total come from
the same window and ``unaccounted = total − Σ causes``. A cause without a
registered driver (``"linear"`` in its run) is always an exact run.
"""

from __future__ import annotations

import math
import time
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from twin.model.core import Context
from twin.model.flow import CycleLoss, Reheater, ThrottleValve
from twin.model.flowsheet import Flowsheet
from twin.model.heat_exchange import ClosedHeater, Condenser
from twin.model.solve import (
    HeatBalance,
    Operation,
    SolveError,
    solve_off_design,
)
from twin.model.turbine import TurbineGroup
from twin.performance import cause_runs, cause_sensitivity
from twin.performance.kpi import (
    CyclePerformanceSettings,
    evaluate_kpis,
    interpolate_boiler_efficiency,
    kpi_definitions,
)
from twin.performance.operating_point import (
    CW_STEP,
    FILL_PER_WINDOW,
    LOAD_STEP,
    Node,
    OperatingPoints,
)
from twin.performance.section_path import (
    SectionPath,
    expected_section_efficiency,
    section_factor,
    walk,
)
from twin.properties import PropertyError

CAUSES = (
    "main_steam_temperature",
    "main_steam_pressure",
    "throttling",
    "reheat_temperature",
    "condenser_pressure",
    "hp_efficiency",
    "ip_efficiency",
    "lp_efficiency",
    "feedwater_heaters",
    "cycle_isolation",
)

PRESSURE_CONTROLS = ("sliding", "fixed", "schedule")


_THROTTLE = "_throttle_pressure"  # the grid's interpolated throttle pressure [Pa] (not a KPI)
_HOLD_LOAD = 0.002  # [-] a load change per window below this is the operating point holding (noise)
#: CPU time a window that is not split spends on one-off expected-model work (grid nodes, sensitivities) [s].
EXTRA_SECONDS = 0.020
_FUEL_BASIS = ("plant_heat_rate", "net_plant_heat_rate")  # KPIs divided by the tabulated boiler efficiency


@dataclass(frozen=True)
class PressureControl:
    """How the throttle pressure follows load off design (``[performance]`` of the plant file).

    Attributes
    ----------
    mode : {"sliding", "fixed", "schedule"}
    design_pressure : float
        Design throttle pressure [Pa] (held in fixed-pressure operation).
    schedule : tuple of (float, float)
        (load fraction [-], throttle pressure [Pa]) rows, load increasing (mode "schedule").
    """

    mode: str
    design_pressure: float
    schedule: tuple[tuple[float, float], ...] = ()

    def __post_init__(self) -> None:
        if self.mode not in PRESSURE_CONTROLS:
            raise ValueError(f"pressure_control {self.mode!r}; expected one of {PRESSURE_CONTROLS}")
        if self.mode == "schedule" and len(self.schedule) < 2:
            raise ValueError("pressure_control 'schedule' needs at least two [load, pressure] rows")

    @classmethod
    def from_config(cls, config: Any, fs: Flowsheet, op: Operation) -> PressureControl:
        perf = config.performance
        design = fs.stream_configs[op.throttle_stream].design if op.throttle_stream in fs.stream_configs else {}
        return cls(str(perf.pressure_control), float(design.get("pressure", math.nan)),
                   tuple((float(a), float(b)) for a, b in perf.pressure_schedule))

    def throttle_pressure(self, load: float) -> float:
        """Set throttle pressure [Pa] at ``load`` [-]; NaN when sliding (it follows the HP inlet)."""
        if self.mode == "fixed":
            return self.design_pressure
        if self.mode == "schedule":
            xs, ys = zip(*self.schedule, strict=True)
            return float(np.interp(load, xs, ys))
        return math.nan


@dataclass(frozen=True)
class WindowDeviation:
    """One window's heat-rate deviation, all from the same reconciled state.

    Attributes
    ----------
    total : float
        Actual − expected turbine-cycle gross heat rate [-] (×3600 = kJ/kWh).
    by_cause : mapping
        Cause → heat-rate deviation [-]; includes ``"unaccounted"`` when every cause ran.
    status : str
        ``"complete"``, ``"partial: <cause> (<reason>), ..."`` or ``"unavailable: <reason>"``.
    expected : mapping
        Expected KPIs [SI], same names as the reconciled ``kpis``; section
        efficiencies at the actual boundary conditions (for alarms and drift).
    fuel_power_by_cause : mapping
        Cause → extra fuel power [W] on the configured fuel basis (ΔHR · P_gen / η_boiler).
    cost_per_hour_by_cause : mapping
        Cause → fuel cost per hour [currency/h] at the configured fuel price (empty without one).
    model_runs : int
        Causes computed by an exact model run (the others from first-order sensitivities).
    expected_seconds : float
        Wall time of the expected values (grid or direct solve, section efficiencies) [s] (for the bench).
    """

    total: float
    by_cause: Mapping[str, float]
    status: str
    expected: Mapping[str, float] = field(default_factory=dict)
    fuel_power_by_cause: Mapping[str, float] = field(default_factory=dict)
    cost_per_hour_by_cause: Mapping[str, float] = field(default_factory=dict)
    model_runs: int = 0
    expected_seconds: float = math.nan


class ExpectedModel:
    """Forward model of the unit used for expected values and deviation accounting.

    Parameters
    ----------
    fs, op, design
        Flowsheet, operation streams and the solved design point.
    settings : CyclePerformanceSettings
    control : PressureControl
        The unit's throttle-pressure operation (from the plant file).
    fuel_price : float, optional
        Fuel price per joule of fuel heat [currency/J] for the cost of each cause.
    """

    def __init__(self, fs: Flowsheet, op: Operation, design: HeatBalance, settings: CyclePerformanceSettings,
                 control: PressureControl, fuel_price: float | None = None) -> None:
        self.fs, self.op, self.design, self.settings = fs, op, design, settings
        self.control = control
        self.fuel_price = fuel_price
        self.kpi_defs = kpi_definitions(fs, settings)
        self._hr_def = [d for d in self.kpi_defs if d.name == "turbine_heat_rate"]
        self._z: np.ndarray | None = None
        self.condensers = [e for e in fs.of_kind(Condenser) if isinstance(e, Condenser)]
        self.reheat_stream = next((e.port("outlet") for e in fs.of_kind(Reheater)), None)
        self.heaters = [e.id for e in fs.of_kind(ClosedHeater)]
        self.losses = [e for e in fs.of_kind(CycleLoss) if isinstance(e, CycleLoss)]
        valve = fs.by_id.get(op.throttle_valve)
        self.valve = valve if isinstance(valve, ThrottleValve) else None
        groups = [e for e in fs.of_kind(TurbineGroup) if isinstance(e, TurbineGroup)]
        self.first_hp = next((g for g in groups if self.valve and g.port("inlet") == self.valve.port("outlet")), None)
        self.sections: dict[str, SectionPath] = {}
        for s in settings.sections:
            members = tuple(g for g in groups if str(g.params.get("section")) == s.id)
            if members:
                self.sections[s.id] = SectionPath(s.id, s.inlet, s.outlet, members)
        self.design_flow = float(fs.stream_configs[op.load_stream].design["mass_flow"])  # [kg/s]
        cw0 = float(self.condensers[0].params["cooling_water_inlet_temperature"]) if self.condensers else None
        #: expected states on the operating-point grid (rebuilt deterministically: not state)
        self._walk_memo: dict[str, Any] = {}
        self._last_node: Node | None = None  # the previous window's nearest node (when to prefetch)
        #: the previous window's load [-] (NaN: none); part of ``UnitCycle.snapshot``
        self.last_load = math.nan
        self.last_cw_inlet = math.nan  # [K]
        #: windows an operating point must stay in one grid cell before its values are interpolated
        #: (0: at once, solving the cell's stencil in that window; see :meth:`deviation`)
        self.settle_windows = 0
        #: (load index, cooling-water index, consecutive windows) of the cell the windows are in
        self.settle: tuple[int, int, int] | None = None
        self.direct_solves = 0  # direct solves at a window's point so far (bench and tests)
        knots = [a for a, _ in control.schedule] if control.mode == "schedule" else []
        self.grid = OperatingPoints(lambda load, cw: self._solve(load, cw, None), self._node_values, cw0, knots)

    def start_over(self) -> None:
        """Forget the previous windows (as a new model would), keeping the grid and its sensitivities.

        The grid's nodes and their sensitivities are solved from the design point, so
        they do not depend on the windows that asked for them; a caller that runs
        independent spans of history in turn (the back-fill's chunks in one process)
        keeps them instead of solving them again.
        """
        self.last_load = math.nan
        self.last_cw_inlet = math.nan
        self.settle = None
        self._last_node = None
        self._z = None
        self._walk_memo.clear()

    @classmethod
    def from_config(cls, config: Any, fs: Flowsheet, op: Operation, design: HeatBalance,
                    settings: CyclePerformanceSettings | None = None) -> ExpectedModel:
        """The expected model with the plant file's pressure control and fuel price."""
        settings = settings or CyclePerformanceSettings.from_config(config)
        price = config.performance.fuel_price
        return cls(fs, op, design, settings, PressureControl.from_config(config, fs, op),
                   None if price is None else float(price) / 1e9)

    # ------------------------------------------------------------------ expected state
    def _cw(self, cw_inlet: float | None) -> dict:
        if cw_inlet is None or not math.isfinite(cw_inlet):
            return {}
        return {c.id: {"cw_inlet": float(cw_inlet)} for c in self.condensers}

    def _solve(self, load: float, cw_inlet: float | None, z0: np.ndarray | None) -> HeatBalance:
        cw = self._cw(cw_inlet)
        if self.control.mode == "sliding":
            return solve_off_design(self.fs, self.op, self.design, load, "sliding", z0=z0, constants=cw)
        p_set = self.control.throttle_pressure(load)
        hb = solve_off_design(self.fs, self.op, self.design, load, "fixed", z0=z0, constants=cw,
                              overrides={(self.op.throttle_stream, "pressure"): p_set})
        if self.valve is not None:
            ctx = hb.context()
            if ctx.p(self.valve.port("outlet")) > ctx.p(self.valve.port("inlet")):
                # the set pressure is below what the HP group swallows: valves wide open
                hb = solve_off_design(self.fs, self.op, self.design, load, "sliding", z0=z0, constants=cw)
        return hb

    def expected(self, load: float, cw_inlet: float | None = None) -> tuple[HeatBalance, dict[str, float]]:
        """Expected state and KPIs at ``load`` [-] and cooling-water inlet temperature [K].

        Raises
        ------
        SolveError, ValueError
            If the model cannot be solved there (load outside 0.2–1.2 of design).
        """
        hb = self._solve(load, cw_inlet, self._z)
        self._z = hb.z
        return hb, evaluate_kpis(self.kpi_defs, hb.context())

    def _heat_rate(self, hb: HeatBalance) -> float:
        return evaluate_kpis(self._hr_def, hb.context())["turbine_heat_rate"]

    def _node_values(self, hb: HeatBalance) -> dict[str, float]:
        """What the grid interpolates: every KPI and the expected throttle pressure [Pa]."""
        ctx = hb.context()
        out = evaluate_kpis(self.kpi_defs, ctx)
        eta_b = interpolate_boiler_efficiency(self.settings.boiler_efficiency, hb.load)
        for name in _FUEL_BASIS:  # smooth in load without the boiler-efficiency table (divided back in expected_at)
            if name in out:
                out[name] *= eta_b
        out[_THROTTLE] = ctx.p(self.valve.port("inlet")) if self.valve is not None else math.nan
        return out

    def expected_at(self, load: float, cw_inlet: float | None = None, *,
                    direct: bool = False, fill: int | None = None) -> tuple[dict[str, float], Node]:
        """Expected KPIs at ``load`` [-] and cooling-water inlet [K] from the grid, and the nearest node.

        ``direct``: solve at the point itself (from the design point) instead; also the
        fallback when a grid node cannot be solved. ``fill``: the values from a direct
        solve as well, but the node is the grid's nearest one, and at most ``fill``
        missing nodes of the stencil are solved (the nearest first): a cell being settled into.

        Raises
        ------
        SolveError, ValueError
            If the model cannot be solved there either.
        """
        try:
            if direct:
                raise ValueError("direct solve")
            if fill is not None:
                self.grid.fill(load, cw_inlet, fill)
                node = self.grid.nearest(load, cw_inlet)
                if node.hb is None:
                    raise ValueError(node.error)
                self.direct_solves += 1
                hb = self._solve(load, cw_inlet, None)
                values = self._node_values(hb)
            else:
                values = self.grid.interpolate(load, cw_inlet)
                node = self.grid.nearest(load, cw_inlet)
                if node.hb is None:
                    raise ValueError(node.error)
        except ValueError:
            self.direct_solves += 1
            hb = self._solve(load, cw_inlet, None)
            node = Node(load, cw_inlet, hb, self._node_values(hb))
            values = dict(node.values)
        eta_b = interpolate_boiler_efficiency(self.settings.boiler_efficiency, load)
        for name in _FUEL_BASIS:
            if name in values:
                values[name] /= eta_b
        return values, node

    # ------------------------------------------------------------------ sensitivities
    def sensitivities(self, node: Node) -> dict[str, float]:
        """d(turbine heat rate)/d(driver) at a grid node, computed once (:func:`cause_sensitivity.sensitivities`)."""
        return cause_sensitivity.sensitivities(self, node)

    def run_heat_rate(self, node: Node, run: Mapping[str, Any]) -> float:
        """Turbine heat rate [-] of one cause run (overrides, skip, constants) solved at ``node``."""
        ref = node.hb
        assert ref is not None
        constants = self._cw(node.cw_inlet)
        for k, v in run.get("constants", {}).items():
            constants.setdefault(k, {}).update(v)
        hb = solve_off_design(self.fs, self.op, self.design, ref.load, ref.pressure_mode, z0=ref.z,
                              overrides={**self.ref_overrides(ref), **run.get("overrides", {})},
                              skip=run.get("skip", frozenset()), constants=constants)
        return self._heat_rate(hb)

    # ------------------------------------------------------------------ section inversion
    def _walk_design(self, ctx: Context, path: SectionPath) -> float:
        """:func:`walk` at the design factor, kept for the latest state (two callers per window)."""
        memo = self._walk_memo
        if memo.get("ctx") is not ctx:
            memo.clear()
            memo["ctx"] = ctx
        if path.id not in memo:
            memo[path.id] = walk(ctx, path, 1.0)
        return float(memo[path.id])

    def section_factor(self, ctx: Context, path: SectionPath) -> float:
        """Factor on the section's group efficiencies that reproduces the actual outlet enthalpy [-]."""
        return section_factor(ctx, path, self._walk_design(ctx, path))

    def expected_section_efficiency(self, ctx: Context, path: SectionPath) -> float:
        """Section efficiency with design group efficiencies at the actual boundary conditions [-]."""
        return expected_section_efficiency(ctx, path, self._walk_design(ctx, path))

    # ------------------------------------------------------------------ causes
    def _cause_runs(self, ctx: Context, ref: HeatBalance, load: float, cw_inlet: float | None,
                    expected_throttle: float = math.nan) -> tuple[dict[str, dict[str, Any]], dict[str, str]]:
        """Per cause, the solve arguments that put that one actual value into the model.

        ``"linear"`` in a run: its driver(s) as {sensitivity name: change from ``ref``}
        (see :meth:`sensitivities`); a run without it is always solved exactly.
        """
        rctx = ref.context()
        runs: dict[str, dict[str, Any]] = {}
        failed: dict[str, str] = {}

        def attempt(cause: str, fn: Any) -> None:
            try:
                run = fn()
            except (SolveError, ValueError, PropertyError, ArithmeticError, AssertionError) as exc:
                failed[cause] = f"inversion failed: {type(exc).__name__}"
                return
            if run is not None:
                runs.update(run if cause == "pressure" else {cause: run})

        ms = self.op.throttle_stream

        def temperature(stream: str) -> dict[str, Any] | None:
            t, t_ref = ctx.ph(stream).T, rctx.ph(stream).T
            if not math.isfinite(t):
                raise ValueError("not observable")
            if abs(t - t_ref) < cause_runs.TEMPERATURE_TOL:
                return {"zero": True}
            return {"overrides": {(stream, "temperature"): t}, "linear": {f"T:{stream}": t - t_ref}}

        attempt("main_steam_temperature", lambda: temperature(ms))
        attempt("pressure", lambda: cause_runs.pressure_runs(self, ctx, ref, load, expected_throttle))
        if self.reheat_stream:
            attempt("reheat_temperature", lambda: temperature(str(self.reheat_stream)))
        if self.condensers:
            attempt("condenser_pressure", lambda: cause_runs.condenser_run(self, ctx, rctx, cw_inlet))
        for sec, cause in (("HP", "hp_efficiency"), ("IP", "ip_efficiency"), ("LP", "lp_efficiency")):
            path = self.sections.get(sec)
            if path is None:
                continue

            def eff(path: SectionPath = path) -> dict[str, Any]:
                f = self.section_factor(ctx, path)
                if abs(f - 1.0) < cause_runs.FACTOR_TOL:
                    return {"zero": True}
                return {"constants": {g.id: {"efficiency_factor": f} for g in path.groups},
                        "linear": {f"factor:{path.id}": f - 1.0}}

            attempt(cause, eff)
        kd = {d.name: d for d in self.kpi_defs}

        def heaters() -> dict[str, Any]:
            consts: dict[str, dict[str, float]] = {}
            linear: dict[str, float] = {}
            for h in self.heaters:
                for k in ("ttd", "dca"):
                    name = f"heater_{k}.{h}"
                    v, v_ref = kd[name].func(ctx), kd[name].func(rctx)
                    if math.isfinite(v) and abs(v - v_ref) > cause_runs.TEMPERATURE_TOL:
                        consts.setdefault(h, {})[k] = float(v)
                        linear[f"{k}:{h}"] = float(v - v_ref)
            return {"constants": consts, "linear": linear} if consts else {"zero": True}

        if self.heaters:
            attempt("feedwater_heaters", heaters)
        if self.losses:
            attempt("cycle_isolation", lambda: cause_runs.isolation_run(self, ctx, rctx))
        return runs, failed

    def deviation(self, ctx: Context, actual: Mapping[str, float], cw_inlet: float | None = None, *,
                  causes: bool = True) -> WindowDeviation:
        """Split actual − expected turbine heat rate of one state into causes.

        Parameters
        ----------
        ctx : Context
            The actual (reconciled) state of the flowsheet.
        actual : mapping
            Actual KPIs [SI] of that state (``load_fraction``, ``turbine_heat_rate``,
            ``gross_power``, ``section_efficiency.*``).
        cw_inlet : float, optional
            Cooling-water inlet temperature [K]; the configured one without it.
        causes : bool
            Split the total into causes (False: total and expected values only,
            ``status = "not split: ..."``, ``by_cause`` empty).
        """
        load = actual.get("load_fraction", math.nan)
        hr_act = actual.get("turbine_heat_rate", math.nan)
        if not (math.isfinite(load) and math.isfinite(hr_act)):
            return WindowDeviation(math.nan, {}, "unavailable: load or heat rate not available")
        load_c = min(max(load, 0.2), 1.2)
        # moving faster than a grid step per window (a ramp, a step of the cooling water): one direct
        # solve here, not new grid rows used once (False when there is no previous window: NaN)
        cw_now = cw_inlet if cw_inlet is not None and math.isfinite(cw_inlet) else math.nan
        step = load_c - self.last_load
        moving = abs(step) > LOAD_STEP or abs(cw_now - self.last_cw_inlet) > CW_STEP
        holding = abs(step) <= _HOLD_LOAD  # the operating point holds (False without a previous window)
        self.last_load, self.last_cw_inlet = load_c, cw_now
        # settling: fewer than settle_windows consecutive windows in this grid cell (a function of
        # the windows alone, not of what the grid holds): values from a direct solve, the stencil
        # filled a few nodes per window, so no window solves a whole new cell
        cell = self.grid.cell(load_c, cw_inlet)
        streak = 1
        if self.settle is not None:
            i0, j0, n0 = self.settle
            if (i0, j0) == cell:
                streak = n0 + 1
            elif n0 >= self.settle_windows and abs(cell[0] - i0) + abs(cell[1] - j0) == 1 and not moving:
                streak = n0  # settled, into a neighbouring cell (noise at a boundary, a slow ramp): 3 new nodes at most
        self.settle = (cell[0], cell[1], min(streak, max(self.settle_windows, 1)))
        settling = streak < self.settle_windows and not moving
        solves = self.grid.solves
        t_exp = time.perf_counter()
        try:
            exp, node = self.expected_at(load_c, cw_inlet, direct=moving,
                                         fill=(FILL_PER_WINDOW if causes else 0) if settling else None)
        except (SolveError, ValueError, PropertyError) as exc:
            return WindowDeviation(math.nan, {}, f"unavailable: expected model failed ({type(exc).__name__})")
        ref = node.hb
        assert ref is not None
        p_throttle = exp.pop(_THROTTLE, math.nan)
        for sec, path in self.sections.items():
            try:
                exp[f"section_efficiency.{sec}"] = self.expected_section_efficiency(ctx, path)
            except (ValueError, PropertyError, ArithmeticError):
                exp[f"section_efficiency.{sec}"] = math.nan
        hr_exp = exp["turbine_heat_rate"]
        total = hr_act - hr_exp
        t_exp = time.perf_counter() - t_exp
        last, self._last_node = self._last_node, node
        if not causes:
            if not moving:
                self._extra_work(node, node is last, load_c, cw_inlet, step, holding and not settling, solves)
            return WindowDeviation(total, {}, "not split: window not steady", exp, expected_seconds=t_exp)
        runs, failed = self._cause_runs(ctx, ref, load_c, cw_inlet, p_throttle)
        hr_ref = node.values["turbine_heat_rate"]
        linear = cause_sensitivity.estimates(self, node, runs)
        by_cause: dict[str, float] = {}
        hr_run: dict[str, float] = {}
        exact = 0
        for cause, run in runs.items():
            if run.get("zero"):
                by_cause[cause], hr_run[cause] = 0.0, hr_ref
                continue
            if cause in linear:
                by_cause[cause] = linear[cause]
                continue
            exact += 1
            try:
                hr_run[cause] = self.run_heat_rate(node, run)
                base = hr_run.get(run["minus"], math.nan) if "minus" in run else hr_ref
                by_cause[cause] = hr_run[cause] - base
            except (SolveError, ValueError, PropertyError) as exc:
                failed[cause] = f"model run failed: {type(exc).__name__}"
            if "minus" in run and not math.isfinite(by_cause.get(cause, 0.0)):
                by_cause.pop(cause, None)
                failed[cause] = f"needs {run['minus']}"
        if failed:
            status = "partial: " + ", ".join(f"{c} ({r})" for c, r in sorted(failed.items()))
        else:
            by_cause["unaccounted"] = total - sum(by_cause.values())
            status = "complete"
        p_gen = actual.get("gross_power", math.nan)
        eta_b = interpolate_boiler_efficiency(self.settings.boiler_efficiency, load)
        fuel = {c: v * p_gen / eta_b for c, v in by_cause.items()} if math.isfinite(p_gen) and eta_b > 0 else {}
        cost = {c: v * 3600.0 * self.fuel_price for c, v in fuel.items()} if self.fuel_price is not None else {}
        return WindowDeviation(total, by_cause, status, exp, fuel, cost, exact, t_exp)

    def _extra_work(self, node: Node, same_node: bool, load: float, cw_inlet: float | None, step: float,
                    holding: bool, solves: int) -> None:
        """One-off work of a window that is not split, for about :data:`EXTRA_SECONDS` of CPU time.

        In turn: missing nodes of the point's stencil (a cell being settled into); on a
        slow ramp one node of the grid row ahead (if this window solved none); the
        nearest node's sensitivity and probe work when the window before had the same
        node. None of it changes a number (nodes and their sensitivities are functions
        of the node alone), only which window pays for it; a split window does only
        what its own split needs.
        """
        t0 = time.process_time()

        def left() -> float:
            return EXTRA_SECONDS - (time.process_time() - t0)

        while left() > 0 and self.grid.fill(load, cw_inlet, 1):
            pass
        if not (holding or math.isnan(step)) and self.grid.solves == solves:
            self.grid.prefetch(load + math.copysign(LOAD_STEP, step), cw_inlet)
        if same_node and left() > 0:
            cause_sensitivity.prefetch(self, node, left())

    def ref_overrides(self, ref: HeatBalance) -> dict[tuple[str, str], float]:
        """The expected run's set throttle pressure (fixed or scheduled), kept in every cause run."""
        if ref.pressure_mode != "fixed":
            return {}
        return {(self.op.throttle_stream, "pressure"): ref.context().p(self.op.throttle_stream)}


def window_deviation(model: ExpectedModel, rec: Any, cw_inlet: float | None = None, *,
                     causes: bool = True) -> WindowDeviation:
    """Total, split by cause and status of one reconciled window (the pure per-window step).

    Parameters
    ----------
    model : ExpectedModel
    rec : PlantReconciliation
        A reconciliation (its ``z``, ``kpis``); not converged gives ``status = "unavailable: ..."``.
    cw_inlet : float, optional
        Reconciled cooling-water inlet temperature [K].
    causes : bool
        Split into causes (the daemon splits steady windows only).
    """
    if not getattr(rec, "converged", False) or rec.z is None:
        return WindowDeviation(math.nan, {}, "unavailable: reconciliation did not converge")
    ctx = model.fs.context(rec.z, model.design.constants)
    actual = {k: (e.value if e.available else math.nan) for k, e in rec.kpis.items()}
    return model.deviation(ctx, actual, cw_inlet, causes=causes)

