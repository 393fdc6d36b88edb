"""TopicMap.decode_one (the ingest fast path) agrees with the general decoder.

The reference is :meth:`TopicMap.decode`: for every message the fast path
accepts it must give exactly the sample ``decode`` gives (and ``decode`` must
reject nothing); when it declines (``None``) the Ingestor falls back to
``decode``, so the two paths together count the same samples and rejections.
"""

from __future__ import annotations

import json
import math

from hypothesis import given, settings
from hypothesis import strategies as st

from twin.ingest import Ingestor, PayloadFormat, TagBinding, TagStore, TopicMap

BINDINGS = [
    TagBinding("n", "u/n", PayloadFormat("number"), scale=1e5, valid_min_si=0.0),
    TagBinding("j", "u/j", PayloadFormat("json", "v", "ts"), offset=273.15, valid_max_si=1e4),
    TagBinding("ms", "u/ms", PayloadFormat("json", "/v", "/ts", timestamp_format="epoch_ms")),
    TagBinding("rfc", "u/rfc", PayloadFormat("json", "/v", "/ts", timestamp_format="rfc3339")),
    TagBinding("nots", "u/nots", PayloadFormat("json", "/v")),
    TagBinding("deep", "u/deep", PayloadFormat("json", "/d/v")),  # not a fast-path topic
    TagBinding(
        "q", "u/q", PayloadFormat("json", "/v", quality="/q", good_quality=frozenset({"good"}))
    ),
]
TOPICS = [b.topic for b in BINDINGS] + ["u/unknown"]
NOW = 1_700_000_000.0

scalars = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(min_value=-(10**400), max_value=10**400),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=8),
    st.sampled_from(["12.5", "2024-01-01T00:00:00Z", "good", "nan"]),
)
documents = st.one_of(
    scalars,
    st.dictionaries(
        st.sampled_from(["v", "ts", "q", "d", "x"]),
        st.one_of(scalars, st.dictionaries(st.sampled_from(["v"]), scalars, max_size=1)),
        max_size=4,
    ),
    st.lists(scalars, max_size=2),
)


def _encode(doc) -> bytes:
    # integers beyond float range and non-finite floats are valid JSON text for Python
    return json.dumps(doc).encode()


payloads = st.one_of(
    documents.map(_encode),
    st.binary(max_size=24),
    st.sampled_from([b"160.5", b" 1e3 ", b"inf", b"-0", b'{"v":1} ', b' {"v":1}', b"\xff"]),
)


def _same(a: float, b: float) -> bool:
    return a == b or (math.isnan(a) and math.isnan(b))


@settings(max_examples=500, deadline=None)
@given(topic=st.sampled_from(TOPICS), payload=payloads)
def test_decode_one_matches_decode(topic, payload):
    tm = TopicMap(BINDINGS)
    fast = tm.decode_one(topic, payload, NOW)
    full = tm.decode(topic, payload, NOW)
    if fast is not None:
        assert full.rejections == [] and len(full.samples) == 1
        s = full.samples[0]
        assert fast[0] == s.tag and fast[3] == s.quality_ok
        assert _same(fast[1], s.time) and _same(fast[2], s.value)


def test_fast_path_taken_for_plain_messages_only():
    tm = TopicMap(BINDINGS)
    assert tm.decode_one("u/n", b"160.5", NOW) == ("n", NOW, 160.5e5, True)
    # 1 bar = 1e5 Pa, 0 degC = 273.15 K (SI brochure)
    assert tm.decode_one("u/j", b'{"v": 20.0, "ts": 1700000001.5}', NOW) == (
        "j",
        1700000001.5,
        293.15,
        True,
    )
    assert tm.decode_one("u/ms", b'{"v":1,"ts":1700000001500}', NOW) == (
        "ms",
        1700000001.5,
        1.0,
        True,
    )
    assert tm.decode_one("u/nots", b'{"v":2}', NOW) == ("nots", NOW, 2.0, True)
    for topic, payload in [
        ("u/deep", b'{"d":{"v":1}}'),  # nested pointer: general decoder
        ("u/q", b'{"v":1,"q":"good"}'),  # quality field: general decoder
        ("u/rfc", b'{"v":1,"ts":"2024-01-01T00:00:00Z"}'),
        ("u/n", b"-1"),  # out of range: the general decoder names the rejection
        ("u/unknown", b"1"),
    ]:
        assert tm.decode_one(topic, payload, NOW) is None


@settings(max_examples=150, deadline=None)
@given(st.lists(st.tuples(st.sampled_from(TOPICS), payloads), max_size=30))
def test_ingestor_counts_match_general_decoder(messages):
    tm = TopicMap(BINDINGS)
    store = TagStore([b.tag for b in BINDINGS], capacity=64)
    ingest = Ingestor(tm, store)
    expected_samples = 0
    expected_rejects: dict[str, int] = {}
    for topic, payload in messages:
        ingest(topic, payload, NOW)
        out = tm.decode(topic, payload, NOW)
        expected_samples += len(out.samples)
        for r in out.rejections:
            expected_rejects[r.reason] = expected_rejects.get(r.reason, 0) + 1
    assert ingest.messages == len(messages) and ingest.samples == expected_samples
    assert {k: v for k, v in ingest.rejects.counts().items() if v} == expected_rejects
    assert sum(n for n in store.overwritten().values()) == 0
    assert sum(len(store.snapshot(t)[0]) for t in store.tags) == expected_samples
