"""The live cycle spreads a new operating point's expected-model work over windows.

Truth: a fresh forward heat-balance solve at the window's point (the expected model
itself, no grid) for the windows that settle into a new grid cell; the grid's own
interpolation (a fresh model, no history) once settled. Work is counted in solves
(the expected model's node and direct solves), not in time.
"""

from __future__ import annotations

import pytest

from tests.model_helpers import demo_config, demo_design
from tests.test_cycle import window
from twin.cycle import SETTLE_WINDOWS, UnitCycle
from twin.demo.plant import sensor_truth
from twin.model.solve import solve_off_design
from twin.performance.expected import ExpectedModel
from twin.performance.operating_point import FILL_PER_WINDOW
from twin.performance.plant_reconcile import PlantReconciler

T0 = 1_750_000_000.0
LOADS = [1.0] * 7 + [0.85] * 7  # a load step: a new grid cell, then another one


def _truths() -> list[dict[str, float]]:
    cfg = demo_config()
    fs, op, design = demo_design()
    by_load = {load: sensor_truth(cfg, design if load == 1.0 else solve_off_design(fs, op, design, load, "sliding"))
               for load in set(LOADS)}
    return [by_load[load] for load in LOADS]


def _cycle(expected_model: ExpectedModel | None = None) -> UnitCycle:
    cfg = demo_config()
    fs, _, design = demo_design()
    cyc = UnitCycle(cfg, reconciler=PlantReconciler(cfg, flowsheet=fs, design=design), expected_model=expected_model)
    cyc.steady = None  # every window steady: split in every window
    return cyc


@pytest.fixture(scope="module")
def run() -> tuple[list, list[int]]:
    cyc = _cycle()
    em = cyc.expected_model
    results, work = [], []
    for k, values in enumerate(_truths()):
        before = em.grid.solves + em.direct_solves
        results.append(cyc.run(window(values, T0 + 30.0 * (k + 1))).result)
        work.append(em.grid.solves + em.direct_solves - before)
    return results, work


def test_no_window_solves_a_whole_new_cell(run) -> None:
    """A new cell's 9 stencil nodes used to be solved in its first window; now at most 2 nodes + 1 direct solve."""
    results, work = run
    assert max(work) <= FILL_PER_WINDOW + 1, work
    assert all(r.heat_rate_deviation_status == "complete" for r in results)


def test_settling_windows_are_a_direct_solve_and_settled_ones_the_grid(run) -> None:
    results, _ = run
    fs, op, design = demo_design()
    truth_model = ExpectedModel.from_config(demo_config(), fs, op, design)
    for k, r in enumerate(results):
        in_cell = k % 7 + 1  # windows in this cell so far (the load steps at window 7)
        load = r.kpis["load_fraction"].value
        cw = _cw_inlet(r)
        if in_cell < SETTLE_WINDOWS:
            _, fresh = truth_model.expected(load, cw)  # truth: a fresh forward solve at the point
            assert r.expected["turbine_heat_rate"] == pytest.approx(fresh["turbine_heat_rate"], rel=1e-9), k
        else:
            grid, _ = ExpectedModel.from_config(demo_config(), fs, op, design).expected_at(load, cw)
            assert r.expected["turbine_heat_rate"] == grid["turbine_heat_rate"], k  # same bits as without history
        # the split and the total come from the same window in either case
        assert sum(r.heat_rate_deviation_by_cause.values()) == pytest.approx(r.heat_rate_deviation, abs=1e-12)


def test_results_do_not_depend_on_what_the_grid_already_holds(run) -> None:
    """A model whose grid holds every node already (the back-fill shares one) publishes the same bits."""
    results, _ = run
    fs, op, design = demo_design()
    warm = ExpectedModel.from_config(demo_config(), fs, op, design)
    for r in results:
        warm.expected_at(r.kpis["load_fraction"].value, _cw_inlet(r))
    cyc = _cycle(warm)
    for k, values in enumerate(_truths()):
        again = cyc.run(window(values, T0 + 30.0 * (k + 1))).result
        assert again.expected == results[k].expected, k
        assert again.heat_rate_deviation_by_cause == results[k].heat_rate_deviation_by_cause, k


def _cw_inlet(r) -> float:
    cw = [t for t in r.tags.values() if t.quantity == "cooling_water_inlet_temperature" and t.valid]
    return cw[0].reconciled


def test_a_settled_point_moving_into_a_neighbouring_cell_stays_on_the_grid() -> None:
    """Load 1.0 settled, then 0.985 (the next cell down, less than a grid step): grid values, 3 new nodes at most."""
    cfg = demo_config()
    fs, op, design = demo_design()
    truths = {load: sensor_truth(cfg, design if load == 1.0 else solve_off_design(fs, op, design, load, "sliding"))
              for load in (1.0, 0.985)}
    cyc = _cycle()
    em = cyc.expected_model
    for k, load in enumerate([1.0] * SETTLE_WINDOWS + [0.985] * 2):
        before = em.grid.solves + em.direct_solves
        r = cyc.run(window(truths[load], T0 + 30.0 * (k + 1))).result
        work = em.grid.solves + em.direct_solves - before
        if load == 0.985:
            assert work <= 3, (k, work)
            fresh, _ = ExpectedModel.from_config(cfg, fs, op, design).expected_at(r.kpis["load_fraction"].value,
                                                                                _cw_inlet(r))
            assert r.expected["turbine_heat_rate"] == fresh["turbine_heat_rate"], k  # the grid, no direct solve
