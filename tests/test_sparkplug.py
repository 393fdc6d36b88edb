"""Sparkplug B codec and host session, checked against the Sparkplug 3.0 specification.

The codec is checked against payload bytes assembled by hand from the protobuf
wire format (Protocol Buffers encoding guide: varint keys ``field << 3 | wire
type``) and the field numbers of the specification's ``sparkplug_b.proto``
(Sparkplug 3.0 §6.4.1), and against the data-type numbering of §6.4.16/§6.4.17.
The session (births, aliases, seq, deaths) is checked against the normative
statements of §5.4, §5.5, §5.7, §5.9 and §6.4.6 named beside each test.
"""

from __future__ import annotations

import math
import struct

import pytest

from twin.ingest.decode import PayloadFormat, TagBinding, TopicMap
from twin.ingest.pipeline import Ingestor
from twin.ingest.sparkplug import SparkplugSession
from twin.ingest.store import TagStore
from twin.sparkplug import (
    DATATYPES,
    SparkplugError,
    decode_payload,
    encode_payload,
    metric_number,
    parse_topic,
    rebirth_request,
)

T0_MS = 1_700_000_000_000


def varint(n: int) -> bytes:
    """Protobuf base-128 varint (Protocol Buffers encoding guide)."""
    out = bytearray()
    while True:
        b = n & 0x7F
        n >>= 7
        out.append(b | (0x80 if n else 0))
        if not n:
            return bytes(out)


def key(field: int, wire: int) -> bytes:
    return varint(field << 3 | wire)


def length_delimited(field: int, body: bytes) -> bytes:
    return key(field, 2) + varint(len(body)) + body


# Sparkplug 3.0 §6.4.1 schema field numbers: Payload.timestamp 1, metrics 2, seq 3;
# Metric.name 1, alias 2, timestamp 3, datatype 4, is_historical 5, is_null 7,
# int_value 10, long_value 11, float_value 12, double_value 13, boolean_value 14, string_value 15.
def hand_metric(name: str | None, alias: int | None, ts: int, datatype: int, value_field: bytes) -> bytes:
    body = b""
    if name is not None:
        body += length_delimited(1, name.encode())
    if alias is not None:
        body += key(2, 0) + varint(alias)
    body += key(3, 0) + varint(ts) + key(4, 0) + varint(datatype) + value_field
    return body


def test_decoder_reads_hand_built_wire_bytes_by_the_specification_field_numbers() -> None:
    double = key(13, 1) + struct.pack("<d", 16.2)  # double_value: wire type 1 (64-bit)
    m1 = hand_metric("Turbine/HP/Pressure", 7, T0_MS + 123, 10, double)
    m2 = hand_metric(None, 8, T0_MS + 456, 3, key(10, 0) + varint(0xFFFFFFFB))  # Int32 -5 (two's complement)
    data = key(1, 0) + varint(T0_MS) + length_delimited(2, m1) + length_delimited(2, m2) + key(3, 0) + varint(42)
    p = decode_payload(data)
    assert (p.timestamp_ms, p.seq) == (T0_MS, 42)
    a, b = p.metrics
    assert (a.name, a.alias, a.timestamp_ms, a.datatype, a.value_field) == (
        "Turbine/HP/Pressure", 7, T0_MS + 123, 10, "double_value")
    assert metric_number(a) == 16.2
    assert (b.name, b.alias, b.datatype) == (None, 8, 3)
    assert metric_number(b) == -5.0
    # the encoder writes the same bytes (protobuf serialises fields in field-number order)
    assert encode_payload([
        {"name": "Turbine/HP/Pressure", "alias": 7, "timestamp": T0_MS + 123, "datatype": "Double", "value": 16.2},
        {"alias": 8, "timestamp": T0_MS + 456, "datatype": "Int32", "value": -5},
    ], timestamp_ms=T0_MS, seq=42) == data


def test_datatype_numbers_follow_the_specification() -> None:
    # Sparkplug 3.0 §6.4.16 Data Types / §6.4.17 Datatype Details ("Sparkplug enum value")
    spec = ["Unknown", "Int8", "Int16", "Int32", "Int64", "UInt8", "UInt16", "UInt32", "UInt64", "Float",
            "Double", "Boolean", "String", "DateTime", "Text", "UUID", "DataSet", "Bytes", "File", "Template",
            "PropertySet", "PropertySetList", "Int8Array", "Int16Array", "Int32Array", "Int64Array",
            "UInt8Array", "UInt16Array", "UInt32Array", "UInt64Array", "FloatArray", "DoubleArray",
            "BooleanArray", "StringArray", "DateTimeArray"]
    assert {name: i for i, name in enumerate(spec)} == DATATYPES


@pytest.mark.parametrize(("datatype", "field", "raw", "value"), [
    # §6.4.17: signed types travel in the unsigned field of their protobuf type;
    # two's complement of the type's width (the Eclipse Tahu reference encoder)
    ("Int8", "int", 0xFF, -1.0), ("Int8", "int", 0x7F, 127.0), ("Int16", "int", 0x8000, -32768.0),
    ("Int32", "int", 0xFFFFFFFF, -1.0), ("Int64", "long", 2**64 - 2, -2.0),
    ("UInt8", "int", 200, 200.0), ("UInt32", "int", 0xFFFFFFFF, 4294967295.0),
    ("UInt64", "long", 2**63, 9.223372036854775808e18),
])
def test_integer_types_decode_as_the_specification_defines(datatype: str, field: str, raw: int,
                                                           value: float) -> None:
    number = {"int": 10, "long": 11}[field]
    body = key(4, 0) + varint(DATATYPES[datatype]) + key(number, 0) + varint(raw)
    (m,) = decode_payload(length_delimited(2, body)).metrics
    assert metric_number(m) == value


def test_float_and_wrong_types_and_nulls() -> None:
    (f,) = decode_payload(length_delimited(2, key(4, 0) + varint(9) + key(12, 5) + struct.pack("<f", 0.5))).metrics
    assert metric_number(f) == 0.5  # Float: wire type 5 (32-bit), §6.4.17
    (s,) = decode_payload(encode_payload([{"name": "x", "datatype": "String", "value": "12"}])).metrics
    with pytest.raises(SparkplugError, match="expected a numeric type"):
        metric_number(s)
    (n,) = decode_payload(encode_payload([{"name": "x", "datatype": "Double", "is_null": True}])).metrics
    with pytest.raises(SparkplugError, match="without a value"):
        metric_number(n)
    # a Double metric carrying float_value does not match its type
    (w,) = decode_payload(length_delimited(2, key(4, 0) + varint(10) + key(12, 5) + struct.pack("<f", 1.0))).metrics
    with pytest.raises(SparkplugError, match="expected double_value"):
        metric_number(w)


def test_bad_bytes_and_topics_are_one_clear_error() -> None:
    with pytest.raises(SparkplugError, match="not a Sparkplug B protobuf payload"):
        decode_payload(b'{"v": 1}')
    # §4.1: spBv1.0/<group>/<message type>/<edge node>[/<device>]
    assert str(parse_topic("spBv1.0/g/DDATA/n/d")) == "spBv1.0/g/DDATA/n/d"
    t = parse_topic("spBv1.0/g/NBIRTH/n")
    assert (t.group, t.message_type, t.edge_node, t.device, t.node) == ("g", "NBIRTH", "n", None, "g/n")
    for bad, why in [("spAv1.0/g/NDATA/n", "does not start"), ("spBv1.0/g/XDATA/n", "expected"),
                     ("spBv1.0/g/DDATA/n", "has 5 elements"), ("spBv1.0/g/NDATA/n/d", "has 4 elements"),
                     ("spBv1.0//NDATA/n", "empty")]:
        with pytest.raises(SparkplugError, match=why):
            parse_topic(bad)


def test_rebirth_request_is_an_ncmd_boolean_true() -> None:
    # §5.17: a Rebirth Request has a metric 'Node Control/Rebirth', Boolean, value true
    (m,) = decode_payload(rebirth_request(T0_MS)).metrics
    assert (m.name, m.datatype, m.value) == ("Node Control/Rebirth", DATATYPES["Boolean"], True)


# ------------------------------------------------------------------- session ---

NODE = "spBv1.0/plant/{}/edge1"
DEV = "spBv1.0/plant/{}/edge1/boiler"


def sp_binding(tag: str, topic: str, metric: str, scale: float = 1.0, lo: float = math.nan,
               hi: float = math.nan) -> TagBinding:
    return TagBinding(tag, topic, PayloadFormat("sparkplug", metric=metric), scale, 0.0, lo, hi)


@pytest.fixture()
def rig() -> tuple[SparkplugSession, TagStore, Ingestor]:
    bindings = [sp_binding("P1", DEV.format("DDATA"), "Drum/Pressure", scale=1e5, lo=0.0, hi=3e7),
                sp_binding("T1", DEV.format("DDATA"), "Drum/Temperature"),
                sp_binding("F1", NODE.format("NDATA"), "Feed/Flow")]
    session = SparkplugSession(bindings, rebirth_interval=1.0)
    store = TagStore(["P1", "T1", "F1"], max_age=1e6)
    ingestor = Ingestor(TopicMap([]), store, sparkplug=session, horizon=1e9)
    return session, store, ingestor


def births(seq0: int = 0, bdseq: int = 0, aliases: tuple[int, int] = (1, 2)) -> list[tuple[str, bytes]]:
    t = T0_MS
    nb = encode_payload([{"name": "bdSeq", "timestamp": t, "datatype": "Int64", "value": bdseq},
                         {"name": "Node Control/Rebirth", "timestamp": t, "datatype": "Boolean", "value": False},
                         {"name": "Feed/Flow", "alias": 5, "timestamp": t, "datatype": "Float", "value": 50.0},
                         {"name": "Other/Unbound", "alias": 6, "timestamp": t, "datatype": "Double", "value": 1.0}],
                        timestamp_ms=t, seq=seq0)
    db = encode_payload([{"name": "Drum/Pressure", "alias": aliases[0], "timestamp": t, "datatype": "Double",
                          "value": 100.0},
                         {"name": "Drum/Temperature", "alias": aliases[1], "timestamp": t, "datatype": "Double",
                          "value": 300.0}], timestamp_ms=t, seq=(seq0 + 1) % 256)
    return [(NODE.format("NBIRTH"), nb), (DEV.format("DBIRTH"), db)]


def test_births_declare_aliases_and_data_by_alias_lands_at_the_metric_timestamps(rig) -> None:
    session, store, ingest = rig
    for t, p in births():
        ingest(t, p, T0_MS / 1e3)
    # §6.4.6: DATA names metrics by alias only; each metric carries its own timestamp
    ingest(DEV.format("DDATA"), encode_payload([{"alias": 1, "timestamp": T0_MS + 2500, "value": 101.5,
                                                  "datatype": "Double"},
                                                 {"alias": 2, "timestamp": T0_MS + 2600, "value": 301.0,
                                                  "datatype": "Double"}], timestamp_ms=T0_MS + 3000, seq=2),
           T0_MS / 1e3 + 3.0)
    t, v, _ = store.snapshot("P1")
    assert list(t) == [T0_MS / 1e3, T0_MS / 1e3 + 2.5]
    assert list(v) == [100.0e5, 101.5e5]  # scale 1e5 (bar to Pa) applied
    t, v, _ = store.snapshot("T1")
    assert list(t) == [T0_MS / 1e3, T0_MS / 1e3 + 2.6]
    # no metric timestamp: the payload timestamp is the sample time
    ingest(NODE.format("NDATA"), encode_payload([{"alias": 5, "value": 51.0, "datatype": "Float"}],
                                                 timestamp_ms=T0_MS + 4000, seq=3), T0_MS / 1e3 + 9.0)
    t, v, _ = store.snapshot("F1")
    assert list(t) == [T0_MS / 1e3, T0_MS / 1e3 + 4.0] and list(v) == [50.0, 51.0]
    assert session.sequence_gaps == {"plant/edge1": 0}
    assert session.ignored == 1  # Other/Unbound in the NBIRTH: declared, bound to no sensor
    assert ingest.rejects.total == 0


def test_alias_before_birth_is_rejected_and_a_rebirth_requested(rig) -> None:
    session, store, ingest = rig
    seen = []
    ingest.on_sparkplug = seen.append
    ingest(DEV.format("DDATA"), encode_payload([{"alias": 1, "timestamp": T0_MS, "value": 1.0,
                                                  "datatype": "Double"}], seq=9), T0_MS / 1e3)
    assert ingest.rejects.counts()["unknown_alias"] == 1
    assert store.counts()["P1"] == 0
    # §5.9/§5.17: the host asks the edge node for its births with an NCMD rebirth request
    (cmd_topic, cmd), = seen[0].commands
    assert cmd_topic == "spBv1.0/plant/NCMD/edge1"
    assert decode_payload(cmd).metrics[0].name == "Node Control/Rebirth"
    assert session.rebirth_requests == {"plant/edge1": 1}


def test_sequence_gaps_are_counted_and_255_wraps_to_0(rig) -> None:
    session, _, ingest = rig
    for t, p in births(seq0=254):  # NBIRTH 254, DBIRTH 255
        ingest(t, p, T0_MS / 1e3)
    data = [{"alias": 1, "timestamp": T0_MS + 1, "value": 1.0, "datatype": "Double"}]
    # §6.4.5: seq grows by one per message; after 255 the next is 0
    ingest(DEV.format("DDATA"), encode_payload(data, seq=0), T0_MS / 1e3)
    assert session.sequence_gaps["plant/edge1"] == 0
    ingest(DEV.format("DDATA"), encode_payload(data, seq=2), T0_MS / 1e3)  # 1 lost
    ingest(DEV.format("DDATA"), encode_payload(data, seq=3), T0_MS / 1e3)
    assert session.sequence_gaps["plant/edge1"] == 1


def test_historical_samples_never_reach_the_store(rig) -> None:
    session, store, ingest = rig
    routed = []
    ingest.on_sparkplug = lambda out: routed.extend(out.historical)
    for t, p in births():
        ingest(t, p, T0_MS / 1e3)
    before = store.counts()["P1"]
    # §6.4.6 is_historical: "should not be considered a real time/current value"
    ingest(DEV.format("DDATA"), encode_payload([{"alias": 1, "timestamp": T0_MS - 3_600_000, "value": 99.0,
                                                  "datatype": "Double", "is_historical": True}], seq=2),
           T0_MS / 1e3)
    assert store.counts()["P1"] == before
    assert session.historical == 1
    assert [(s.tag, s.time, s.value) for s in routed] == [("P1", T0_MS / 1e3 - 3600.0, 99.0e5)]


def test_deaths_mark_tags_stale_at_once_and_bdseq_must_match(rig) -> None:
    session, store, ingest = rig
    for t, p in births(bdseq=3):
        ingest(t, p, T0_MS / 1e3)
    end = T0_MS / 1e3 + 1.0
    assert not any(w.stale for w in store.window(end - 10, end).values())
    # §5.7: DDEATH - the device's metrics are stale
    ingest(DEV.format("DDEATH"), encode_payload([], timestamp_ms=T0_MS, seq=2), T0_MS / 1e3)
    w = store.window(end - 10, end)
    assert (w["P1"].stale, w["T1"].stale, w["F1"].stale) == (True, True, False)
    # §5.5: a will with an older bdSeq is ignored
    ndeath = [{"name": "bdSeq", "datatype": "Int64", "value": 2}]
    ingest(NODE.format("NDEATH"), encode_payload(ndeath, timestamp_ms=T0_MS), T0_MS / 1e3)
    assert not store.window(end - 10, end)["F1"].stale
    assert session.deaths_ignored == {"plant/edge1": 1}
    # §5.5: NDEATH with the current bdSeq: every metric of the node and its devices is stale
    ndeath[0]["value"] = 3
    ingest(NODE.format("NDEATH"), encode_payload(ndeath, timestamp_ms=T0_MS), T0_MS / 1e3)
    assert all(w.stale for w in store.window(end - 10, end).values())
    assert session.online() == {"plant/edge1": False}
    # rebirth with new aliases: the old alias 1 now names the temperature
    for t, p in births(bdseq=4, aliases=(2, 1)):
        ingest(t, p, T0_MS / 1e3 + 1.0)
    assert store.offline() == frozenset() and session.online() == {"plant/edge1": True}
    ingest(DEV.format("DDATA"), encode_payload([{"alias": 1, "timestamp": T0_MS + 5000, "value": 305.0,
                                                  "datatype": "Double"}], seq=2), T0_MS / 1e3 + 5.0)
    assert store.snapshot("T1")[1][-1] == 305.0


def test_bad_payloads_and_types_are_counted_never_raised(rig) -> None:
    _, _, ingest = rig
    for t, p in births():
        ingest(t, p, T0_MS / 1e3)
    ingest(DEV.format("DDATA"), b"\x08\x96", T0_MS / 1e3)  # truncated varint
    ingest(DEV.format("DDATA"), encode_payload([{"alias": 1, "timestamp": T0_MS, "value": "high",
                                                  "datatype": "String"}], seq=2), T0_MS / 1e3)
    ingest(DEV.format("DDATA"), encode_payload([{"name": "Drum/Level", "timestamp": T0_MS, "value": 1.0,
                                                  "datatype": "Double"}], seq=3), T0_MS / 1e3)
    ingest(DEV.format("DDATA"), encode_payload([{"alias": 1, "timestamp": T0_MS, "value": 1e3,
                                                  "datatype": "Double"}], seq=4), T0_MS / 1e3)  # 1e8 Pa > 3e7
    ingest("spBv1.0/plant/NCMD/edge1", rebirth_request(T0_MS), T0_MS / 1e3)  # a command: not data
    c = ingest.rejects.counts()
    assert (c["bad_protobuf"], c["wrong_type"], c["unknown_metric"], c["out_of_range"]) == (1, 1, 1, 1)
    assert ingest.rejects.total == 4


def test_bindings_are_checked_at_construction() -> None:
    with pytest.raises(ValueError, match="NDATA topic of an edge node"):
        SparkplugSession([sp_binding("A", "spBv1.0/g/NBIRTH/n", "m")])
    with pytest.raises(ValueError, match="already bound"):
        SparkplugSession([sp_binding("A", "spBv1.0/g/NDATA/n", "m"), sp_binding("B", "spBv1.0/g/NDATA/n", "m")])
    with pytest.raises(ValueError, match="decoded by"):
        TopicMap([sp_binding("A", "spBv1.0/g/NDATA/n", "m")])
    s = SparkplugSession([sp_binding("A", "spBv1.0/g/NDATA/n", "m"), sp_binding("B", "spBv1.0/g/DDATA/n/d", "m")])
    assert s.subscriptions == ["spBv1.0/g/+/n/#"]  # births, data, deaths of the node and its devices


def test_quality_property_marks_samples_bad_or_rejects_a_bad_code(rig) -> None:
    _, store, ingest = rig
    for t, p in births():
        ingest(t, p, T0_MS / 1e3)
    # §6.4.9.1 Quality Codes: property 'Quality', Int32, 0 BAD, 192 GOOD, 500 STALE
    for i, q in enumerate((192, 0, 500)):
        ingest(DEV.format("DDATA"), encode_payload([{"alias": 1, "timestamp": T0_MS + 1000 * (i + 1),
                                                      "value": 100.0, "datatype": "Double", "quality": q}],
                                                    seq=2 + i), T0_MS / 1e3 + 4.0)
    _, _, ok = store.snapshot("P1")
    assert list(ok) == [True, True, False, False]  # DBIRTH (no property: good), then 192, 0, 500
    w = store.window(T0_MS / 1e3, T0_MS / 1e3 + 5.0)["P1"]
    assert (w.count, w.n_bad) == (2, 2)
    ingest(DEV.format("DDATA"), encode_payload([{"alias": 1, "timestamp": T0_MS + 4500, "value": 1.0,
                                                  "datatype": "Double", "quality": 7}], seq=5), T0_MS / 1e3 + 5.0)
    assert ingest.rejects.counts()["bad_quality"] == 1


def test_bench_sparkplug_ingests_every_sample_and_reports_json_figures() -> None:
    import argparse
    import json

    from twin.bench import sparkplug as bench

    figures = bench.run(argparse.Namespace(messages=300, metrics=20, per_message=5, repeat=1))
    json.dumps(figures)  # the command prints it as JSON
    # the bench itself asserts that all 300 x 5 samples (+ 20 from the DBIRTH) reached the store
    assert figures["messages"] == 300 and figures["metrics_per_message"] == 5
    assert figures["sparkplug_messages_per_second"] > 0 and figures["json_batch_messages_per_second"] > 0


def test_hostile_sparkplug_messages_never_raise_and_each_is_counted(rig) -> None:
    """Random bytes, truncations and bit flips of valid payloads on every message type:
    each message ends as samples, counted rejections or session events, never an exception."""
    import random

    _, store, ingest = rig
    rng = random.Random(7)
    valid = [p for _, p in births()] + [encode_payload(
        [{"alias": 1, "timestamp": T0_MS, "value": 1.0, "datatype": "Double", "quality": 192},
         {"name": "Drum/Temperature", "timestamp": T0_MS, "value": 2, "datatype": "Int16"}], seq=3)]
    kinds = ["NBIRTH", "NDATA", "NDEATH", "DBIRTH", "DDATA", "DDEATH", "NCMD", "STATE"]
    for i in range(3000):
        base = bytearray(rng.choice(valid))
        how = rng.random()
        if how < 0.3:
            data = bytes(rng.getrandbits(8) for _ in range(rng.randrange(0, 64)))
        elif how < 0.6:
            data = bytes(base[: rng.randrange(0, len(base))])
        else:
            for _ in range(rng.randrange(1, 4)):
                base[rng.randrange(len(base))] ^= 1 << rng.randrange(8)
            data = bytes(base)
        kind = rng.choice(kinds)
        topic = (DEV if kind.startswith("D") else NODE).format(kind)
        before = ingest.messages
        ingest(topic, data, T0_MS / 1e3 + i * 0.01)
        assert ingest.messages == before + 1
    assert ingest.rejects.total > 0 and sum(store.counts().values()) > 0
