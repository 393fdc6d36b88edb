"""KPI uncertainty of a reconciled demo-u1 window against brute-force propagation.

The truth here does not use the KPI definitions' column lists nor the nudged property
states the reconciler propagates through: the gradient of every KPI is taken by central
differences over *every* variable of the state, each a fresh property evaluation, and
propagated through the reconciled covariance, U95 = 1.96·sqrt(gᵀ C g) (linear
propagation, GUM (JCGM 100:2008) eq. 13). A column listed twice in a definition (the
a flow read by two terms of the net efficiency) once doubled its share of the
variance; this test would have shown it.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from twin.config import load_config
from twin.demo.plant import sensor_truth
from twin.model.flowsheet import Flowsheet
from twin.model.solve import Operation, solve_design, solve_off_design
from twin.performance.plant import K95
from twin.performance.plant_reconcile import PlantReconciler

CONFIGS = ("configs/demo-u1.toml", "configs/example-small.toml")


@pytest.fixture(scope="module", params=CONFIGS)
def window(request):
    cfg = load_config(request.param)
    fs = Flowsheet.from_config(cfg)
    op = Operation.from_config(cfg)
    design = solve_design(fs, op)
    hb = solve_off_design(fs, op, design, 0.8, "sliding")
    rec = PlantReconciler(cfg, flowsheet=fs, design=design)
    truth = {t: v for t, v in sensor_truth(cfg, hb).items() if t in rec.system.sensor_by_tag}
    r = rec.reconcile(truth)
    assert r.converged, r.message
    return rec, r


def _brute_force_u95(rec, r, d) -> float:
    z = np.where(np.isfinite(r.z), r.z, rec.warm_start)
    cov = r.cov
    grad = np.zeros(z.size)
    for c in range(z.size):
        step = 1e-6 * max(abs(z[c]), 1.0)
        up, down = z.copy(), z.copy()
        up[c] += step
        down[c] -= step
        try:
            grad[c] = (d.func(rec.system.context(up)) - d.func(rec.system.context(down))) / (2 * step)
        except (ValueError, ArithmeticError):
            grad[c] = math.nan
    used = np.flatnonzero(np.abs(grad) > 0)
    g = grad[used]
    C = cov[np.ix_(used, used)]
    assert np.all(np.isfinite(g)) and np.all(np.isfinite(C)), d.name
    return K95 * math.sqrt(max(float(g @ C @ g), 0.0))


def test_every_kpi_uncertainty_equals_full_state_propagation(window):
    rec, r = window
    checked = 0
    for d in rec.kpi_defs:
        est = r.kpis.get(d.name)
        if est is None or not est.available or not math.isfinite(est.uncertainty):
            continue
        u_true = _brute_force_u95(rec, r, d)
        # central differences on both sides: agreement to 1e-3 relative leaves room
        # only for rounding in the property routines, not for a factor √2
        assert est.uncertainty == pytest.approx(u_true, rel=1e-3, abs=1e-12 * max(1.0, abs(est.value))), d.name
        checked += 1
    assert checked >= 10


def test_a_column_listed_twice_is_counted_once():
    """example-small's net efficiency reads the main-steam flow in two terms."""
    cfg = load_config("configs/example-small.toml")
    fs = Flowsheet.from_config(cfg)
    design = solve_design(fs, Operation.from_config(cfg))
    rec = PlantReconciler(cfg, flowsheet=fs, design=design)
    twice = [d for d in rec.kpi_defs if len(d.columns) > len(set(d.columns))]
    assert twice, "no KPI lists a column twice any more: the case this guards against is gone"
    truth = {t: v for t, v in sensor_truth(cfg, design).items() if t in rec.system.sensor_by_tag}
    r = rec.reconcile(truth)
    for d in twice:
        assert r.kpis[d.name].uncertainty == pytest.approx(_brute_force_u95(rec, r, d), rel=1e-3), d.name
