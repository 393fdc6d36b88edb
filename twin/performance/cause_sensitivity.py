"""Heat-rate deviation by cause from sensitivities stored at an operating-point node.

At each grid node of the expected model (:mod:`twin.performance.operating_point`)
the first-order change of the turbine heat rate per unit of every cause's driver is
computed once (:func:`sensitivities`: one factorisation of the heat-balance Jacobian
and one residual evaluation per driver). A window's cause is then

- the first-order estimate ``S · Δdriver`` when it is within :data:`LINEAR_LIMIT`
  (2 kJ/kWh; 5 kJ/kWh for the nearly linear heater TTD/DCA, :data:`LINEAR_LIMITS`),
  where the neglected second-order term is below 0.05 kJ/kWh on demo-u1;
- for a single-driver cause beyond that but within its probe step (:data:`PROBE_STEPS`,
  e.g. 3 points of section efficiency, 10 K of steam temperature), the estimate with a
  second-order term whose curvature comes from one exact model run at the probe step
  (made once per node and driver, when first needed);
- an exact model run otherwise (beyond the range of the quadratic, several drivers
  at once such as the feedwater heaters, or a cause without a registered driver).

The work is spread: windows that are not split (not steady, e.g. while the load
settles after a change) at the same node as the window before advance the node's
pending sensitivity and probe work for :data:`PREFETCH_SECONDS` each (:func:`prefetch`);
a split window finishes what is left. Everything stored is a function of the node alone (solved from the design point, probe
at a fixed step), so the split of a window does not depend on which windows came
before it; ``tests/test_cause_sensitivity.py`` compares the estimates with exact runs.
"""

from __future__ import annotations

import math
import time
from collections.abc import Iterator, Mapping
from typing import TYPE_CHECKING, Any

import numpy as np

from twin.model.flowsheet import Spec
from twin.model.solve import SolveError, merge_constants, off_design_specs
from twin.performance.kpi import evaluate_kpis
from twin.performance.operating_point import Node, iter_linear_response, linear_response
from twin.properties import PropertyError

if TYPE_CHECKING:
    from twin.performance.expected import ExpectedModel

#: A cause whose first-order estimate is larger than this [-] (2 kJ/kWh) gets a second-order term or an exact run.
LINEAR_LIMIT = 2.0 / 3600.0
#: Larger first-order range for drivers whose effect is nearly linear (heater TTD/DCA: 5 kJ/kWh) [-].
LINEAR_LIMITS = {"ttd": 5.0 / 3600.0, "dca": 5.0 / 3600.0}

#: Driver kind → the probe step of its curvature run (and the range of the quadratic estimate).
PROBE_STEPS = {"T": -10.0, "factor": -0.03, "approach": 0.2, "rho": 0.05, "sigma": -0.03, "loss": 0.01}

#: CPU time a window that is not split spends on a node's pending sensitivity and probe work [s]
#: (the process's CPU time, so a busy machine does not shrink the work done per window).
PREFETCH_SECONDS = 0.012

_FAILURES = (SolveError, ValueError, PropertyError, ArithmeticError, RuntimeError)


def with_overrides(specs: list[Spec], overrides: Mapping[tuple[str, str], float]) -> list[Spec]:
    """``specs`` with ``overrides`` replacing or appended (the order ``solve_off_design`` uses)."""
    out = [s for s in specs if (s.stream, s.quantity) not in overrides]
    return out + [Spec(stream, q, float(v)) for (stream, q), v in overrides.items()]


def sensitivities(model: ExpectedModel, node: Node) -> dict[str, float]:
    """d(turbine heat rate)/d(driver) at a node, computed once and kept on it.

    Drivers: ``T:<stream>`` [1/K] for the held main-steam and reheat temperatures,
    ``factor:<section>`` per unit of the section's efficiency factor,
    ``approach:<condenser>`` per unit of 1/(1 − exp(−UA/(m_cw c_p))) over its design
    value (the back-pressure rise above the cooling water is proportional to it),
    ``ttd:<heater>`` and ``dca:<heater>`` [1/K], ``rho`` per unit of throttle pressure /
    expected (valves as expected), ``sigma`` per unit of valve pressure ratio / expected and
    ``loss:<sink>`` per unit of a cycle-loss flow / design main-steam flow.
    A driver whose sensitivity cannot be computed is absent (its cause is an exact run).
    """
    while node.sensitivities is None:
        _advance(model, node)
    return node.sensitivities


def _advance(model: ExpectedModel, node: Node) -> None:
    """One unit of the node's sensitivity work (a factorisation or one residual evaluation)."""
    work = node.extra.get("work")
    if work is None:
        partial: dict[str, float] = {}
        work = node.extra["work"] = _sensitivity_work(model, node, partial)
        node.extra["partial"] = partial
    try:
        next(work)
    except StopIteration:
        node.sensitivities = node.extra.pop("partial")
        node.extra.pop("work", None)
    except _FAILURES:
        node.sensitivities = {}  # every cause is then an exact run
        node.extra.pop("work", None)


def prefetch(model: ExpectedModel, node: Node, budget_seconds: float = PREFETCH_SECONDS) -> None:
    """Do the node's pending sensitivity and probe work for about ``budget_seconds`` of CPU time.

    Called in windows that are not split (not steady), so that the first split window
    at a new operating point does not pay for all of it. What is computed is the same
    whichever window computes it (a function of the node alone).
    """
    t0 = time.process_time()
    while True:  # at least one unit of work per call
        if node.sensitivities is None:
            _advance(model, node)
        else:
            store = node.extra.get("curvature", {})
            pending = [k for k in node.sensitivities if k.partition(":")[0] in PROBE_STEPS and k not in store]
            if not pending:
                return
            curvature(model, node, pending[0])
        if time.process_time() - t0 >= budget_seconds:
            return


def _base_system(model: ExpectedModel, node: Node) -> tuple[list[Spec], frozenset[str], dict]:
    hb = node.hb
    assert hb is not None
    specs = with_overrides(off_design_specs(model.fs, model.op, hb.load, hb.pressure_mode), model.ref_overrides(hb))
    fixed = hb.pressure_mode == "fixed" and model.valve is not None
    skip = frozenset({model.valve.relation("open")}) if fixed and model.valve is not None else frozenset()
    return specs, skip, hb.constants


def _approach_ua(model: ExpectedModel, condenser_id: str, factor: float) -> float:
    """Condenser UA [W/K] whose approach factor is ``factor`` × the design one."""
    c = next(c for c in model.condensers if c.id == condenser_id)
    k = model.design.constants[c.id]
    cap = k["cw_flow"] * c.params["cooling_water_cp"]
    x = factor / -math.expm1(-k["ua"] / cap)
    return -cap * math.log1p(-1.0 / x)


def _sensitivity_work(model: ExpectedModel, node: Node, out: dict[str, float]) -> Iterator[None]:
    """Fills ``out`` driver by driver, yielding after each unit of work."""
    hb = node.hb
    assert hb is not None
    specs, skip, consts = _base_system(model, node)
    fs = model.fs

    def hr(z: np.ndarray) -> float:
        return evaluate_kpis(model._hr_def, fs.context(z, consts))["turbine_heat_rate"]

    def moved(equipment: str, key: str, value: float) -> dict:
        return merge_constants(consts, {equipment: {key: value}})

    ctx = hb.context()
    kd = {d.name: d for d in model.kpi_defs}
    dt, df = 0.01, 1e-4  # steps [K], [-]
    per: dict[str, tuple[list[Spec], Mapping[str, Any], float]] = {}
    for stream in (model.op.throttle_stream, model.reheat_stream):
        held = [k for k, sp in enumerate(specs) if sp.stream == stream and sp.quantity == "temperature"]
        if stream and held:
            moved_specs = list(specs)
            sp = specs[held[0]]
            moved_specs[held[0]] = Spec(sp.stream, sp.quantity, sp.value + dt)
            per[f"T:{stream}"] = (moved_specs, consts, dt)
    for sec, path in model.sections.items():
        c = merge_constants(consts, {g.id: {"efficiency_factor": 1.0 + df} for g in path.groups})
        per[f"factor:{sec}"] = (specs, c, df)
    for cond in model.condensers[:1]:
        per[f"approach:{cond.id}"] = (specs, moved(cond.id, "ua", _approach_ua(model, cond.id, 1.0 + df)), df)
    for h in model.heaters:
        for k in ("ttd", "dca"):
            v = kd[f"heater_{k}.{h}"].func(ctx)
            if math.isfinite(v):
                per[f"{k}:{h}"] = (specs, moved(h, k, float(v) + dt), dt)
    for name, v in iter_linear_response(fs, hb.z, (specs, skip, consts), per, hr):
        out[name] = v
        yield
    for e in model.losses:  # the sink's flow as a spec in place of its normal-loss relation
        a = e.port("inlet")
        m = ctx.m(a)

        def flow(value: float, a: str = a) -> list[Spec]:
            return with_overrides(specs, {(a, "mass_flow"): value})

        step = df * model.design_flow
        out.update(linear_response(fs, hb.z, (flow(m), skip | {e.relation("flow")}, consts),
                                   {f"loss:{e.id}": (flow(m + step), consts, df)}, hr))
        yield
    if model.valve is not None and model.first_hp is not None:
        vin, vout = model.valve.port("inlet"), model.valve.port("outlet")
        p_in, p_out = ctx.p(vin), ctx.p(vout)

        def pressures(a: float, b: float) -> list[Spec]:
            return with_overrides(specs, {(vin, "pressure"): a, (vout, "pressure"): b})

        skip_p = skip | {model.valve.relation("open"), model.first_hp.relation("stodola")}
        per_p = {"rho": (pressures(p_in * (1 + df), p_out * (1 + df)), consts, df),
                 "sigma": (pressures(p_in, p_out * (1 + df)), consts, df)}
        for name, v in iter_linear_response(fs, hb.z, (pressures(p_in, p_out), skip_p, consts), per_p, hr):
            out[name] = v
            yield


def probe_run(model: ExpectedModel, node: Node, driver: str, delta: float) -> dict[str, Any]:
    """The cause run that moves one ``driver`` by ``delta`` from the node (units as in :func:`sensitivities`)."""
    hb = node.hb
    assert hb is not None
    kind, _, what = driver.partition(":")
    ctx = hb.context()
    if kind == "T":
        return {"overrides": {(what, "temperature"): ctx.ph(what).T + delta}}
    if kind == "factor":
        return {"constants": {g.id: {"efficiency_factor": 1.0 + delta} for g in model.sections[what].groups}}
    if kind == "approach":
        return {"constants": {what: {"ua": _approach_ua(model, what, 1.0 + delta)}}}
    if kind in ("rho", "sigma") and model.valve is not None and model.first_hp is not None:
        vin, vout = model.valve.port("inlet"), model.valve.port("outlet")
        scale = 1.0 + delta if kind == "rho" else 1.0
        return {"overrides": {(vin, "pressure"): ctx.p(vin) * scale, (vout, "pressure"): ctx.p(vout) * (1.0 + delta)},
                "skip": frozenset({model.valve.relation("open"), model.first_hp.relation("stodola")})}
    if kind == "loss":
        e = next(e for e in model.losses if e.id == what)
        sink = e.port("inlet")
        return {"overrides": {(sink, "mass_flow"): ctx.m(sink) + delta * model.design_flow},
                "skip": frozenset({e.relation("flow")})}
    raise ValueError(f"no probe for driver {driver!r}")


def curvature(model: ExpectedModel, node: Node, driver: str) -> float:
    """d²(heat rate)/d(driver)² at the node from one exact run at the probe step (NaN if it fails)."""
    store = node.extra.setdefault("curvature", {})
    if driver not in store:
        step = PROBE_STEPS[driver.partition(":")[0]]
        try:
            hr = model.run_heat_rate(node, probe_run(model, node, driver, step))
            slope = sensitivities(model, node)[driver]
            store[driver] = 2.0 * (hr - node.values["turbine_heat_rate"] - slope * step) / (step * step)
        except (*_FAILURES, KeyError):
            store[driver] = math.nan
    return float(store[driver])


def estimates(model: ExpectedModel, node: Node, runs: Mapping[str, Mapping[str, Any]]) -> dict[str, float]:
    """Cause → heat-rate deviation [-] for the causes that need no exact run (see the module docstring)."""
    todo = {c: r["linear"] for c, r in runs.items() if not r.get("zero") and r.get("linear") is not None}
    if not todo:
        return {}
    sens = sensitivities(model, node)
    out: dict[str, float] = {}
    for cause, lin in todo.items():
        if not all(k in sens for k in lin):
            continue
        est = sum(sens[k] * d for k, d in lin.items())
        if abs(est) <= min(LINEAR_LIMITS.get(k.partition(":")[0], LINEAR_LIMIT) for k in lin):
            out[cause] = est
            continue
        if len(lin) != 1:
            continue
        ((driver, d),) = lin.items()
        step = PROBE_STEPS.get(driver.partition(":")[0])
        if step is not None and abs(d) <= abs(step):
            c2 = curvature(model, node, driver)
            if math.isfinite(c2):
                out[cause] = est + 0.5 * c2 * d * d
    for cause, run in runs.items():  # a cause measured from another's run needs that run
        if "minus" in run and cause not in out and not run.get("zero"):
            out.pop(str(run["minus"]), None)
    return out
