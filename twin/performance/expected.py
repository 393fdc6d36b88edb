"""Expected performance at the present load, and heat-rate deviation by cause.

The expected model is the forward heat balance at the present main-steam
flow with design component performance (stage-group efficiencies, heater
TTD/DCA, Stodola constants, condenser UA) and the present cooling-water
inlet temperature, which the operators do not control. The deviation of the
actual turbine heat rate from it is split into causes by re-running the model
with the actual value of one parameter at a time, so that
``Σ causes + unaccounted = total`` (a model-based form of the correction-curve
accounting of ASME PTC 6; the causes interact, and what the one-at-a-time
runs do not explain is reported as ``unaccounted``).

Causes: main-steam temperature and pressure, hot-reheat temperature,
condenser back-pressure, HP/IP/LP section efficiency, feedwater heaters.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from twin.model.flow import Reheater
from twin.model.flowsheet import Flowsheet
from twin.model.heat_exchange import ClosedHeater, Condenser
from twin.model.solve import HeatBalance, Operation, SolveError, solve_off_design
from twin.model.turbine import TurbineGroup
from twin.performance.kpi import CyclePerformanceSettings, evaluate_kpis, kpi_definitions

CAUSES = (
    "main_steam_temperature",
    "main_steam_pressure",
    "reheat_temperature",
    "condenser_pressure",
    "hp_efficiency",
    "ip_efficiency",
    "lp_efficiency",
    "feedwater_heaters",
)


@dataclass(frozen=True)
class ActualConditions:
    """What the reconciled plant shows, in the terms the causes need (SI)."""

    load: float  # main-steam flow / design [-]
    heat_rate: float  # actual turbine heat rate [-]
    main_steam_temperature: float = math.nan  # [K]
    main_steam_pressure: float = math.nan  # [Pa]
    reheat_temperature: float = math.nan  # [K]
    condenser_pressure: float = math.nan  # [Pa]
    section_efficiency: Mapping[str, float] = field(default_factory=dict)  # by section id [-]
    heater_ttd: Mapping[str, float] = field(default_factory=dict)  # [K]
    heater_dca: Mapping[str, float] = field(default_factory=dict)  # [K]


@dataclass(frozen=True)
class Deviation:
    """Actual − expected turbine heat rate [-] and its split by cause [-]."""

    expected_heat_rate: float
    actual_heat_rate: float
    total: float
    by_cause: Mapping[str, float]  # includes "unaccounted"


class ExpectedModel:
    """Forward model of the unit used for expected values and deviation accounting.

    Parameters
    ----------
    fs, op, design
        Flowsheet, operation streams and the solved design point.
    settings : CyclePerformanceSettings
    pressure_mode : {"sliding", "fixed"}
        How the unit runs off design.
    """

    def __init__(self, fs: Flowsheet, op: Operation, design: HeatBalance, settings: CyclePerformanceSettings,
                 pressure_mode: str = "sliding") -> None:
        self.fs, self.op, self.design, self.settings = fs, op, design, settings
        self.pressure_mode = pressure_mode
        self.kpi_defs = kpi_definitions(fs, settings)
        self._z: np.ndarray | None = None
        self.condensers = [e.id for e in fs.of_kind(Condenser)]
        self.reheat_stream = next((e.port("outlet") for e in fs.of_kind(Reheater)), None)
        self.groups_by_section: dict[str, list[str]] = {}
        for e in fs.of_kind(TurbineGroup):
            self.groups_by_section.setdefault(str(e.params["section"]), []).append(e.id)
        self.heaters = [e.id for e in fs.of_kind(ClosedHeater)]

    def _cw(self, cw_inlet: float | None) -> dict:
        if cw_inlet is None or not math.isfinite(cw_inlet):
            return {}
        return {c: {"cw_inlet": float(cw_inlet)} for c in self.condensers}

    def expected(self, load: float, cw_inlet: float | None = None) -> tuple[HeatBalance, dict[str, float]]:
        """Expected state and KPIs at ``load`` [-] and cooling-water inlet temperature [K].

        Raises
        ------
        SolveError, ValueError
            If the model cannot be solved there (load outside 0.2–1.2...).
        """
        hb = solve_off_design(self.fs, self.op, self.design, load, self.pressure_mode, z0=self._z,
                              constants=self._cw(cw_inlet))
        self._z = hb.z
        return hb, evaluate_kpis(self.kpi_defs, hb.context())

    def _heat_rate(self, hb: HeatBalance) -> float:
        return evaluate_kpis([d for d in self.kpi_defs if d.name == "turbine_heat_rate"], hb.context())["turbine_heat_rate"]

    def _cause_runs(self, ref: HeatBalance, ref_kpis: Mapping[str, float], a: ActualConditions) -> dict[str, dict[str, Any]]:
        """Per cause, the solve arguments that put that one actual value into the model."""
        ms = self.op.throttle_stream
        runs: dict[str, dict[str, Any]] = {}
        if math.isfinite(a.main_steam_temperature):
            runs["main_steam_temperature"] = {"overrides": {(ms, "temperature"): a.main_steam_temperature}}
        if math.isfinite(a.main_steam_pressure):
            runs["main_steam_pressure"] = {"overrides": {(ms, "pressure"): a.main_steam_pressure}, "mode": "fixed"}
        if self.reheat_stream and math.isfinite(a.reheat_temperature):
            runs["reheat_temperature"] = {"overrides": {(self.reheat_stream, "temperature"): a.reheat_temperature}}
        if self.condensers and math.isfinite(a.condenser_pressure):
            cond = self.fs.by_id[self.condensers[0]]
            runs["condenser_pressure"] = {
                "overrides": {(cond.port("exhaust"), "pressure"): a.condenser_pressure},
                "skip": frozenset(self.fs.by_id[c].relation("cooling") for c in self.condensers),
            }
        for sec, cause in (("HP", "hp_efficiency"), ("IP", "ip_efficiency"), ("LP", "lp_efficiency")):
            act = a.section_efficiency.get(sec, math.nan)
            exp = ref_kpis.get(f"section_efficiency.{sec}", math.nan)
            if math.isfinite(act) and math.isfinite(exp) and exp > 0 and sec in self.groups_by_section:
                factor = act / exp
                runs[cause] = {"constants": {g: {"efficiency_factor": factor} for g in self.groups_by_section[sec]}}
        heaters = {h: {k: v for k, v in (("ttd", a.heater_ttd.get(h)), ("dca", a.heater_dca.get(h)))
                       if v is not None and math.isfinite(v)} for h in self.heaters}
        heaters = {h: v for h, v in heaters.items() if v}
        if heaters:
            runs["feedwater_heaters"] = {"constants": heaters}
        return runs

    def deviation(self, ref: HeatBalance, ref_kpis: Mapping[str, float], actual: ActualConditions,
                  cw_inlet: float | None = None) -> Deviation:
        """Split actual − expected turbine heat rate into causes (one model run per cause)."""
        hr_exp = ref_kpis.get("turbine_heat_rate", math.nan)
        total = actual.heat_rate - hr_exp
        by_cause: dict[str, float] = {}
        for cause, run in self._cause_runs(ref, ref_kpis, actual).items():
            constants = self._cw(cw_inlet)
            for k, v in run.get("constants", {}).items():
                constants.setdefault(k, {}).update(v)
            try:
                hb = solve_off_design(self.fs, self.op, self.design, actual.load if 0.2 <= actual.load <= 1.2 else ref.load,
                                      run.get("mode", self.pressure_mode), z0=ref.z, overrides=run.get("overrides"),
                                      skip=run.get("skip", frozenset()), constants=constants)
                by_cause[cause] = self._heat_rate(hb) - hr_exp
            except (SolveError, ValueError):
                by_cause[cause] = math.nan
        known = [v for v in by_cause.values() if math.isfinite(v)]
        by_cause["unaccounted"] = total - sum(known) if math.isfinite(total) else math.nan
        return Deviation(hr_exp, actual.heat_rate, total, by_cause)


def actual_conditions(rec: Any, fs: Flowsheet, op: Operation, settings: CyclePerformanceSettings) -> ActualConditions:
    """The actual values the causes need, from a converged plant reconciliation."""
    def kpi(name: str) -> float:
        e = rec.kpis.get(name)
        return e.value if e is not None and e.available else math.nan

    def stream(sid: str | None, q: str) -> float:
        if sid is None or sid not in rec.streams:
            return math.nan
        return float(getattr(rec.streams[sid], q))

    reheat = next((e.port("outlet") for e in fs.of_kind(Reheater)), None)
    cond = next((e for e in fs.of_kind(Condenser)), None)
    heaters = [e.id for e in fs.of_kind(ClosedHeater)]
    return ActualConditions(
        load=kpi("load_fraction"),
        heat_rate=kpi("turbine_heat_rate"),
        main_steam_temperature=stream(op.throttle_stream, "temperature"),
        main_steam_pressure=stream(op.throttle_stream, "pressure"),
        reheat_temperature=stream(reheat, "temperature"),
        condenser_pressure=stream(cond.port("exhaust") if cond else None, "pressure"),
        section_efficiency={s.id: kpi(f"section_efficiency.{s.id}") for s in settings.sections},
        heater_ttd={h: kpi(f"heater_ttd.{h}") for h in heaters},
        heater_dca={h: kpi(f"heater_dca.{h}") for h in heaters},
    )
