"""Steady-state detection (Cao & Rhinehart R-statistic)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from twin.monitor.steady import (
    INSUFFICIENT_DATA,
    STEADY,
    TRANSIENT,
    RStatistic,
    SteadyStateDetector,
    r_statistic_series,
)


def _looped(x: np.ndarray, **kw) -> np.ndarray:
    """R after each sample of every column, through the scalar RStatistic."""
    out = np.full(x.shape, np.nan)
    for j in range(x.shape[1]):
        s = RStatistic(**kw)
        out[:, j] = [s.update(v) for v in x[:, j]]
    return out


def _vectorised(x: np.ndarray, **kw) -> np.ndarray:
    return r_statistic_series(x, **kw)


IMPLEMENTATIONS = [
    pytest.param(_looped, id="looped"),
    pytest.param(_vectorised, id="vectorised"),
]


@pytest.mark.parametrize("r_of", IMPLEMENTATIONS)
def test_r_distribution_for_white_noise_matches_cao_rhinehart(r_of):
    # Monte Carlo truth: independent white-noise series, R sampled long after
    # start-up. Cao & Rhinehart (1995) report for λ1=0.2, λ2=λ3=0.1 a median
    # near 1 and critical values about 1.44 (α=0.05) and 1.7-1.8 (α=0.01)
    # (values from the paper, from memory), hence the tolerant bands.
    rng = np.random.default_rng(19950601)
    n_series = 300 if r_of is _looped else 3000
    x = rng.normal(50.0, 2.0, size=(200, n_series))
    r = r_of(x)[80::20].ravel()  # samples 20 apart are nearly independent
    assert np.median(r) == pytest.approx(1.0, abs=0.06)
    assert 1.2 <= np.percentile(r, 95) <= 1.7
    assert 1.45 <= np.percentile(r, 99) <= 2.1


def test_implementations_agree_sample_by_sample_with_gaps():
    rng = np.random.default_rng(7)
    x = rng.normal(size=(120, 4))
    x[rng.random(x.shape) < 0.1] = np.nan
    np.testing.assert_allclose(_looped(x), _vectorised(x), rtol=1e-12, equal_nan=True)


def test_noiseless_ramp_gives_analytic_limit():
    # For x_i = a·i the mean filter lags by a/λ1 before each update, so
    # ν²_f → (a/λ1)², δ²_f → a² and R → (2 − λ1)/λ1² (derived from the filter
    # equations of Cao & Rhinehart 1995): 45 for λ1 = 0.2.
    s = RStatistic()
    for i in range(400):
        r = s.update(3.0 * i)
    assert r == pytest.approx((2.0 - 0.2) / 0.2**2, rel=1e-6)


def test_step_and_ramp_detected_within_a_few_samples():
    # Monte Carlo: after warm-up on white noise (σ = 1), a 5σ step or a ramp of
    # 0.5σ per sample must push R above the 99 % critical value (1.7, from
    # memory, Cao & Rhinehart 1995) within a few samples in nearly every run.
    rng = np.random.default_rng(3)
    n, runs, k0 = 60, 2000, 40
    noise = rng.normal(size=(n, runs))
    i = np.arange(n)[:, None]
    step = noise + np.where(i >= k0, 5.0, 0.0)
    ramp = noise + np.where(i >= k0, 0.5 * (i - k0 + 1), 0.0)
    for x, within in ((step, 5), (ramp, 10)):
        r = r_statistic_series(x)
        hit = (r[k0 : k0 + within] > 1.7).any(axis=0)
        assert hit.mean() > 0.95
    # Without the disturbance the same window rarely trips (≈ 1 % per sample).
    r = r_statistic_series(noise)
    assert (r[k0 : k0 + 5] > 1.7).any(axis=0).mean() < 0.15


def test_flat_signal_without_a_noise_floor_passes_r_and_warmup_reports_insufficient_data():
    # R alone calls a flat signal steady (0/0 -> 0); the frozen check (noise_floor) is off here
    det = SteadyStateDetector(["p"], hold_windows=1, warmup=5)
    statuses = [det.update({"p": 10.0}, t).status for t in range(8)]
    # first sample + 4 updates are not warmed up; the 6th sample (5th update) is
    assert statuses == [INSUFFICIENT_DATA] * 5 + [STEADY] * 3
    assert det.r_values["p"] == 0.0


def test_hold_windows_requires_consecutive_passing_windows():
    rng = np.random.default_rng(11)
    det = SteadyStateDetector(["a", "b"], r_critical=1.4, hold_windows=4)
    run = 0
    seen_steady = seen_break = False
    for t in range(400):
        v = det.update({"a": rng.normal(), "b": rng.normal(5.0, 0.1)}, 10.0 * t)
        warm = all(math.isfinite(r) for r in v.r.values())
        passing = warm and all(r < 1.4 for r in v.r.values())
        run = run + 1 if passing else 0
        assert v.steady == (run >= 4)
        assert v.status == (STEADY if run >= 4 else (TRANSIENT if warm else INSUFFICIENT_DATA))
        seen_steady |= v.steady
        seen_break |= warm and not passing
    assert seen_steady and seen_break


def test_hold_seconds_counts_window_time_from_first_passing_window():
    det = SteadyStateDetector(["p"], hold_seconds=60.0, warmup=2)
    times = [0.0, 10.0, 20.0, 45.0, 70.0, 79.0, 80.0, 200.0]
    out = [det.update({"p": 1.0}, t) for t in times]
    # warm after the 3rd sample (t=20): candidate since 20, steady from t >= 80
    assert [v.steady for v in out] == [False, False, False, False, False, False, True, True]
    assert out[3].candidate_since == 20.0
    assert [v.status for v in out[:3]] == [INSUFFICIENT_DATA, INSUFFICIENT_DATA, TRANSIENT]


def test_missing_sample_breaks_hold_but_does_not_poison_filters():
    rng = np.random.default_rng(5)
    x = rng.normal(size=200)
    det = SteadyStateDetector(["f"], hold_windows=1)
    ref = RStatistic()
    for t, v in enumerate(x):
        if t % 17 == 5:
            verdict = det.update({"f": math.nan}, t)
            assert verdict.status == INSUFFICIENT_DATA and not verdict.steady
            verdict = det.update({}, t)  # an absent key counts as missing too
            assert verdict.failing == ("f",)
            continue
        verdict = det.update({"f": float(v)}, t)
        assert verdict.r["f"] == ref.update(v) or (math.isnan(verdict.r["f"]) and math.isnan(ref.r))


def test_per_signal_critical_values_and_transient_reason():
    det = SteadyStateDetector(["a", "b"], r_critical={"a": 1e9, "b": 1.7}, hold_windows=1)
    for t in range(60):
        v = det.update({"a": float(t), "b": 1.0 + 2.0 * t}, t)  # both ramps
    assert v.status == TRANSIENT and v.failing == ("b",)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"signals": []}, "at least one"),
        ({"signals": ["a", "a"], "hold_windows": 1}, "duplicates"),
        ({"signals": ["a"]}, "exactly one"),
        ({"signals": ["a"], "hold_windows": 1, "hold_seconds": 5.0}, "exactly one"),
        ({"signals": ["a"], "hold_windows": 0}, "hold_windows"),
        ({"signals": ["a"], "hold_windows": 1, "lambdas": (0.2, 0.0, 0.1)}, "lambda2"),
        ({"signals": ["a"], "hold_windows": 1, "r_critical": {"b": 1.5}}, "unknown"),
    ],
)
def test_bad_arguments_raise(kwargs, match):
    with pytest.raises(ValueError, match=match):
        SteadyStateDetector(**kwargs)


def test_time_must_not_go_backwards():
    det = SteadyStateDetector(["a"], hold_windows=1)
    det.update({"a": 1.0}, 100.0)
    with pytest.raises(ValueError, match="backwards"):
        det.update({"a": 1.0}, 99.0)
