"""Sparkplug B 3.0 adapter: the only module that imports protobuf.

Eclipse Sparkplug 3.0 carries plant data over MQTT in topics of the form
``spBv1.0/<group>/<message type>/<edge node>[/<device>]`` (§4.1) with protobuf
payloads (§6.4.5 Payload, §6.4.6 Metric) of one schema, the specification's ``sparkplug_b.proto``; its
descriptor is loaded from :mod:`twin._sparkplug_schema` into a private pool.

This module is a codec only: topic names in and out (:func:`parse_topic`,
:func:`topic`), payloads in and out (:func:`decode_payload`,
:func:`encode_payload`, :func:`rebirth_request`) and the value of a metric as
a number (:func:`metric_number`). The session state of a host application
(aliases learned from BIRTH, sequence numbers, deaths) lives in
:mod:`twin.ingest.sparkplug`.

References
----------
Eclipse Sparkplug Specification, version 3.0.0 (Eclipse Foundation, 2022):
§4.1 topic namespace elements; §5.4/§5.5 edge node session establishment and
termination (``bdSeq``); §5.9 message ordering (``seq``); §5.17 commands
(``Node Control/Rebirth``); §6.4.5 payload; §6.4.6 metric (alias, timestamp,
``is_historical``); §6.4.16/§6.4.17 data types and their details.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass, field
from typing import Any, NamedTuple

from google.protobuf import __version__ as _protobuf_version
from google.protobuf import descriptor_pool, message_factory
from google.protobuf.internal import api_implementation
from google.protobuf.message import DecodeError

from twin._sparkplug_schema import SERIALIZED

NAMESPACE = "spBv1.0"
"""The Sparkplug B topic namespace element (§4.1.1)."""

NODE_MESSAGES = ("NBIRTH", "NDEATH", "NDATA", "NCMD")
DEVICE_MESSAGES = ("DBIRTH", "DDEATH", "DDATA", "DCMD")
MESSAGE_TYPES = (*NODE_MESSAGES, *DEVICE_MESSAGES)
"""Message types of the edge-node and device topics (§4.1.3); STATE is a host topic."""

QUALITY_PROPERTY = "Quality"  # §6.4.9.1: a metric property, Int32 (type 3)
QUALITY_CODES = {0: "bad", 192: "good", 500: "stale"}
"""The quality codes of §6.4.9.1; a metric without the property is good."""
REBIRTH_METRIC = "Node Control/Rebirth"  # §5.17: an NCMD metric, Boolean true
BDSEQ_METRIC = "bdSeq"  # §5.4: birth/death sequence number, in NBIRTH and NDEATH

PROTOBUF_BACKEND = f"{api_implementation.Type()} (protobuf {_protobuf_version})"
"""Which protobuf runtime decodes (``upb`` is the C extension), for benchmark reports."""

_POOL = descriptor_pool.DescriptorPool()
_FILE = _POOL.AddSerializedFile(SERIALIZED)
_PAYLOAD = message_factory.GetMessageClass(_POOL.FindMessageTypeByName("org.eclipse.tahu.protobuf.Payload"))

DATATYPES: dict[str, int] = {
    v.name: v.number for v in _POOL.FindEnumTypeByName("org.eclipse.tahu.protobuf.DataType").values}
"""Sparkplug data type name → number, read from the schema (§6.4.16)."""

_NAMES = {n: name for name, n in DATATYPES.items()}
# Data type → (value field of the Metric oneof, width in bits of a two's-complement integer or 0).
_INTEGER_FIELDS = {"Int8": ("int_value", 8), "Int16": ("int_value", 16), "Int32": ("int_value", 32),
                   "Int64": ("long_value", 64), "UInt8": ("int_value", 0), "UInt16": ("int_value", 0),
                   "UInt32": ("int_value", 0), "UInt64": ("long_value", 0)}
_FIELDS: dict[str, str] = {**{k: f for k, (f, _) in _INTEGER_FIELDS.items()}, "Float": "float_value",
                           "Double": "double_value", "Boolean": "boolean_value", "String": "string_value",
                           "Text": "string_value", "UUID": "string_value", "DateTime": "long_value",
                           "Bytes": "bytes_value", "File": "bytes_value"}
NUMERIC_DATATYPES: frozenset[int] = frozenset(DATATYPES[n] for n in (*_INTEGER_FIELDS, "Float", "Double"))
"""Data types that carry a measurement: the integer types, Float and Double."""


class SparkplugError(ValueError):
    """A topic or payload that is not valid Sparkplug B, with the reason in words."""


@dataclass(frozen=True)
class SparkplugTopic:
    """The parts of a Sparkplug B topic (§4.1); ``device`` is None on node topics."""

    group: str
    message_type: str
    edge_node: str
    device: str | None = None

    @property
    def node(self) -> str:
        """The edge node's identity within the namespace: ``<group>/<edge node>``."""
        return f"{self.group}/{self.edge_node}"

    def __str__(self) -> str:
        return topic(self.group, self.message_type, self.edge_node, self.device)


def topic(group: str, message_type: str, edge_node: str, device: str | None = None) -> str:
    """The topic name of a message (§4.1)."""
    if message_type not in MESSAGE_TYPES:
        raise SparkplugError(f"message type {message_type!r} is not one of {MESSAGE_TYPES}")
    parts = [NAMESPACE, group, message_type, edge_node] + ([device] if device is not None else [])
    return "/".join(parts)


def parse_topic(name: str) -> SparkplugTopic:
    """Split a Sparkplug B topic into its parts; :class:`SparkplugError` if it is not one.

    Node messages have four elements, device messages five; no element is empty
    or holds a wildcard (§4.1.2, §4.1.4, §4.1.5: group, edge node and device ids are plain UTF-8
    without ``/``, ``+`` or ``#``).
    """
    parts = name.split("/")
    if parts[0] != NAMESPACE:
        raise SparkplugError(f"topic {name!r} does not start with {NAMESPACE!r}")
    if len(parts) < 4 or parts[2] not in MESSAGE_TYPES:
        raise SparkplugError(f"topic {name!r}: expected {NAMESPACE}/<group>/<one of "
                             f"{'|'.join(MESSAGE_TYPES)}>/<edge node>[/<device>]")
    want = 5 if parts[2] in DEVICE_MESSAGES else 4
    if len(parts) != want:
        raise SparkplugError(f"topic {name!r}: a {parts[2]} topic has {want} elements, found {len(parts)}")
    bad = next((p for p in parts if not p or "+" in p or "#" in p), None)
    if bad is not None:
        raise SparkplugError(f"topic {name!r}: element {bad!r} is empty or holds a wildcard")
    return SparkplugTopic(parts[1], parts[2], parts[3], parts[4] if want == 5 else None)


class Metric(NamedTuple):
    """One metric of a payload (§6.4.6), as decoded; absent optional fields are None.

    ``value`` is the field the metric's oneof holds (``None`` when none is set);
    ``value_field`` names that field (``"double_value"`` ...). ``quality`` is the
    metric's ``Quality`` property (§6.4.9.1: 0 bad, 192 good, 500 stale), None
    when absent, −1 when present but not an ``int_value``.
    """

    name: str | None
    alias: int | None
    timestamp_ms: int | None
    datatype: int | None
    is_historical: bool
    is_null: bool
    value: Any
    value_field: str | None
    quality: int | None = None


@dataclass(frozen=True)
class Payload:
    """A decoded payload (§6.4.5): message timestamp [ms since the epoch], seq, metrics."""

    timestamp_ms: int | None
    seq: int | None
    metrics: list[Metric] = field(default_factory=list)


def decode_payload(data: bytes) -> Payload:
    """Parse a Sparkplug B protobuf payload; :class:`SparkplugError` if it is not one."""
    msg = _PAYLOAD()
    try:
        msg.ParseFromString(data)
    except (DecodeError, RuntimeError, ValueError) as exc:
        raise SparkplugError(f"not a Sparkplug B protobuf payload ({exc or 'truncated or malformed'})") from None
    metrics = []
    for m in msg.metrics:
        which = m.WhichOneof("value")
        name = m.name if m.HasField("name") else None
        if name is not None and not isinstance(name, str):  # proto2 hands invalid UTF-8 back as bytes
            raise SparkplugError(f"metric name {bytes(name)[:40]!r} is not UTF-8 text")
        metrics.append(Metric(
            name,
            m.alias if m.HasField("alias") else None,
            m.timestamp if m.HasField("timestamp") else None,
            m.datatype if m.HasField("datatype") else None,
            bool(m.is_historical), bool(m.is_null),
            getattr(m, which) if which in _PLAIN_FIELDS else None, which,
            _quality(m) if m.HasField("properties") else None,
        ))
    return Payload(msg.timestamp if msg.HasField("timestamp") else None,
                   msg.seq if msg.HasField("seq") else None, metrics)


def _quality(m: Any) -> int | None:
    keys = list(m.properties.keys)
    if QUALITY_PROPERTY not in keys:
        return None
    i = keys.index(QUALITY_PROPERTY)
    if i >= len(m.properties.values):
        return -1
    pv = m.properties.values[i]
    return int(pv.int_value) if pv.WhichOneof("value") == "int_value" else -1


_PLAIN_FIELDS = frozenset({"int_value", "long_value", "float_value", "double_value", "boolean_value",
                           "string_value", "bytes_value"})


def datatype_name(number: int | None) -> str:
    """The name of a data type number (``"Unknown(99)"`` for one the schema lacks)."""
    if number is None:
        return "none"
    return _NAMES.get(number, f"Unknown({number})")


def metric_number(m: Metric, datatype: int | None = None) -> float:
    """The metric's value as a float, per its data type (§6.4.17).

    ``datatype`` is the type declared in the BIRTH when the DATA metric omits it.
    Signed integers travel as two's complement in the unsigned field of their
    width (``Int8`` −1 is ``int_value`` 255). :class:`SparkplugError` names what
    was expected when the type carries no number, the value field does not match
    the type, or the metric is null.
    """
    dt = m.datatype if m.datatype is not None else datatype
    name = datatype_name(dt)
    if dt is None or dt not in NUMERIC_DATATYPES:
        raise SparkplugError(f"data type {name}: expected a numeric type (Int8..UInt64, Float, Double)")
    if m.is_null or m.value_field is None:
        raise SparkplugError(f"{name} metric without a value (is_null or no value field)")
    want = _FIELDS[name]
    if m.value_field != want:
        raise SparkplugError(f"{name} metric carries {m.value_field}; expected {want}")
    if want in ("int_value", "long_value"):
        v = int(m.value)
        bits = _INTEGER_FIELDS[name][1]
        if bits:
            v &= (1 << bits) - 1
            if v >= 1 << (bits - 1):
                v -= 1 << bits
        return float(v)
    return float(m.value)


# ------------------------------------------------------------------ encoding ---

def _set_value(pm: Any, datatype: int, value: Any) -> None:
    name = datatype_name(datatype)
    target = _FIELDS.get(name)
    if target is None:
        raise SparkplugError(f"encoding data type {name} is not supported here")
    if name in _INTEGER_FIELDS:
        bits = _INTEGER_FIELDS[name][1] or (64 if target == "long_value" else 32)
        value = int(value) % (1 << bits)  # two's complement in the unsigned field
    elif name == "Boolean":
        value = bool(value)
    elif target in ("float_value", "double_value"):
        value = float(value)
    setattr(pm, target, value)


def encode_payload(metrics: Iterable[dict[str, Any]], *, timestamp_ms: int | None = None,
                   seq: int | None = None) -> bytes:
    """A Sparkplug B payload (for tests, the demo and rebirth requests).

    Each metric is a dict with any of ``name``, ``alias``, ``timestamp`` [ms],
    ``datatype`` (number or name), ``value``, ``is_historical``, ``is_null``,
    ``quality`` (a §6.4.9.1 code, sent as the ``Quality`` property).
    """
    msg = _PAYLOAD()
    if timestamp_ms is not None:
        msg.timestamp = int(timestamp_ms)
    if seq is not None:
        msg.seq = int(seq)
    for spec in metrics:
        pm = msg.metrics.add()
        if spec.get("name") is not None:
            pm.name = spec["name"]
        if spec.get("alias") is not None:
            pm.alias = int(spec["alias"])
        if spec.get("timestamp") is not None:
            pm.timestamp = int(spec["timestamp"])
        dt = spec.get("datatype")
        if isinstance(dt, str):
            dt = DATATYPES[dt]
        if dt is not None:
            pm.datatype = int(dt)
        if spec.get("is_historical"):
            pm.is_historical = True
        if spec.get("quality") is not None:
            pm.properties.keys.append(QUALITY_PROPERTY)
            pm.properties.values.add(type=DATATYPES["Int32"], int_value=int(spec["quality"]))
        if spec.get("is_null"):
            pm.is_null = True
        elif spec.get("value") is not None:
            if dt is None:
                raise SparkplugError("a metric with a value needs a datatype to encode it")
            _set_value(pm, dt, spec["value"])
    return bytes(msg.SerializeToString())


def rebirth_request(timestamp_ms: int) -> bytes:
    """The NCMD payload asking an edge node to publish its births again (§5.17)."""
    return encode_payload([{"name": REBIRTH_METRIC, "timestamp": timestamp_ms, "datatype": "Boolean",
                            "value": True}], timestamp_ms=timestamp_ms)


def epoch_seconds(timestamp_ms: int | None) -> float | None:
    """A Sparkplug timestamp (ms since the epoch, UTC) in seconds; None if absent or 0."""
    if not timestamp_ms:
        return None
    t = timestamp_ms / 1000.0
    return t if math.isfinite(t) else None
