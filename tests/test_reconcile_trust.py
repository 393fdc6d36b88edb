"""Trustworthiness of a reconciled window: step floor, z sign and floor, soft-relation share, model_based.

Sources: the closed-form linear reconciliation x̂ = y − V Aᵀ(A V Aᵀ)⁻¹(A y − c)
(Crowe, Garcia Campos & Hrymak, AIChE J. 29(6) 881 (1983)) for the gain; the
definition of the normalised adjustment z = a / σ(a), a = y − x̂ (VDI 2048 Blatt 1,
2017; Narasimhan & Jordache 2000, §7.3); the forward model of demo-u1 as truth.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys

import numpy as np
import pytest

from tests.model_helpers import demo_config, demo_design
from twin.demo.plant import noisy_readings, sensor_truth
from twin.model.solve import solve_off_design
from twin.performance.plant_reconcile import MODEL_BASED_SHARE, PlantReconciler
from twin.reconcile import REDUNDANCY_FLOOR, LinearSystem, SolveOptions, reconcile
from twin.result import Estimate

LP_KPIS = ("section_efficiency.LP", "exhaust_quality_elep", "exhaust_quality_ueep")


class _Cliff:
    """One linear constraint whose model fails anywhere but at the start point (an impossible window)."""

    n_vars = 2

    def __init__(self, z0: np.ndarray) -> None:
        self.z0 = z0.copy()
        self.calls = 0

    def residuals(self, z: np.ndarray) -> np.ndarray:
        self.calls += 1
        if not np.array_equal(z, self.z0):
            raise ValueError("outside the property range")
        return np.array([z[0] - z[1]])

    def jacobian(self, z: np.ndarray) -> np.ndarray:
        return np.array([[1.0, -1.0]])


def test_a_step_below_the_floor_fails_the_line_search_at_once():
    z0 = np.array([1.0, 2.0])
    system = _Cliff(z0)
    res = reconcile(system, z0, [0, 1], [1.0, 2.0], [0.01, 0.01], options=SolveOptions(min_step=1e-6))
    assert res.status == "line_search_failed"
    assert "step floor" in res.message
    # α = 1, 1/2, ..., 2^-19 ≥ 1e-6: twenty trial points, then the search gives up
    assert system.calls <= 1 + 20
    with pytest.raises(ValueError, match="min_step"):
        SolveOptions(min_step=0.0)


def test_gain_reproduces_the_closed_form_linear_reconciliation():
    """Crowe et al. (1983): x̂ = G y with G = I − V Aᵀ(A V Aᵀ)⁻¹ A; Cov(x̂) = G V Gᵀ."""
    rng = np.random.default_rng(3)
    A = np.array([[1.0, -1.0, -1.0, 0.0, 0.0], [0.0, 1.0, 0.0, -1.0, 0.0], [0.0, 0.0, 1.0, 0.0, -1.0]])
    V = rng.uniform(0.5, 2.0, 5) ** 2
    x = np.array([10.0, 6.0, 4.0, 6.0, 4.0])
    y = x + np.sqrt(V) * rng.standard_normal(5)
    res = reconcile(LinearSystem(A, np.zeros(3)), y, np.arange(5), y, V)
    assert res.converged and res.gain is not None
    Vm = np.diag(V)
    G = np.eye(5) - Vm @ A.T @ np.linalg.solve(A @ Vm @ A.T, A)
    # whitened gain: G L with L = diag(σ)
    assert np.allclose(res.gain, G * np.sqrt(V)[None, :], atol=1e-8)
    assert np.allclose(res.gain @ res.gain.T, res.cov_z, atol=1e-8)
    # z from the same iterate as the adjustment: same sign, a / sqrt(V − Var(x̂))
    va = V - np.diag(G @ Vm @ G.T)
    assert np.allclose(res.z, (y - G @ y) / np.sqrt(va), atol=1e-8)


@pytest.fixture(scope="module")
def setting():
    cfg = demo_config()
    fs, op, design = demo_design()
    hb = solve_off_design(fs, op, design, 0.9, "sliding")
    rec = PlantReconciler(cfg, flowsheet=fs, design=design)
    truth = {t: v for t, v in sensor_truth(cfg, hb).items() if t in rec.system.sensor_by_tag}
    return cfg, rec, truth


def _check_z(r):
    for tag, t in r.tags.items():
        if not t.valid:
            continue
        if t.redundancy <= REDUNDANCY_FLOOR or not math.isfinite(t.redundancy):
            assert math.isnan(t.normalised_adjustment), tag
            continue
        assert math.isfinite(t.normalised_adjustment), tag
        # z = a / σ(a) with a = measured − reconciled; σ(a)² = σ² − Var(x̂) when kept,
        # σ² + Var(x̂) for an eliminated tag re-estimated without it
        assert t.adjustment == pytest.approx(t.measured - t.reconciled, abs=1e-12 * abs(t.measured) + 1e-12)
        sign = 1.0 if t.reason == "eliminated" else -1.0
        sa = math.sqrt(t.sigma**2 + sign * t.reconciled_sigma**2)
        assert t.normalised_adjustment == pytest.approx(t.adjustment / sa, rel=1e-3, abs=1e-6), tag


def test_z_and_adjustment_agree_in_sign_after_an_elimination(setting):
    cfg, rec, truth = setting
    values = noisy_readings(truth, cfg, np.random.default_rng(5), bias={"FW-F1": 0.05 * truth["FW-F1"]})
    rec.reset()
    r = rec.reconcile(values, kpis=())
    assert r.converged and "FW-F1" in r.suspects
    assert r.tags["FW-F1"].reason == "eliminated"
    assert r.tags["FW-F1"].normalised_adjustment > 0  # read high: measured − reconciled > 0
    _check_z(r)
    # tags at or below the redundancy floor have no z: the deaerator-outlet and drain thermometers
    low = [t for t in r.tags.values() if t.valid and t.redundancy <= REDUNDANCY_FLOOR]
    assert {"HP-VO-P1", "H1-DR-T1", "H7-DR-T1"} <= {t.tag for t in low}
    assert not any(t.suspect and t.reason != "eliminated" for t in low)


def test_lp_line_has_a_factor_for_the_measured_group_and_one_for_the_wet_groups(setting):
    _, rec, _ = setting
    groups = rec.system.line_groups
    assert groups["lp1_group"] == ("LP", ("lp1",))  # superheated in and out, p and T measured
    assert groups["LP_line"] == ("LP", ("lp2", "lp3", "lp4"))
    names = {r.name for r in rec.system.soft}
    assert "lp1.expansion" not in names and "lp2.expansion" in names
    assert {"lp1_group.level", "LP_line.level"} <= names


def test_soft_share_and_model_based_without_the_generator_power(setting):
    _, rec, truth = setting
    rec.reset()
    r = rec.reconcile(truth)
    assert r.converged
    for name in (*LP_KPIS, "gross_efficiency", "turbine_heat_rate"):
        e = r.kpis[name]
        assert e.status == "reconciled" and e.available, name
        assert 0.0 <= e.soft_share < MODEL_BASED_SHARE, (name, e.soft_share)
    # the turbine-cycle balance KPIs are instrument-driven; the LP end point leans on the
    # exhaust-loss curve
    assert r.kpis["gross_efficiency"].soft_share < 0.2
    assert r.kpis["section_efficiency.LP"].soft_share > r.kpis["gross_efficiency"].soft_share
    lost = {t: v for t, v in truth.items() if t not in ("GEN-MW1", "GEN-MW2")}
    rec.reset()
    r2 = rec.reconcile(lost, excluded={"GEN-MW1": "bad_quality", "GEN-MW2": "bad_quality"})
    assert r2.converged
    for name in LP_KPIS:
        e = r2.kpis[name]
        assert e.available and e.status == "model_based", (name, e.status, e.soft_share)
        assert e.uncertainty > 2.0 * r.kpis[name].uncertainty
    assert r2.unmeasured["LP_line.efficiency_factor"].status == "model_based"
    assert r2.unmeasured["lp1_group.efficiency_factor"].status == "reconciled"


def test_estimate_status_defaults_and_validation():
    assert Estimate().status == "unavailable"
    assert Estimate(1.0, 0.1, True).status == "reconciled"
    assert math.isnan(Estimate(1.0, 0.1, True).soft_share)
    with pytest.raises(ValueError, match="status"):
        Estimate(1.0, 0.1, True, status="guessed")


def test_reconcile_json_reports_z_status_and_soft_share(tmp_path, setting):
    cfg, _, truth = setting
    values = noisy_readings(truth, cfg, np.random.default_rng(8), bias={"FW-F1": 0.05 * truth["FW-F1"]})
    sensors = {s.tag: s for s in cfg.sensors}
    path = tmp_path / "values.json"
    path.write_text(json.dumps({t: float(sensors[t].conversion.from_si(v)) for t, v in values.items()}))
    out = subprocess.run([sys.executable, "-m", "twin.cli", "reconcile", "configs/demo-u1.toml", str(path), "--json"],
                         capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    r = json.loads(out.stdout)
    for tag, t in r["tags"].items():
        z = t["normalised_adjustment"]
        if t["redundancy"] is None or t["redundancy"] <= REDUNDANCY_FLOOR:
            assert z is None, tag
        elif z is not None and abs(z) > 1e-6:
            assert (z > 0) == (t["adjustment"] > 0), tag
    for k, e in r["kpis"].items():
        assert e["status"] in ("reconciled", "model_based", "unavailable"), k
        assert e["soft_share"] is None or 0.0 <= e["soft_share"] <= 1.0, k
    assert r["kpis"]["section_efficiency.LP"]["status"] == "reconciled"
