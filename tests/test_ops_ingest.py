"""Timestamp policy, strict number parsing and the samples-missing count of the ingest path."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from twin.ingest.decode import REJECT_REASONS, PayloadFormat, TagBinding, TopicMap, strict_float
from twin.ingest.pipeline import Ingestor
from twin.ingest.rate import SampleRateMonitor
from twin.ingest.store import TagStore

NOW = 1_800_000_000.0
JSON_TS = PayloadFormat("json", "v", "ts", "epoch_s")


def _ingestor(capacity: int = 16, **kw: float) -> Ingestor:
    tm = TopicMap([TagBinding("A", "p/a", JSON_TS), TagBinding("B", "p/b", PayloadFormat("number"))])
    return Ingestor(tm, TagStore(["A", "B"], capacity=capacity), horizon=60.0, future_tolerance=5.0, **kw)


def _held(ing: Ingestor, tag: str = "A") -> list[float]:
    return list(ing.store.snapshot(tag)[0])


@pytest.mark.parametrize(("ts", "reason"), [
    (0, "too_old"),  # 1970
    (NOW - 20 * 365.25 * 86400, "too_old"),  # 20 years old
    (NOW - 61, "too_old"),  # just beyond the horizon
    (NOW + 1e9, "future_timestamp"),
    (1e11 - 1, "future_timestamp"),  # year 5138, the largest epoch the decoder takes
    (NOW + 120, "future_timestamp"),  # a publisher clock two minutes fast
    (NOW + 6, "future_timestamp"),
])
def test_implausible_timestamps_are_rejected_with_their_reason(ts: float, reason: str) -> None:
    ing = _ingestor()
    ing("p/a", json.dumps({"v": 1.0, "ts": ts}).encode(), NOW)
    assert ing.rejects.counts()[reason] == 1 and ing.rejects.total == 1
    assert _held(ing) == [] and ing.messages == 1


@pytest.mark.parametrize("ts", [NOW - 59, NOW, NOW + 4.9])
def test_plausible_timestamps_are_kept(ts: float) -> None:
    ing = _ingestor()
    ing("p/a", json.dumps({"v": 1.0, "ts": ts}).encode(), NOW)
    assert ing.rejects.total == 0 and _held(ing) == [ts]


def test_future_samples_never_displace_good_ones() -> None:
    """2 048 future-stamped samples once turned a tag into no_data; now the ring keeps the good ones."""
    ing = _ingestor(capacity=16)
    for k in range(10):
        ing("p/a", json.dumps({"v": 1.0, "ts": NOW - 10 + k}).encode(), NOW)
    for k in range(2048):
        ing("p/a", json.dumps({"v": 9.0, "ts": NOW + 3600 + k}).encode(), NOW)
    assert ing.rejects.counts()["future_timestamp"] == 2048
    assert _held(ing) == [NOW - 10 + k for k in range(10)]
    w = ing.store.window(NOW - 30, NOW + 1)["A"]
    assert w.count == 10 and w.mean == 1.0


def test_reject_reasons_include_the_timestamp_policy() -> None:
    assert {"too_old", "future_timestamp"} <= set(REJECT_REASONS)


@pytest.mark.parametrize("text", [b"1_000", b" 7 ", b"7 ", b"\t7", b"0x10", b"1e", b"--1", b"", b"7\n",
                                  b"\xd9\xa3", b"infinit", b"1,5"])
def test_strict_numbers_refuse_what_float_would_take(text: bytes) -> None:
    with pytest.raises(ValueError):
        strict_float(text)
    ing = _ingestor()
    ing("p/b", text, NOW)
    assert ing.rejects.counts()["not_a_number"] == 1 and _held(ing, "B") == []
    ing("p/a", json.dumps({"v": text.decode("utf-8", "replace"), "ts": NOW}).encode(), NOW)
    assert ing.rejects.counts()["not_a_number"] == 2


@pytest.mark.parametrize(("text", "value"), [(b"7", 7.0), (b"-1.5e3", -1500.0), (b".5", 0.5), (b"5.", 5.0),
                                             (b"+2E-2", 0.02)])
def test_strict_numbers_take_plain_numbers(text: bytes, value: float) -> None:
    assert strict_float(text) == value == float(text)  # Python's own parser agrees on these


def _feed(mon: SampleRateMonitor, period: float, drop_every: int = 0, seconds: float = 600.0,
          cycle: float = 10.0, jitter: float = 0.0, seed: int = 0) -> list[float]:
    """Sample times of a tag every ``period`` s (every ``drop_every``-th lost), accounted per cycle."""
    rng = np.random.default_rng(seed)
    n = int(seconds / period)
    t = NOW + np.arange(n) * period + rng.uniform(-jitter, jitter, n)
    kept = t if not drop_every else t[np.arange(n) % drop_every != 0]
    end = NOW + cycle
    while end <= NOW + seconds:
        held = kept[(kept < end) & (kept >= end - 2048 * period)]  # what a 2048-sample ring holds
        if "A" not in mon.configured:
            mon.learn("A", held, end)
        if "A" in mon.period:
            mon.update(cycle, {"A": int(np.count_nonzero((kept >= end - cycle) & (kept < end)))})
        end += cycle
    return list(kept)


def test_samples_missing_counts_a_known_loss() -> None:
    """Every 20th sample of a 1 Hz tag lost: the count matches the loss (Monte Carlo truth: the drops made)."""
    mon = SampleRateMonitor(["A"], {"A": 1.0})
    _feed(mon, 1.0, drop_every=20, jitter=0.2)
    # 600 samples, 30 dropped; the first cycle is spent learning nothing (period configured): 59 cycles accounted
    truth = sum(1 for k in range(10, 600) if k % 20 == 0)
    assert truth - 1 <= mon.missing["A"] <= truth


@pytest.mark.parametrize("seed", range(5))
def test_no_loss_counts_nothing_despite_jitter_and_the_period_is_learned(seed: int) -> None:
    mon = SampleRateMonitor(["A"], learn_seconds=120.0)
    _feed(mon, 2.0, jitter=0.5, seconds=3600.0, seed=seed)
    assert mon.period["A"] == pytest.approx(2.0, rel=1e-3)
    assert mon.missing["A"] == 0


def test_a_learned_period_still_sees_a_loss() -> None:
    """Every 10th sample of a 0.5 s tag lost from the start: learned 0.5 s, not 0.55 s (Monte Carlo truth)."""
    mon = SampleRateMonitor(["A"], learn_seconds=120.0)
    _feed(mon, 0.5, drop_every=10, jitter=0.1, seconds=1200.0, seed=3)
    assert mon.period["A"] == pytest.approx(0.5, rel=1e-3)
    accounted = (1200.0 - 130.0) / 0.5  # samples due after the learning cycles
    assert mon.missing["A"] == pytest.approx(accounted / 10, rel=0.05)


def test_rate_monitor_snapshot_round_trips() -> None:
    mon = SampleRateMonitor(["A", "B"], {"B": 5.0})
    _feed(mon, 1.0, drop_every=10, seconds=400.0)
    d = json.loads(json.dumps(mon.snapshot()))
    other = SampleRateMonitor(["A", "B"], {"B": 5.0})
    other.restore(d)
    assert other.period == mon.period and other.missing == mon.missing
    assert "B" not in d["period"]  # configured periods come from the config, not the state


def test_rate_monitor_refuses_bad_periods() -> None:
    with pytest.raises(ValueError, match="'A': sample period"):
        SampleRateMonitor(["A"], {"A": -1.0})
    with pytest.raises(ValueError, match="unknown tags"):
        SampleRateMonitor(["A"], {"Z": 1.0})
    assert math.isinf(Ingestor(TopicMap([]), TagStore([])).horizon)
