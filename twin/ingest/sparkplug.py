"""Sparkplug B host-side session state: births, aliases, sequence numbers, deaths.

A :class:`SparkplugSession` is built from the sensors bound to Sparkplug
metrics (``TagBinding`` with ``PayloadFormat("sparkplug", metric=...)``; the
binding's topic is the NDATA topic of its edge node or the DDATA topic of its
device). It turns every message of those edge nodes into a
:class:`SparkplugOutcome` and keeps, per edge node, what a Sparkplug host
application must remember:

- **Births.** NBIRTH declares the node's metrics (name, alias, data type),
  DBIRTH a device's. Later DATA messages name metrics by alias; an alias or a
  name the current BIRTH did not declare is rejected (``unknown_alias``,
  ``unknown_metric``) and, since the host has missed the birth, a rebirth is
  requested (an NCMD ``Node Control/Rebirth``, at most once per
  ``rebirth_interval`` per node). Values carried in a BIRTH are samples too.
- **Quality.** A metric's ``Quality`` property (0 bad, 500 stale) makes a
  bad-quality sample (kept, never averaged); 192 or no property is good.
- **Time.** Each metric's own timestamp (ms since the epoch) is the sample
  time; the payload timestamp is the fallback, the receive time the last one.
- **Historical data** (``is_historical``) is store-and-forward data: it never
  reaches the tag store (live windows); it is counted and handed to the
  daemon, which can append it to a back-fill file.
- **Sequence numbers.** Every message of an edge node but NDEATH carries a
  ``seq`` that grows by one, 255 wrapping to 0, starting at NBIRTH; each jump
  is counted per node (``sequence_gaps``) and triggers a rebirth request.
- **Deaths.** NDEATH marks every tag of the node and its devices offline at
  once (the tag store reports them stale until their next BIRTH); its
  ``bdSeq`` must match the one of the current NBIRTH, or it is a late will
  message of an older session and is ignored (counted). DDEATH does the same
  for one device.

Messages of other types (NCMD, DCMD) are commands to the edge node and are not
data: they are passed over. Nothing here raises on bad input or logs.

References
----------
Eclipse Sparkplug Specification 3.0.0: §5.4/§5.5 edge node session (NBIRTH,
NDEATH, bdSeq; "all metrics ... STALE" on NDEATH), §5.6/§5.7 device session,
§5.9 message ordering (seq, rebirth on a gap), §5.17 commands (rebirth),
§6.4.6 metric (alias, timestamp, is_historical), §6.4.9.1 quality codes.
"""

from __future__ import annotations

import math
import threading
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, NamedTuple

from twin.ingest.decode import DEFAULT_MAX_PAYLOAD_BYTES, Rejection, Sample, TagBinding
from twin.sparkplug import (
    BDSEQ_METRIC,
    NAMESPACE,
    QUALITY_CODES,
    Metric,
    SparkplugError,
    decode_payload,
    epoch_seconds,
    metric_number,
    parse_topic,
    rebirth_request,
    topic,
)

SPARKPLUG_PREFIX = NAMESPACE + "/"
DEFAULT_REBIRTH_INTERVAL = 30.0  # [s] between two rebirth requests to one edge node
_CONTROL = ("Node Control/", "Device Control/")  # session control metrics (§5.17), not plant data


class HistoricalSample(NamedTuple):
    """An ``is_historical`` sample: SI value for counting and checks, raw value for a historian file."""

    tag: str
    time: float  # [s] since the epoch
    value: float  # SI
    raw: float  # as published (the sensor's engineering unit)


@dataclass
class SparkplugOutcome:
    """What one Sparkplug message produced.

    Attributes
    ----------
    samples, rejections : list
        Live samples for the tag store; rejections with reasons from
        :data:`twin.ingest.decode.REJECT_REASONS`.
    historical : list of HistoricalSample
        ``is_historical`` samples (range-checked): for back-fill, never live.
    offline, online : list of str
        Tags whose edge node or device died (stale at once) or was born again.
    events : list of (str, dict)
        Things worth one log line: ``sparkplug_birth``, ``sparkplug_death``,
        ``sparkplug_death_ignored``, ``sparkplug_sequence_gap``,
        ``sparkplug_rebirth_requested``.
    commands : list of (str, bytes)
        Messages to publish (rebirth requests: NCMD topic and payload).
    """

    samples: list[Sample] = field(default_factory=list)
    rejections: list[Rejection] = field(default_factory=list)
    historical: list[HistoricalSample] = field(default_factory=list)
    offline: list[str] = field(default_factory=list)
    online: list[str] = field(default_factory=list)
    events: list[tuple[str, dict[str, Any]]] = field(default_factory=list)
    commands: list[tuple[str, bytes]] = field(default_factory=list)


class _Source:
    """The session of one edge node (``device`` None) or one device."""

    __slots__ = ("aliases", "born", "bound", "types")

    def __init__(self) -> None:
        self.bound: dict[str, TagBinding] = {}  # metric name -> binding
        self.born = False
        self.aliases: dict[int, str] = {}
        self.types: dict[str, int] = {}  # metric name -> data type declared in the BIRTH

    def reset(self) -> None:
        self.born = False
        self.aliases = {}
        self.types = {}


class _Node:
    __slots__ = ("bdseq", "devices", "node", "own", "rebirth_at", "seq")

    def __init__(self, node: str) -> None:
        self.node = node
        self.own = _Source()
        self.devices: dict[str, _Source] = {}
        self.seq: int | None = None
        self.bdseq: int | None = None
        self.rebirth_at = -math.inf

    def tags(self) -> list[str]:
        out = [b.tag for b in self.own.bound.values()]
        for d in self.devices.values():
            out.extend(b.tag for b in d.bound.values())
        return out


class SparkplugSession:
    """Host-side Sparkplug B state for the edge nodes the plant file names.

    Parameters
    ----------
    bindings : iterable of TagBinding
        Sparkplug bindings (``fmt.kind == "sparkplug"``), one per tag; the
        topic is ``spBv1.0/<group>/NDATA/<node>`` or ``.../DDATA/<node>/<device>``.
    rebirth_interval : float
        Least time between two rebirth requests to one edge node [s]; ``inf``
        = never request one.
    max_payload_bytes : int
        Longer payloads are rejected as ``"oversize"`` without parsing.
    """

    def __init__(self, bindings: Iterable[TagBinding], *, rebirth_interval: float = DEFAULT_REBIRTH_INTERVAL,
                 max_payload_bytes: int = DEFAULT_MAX_PAYLOAD_BYTES) -> None:
        if not rebirth_interval > 0:
            raise ValueError(f"rebirth_interval {rebirth_interval!r} must be positive [s]")
        self.rebirth_interval = float(rebirth_interval)
        self.max_payload_bytes = int(max_payload_bytes)
        self._nodes: dict[tuple[str, str], _Node] = {}
        self.bindings: dict[str, TagBinding] = {}
        for b in bindings:
            if b.fmt.kind != "sparkplug" or not b.fmt.metric:
                raise ValueError(f"tag {b.tag!r}: not a Sparkplug binding (payload format {b.fmt.kind!r})")
            try:
                t = parse_topic(b.topic)
            except SparkplugError as exc:
                raise ValueError(f"tag {b.tag!r}: {exc}") from None
            if t.message_type not in ("NDATA", "DDATA"):
                raise ValueError(f"tag {b.tag!r}: topic {b.topic!r} must be the NDATA topic of an edge node "
                                 "or the DDATA topic of a device")
            if b.tag in self.bindings:
                raise ValueError(f"tag {b.tag!r} is bound twice")
            node = self._nodes.setdefault((t.group, t.edge_node), _Node(t.node))
            src = node.own if t.device is None else node.devices.setdefault(t.device, _Source())
            if b.fmt.metric in src.bound:
                raise ValueError(f"tag {b.tag!r}: metric {b.fmt.metric!r} of {b.topic!r} is already bound to "
                                 f"{src.bound[b.fmt.metric].tag!r}")
            src.bound[b.fmt.metric] = b
            self.bindings[b.tag] = b
        self._lock = threading.Lock()
        labels = sorted(n.node for n in self._nodes.values())
        self.sequence_gaps = dict.fromkeys(labels, 0)
        self.rebirth_requests = dict.fromkeys(labels, 0)
        self.deaths_ignored = dict.fromkeys(labels, 0)
        self.historical = 0  # is_historical samples routed to back-fill
        self.ignored = 0  # metrics an edge node sent that no sensor is bound to

    @property
    def subscriptions(self) -> list[str]:
        """One wildcard per edge node: its births, data and deaths and those of its devices."""
        return sorted(f"{NAMESPACE}/{g}/+/{n}/#" for g, n in self._nodes)

    def online(self) -> dict[str, bool]:
        """Per edge node (``<group>/<node>``): born and not dead since."""
        with self._lock:
            return {n.node: n.own.born for n in self._nodes.values()}

    # ---------------------------------------------------------------- messages ---

    def decode(self, name: str, payload: bytes, now: float) -> SparkplugOutcome:
        """Handle one message of topic ``name`` received at ``now`` [s]; never raises on bad input."""
        out = SparkplugOutcome()
        try:
            t = parse_topic(name)
        except SparkplugError as exc:
            out.rejections.append(Rejection(name, "unknown_topic", str(exc)))
            return out
        node = self._nodes.get((t.group, t.edge_node))
        if node is None:
            out.rejections.append(Rejection(name, "unknown_topic", "no sensor is bound to this edge node"))
            return out
        if t.message_type in ("NCMD", "DCMD"):
            return out  # commands to the edge node (our own rebirth requests among them), not data
        if len(payload) > self.max_payload_bytes:
            out.rejections.append(Rejection(name, "oversize", f"{len(payload)} > {self.max_payload_bytes} bytes"))
            return out
        try:
            msg = decode_payload(payload)
        except SparkplugError as exc:
            out.rejections.append(Rejection(name, "bad_protobuf", f"expected a Sparkplug B payload: {exc}"[:160]))
            return out
        with self._lock:
            self._handle(node, t.message_type, t.device, name, msg.seq, msg.timestamp_ms, msg.metrics, now, out)
        return out

    def _handle(self, node: _Node, kind: str, device: str | None, name: str, seq: int | None,
                ts_ms: int | None, metrics: list[Metric], now: float, out: SparkplugOutcome) -> None:
        if kind == "NDEATH":
            self._node_death(node, metrics, out)
            return
        if kind == "NBIRTH":
            node.seq = seq
        else:
            self._check_seq(node, seq, name, now, out)
        if device is None:
            src = node.own
        else:
            src = node.devices.get(device) or node.devices.setdefault(device, _Source())
        if kind in ("NBIRTH", "DBIRTH"):
            self._birth(node, src, kind, device, metrics, out)
            if kind == "DBIRTH" and not node.own.born:
                self._request_rebirth(node, now, "DBIRTH before its NBIRTH", out)
        elif kind == "DDEATH":
            src.reset()
            tags = [b.tag for b in src.bound.values()]
            out.offline.extend(tags)
            out.events.append(("sparkplug_death", {"node": node.node, "device": device, "tags": len(tags)}))
            return
        elif not src.born:
            self._request_rebirth(node, now, f"{kind} before its BIRTH", out)
        t_msg = epoch_seconds(ts_ms)
        for m in metrics:
            self._metric(src, m, name, t_msg if t_msg is not None else now, out)

    def _check_seq(self, node: _Node, seq: int | None, name: str, now: float, out: SparkplugOutcome) -> None:
        if seq is None or node.seq is None:
            node.seq = seq if seq is not None else node.seq
            return
        want = (node.seq + 1) % 256
        if seq != want:
            self.sequence_gaps[node.node] += 1
            out.events.append(("sparkplug_sequence_gap", {"node": node.node, "topic": name, "expected": want,
                                                          "received": seq}))
            self._request_rebirth(node, now, "sequence gap", out)
        node.seq = seq % 256

    def _birth(self, node: _Node, src: _Source, kind: str, device: str | None, metrics: list[Metric],
               out: SparkplugOutcome) -> None:
        src.reset()
        src.born = True
        for m in metrics:
            if m.name is None:
                continue
            if m.alias is not None:
                src.aliases[m.alias] = m.name
            if m.datatype is not None:
                src.types[m.name] = m.datatype
        if kind == "NBIRTH":
            bd = next((m for m in metrics if m.name == BDSEQ_METRIC), None)
            node.bdseq = _as_int(bd)
            for d in node.devices.values():
                d.reset()  # a new node session: its devices are born again after it
        tags = [b.tag for b in src.bound.values()]
        out.online.extend(tags)
        missing = sorted(set(src.bound) - set(src.types))
        out.events.append(("sparkplug_birth", {"node": node.node, "device": device, "metrics": len(src.types),
                                               "bound": len(tags) - len(missing),
                                               "missing": ",".join(missing)[:200]}))

    def _node_death(self, node: _Node, metrics: list[Metric], out: SparkplugOutcome) -> None:
        bd = _as_int(next((m for m in metrics if m.name == BDSEQ_METRIC), None))
        if bd is not None and node.bdseq is not None and bd != node.bdseq:
            self.deaths_ignored[node.node] += 1
            out.events.append(("sparkplug_death_ignored", {"node": node.node, "bdseq": bd,
                                                           "current_bdseq": node.bdseq}))
            return
        node.own.reset()
        for d in node.devices.values():
            d.reset()
        node.seq = None
        node.bdseq = None
        tags = node.tags()
        out.offline.extend(tags)
        out.events.append(("sparkplug_death", {"node": node.node, "device": None, "tags": len(tags)}))

    def _request_rebirth(self, node: _Node, now: float, why: str, out: SparkplugOutcome) -> None:
        if now - node.rebirth_at < self.rebirth_interval:
            return
        node.rebirth_at = now
        group, edge = node.node.split("/", 1)
        out.commands.append((topic(group, "NCMD", edge), rebirth_request(round(now * 1000.0))))
        self.rebirth_requests[node.node] += 1
        out.events.append(("sparkplug_rebirth_requested", {"node": node.node, "reason": why}))

    def _metric(self, src: _Source, m: Metric, name: str, t_default: float, out: SparkplugOutcome) -> None:
        metric = m.name if m.name is not None else src.aliases.get(m.alias) if m.alias is not None else None
        if metric is None:
            if m.alias is not None:
                out.rejections.append(Rejection(name, "unknown_alias", f"alias {m.alias} is not declared in the "
                                                "current BIRTH"))
            else:
                out.rejections.append(Rejection(name, "unknown_metric", "a metric with neither name nor alias"))
            return
        if src.born and metric not in src.types:
            out.rejections.append(Rejection(name, "unknown_metric", f"metric {metric!r} is not declared in "
                                            "the current BIRTH"[:160]))
            return
        b = src.bound.get(metric)
        if b is None:
            if metric != BDSEQ_METRIC and not metric.startswith(_CONTROL):
                self.ignored += 1
            return
        try:
            raw = metric_number(m, src.types.get(metric))
        except SparkplugError as exc:
            reason = "missing_value" if m.is_null or m.value_field is None else "wrong_type"
            out.rejections.append(Rejection(b.tag, reason, f"{name} metric {metric!r}: {exc}"[:200]))
            return
        if m.quality is not None and m.quality not in QUALITY_CODES:
            out.rejections.append(Rejection(b.tag, "bad_quality", f"{name} metric {metric!r}: Quality property "
                                            f"{m.quality}; expected an Int32 of 0, 192 or 500"))
            return
        ok = m.quality is None or QUALITY_CODES[m.quality] == "good"
        t = epoch_seconds(m.timestamp_ms)
        t = t if t is not None else t_default
        v = raw * b.scale + b.offset
        if not math.isfinite(v):
            out.rejections.append(Rejection(b.tag, "not_finite", f"metric {metric!r}"))
        elif v < b.valid_min_si or v > b.valid_max_si:  # NaN limits compare False
            out.rejections.append(Rejection(b.tag, "out_of_range",
                                            f"{v:.6g} not in [{b.valid_min_si}, {b.valid_max_si}]"))
        elif m.is_historical:
            self.historical += 1
            out.historical.append(HistoricalSample(b.tag, t, v, raw))
        else:
            out.samples.append(Sample(b.tag, t, v, ok))


def _as_int(m: Metric | None) -> int | None:
    """The integer value of a metric (bdSeq), or None."""
    if m is None or m.value_field not in ("int_value", "long_value"):
        return None
    return int(m.value)


class HistoricalFile:
    """Appends ``is_historical`` samples to a long-layout CSV that ``twin backfill`` reads.

    Rows are ``timestamp,tag,value`` with the time in Unix seconds and the value
    as published (the sensor's engineering unit, as in any historian export; see
    :mod:`twin.history.readers`). The header is written when the file is new or
    empty. Rows arrive in receipt order, not time order (back-fill sorts them).
    :meth:`append` raises ``OSError`` when the file cannot be written.
    """

    HEADER = "timestamp,tag,value\n"

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)

    def append(self, samples: Iterable[HistoricalSample]) -> int:
        """Append rows; returns how many were written."""
        rows = [f"{s.time!r},{s.tag},{s.raw!r}\n" for s in samples]
        if not rows:
            return 0
        with self.path.open("a", encoding="utf-8", newline="") as f:
            if f.tell() == 0:
                f.write(self.HEADER)
            f.writelines(rows)
        return len(rows)
