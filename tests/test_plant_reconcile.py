"""Plant reconciliation of demo-u1: exactness on consistent data, gross errors, bad input.

Truth comes from the forward model (a state that satisfies every balance and
the model relations exactly), so noiseless readings must come back unchanged
with a zero global test; see tests/test_plant_reconcile_mc.py for the
Monte Carlo checks of the statistics.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from tests.model_helpers import demo_config, demo_design
from twin.demo.plant import noisy_readings, sensor_truth
from twin.model.solve import solve_off_design
from twin.performance.kpi import CyclePerformanceSettings, evaluate_kpis, kpi_definitions
from twin.performance.plant_reconcile import PlantReconciler


@pytest.fixture(scope="module")
def reconciler():
    cfg = demo_config()
    fs, _, design = demo_design()
    return PlantReconciler(cfg, flowsheet=fs, design=design)


@pytest.fixture(scope="module")
def truth_90():
    cfg = demo_config()
    fs, op, design = demo_design()
    hb = solve_off_design(fs, op, design, 0.9, "sliding")
    truth = sensor_truth(cfg, hb)
    kpis = evaluate_kpis(kpi_definitions(fs, CyclePerformanceSettings.from_config(cfg)), hb.context())
    return hb, truth, kpis


def _model_tags(rec: PlantReconciler, values: dict[str, float]) -> dict[str, float]:
    return {t: v for t, v in values.items() if t in rec.system.sensor_by_tag}


def test_consistent_readings_come_back_unchanged(reconciler, truth_90):
    """Monte Carlo truth without noise: the forward-model state satisfies every constraint."""
    hb, truth, kpis = truth_90
    reconciler.reset()
    r = reconciler.reconcile(_model_tags(reconciler, truth))
    assert r.converged, r.message
    # exact but for thermometers in wet steam within the dew/bubble blend band of
    # twin.performance.plant.sensor_temperature (at most ~0.15 K, here ext2 at x = 0.9999)
    assert r.global_test < 0.02
    for tag, t in r.tags.items():
        assert abs(t.reconciled - truth[tag]) <= 0.05 * t.sigma + 1e-9 * abs(truth[tag]), tag
    # KPIs equal the forward model's (flat definitions, same state)
    for name in ("gross_efficiency", "turbine_heat_rate", "section_efficiency.HP", "section_efficiency.LP",
                 "exhaust_quality_elep", "exhaust_quality_ueep", "heater_ttd.fwh7"):
        assert r.kpis[name].available, name
        assert r.kpis[name].value == pytest.approx(kpis[name], abs=1e-3), name  # ≪ the KPI uncertainty
    # the unmeasured LP exhaust enthalpy is estimated from the turbine-generator energy balance
    ueep = r.unmeasured["lp_ueep.enthalpy"]
    assert ueep.uncertainty > 0
    assert abs(ueep.value - hb.context().h("lp_ueep")) < 0.05 * ueep.uncertainty


def test_non_redundant_measurement_is_left_unchanged(reconciler, truth_90):
    """VDI 2048 / Narasimhan & Jordache: a just-determined measurement keeps its value and has no test."""
    _, truth, _ = truth_90
    values = noisy_readings(_model_tags(reconciler, truth), demo_config(), np.random.default_rng(11))
    reconciler.reset()
    r = reconciler.reconcile(values, kpis=())
    assert r.converged
    t = r.tags["HP-VO-P1"]  # the only pressure between the control valves and the HP group
    assert t.reconciled == pytest.approx(values["HP-VO-P1"], rel=1e-9)
    assert math.isnan(t.normalised_adjustment)
    assert t.redundancy == pytest.approx(0.0, abs=1e-6)


def test_a_five_percent_bias_is_eliminated_and_re_estimated(reconciler, truth_90):
    _, truth, _ = truth_90
    cfg = demo_config()
    rng = np.random.default_rng(5)
    values = noisy_readings(_model_tags(reconciler, truth), cfg, rng, bias={"FW-F1": 0.05 * truth["FW-F1"]})
    reconciler.reset()
    r = reconciler.reconcile(values, kpis=())
    assert r.converged
    assert r.suspects == ("FW-F1",)
    t = r.tags["FW-F1"]
    assert t.reason == "eliminated" and t.suspect and t.flagged_vdi
    # the re-estimate without the biased transmitter lies within 3 σ of the truth
    assert abs(t.reconciled - truth["FW-F1"]) < 3 * t.reconciled_sigma
    assert r.global_test < r.global_test_critical


def test_bad_input_gives_statuses_not_exceptions(reconciler, truth_90):
    _, truth, _ = truth_90
    values = _model_tags(reconciler, truth)
    reconciler.reset()
    # NaN value and a missing tag: excluded with a reason, the rest reconciles
    bad = dict(values)
    bad["HP-MS-T1"] = float("nan")
    del bad["HP-EX-T1"]
    r = reconciler.reconcile(bad, excluded={"CD-F1": "out_of_range"})
    assert r.converged
    assert r.tags["HP-MS-T1"].reason == "not_finite" and not r.tags["HP-MS-T1"].valid
    assert r.tags["HP-EX-T1"].reason == "no_data"
    # all tags missing
    r = reconciler.reconcile({})
    assert r.status == "insufficient_data" and not r.kpis and r.z is None
    # a constant-zero main feedwater flow: no exception, and no invented numbers for it
    zero = dict(values)
    zero["FW-F1"] = 0.0
    r = reconciler.reconcile(zero, kpis=("gross_efficiency",))
    assert r.status in ("converged", "not_converged", "model_error")
    if r.converged:
        assert "FW-F1" in r.suspects
        assert abs(r.tags["FW-F1"].reconciled - truth["FW-F1"]) < 0.05 * truth["FW-F1"]
    else:
        assert not r.kpis


def test_observability_follows_the_instruments(reconciler, truth_90):
    """Losing the generator power leaves the LP exhaust estimated only through the model
    relations (expansion line, exhaust-loss curve), so its uncertainty grows; losing the
    only pressure between the control valves and the HP group leaves that pressure
    unobservable, reported as NaN rather than invented."""
    _, truth, _ = truth_90
    names = ("exhaust_quality_ueep", "gross_efficiency")
    all_tags = _model_tags(reconciler, truth)
    reconciler.reset()
    full = reconciler.reconcile(all_tags, kpis=names)
    no_gen = reconciler.reconcile({t: v for t, v in all_tags.items() if not t.startswith("GEN-MW")}, kpis=names)
    assert full.converged and no_gen.converged
    for n in names:
        assert no_gen.kpis[n].available
        assert no_gen.kpis[n].uncertainty > 1.2 * full.kpis[n].uncertainty, n
    no_valve = reconciler.reconcile({t: v for t, v in all_tags.items() if t != "HP-VO-P1"}, kpis=())
    assert no_valve.converged
    assert math.isnan(no_valve.streams["hp_inlet"].pressure)
    assert math.isfinite(no_valve.streams["main_steam"].pressure)
