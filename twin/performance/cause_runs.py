"""The cause runs of the heat-rate split that invert one model parameter each (see :mod:`twin.performance.expected`).

Each function returns the solve arguments of one cause's run (``overrides``, ``skip``,
``constants``), its first-order drivers (``linear``) or ``{"zero": True}`` when the
actual value equals the expected one within the tolerances below.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any

from scipy.optimize import brentq

from twin.model.core import Context
from twin.model.solve import HeatBalance

if TYPE_CHECKING:
    from twin.performance.expected import ExpectedModel

#: Changes below these are treated as none (the cause is exactly 0, no model run).
PRESSURE_TOL = 1.0  # [Pa]
RATIO_TOL = 1e-6  # [-]
FACTOR_TOL = 1e-7  # [-]
TEMPERATURE_TOL = 1e-4  # [K]
FLOW_TOL = 1e-4  # [kg/s]


def stodola_inlet_pressure(model: ExpectedModel, ctx: Context) -> float:
    """HP inlet pressure [Pa] the first HP group's design Stodola constant gives at the actual flow."""
    g = model.first_hp
    assert g is not None
    a, b = g.port("inlet"), g.port("outlet")
    K = model.design.constants[g.id]["stodola"]
    m, h, pb = ctx.m(a), ctx.h(a), ctx.p(b)

    def r(p: float) -> float:
        return m - K * math.sqrt((p * p - pb * pb) / (p * ctx.water.v_ph(p, h)))

    return float(brentq(r, pb * 1.0001, 4.0 * max(ctx.p(a), pb), xtol=1.0))


def pressure_runs(model: ExpectedModel, ctx: Context, ref: HeatBalance, load: float,
                  expected_throttle: float = math.nan) -> dict[str, dict[str, Any]]:
    """The main-steam-pressure and throttling runs (see :mod:`twin.performance.expected`).

    ``expected_throttle`` [Pa] is the expected throttle pressure at the window's own
    load when ``ref`` is a nearby grid node: the run then moves the node's throttle
    pressure by the actual / expected ratio.
    """
    if model.valve is None or model.first_hp is None:
        return {}
    vin, vout = model.valve.port("inlet"), model.valve.port("outlet")
    p_ms, p_hp = ctx.p(vin), ctx.p(vout)
    if not (math.isfinite(p_ms) and math.isfinite(p_hp) and p_ms > 0):
        return {}
    rctx = ref.context()
    r_ref = rctx.p(vout) / rctx.p(vin)
    p_stod = stodola_inlet_pressure(model, ctx)
    p_set = model.control.throttle_pressure(load)
    p_exp = p_stod if not math.isfinite(p_set) else max(p_set, p_stod)
    r_exp = min(p_stod / p_exp, 1.0)
    dp = p_ms - p_exp
    r_act = min(p_hp / p_ms, 1.0)
    skip = frozenset({model.valve.relation("open"), model.first_hp.relation("stodola")})
    rho = p_ms / expected_throttle if math.isfinite(expected_throttle) else p_ms / rctx.p(vin)
    p_a = rctx.p(vin) * rho  # the actual throttle pressure, valves as expected
    sigma = r_act / r_exp
    runs: dict[str, dict[str, Any]] = {}
    if abs(dp) > PRESSURE_TOL:
        runs["main_steam_pressure"] = {"overrides": {(vin, "pressure"): p_a, (vout, "pressure"): p_a * r_ref},
                                       "skip": skip, "linear": {"rho": rho - 1.0}}
    else:
        runs["main_steam_pressure"] = {"zero": True}
    if abs(sigma - 1.0) > RATIO_TOL:
        runs["throttling"] = {"overrides": {(vin, "pressure"): p_a, (vout, "pressure"): p_a * r_ref * sigma},
                              "skip": skip, "minus": "main_steam_pressure", "linear": {"sigma": sigma - 1.0}}
    else:
        runs["throttling"] = {"zero": True}
    return runs


def isolation_run(model: ExpectedModel, ctx: Context, rctx: Context) -> dict[str, Any]:
    """Every cycle-loss sink at its actual flow instead of its normal loss (make-up beyond normal)."""
    overrides: dict[tuple[str, str], float] = {}
    linear: dict[str, float] = {}  # drivers: flow change / design main-steam flow
    for e in model.losses:
        a = e.port("inlet")
        m = ctx.m(a)
        if not math.isfinite(m):
            raise ValueError("cycle loss not observable")
        if abs(m - rctx.m(a)) > FLOW_TOL:
            overrides[(a, "mass_flow")] = m
            linear[f"loss:{e.id}"] = (m - rctx.m(a)) / model.design_flow
    if not overrides:
        return {"zero": True}
    return {"overrides": overrides, "linear": linear,
            "skip": frozenset(e.relation("flow") for e in model.losses if (e.port("inlet"), "mass_flow") in overrides)}


def condenser_run(model: ExpectedModel, ctx: Context, rctx: Context, cw_inlet: float | None) -> dict[str, Any]:
    """The condenser at its actual performance: the UA that gives the actual back-pressure at the actual duty.

    ``Tsat(p) = T_cw,in + Q / (m_cw c_p (1 − exp(−UA/(m_cw c_p))))`` with the design
    cooling-water flow, inverted for UA at the actual duty Q and inlet temperature
    (a lower cooling-water flow shows as a lower UA). The run keeps the cooling
    relation, so extra duty from a turbine loss raises the back-pressure in that
    loss's own run, not here.
    """
    c = model.condensers[0]
    k = model.design.constants[c.id]
    t_cw = cw_inlet if cw_inlet is not None and math.isfinite(cw_inlet) else c.params["cooling_water_inlet_temperature"]
    duty = c.duty(ctx)
    f_act = (ctx.water.T_sat(ctx.p(c.port("exhaust"))) - t_cw) / duty
    cap = k["cw_flow"] * c.params["cooling_water_cp"]
    if not (math.isfinite(f_act) and f_act * cap > 1.0):
        raise ValueError("condenser duty or back-pressure not observable")
    ua = -cap * math.log(1.0 - 1.0 / (cap * f_act))
    if abs(ua / k["ua"] - 1.0) < RATIO_TOL:
        return {"zero": True}
    # driver: 1 / (1 − exp(−UA/(m_cw c_p))), to which the back-pressure rise is proportional
    x_design = 1.0 / -math.expm1(-k["ua"] / cap)
    return {"constants": {c.id: {"ua": ua}}, "linear": {f"approach:{c.id}": cap * f_act / x_design - 1.0}}
