"""The plant's reconciliation problem: flowsheet balances, sensors and soft model relations.

Variables (one vector ``z``): the flowsheet's ``[m, p, h]`` per stream and
equipment powers; efficiency level factors of the expansion lines (stage groups
with a Baumann factor; each group's dry efficiency is its design value times its
factor): one of its own for each directly measured group (superheated inlet and
outlet with pressure and temperature sensors: ``<group>_group``) and one shared
by the section's other groups (``<section>_line``); the cooling-water inlet and outlet
temperature of each condenser; one variable per sensor (its true value);
one variable per soft relation (its residual).

Constraints:

- every balance of the flowsheet (mass, energy, equal pressure, saturation) —
  hard;
- per sensor, ``x_k = g_k(z)``: the stream's mass flow or pressure, its
  temperature ``T(p, h)`` (``T_sat(p)`` when wet), an equipment power, or a
  condenser's cooling-water temperature — hard;
- model relations that carry their own uncertainty (VDI 2048 practice; see
  the domain notes): the wet LP expansion line (design shape around the line's
  level factor, Baumann correction), a weak prior on each level factor, the
  exhaust-loss curve, the generator loss curve, pressure-drop fractions and pump
  efficiencies. Each is written ``r_j(z) = e_j`` with a pseudo-measurement
  ``e_j = 0 ± σ_j``, σ_j a 95 % half-width / 1.96. A directly measured group's
  expansion relation is hard (its own factor absorbs any loss there).

The sensor variables and the pseudo-measurements are the measured variables
of the weighted least-squares problem; everything else is unmeasured and
classified observable or not.

References
----------
VDI 2048 Blatt 1 (2017), *Control and quality improvement of process data and
their uncertainties by correction calculation for operation and acceptance tests*.
"""

from __future__ import annotations

import math
from collections import OrderedDict
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.sparse as sp

from twin.model.core import Context, Rows
from twin.model.flow import Pipe, Pump, Reheater, Source
from twin.model.flowsheet import Flowsheet
from twin.model.heat_exchange import ClosedHeater, Condenser
from twin.model.solve import HeatBalance
from twin.model.turbine import ExhaustLoss, Generator, TurbineGroup

K95 = 1.96  # coverage factor of a 95 % interval (normal distribution)


@dataclass(frozen=True)
class SensorBinding:
    """Where one sensor sits in ``z``.

    ``column`` is the sensor's own variable; ``kind`` is how its true value
    follows from the model: ``m``, ``p``, ``T`` (stream) or ``power``,
    ``cw_in``, ``cw_out`` (equipment).
    """

    tag: str
    quantity: str
    kind: str
    target: str  # stream or equipment id
    column: int
    target_column: int  # m/p/power/cw column; for T the stream's p column (h is next)


@dataclass(frozen=True)
class SoftRelation:
    """A model relation used as a pseudo-measurement ``r(z) = e``, ``e = 0 ± sigma``."""

    name: str  # "<equipment>.<relation>"
    sigma: float  # [unit of the residual]
    column: int  # the variable e
    unit: str


#: Soft-relation allowances, each a half-width of the 95 % interval (σ = U95 / 1.96);
#: sized by the coverage Monte Carlo (tests/test_lp_coverage_mc.py) against truths
#: outside the model family. Shape of a wet expansion line: a group's efficiency may
#: depart from the line's common level by this much [points of efficiency, as a ratio].
EXPANSION_SHAPE_U95 = 0.03
#: Level factor of an expansion line (or of a directly measured group) against its
#: design value: a weak prior that keeps the line defined when its instruments are lost
#: (the KPIs it carries are then marked ``model_based``) [-].
LINE_LEVEL_U95 = 0.30
#: Exhaust-loss curve: fraction of the design-point loss [-].
EXHAUST_LOSS_U95 = 0.40


def line_keys(fs: Flowsheet, measured_groups: frozenset[str] = frozenset()) -> dict[str, tuple[str, tuple[str, ...]]]:
    """Level factors of the expansion lines: ``{key: (section, groups)}``.

    A directly measured group (see :func:`directly_measured_groups`) has its own,
    ``<group>_group``; the other wet-rule groups of a section share ``<section>_line``.
    """
    out: dict[str, tuple[str, tuple[str, ...]]] = {}
    for e in fs.of_kind(TurbineGroup):
        if e.params["baumann_factor"] > 0:
            section = str(e.params["section"])
            key = f"{e.id}_group" if e.id in measured_groups else f"{section}_line"
            sec, groups = out.get(key, (section, ()))
            out[key] = (sec, (*groups, e.id))
    return out


def soft_relation_sigmas(fs: Flowsheet, design: HeatBalance,
                         measured_groups: frozenset[str] = frozenset()) -> dict[str, tuple[float, str]]:
    """Default standard uncertainties of the soft model relations, from the design state.

    Returns ``{relation name: (sigma, unit)}``. Every value is a 95 % half-width
    divided by 1.96; they are practice-based allowances (``# common practice``),
    the LP ones sized by a coverage Monte Carlo, not sourced constants:

    - wet expansion line shape: :data:`EXPANSION_SHAPE_U95` points of efficiency (95 %)
      of each group's isentropic drop; a directly measured group's expansion is a hard
      relation with a free level factor instead;
    - line level factors (``<key>.level``): :data:`LINE_LEVEL_U95` around 1 (95 %);
    - exhaust-loss curve: :data:`EXHAUST_LOSS_U95` of the design loss (95 %) + 980 J/kg;
    - generator and mechanical losses: 10 % of the design losses + 20 kW (95 %);
    - pressure drops (pipes, reheater, heater tubes): 50 % of the design drop + 2 kPa (95 %);
    - pump isentropic efficiency: 5 points (95 %); pump discharge rule: 2 % (95 %);
    - supply pressure of a boundary inflow (make-up): 50 % of its design value (95 %).
    """
    ctx = design.context()
    out: dict[str, tuple[float, str]] = {}
    for key in line_keys(fs, measured_groups):
        out[f"{key}.level"] = (LINE_LEVEL_U95 / K95, "-")
    for e in fs.equipment:
        if isinstance(e, TurbineGroup) and e.params["baumann_factor"] > 0:
            if e.id in measured_groups:
                continue
            a, b = e.port("inlet"), e.port("outlet")
            si = ctx.ph(a)
            drop_s = si.h - ctx.water.h_ps(ctx.p(b), si.s)
            out[e.relation("expansion")] = (EXPANSION_SHAPE_U95 * drop_s / K95, "J/kg")
        elif isinstance(e, ExhaustLoss):
            el = ctx.h(e.port("outlet")) - ctx.h(e.port("inlet"))
            out[e.relation("curve")] = ((EXHAUST_LOSS_U95 * abs(el) + 980.0) / K95, "J/kg")
        elif isinstance(e, Generator):
            loss, _ = e.losses(float(design.z[fs.layout.extra(f"{e.id}.power")]))
            out[e.relation("losses")] = ((0.10 * loss + 2e4) / K95, "W")
        elif isinstance(e, Pipe | Reheater):
            drop = ctx.p(e.port("inlet")) - ctx.p(e.port("outlet"))
            out[e.relation("pressure_drop")] = ((0.5 * abs(drop) + 2e3) / K95, "Pa")
        elif isinstance(e, ClosedHeater):
            drop = abs(e.params["tube_pressure_drop"])
            out[e.relation("tube_pressure_drop")] = ((0.5 * drop + 2e3) / K95, "Pa")
        elif isinstance(e, Source):
            # the supply pressure of a boundary inflow is known roughly (its design value)
            p = ctx.p(e.port("outlet"))
            out[f"{e.id}.supply_pressure"] = (0.5 * p / K95, "Pa")
        elif isinstance(e, Pump):
            a, b = e.port("inlet"), e.port("outlet")
            dh = ctx.h(b) - ctx.h(a)
            out[e.relation("efficiency")] = (0.05 / e.params["efficiency"] * dh / K95, "J/kg")
            out[e.relation("discharge")] = (0.02 * ctx.p(b) / K95, "Pa")
    return out


#: Width of the enthalpy band below the dew line over which a thermometer's reading
#: is blended from T_sat into the superheated branch [J/kg].
DEW_BAND = 10000.0
#: Evaluations (residuals, Jacobian, property context) kept by z, most recently used last.
EVALUATIONS_KEPT = 4


def sensor_temperature(ctx: Any, stream: str) -> tuple[float, float, float]:
    """Temperature a thermometer in the stream reads [K], with d/dp [K/Pa] and d/dh [K/(J/kg)].

    T(p, h) has a kink at the dew line (slope 0 in the wet region, 1/c_p when
    superheated); a least-squares solve that must place a near-saturated
    extraction on one side or the other then stalls. In the last DEW_BAND of the
    wet region below h_g the reading is a C¹ cubic Hermite blend from T_sat
    (slope 0) to the dew point (value T_sat, slope 1/c_p of the saturated vapour);
    it departs from T_sat by at most 4/27 · DEW_BAND / c_p ≈ 0.15 K, in wet steam only.
    The bubble line has the same kink (saturated drains, hotwell, deaerator outlet sit on
    it): the first DEW_BAND above h_f blends from the liquid slope to T_sat (departure
    at most 4/27 · DEW_BAND / c_p,liquid ≈ 0.07 K). Superheated and liquid states read
    T(p, h) exactly.
    """
    st = ctx.ph(stream)
    if not st.two_phase or math.isnan(st.x):  # single phase or supercritical: exact (x not read: lazy)
        return st.T, st.dT_dp, st.dT_dh
    p, h = ctx.p(stream), ctx.h(stream)
    sat = ctx.sat(p)
    if st.x < 0.5:  # just above the bubble line (saturated drains, hotwell, deaerator outlet)
        ul = h - sat.h_f
        if ul >= DEW_BAND:
            return sat.T, sat.dT_dp, 0.0
        liq = ctx.water.ph(p, sat.h_f - 0.01 * DEW_BAND)  # just subcooled (IF97 region 1): liquid slope 1/c_p
        t = ul / DEW_BAND
        h10, d10 = t**3 - 2 * t**2 + t, 3 * t**2 - 4 * t + 1
        dT_dh = d10 * liq.dT_dh
        return (sat.T + h10 * DEW_BAND * liq.dT_dh, sat.dT_dp - dT_dh * sat.dh_f_dp, dT_dh)
    u = h - sat.h_g
    if u <= -DEW_BAND:
        return sat.T, sat.dT_dp, 0.0
    dew = ctx.water.ph(p, sat.h_g + 0.01 * DEW_BAND)  # just superheated (IF97 region 2): vapour slope 1/c_p
    slope = dew.dT_dh
    w = DEW_BAND
    t = (u + DEW_BAND) / w
    h11, d11 = t**3 - t**2, 3 * t**2 - 2 * t
    T = sat.T + h11 * w * slope
    dT_dh = d11 * slope
    dT_dp = sat.dT_dp - dT_dh * sat.dh_g_dp
    return T, dT_dp, dT_dh


def _same_state(fs: Flowsheet, stream: str) -> set[str]:
    """Streams at the same pressure and enthalpy as ``stream`` (joined by splitters)."""
    group, todo = {stream}, [stream]
    splitters = [e for e in fs.equipment if e.kind == "splitter"]
    while todo:
        s = todo.pop()
        for e in splitters:
            ends = [e.port("inlet"), *e.port_list("outlets")]
            if s in ends:
                for t in ends:
                    if t not in group:
                        group.add(t)
                        todo.append(t)
    return group


def directly_measured_groups(fs: Flowsheet, sensors: Sequence[Any], design: HeatBalance) -> frozenset[str]:
    """Wet-rule turbine groups whose efficiency the instruments give directly.

    A group qualifies when its inlet and outlet are superheated at the design point
    and each carries a pressure and a temperature sensor (on the stream itself or on
    a branch of it at the same state): then ``T(p, h)`` fixes both enthalpies and the
    group's efficiency is measured, so it gets a level factor of its own instead of
    sharing the wet line's (a loss elsewhere on the line is then not spread over it).
    """
    ctx = design.context()
    out = set()
    for e in fs.of_kind(TurbineGroup):
        if e.params["baumann_factor"] <= 0:
            continue
        ok = True
        for port in ("inlet", "outlet"):
            st = ctx.ph(e.port(port))
            states = _same_state(fs, e.port(port))
            have = {s.quantity for s in sensors if getattr(s, "stream", None) in states}
            superheated = not st.two_phase and st.x > 1.0  # equivalent quality above 1
            ok &= superheated and {"pressure", "temperature"} <= have
        if ok:
            out.add(e.id)
    return frozenset(out)


class PlantSystem:
    """Constraints of the plant's reconciliation (a :class:`twin.reconcile.ConstraintSystem`).

    Parameters
    ----------
    fs : Flowsheet
    sensors : sequence
        Sensor configurations (``tag``, ``quantity``, ``stream`` or ``equipment``);
        sensors of quantities the model does not hold (barometric pressure) are ignored.
    design : HeatBalance
        The design point: starting state and the scale of the soft relations' σ.
    soft : dict, optional
        ``{relation: (sigma, unit)}``; default :func:`soft_relation_sigmas`.
    """

    def __init__(self, fs: Flowsheet, sensors: Sequence[Any], design: HeatBalance,
                 soft: dict[str, tuple[float, str]] | None = None) -> None:
        self.fs = fs
        self.design = design
        lay = fs.layout
        n = lay.n_vars
        # efficiency level factors, η_i = factor · η_i,design: one per directly measured
        # group of an expansion line (``<group>_group``) and one shared by the section's
        # other (wet) groups (``<section>_line``)
        self.constants: dict[str, dict] = {k: dict(v) for k, v in design.constants.items()}
        self.measured_groups = directly_measured_groups(fs, sensors, design)
        #: ``{key: (section, groups)}`` of every level factor (``<section>_line``, ``<group>_group``)
        self.line_groups = line_keys(fs, self.measured_groups)
        self.line_columns: dict[str, int] = {}
        for key, (_, groups) in self.line_groups.items():
            self.line_columns[key] = n
            n += 1
            for g in groups:
                self.constants.setdefault(g, {})["efficiency_factor_column"] = self.line_columns[key]
        # a directly measured group's expansion relation is hard (its factor is free)
        self.hard_relations = frozenset(f"{g}.expansion" for g in self.measured_groups)
        self.cooling_water_columns: dict[str, tuple[int, int]] = {}
        for e in fs.of_kind(Condenser):
            self.cooling_water_columns[e.id] = (n, n + 1)
            n += 2
        self.sensors: list[SensorBinding] = []
        for s in sensors:
            b = self._bind(s, n)
            if b is not None:
                self.sensors.append(b)
                n += 1
        self.sensor_by_tag = {b.tag: b for b in self.sensors}
        sig = soft if soft is not None else soft_relation_sigmas(fs, design, self.measured_groups)
        self.soft: list[SoftRelation] = []
        for name, (sigma, unit) in sig.items():
            self.soft.append(SoftRelation(name, sigma, n, unit))
            n += 1
        self.soft_by_name = {r.name: r for r in self.soft}
        self._supply = [(e, self.soft_by_name[f"{e.id}.supply_pressure"]) for e in fs.of_kind(Source)
                        if f"{e.id}.supply_pressure" in self.soft_by_name]
        self._levels = [(col, self.soft_by_name[f"{key}.level"]) for key, col in self.line_columns.items()
                        if f"{key}.level" in self.soft_by_name]
        self.n_vars = n
        self.n_model = lay.n_vars
        self._skip = self._non_soft_relations()
        # the fixed parts of the sensor rows (see _rows): name, own column, and a thermometer's
        # stream and its p, h columns, or another sensor's target column and row scale
        self._sensor_rows = [
            (f"sensor.{b.tag}", b.column, b.target, lay.p(b.target), lay.h(b.target), 10.0) if b.kind == "T"
            else (f"sensor.{b.tag}", b.column, None, b.target_column, -1,
                  max(abs(float(design.z[b.target_column])) if b.target_column < self.n_model else 300.0, 1.0))
            for b in self.sensors]
        # the last few evaluations by z (a window's solve starts where the last one ended, and
        # an elimination re-solve where the window's first solve started): exact reuse
        self._evals: OrderedDict[bytes, tuple[np.ndarray, sp.csr_matrix, Context]] = OrderedDict()
        self._scales = self._make_scales()

    # ------------------------------------------------------------ structure
    def _bind(self, s: Any, col: int) -> SensorBinding | None:
        lay = self.fs.layout
        q = s.quantity
        if q in ("mass_flow", "pressure", "temperature") and s.stream:
            kind = {"mass_flow": "m", "pressure": "p", "temperature": "T"}[q]
            target_col = lay.m(s.stream) if kind == "m" else lay.p(s.stream)
            return SensorBinding(s.tag, q, kind, s.stream, col, target_col)
        if q == "power" and s.equipment:
            return SensorBinding(s.tag, q, "power", s.equipment, col, lay.extra(f"{s.equipment}.power"))
        if q in ("cooling_water_inlet_temperature", "cooling_water_outlet_temperature") and s.equipment:
            cin, cout = self.cooling_water_columns[s.equipment]
            kind = "cw_in" if q.endswith("inlet_temperature") else "cw_out"
            return SensorBinding(s.tag, q, kind, s.equipment, col, cin if kind == "cw_in" else cout)
        return None

    def _non_soft_relations(self) -> frozenset[str]:
        """Performance relations left out of the reconciliation (what it monitors)."""
        rows = self.fs.evaluate(self.design.z, constants=self.design.constants)
        return frozenset(
            name for name, kind in zip(rows.names, rows.sets, strict=True)
            if kind == "performance" and name not in self.soft_by_name and name not in self.hard_relations
        )

    def _make_scales(self) -> tuple[np.ndarray, np.ndarray]:
        z0 = self.initial_point(self.design.z)
        vs = np.maximum(np.abs(z0), 1.0)
        vs[self.n_model:] = np.maximum(np.abs(z0[self.n_model:]), 1.0)
        for r in self.soft:
            vs[r.column] = r.sigma
        rows = self._rows(z0)
        return vs, np.asarray(rows[1])

    def scales(self) -> tuple[np.ndarray, np.ndarray]:
        return self._scales

    def initial_point(self, z_model: np.ndarray) -> np.ndarray:
        """A full ``z`` from a flowsheet state: sensors at their model values, soft residuals at 0."""
        z = np.zeros(self.n_vars)
        z[: self.n_model] = z_model
        for col in self.line_columns.values():
            z[col] = 1.0
        ctx = self.fs.context(z_model, self.design.constants)
        for e in self.fs.of_kind(Condenser):
            assert isinstance(e, Condenser)
            cin, cout = self.cooling_water_columns[e.id]
            k = self.design.constants.get(e.id, {})
            t_in = e.params["cooling_water_inlet_temperature"]
            z[cin] = t_in
            z[cout] = t_in + e.duty(ctx) / (k["cw_flow"] * e.params["cooling_water_cp"]) if "cw_flow" in k else t_in + e.params["cooling_water_rise"]
        for b in self.sensors:
            z[b.column] = self._model_value(b, z, ctx)
        rows = self.fs.evaluate(z, skip=self._skip_or_empty(), constants=self.constants)
        for name, value in zip(rows.names, rows.values, strict=True):
            r = self.soft_by_name.get(name)
            if r is not None:
                z[r.column] = value
        return z

    def _skip_or_empty(self) -> frozenset[str]:
        return getattr(self, "_skip", frozenset())

    def _model_value(self, b: SensorBinding, z: np.ndarray, ctx: Any) -> float:
        if b.kind == "T":
            return sensor_temperature(ctx, b.target)[0]
        return float(z[b.target_column])

    # ------------------------------------------------------------ equations
    def context(self, z: np.ndarray) -> Context:
        """An evaluation context at ``z`` (model part) that reuses the last evaluation's property states.

        States of streams whose pressure and enthalpy equal those of the last evaluated
        vector are taken over (see :meth:`twin.model.core.Context.derive`), so outputs at the
        solution cost no property calls for what the solve already computed.
        """
        z = np.asarray(z, dtype=float)
        if self._evals:  # the most recently used evaluation
            return next(reversed(self._evals.values()))[2].derive(z)
        return self.fs.context(z, self.constants)

    def _rows(self, z: np.ndarray, ctx: Context | None = None) -> tuple[Rows, list[float]]:
        fs = self.fs
        # one context: the sensors' temperatures reuse the flowsheet's property states
        if ctx is None:
            ctx = fs.context(z, self.constants)
        rows = fs.evaluate(z, skip=self._skip, constants=self.constants, context=ctx)
        scales = list(rows.scales)
        zl = np.asarray(z, dtype=float).tolist()  # Python floats: the same numbers, cheaper to read one by one
        # soft relations: r_j(z) − e_j = 0
        for i, name in enumerate(rows.names):
            r = self.soft_by_name.get(name)
            if r is not None:
                rows.values[i] -= zl[r.column]
                rows.add_entry(i, r.column, -1.0)
        lay = fs.layout
        for col, r in self._levels:
            rows.add(r.name, "performance", zl[col] - 1.0 - zl[r.column], {col: 1.0, r.column: -1.0}, 1.0)
            scales.append(1.0)
        for e, r in self._supply:
            out = e.port("outlet")
            col = lay.p(out)
            rows.add(r.name, "performance", zl[col] - float(self.design.z[col]) - zl[r.column],
                     {col: 1.0, r.column: -1.0}, 1e5)
            scales.append(1e5)
        add = rows.add
        for name, col, stream, c1, c2, scale in self._sensor_rows:
            if stream is not None:  # a thermometer: c1, c2 are its stream's p and h columns
                T, dT_dp, dT_dh = sensor_temperature(ctx, stream)
                add(name, "sensor", zl[col] - T, {col: 1.0, c1: -dT_dp, c2: -dT_dh}, scale)
            else:  # c1 is the target column
                add(name, "sensor", zl[col] - zl[c1], {col: 1.0, c1: -1.0}, scale)
            scales.append(scale)
        return rows, scales

    def _evaluate(self, z: np.ndarray) -> tuple[np.ndarray, sp.csr_matrix]:
        key = z.tobytes()
        hit = self._evals.get(key)
        if hit is None:
            ctx = self.fs.context(z.copy(), self.constants)  # kept: must not see later changes to z
            rows, _ = self._rows(z, ctx)
            hit = self._evals[key] = (rows.residuals(), rows.jacobian(self.n_vars), ctx)
            if len(self._evals) > EVALUATIONS_KEPT:
                self._evals.popitem(last=False)
        else:
            self._evals.move_to_end(key)
        return hit[0], hit[1]

    def residuals(self, z: np.ndarray) -> np.ndarray:
        return self._evaluate(np.asarray(z, dtype=float))[0]

    def jacobian(self, z: np.ndarray) -> sp.csr_matrix:
        return self._evaluate(np.asarray(z, dtype=float))[1]

    def row_names(self) -> list[str]:
        return self._rows(self.initial_point(self.design.z))[0].names

    # ------------------------------------------------------------ naming
    def name_of(self, col: int) -> str:
        if col < self.n_model:
            return self.fs.layout.name_of(col)
        for key, c in self.line_columns.items():
            if c == col:
                return f"{key}.efficiency_factor"
        for cid, (cin, cout) in self.cooling_water_columns.items():
            if col in (cin, cout):
                return f"{cid}.cooling_water_{'inlet' if col == cin else 'outlet'}_temperature"
        for b in self.sensors:
            if b.column == col:
                return f"sensor.{b.tag}"
        for r in self.soft:
            if r.column == col:
                return f"model.{r.name}"
        raise IndexError(col)
