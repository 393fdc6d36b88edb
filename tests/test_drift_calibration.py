"""Drift charts calibrated on the unit's own steady windows: reference period, overlap, state, run lengths."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from twin.config.schema import DriftConfig
from twin.monitor.drift import (
    DriftBank,
    DriftSettings,
    chart_signals,
    cusum_step,
    ewma_step,
    reference_estimate,
)

DEFAULTS = DriftConfig()
PARAMS = DriftSettings(0.0, 1.0, DEFAULTS.ewma_lambda, DEFAULTS.ewma_L, DEFAULTS.cusum_k, DEFAULTS.cusum_h)


def test_reference_period_sets_target_and_moving_range_sigma() -> None:
    """μ0 = mean and σ = mean |Δx| / 1.128 (Montgomery, individuals chart [memory]), worked by hand."""
    ref = [0.010, 0.012, 0.009, 0.011, 0.013, 0.010, 0.008, 0.012, 0.011, 0.010]
    mr = [0.002, 0.003, 0.002, 0.002, 0.003, 0.002, 0.004, 0.001, 0.001]  # |differences|, by hand
    bank = DriftBank(learn=["hp"], params=PARAMS, reference_windows=10)
    for k, x in enumerate(ref[:-1]):
        st = bank.update({"hp": x}, True, 30.0 * (k + 1))["hp"]
        assert st.phase == "learning" and st.count == k + 1 and not st.alarm
    st = bank.update({"hp": ref[-1]}, True, 300.0)["hp"]
    assert st.phase == "monitoring"
    m = bank["hp"]
    assert m.target == pytest.approx(0.0106, abs=1e-12)
    assert m.sigma == pytest.approx(sum(mr) / 9 / 1.128, rel=1e-9)
    # a flat reference (a frozen signal) gives no chart: it keeps learning
    flat = DriftBank(learn=["hr"], params=PARAMS, reference_windows=10)
    for k in range(30):
        assert flat.update({"hr": 2.19}, True, 30.0 * (k + 1))["hr"].phase == "learning"


def test_only_steady_non_overlapping_windows_are_used() -> None:
    """30 s windows closed every 10 s: one window in three enters the charts (DOMAIN.md §5)."""
    bank = DriftBank(learn=["hp"], params=PARAMS, reference_windows=50)
    used = 0
    for k in range(1, 31):
        t_end = 10.0 * k
        st = bank.update({"hp": 0.01 * math.sin(k)}, True, t_end, window_start=t_end - 30.0)["hp"]
        used += st.used
    assert used == 10 and bank.skipped_overlapping == 20
    assert len(bank.reference["hp"]) == 10
    # unsteady and NaN windows never enter
    assert not bank.update({"hp": 0.5}, False, 400.0, window_start=370.0)["hp"].used
    assert not bank.update({"hp": math.nan}, True, 500.0, window_start=470.0)["hp"].used
    assert len(bank.reference["hp"]) == 10


def test_snapshot_is_json_and_restores_the_same_charts() -> None:
    rng = np.random.default_rng(3)
    xs = rng.normal(0.002, 0.001, 80)
    a = DriftBank(learn=["hp", "hr"], params=PARAMS, reference_windows=20)
    for k, x in enumerate(xs[:50]):
        a.update({"hp": x, "hr": 2 * x}, True, 30.0 * (k + 1))
    b = DriftBank(learn=["hp", "hr"], params=PARAMS, reference_windows=20)
    b.restore(json.loads(json.dumps(a.snapshot())))
    for k, x in enumerate(xs[50:], start=50):
        sa = a.update({"hp": x + 0.003, "hr": 2 * x}, True, 30.0 * (k + 1))
        sb = b.update({"hp": x + 0.003, "hr": 2 * x}, True, 30.0 * (k + 1))
        assert sa == sb
    assert a.statuses()["hp"].alarm  # a 3σ step is found after the restart too
    with pytest.raises(ValueError, match="version"):
        b.restore({"version": 99})


def test_reset_relearns_the_reference() -> None:
    bank = DriftBank(learn=["hp"], params=PARAMS, reference_windows=10)
    for k in range(12):
        bank.update({"hp": 0.001 * (k % 3)}, True, 30.0 * (k + 1))
    assert bank.statuses()["hp"].phase == "monitoring"
    bank.reset(["hp"])  # restart the chart, keep μ0 and σ
    assert bank.statuses()["hp"].phase == "monitoring" and bank["hp"].count == 0
    bank.reset(relearn=True)
    assert bank.statuses()["hp"].phase == "learning" and bank.reference["hp"] == []
    with pytest.raises(KeyError):
        bank.reset(["nope"])


def _run_lengths(runs: int, shift_sigmas: float, rng: np.random.Generator, max_t: int = 30_000) -> np.ndarray:
    """Run lengths of the configured EWMA + CUSUM pair after a learned reference period.

    Each chart first learns μ0 and σ from ``reference_windows`` in-control
    windows N(0, 1), as :class:`DriftBank` does, then watches N(shift, 1).
    """
    p = PARAMS
    mu, sig = reference_estimate(rng.standard_normal((runs, DEFAULTS.reference_windows)))
    z, ch, cl = mu.copy(), np.zeros(runs), np.zeros(runs)
    rl = np.full(runs, max_t)
    alive = np.ones(runs, dtype=bool)
    for t in range(1, max_t + 1):
        x = rng.standard_normal(runs) + shift_sigmas
        z = ewma_step(z, x, p.lam)
        ch, cl = cusum_step(ch, cl, x, mu, p.k * sig)
        eu, ed, cu, cd = chart_signals(z, t, ch, cl, mu, sig, p.lam, p.L, p.h)
        hit = (eu | ed | cu | cd) & alive
        rl[hit] = t
        alive &= ~hit
        if not alive.any():
            break
    return rl


@pytest.mark.slow
def test_in_control_run_length_and_a_one_point_hp_step() -> None:
    """Monte Carlo truth: in-control ARL ≥ 500 used windows with the learned μ0, σ; 1σ and 1-point steps.

    Montgomery (Introduction to Statistical Quality Control [memory]) tabulates the
    known-parameter ARLs (EWMA λ = 0.1, L = 2.814 ≈ 500; CUSUM k = 0.5, h = 5 ≈ 465);
    here both charts run together and μ0, σ are estimated, which shortens the
    in-control run length, hence the wider limits of the defaults.
    """
    rng = np.random.default_rng(2024)
    rl0 = _run_lengths(4000, 0.0, rng)
    arl0 = float(rl0.mean())
    rl1 = _run_lengths(4000, 1.0, rng)
    # σ of HP efficiency, bounded above by the design-point uncertainty of the demo unit
    # (U95 ≈ 0.75 point, all of it taken as window-to-window noise): 1 point ≥ 2.6 σ
    rl_hp = _run_lengths(4000, 0.01 / (0.0075 / 1.96), rng)
    print(f"in-control ARL {arl0:.0f} (median {np.median(rl0):.0f}); 1σ step ARL {rl1.mean():.1f}; "
          f"1-point HP step ARL {rl_hp.mean():.2f}, 95 % signalled within {np.quantile(rl_hp, 0.95):.0f} windows")
    assert arl0 >= 500
    assert rl1.mean() <= 15
    assert rl_hp.mean() <= 4 and np.quantile(rl_hp, 0.95) <= 6
