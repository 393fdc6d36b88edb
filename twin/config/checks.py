"""Cross-reference checks of a plant file, run once shapes and types pass.

Ports against the equipment kinds, stream connectivity, sensor targets and
conversions, performance and monitoring settings; SI conversion of design
values and parameters. Each problem is a ``(key.path, message)`` pair.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from twin import kinds
from twin.config.types import _to_si
from twin.units import STANDARD_ATMOSPHERE, Conversion, conversion

if TYPE_CHECKING:
    from twin.config.schema import EquipmentConfig, PlantConfig

def _ids(items: list[Any], attr: str, section: str, add: Any) -> set[str]:
    seen: set[str] = set()
    for item in items:
        key = getattr(item, attr)
        if key in seen:
            add(f"{section}[{key}].{attr}", f"duplicate {attr} {key!r}; expected each {attr} once")
        seen.add(key)
    return seen


def check_plant(cfg: PlantConfig) -> list[tuple[str, str]]:
    problems: list[tuple[str, str]] = []

    def add(path: str, msg: str) -> None:
        problems.append((path, msg))

    u = cfg.unit
    if u.barometric_pressure is None and u.barometric_tag is not None:
        u.barometric_pressure = STANDARD_ATMOSPHERE  # fallback while the barometer is stale
    if not u.name:
        u.name = u.id
    baro = u.barometric_pressure
    streams = _ids(cfg.streams, "id", "streams", add)
    _ids(cfg.equipment, "id", "equipment", add)
    for s in cfg.streams:
        where = f"streams[{s.id}]"
        design: dict[str, Any] = {}
        for key, value in s.design.items():
            if key not in kinds.STREAM_DESIGN_QUANTITIES:
                add(f"{where}.design.{key}", "unknown design quantity; expected one of "
                    + ", ".join(kinds.STREAM_DESIGN_QUANTITIES))
                continue
            try:
                design[key] = _to_si(value, kinds.STREAM_DESIGN_QUANTITIES[key], baro)
            except ValueError as exc:
                add(f"{where}.design.{key}", str(exc))
        s.design = design
        for key in s.held:
            if key not in s.design:
                add(f"{where}.held", f"{key!r} has no design value; expected one of the design keys "
                    f"({', '.join(s.design) or 'none given'})")
    producers: dict[str, list[str]] = {sid: [] for sid in streams}
    consumers: dict[str, list[str]] = {sid: [] for sid in streams}
    for e in cfg.equipment:
        _check_equipment(e, streams, producers, consumers, baro, add)
    by_id = cfg.equipment_by_id
    for e in cfg.equipment:
        where = f"equipment[{e.id}].params"
        if e.kind == "pump" and "discharge_pressure" in e.params:
            fixed = e.params["discharge_pressure"] > 0
            ref = e.params.get("discharge_reference")
            if fixed == bool(ref):
                add(where, "pump needs exactly one of discharge_pressure > 0 or discharge_reference; "
                    "expected one, got " + ("both" if fixed else "neither"))
            elif ref and ref not in streams:
                add(f"{where}.discharge_reference", f"unknown stream {ref!r}; expected a stream id")
        if e.kind == "cycle_loss":
            _check_cycle_loss(e, streams, where, add)
        if e.kind == "generator" and isinstance(e.params.get("turbines"), list):
            for t in e.params["turbines"]:
                if by_id.get(t) is None or by_id[t].kind not in ("turbine_group", "exhaust_loss"):
                    add(f"{where}.turbines", f"{t!r} is not turbine_group or exhaust_loss equipment; "
                        "expected ids of turbine_group/exhaust_loss equipment")
    for sid in streams:
        p, c = producers[sid], consumers[sid]
        if len(p) != 1 or len(c) != 1:
            where = f"streams[{sid}]"
            if not p:
                add(where, "dangling stream: no outlet port produces it; expected exactly one producer")
            elif len(p) > 1:
                add(where, f"produced by {len(p)} outlet ports ({', '.join(p)}); expected exactly one")
            if not c:
                add(where, "dangling stream: no inlet port consumes it; expected exactly one consumer")
            elif len(c) > 1:
                add(where, f"consumed by {len(c)} inlet ports ({', '.join(c)}); expected exactly one")
    _check_performance(cfg, streams, add)
    _check_sensors(cfg, streams, baro, add)
    _check_services(cfg, add)
    return problems


def _check_equipment(e: EquipmentConfig, streams: set[str], producers: dict[str, list[str]],
                     consumers: dict[str, list[str]], baro: float | None, add: Any) -> None:
    where = f"equipment[{e.id}]"
    kind = kinds.KINDS.get(e.kind)
    if kind is None:
        add(f"{where}.kind", f"unknown equipment kind {e.kind!r}; expected one of {', '.join(kinds.KINDS)}")
        return
    ports: dict[str, str | list[str]] = {}
    for name, value in e.ports.items():
        try:
            port = kind.port(name)
        except KeyError:
            add(f"{where}.ports.{name}", f"unknown port for kind {kind.name}; expected one of "
                + (", ".join(p.name for p in kind.ports) or "no ports"))
            continue
        if port.many:
            ok = isinstance(value, list) and all(isinstance(v, str) for v in value)
            expected = "a list of stream ids"
        else:
            ok = isinstance(value, str)
            expected = "one stream id (a string)"
        if not ok:
            add(f"{where}.ports.{name}", f"wrong type {type(value).__name__} ({value!r}); expected {expected}")
        else:
            ports[name] = value
        refs = [value] if isinstance(value, str) else value if isinstance(value, list) else []
        for sid in (r for r in refs if isinstance(r, str)):  # counted anyway: no follow-on errors
            if sid not in streams:
                add(f"{where}.ports.{name}", f"unknown stream {sid!r}; expected a declared stream id")
                continue
            (producers if port.direction == "out" else consumers)[sid].append(f"{e.id}.{name}")
    for port in kind.ports:
        if not port.optional and port.name not in e.ports:
            add(f"{where}.ports", f"missing port {port.name!r} of kind {kind.name}; expected "
                + ("a list of stream ids" if port.many else "a stream id"))
    e.ports = ports
    params: dict[str, Any] = {}
    for name, value in e.params.items():
        try:
            param = kind.param(name)
        except KeyError:
            add(f"{where}.params.{name}", f"unknown parameter for kind {kind.name}; expected one of "
                + (", ".join(p.name for p in kind.params) or "no parameters"))
            continue
        try:
            params[name] = _param_value(value, param.dimension, baro)
        except ValueError as exc:
            add(f"{where}.params.{name}", str(exc))
    for param in kind.params:
        if param.name in params or param.name in e.params:
            continue
        if param.required:
            add(f"{where}.params", f"missing required parameter {param.name!r} of kind {kind.name}; "
                f"expected a {param.dimension} value" + (f" ({param.doc})" if param.doc else ""))
        else:
            params[param.name] = param.default
    e.params = params


def _check_cycle_loss(e: EquipmentConfig, streams: set[str], where: str, add: Any) -> None:
    """The normal loss of a cycle_loss sink: non-negative, its fraction of a declared other stream."""
    p = e.params
    fraction, flow, ref = p.get("normal_fraction"), p.get("normal_flow"), p.get("normal_reference")
    if isinstance(fraction, float) and not 0.0 <= fraction < 1.0:
        add(f"{where}.normal_fraction", f"{fraction!r} out of range; expected a fraction 0 <= f < 1")
    if isinstance(flow, float) and flow < 0.0:
        add(f"{where}.normal_flow", f"{flow!r} kg/s is negative; expected a mass flow >= 0")
    if isinstance(ref, str) and ref:
        if ref not in streams:
            add(f"{where}.normal_reference", f"unknown stream {ref!r}; expected a stream id")
        elif ref == e.ports.get("inlet"):
            add(f"{where}.normal_reference", f"{ref!r} is the loss's own inlet; expected another stream "
                "(e.g. the main steam)")
    elif isinstance(fraction, float) and fraction != 0.0:
        add(f"{where}.normal_reference", "missing; expected the stream whose flow normal_fraction scales "
            "(e.g. the main steam)")


def _param_value(value: Any, dimension: str, baro: float | None) -> float | str | list[str]:
    if dimension == "text":
        if not isinstance(value, str):
            raise ValueError(f"wrong type {type(value).__name__} ({value!r}); expected a string")
        return value
    if dimension == "text_list":
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            raise ValueError(f"wrong type ({value!r}); expected a list of strings")
        return list(value)
    return _to_si(value, dimension, baro)


def _check_performance(cfg: PlantConfig, streams: set[str], add: Any) -> None:
    perf = cfg.performance
    for key in ("load_stream", "throttle_stream"):
        sid = getattr(perf, key)
        if sid is not None and sid not in streams:
            add(f"performance.{key}", f"unknown stream {sid!r}; expected a stream id")
    load_cfg = cfg.streams_by_id.get(perf.load_stream or "")
    if load_cfg is not None and "mass_flow" not in load_cfg.design:
        add("performance.load_stream", f"stream {load_cfg.id!r} has no design mass_flow; expected the "
            "stream whose design flow defines full load")
    valve = perf.throttle_valve
    if valve is not None:
        e = cfg.equipment_by_id.get(valve)
        if e is None or e.kind != "throttle_valve":
            add("performance.throttle_valve", f"{valve!r} is not throttle_valve equipment; "
                "expected the id of throttle_valve equipment")
    last = 0.0
    for i, (load, eff) in enumerate(perf.boiler_efficiency):
        if not (load > last and 0.0 < eff <= 1.0):
            add(f"performance.boiler_efficiency[{i}]", f"[{load}, {eff}] out of order or range; expected "
                "[load_fraction, efficiency] with load increasing and efficiency in (0, 1]")
        last = max(last, load)
    for pid in perf.motor_driven_feed_pumps or ():
        pe = cfg.equipment_by_id.get(pid)
        if pe is None or pe.kind != "pump":
            add("performance.motor_driven_feed_pumps", f"{pid!r} is not pump equipment; expected the id of a pump")
    sched = perf.pressure_schedule
    if perf.pressure_control == "schedule" and len(sched) < 2:
        add("performance.pressure_schedule", f"{len(sched)} rows; expected at least two [load_fraction, "
            "pressure] rows with pressure_control = 'schedule'")
    if sched and perf.pressure_control != "schedule":
        add("performance.pressure_control", f"{perf.pressure_control!r} with a pressure_schedule; expected "
            "'schedule' (or remove the schedule)")
    last = 0.0
    for i, (load, pres) in enumerate(sched):
        if not (load > last and load <= 1.2 and pres > 0.0):
            add(f"performance.pressure_schedule[{i}]", f"[{load}, {pres}] out of order or range; expected "
                "[load_fraction, pressure] with load increasing up to 1.2 and a positive pressure")
        last = max(last, load)
    _ids(cfg.sections, "id", "sections", add)
    for sec in cfg.sections:
        for key in ("inlet", "outlet"):
            if getattr(sec, key) not in streams:
                add(f"sections[{sec.id}].{key}", f"unknown stream {getattr(sec, key)!r}; expected a stream id")


_FITS = {"power": ("generator", "pump"), "cooling_water_inlet_temperature": ("condenser",),
         "cooling_water_outlet_temperature": ("condenser",)}


def _check_sensors(cfg: PlantConfig, streams: set[str], baro: float | None, add: Any) -> None:
    _ids(cfg.sensors, "tag", "sensors", add)
    by_id = cfg.equipment_by_id
    locations: dict[tuple[str, ...], str] = {}
    for s in cfg.sensors:
        where = f"sensors[{s.tag}]"
        dimension, target = kinds.MEASURED_QUANTITIES[s.quantity]
        given = [k for k in ("stream", "equipment") if getattr(s, k) is not None]
        if target == "unit":
            if given:
                add(f"{where}.{given[0]}", f"{s.quantity} belongs to the unit; expected no stream or equipment")
        elif given != [target]:
            add(where, f"{s.quantity} is measured on a {target}; expected exactly one key {target!r}"
                + (f" (got {', '.join(given)})" if given else ""))
        elif target == "stream" and s.stream not in streams:
            add(f"{where}.stream", f"unknown stream {s.stream!r}; expected a stream id")
        elif target == "equipment":
            e = by_id.get(s.equipment or "")
            if e is None:
                add(f"{where}.equipment", f"unknown equipment {s.equipment!r}; expected an equipment id")
            elif e.kind not in _FITS[s.quantity]:
                add(f"{where}.equipment", f"{s.quantity} cannot be measured on {e.kind} {e.id!r}; "
                    f"expected equipment of kind {' or '.join(_FITS[s.quantity])}")
        try:
            conv = conversion(s.unit, dimension, barometric_pressure=baro)
            if s.gauge is not None and s.gauge != conv.gauge:
                if dimension != "pressure" or conv.gauge:
                    raise ValueError(f"gauge = {str(s.gauge).lower()} contradicts unit {s.unit!r}; "
                                     "expected gauge only on pressures in an absolute-style unit")
                if baro is None:
                    raise ValueError("gauge pressure needs a barometric pressure; expected "
                                     "[unit].barometric_pressure or barometric_tag")
                conv = Conversion(conv.scale, baro, True)
            s._conversion = conv
        except ValueError as exc:
            add(f"{where}.unit", str(exc))
        if s.gauge is None:
            s.gauge = s._conversion.gauge if s._conversion else False
        for key in ("span", "range"):
            pair = getattr(s, key)
            if pair is not None and not pair[0] < pair[1]:
                add(f"{where}.{key}", f"{list(pair)} is empty; expected [low, high] with low < high")
        if s.uncertainty.kind == "percent_of_span" and s.span is None:
            add(f"{where}.span", "missing; expected [low, high] for a percent_of_span uncertainty")
        bad = topic_problem(s.topic)
        if bad is None and s.topic.startswith("/"):
            bad = "starts with '/'"
        if bad is not None:
            add(f"{where}.topic", f"{s.topic!r} is not a valid sensor topic ({bad}); expected an MQTT "
                "topic name such as \"plant/u1/hp/pressure\": UTF-8, no wildcards, no leading '/'")
        if bad is None and s.payload.format == "sparkplug":
            why = sparkplug_topic_problem(s.topic)
            if why is not None:
                add(f"{where}.topic", f"{s.topic!r} {why}; expected the NDATA topic of the edge node "
                    "(\"spBv1.0/<group>/NDATA/<edge node>\") or the DDATA topic of the device "
                    "(\"spBv1.0/<group>/DDATA/<edge node>/<device>\") that publishes the metric")
        loc: tuple[str, ...] = {"number": (s.topic,), "batch": (s.topic, s.tag),
                                "sparkplug": (s.topic, f"metric {s.payload.metric!r}")}.get(
            s.payload.format, (s.topic, s.payload.value))
        if loc in locations:
            add(f"{where}.topic", f"{s.topic!r} {' '.join(loc[1:])} is already mapped to "
                f"{locations[loc]!r}; expected one sensor per topic and payload location")
        locations.setdefault(loc, s.tag)
    tag = cfg.unit.barometric_tag
    if tag is not None:
        sensor = cfg.sensors_by_tag.get(tag)
        if sensor is None or sensor.quantity != "barometric_pressure":
            add("unit.barometric_tag", f"{tag!r} is not a barometric_pressure sensor; expected the tag "
                "of a sensor with quantity = \"barometric_pressure\"")


MAX_TOPIC_BYTES = 65535  # MQTT 3.1.1 section 1.5.3 / MQTT 5 section 1.5.4


def sparkplug_topic_problem(topic: str) -> str | None:
    """Why ``topic`` is not a Sparkplug B NDATA/DDATA topic (Sparkplug 3.0 §4.1), or None."""
    parts = topic.split("/")
    if parts[0] != "spBv1.0":
        return "does not start with 'spBv1.0'"
    if len(parts) < 3 or parts[2] not in ("NDATA", "DDATA"):
        return "is not a data topic"
    if len(parts) != (4 if parts[2] == "NDATA" else 5) or not all(parts):
        return f"has the wrong number of elements for {parts[2]}"
    return None


def topic_problem(topic: str) -> str | None:
    """Why ``topic`` is not a valid MQTT topic name to publish on, or None if it is.

    MQTT 3.1.1 sections 1.5.3 and 4.7: 1 to 65 535 bytes of UTF-8, no U+0000
    (brokers drop the connection), no wildcards ``+``/``#`` in a topic name;
    control characters U+0001-U+001F and U+007F-U+009F are refused too (the
    standard says they SHOULD NOT appear and brokers may refuse them).
    """
    if not topic:
        return "empty"
    if "\x00" in topic:
        return "contains U+0000"
    if "+" in topic or "#" in topic:
        return "contains a wildcard '+' or '#'"
    control = next((c for c in topic if ord(c) < 0x20 or 0x7F <= ord(c) <= 0x9F), None)
    if control is not None:
        return f"contains control character U+{ord(control):04X}"
    try:
        size = len(topic.encode("utf-8"))
    except UnicodeEncodeError:
        return "not encodable as UTF-8 (a lone surrogate)"
    if size > MAX_TOPIC_BYTES:
        return f"{size} bytes long, more than {MAX_TOPIC_BYTES}"
    return None


def _check_services(cfg: PlantConfig, add: Any) -> None:
    b, m, uid = cfg.broker, cfg.monitoring, cfg.unit.id
    if b.port is None:
        b.port = 8883 if b.tls is not None else 1883
    b.client_id = b.client_id or f"twin-{uid}"
    b.republish_prefix = (b.republish_prefix or f"twin/{uid}").rstrip("/")
    b.events_topic = b.events_topic or f"{b.republish_prefix}/events"
    for key in ("republish_prefix", "events_topic"):
        bad = topic_problem(getattr(b, key))
        if bad is not None:
            add(f"broker.{key}", f"{getattr(b, key)!r} is not a valid MQTT topic ({bad}); expected a "
                "topic name such as \"twin/u1\"")
    if not b.reconnect_min_delay <= b.reconnect_max_delay:
        add("broker.reconnect_min_delay", "above reconnect_max_delay; expected min <= max")
    if b.password_file is not None and b.password_env is not None:
        add("broker", "both password_file and password_env given; expected at most one")
    if (b.password_file or b.password_env) and not b.username:
        add("broker.username", "missing while a password is configured; expected a user name")
    if b.tls is not None and (b.tls.cert_file is None) != (b.tls.key_file is None):
        add("broker.tls", "cert_file and key_file must come together; expected both or neither")
    if m.window is None:
        m.window = m.cycle
    tags = cfg.sensors_by_tag
    for tag in m.steady_signals:
        if tag not in tags:
            add("monitoring.steady_signals", f"unknown sensor tag {tag!r}; expected a configured sensor tag")
    if not all(0.0 < x <= 1.0 for x in m.steady_lambdas):
        add("monitoring.steady_lambdas", f"{list(m.steady_lambdas)}; expected three filter factors in (0, 1]")
    if m.steady_exit_r < m.steady_critical_r:
        add("monitoring.steady_exit_r", f"{m.steady_exit_r}; expected at least steady_critical_r ({m.steady_critical_r})")
    if not 0.0 < m.exhaust_moisture_warn < m.exhaust_moisture_alarm < 1.0:
        add("monitoring.exhaust_moisture_alarm", "warn and alarm limits out of order; expected "
            "0 < exhaust_moisture_warn < exhaust_moisture_alarm < 1")

