"""The steady-state gate: frozen signals, hysteresis, step test, first verdict, state.

The rates printed here (run with ``-s``) are the ones in the README's
"Steady state" paragraph. Truth is Monte Carlo: white noise, ramps and steps
drawn here, with the disturbance known exactly.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest

from twin.config import load_config
from twin.monitor.steady import (
    FROZEN,
    INSUFFICIENT_DATA,
    STEADY,
    TRANSIENT,
    SteadyStateDetector,
    steady_detector,
)

DEMO = Path(__file__).resolve().parents[1] / "configs" / "demo-u1.toml"

# the demo's gate settings (configs/demo-u1.toml [monitoring]) and the defaults
DEMO_GATE = {"lambdas": (0.3, 0.3, 0.3), "r_critical": 2.65, "r_exit": 6.0, "jump_critical": 100.0}
DEFAULT_GATE = {"lambdas": (0.2, 0.1, 0.1), "r_critical": 2.0, "r_exit": 3.0, "jump_critical": 25.0}


def _gate_series(x: np.ndarray, hold_windows: int = 2, **kw) -> np.ndarray:
    """Steady verdict after each window (rows) of every column of ``x``."""
    out = np.zeros(x.shape, dtype=bool)
    for j in range(x.shape[1]):
        det = SteadyStateDetector(["s"], hold_windows=hold_windows, warmup=5, **kw)
        for i in range(x.shape[0]):
            out[i, j] = det.update({"s": float(x[i, j])}, 10.0 * i).steady
    return out


# ------------------------------------------------------------------ frozen ---
def test_stuck_transmitter_is_frozen_not_steady_and_named():
    # Monte Carlo truth: white noise (σ = 1) until window 40, then the reading
    # sticks at its last value (spread 0 within each window).
    rng = np.random.default_rng(42)
    det = SteadyStateDetector(["a", "b"], hold_windows=2, warmup=5, noise_floor=0.01, frozen_windows=3)
    verdicts = []
    stuck = math.nan
    for i in range(60):
        a = float(rng.normal()) if i < 40 else stuck
        stuck = a
        spreads = {"a": 1.0 if i < 40 else 0.0, "b": 1.0}
        verdicts.append(det.update({"a": a, "b": float(rng.normal())}, 10.0 * i, spreads=spreads))
    assert verdicts[39].steady
    # the first two flat windows are not yet "several"; the third is frozen
    assert [v.status for v in verdicts[40:42]] == [STEADY, STEADY]
    for v in verdicts[42:]:
        assert v.status == FROZEN and not v.steady
        assert v.frozen == ("a",) and "a" in v.failing
        assert v.r["a"] < 2.0  # R alone would have called the stuck signal steady
    assert det.frozen == ("a",)
    # the transmitter comes back: one window with spread above the floor unfreezes it
    v = det.update({"a": 0.3, "b": 0.1}, 600.0, spreads={"a": 1.0, "b": 1.0})
    assert v.frozen == () and v.status != FROZEN


def test_frozen_without_spreads_uses_successive_changes_and_a_tripped_unit():
    # A tripped unit: generator power reads exactly 0 MW; its floor is a fraction
    # of a percent-of-reading uncertainty, 0 at 0 MW, and a spread of 0 is "at" it.
    cfg = load_config(DEMO)
    det = steady_detector(cfg)
    assert det is not None
    rng = np.random.default_rng(1)
    sigma = {t: cfg.sensors_by_tag[t].sigma_si(v) / math.sqrt(10.0) for t, v in _design(cfg).items()}
    statuses = []
    for i in range(30):
        values = {t: v + sigma[t] * rng.normal() for t, v in _design(cfg).items()}
        if i >= 20:
            values["GEN-MW1"] = 0.0
        statuses.append(det.update(values, 10.0 * i))  # no spreads: |Δx|/√2
    assert statuses[19].status == STEADY
    assert statuses[20].status == TRANSIENT  # the trip itself is a step
    assert all(v.status == FROZEN and v.frozen == ("GEN-MW1",) for v in statuses[23:])


def _design(cfg) -> dict[str, float]:
    """Design values [SI] of the demo's key signals (from the plant file)."""
    ms = cfg.streams_by_id["main_steam"].design
    hrh = cfg.streams_by_id["hot_reheat"].design
    return {"GEN-MW1": 373e6, "HP-MS-F1": ms["mass_flow"], "HP-MS-P1": ms["pressure"],
            "HP-MS-T1": ms["temperature"], "RH-HRH-T1": hrh["temperature"]}


@pytest.mark.parametrize("gate", [DEMO_GATE, DEFAULT_GATE], ids=["demo", "default"])
def test_healthy_noise_is_never_frozen(gate):
    # Monte Carlo truth: 10 samples per window with the stated σ; the sample
    # spread is at or below 1 % of σ with a chi-square(9) probability of ~1e-19.
    rng = np.random.default_rng(8)
    det = SteadyStateDetector(["s"], hold_windows=2, warmup=5, noise_floor=0.01, frozen_windows=3, **gate)
    for i in range(3000):
        samples = rng.normal(size=10)
        v = det.update({"s": samples.mean()}, 10.0 * i, spreads={"s": samples.std(ddof=1)})
        assert v.status != FROZEN


# ----------------------------------------------------------- first verdict ---
def test_first_verdict_within_two_minutes_of_start():
    # Monte Carlo truth: the demo plant at design with white noise on its 10 s
    # cycle means. With 5 warm-up windows the first verdict comes at the 6th
    # window (60 s); steady by 2 minutes in nearly every run.
    cfg = load_config(DEMO)
    design = _design(cfg)
    sigma = {t: cfg.sensors_by_tag[t].sigma_si(v) / math.sqrt(10.0) for t, v in design.items()}
    rng = np.random.default_rng(2)
    first_verdict, first_steady = [], []
    for _ in range(200):
        det = steady_detector(cfg)
        assert det is not None
        fv = fs = math.inf
        for i in range(1, 19):  # window ends 10 s … 180 s after start
            v = det.update({t: x + sigma[t] * rng.normal() for t, x in design.items()}, 10.0 * i)
            if v.status != INSUFFICIENT_DATA:
                fv = min(fv, 10.0 * i)
            if v.steady:
                fs = min(fs, 10.0 * i)
        first_verdict.append(fv)
        first_steady.append(fs)
    assert max(first_verdict) == 60.0
    share = np.mean(np.array(first_steady) <= 120.0)
    print(f"\nfirst verdict at 60 s; steady by 120 s in {share:.1%} of runs, median {np.median(first_steady):.0f} s")
    assert share >= 0.9


# ------------------------------------------------------- hysteresis, steps ---
def test_hysteresis_opens_below_critical_and_closes_at_exit():
    # White noise through the demo filters: the gate opens only after
    # `hold_windows` windows with R below r_critical, then stays open until R
    # reaches r_exit; windows with R between the two occur and keep it open.
    rng = np.random.default_rng(0)
    det = SteadyStateDetector(["s"], hold_windows=2, warmup=5, **DEMO_GATE)
    steady, run, kept_between = False, 0, 0
    for i in range(3000):
        v = det.update({"s": float(rng.normal())}, 10.0 * i)
        r, jump = v.r["s"], det.jump_values["s"]
        ok = math.isfinite(r) and r < (6.0 if steady else 2.65) and not jump >= 100.0
        kept_between += steady and ok and r >= 2.65
        run = run + 1 if ok else 0
        steady = ok if steady else run >= 2
        assert v.steady == steady, i
    assert kept_between > 0


@pytest.mark.parametrize("gate", [DEMO_GATE, DEFAULT_GATE], ids=["demo", "default"])
def test_a_large_step_is_caught_in_its_own_window(gate):
    # Monte Carlo truth: white noise (σ = 1 per window value), a 20σ step at
    # window 60, when the gate is open.
    rng = np.random.default_rng(15)
    n, runs, k0 = 70, 200, 60
    x = rng.normal(size=(n, runs)) + np.where(np.arange(n)[:, None] >= k0, 20.0, 0.0)
    s = _gate_series(x, **gate)
    assert s[k0 - 1].mean() > 0.95
    caught = (~s[k0]).mean()
    print(f"\n{gate}: 20σ step caught in its window in {caught:.1%} of runs")
    assert caught > 0.95


@pytest.mark.parametrize("gate", [DEMO_GATE, DEFAULT_GATE], ids=["demo", "default"])
def test_a_ramp_closes_the_gate(gate):
    # Monte Carlo truth: a ramp of 5σ per window starting while the gate is open.
    rng = np.random.default_rng(16)
    n, runs, k0 = 90, 200, 60
    i = np.arange(n)[:, None]
    x = rng.normal(size=(n, runs)) + np.where(i >= k0, 5.0 * (i - k0 + 1), 0.0)
    s = _gate_series(x, **gate)
    assert (~s[k0 : k0 + 6]).any(axis=0).mean() > 0.99  # closed within 6 windows
    assert s[k0 + 6 :].mean() < 0.01  # and kept closed while the ramp lasts


# -------------------------------------------------------------- snapshot ---
def test_snapshot_round_trip_through_json_continues_identically():
    kw = {"lambdas": (0.5, 0.3, 0.3), "r_critical": 2.0, "hold_seconds": 20.0, "warmup": 5,
          "r_exit": 3.5, "noise_floor": {"a": 0.01, "b": 0.01}, "jump_critical": 100.0}
    rng = np.random.default_rng(9)
    x = rng.normal(size=(80, 2))
    x[50:, 1] = x[49, 1]  # b sticks: frozen counters are part of the state
    x[30, 0] = math.nan  # a gap: the hold restarts
    a = SteadyStateDetector(["a", "b"], **kw)
    for i in range(52):
        a.update({"a": x[i, 0], "b": x[i, 1]}, 10.0 * i)
    text = json.dumps(a.snapshot(), allow_nan=False)  # strict JSON
    b = SteadyStateDetector(["a", "b"], **kw)
    b.restore(json.loads(text))
    for i in range(52, 80):
        va = a.update({"a": x[i, 0], "b": x[i, 1]}, 10.0 * i)
        vb = b.update({"a": x[i, 0], "b": x[i, 1]}, 10.0 * i)
        assert va == vb
    assert va.status == FROZEN
    with pytest.raises(ValueError, match="signals"):
        SteadyStateDetector(["a"], hold_windows=1).restore(json.loads(text))
    with pytest.raises(ValueError, match="version"):
        b.restore({**json.loads(text), "version": 99})


def test_bad_gate_arguments_raise():
    with pytest.raises(ValueError, match="r_exit"):
        SteadyStateDetector(["a"], r_critical=2.0, r_exit=1.5, hold_windows=1)
    with pytest.raises(ValueError, match="frozen_windows"):
        SteadyStateDetector(["a"], hold_windows=1, frozen_windows=0)
    with pytest.raises(ValueError, match="noise_floor"):
        SteadyStateDetector(["a"], hold_windows=1, noise_floor=-1.0)
    with pytest.raises(ValueError, match="jump_critical"):
        SteadyStateDetector(["a"], hold_windows=1, jump_critical={"b": 3.0})
