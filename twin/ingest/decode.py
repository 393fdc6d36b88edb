"""Decode MQTT payloads into tag samples in SI units.

A :class:`TopicMap` is built once from :class:`TagBinding` objects (the daemon
maps the plant configuration onto these) and turns ``(topic, payload, now)``
into a :class:`DecodeOutcome`: the accepted samples and the rejected ones, each
rejection carrying one reason from the fixed set :data:`REJECT_REASONS`.
Decoding never raises on bad input; it only raises ``ValueError`` at
construction when the bindings themselves are inconsistent.

Payload kinds
-------------
``"number"``
    The payload is one number in ASCII text (``b"12.5"``); time = receive time.
``"json"``
    A JSON document; ``value``, ``timestamp`` and ``quality`` locate fields by
    JSON pointer (RFC 6901, ``"/data/0/value"``) or, without a leading ``/``,
    by top-level key (``"v"``). Several bindings may share one topic (each
    picks its own field); the document is parsed once.
``"batch"``
    Several tags in one JSON message::

        {"ts": 1717171717.5, "values": {"HP_P": 16.1, "HP_T": {"v": 540.2, "q": "good"}}}

    ``value`` points at the object of tag values (default ``"/values"``),
    ``timestamp`` at the message time (default ``"/ts"``). Each entry is a
    number or an object with ``"v"`` (value), optional ``"q"`` (quality) and
    optional ``"ts"`` (per-tag time). Tags are the binding tag names; every
    binding on a batch topic must use the same format. Tags absent from a
    message are simply not updated; names not bound are rejected as
    ``"unknown_tag"`` (keyed by topic, so the key set stays bounded).

Timestamps are epoch seconds, epoch milliseconds or RFC 3339 text with an
offset; ``"auto"`` takes numbers above 1e11 as milliseconds. A missing
timestamp means the receive time. Whether a time is plausible (not too old,
not in the future) is the :class:`~twin.ingest.pipeline.Ingestor`'s policy.

Numbers in text (a ``number`` payload, a JSON string value or timestamp) are
parsed strictly: optional sign, digits, optional fraction and exponent, or
``nan``/``inf``; no surrounding blanks, no ``_`` digit separators, no hex.
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from datetime import datetime
from json.scanner import make_scanner
from typing import Any, NamedTuple

from twin.units import strict_float

REJECT_REASONS: tuple[str, ...] = (
    "unknown_topic",  # no binding for the topic
    "unknown_tag",  # a batch message names a tag that is not bound
    "oversize",  # payload longer than the configured limit
    "bad_json",  # not parseable as JSON (or not UTF-8)
    "not_a_number",  # text that does not parse as a number
    "not_finite",  # NaN or infinite (before or after scaling)
    "wrong_type",  # a JSON value of the wrong type (bool, object, array)
    "missing_value",  # the value field is absent or null
    "bad_timestamp",  # a timestamp present but unusable
    "bad_quality",  # a quality field of unusable type
    "out_of_range",  # the SI value lies outside the tag's valid range
    "too_old",  # timestamp older than any window still to be closed (the horizon)
    "future_timestamp",  # timestamp ahead of the receive time by more than the tolerance
    "bad_protobuf",  # a Sparkplug B topic whose payload is not a Sparkplug B protobuf payload
    "unknown_alias",  # a Sparkplug DATA metric by an alias the current BIRTH did not declare
    "unknown_metric",  # a Sparkplug DATA metric by a name the current BIRTH did not declare
)
"""Every reason a sample can be rejected for; a fixed, bounded set."""

PAYLOAD_KINDS = ("number", "json", "batch", "sparkplug")
TIMESTAMP_FORMATS = ("epoch_s", "epoch_ms", "rfc3339", "auto")
DEFAULT_MAX_PAYLOAD_BYTES = 64 * 1024

# Accepted time range after conversion to epoch seconds: 1970 .. year 5138.
_MAX_EPOCH_S = 1e11



class Sample(NamedTuple):
    """One accepted measurement."""

    tag: str
    time: float  # [s] since the epoch
    value: float  # SI value after scale/offset
    quality_ok: bool


class Rejection(NamedTuple):
    """One rejected measurement or message.

    ``key`` is the tag when one is known, the topic otherwise; ``reason`` is
    one of :data:`REJECT_REASONS`; ``detail`` is a short text for a log line.
    """

    key: str
    reason: str
    detail: str = ""


@dataclass
class DecodeOutcome:
    """What one message produced: samples and rejections (either may be empty)."""

    samples: list[Sample] = field(default_factory=list)
    rejections: list[Rejection] = field(default_factory=list)


@dataclass(frozen=True)
class PayloadFormat:
    """How a payload carries a value.

    Attributes
    ----------
    kind : str
        ``"number"``, ``"json"`` or ``"batch"`` (see the module docstring).
    value : str or None
        JSON pointer or top-level key of the value (``json``: required;
        ``batch``: the values object, default ``"/values"``).
    timestamp : str or None
        Pointer or key of the timestamp; ``None`` = receive time
        (``batch``: default ``"/ts"``).
    timestamp_format : str
        ``"epoch_s"``, ``"epoch_ms"``, ``"rfc3339"`` or ``"auto"``.
    quality : str or None
        Pointer or key of a quality field (``json`` only); ``None`` = always good.
    good_quality : frozenset or None
        Quality values that mean good. Required when ``quality`` is set; for
        ``batch`` it applies to the ``"q"`` entries (default ``{True, "good"}``).
        Booleans and numbers are told apart (``True`` does not match ``1``).
    metric : str or None
        ``sparkplug`` only (and required there): the Sparkplug B metric name;
        the binding's topic is the NDATA or DDATA topic of its edge node or
        device (decoded by :mod:`twin.ingest.sparkplug`, not by :class:`TopicMap`).
    """

    kind: str = "number"
    value: str | None = None
    timestamp: str | None = None
    timestamp_format: str = "auto"
    quality: str | None = None
    good_quality: frozenset[str | int | bool] | None = None
    metric: str | None = None

    def __post_init__(self) -> None:
        if self.kind not in PAYLOAD_KINDS:
            raise ValueError(f"payload kind {self.kind!r} is not one of {PAYLOAD_KINDS}")
        if self.timestamp_format not in TIMESTAMP_FORMATS:
            raise ValueError(
                f"timestamp_format {self.timestamp_format!r} is not one of {TIMESTAMP_FORMATS}"
            )
        if self.kind == "json" and not self.value:
            raise ValueError("a 'json' payload format needs 'value' (a JSON pointer or key)")
        if self.kind in ("number", "sparkplug") and (self.value or self.timestamp or self.quality):
            raise ValueError(f"a {self.kind!r} payload format takes no value/timestamp/quality fields")
        if (self.kind == "sparkplug") != bool(self.metric):
            raise ValueError("a 'sparkplug' payload format needs 'metric' (a Sparkplug metric name), "
                             "and only it takes one")
        if self.quality is not None and self.good_quality is None:
            raise ValueError(f"quality field {self.quality!r} is set but good_quality is not")
        for name in ("value", "timestamp", "quality"):
            pointer = getattr(self, name)
            if pointer is not None:
                compile_pointer(pointer)


@dataclass(frozen=True)
class TagBinding:
    """Where a tag's value arrives and how it becomes SI.

    ``value_si = raw * scale + offset``; samples outside
    ``[valid_min_si, valid_max_si]`` are rejected (NaN = no limit).
    """

    tag: str
    topic: str
    fmt: PayloadFormat = PayloadFormat()
    scale: float = 1.0
    offset: float = 0.0
    valid_min_si: float = math.nan
    valid_max_si: float = math.nan

    def __post_init__(self) -> None:
        if not self.tag:
            raise ValueError("a tag binding needs a non-empty tag name")
        if not self.topic or "+" in self.topic or "#" in self.topic:
            raise ValueError(
                f"tag {self.tag!r}: topic {self.topic!r} must be a non-empty exact topic "
                "(no '+' or '#' wildcards)"
            )
        if not (math.isfinite(self.scale) and self.scale != 0.0):
            raise ValueError(f"tag {self.tag!r}: scale {self.scale!r} must be finite and non-zero")
        if not math.isfinite(self.offset):
            raise ValueError(f"tag {self.tag!r}: offset {self.offset!r} must be finite")
        if self.valid_min_si > self.valid_max_si:
            raise ValueError(
                f"tag {self.tag!r}: valid_min_si {self.valid_min_si} > valid_max_si {self.valid_max_si}"
            )


# ----------------------------------------------------------------- helpers ---


def compile_pointer(pointer: str) -> tuple[str, ...]:
    """Split a JSON pointer (RFC 6901) or a bare top-level key into tokens.

    ``""`` is the whole document, ``"/a/0"`` two tokens, ``"v"`` the key ``v``.
    """
    if not isinstance(pointer, str):
        raise ValueError(f"JSON pointer {pointer!r} must be a string")
    if pointer == "":
        return ()
    if not pointer.startswith("/"):
        return (pointer,)
    return tuple(t.replace("~1", "/").replace("~0", "~") for t in pointer[1:].split("/"))


_MISSING = object()


def resolve(doc: Any, tokens: tuple[str, ...]) -> Any:
    """Follow pointer tokens into a parsed JSON document; a miss gives a sentinel."""
    for token in tokens:
        if isinstance(doc, dict):
            doc = doc.get(token, _MISSING)
            if doc is _MISSING:
                return _MISSING
        elif isinstance(doc, list):
            if not token.isdigit() or (len(token) > 1 and token[0] == "0"):
                return _MISSING
            index = int(token)
            if index >= len(doc):
                return _MISSING
            doc = doc[index]
        else:
            return _MISSING
    return doc


def parse_timestamp(raw: Any, fmt: str) -> float | None:
    """Turn a timestamp field into epoch seconds, or ``None`` if unusable.

    Parameters
    ----------
    raw : number or str
        The field as found in the payload.
    fmt : str
        One of :data:`TIMESTAMP_FORMATS`.
    """
    try:
        if isinstance(raw, bool) or raw is None:
            return None
        if isinstance(raw, int | float):
            if fmt == "rfc3339":
                return None
            t = float(raw)
            if fmt == "epoch_ms" or (fmt == "auto" and abs(t) > _MAX_EPOCH_S):
                t /= 1000.0
        elif isinstance(raw, str):
            text = raw
            if fmt in ("epoch_s", "epoch_ms", "auto"):
                try:
                    return parse_timestamp(strict_float(text), fmt)
                except ValueError:
                    if fmt != "auto":
                        return None
            dt = datetime.fromisoformat(text.upper().replace("Z", "+00:00"))
            if dt.tzinfo is None:
                return None  # RFC 3339 requires an offset; local time is ambiguous
            t = dt.timestamp()
        else:
            return None
    except (ValueError, OverflowError, OSError):
        return None
    if not (math.isfinite(t) and 0.0 <= t < _MAX_EPOCH_S):
        return None
    return t


def _number(raw: Any) -> tuple[float | None, str]:
    """A JSON value as a float, or ``(None, reason)``."""
    if raw is _MISSING or raw is None:
        return None, "missing_value"
    if isinstance(raw, bool):
        return None, "wrong_type"
    if isinstance(raw, int | float):
        try:
            x = float(raw)
        except OverflowError:
            return None, "not_finite"
    elif isinstance(raw, str):
        try:
            x = strict_float(raw)
        except ValueError:
            return None, "not_a_number"
    else:
        return None, "wrong_type"
    if not math.isfinite(x):
        return None, "not_finite"
    return x, ""


def _quality_key(q: Any) -> tuple[str, Any] | None:
    if isinstance(q, bool):
        return ("b", q)
    if isinstance(q, int | float):
        try:
            return ("n", float(q))
        except OverflowError:
            return None
    if isinstance(q, str):
        return ("s", q)
    return None


# -------------------------------------------------------------- topic map ---


@dataclass(frozen=True)
class _Compiled:
    binding: TagBinding
    value: tuple[str, ...]
    timestamp: tuple[str, ...] | None
    quality: tuple[str, ...] | None
    good: frozenset[tuple[str, Any]]


_JSON = json.JSONDecoder()
# (document, end index) or StopIteration; unlike json.loads it skips no whitespace
_SCAN = make_scanner(_JSON)  # type: ignore[arg-type]
_TS_CODES = {"epoch_s": 0, "epoch_ms": 1, "rfc3339": 2, "auto": 3}
_DEFAULT_BATCH_GOOD: frozenset[str | int | bool] = frozenset({True, "good"})


class TopicMap:
    """Topic → tag bindings; decodes messages into SI samples.

    Parameters
    ----------
    bindings : iterable of TagBinding
        One per tag; tag names must be unique.
    max_payload_bytes : int
        Longer payloads are rejected as ``"oversize"`` without parsing.
    """

    def __init__(
        self, bindings: Iterable[TagBinding], max_payload_bytes: int = DEFAULT_MAX_PAYLOAD_BYTES
    ) -> None:
        if max_payload_bytes <= 0:
            raise ValueError(f"max_payload_bytes {max_payload_bytes!r} must be positive")
        self.max_payload_bytes = int(max_payload_bytes)
        self._by_topic: dict[str, list[_Compiled]] = {}
        self._batch: dict[str, dict[str, _Compiled]] = {}
        self.bindings: dict[str, TagBinding] = {}
        for b in bindings:
            if b.fmt.kind == "sparkplug":
                raise ValueError(f"tag {b.tag!r}: a Sparkplug binding is decoded by "
                                 "twin.ingest.sparkplug.SparkplugSession, not by a TopicMap")
            if b.tag in self.bindings:
                raise ValueError(f"tag {b.tag!r} is bound twice")
            self.bindings[b.tag] = b
            c = self._compile(b)
            self._by_topic.setdefault(b.topic, []).append(c)
        for topic, cs in self._by_topic.items():
            kinds = {c.binding.fmt.kind for c in cs}
            if "batch" in kinds:
                if len({c.binding.fmt for c in cs}) != 1:
                    raise ValueError(
                        f"topic {topic!r}: every binding on a batch topic needs the same format"
                    )
                self._batch[topic] = {c.binding.tag: c for c in cs}
            elif "number" in kinds and len(cs) > 1:
                raise ValueError(
                    f"topic {topic!r}: a 'number' payload carries one tag, but "
                    f"{sorted(c.binding.tag for c in cs)} are bound to it"
                )
        # topics whose messages decode_one() may take: one number/json binding,
        # value and timestamp as top-level keys, no quality field
        self._simple: dict[str, tuple[Any, ...]] = {}
        for topic, cs in self._by_topic.items():
            c = cs[0]
            f = c.binding.fmt
            if len(cs) != 1 or f.kind == "batch" or c.quality is not None:
                continue
            if f.kind == "json" and (
                len(c.value) != 1 or (c.timestamp is not None and len(c.timestamp) != 1)
            ):
                continue
            b = c.binding
            self._simple[topic] = (
                b.tag,
                c.value[0] if f.kind == "json" else None,
                c.timestamp[0] if c.timestamp is not None else None,
                _TS_CODES[f.timestamp_format],
                b.scale,
                b.offset,
                b.valid_min_si,
                b.valid_max_si,
            )

    @staticmethod
    def _compile(b: TagBinding) -> _Compiled:
        f = b.fmt
        default_value, default_ts = ("/values", "/ts") if f.kind == "batch" else ("", None)
        value = compile_pointer(f.value if f.value is not None else default_value)
        ts = f.timestamp if f.timestamp is not None else default_ts
        good_set = f.good_quality
        if good_set is None and f.kind == "batch":
            good_set = _DEFAULT_BATCH_GOOD
        good = frozenset(k for k in (_quality_key(q) for q in good_set or ()) if k is not None)
        return _Compiled(
            b,
            value,
            compile_pointer(ts) if ts is not None else None,
            compile_pointer(f.quality) if f.quality is not None else None,
            good,
        )

    @property
    def topics(self) -> list[str]:
        """Every topic to subscribe to, sorted."""
        return sorted(self._by_topic)

    def decode(self, topic: str, payload: bytes, now: float) -> DecodeOutcome:
        """Decode one message; never raises on bad payloads.

        Parameters
        ----------
        topic : str
            The message topic.
        payload : bytes
            The raw payload.
        now : float
            Receive time [s since the epoch], used when the payload has no time.
        """
        out = DecodeOutcome()
        compiled = self._by_topic.get(topic)
        if compiled is None:
            out.rejections.append(Rejection(topic, "unknown_topic"))
            return out
        if len(payload) > self.max_payload_bytes:
            out.rejections.append(
                Rejection(topic, "oversize", f"{len(payload)} > {self.max_payload_bytes} bytes")
            )
            return out
        kind = compiled[0].binding.fmt.kind
        if kind == "number":
            self._decode_number(compiled[0], payload, now, out)
            return out
        try:
            doc = _JSON.decode(payload.decode("utf-8"))
        except (ValueError, RecursionError) as exc:  # UnicodeDecodeError is a ValueError
            out.rejections.append(Rejection(topic, "bad_json", str(exc)[:80]))
            return out
        if kind == "batch":
            self._decode_batch(topic, self._batch[topic], doc, now, out)
        else:
            for c in compiled:
                self._decode_json(c, doc, now, out)
        return out

    def decode_one(
        self, topic: str, payload: bytes, now: float
    ) -> tuple[str, float, float, bool] | None:
        """The fast path for the common message: ``(tag, time, value, quality_ok)``.

        Taken for a topic with one ``number`` or ``json`` binding whose value
        and timestamp are top-level keys and which has no quality field, when
        the message is valid. ``None`` means "not decided here": call
        :meth:`decode`, which gives the same sample for any message this
        method accepts, and the rejections for the rest.

        Parameters
        ----------
        topic : str
            The message topic.
        payload : bytes
            The raw payload.
        now : float
            Receive time [s since the epoch].
        """
        plan = self._simple.get(topic)
        if plan is None or len(payload) > self.max_payload_bytes:
            return None
        tag, key, ts_key, ts_code, scale, offset, lo, hi = plan
        try:
            if key is None:
                raw = strict_float(payload)
                t = now
            else:
                text = payload.decode("utf-8")
                doc, end = _SCAN(text, 0)
                if end != len(text) or type(doc) is not dict:
                    return None
                x = doc.get(key)
                if type(x) is not float and type(x) is not int:
                    return None  # also bool, str, null, missing: decode() judges
                raw = float(x)
                tr = doc.get(ts_key) if ts_key is not None else None
                if tr is None:
                    t = now
                elif (type(tr) is float or type(tr) is int) and ts_code != 2:
                    t = float(tr)
                    if ts_code == 1 or (ts_code == 3 and abs(t) > _MAX_EPOCH_S):
                        t /= 1000.0
                    if not 0.0 <= t < _MAX_EPOCH_S:  # NaN fails too
                        return None
                else:
                    return None
        except (ValueError, TypeError, StopIteration, OverflowError, RecursionError):
            return None
        v = raw * scale + offset
        if v - v != 0.0 or v < lo or v > hi:  # not finite, or out of range (NaN limits: no limit)
            return None
        return tag, t, v, True

    # ------------------------------------------------------------- kinds ---

    def _accept(self, c: _Compiled, raw: float, t: float, ok: bool, out: DecodeOutcome) -> None:
        b = c.binding
        v = raw * b.scale + b.offset
        if not math.isfinite(v):
            out.rejections.append(Rejection(b.tag, "not_finite", "after scaling"))
        elif v < b.valid_min_si or v > b.valid_max_si:  # NaN limits compare False
            out.rejections.append(
                Rejection(
                    b.tag, "out_of_range", f"{v:.6g} not in [{b.valid_min_si}, {b.valid_max_si}]"
                )
            )
        else:
            out.samples.append(Sample(b.tag, t, v, ok))

    def _decode_number(self, c: _Compiled, payload: bytes, now: float, out: DecodeOutcome) -> None:
        tag = c.binding.tag
        try:
            raw = strict_float(payload)
        except (ValueError, TypeError):
            out.rejections.append(Rejection(tag, "not_a_number", repr(payload[:32])))
            return
        if not math.isfinite(raw):
            out.rejections.append(Rejection(tag, "not_finite"))
            return
        self._accept(c, raw, now, True, out)

    def _time(self, c: _Compiled, doc: Any, now: float) -> float | None:
        if c.timestamp is None:
            return now
        raw = resolve(doc, c.timestamp)
        if raw is _MISSING or raw is None:
            return now
        return parse_timestamp(raw, c.binding.fmt.timestamp_format)

    def _quality(self, c: _Compiled, raw: Any) -> bool | None:
        """True/False for good/bad, None for an unusable field."""
        if raw is _MISSING or raw is None:
            return False  # unknown quality is not good quality
        key = _quality_key(raw)
        if key is None:
            return None
        return key in c.good

    def _decode_json(self, c: _Compiled, doc: Any, now: float, out: DecodeOutcome) -> None:
        tag = c.binding.tag
        raw, reason = _number(resolve(doc, c.value))
        if raw is None:
            out.rejections.append(Rejection(tag, reason))
            return
        t = self._time(c, doc, now)
        if t is None:
            out.rejections.append(Rejection(tag, "bad_timestamp"))
            return
        ok = True
        if c.quality is not None:
            q = self._quality(c, resolve(doc, c.quality))
            if q is None:
                out.rejections.append(Rejection(tag, "bad_quality"))
                return
            ok = q
        self._accept(c, raw, t, ok, out)

    def _decode_batch(
        self, topic: str, tags: Mapping[str, _Compiled], doc: Any, now: float, out: DecodeOutcome
    ) -> None:
        first = next(iter(tags.values()))
        values = resolve(doc, first.value)
        if not isinstance(values, dict):
            reason = "missing_value" if values is _MISSING or values is None else "wrong_type"
            out.rejections.append(Rejection(topic, reason, "batch values object"))
            return
        t_msg = self._time(first, doc, now)
        if t_msg is None:
            out.rejections.append(Rejection(topic, "bad_timestamp"))
            return
        fmt = first.binding.fmt.timestamp_format
        for name, entry in values.items():
            c = tags.get(name)
            if c is None:
                out.rejections.append(Rejection(topic, "unknown_tag", str(name)[:64]))
                continue
            t: float | None = t_msg
            ok: bool | None = True
            if isinstance(entry, dict):
                raw_v = entry.get("v", _MISSING)
                if "ts" in entry and entry["ts"] is not None:
                    t = parse_timestamp(entry["ts"], fmt)
                if "q" in entry:
                    ok = self._quality(c, entry["q"])
            else:
                raw_v = entry
            raw, reason = _number(raw_v)
            if raw is None:
                out.rejections.append(Rejection(name, reason))
            elif t is None:
                out.rejections.append(Rejection(name, "bad_timestamp"))
            elif ok is None:
                out.rejections.append(Rejection(name, "bad_quality"))
            else:
                self._accept(c, raw, t, ok, out)
