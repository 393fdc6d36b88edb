"""Drift charts (EWMA, tabular CUSUM) against Monte Carlo and published ARLs."""

from __future__ import annotations

import math

import numpy as np
import pytest

from twin.monitor.drift import (
    DOWN,
    NONE,
    UP,
    DriftBank,
    DriftMonitor,
    DriftSettings,
    cusum_step,
    ewma_halfwidth,
    ewma_step,
)


def _run_lengths(runs, shift, step, signalled, rng, max_steps=50_000):
    """Run lengths of many independent charts at once (vectorised Monte Carlo).

    ``step(state, x, t) -> state`` advances the charts still running,
    ``signalled(state, t) -> bool array`` says which signal at sample t.
    Observations are N(shift, 1).
    """
    rl = np.zeros(runs, dtype=int)
    alive = np.arange(runs)
    state = np.zeros((2, runs))
    t = 0
    while alive.size and t < max_steps:
        t += 1
        x = rng.standard_normal(alive.size) + shift
        state = step(state, x, t)
        sig = signalled(state, t)
        rl[alive[sig]] = t
        alive, state = alive[~sig], state[:, ~sig]
    assert alive.size == 0
    return rl


def _cusum_rl(runs, shift, rng, k=0.5, h=5.0):
    def step(s, x, t):
        return np.stack(cusum_step(s[0], s[1], x, 0.0, k))

    return _run_lengths(runs, shift, step, lambda s, t: (s[0] > h) | (s[1] > h), rng)


def _ewma_rl(runs, shift, rng, lam, L, asymptotic):
    def step(s, x, t):
        return np.stack([ewma_step(s[0], x, lam), s[1]])

    def signalled(s, t):
        hw = ewma_halfwidth(1.0, lam, L, 10**9 if asymptotic else t)
        return np.abs(s[0]) > hw

    return _run_lengths(runs, shift, step, signalled, rng)


def test_cusum_in_control_arl_matches_montgomery():
    # Montgomery, Introduction to SQC, table of tabular-CUSUM ARLs, k=0.5, h=5:
    # ARL0 ≈ 465 (from memory). 3000 runs: standard error ≈ 465/sqrt(3000) ≈ 1.8 %.
    rng = np.random.default_rng(465)
    rl = _cusum_rl(3000, 0.0, rng)
    assert rl.mean() == pytest.approx(465, rel=0.12)


def test_cusum_one_sigma_shift_arl_matches_montgomery_through_monitor():
    # Montgomery, same table, k=0.5, h=5, shift 1σ: ARL1 ≈ 10.4 (from memory).
    # Run through DriftMonitor itself; 2000 runs give a standard error ≈ 0.1.
    rng = np.random.default_rng(104)
    lengths = []
    for _ in range(2000):
        m = DriftMonitor(target=100.0, sigma=2.0, k=0.5, h=5.0)
        t = 0
        while True:
            t += 1
            s = m.update(100.0 + 2.0 * (1.0 + rng.standard_normal()), steady=True, time=t)
            if s.cusum_signal != NONE:
                assert s.cusum_signal == UP
                break
        lengths.append(t)
    assert np.mean(lengths) == pytest.approx(10.4, abs=1.0)


def test_ewma_steady_state_variance():
    # Monte Carlo truth vs. Var(z_t) = σ²·λ/(2−λ)·[1 − (1−λ)^(2t)]
    # (Montgomery, from memory; also follows from summing the EWMA weights).
    rng = np.random.default_rng(1)
    lam, sigma, runs = 0.2, 3.0, 20_000
    z = np.zeros(runs)
    for t in range(1, 61):
        z = ewma_step(z, rng.normal(0.0, sigma, runs), lam)
        if t in (3, 60):
            expected = (ewma_halfwidth(sigma, lam, 1.0, t)) ** 2
            assert np.var(z) == pytest.approx(expected, rel=0.04)
    assert np.var(z) == pytest.approx(sigma**2 * lam / (2 - lam), rel=0.04)


def test_ewma_arls_match_lucas_saccucci_table():
    # Lucas & Saccucci (1990) ARL table as reprinted in Montgomery (from memory):
    # λ=0.10, L=2.814 (asymptotic limits): ARL0 ≈ 500, ARL(1σ) ≈ 10.3.
    # (λ=0.1 with L=2.7 gives ≈ 370 by a Markov-chain calculation, not 500.)
    rng = np.random.default_rng(500)
    rl0 = _ewma_rl(3000, 0.0, rng, 0.1, 2.814, asymptotic=True)
    assert rl0.mean() == pytest.approx(500, rel=0.12)
    rl1 = _ewma_rl(3000, 1.0, rng, 0.1, 2.814, asymptotic=True)
    assert rl1.mean() == pytest.approx(10.3, abs=0.6)


def test_ewma_time_varying_limits_false_alarms_rare_and_shift_found_fast():
    # With L = 3 in-control false alarms are rare (Lucas & Saccucci 1990 via
    # Montgomery, from memory: λ=0.1, L=3 gives ARL0 ≈ 840 with asymptotic
    # limits; time-varying limits add a few early signals) while a 1σ shift
    # signals within about ten samples (same table: ≈ 11).
    rng = np.random.default_rng(3)
    rl0 = _ewma_rl(2000, 0.0, rng, 0.1, 3.0, asymptotic=False)
    assert rl0.mean() > 500
    assert np.mean(rl0 <= 20) < 0.03
    lengths = []
    for _ in range(1000):
        m = DriftMonitor(target=0.0, sigma=1.0, lam=0.1, L=3.0)
        t = 0
        while True:
            t += 1
            s = m.update(rng.standard_normal() - 1.0, steady=True, time=t)
            if s.ewma_signal != NONE:
                assert s.ewma_signal == DOWN and s.direction == DOWN
                break
        lengths.append(t)
    assert np.mean(lengths) < 15
    assert np.mean(lengths) < rl0.mean() / 30


def test_unsteady_and_nan_windows_are_ignored():
    rng = np.random.default_rng(9)
    x = rng.normal(10.0, 1.0, 50)
    a = DriftMonitor(10.0, 1.0)
    b = DriftMonitor(10.0, 1.0)
    for i, v in enumerate(x):
        sa = a.update(v, steady=True, time=2 * i)
        assert not b.update(1e6, steady=False, time=2 * i).used
        assert not b.update(math.nan, steady=True, time=2 * i).used
        sb = b.update(v, steady=True, time=2 * i + 1)
        assert sa.ewma == sb.ewma and sa.cusum_high == sb.cusum_high
        assert sa.cusum_low == sb.cusum_low and sa.count == sb.count == i + 1


def test_statistics_by_hand_and_reset():
    # Hand arithmetic from the chart equations (Montgomery, from memory).
    m = DriftMonitor(target=0.0, sigma=1.0, lam=0.5, L=3.0, k=0.5, h=1.0)
    s = m.update(2.0, steady=True)
    assert s.ewma == 1.0 and s.cusum_high == 1.5 and s.cusum_low == 0.0
    assert s.ewma_upper == pytest.approx(3.0 * math.sqrt(0.5 / 1.5 * (1 - 0.5**2)))
    assert s.cusum_signal == UP and s.ewma_signal == NONE and s.direction == UP and s.alarm
    s = m.update(-1.0, steady=True)
    assert s.ewma == 0.0 and s.cusum_high == 0.0 and s.cusum_low == 0.5
    assert s.direction == NONE and not s.alarm
    m.reset(target=5.0)
    s = m.status()
    assert (s.count, s.ewma, s.cusum_high, s.cusum_low) == (0, 5.0, 0.0, 0.0)
    assert s.ewma_lower == s.ewma_upper == 5.0


def test_bank_keyed_by_name():
    bank = DriftBank({"eta_hp": DriftSettings(0.86, 0.004), "eta_ip": DriftSettings(0.90, 0.004)})
    out = bank.update({"eta_hp": 0.80}, steady=True, time=0.0)
    assert out["eta_hp"].used and not out["eta_ip"].used
    assert out["eta_hp"].direction == DOWN
    bank.reset(["eta_hp"])
    assert bank["eta_hp"].count == 0
    assert set(bank.statuses()) == {"eta_hp", "eta_ip"}
    with pytest.raises(KeyError, match="eta_lp"):
        bank["eta_lp"]
    with pytest.raises(TypeError, match="eta_x"):
        DriftBank({"eta_x": 0.5})  # type: ignore[dict-item]


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"sigma": 0.0}, "sigma"),
        ({"sigma": 1.0, "lam": 0.0}, "lam"),
        ({"sigma": 1.0, "L": -1.0}, "L must"),
        ({"sigma": 1.0, "k": -0.1}, "k must"),
        ({"sigma": 1.0, "h": 0.0}, "h must"),
    ],
)
def test_bad_arguments_raise(kwargs, match):
    with pytest.raises(ValueError, match=match):
        DriftMonitor(target=1.0, **kwargs)


def test_time_must_not_go_backwards():
    m = DriftMonitor(1.0, 1.0)
    m.update(1.0, steady=True, time=10.0)
    with pytest.raises(ValueError, match="backwards"):
        m.update(1.0, steady=True, time=5.0)


def test_drift_step_raises_one_transition_per_change_with_the_live_name():
    """A 2σ shift after the reference: one ``active`` transition, then one ``normal`` after the shift ends.

    Truth: the charts' own statistics (the step's transitions are the alarm flag's
    changes), and the CUSUM's ARL at a 2σ shift, k = 0.5, h = 5: ≈ 4 windows
    (Montgomery, Introduction to SQC, tabular-CUSUM ARL table) [memory].
    """
    from twin.cycle import DRIFT_LEVEL, drift_alarm_name, drift_step

    bank = DriftBank(learn=["section_efficiency.HP"], params=DriftSettings(0.0, 1.0, 0.1, 2.7, 0.5, 5.0),
                     reference_windows=50)
    rng = np.random.default_rng(11)
    sigma, t, got, flags = 1e-3, 0.0, [], []
    for phase, shift, n in (("reference", 0.0, 50), ("shift", 2.0, 60), ("back", 0.0, 400)):
        for _ in range(n):
            t += 60.0
            x = sigma * (shift + rng.standard_normal())
            got += [(phase, tr) for tr in drift_step(bank, {"section_efficiency.HP": x}, True, t, 60.0)]
            flags.append(bank.statuses()["section_efficiency.HP"].alarm)
    changes = sum(bool(a) != bool(b) for a, b in zip([False, *flags], flags, strict=False))
    assert len(got) == changes >= 2
    first = got[0][1]
    assert got[0][0] == "shift" and (first.alarm, first.level, first.old, first.new) == (
        drift_alarm_name("section_efficiency.HP"), DRIFT_LEVEL, "normal", "active")
    assert first.time - 50 * 60.0 <= 15 * 60.0  # within a few windows of the shift (ARL ≈ 4)
    assert got[-1][1].new == "normal" and got[-1][1].old == "active"
    # an unused window (not steady) changes nothing
    assert drift_step(bank, {"section_efficiency.HP": 1.0}, False, t + 60.0, 60.0) == []


def test_a_raised_drift_alarm_clears_only_after_quiet_charted_windows():
    """An EWMA hovering at its limit: the chart's flag chatters, the raised alarm does not.

    Truth: the chart's own flag per window (the bank's statistics) and the rule
    itself: raised at the first signal, cleared after ``clear_windows`` consecutive
    charted windows without one; windows not charted (not steady) count for nothing.
    """
    settings = DriftSettings(0.0, 1.0, 0.1, 2.7, 0.5, 50.0)  # CUSUM out of the way: the EWMA decides
    held = DriftBank({"k": settings}, clear_windows=10)
    plain = DriftBank({"k": DriftSettings(0.0, 1.0, 0.1, 2.7, 0.5, 50.0)})
    rng = np.random.default_rng(3)
    flags, plain_flags, raised, t = [], [], [], 0.0
    for k in range(600):
        t += 60.0
        x = 0.62 + 0.3 * rng.standard_normal()  # the EWMA hovers about its limit (2.7·sqrt(0.1/1.9) = 0.62)
        st = held.update({"k": x}, steady=k % 7 != 3, time=t)["k"]
        plain_flags.append(bool(plain.update({"k": x}, steady=k % 7 != 3, time=t)["k"].alarm))
        flags.append(bool(st.alarm))
        raised.append("k" in held.raised())
    assert flags == plain_flags  # the hold changes the alarm, not the charts
    chatter = sum(a != b for a, b in zip([False, *flags], flags, strict=False))
    changes = sum(a != b for a, b in zip([False, *raised], raised, strict=False))
    assert chatter > 10 and changes < chatter / 3
    # the rule, window by window
    quiet, state = 0, False
    for k, f in enumerate(flags):
        if f:
            state, quiet = True, 0
        elif state and k % 7 != 3:
            quiet += 1
            state = quiet < 10
        assert raised[k] == state, k
    # the hold is state: a restored bank goes on where the first one stood
    again = DriftBank({"k": settings}, clear_windows=10)
    again.restore(held.snapshot())
    assert again.raised() == held.raised()
