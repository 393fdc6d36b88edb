"""Monte Carlo truth for the plant reconciliation of demo-u1 (DOMAIN notes §4).

Truth: the forward model at 90 % load. Each run draws every instrument with
σ = U95/1.96 of its configured uncertainty (VDI 2048) and every model
relation's pseudo-measurement with its stated σ, reconciles, and records the
results. With N ≥ 2000 runs (two worker processes):

- the empirical covariance of the reconciled values matches the linearised one;
- the global test rejects about α = 5 % of consistent windows;
- the measurement test's power for a 5 σ bias on the main feedwater flow
  matches Φ(k√h − z_c) + Φ(−k√h − z_c) (Narasimhan & Jordache 2000, §7.3);
- the LP exhaust quality and LP efficiency fall inside their reported 95 %
  interval of the truth in about 95 % of runs.
"""

from __future__ import annotations

import os
from concurrent.futures import ProcessPoolExecutor

import numpy as np
import pytest
from scipy import stats

from tests.model_helpers import demo_config, demo_design
from twin.demo.plant import sensor_truth
from twin.model.solve import solve_off_design
from twin.performance.kpi import CyclePerformanceSettings, evaluate_kpis, kpi_definitions
from twin.performance.plant_reconcile import PlantReconciler
from twin.reconcile import REDUNDANCY_FLOOR, detection_power, sidak_critical

N_RUNS = 2000
LOAD = 0.9
BIASED = "FW-F1"
KPIS = ("exhaust_quality_ueep", "section_efficiency.LP")

_state: dict = {}


def _setup():
    if not _state:
        cfg = demo_config()
        fs, op, design = demo_design()
        hb = solve_off_design(fs, op, design, LOAD, "sliding")
        rec = PlantReconciler(cfg, flowsheet=fs, design=design, max_eliminations=0)
        truth = {t: v for t, v in sensor_truth(cfg, hb).items() if t in rec.system.sensor_by_tag}
        kpis = evaluate_kpis(kpi_definitions(fs, CyclePerformanceSettings.from_config(cfg)), hb.context())
        _state.update(cfg=cfg, rec=rec, truth=truth, kpis=kpis)
    return _state


def _runs(args: tuple[int, int, float]) -> dict[str, np.ndarray]:
    """``n`` reconciliations with seed ``seed``; a bias of ``k`` σ on the biased tag."""
    seed, n, k = args
    s = _setup()
    rec, truth = s["rec"], s["truth"]
    tags = list(truth)
    # σ as the reconciler states it (VDI 2048 U95/1.96, with its floor at a zero reading)
    sig = np.array([rec.sigma(t, truth[t]) for t in tags])
    soft = rec.system.soft
    rng = np.random.default_rng(seed)
    x_hat = np.full((n, len(tags)), np.nan)
    gamma = np.full(n, np.nan)
    dof = np.zeros(n, int)
    z_b = np.full(n, np.nan)
    top = np.zeros(n, bool)
    kval = np.full((n, len(KPIS)), np.nan)
    kunc = np.full((n, len(KPIS)), np.nan)
    ib = tags.index(BIASED)
    for i in range(n):
        y = np.array([truth[t] for t in tags]) + sig * rng.standard_normal(len(tags))
        y[ib] += k * sig[ib]
        pseudo = {r.name: r.sigma * rng.standard_normal() for r in soft}
        r = rec.reconcile(dict(zip(tags, y, strict=True)), kpis=KPIS if k == 0 else (), pseudo=pseudo)
        if not r.converged:
            continue
        x_hat[i] = [r.tags[t].reconciled for t in tags]
        gamma[i], dof[i] = r.global_test, r.dof
        zs = np.array([abs(r.tags[t].normalised_adjustment) for t in tags])
        z_b[i] = zs[ib]
        top[i] = bool(np.nanargmax(zs) == ib)
        for j, name in enumerate(KPIS if k == 0 else ()):
            kval[i, j] = r.kpis[name].value
            kunc[i, j] = r.kpis[name].uncertainty
    return {"x_hat": x_hat, "gamma": gamma, "dof": dof, "z_b": z_b, "top": top, "kval": kval, "kunc": kunc}


def _monte_carlo(k: float, seed: int) -> dict[str, np.ndarray]:
    workers = 2
    chunks = [(seed + w, N_RUNS // workers, k) for w in range(workers)]
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    _setup()  # build before forking, so the workers inherit the model
    with ProcessPoolExecutor(max_workers=workers) as pool:
        parts = list(pool.map(_runs, chunks))
    return {key: np.concatenate([p[key] for p in parts]) for key in parts[0]}


@pytest.fixture(scope="module")
def unbiased():
    return _monte_carlo(0.0, 1000)


@pytest.fixture(scope="module")
def linearised():
    """Covariance, redundancy and KPI uncertainty from one noiseless reconciliation at the truth."""
    s = _setup()
    rec = s["rec"]
    rec.reset()
    r = rec.reconcile(s["truth"], kpis=KPIS)
    tags = list(s["truth"])
    cols = [rec.system.sensor_by_tag[t].column for t in tags]
    return {"cov": r.cov[np.ix_(cols, cols)], "redundancy": {t: r.tags[t].redundancy for t in tags},
            "n_redundant": sum(1 for t in tags if r.tags[t].redundancy > REDUNDANCY_FLOOR), "dof": r.dof}


@pytest.mark.slow
def test_reconciled_covariance_matches_the_linearised_one(unbiased, linearised):
    ok = np.all(np.isfinite(unbiased["x_hat"]), axis=1)
    # known limitation: a few percent of noisy windows end without convergence (reported as
    # such, with no numbers); measured 3 % at 90 % load
    print(f"converged in {ok.mean():.1%} of {ok.size} runs")
    assert ok.mean() > 0.95
    # the make-up flow is zero in this truth: at m = 0 its m·h terms vanish and the
    # linearisation there is degenerate (reconciled values stay pinned at 0), so zero-valued
    # tags are left out of the comparison
    keep = np.array([abs(v) > 1e-9 for v in _setup()["truth"].values()])
    x = unbiased["x_hat"][ok][:, keep]
    emp = np.var(x, axis=0, ddof=1)
    lin = np.diag(linearised["cov"])[keep]
    ratio = emp / lin
    # the mean variance ratio within 5 %; each variance within its 99.9 % chi-square
    # sampling band widened by 5 % for the linearisation (thermometers near saturation read
    # a blended T, and the few unconverged windows are left out)
    n = x.shape[0]
    lo, hi = stats.chi2.ppf([0.0005, 0.9995], n - 1) / (n - 1)
    tags = [t for t, k in zip(_setup()["truth"], keep, strict=True) if k]
    worst = sorted(zip(np.abs(ratio - 1.0), tags, ratio, strict=True), reverse=True)[:5]
    print("largest variance ratios:", [(t, round(float(r), 3)) for _, t, r in worst])
    assert abs(np.mean(ratio) - 1.0) < 0.05
    assert np.all((ratio > lo * 0.95) & (ratio < hi * 1.05)), worst
    # correlations: the largest discrepancy is within sampling error (SE ≈ 1/√n)
    d_emp = np.sqrt(emp)
    d_lin = np.sqrt(lin)
    c_emp = np.cov(x, rowvar=False) / np.outer(d_emp, d_emp)
    c_lin = linearised["cov"][np.ix_(keep, keep)] / np.outer(d_lin, d_lin)
    assert np.max(np.abs(c_emp - c_lin)) < 5.5 / np.sqrt(n)


@pytest.mark.slow
def test_global_test_false_alarm_rate_is_alpha(unbiased, linearised):
    g = unbiased["gamma"][np.isfinite(unbiased["gamma"])]
    crit = stats.chi2.ppf(0.95, linearised["dof"])
    rate = float(np.mean(g > crit))
    assert 0.035 <= rate <= 0.065, rate  # 5 % ± 1.5 %


@pytest.mark.slow
def test_kpi_intervals_cover_the_truth(unbiased):
    truth = _setup()["kpis"]
    for j, name in enumerate(KPIS):
        v, u = unbiased["kval"][:, j], unbiased["kunc"][:, j]
        ok = np.isfinite(v) & np.isfinite(u)
        cover = float(np.mean(np.abs(v[ok] - truth[name]) <= u[ok]))
        assert 0.93 <= cover <= 0.97, (name, cover)


@pytest.mark.slow
def test_power_for_a_five_sigma_bias_matches_the_analytic_power(linearised):
    k = 5.0
    res = _monte_carlo(k, 2000)
    zc = sidak_critical(0.05, linearised["n_redundant"])
    h = linearised["redundancy"][BIASED]
    expected = float(detection_power(k, h, zc))
    zb = res["z_b"][np.isfinite(res["z_b"])]
    power = float(np.mean(zb > zc))
    first = float(np.mean(res["top"][np.isfinite(res["z_b"])]))
    print(f"power {power:.3f} analytic {expected:.3f} ranked first {first:.3f} (h={h:.3f}, z_c={zc:.3f})")
    assert abs(power - expected) <= 0.05
    assert first >= 0.8 * power  # a well-redundant tag is usually the top suspect when detected
