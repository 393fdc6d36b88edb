"""Analytic KPI gradients against central differences, and the KPI uncertainties they give.

References: every KPI's gradient (``KpiDef.grad``, :mod:`twin.performance.kpi_gradient`) is
compared with central differences of the KPI over *every* variable of the state, each side
a fresh context (fresh IF97 property evaluations, no cached or nudged states): the
brute-force reference. The uncertainties the reconciler reports are compared with the
central differences over nudged contexts it used before (``PlantReconciler._kpi_estimate``,
still the path of a definition without a gradient), window by window.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from twin.config import load_config
from twin.demo.plant import noisy_readings, sensor_truth
from twin.model.flowsheet import Flowsheet
from twin.model.solve import Operation, solve_design, solve_off_design
from twin.performance.kpi import CyclePerformanceSettings, kpi_definitions
from twin.performance.kpi_gradient import interpolation_slope
from twin.performance.plant_reconcile import PlantReconciler

CONFIGS = ("configs/demo-u1.toml", "configs/example-small.toml")


@pytest.fixture(scope="module", params=CONFIGS)
def plant(request):
    cfg = load_config(request.param)
    fs = Flowsheet.from_config(cfg)
    op = Operation.from_config(cfg)
    design = solve_design(fs, op)
    rec = PlantReconciler(cfg, flowsheet=fs, design=design)
    hb = solve_off_design(fs, op, design, 0.83, "sliding")
    truth = {t: v for t, v in sensor_truth(cfg, hb).items() if t in rec.system.sensor_by_tag}
    r = rec.reconcile(noisy_readings(truth, cfg, np.random.default_rng(7)))
    assert r.converged, r.message
    return cfg, fs, hb, rec, r


def _fresh_central_differences(defs, z, fresh):
    """d KPI / d z_c for every column c, each side of the difference a fresh context."""
    out = {d.name: np.zeros(z.size) for d in defs}
    for c in range(z.size):
        step = 1e-6 * max(abs(z[c]), 1.0)
        up, down = z.copy(), z.copy()
        up[c] += step
        down[c] -= step
        cu, cd = fresh(up), fresh(down)  # one fresh context per side, shared by the KPIs
        for d in defs:
            out[d.name][c] = (d.func(cu) - d.func(cd)) / (2 * step)
    return out


def _check_gradients(defs, z, fresh, *, within_columns: bool) -> int:
    fd = _fresh_central_differences(defs, z, fresh)
    base = fresh(z)
    scale = np.maximum(np.abs(z), 1.0)  # compare d KPI per relative change of each variable
    checked = 0
    for d in defs:
        assert d.grad is not None, d.name
        g = np.zeros(z.size)
        for c, v in d.grad(base).items():
            g[c] += v
        ref = fd[d.name]
        size = float(np.max(np.abs(ref * scale)))
        if size == 0.0:  # a KPI flat here (e.g. quality of a superheated exhaust, clipped at 1)
            assert not np.any(g), d.name
            continue
        assert np.max(np.abs((g - ref) * scale)) <= 1e-6 * size, d.name
        if within_columns:  # what the reconciler propagates over: the declared columns hold the whole gradient
            outside = np.setdiff1d(np.flatnonzero(np.abs(ref * scale) > 1e-9 * size), d.columns)
            assert outside.size == 0, (d.name, outside)
        checked += 1
    return checked


def test_reconciler_kpi_gradients_equal_fresh_central_differences(plant):
    """The reconciliation's KPIs (cooling-water temperatures as state columns) at a reconciled window."""
    _, fs, _, rec, r = plant
    z = np.where(np.isfinite(r.z), r.z, rec.warm_start)
    checked = _check_gradients(rec.kpi_defs, z, lambda zz: fs.context(zz, rec.system.constants), within_columns=True)
    assert checked >= 10


def test_forward_model_kpi_gradients_equal_fresh_central_differences(plant):
    """The expected model's KPIs (cooling water from the design flow and duty) at an off-design solution."""
    cfg, fs, hb, _, _ = plant
    defs = kpi_definitions(fs, CyclePerformanceSettings.from_config(cfg))
    checked = _check_gradients(defs, hb.z, lambda zz: fs.context(zz, hb.constants), within_columns=False)
    assert checked >= 10


def test_kpi_uncertainties_equal_the_nudged_central_differences(plant, monkeypatch):
    """Window by window: same values and status; U and the soft-relation share as before to 1e-7."""
    cfg, _, hb, rec, _ = plant
    truth = {t: v for t, v in sensor_truth(cfg, hb).items() if t in rec.system.sensor_by_tag}
    seen = {}
    batched = rec._kpis

    def keep(z, cov, names=None, share=None):  # the arguments the window's KPIs were propagated with
        seen.update(z=z, cov=cov, share=share)
        return batched(z, cov, names, share)

    monkeypatch.setattr(rec, "_kpis", keep)
    rng = np.random.default_rng(11)
    compared = 0
    for _ in range(3):
        r = rec.reconcile(noisy_readings(truth, cfg, rng))
        assert r.converged, r.message
        z, cov, share = seen["z"], seen["cov"], seen["share"]
        base = rec.system.context(z)
        shifted: dict = {}
        for d in rec.kpi_defs:
            new, old = r.kpis[d.name], rec._kpi_estimate(d, z, cov, base, shifted, share)
            assert old.available == new.available, d.name
            if not old.available:
                continue
            assert new.value == old.value and new.status == old.status, d.name
            assert new.uncertainty == pytest.approx(old.uncertainty, rel=1e-7, abs=1e-15), d.name
            assert new.soft_share == pytest.approx(old.soft_share, rel=1e-7, abs=1e-12, nan_ok=True), d.name
            compared += 1
    assert compared >= 30


@pytest.mark.parametrize("x, slope", [(0.1, 0.0), (0.5, 1.0), (1.0, 0.5 * (1.0 + 0.0)), (1.5, 0.0), (0.75, 1.0)])
def test_interpolation_slope_is_the_central_difference_of_np_interp(x, slope):
    """np.interp held flat outside the table; at a knot the mean of the one-sided slopes (as a central difference)."""
    table = ((0.25, 0.5), (1.0, 1.25))  # slope 1 inside, flat outside
    assert interpolation_slope(table, x) == pytest.approx(slope)
    h = 1e-7
    ys = [float(np.interp(v, *zip(*table, strict=True))) for v in (x + h, x - h)]
    assert (ys[0] - ys[1]) / (2 * h) == pytest.approx(slope, abs=1e-6)
    assert math.isnan(interpolation_slope((), x))
