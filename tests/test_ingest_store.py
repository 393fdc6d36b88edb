"""TagStore: window statistics against numpy, ring overflow, staleness, thread safety."""

from __future__ import annotations

import math
import threading

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from twin.ingest import Ingestor, TagBinding, TagStore, TopicMap, stale_tags


def _reference(t, v, ok, t_start, t_end):
    """Window statistics computed directly with numpy on the same samples."""
    sel = (t >= t_start) & (t < t_end)
    g = v[sel & ok]
    return {
        "count": g.size,
        "n_bad": int(np.sum(sel & ~ok)),
        "mean": np.mean(g) if g.size else math.nan,
        "std": np.std(g, ddof=1) if g.size > 1 else math.nan,
        "min": np.min(g) if g.size else math.nan,
        "max": np.max(g) if g.size else math.nan,
    }


def test_window_matches_numpy_on_same_samples():
    rng = np.random.default_rng(7)
    n = 500
    t = np.sort(rng.uniform(0.0, 100.0, n))
    v = 16.2e6 + 5e4 * rng.standard_normal(n)
    ok = rng.random(n) > 0.1
    store = TagStore(["p"], capacity=1024)
    for row in zip(t, v, ok, strict=True):
        store.add("p", *row)
    for t_start, t_end in [(0.0, 100.0), (20.0, 50.0), (99.0, 200.0), (150.0, 200.0)]:
        got = store.window(t_start, t_end)["p"]
        ref = _reference(t, v, ok, t_start, t_end)  # reference: numpy on the same samples
        assert got.count == ref["count"] and got.n_bad == ref["n_bad"]
        for key in ("mean", "std", "min", "max"):
            np.testing.assert_allclose(getattr(got, key), ref[key], rtol=1e-12)
        last = t[ok & (t < t_end)].max()
        assert got.last_time == last and got.age == t_end - last


@settings(max_examples=60, deadline=None)
@given(
    st.lists(
        st.tuples(st.floats(0, 100), st.floats(-1e6, 1e6), st.booleans()), min_size=0, max_size=80
    ),
    st.floats(0, 100),
    st.floats(0.001, 100),
    st.integers(1, 64),
)
def test_window_matches_numpy_property(samples, t_start, width, capacity):
    store = TagStore(["x"], capacity=capacity)
    store.add_many(("x", *s) for s in samples)
    kept = samples[-capacity:]  # the ring keeps the newest `capacity` samples
    t = np.array([s[0] for s in kept], dtype=float)
    v = np.array([s[1] for s in kept], dtype=float)
    ok = np.array([s[2] for s in kept], dtype=bool)
    got = store.window(t_start, t_start + width)["x"]
    ref = _reference(t, v, ok, t_start, t_start + width)  # reference: numpy on the same samples
    assert (got.count, got.n_bad) == (ref["count"], ref["n_bad"])
    for key in ("mean", "std", "min", "max"):
        np.testing.assert_allclose(getattr(got, key), ref[key], rtol=1e-9, atol=1e-6)


def test_ring_overflow_keeps_the_newest():
    store = TagStore(["a", "b"], capacity=8)
    for k in range(20):
        store.add("a", float(k), float(k))
    _t, v, ok = store.snapshot("a")
    np.testing.assert_array_equal(v, np.arange(12.0, 20.0))
    assert ok.all()
    assert store.overwritten() == {"a": 12, "b": 0}
    w = store.window(0.0, 100.0)
    assert w["a"].count == 8 and w["a"].min == 12.0
    assert w["b"].count == 0 and math.isnan(w["b"].mean) and w["b"].age == math.inf


def test_staleness_uses_last_good_sample():
    store = TagStore(["fast", "slow", "never"], capacity=16, max_age={"fast": 10.0, "slow": 60.0})
    store.add("fast", 100.0, 1.0, True)
    store.add("fast", 108.0, 2.0, False)  # bad quality does not refresh
    store.add("slow", 100.0, 1.0, True)
    w = store.window(90.0, 105.0)
    assert not w["fast"].stale and w["fast"].age == 5.0
    w = store.window(105.0, 111.0)
    assert w["fast"].stale and w["fast"].age == 11.0 and w["fast"].n_bad == 1
    assert not w["slow"].stale  # 11 s < 60 s
    assert not w["never"].stale  # no max_age given for it: no limit
    store2 = TagStore(["x"], max_age=5.0)
    assert stale_tags(store2.window(0.0, 1.0)) == ["x"]  # nothing ever received
    with pytest.raises(ValueError, match="does not hold"):
        TagStore(["a"], max_age={"b": 1.0})
    with pytest.raises(ValueError, match="must be after its start"):
        store.window(5.0, 5.0)


def test_out_of_range_rejected_and_counted():
    tm = TopicMap([TagBinding("p", "u/p", scale=1e5, valid_min_si=0.0, valid_max_si=25e6)])
    store = TagStore(["p"])
    ingest = Ingestor(tm, store)
    for payload in (b"160", b"-1", b"300", b"161", b"250"):  # bar; 250 bar = 25 MPa is the limit
        ingest("u/p", payload, 10.0)
    counts = ingest.rejects.counts()
    assert counts["out_of_range"] == 2 and ingest.rejects.total == 2
    w = store.window(0.0, 11.0)["p"]
    assert w.count == 3
    np.testing.assert_allclose(w.mean, np.mean([160e5, 161e5, 250e5]), rtol=1e-12)


def test_concurrent_writer_and_reader():
    store = TagStore(["a"], capacity=256)
    n = 20_000
    errors: list[BaseException] = []

    def writer():
        try:
            for k in range(n):
                store.add("a", float(k), float(k))
        except BaseException as exc:  # pragma: no cover - reported below
            errors.append(exc)

    th = threading.Thread(target=writer)
    th.start()
    while th.is_alive():
        w = store.window(0.0, float(n))["a"]
        # a consistent copy: held samples are a contiguous run of the writes
        if w.count:
            assert w.max - w.min == w.count - 1
    th.join()
    assert not errors
    _t, v, _ = store.snapshot("a")
    np.testing.assert_array_equal(v, np.arange(n - 256, n, dtype=float))
