"""Payload decoding: reference cases and property-based fuzzing of every decoder."""

from __future__ import annotations

import calendar
import json
import math
from collections import Counter

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from twin.ingest import (
    REJECT_REASONS,
    Ingestor,
    LogRateLimiter,
    PayloadFormat,
    TagBinding,
    TagStore,
    TopicMap,
    parse_timestamp,
)
from twin.ingest.decode import compile_pointer, resolve

GOOD = frozenset({"good", 192, True})
BINDINGS = [
    TagBinding("num", "n/num", PayloadFormat("number"), scale=1e5, valid_min_si=0.0),
    TagBinding(
        "js",
        "j/one",
        PayloadFormat("json", "/v", "/ts", "auto", "/q", GOOD),
        valid_max_si=1e9,
    ),
    TagBinding("a0", "j/multi", PayloadFormat("json", "/data/0/value", "ts", "epoch_s")),
    TagBinding("a1", "j/multi", PayloadFormat("json", "/data/1/value", "ts", "epoch_s")),
    TagBinding("key", "j/key", PayloadFormat("json", "value", "time", "rfc3339")),
    TagBinding("b1", "b/batch", PayloadFormat("batch"), offset=273.15),
    TagBinding("b2", "b/batch", PayloadFormat("batch"), valid_min_si=-10, valid_max_si=10),
]
TOPIC_MAP = TopicMap(BINDINGS, max_payload_bytes=4096)
NOW = 1_700_000_000.0


def _assert_accounted(topic: str, payload: bytes, out) -> None:
    """Every binding / batch entry ends as exactly one sample or one rejection."""
    reasons = [r.reason for r in out.rejections]
    assert set(reasons) <= set(REJECT_REASONS)
    for s in out.samples:
        assert math.isfinite(s.value) and math.isfinite(s.time)
        assert isinstance(s.quality_ok, bool)
    message_level = [r for r in out.rejections if r.key == topic and r.reason != "unknown_tag"]
    if message_level:
        assert len(message_level) == 1 and not out.samples
        return
    tags = [b.tag for b in BINDINGS if b.topic == topic]
    if topic != "b/batch":
        keys = [s.tag for s in out.samples] + [r.key for r in out.rejections]
        assert sorted(keys) == sorted(tags)
        return
    values = json.loads(payload)["values"]
    unknown = [r for r in out.rejections if r.reason == "unknown_tag"]
    assert len(unknown) == len([k for k in values if k not in tags])
    keys = [s.tag for s in out.samples] + [r.key for r in out.rejections if r.key != topic]
    assert sorted(keys) == sorted(k for k in values if k in tags)


# --------------------------------------------------------------- strategies ---

json_scalar = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(min_value=-(10**30), max_value=10**30),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=12),
    st.sampled_from(["1.5", "nan", "-inf", "1e999", "2024-01-01T00:00:00Z", "good", " 7 "]),
)
json_value = st.recursive(
    json_scalar,
    lambda inner: (
        st.lists(inner, max_size=3) | st.dictionaries(st.text(max_size=5), inner, max_size=3)
    ),
    max_leaves=8,
)
timestamps = st.one_of(
    json_value,
    st.floats(min_value=0, max_value=2e12),
    st.datetimes(timezones=st.timezones()).map(lambda d: d.isoformat()),
    st.datetimes().map(lambda d: d.isoformat()),  # naive: rejected
)


def _dumps(doc) -> bytes:
    return json.dumps(doc, allow_nan=True).encode()


one_doc = st.fixed_dictionaries(
    {}, optional={"v": json_value, "ts": timestamps, "q": json_value}
).map(_dumps)
multi_doc = st.fixed_dictionaries(
    {},
    optional={
        "data": st.lists(st.fixed_dictionaries({}, optional={"value": json_value}), max_size=3)
        | json_value,
        "ts": timestamps,
    },
).map(_dumps)
key_doc = st.fixed_dictionaries({}, optional={"value": json_value, "time": timestamps}).map(_dumps)
batch_entry = st.one_of(
    json_value,
    st.fixed_dictionaries({}, optional={"v": json_value, "q": json_value, "ts": timestamps}),
)
batch_doc = st.fixed_dictionaries(
    {"values": st.dictionaries(st.sampled_from(["b1", "b2", "zz", ""]), batch_entry, max_size=4)},
    optional={"ts": timestamps},
).map(_dumps)
number_text = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True).map(lambda x: repr(x).encode()),
    st.integers().map(lambda x: str(x).encode()),
    st.binary(max_size=20),
)
messages = st.one_of(
    st.tuples(st.just("n/num"), number_text),
    st.tuples(st.just("j/one"), one_doc),
    st.tuples(st.just("j/multi"), multi_doc),
    st.tuples(st.just("j/key"), key_doc),
    st.tuples(st.just("b/batch"), batch_doc),
    st.tuples(
        st.sampled_from(["n/num", "j/one", "j/multi", "b/batch", "other"]), st.binary(max_size=64)
    ),
    st.tuples(st.just("j/one"), st.just(b"[" * 5000)),  # oversize and deep nesting
    st.tuples(st.just("j/one"), st.just(b"[" * 3000)),  # nesting within the size limit
)


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(messages)
def test_fuzz_every_decoder_accounts_for_every_message(msg):
    topic, payload = msg
    out = TOPIC_MAP.decode(topic, payload, NOW)  # never raises
    _assert_accounted(topic, payload, out)


@settings(max_examples=100, deadline=None)
@given(st.lists(messages, max_size=20))
def test_fuzz_each_rejection_is_counted_once(msgs):
    store = TagStore([b.tag for b in BINDINGS], capacity=64)
    reported = []
    ingest = Ingestor(
        TOPIC_MAP,
        store,
        on_reject=lambda r, n: reported.append((r, n)),
        limiter=LogRateLimiter(interval=60.0),
    )
    expected: Counter[str] = Counter()
    per_tag: Counter[str] = Counter()
    for topic, payload in msgs:
        out = TOPIC_MAP.decode(topic, payload, NOW)
        expected.update(r.reason for r in out.rejections)
        per_tag.update(s.tag for s in out.samples)
        ingest(topic, payload, NOW)
    counts = ingest.rejects.counts()
    assert set(counts) == set(REJECT_REASONS)
    assert counts == {r: expected.get(r, 0) for r in REJECT_REASONS}
    assert ingest.samples == sum(per_tag.values())
    for tag in store.tags:
        assert store.snapshot(tag)[0].size == min(per_tag[tag], 64)
    # one report per (key, reason) within the interval
    keys = [(r.key, r.reason) for r, _ in reported]
    assert len(keys) == len(set(keys))


# ------------------------------------------------------------ reference cases ---


def test_json_pointer_rfc6901_examples():
    # RFC 6901 section 5: example document and pointer results
    doc = {
        "foo": ["bar", "baz"],
        "": 0,
        "a/b": 1,
        "c%d": 2,
        "e^f": 3,
        "g|h": 4,
        "i\\j": 5,
        'k"l': 6,
        " ": 7,
        "m~n": 8,
    }
    cases = {
        "": doc,
        "/foo": ["bar", "baz"],
        "/foo/0": "bar",
        "/": 0,
        "/a~1b": 1,
        "/c%d": 2,
        "/e^f": 3,
        "/g|h": 4,
        "/i\\j": 5,
        '/k"l': 6,
        "/ ": 7,
        "/m~0n": 8,
    }
    for pointer, expected in cases.items():
        assert resolve(doc, compile_pointer(pointer)) == expected, pointer
    # RFC 6901 section 4: array indices have no leading zeros
    assert resolve(doc, compile_pointer("/foo/01")) != "baz"


def test_timestamps_match_calendar_timegm():
    # POSIX time reference: calendar.timegm (Python standard library)
    t = calendar.timegm((2024, 1, 1, 0, 0, 0))
    assert parse_timestamp("2024-01-01T00:00:00Z", "rfc3339") == t
    assert parse_timestamp("2024-01-01T01:00:00+01:00", "auto") == t
    assert parse_timestamp("2024-01-01T00:00:00.250Z", "rfc3339") == t + 0.25
    assert parse_timestamp(t * 1000, "epoch_ms") == t
    assert parse_timestamp(t * 1000, "auto") == t
    assert parse_timestamp(t, "auto") == t
    assert parse_timestamp(str(t), "epoch_s") == t
    assert parse_timestamp("2024-01-01T00:00:00", "rfc3339") is None  # no offset
    assert parse_timestamp(t, "rfc3339") is None
    assert parse_timestamp(True, "auto") is None
    assert parse_timestamp(-1, "epoch_s") is None
    assert parse_timestamp(math.inf, "epoch_s") is None


@pytest.mark.parametrize(
    ("topic", "payload", "reason"),
    [
        ("nope", b"1", "unknown_topic"),
        ("n/num", b"1" * 5000, "oversize"),
        ("n/num", b"abc", "not_a_number"),
        ("n/num", b"nan", "not_finite"),
        ("n/num", b"-1", "out_of_range"),  # valid_min_si = 0
        ("j/one", b"{", "bad_json"),
        ("j/one", b'{"v": true}', "wrong_type"),
        ("j/one", b'{"v": [1]}', "wrong_type"),
        ("j/one", b'{"v": null}', "missing_value"),
        ("j/one", b'{"x": 1}', "missing_value"),
        ("j/one", b'{"v": 1, "ts": "yesterday"}', "bad_timestamp"),
        ("j/one", b'{"v": 1, "q": {"a": 1}}', "bad_quality"),
        ("j/one", b'{"v": 1e300, "q": "good"}', "out_of_range"),
        ("b/batch", b'{"values": {"b1": 1, "zz": 2}}', "unknown_tag"),
        ("b/batch", b'{"values": [1]}', "wrong_type"),
        ("b/batch", b'{"values": {"b2": 11}}', "out_of_range"),
    ],
)
def test_each_reason(topic, payload, reason):
    out = TOPIC_MAP.decode(topic, payload, NOW)
    assert reason in [r.reason for r in out.rejections]


def test_quality_and_time_defaults():
    out = TOPIC_MAP.decode("j/one", b'{"v": 2, "q": 192}', NOW)
    assert out.samples[0].quality_ok and out.samples[0].time == NOW
    out = TOPIC_MAP.decode("j/one", b'{"v": 2, "q": 1}', NOW)  # 1 is not good; True is
    assert not out.samples[0].quality_ok
    out = TOPIC_MAP.decode("j/one", b'{"v": 2, "q": true}', NOW)
    assert out.samples[0].quality_ok
    out = TOPIC_MAP.decode("j/one", b'{"v": 2}', NOW)  # quality configured but absent
    assert not out.samples[0].quality_ok
    out = TOPIC_MAP.decode(
        "b/batch", b'{"ts": 10, "values": {"b1": {"v": 1, "q": false, "ts": 20}}}', NOW
    )
    (s,) = out.samples
    # 0 degC = 273.15 K (SI brochure)
    assert (s.tag, s.time, s.value, s.quality_ok) == ("b1", 20.0, 274.15, False)


def test_bindings_are_validated():
    with pytest.raises(ValueError, match="bound twice"):
        TopicMap([TagBinding("a", "t"), TagBinding("a", "u")])
    with pytest.raises(ValueError, match="carries one tag"):
        TopicMap([TagBinding("a", "t"), TagBinding("b", "t")])
    with pytest.raises(ValueError, match="wildcards"):
        TagBinding("a", "t/+")
    with pytest.raises(ValueError, match="good_quality is not"):
        PayloadFormat("json", "/v", quality="/q")
    with pytest.raises(ValueError, match="payload kind 'xml'"):
        PayloadFormat("xml")
    with pytest.raises(ValueError, match="same format"):
        TopicMap(
            [
                TagBinding("a", "t", PayloadFormat("batch")),
                TagBinding("b", "t", PayloadFormat("batch", timestamp_format="epoch_ms")),
            ]
        )


def test_log_rate_limiter_once_per_interval():
    lim = LogRateLimiter(interval=10.0, max_keys=2)
    assert lim.should_log("a", "bad_json", 0.0) == (True, 0)
    assert lim.should_log("a", "bad_json", 5.0) == (False, 0)
    assert lim.should_log("a", "bad_json", 6.0) == (False, 0)
    assert lim.should_log("a", "oversize", 6.0) == (True, 0)  # another reason
    assert lim.should_log("a", "bad_json", 10.0) == (True, 2)  # two suppressed meanwhile
    # two keys held (max_keys) and none expired: new keys share one overflow slot
    assert lim.should_log("b", "x", 11.0) == (True, 0)
    assert lim.should_log("c", "x", 11.0) == (False, 0)
