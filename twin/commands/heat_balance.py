"""``twin heat-balance CONFIG``: solve and print the forward heat balance."""

from __future__ import annotations

import argparse
import json
import sys
from typing import TYPE_CHECKING, Any

from twin.commands._plant import load_plant
from twin.commands._text import print_text

if TYPE_CHECKING:  # heavy imports (CoolProp) happen only when the command runs
    from twin.model.solve import HeatBalance

CAUTION = (
    "Advisory model only: not for protection or control; defer to plant procedures, "
    "manufacturers' limits, local codes and licensed engineers."
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("config", help="plant configuration file (TOML)")
    parser.add_argument("--load", type=float, default=1.0, help="main-steam flow / design flow, 0.2 to 1.2 (default 1.0)")
    parser.add_argument("--pressure", choices=("sliding", "fixed"), default="sliding", help="throttle-pressure operation off design")
    parser.add_argument("--json", action="store_true", help="print one JSON object")


def solve(config: Any, load: float = 1.0, pressure_mode: str = "sliding") -> tuple[HeatBalance, HeatBalance]:
    """Solve the design point and, unless ``load`` is 1.0 in design terms, the off-design point.

    Returns (design, result); at load 1.0 the off-design solve is still run so that
    the result comes from the same relations as any other load.
    """
    from twin.model.flowsheet import Flowsheet
    from twin.model.solve import Operation, solve_design, solve_off_design

    fs = Flowsheet.from_config(config)
    op = Operation.from_config(config)
    design = solve_design(fs, op)
    result = solve_off_design(fs, op, design, load, pressure_mode)
    return design, result


# JSON keys carry their unit spelled out, as the metric names do; values are SI.
# Ratios (efficiencies, quality, moisture, load, cleanliness) have no suffix.
_HEATER_KEYS = {"ttd": "ttd_kelvin", "dca": "dca_kelvin", "temperature_rise": "temperature_rise_kelvin",
                "extraction_flow": "extraction_flow_kilograms_per_second"}
_CONDENSER_KEYS = {"pressure": "pressure_pascals", "saturation_temperature": "saturation_temperature_kelvin",
                   "itd": "itd_kelvin", "ttd": "ttd_kelvin", "lmtd": "lmtd_kelvin", "duty": "duty_watts",
                   "ua": "ua_watts_per_kelvin", "u": "u_watts_per_square_metre_kelvin",
                   "cleanliness": "cleanliness"}


def _num(v: Any) -> Any:
    """Floats without negative zero (``-0.0 + 0.0 == 0.0``); other values unchanged."""
    return v + 0.0 if isinstance(v, float) else v


def _renamed(d: dict[str, Any], names: dict[str, str]) -> dict[str, Any]:
    return {names.get(k, k): _num(v) for k, v in d.items()}


def stream_table(hb: HeatBalance) -> dict[str, dict[str, float]]:
    """Per stream mass flow [kg/s], pressure [Pa], temperature [K], enthalpy [J/kg], quality [-] (NaN single phase)."""
    ctx = hb.context()
    table = {}
    for sid in hb.flowsheet.layout.streams:
        st = ctx.ph(sid)
        x = st.x if st.two_phase else float("nan")
        table[sid] = {"mass_flow_kilograms_per_second": _num(ctx.m(sid)), "pressure_pascals": _num(ctx.p(sid)),
                      "temperature_kelvin": _num(st.T), "enthalpy_joules_per_kilogram": _num(st.h),
                      "quality": _num(x)}
    return table


def report(config: Any, hb: HeatBalance, design: HeatBalance | None = None) -> dict[str, Any]:
    """The heat balance as one JSON-ready dict (SI values; keys name the unit, ratios bare).

    ``newton_iterations`` counts every Newton iteration spent from a cold start: the
    design solve (when ``design`` is given) plus the solve of this operating point.
    """
    from twin.performance.kpi import CyclePerformanceSettings, cycle_kpis
    from twin.properties import FORMULATION

    ctx = hb.context()
    k = cycle_kpis(hb.flowsheet, ctx, CyclePerformanceSettings.from_config(config))
    equipment: dict[str, dict[str, float]] = {}
    for e in hb.flowsheet.equipment:
        if hasattr(e, "power") and callable(e.power):
            equipment[e.id] = {"power_watts": _num(e.power(ctx))}
        elif hasattr(e, "duty"):
            equipment[e.id] = {"duty_watts": _num(e.duty(ctx))}
    for name in hb.flowsheet.layout.extras:
        eid, what = name.split(".", 1)
        equipment.setdefault(eid, {})[f"{what}_watts"] = _num(float(hb.z[hb.flowsheet.layout.extra(name)]))
    design_iterations = design.info.iterations if design is not None else 0
    return {
        "unit_id": config.unit.id,
        "formulation": FORMULATION,
        "load_fraction": hb.load,
        "pressure_mode": hb.pressure_mode,
        "newton_iterations": design_iterations + hb.info.iterations,
        "newton_iterations_design": design_iterations,
        "newton_iterations_operating_point": hb.info.iterations,
        "gross_power_watts": _num(k["gross_power"]),
        "net_power_watts": _num(k["net_power"]),
        "auxiliary_power_watts": _num(k["auxiliary_power"]),
        "heat_input_watts": _num(k["heat_input"]),
        "gross_efficiency": k["gross_efficiency"],
        "net_efficiency": k["net_efficiency"],
        "turbine_heat_rate": k["turbine_heat_rate"],
        "turbine_heat_rate_kilojoules_per_kilowatt_hour": k["turbine_heat_rate_kj_per_kwh"],
        "turbine_heat_rate_btu_per_kilowatt_hour": k["turbine_heat_rate_btu_per_kwh"],
        "turbine_net_heat_rate_kilojoules_per_kilowatt_hour": k["turbine_net_heat_rate_kj_per_kwh"],
        "feed_pump_power_watts": _num(k["feed_pump_power"]),
        "plant_heat_rate_kilojoules_per_kilowatt_hour": k["plant_heat_rate_kj_per_kwh"],
        "net_plant_heat_rate_kilojoules_per_kilowatt_hour": k["net_plant_heat_rate_kj_per_kwh"],
        "fuel_basis": config.performance.fuel_basis,
        "boiler_efficiency": k["boiler_efficiency"],
        "exhaust_moisture_elep": k.get("exhaust_moisture_elep"),
        "exhaust_quality_elep": k.get("exhaust_quality_elep"),
        "exhaust_moisture_ueep": k.get("exhaust_moisture_ueep"),
        "exhaust_quality_ueep": k.get("exhaust_quality_ueep"),
        "exhaust_loss_joules_per_kilogram": _num(k.get("exhaust_loss")),
        "section_efficiency": k["section_efficiency"],
        "extraction_flow_kilograms_per_second": {h: _num(v) for h, v in k["extraction_flow"].items()},
        "heaters": {h: _renamed(v, _HEATER_KEYS) for h, v in k["heaters"].items()},
        "condensers": {c: _renamed(v, _CONDENSER_KEYS) for c, v in k["condensers"].items()},
        "equipment": equipment,
        "streams": stream_table(hb),
    }


def _print_text(r: dict[str, Any]) -> None:
    w = sys.stdout.write
    w(f"Heat balance of {r['unit_id']} at load {r['load_fraction']:.3f} ({r['pressure_mode']} pressure), {r['formulation']}\n")
    w(f"{CAUTION}\n\n")
    w(f"{'stream':<14} {'m kg/s':>9} {'p kPa':>10} {'T °C':>8} {'h kJ/kg':>9} {'x':>6}\n")
    for sid, s in r["streams"].items():
        x = "" if s["quality"] != s["quality"] else f"{s['quality']:.4f}"
        w(f"{sid:<14} {s['mass_flow_kilograms_per_second']:9.3f} {s['pressure_pascals'] / 1e3:10.2f} "
          f"{s['temperature_kelvin'] - 273.15:8.2f} {s['enthalpy_joules_per_kilogram'] / 1e3:9.2f} {x:>6}\n")
    w("\nequipment\n")
    for eid, vals in r["equipment"].items():
        w(f"  {eid:<18} " + "  ".join(f"{k.removesuffix('_watts')} {v / 1e6:9.3f} MW" for k, v in vals.items()) + "\n")
    w("\nperformance\n")
    w(f"  gross power            {r['gross_power_watts'] / 1e6:9.3f} MW\n")
    w(f"  net power              {r['net_power_watts'] / 1e6:9.3f} MW\n")
    w(f"  heat input             {r['heat_input_watts'] / 1e6:9.3f} MW\n")
    w(f"  gross / net efficiency {r['gross_efficiency']:.4f} / {r['net_efficiency']:.4f}\n")
    w(f"  turbine heat rate      {r['turbine_heat_rate_kilojoules_per_kilowatt_hour']:9.1f} kJ/kWh  "
      f"({r['turbine_heat_rate_btu_per_kilowatt_hour']:.1f} Btu/kWh)\n")
    w(f"  turbine net heat rate  {r['turbine_net_heat_rate_kilojoules_per_kilowatt_hour']:9.1f} kJ/kWh  "
      f"(ASME PTC 6: feed-pump power {r['feed_pump_power_watts'] / 1e6:.3f} MW deducted)\n")
    w(f"  plant heat rate        {r['plant_heat_rate_kilojoules_per_kilowatt_hour']:9.1f} kJ/kWh  "
      f"(turbine heat rate / boiler efficiency {r['boiler_efficiency']:.3f}, {r['fuel_basis']})\n")
    w(f"  net plant heat rate    {r['net_plant_heat_rate_kilojoules_per_kilowatt_hour']:9.1f} kJ/kWh  "
      f"(fuel heat / net output, {r['fuel_basis']})\n")
    for sec, eta in r["section_efficiency"].items():
        w(f"  section efficiency {sec:<8} {eta:.4f}\n")
    if r["exhaust_quality_elep"] is not None:
        w(f"  exhaust quality ELEP / UEEP {r['exhaust_quality_elep']:.4f} / {r['exhaust_quality_ueep']:.4f}\n")
    for hid, h in r["heaters"].items():
        w(f"  {hid:<6} TTD {h['ttd_kelvin']:6.2f} K  DCA {h['dca_kelvin']:5.2f} K  rise {h['temperature_rise_kelvin']:6.2f} K  "
          f"extraction {h['extraction_flow_kilograms_per_second']:7.3f} kg/s\n")
    for cid, c in r["condensers"].items():
        w(f"  {cid} p {c['pressure_pascals'] / 1e3:.3f} kPa  ITD {c['itd_kelvin']:.2f} K  TTD {c['ttd_kelvin']:.2f} K  "
          f"LMTD {c['lmtd_kelvin']:.2f} K  cleanliness {c['cleanliness']:.3f}\n")


def run(args: argparse.Namespace) -> int:
    from twin.model.solve import SolveError

    config = load_plant("twin heat-balance", args.config)
    if isinstance(config, int):
        return config
    if config.performance.load_stream is None:
        print(f"{args.config}: performance.load_stream: missing; expected the stream whose flow sets the load", file=sys.stderr)
        return 1
    try:
        design, hb = solve(config, args.load, args.pressure)
    except (SolveError, ValueError) as exc:
        print(f"twin heat-balance: {args.config}: {exc}", file=sys.stderr)
        return 1
    r = report(config, hb, design)
    if args.json:
        print(json.dumps(r, indent=1, allow_nan=True))
    else:
        print_text(_print_text, r)
    return 0
