"""Cycle key performance indicators from a flowsheet state.

All functions take a model ``Context`` (a state ``z`` of the flowsheet) so
the same code serves the forward heat balance, the reconciled state and,
through each definition's analytic gradient (:mod:`twin.performance.kpi_gradient`),
the uncertainty of each KPI.

References
----------
ASME PTC 6-2004, *Steam Turbines* (turbine-cycle heat rate conventions).
ASME PTC 12.1-2015, *Closed Feedwater Heaters* (TTD, DCA).
HEI *Standards for Steam Surface Condensers* (ITD, LMTD, cleanliness factor) [memory].
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from twin.model.core import Context
from twin.model.flow import Boiler, Pump, Reheater
from twin.model.flowsheet import Flowsheet
from twin.model.heat_exchange import ClosedHeater, Condenser, OpenHeater
from twin.model.turbine import ExhaustLoss, Generator
from twin.performance import kpi_gradient as kg

KJ_PER_KWH = 3600.0  # kJ/kWh per unit of dimensionless heat rate
BTU_PER_KWH = 3412.1416  # Btu_IT/kWh per unit of dimensionless heat rate (1 Btu_IT = 1055.05585262 J)


@dataclass(frozen=True)
class Section:
    """A turbine section from ``inlet`` to ``outlet`` stream."""

    id: str
    inlet: str
    outlet: str


@dataclass(frozen=True)
class CyclePerformanceSettings:
    """What the KPIs need beyond the flowsheet (from the ``[performance]`` section)."""

    load_stream: str
    design_flow: float  # [kg/s]
    auxiliary_fixed: float  # [W]
    auxiliary_variable: float  # [W] at design flow
    boiler_efficiency: tuple[tuple[float, float], ...]  # (load fraction, efficiency)
    sections: tuple[Section, ...]
    feed_pumps: tuple[str, ...] = ()  # motor-driven feed pumps, deducted in the ASME PTC 6 net heat rate
    fuel_basis: str = "HHV"  # of the boiler efficiency and the plant heat rates

    @classmethod
    def from_config(cls, config: Any) -> CyclePerformanceSettings:
        perf = config.performance
        return cls(
            load_stream=perf.load_stream,
            design_flow=float(next(s for s in config.streams if s.id == perf.load_stream).design["mass_flow"]),
            auxiliary_fixed=float(perf.auxiliary_fixed),
            auxiliary_variable=float(perf.auxiliary_variable),
            boiler_efficiency=tuple((float(a), float(b)) for a, b in perf.boiler_efficiency),
            sections=tuple(Section(s.id, s.inlet, s.outlet) for s in config.sections),
            feed_pumps=tuple(feed_pump_ids(config)),
            fuel_basis=str(perf.fuel_basis),
        )


def feed_pump_ids(config: Any) -> list[str]:
    """Motor-driven feed pumps: ``[performance] motor_driven_feed_pumps``, else pumps with a discharge rule.

    A pump whose discharge follows the throttle pressure (``discharge_reference``) is
    the boiler feed pump; an empty list in the plant file means turbine-driven (nothing deducted).
    """
    listed = getattr(config.performance, "motor_driven_feed_pumps", None)
    if listed is not None:
        return list(listed)
    return [e.id for e in config.equipment if e.kind == "pump" and e.params.get("discharge_reference")]


def section_efficiency(ctx: Context, inlet: str, outlet: str) -> float:
    """Enthalpy-drop efficiency (h_in − h_out)/(h_in − h_s(p_out, s_in)) [-].

    Meaningful where the outlet is superheated (HP, IP); for a wet outlet it
    is the efficiency to the given end point (ELEP or UEEP).
    """
    si = ctx.ph(inlet)
    hs = ctx.water.h_ps(ctx.p(outlet), si.s)
    return (si.h - ctx.h(outlet)) / (si.h - hs)


def quality(ctx: Context, stream: str) -> float:
    """Vapour quality x at the stream's (p, h) [-], clipped to [0, 1] (1 = dry or superheated)."""
    x = ctx.ph(stream).x
    return float(min(max(x, 0.0), 1.0)) if x == x else float("nan")


def heater_kpis(ctx: Context, e: ClosedHeater) -> dict[str, float]:
    """TTD, DCA, feedwater temperature rise [K] and extraction flow [kg/s] of a closed heater."""
    w = ctx.water
    t_in = ctx.ph(e.port("tube_in")).T
    t_out = ctx.ph(e.port("tube_out")).T
    t_sat = w.T_sat(ctx.p(e.port("steam_in")))
    t_drain = ctx.ph(e.port("drain_out")).T
    return {
        "ttd": t_sat - t_out,
        "dca": t_drain - t_in,
        "temperature_rise": t_out - t_in,
        "extraction_flow": ctx.m(e.port("steam_in")),
    }


def condenser_kpis(
    ctx: Context, e: Condenser, cw_in: float, cw_out: float, u_clean: float | None = None
) -> dict[str, float]:
    """Condenser ITD, TTD, LMTD [K], duty [W], UA [W/K], U [W/(m2 K)] and cleanliness [-].

    Parameters
    ----------
    cw_in, cw_out : float
        Cooling-water inlet and outlet temperatures [K].
    u_clean : float, optional
        Clean heat-transfer coefficient [W/(m2 K)]; cleanliness is NaN without it.
    """
    p = ctx.p(e.port("exhaust"))
    t_s = ctx.water.T_sat(p)
    itd, ttd = t_s - cw_in, t_s - cw_out
    if itd > 0 and ttd > 0 and abs(itd - ttd) > 1e-9:
        lmtd = (cw_out - cw_in) / math.log(itd / ttd)
    else:
        lmtd = float("nan")
    duty = e.duty(ctx)
    ua = duty / lmtd if lmtd == lmtd else float("nan")
    u = ua / e.params["area"]
    return {
        "pressure": p,
        "saturation_temperature": t_s,
        "itd": itd,
        "ttd": ttd,
        "lmtd": lmtd,
        "duty": duty,
        "ua": ua,
        "u": u,
        "cleanliness": u / u_clean if u_clean else float("nan"),
    }


def interpolate_boiler_efficiency(table: Sequence[tuple[float, float]], load: float) -> float:
    """Boiler efficiency at a load fraction, linear in the table and held flat outside it [-].

    ``table`` holds (load [-], efficiency [-]) pairs; ``load`` is main-steam flow / design flow [-].
    """
    if not table:
        return float("nan")
    xs, ys = zip(*sorted(table), strict=True)
    return float(np.interp(load, xs, ys))


def cycle_kpis(fs: Flowsheet, ctx: Context, settings: CyclePerformanceSettings) -> dict[str, Any]:
    """All cycle KPIs at one forward-model state, for the heat-balance report.

    The values are the flat :func:`kpi_definitions` (the same functions the
    reconciliation and the metrics use), arranged by equipment, plus a few
    report-only figures (shaft and auxiliary power, exhaust loss, condenser duty, LMTD, UA).

    Parameters
    ----------
    fs : Flowsheet
    ctx : Context
        The state (``fs.context(z, constants)``); constants give the condensers'
        design cooling-water flow and clean U when present.
    settings : CyclePerformanceSettings

    Returns
    -------
    dict
        Flat numbers [SI] and nested dicts ``section_efficiency``, ``heaters``,
        ``condensers``, ``extraction_flow``.
    """
    flat = evaluate_kpis(kpi_definitions(fs, settings), ctx)
    out: dict[str, Any] = {k: v for k, v in flat.items() if "." not in k}
    gens = [e for e in fs.equipment if isinstance(e, Generator)]
    out["shaft_power"] = sum(float(ctx.z[ctx.layout.extra(f"{g.id}.shaft_power")]) for g in gens)
    out["auxiliary_power"] = out["gross_power"] - out["net_power"]
    out["feed_pump_power"] = sum(float(ctx.z[ctx.layout.extra(f"{p}.power")]) for p in settings.feed_pumps)
    out["boiler_efficiency"] = interpolate_boiler_efficiency(settings.boiler_efficiency, out["load_fraction"])
    for name in ("turbine_heat_rate", "turbine_net_heat_rate", "plant_heat_rate", "net_plant_heat_rate"):
        out[f"{name}_kj_per_kwh"] = KJ_PER_KWH * out[name]
        out[f"{name}_btu_per_kwh"] = BTU_PER_KWH * out[name]

    def keyed(prefix: str) -> dict[str, float]:
        return {k.removeprefix(prefix): v for k, v in flat.items() if k.startswith(prefix)}

    out["section_efficiency"] = keyed("section_efficiency.")
    for s in settings.sections:
        loss = next((e for e in fs.of_kind(ExhaustLoss) if e.port("inlet") == s.outlet), None)
        if loss is not None:
            out["exhaust_loss"] = ctx.h(loss.port("outlet")) - ctx.h(s.outlet)
    heaters: dict[str, dict[str, float]] = {}
    for e in fs.of_kind(ClosedHeater):
        heaters[e.id] = {k: flat[f"heater_{k}.{e.id}"] for k in ("ttd", "dca", "temperature_rise")}
        heaters[e.id]["extraction_flow"] = flat[f"extraction_flow.{e.id}"]
    out["heaters"] = heaters
    out["extraction_flow"] = keyed("extraction_flow.")
    condensers = {}
    for e in fs.of_kind(Condenser):
        assert isinstance(e, Condenser)
        k = ctx.constants.get(e.id, {})
        cw_in = k.get("cw_inlet", e.params["cooling_water_inlet_temperature"])
        if "cw_flow" in k:
            cw_out = cw_in + e.duty(ctx) / (k["cw_flow"] * e.params["cooling_water_cp"])
        else:
            cw_out = cw_in + e.params["cooling_water_rise"]
        c = condenser_kpis(ctx, e, cw_in, cw_out, k.get("u_clean"))
        for key in ("pressure", "itd", "ttd", "cleanliness"):
            c[key] = flat[f"condenser_{key}.{e.id}"]
        condensers[e.id] = c
    out["condensers"] = condensers
    return out


# --------------------------------------------------------------------------- flat KPI definitions
@dataclass(frozen=True)
class KpiDef:
    """One KPI as a function of the state, with the columns of ``z`` it depends on.

    The dependency list lets the reconciliation propagate the full covariance
    to the KPI through a gradient over those columns only, and decide that the
    KPI is unavailable when one of them is unobservable. ``grad`` is the KPI's
    analytic gradient ``{column: dKPI/dz}`` at a state (:mod:`twin.performance.kpi_gradient`).
    """

    name: str
    func: Callable[[Context], float]
    columns: tuple[int, ...]
    unit: str  # "W", "ratio", "K", "Pa", "kg/s" (for display only)
    grad: Callable[[Context], dict[int, float]] | None = None


def _stream_cols(fs: Flowsheet, streams: Sequence[str], qs: str = "mph") -> tuple[int, ...]:
    lay = fs.layout
    return tuple(getattr(lay, q)(s) for s in streams for q in qs)


def kpi_definitions(
    fs: Flowsheet,
    settings: CyclePerformanceSettings,
    cooling_water_columns: dict[str, tuple[int, int]] | None = None,
) -> list[KpiDef]:
    """The flat KPIs named in :class:`twin.result.CycleResult`, as functions of the state.

    Parameters
    ----------
    fs : Flowsheet
    settings : CyclePerformanceSettings
    cooling_water_columns : dict, optional
        For each condenser id, the columns of ``z`` holding the cooling-water inlet and
        outlet temperatures [K] (reconciliation variables). Without them the
        condenser KPIs use the forward model's cooling water (design flow and the
        configured inlet temperature, from ``ctx.constants``).
    """
    lay = fs.layout
    gens = [e for e in fs.equipment if isinstance(e, Generator)]
    pumps = [e for e in fs.equipment if isinstance(e, Pump)]
    heat = [e for e in fs.equipment if isinstance(e, Boiler | Reheater)]
    gen_cols = tuple(lay.extra(f"{g.id}.power") for g in gens)
    pump_cols = tuple(lay.extra(f"{p.id}.power") for p in pumps)
    heat_streams = [s for e in heat for s in e.ports.values() if isinstance(s, str)]
    q_cols = _stream_cols(fs, heat_streams, "mh")
    load_col = (lay.m(settings.load_stream),)

    def p_gen(ctx: Context) -> float:
        return sum(float(ctx.z[c]) for c in gen_cols)

    def q_in(ctx: Context) -> float:
        return sum(e.duty(ctx) for e in heat)

    def load(ctx: Context) -> float:
        return ctx.m(settings.load_stream) / settings.design_flow

    def net(ctx: Context) -> float:
        aux = settings.auxiliary_fixed + settings.auxiliary_variable * load(ctx)
        return p_gen(ctx) - aux - sum(float(ctx.z[c]) for c in pump_cols)

    fp_cols = tuple(lay.extra(f"{p.id}.power") for p in pumps if p.id in settings.feed_pumps)

    def net_turbine(ctx: Context) -> float:  # ASME PTC 6: motor-driven feed-pump power deducted
        return p_gen(ctx) - sum(float(ctx.z[c]) for c in fp_cols)

    def boiler_eff(ctx: Context) -> float:
        return interpolate_boiler_efficiency(settings.boiler_efficiency, load(ctx))

    # gradients (kpi_gradient): the same terms, chain rule through the stream states
    def g_gen(ctx: Context) -> kg.Grad:
        return dict.fromkeys(gen_cols, 1.0)

    def g_q(ctx: Context) -> kg.Grad:
        return kg.combine(*((1.0, kg.duty(ctx, e)) for e in heat))

    def g_load(ctx: Context) -> kg.Grad:
        return {load_col[0]: 1.0 / settings.design_flow}

    def g_net(ctx: Context) -> kg.Grad:
        return kg.combine((1.0, g_gen(ctx)), (-settings.auxiliary_variable, g_load(ctx)),
                          (-1.0, dict.fromkeys(pump_cols, 1.0)))

    def g_net_turbine(ctx: Context) -> kg.Grad:
        return kg.combine((1.0, g_gen(ctx)), (-1.0, dict.fromkeys(fp_cols, 1.0)))

    def g_boiler_eff(ctx: Context) -> kg.Grad:
        return kg.combine((kg.interpolation_slope(settings.boiler_efficiency, load(ctx)), g_load(ctx)))

    def g_over(num: Callable[[Context], float], g_num: Callable[[Context], kg.Grad],
               den: Callable[[Context], float], g_den: Callable[[Context], kg.Grad],
               eta: bool = False) -> Callable[[Context], kg.Grad]:
        """Gradient of num / den (× 1 / boiler efficiency when ``eta``)."""
        def g(c: Context) -> kg.Grad:
            d, gd = den(c), g_den(c)
            if eta:  # den · η_b
                b = boiler_eff(c)
                gd, d = kg.combine((b, gd), (d, g_boiler_eff(c))), d * b
            return kg.ratio(num(c), g_num(c), d, gd)
        return g

    net_cols = gen_cols + pump_cols + load_col
    defs = [
        KpiDef("load_fraction", load, load_col, "ratio", g_load),
        KpiDef("gross_power", p_gen, gen_cols, "W", g_gen),
        KpiDef("net_power", net, net_cols, "W", g_net),
        KpiDef("heat_input", q_in, q_cols, "W", g_q),
        KpiDef("gross_efficiency", lambda c: p_gen(c) / q_in(c), gen_cols + q_cols, "ratio",
               g_over(p_gen, g_gen, q_in, g_q)),
        KpiDef("net_efficiency", lambda c: net(c) / q_in(c), net_cols + q_cols, "ratio", g_over(net, g_net, q_in, g_q)),
        # turbine-cycle gross heat rate: cycle heat input / generator output
        KpiDef("turbine_heat_rate", lambda c: q_in(c) / p_gen(c), gen_cols + q_cols, "ratio",
               g_over(q_in, g_q, p_gen, g_gen)),
        # turbine-cycle net heat rate (ASME PTC 6): motor-driven feed-pump power deducted
        KpiDef("turbine_net_heat_rate", lambda c: q_in(c) / net_turbine(c), gen_cols + fp_cols + q_cols, "ratio",
               g_over(q_in, g_q, net_turbine, g_net_turbine)),
        # plant heat rate (fuel basis): turbine heat rate / boiler efficiency
        KpiDef("plant_heat_rate", lambda c: q_in(c) / (p_gen(c) * boiler_eff(c)), gen_cols + q_cols + load_col,
               "ratio", g_over(q_in, g_q, p_gen, g_gen, eta=True)),
        # net plant heat rate (fuel basis): (heat input / boiler efficiency) / (gross − auxiliaries)
        KpiDef("net_plant_heat_rate", lambda c: q_in(c) / (net(c) * boiler_eff(c)), net_cols + q_cols, "ratio",
               g_over(q_in, g_q, net, g_net, eta=True)),
    ]

    def section(inlet: str, outlet: str) -> Callable[[Context], float]:
        return lambda c: section_efficiency(c, inlet, outlet)

    def g_section(inlet: str, outlet: str) -> Callable[[Context], kg.Grad]:
        return lambda c: kg.section_efficiency(c, inlet, outlet)

    def qual(stream: str) -> Callable[[Context], float]:
        return lambda c: quality(c, stream)

    def g_qual(stream: str, sign: float) -> Callable[[Context], kg.Grad]:
        return lambda c: kg.combine((sign, kg.quality(c, stream)))

    def moist(stream: str) -> Callable[[Context], float]:
        return lambda c: 1.0 - quality(c, stream)

    for s in settings.sections:
        cols = _stream_cols(fs, [s.inlet, s.outlet], "ph")
        defs.append(KpiDef(f"section_efficiency.{s.id}", section(s.inlet, s.outlet), cols, "ratio",
                           g_section(s.inlet, s.outlet)))
        loss = next((e for e in fs.of_kind(ExhaustLoss) if e.port("inlet") == s.outlet), None)
        if loss is not None:
            ueep = loss.port("outlet")
            defs.append(KpiDef(f"section_efficiency.{s.id}_UEEP", section(s.inlet, ueep),
                               _stream_cols(fs, [s.inlet, ueep], "ph"), "ratio", g_section(s.inlet, ueep)))
            for point, stream in (("elep", s.outlet), ("ueep", ueep)):
                c2 = _stream_cols(fs, [stream], "ph")
                defs.append(KpiDef(f"exhaust_quality_{point}", qual(stream), c2, "ratio", g_qual(stream, 1.0)))
                defs.append(KpiDef(f"exhaust_moisture_{point}", moist(stream), c2, "ratio", g_qual(stream, -1.0)))

    for e in fs.of_kind(ClosedHeater):
        assert isinstance(e, ClosedHeater)
        ti, to, st, do = e.port("tube_in"), e.port("tube_out"), e.port("steam_in"), e.port("drain_out")
        defs += [
            KpiDef(f"heater_ttd.{e.id}", _ttd(st, to), _stream_cols(fs, [st], "p") + _stream_cols(fs, [to], "ph"), "K",
                   _g_ttd(st, to)),
            KpiDef(f"heater_dca.{e.id}", _rise(ti, do), _stream_cols(fs, [do, ti], "ph"), "K", _g_rise(ti, do)),
            KpiDef(f"heater_temperature_rise.{e.id}", _rise(ti, to), _stream_cols(fs, [to, ti], "ph"), "K",
                   _g_rise(ti, to)),
            KpiDef(f"extraction_flow.{e.id}", _flow(st), _stream_cols(fs, [st], "m"), "kg/s", _g_column(fs, st, "m")),
        ]
    for e in fs.of_kind(OpenHeater):
        st = e.port("steam_in")
        defs.append(KpiDef(f"extraction_flow.{e.id}", _flow(st), _stream_cols(fs, [st], "m"), "kg/s",
                           _g_column(fs, st, "m")))

    for e in fs.of_kind(Condenser):
        assert isinstance(e, Condenser)
        ex = e.port("exhaust")
        ins = [ex, *e.port_list("inlets"), e.port("outlet")]
        duty_cols = _stream_cols(fs, ins, "mh") + _stream_cols(fs, [ex], "p")
        cw = (cooling_water_columns or {}).get(e.id)

        def cw_temps(c: Context, e: Condenser = e, cw: tuple[int, int] | None = cw) -> tuple[float, float]:
            if cw is not None:
                return float(c.z[cw[0]]), float(c.z[cw[1]])
            k = c.constants.get(e.id, {})
            t_in = k.get("cw_inlet", e.params["cooling_water_inlet_temperature"])
            if "cw_flow" in k:
                return t_in, t_in + e.duty(c) / (k["cw_flow"] * e.params["cooling_water_cp"])
            return t_in, t_in + e.params["cooling_water_rise"]

        def cond(key: str, e: Condenser = e, cw_temps: Callable = cw_temps) -> Callable[[Context], float]:
            def f(c: Context) -> float:
                t_in, t_out = cw_temps(c)
                return condenser_kpis(c, e, t_in, t_out, c.constants.get(e.id, {}).get("u_clean"))[key]
            return f

        def g_cw(c: Context, e: Condenser = e, cw: tuple[int, int] | None = cw) -> tuple[kg.Grad, kg.Grad]:
            """Gradients of the cooling-water inlet and outlet temperatures (as ``cw_temps``)."""
            if cw is not None:
                return {cw[0]: 1.0}, {cw[1]: 1.0}
            k = c.constants.get(e.id, {})
            if "cw_flow" in k:
                return {}, kg.combine((1.0 / (k["cw_flow"] * e.params["cooling_water_cp"]), kg.duty(c, e)))
            return {}, {}

        def g_cond(key: str, e: Condenser = e, g_cw: Callable = g_cw,
                   cw_temps: Callable = cw_temps) -> Callable[[Context], kg.Grad]:
            def g(c: Context) -> kg.Grad:
                g_in, g_out = g_cw(c)
                g_ts = kg.saturation_temperature(c, e.port("exhaust"))
                if key == "itd":
                    return kg.combine((1.0, g_ts), (-1.0, g_in))
                if key == "ttd":
                    return kg.combine((1.0, g_ts), (-1.0, g_out))
                # cleanliness = duty / (LMTD · area · U_clean)
                t_s = c.water.T_sat(c.p(e.port("exhaust")))
                t_in, t_out = cw_temps(c)
                da, db = kg.lmtd_partials(t_s - t_in, t_s - t_out)
                g_lmtd = kg.combine((da, g_ts), (-da, g_in), (db, g_ts), (-db, g_out))
                lmtd = (t_out - t_in) / math.log((t_s - t_in) / (t_s - t_out))
                scale = 1.0 / (e.params["area"] * c.constants.get(e.id, {}).get("u_clean", math.nan))
                return kg.combine((scale, kg.ratio(e.duty(c), kg.duty(c, e), lmtd, g_lmtd)))
            return g

        cw_cols = tuple(cw) if cw is not None else ()
        defs += [
            KpiDef(f"condenser_pressure.{e.id}", _pressure(ex), _stream_cols(fs, [ex], "p"), "Pa",
                   _g_column(fs, ex, "p")),
            KpiDef(f"condenser_itd.{e.id}", cond("itd"), _stream_cols(fs, [ex], "p") + cw_cols[:1], "K",
                   g_cond("itd")),
            KpiDef(f"condenser_ttd.{e.id}", cond("ttd"), _stream_cols(fs, [ex], "p") + cw_cols[1:], "K",
                   g_cond("ttd")),
            KpiDef(f"condenser_cleanliness.{e.id}", cond("cleanliness"), duty_cols + cw_cols, "ratio",
                   g_cond("cleanliness")),
        ]
    return defs


def _ttd(steam: str, out: str) -> Callable[[Context], float]:
    """Tsat(p_steam) − T_out [K]."""
    return lambda c: c.water.T_sat(c.p(steam)) - c.ph(out).T


def _rise(cold: str, warm: str) -> Callable[[Context], float]:
    """T_warm − T_cold [K]."""
    return lambda c: c.ph(warm).T - c.ph(cold).T


def _g_ttd(steam: str, out: str) -> Callable[[Context], kg.Grad]:
    return lambda c: kg.combine((1.0, kg.saturation_temperature(c, steam)), (-1.0, kg.temperature(c, out)))


def _g_rise(cold: str, warm: str) -> Callable[[Context], kg.Grad]:
    return lambda c: kg.combine((1.0, kg.temperature(c, warm)), (-1.0, kg.temperature(c, cold)))


def _g_column(fs: Flowsheet, stream: str, q: str) -> Callable[[Context], kg.Grad]:
    col = getattr(fs.layout, q)(stream)
    return lambda c: {col: 1.0}


def _flow(stream: str) -> Callable[[Context], float]:
    return lambda c: c.m(stream)


def _pressure(stream: str) -> Callable[[Context], float]:
    return lambda c: c.p(stream)


def evaluate_kpis(defs: Sequence[KpiDef], ctx: Context) -> dict[str, float]:
    """Values of the KPIs at one state; a KPI whose evaluation fails is NaN."""
    out = {}
    for d in defs:
        try:
            out[d.name] = float(d.func(ctx))
        except (ValueError, ZeroDivisionError, ArithmeticError):
            out[d.name] = float("nan")
    return out
