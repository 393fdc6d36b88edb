"""The expected model on its operating-point grid and the cause split from stored sensitivities.

Truth everywhere is a fresh forward heat-balance solve (the model itself, no grid,
no linearisation): the grid's interpolated expected values are compared with a
solve at the same point, and each cause estimated from the node's sensitivities
with an exact model run of that cause at the node.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest

from tests.model_helpers import demo_config, demo_design
from twin.demo.plant import sensor_truth
from twin.model.solve import solve_off_design
from twin.model.turbine import TurbineGroup
from twin.performance import cause_sensitivity
from twin.performance.expected import ExpectedModel, PressureControl, window_deviation
from twin.performance.plant_reconcile import PlantReconciler

CW_DESIGN = 293.15  # [K] the plant file's cooling-water inlet (20 °C)


@pytest.fixture(scope="module")
def model() -> ExpectedModel:
    fs, op, design = demo_design()
    return ExpectedModel.from_config(demo_config(), fs, op, design)


def test_interpolated_expected_values_match_a_fresh_solve_at_random_points(model: ExpectedModel) -> None:
    """Random operating points over 30-110 % load and design ± 8 K cooling water (truth: fresh forward solve)."""
    rng = np.random.default_rng(11)
    for _ in range(12):
        load, cw = rng.uniform(0.3, 1.1), CW_DESIGN + rng.uniform(-8.0, 8.0)
        got, _ = model.expected_at(load, cw)
        _, truth = model.expected(load, cw)
        # the goal of the grid: turbine heat-rate error below 0.1 kJ/kWh
        assert abs(got["turbine_heat_rate"] - truth["turbine_heat_rate"]) * 3600.0 < 0.1, (load, cw)
        for name, v in truth.items():
            if math.isfinite(v) and not name.startswith("section_efficiency"):
                # every other expected KPI within 2e-4 relative (or 2e-4 absolute for TTD/DCA near 0 K)
                assert got[name] == pytest.approx(v, rel=2e-4, abs=2e-4 if name.startswith("heater_") else 0.0), name


def test_a_cached_value_does_not_depend_on_the_order_of_the_windows() -> None:
    """Nodes are solved from the design point: the same point gives the same bits after any history."""
    fs, op, design = demo_design()
    fresh = ExpectedModel.from_config(demo_config(), fs, op, design)
    visited = ExpectedModel.from_config(demo_config(), fs, op, design)
    for load in (0.55, 0.9, 0.77):
        visited.expected_at(load, CW_DESIGN + 2.5)
    a, _ = fresh.expected_at(0.771, CW_DESIGN + 1.2)
    b, _ = visited.expected_at(0.771, CW_DESIGN + 1.2)
    assert a == b


def test_the_same_operating_point_solves_nothing_the_second_time(model: ExpectedModel) -> None:
    model.expected_at(0.83, CW_DESIGN)
    solves = model.grid.solves
    model.expected_at(0.8301, CW_DESIGN + 0.1)
    assert model.grid.solves == solves


def _efficiency(section: str, points: float) -> dict[str, dict[str, float]]:
    fs, _, _ = demo_design()
    return {g.id: {"efficiency_factor": 1.0 - points / g.params["efficiency"]}
            for g in fs.of_kind(TurbineGroup) if g.params["section"] == section}


# one changed parameter (forward-model truth), the cause it drives; the first three stay in the
# linear range (≤ 2 kJ/kWh), the others need the second-order term
CASES = [
    ({"overrides": {("main_steam", "temperature"): 814.15 - 0.5}}, "main_steam_temperature"),
    ({"constants": _efficiency("HP", 0.001)}, "hp_efficiency"),
    ({"constants": {"fwh7": {"ttd": -1.7 + 0.5}}}, "feedwater_heaters"),
    ({"constants": {"fwh7": {"ttd": -1.7 + 1.2}, "fwh5": {"dca": 5.6 + 0.3}}}, "feedwater_heaters"),
    ({"overrides": {("hot_reheat", "temperature"): 813.15 - 3.0}}, "reheat_temperature"),
    ({"constants": _efficiency("LP", 0.01)}, "lp_efficiency"),
    ({"constants": _efficiency("IP", 0.02)}, "ip_efficiency"),
    ({"constants": {"condenser": {"ua": 0.85 * demo_design()[2].constants["condenser"]["ua"]}}}, "condenser_pressure"),
    # 0.2 % and 0.8 % of the design main-steam flow (295 kg/s) lost and made up
    ({"overrides": {("steam_lost", "mass_flow"): 0.6}, "skip": frozenset({"steam_leak.flow"})}, "cycle_isolation"),
    ({"overrides": {("steam_lost", "mass_flow"): 2.4}, "skip": frozenset({"steam_leak.flow"})}, "cycle_isolation"),
]


@pytest.mark.parametrize("load", [1.0, 0.61])
@pytest.mark.parametrize(("solve", "cause"), CASES)
def test_estimated_causes_match_exact_model_runs(model: ExpectedModel, load: float, solve: dict, cause: str) -> None:
    """Each estimated cause vs the exact run of that cause at the same node (truth: forward solve), ≤ 0.05 kJ/kWh."""
    cfg = demo_config()
    fs, op, design = demo_design()
    rec = PlantReconciler(cfg, flowsheet=fs, design=design)
    truth = sensor_truth(cfg, solve_off_design(fs, op, design, load, "sliding", **solve))
    r = rec.reconcile({t: v for t, v in truth.items() if t in rec.system.sensor_by_tag})
    assert r.converged, r.message
    cw = float(r.z[next(iter(rec.system.cooling_water_columns.values()))[0]])
    model.last_load = math.nan  # a window that holds its operating point (no ramp before it)
    d = window_deviation(model, r, cw)
    assert d.status == "complete" and sum(d.by_cause.values()) == pytest.approx(d.total, abs=1e-12)
    ctx = fs.context(r.z, design.constants)
    exp, node = model.expected_at(r.kpis["load_fraction"].value, cw)
    runs, failed = model._cause_runs(ctx, node.hb, r.kpis["load_fraction"].value, cw, exp["_throttle_pressure"])
    assert not failed
    est = cause_sensitivity.estimates(model, node, runs)
    assert cause in est  # no exact run was needed for it
    exact = model.run_heat_rate(node, runs[cause]) - node.values["turbine_heat_rate"]
    print(cause, load, round(est[cause] * 3600.0, 4), round(exact * 3600.0, 4))
    assert abs(est[cause] - exact) * 3600.0 <= 0.05  # [kJ/kWh]
    assert d.by_cause[cause] == est[cause]


def test_a_cause_beyond_the_quadratic_range_is_an_exact_run(model: ExpectedModel) -> None:
    """LP −4 points is outside the probe step (3 points): the window makes an exact model run for it."""
    cfg = demo_config()
    fs, op, design = demo_design()
    rec = PlantReconciler(cfg, flowsheet=fs, design=design)
    truth = sensor_truth(cfg, solve_off_design(fs, op, design, 1.0, "sliding", constants=_efficiency("LP", 0.04)))
    r = rec.reconcile({t: v for t, v in truth.items() if t in rec.system.sensor_by_tag})
    cw = float(r.z[next(iter(rec.system.cooling_water_columns.values()))[0]])
    model.last_load = math.nan
    d = window_deviation(model, r, cw)
    assert d.model_runs >= 1 and d.by_cause["lp_efficiency"] / d.total >= 0.95
    assert abs(d.by_cause["unaccounted"]) <= 0.05 * d.total


def test_linear_response_matches_a_finite_difference_of_solves(model: ExpectedModel) -> None:
    """d(heat rate)/d(LP factor) from one factorisation vs a central difference of two forward solves."""
    _, node = model.expected_at(0.8, CW_DESIGN)
    s = model.sensitivities(node)["factor:LP"]
    h = 1e-3
    hr: list[float] = []
    for f in (1.0 - h, 1.0 + h):
        run: dict[str, Any] = {"constants": {g.id: {"efficiency_factor": f} for g in model.sections["LP"].groups}}
        hr.append(model.run_heat_rate(node, run))
    assert s == pytest.approx((hr[1] - hr[0]) / (2 * h), rel=1e-3)


def test_work_spread_over_windows_gives_the_same_numbers_as_all_at_once() -> None:
    """Sensitivities and probe curvatures advanced one unit per call == computed in one go (same bits)."""
    fs, op, design = demo_design()
    spread = ExpectedModel.from_config(demo_config(), fs, op, design)
    at_once = ExpectedModel.from_config(demo_config(), fs, op, design)
    _, a = spread.expected_at(0.9, CW_DESIGN)
    _, b = at_once.expected_at(0.9, CW_DESIGN)
    calls = 0
    while a.sensitivities is None or len(a.extra.get("curvature", {})) < 9:
        cause_sensitivity.prefetch(spread, a, budget_seconds=0.0)  # one unit of work per call
        calls += 1
    assert calls > 20  # it was spread
    sb = at_once.sensitivities(b)
    assert a.sensitivities == sb and len(sb) >= 20
    for driver in a.extra["curvature"]:
        assert cause_sensitivity.curvature(at_once, b, driver) == a.extra["curvature"][driver]


def test_a_ramp_window_is_solved_directly_without_new_grid_rows() -> None:
    """Load moving by more than a grid step since the last window: one solve at the point, no grid nodes."""
    cfg = demo_config()
    fs, op, design = demo_design()
    em = ExpectedModel.from_config(cfg, fs, op, design)
    rec = PlantReconciler(cfg, flowsheet=fs, design=design)
    results = []
    for load in (0.9, 0.85):
        truth = sensor_truth(cfg, solve_off_design(fs, op, design, load, "sliding"))
        r = rec.reconcile({t: v for t, v in truth.items() if t in rec.system.sensor_by_tag})
        solves = em.grid.solves
        d = window_deviation(em, r, CW_DESIGN, causes=False)
        results.append((em.grid.solves - solves, d))
    assert results[0][0] == 9  # the first window builds its cell
    assert results[1][0] == 0  # the ramp window adds none
    _, fresh = em.expected(results[1][1].expected["load_fraction"], CW_DESIGN)
    assert results[1][1].expected["turbine_heat_rate"] == pytest.approx(fresh["turbine_heat_rate"], rel=1e-12)
    assert abs(results[1][1].total) * 3600.0 < 0.05  # the truth is the model in its own mode


@pytest.mark.parametrize("control", [
    PressureControl("fixed", 16.2e6),
    # knots at 0.55 and 0.81; the valves open wide where the schedule falls below the sliding pressure
    PressureControl("schedule", 16.2e6, ((0.2, 8e6), (0.55, 9e6), (0.81, 13e6), (1.2, 16.2e6))),
])
def test_expected_values_across_the_kinks_of_the_pressure_control(control: PressureControl) -> None:
    """Schedule knots and the valves-wide-open load are kinks: still within 0.1 kJ/kWh of a fresh solve."""
    fs, op, design = demo_design()
    base = ExpectedModel.from_config(demo_config(), fs, op, design)
    em = ExpectedModel(fs, op, design, base.settings, control)
    for load in (0.45, 0.549, 0.551, 0.56, 0.79, 0.805, 0.815, 0.99, 1.01):
        got, _ = em.expected_at(load, CW_DESIGN)
        _, truth = em.expected(load, CW_DESIGN)  # truth: fresh forward solve
        assert abs(got["turbine_heat_rate"] - truth["turbine_heat_rate"]) * 3600.0 < 0.1, load


def test_a_slow_ramp_builds_the_next_grid_row_one_node_per_window() -> None:
    """Load falling 0.4 % per window: after the first window no window solves more than one node."""
    cfg = demo_config()
    fs, op, design = demo_design()
    em = ExpectedModel.from_config(cfg, fs, op, design)
    rec = PlantReconciler(cfg, flowsheet=fs, design=design)
    per_window = []
    d = None
    for k in range(12):
        load = 0.9 - 0.004 * k
        truth = sensor_truth(cfg, solve_off_design(fs, op, design, load, "sliding"))
        r = rec.reconcile({t: v for t, v in truth.items() if t in rec.system.sensor_by_tag})
        solves = em.grid.solves
        d = window_deviation(em, r, CW_DESIGN, causes=False)
        per_window.append(em.grid.solves - solves)
    assert per_window[0] == 9 and max(per_window[1:]) <= 1 and sum(per_window[1:]) >= 3
    assert d is not None
    fresh = ExpectedModel.from_config(cfg, fs, op, design)
    got, _ = fresh.expected_at(d.expected["load_fraction"], CW_DESIGN)
    assert got["turbine_heat_rate"] == d.expected["turbine_heat_rate"]  # same bits as without the history
