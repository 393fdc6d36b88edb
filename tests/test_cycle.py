"""The per-window pipeline :class:`twin.cycle.UnitCycle`, fed window statistics directly.

What the daemon and the back-fill share: a window in, one result out, the
state as one JSON value. Physics numbers are checked against the forward
model's truth (the simulator solves the same plant with IAPWS-IF97 and
knows the true values), not against the pipeline's own output.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping
from typing import Any

import numpy as np
import pytest

from tests.test_daemon_e2e import DEMO_CONFIG, demo_config, plant_truth, shared_reconciler
from twin.config import load_config
from twin.cycle import UnitCycle, WindowInput
from twin.demo.plant import noisy_readings
from twin.ingest.store import WindowStats
from twin.metrics import build_families
from twin.performance.plant_reconcile import PlantReconciler

T0 = 1_700_000_000.0
CYCLE = 10.0


def stats_of(values: Mapping[str, float], t_end: float, count: int = 6, stale: bool = False) -> dict[str, WindowStats]:
    """Window statistics as the tag store makes them: ``count`` samples, the last one just before ``t_end``."""
    last = t_end - 1.0
    return {tag: WindowStats(mean=float(v), std=0.0, count=0 if stale else count, n_bad=0, last_time=last,
                             age=t_end - last, min=float(v), max=float(v), stale=stale)
            for tag, v in values.items()}


def window(values: Mapping[str, float], t_end: float, **kw: Any) -> WindowInput:
    st = stats_of(values, t_end, **kw)
    return WindowInput(t_end, 30.0, st, gate_stats=st)


def new_cycle() -> UnitCycle:
    """A pipeline with fresh monitors around the shared reconciliation problem (cold start)."""
    rec = shared_reconciler()
    rec.reset()
    return UnitCycle(demo_config(), reconciler=rec)


def noisy(seed: int, bias: Mapping[str, float] | None = None) -> dict[str, float]:
    truth = plant_truth().sensors
    rng = np.random.default_rng(seed)
    return {t: float(v) for t, v in noisy_readings(truth, demo_config(), rng, bias=bias).items()}


def test_every_kpi_is_present_and_unavailable_in_a_window_without_data() -> None:
    cyc = new_cycle()
    ok = cyc.run(window(noisy(1), T0 + CYCLE)).result
    assert ok.reconcile_status == "converged", ok.reconcile_message
    failed = cyc.run(window(noisy(2), T0 + 2 * CYCLE, stale=True)).result
    assert failed.reconcile_status == "insufficient_data"
    # right, or marked: the same KPI names as a good window, every one unavailable, no value
    assert set(failed.kpis) == set(ok.kpis) == set(cyc.kpi_names)
    assert not any(e.available for e in failed.kpis.values())
    assert all(math.isnan(e.value) for e in failed.kpis.values())
    # ... and the exposition keeps one twin_kpi_available series per KPI, at 0
    fams = {f.name: f for f in build_families(failed)}
    avail = fams["twin_kpi_available"].samples
    assert {s.labels["kpi"] for s in avail} == set(cyc.kpi_names)
    assert all(s.value == 0 for s in avail)
    assert "twin_gross_efficiency_ratio" not in fams or not fams["twin_gross_efficiency_ratio"].samples
    assert set(failed.inputs.stale_tags) == set(demo_config().sensors_by_tag)


def test_a_biased_flow_transmitter_is_eliminated_from_the_first_window() -> None:
    # +3 % on the final-feedwater flow from the very first window: the gate has no verdict
    # yet, but gross-error tests and elimination run in every window (steady or not)
    truth = plant_truth()
    fw = truth.sensors["FW-F1"]
    cyc = new_cycle()
    r = cyc.run(window(noisy(3, bias={"FW-F1": 0.03 * fw}), T0 + CYCLE)).result
    assert r.reconcile_status == "converged", r.reconcile_message
    assert not r.steady
    assert r.tags["FW-F1"].suspect
    for name in ("heat_input", "gross_efficiency", "turbine_heat_rate"):
        e = r.kpis[name]
        # Monte Carlo truth of the simulator: the forward model with the true boundary conditions
        assert e.available and abs(e.value - truth.kpis[name]) <= e.uncertainty, (name, e, truth.kpis[name])


@pytest.mark.parametrize("biased", [False, True], ids=["clean", "biased"])
def test_snapshot_round_trips_through_json_and_a_restored_pipeline_replays_identically(biased: bool) -> None:
    # biased: FW-F1 +3 % is eliminated in every window, so the snapshot also carries the
    # measurement to re-test first (its measured set and position)
    bias = {"FW-F1": 0.03 * plant_truth().sensors["FW-F1"]} if biased else None
    a = new_cycle()
    for k in range(1, 5):
        a.run(window(noisy(10 + k, bias), T0 + k * CYCLE))
    snap = json.loads(json.dumps(a.snapshot()))  # JSON-able
    assert (snap["retest"] is not None) == biased
    if biased:
        fw_column = a.reconciler.system.sensor_by_tag["FW-F1"].column
        assert snap["retest"]["measured"][snap["retest"]["position"]] == fw_column
    # a restarted process: its own reconciliation problem, state from the snapshot
    b = UnitCycle(demo_config(), reconciler=PlantReconciler(load_config(DEMO_CONFIG)))
    b.restore(snap)
    assert json.loads(json.dumps(b.snapshot())) == snap  # nothing lost on the way
    for k in range(5, 9):
        w = window(noisy(10 + k, bias), T0 + k * CYCLE)
        ra, rb = a.run(w).result, b.run(w).result
        assert ra.reconcile_status == rb.reconcile_status == "converged"
        assert ra.tags["FW-F1"].suspect == rb.tags["FW-F1"].suspect == biased
        assert {n: (e.value, e.uncertainty) for n, e in ra.kpis.items()} == {
            n: (e.value, e.uncertainty) for n, e in rb.kpis.items()}
        assert ra.alarms == rb.alarms and ra.drift == rb.drift and ra.steady_status == rb.steady_status
    assert a.snapshot() == b.snapshot()


def test_a_window_after_eliminations_gives_the_answer_of_a_cold_start() -> None:
    # after windows that eliminated FW-F1 (+3 %), the next window solves without it first and
    # re-tests it there (the set with every tag is not solved): the path changes the work, not
    # the answer. A cold pipeline (forward-model start, every tag first) solves the same window;
    # the reconciled KPIs agree far inside their uncertainty, and both agree with the simulator's truth
    truth = plant_truth()
    bias = {"FW-F1": 0.03 * truth.sensors["FW-F1"]}
    warm = new_cycle()
    for k in range(1, 4):
        warm.run(window(noisy(40 + k, bias), T0 + k * CYCLE))
    assert warm.reconciler.retest is not None
    w = window(noisy(44, bias), T0 + 4 * CYCLE)
    rw = warm.run(w).result
    rc = new_cycle().run(w).result
    assert rw.reconcile_status == rc.reconcile_status == "converged"
    assert rw.tags["FW-F1"].suspect and rc.tags["FW-F1"].suspect
    for name, e in rc.kpis.items():
        if e.available:
            assert abs(rw.kpis[name].value - e.value) <= 1e-6 * e.uncertainty, name
    for name in ("heat_input", "gross_efficiency", "turbine_heat_rate"):
        # the simulator's truth: the forward model with the true boundary conditions
        assert abs(rw.kpis[name].value - truth.kpis[name]) <= rw.kpis[name].uncertainty, name


def test_a_re_tested_elimination_gives_the_answer_of_solving_every_tag_first() -> None:
    # FW-F1 +3 %: the first window solves every tag and eliminates it; the next ones solve
    # without it and re-test it there. A pipeline that forgets the re-test before each window
    # solves every tag first, as it would without it: the same suspects, the KPIs and FW-F1's
    # normalised adjustment far inside their uncertainty of each other, its redundancy close,
    # and both KPIs within their uncertainty of the simulator's truth. Once the meter reads
    # true again the re-test does not confirm it: every tag is solved, FW-F1 is back in use
    truth = plant_truth()
    bias = {"FW-F1": 0.03 * truth.sensors["FW-F1"]}
    a = new_cycle()
    b = UnitCycle(demo_config(), reconciler=PlantReconciler(load_config(DEMO_CONFIG)))
    for k in range(1, 6):
        w = window(noisy(60 + k, bias), T0 + k * CYCLE)
        b.reconciler.retest = None
        ra, rb = a.run(w).result, b.run(w).result
        assert ra.reconcile_status == rb.reconcile_status == "converged"
        assert {t for t, r in ra.tags.items() if r.suspect} == {t for t, r in rb.tags.items() if r.suspect} == {"FW-F1"}
        fa, fb = ra.tags["FW-F1"], rb.tags["FW-F1"]
        assert fa.reason == fb.reason == "eliminated"
        # the redundancy in the full set, linearised at the solution without FW-F1 instead of at
        # the full set's (which the gross error pulls by its share): the balances are mildly
        # nonlinear in the enthalpies, so it moves in the fourth digit
        assert fa.redundancy == pytest.approx(fb.redundancy, rel=1e-3)
        assert fa.normalised_adjustment == pytest.approx(fb.normalised_adjustment, rel=1e-6)
        for name, e in rb.kpis.items():
            if e.available:
                assert abs(ra.kpis[name].value - e.value) <= 1e-6 * e.uncertainty, (k, name)
        for name in ("heat_input", "gross_efficiency", "turbine_heat_rate"):
            assert abs(ra.kpis[name].value - truth.kpis[name]) <= ra.kpis[name].uncertainty, (k, name)
        assert a.reconciler.retest is not None
        assert (a.reconciler.first_warm_start is None) == (k > 1)  # every tag solved in the first window only
    repaired = a.run(window(noisy(70), T0 + 6 * CYCLE)).result
    assert repaired.reconcile_status == "converged"
    assert repaired.tags["FW-F1"].valid and repaired.tags["FW-F1"].reason == ""
    assert not any(r.suspect for r in repaired.tags.values())
    assert a.reconciler.retest is None


def test_restore_refuses_another_version_or_unit() -> None:
    cyc = new_cycle()
    snap = cyc.snapshot()
    with pytest.raises(ValueError, match="version"):
        cyc.restore({**snap, "version": 99})
    with pytest.raises(ValueError, match="unit"):
        cyc.restore({**snap, "unit_id": "other-unit"})


def test_kpis_without_generator_power_are_marked_model_based_on_the_metrics() -> None:
    # Without the generator-power transmitters the LP exhaust is observable only through
    # the soft model relations (VDI 2048 practice): it must read model_based, not reconciled.
    values = noisy(21)
    for tag in [t for t in values if t.startswith("GEN-MW")]:
        del values[tag]
    cyc = new_cycle()
    r = cyc.run(window(values, T0 + CYCLE)).result
    assert r.reconcile_status == "converged", r.reconcile_message
    lp = r.kpis["section_efficiency.LP"]
    assert lp.available and lp.status == "model_based" and lp.soft_share >= 0.9
    fams = {f.name: f for f in build_families(r)}
    status = {(s.labels["kpi"], s.labels["status"]): s.value for s in fams["twin_kpi_status"].samples}
    assert status[("section_efficiency.LP", "model_based")] == 1
    assert status[("section_efficiency.LP", "reconciled")] == 0
    share = {s.labels["kpi"]: s.value for s in fams["twin_kpi_soft_share_ratio"].samples}
    assert share["section_efficiency.LP"] == lp.soft_share


def test_evolve_equals_dataclasses_replace() -> None:
    # the cheap copy the cycle gives each tag its window statistics with: the record
    # dataclasses.replace (the standard library's) makes, and the same refusals
    from dataclasses import FrozenInstanceError, replace

    from twin.result import Estimate, TagResult, evolve

    base = TagResult("FW-F1", "mass_flow", measured=300.0, valid=True, sigma=0.7, suspect=True)
    changes = {"spread": 0.3, "count": 6, "age_seconds": 1.0, "measured": 301.0}
    new = evolve(base, **changes)
    assert new == replace(base, **changes) and type(new) is TagResult
    assert base.measured == 300.0 and math.isnan(base.spread)  # the original is untouched
    with pytest.raises(FrozenInstanceError):
        new.count = 1  # type: ignore[misc]
    with pytest.raises(TypeError, match="no field"):
        evolve(base, colour="red")
    est = evolve(Estimate(1.0, 0.1, True), status="model_based")  # __post_init__: through replace
    assert est.status == "model_based"
