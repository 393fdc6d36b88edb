"""Plant configuration: TOML file → validated, SI-converted objects (the only pydantic user).

``load_config(path)`` reads a plant file, checks it against the schema below and
the equipment-kind contract (:mod:`twin.kinds`), converts every quantity to SI
and returns a :class:`PlantConfig`. Problems are collected and raised together
as one :class:`ConfigError`, one line per problem::

    <file>: <key.path>: <what was wrong>; expected <what>

Shapes and types are checked first; the cross-reference checks (ports against
kinds, stream connectivity, sensor targets, ...) run once those pass.

A quantity is a number (taken as SI) or a string with a unit (``"16.2 MPa"``,
``"541 degC"``, ``"295 kg/s"``, ``"30 s"``), see :mod:`twin.units`.
"""

from __future__ import annotations

import re
import tomllib
from collections.abc import Mapping
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import (
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    PrivateAttr,
    ValidationError,
    WithJsonSchema,
    model_validator,
)

from twin import kinds
from twin.units import STANDARD_ATMOSPHERE, Conversion, conversion, split_quantity


class ConfigError(ValueError):
    """A plant file is invalid; ``problems`` holds one line per problem."""

    def __init__(self, problems: list[str], path: str | Path | None = None):
        self.problems = list(problems)
        self.path = path
        super().__init__("\n".join(self.problems))


class _Problems(ValueError):
    """Several ``(key.path, message)`` problems raised from inside a validator."""

    def __init__(self, items: list[tuple[str, str]]):
        self.items = items
        super().__init__("\n".join(f"{p}: {m}" for p, m in items))


# ------------------------------------------------------------ quantity types ---
def _to_si(value: Any, dimension: str, barometric: float | None = None) -> float:
    """A config value (number = SI, or ``"<number> <unit>"``) to SI; ValueError if wrong."""
    if isinstance(value, bool) or not isinstance(value, int | float | str):
        raise ValueError(
            f"wrong type {type(value).__name__} ({value!r}); "
            f"expected a number or a {dimension} string such as {_EXAMPLE[dimension]!r}"
        )
    if isinstance(value, str):
        number, unit = split_quantity(value)
        if unit == "":
            return number
        return float(conversion(unit, dimension, barometric_pressure=barometric).to_si(number))
    return float(value)


_EXAMPLE = {
    "pressure": "16.2 MPa",
    "pressure_difference": "0.1 MPa",
    "temperature": "541 degC",
    "temperature_difference": "5.6 K",
    "mass_flow": "295 kg/s",
    "power": "6 MW",
    "specific_enthalpy": "3400 kJ/kg",
    "specific_heat": "4.18 kJ/(kg K)",
    "area": "20 m2",
    "velocity": "120 m/s",
    "ratio": "85 %",
    "duration": "30 s",
}


def _si(dimension: str, minimum: float | None = None) -> BeforeValidator:
    def check(value: Any) -> float:
        si = _to_si(value, dimension)
        if minimum is not None and not si > minimum:
            raise ValueError(f"{value!r} is not above {minimum:g} (SI); expected a positive {dimension}")
        return si

    return BeforeValidator(check)


def _doc(dimension: str) -> WithJsonSchema:
    return WithJsonSchema({
        "anyOf": [{"type": "number"}, {"type": "string"}],
        "description": f"{dimension}: a number in SI or a string with a unit, e.g. {_EXAMPLE[dimension]!r}",
    })


Duration = Annotated[float, _si("duration", 0.0), _doc("duration")]
Delay = Annotated[float, _si("duration"), _doc("duration")]
Ratio = Annotated[float, _si("ratio"), _doc("ratio")]
Power = Annotated[float, _si("power"), _doc("power")]
Pressure = Annotated[float, _si("pressure", 0.0), _doc("pressure")]
Slug = Annotated[str, Field(pattern=r"^[a-z0-9]([a-z0-9_-]*[a-z0-9])?$")]
Ident = Annotated[str, Field(pattern=r"^[A-Za-z0-9_][A-Za-z0-9_.:-]*$")]
Pair = tuple[float, float]


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid")


# ------------------------------------------------------------------ sections ---
class UnitConfig(_Model):
    """``[unit]``: the unit's id, name and barometric pressure."""

    id: Slug
    name: str = ""
    barometric_pressure: Pressure | None = None
    barometric_tag: str | None = None


class StreamConfig(_Model):
    """``[[streams]]``: an edge of the flowsheet; ``design`` is converted to SI floats."""

    id: Ident
    description: str = ""
    design: dict[str, Any] = Field(
        default_factory=dict,
        description="design values: " + ", ".join(kinds.STREAM_DESIGN_QUANTITIES),
    )
    held: list[str] = Field(default_factory=list)


class EquipmentConfig(_Model):
    """``[[equipment]]``: a node; after load ``ports`` and ``params`` follow its kind, params in SI."""

    id: Ident
    kind: str = Field(description="one of " + ", ".join(kinds.KINDS))
    ports: dict[str, Any] = Field(default_factory=dict)
    params: dict[str, Any] = Field(default_factory=dict)

    @property
    def spec(self) -> kinds.Kind:
        """The :class:`twin.kinds.Kind` of this equipment."""
        return kinds.KINDS[self.kind]


class PerformanceConfig(_Model):
    """``[performance]``: what the KPIs and the expected model key on."""

    load_stream: str | None = None
    throttle_stream: str | None = None
    throttle_valve: str | None = None
    auxiliary_fixed: Power = 0.0
    auxiliary_variable: Power = 0.0
    fuel_basis: Literal["HHV", "LHV"] = "HHV"
    boiler_efficiency: list[Pair] = Field(
        default_factory=list, description="[load_fraction, efficiency] pairs, sorted by load"
    )


class SectionConfig(_Model):
    """``[[sections]]``: a turbine section between two streams."""

    id: Ident
    inlet: str
    outlet: str


class PayloadConfig(_Model):
    """Where value, timestamp and quality sit in a sensor's MQTT payload.

    ``value``, ``timestamp`` and ``quality`` are JSON pointers (RFC 6901); a plain
    key ``"v"`` is stored as ``"/v"``. ``format = "number"`` means the payload is
    a bare number and the receive time is its timestamp; ``"batch"`` is one JSON
    message carrying several tags by name (see :mod:`twin.ingest.decode`).
    """

    format: Literal["json", "number", "batch"] = "json"
    value: str = "/v"
    timestamp: str | None = "/ts"
    quality: str | None = "/q"
    timestamp_format: Literal["epoch_s", "epoch_ms", "rfc3339", "auto"] = "epoch_s"
    good_quality: list[str | int | bool] = Field(default_factory=lambda: list[str | int | bool](["good"]))

    @model_validator(mode="after")
    def _pointers(self) -> PayloadConfig:
        for name in ("value", "timestamp", "quality"):
            v = getattr(self, name)
            if v is not None and not v.startswith("/"):
                setattr(self, name, "/" + v.replace("~", "~0").replace("/", "~1"))
        return self


def pointer_keys(pointer: str) -> tuple[str, ...]:
    """The keys of a JSON pointer (RFC 6901): ``"/a/b~1c"`` → ``("a", "b/c")``."""
    if pointer == "":
        return ()
    return tuple(p.replace("~1", "/").replace("~0", "~") for p in pointer[1:].split("/"))


class UncertaintyConfig(_Model):
    """Half-width of the 95 % interval; absolute values are in the sensor's unit."""

    value: float = Field(ge=0.0)
    kind: Literal["absolute", "percent_of_reading", "percent_of_span"] = "absolute"


class SensorConfig(_Model):
    """``[[sensors]]``: one instrument, its MQTT location, unit and uncertainty.

    After load ``conversion`` turns its engineering-unit readings into SI.
    """

    tag: Ident
    description: str = ""
    topic: str
    payload: PayloadConfig = Field(default_factory=PayloadConfig)
    quantity: Literal[tuple(kinds.MEASURED_QUANTITIES)]  # type: ignore[valid-type]
    stream: str | None = None
    equipment: str | None = None
    unit: str
    gauge: bool | None = None
    uncertainty: UncertaintyConfig
    span: Pair | None = None
    range: Pair | None = None
    max_age: Duration = 30.0
    _conversion: Conversion | None = PrivateAttr(default=None)

    @property
    def conversion(self) -> Conversion:
        """Engineering unit → SI (scale, offset), fixed at load."""
        if self._conversion is None:
            raise ValueError(f"sensor {self.tag!r}: conversion is set by load_config")
        return self._conversion

    @property
    def dimension(self) -> str:
        return kinds.MEASURED_QUANTITIES[self.quantity][0]

    @property
    def range_si(self) -> tuple[float, float] | None:
        """Valid range [SI], or None."""
        if self.range is None:
            return None
        return (self.conversion.to_si(self.range[0]), self.conversion.to_si(self.range[1]))

    def sigma_si(self, value_si: Any) -> Any:
        """Standard uncertainty σ [SI] at a reading ``value_si`` [SI] (float or array).

        σ = U / 1.96 with U the half-width of the 95 % interval converted to SI
        (VDI 2048 practice; normal distribution).

        References
        ----------
        VDI 2048 Part 1 (2017), *Control and quality improvement of process data
        and their uncertainties by means of correction calculation*.
        """
        u = self.uncertainty
        scale = self.conversion.scale
        if u.kind == "absolute":
            half = u.value * scale
        elif u.kind == "percent_of_reading":
            half = abs(self.conversion.from_si(value_si)) * (u.value / 100.0) * scale
        else:
            assert self.span is not None  # checked at load
            half = (self.span[1] - self.span[0]) * (u.value / 100.0) * scale
        return half / 1.96


class SensorDefaults(_Model):
    """``[sensor_defaults]``: defaults merged into every sensor (key by key for payload)."""

    payload: PayloadConfig = Field(default_factory=PayloadConfig)
    max_age: Duration = 30.0


class TlsConfig(_Model):
    ca_file: Path | None = None
    cert_file: Path | None = None
    key_file: Path | None = None
    insecure: bool = False


class BrokerConfig(_Model):
    """``[broker]``: the MQTT broker. Relative file names are relative to the config file."""

    host: str = "127.0.0.1"
    port: int | None = Field(default=None, ge=1, le=65535, description="default 1883, 8883 with tls")
    protocol: Annotated[Literal["3.1.1", "5"], BeforeValidator(lambda v: str(v))] = "3.1.1"
    client_id: str | None = Field(default=None, description='default "twin-<unit id>"')
    keepalive: Duration = 60.0
    qos: Literal[0, 1, 2] = 1
    tls: TlsConfig | None = None
    username: str | None = None
    password_file: Path | None = None
    password_env: str | None = None
    republish_prefix: str | None = Field(default=None, description='default "twin/<unit id>"')
    events_topic: str | None = Field(default=None, description='default "<republish_prefix>/events"')

    @model_validator(mode="before")
    @classmethod
    def _no_literal_password(cls, data: Any) -> Any:
        if isinstance(data, dict) and "password" in data:
            raise _Problems([(
                "password",
                "a literal password is not allowed in the config file; expected password_file "
                "(a file holding the password) or password_env (an environment variable name)",
            )])
        return data

    def password(self, environ: Mapping[str, str]) -> str | None:
        """The broker password from ``password_file`` or ``environ[password_env]``."""
        if self.password_file is not None:
            return self.password_file.read_text(encoding="utf-8").rstrip("\r\n")
        if self.password_env is not None:
            if self.password_env not in environ:
                raise ValueError(f"broker password: environment variable {self.password_env!r} is not set")
            return environ[self.password_env]
        return None


class MetricsConfig(_Model):
    """``[metrics]``: the Prometheus exposition endpoint."""

    address: str = "127.0.0.1"
    port: int = Field(default=9108, ge=0, le=65535, description="0 = any free port")


class DriftConfig(_Model):
    """``[monitoring.drift]``: EWMA and tabular CUSUM on KPIs (Montgomery)."""

    ewma_lambda: float = Field(default=0.2, gt=0.0, le=1.0)
    ewma_L: float = Field(default=3.0, gt=0.0, description="EWMA limit width in sigmas")
    cusum_k: float = Field(default=0.5, ge=0.0, description="CUSUM reference value K in sigmas")
    cusum_h: float = Field(default=5.0, gt=0.0, description="CUSUM decision interval H in sigmas")


class MonitoringConfig(_Model):
    """``[monitoring]``: cycle, steady-state gate, alarm and drift settings.

    ``steady_critical_r`` defaults to 2.0, a deliberately tolerant threshold for
    the Cao & Rhinehart (1995) R statistic: simulated white noise gives critical
    values of about 1.4 (95 %) to 1.7 (99 %); real plant signals are coloured,
    so a stricter value flags steady periods as transient. The exhaust-moisture
    limits (10 % warn, 12 % alarm) are common practice, not a manufacturer
    limit; plant procedures and manufacturers' limits take precedence.
    """

    cycle: Duration = 10.0
    window: Duration | None = Field(default=None, description="default: cycle")
    steady_signals: list[str] = Field(default_factory=list)
    steady_lambdas: tuple[float, float, float] = (0.2, 0.1, 0.1)
    steady_critical_r: float = Field(default=2.0, gt=1.0)
    steady_hold: Duration = 60.0
    min_load: Ratio = 0.3
    exhaust_moisture_warn: Ratio = 0.10
    exhaust_moisture_alarm: Ratio = 0.12
    alarm_deadband: Ratio = Field(default=0.005, description="set minus clear threshold [-]")
    on_delay: Delay = 30.0
    off_delay: Delay = 60.0
    efficiency_margin: Ratio = 0.01
    suspect_persistence: int = Field(default=3, ge=1, description="windows")
    drift: DriftConfig = Field(default_factory=DriftConfig)


class PlantConfig(_Model):
    """A whole plant file. Use :func:`load_config` to read one.

    After validation every quantity is in SI, equipment ports/params follow
    their kind with defaults filled in, and each sensor has its conversion.
    """

    unit: UnitConfig
    streams: list[StreamConfig]
    equipment: list[EquipmentConfig]
    performance: PerformanceConfig = Field(default_factory=PerformanceConfig)
    sections: list[SectionConfig] = Field(default_factory=list)
    sensor_defaults: SensorDefaults = Field(default_factory=SensorDefaults)
    sensors: list[SensorConfig] = Field(default_factory=list)
    broker: BrokerConfig = Field(default_factory=BrokerConfig)
    metrics: MetricsConfig = Field(default_factory=MetricsConfig)
    monitoring: MonitoringConfig = Field(default_factory=MonitoringConfig)
    _source_path: Path | None = PrivateAttr(default=None)

    @property
    def source_path(self) -> Path | None:
        """The file this config was loaded from (None if built from a dict)."""
        return self._source_path

    @property
    def streams_by_id(self) -> dict[str, StreamConfig]:
        return {s.id: s for s in self.streams}

    @property
    def equipment_by_id(self) -> dict[str, EquipmentConfig]:
        return {e.id: e for e in self.equipment}

    @property
    def sensors_by_tag(self) -> dict[str, SensorConfig]:
        return {s.tag: s for s in self.sensors}

    @model_validator(mode="before")
    @classmethod
    def _merge_sensor_defaults(cls, data: Any) -> Any:
        if not isinstance(data, dict) or not isinstance(data.get("sensors"), list):
            return data
        defaults = data.get("sensor_defaults")
        if not isinstance(defaults, dict):
            return data
        sensors = []
        for s in data["sensors"]:
            if isinstance(s, dict):
                s = dict(s)
                if "max_age" in defaults:
                    s.setdefault("max_age", defaults["max_age"])
                if isinstance(defaults.get("payload"), dict) and isinstance(s.get("payload", {}), dict):
                    s["payload"] = {**defaults["payload"], **s.get("payload", {})}
            sensors.append(s)
        return {**data, "sensors": sensors}

    @model_validator(mode="after")
    def _cross_check(self) -> PlantConfig:
        problems = _check_plant(self)
        if problems:
            raise _Problems(problems)
        return self


# --------------------------------------------------------------- cross checks ---
def _ids(items: list[Any], attr: str, section: str, add: Any) -> set[str]:
    seen: set[str] = set()
    for item in items:
        key = getattr(item, attr)
        if key in seen:
            add(f"{section}[{key}].{attr}", f"duplicate {attr} {key!r}; expected each {attr} once")
        seen.add(key)
    return seen


def _check_plant(cfg: PlantConfig) -> list[tuple[str, str]]:
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
    load = cfg.streams_by_id.get(perf.load_stream or "")
    if load is not None and "mass_flow" not in load.design:
        add("performance.load_stream", f"stream {load.id!r} has no design mass_flow; expected the "
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
        if not s.topic or s.topic.startswith("/") or "+" in s.topic or "#" in s.topic:
            add(f"{where}.topic", f"{s.topic!r} is not a publishable topic; expected no leading '/' "
                "and no wildcards")
        loc: tuple[str, ...] = {"number": (s.topic,), "batch": (s.topic, s.tag)}.get(
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


def _check_services(cfg: PlantConfig, add: Any) -> None:
    b, m, uid = cfg.broker, cfg.monitoring, cfg.unit.id
    if b.port is None:
        b.port = 8883 if b.tls is not None else 1883
    b.client_id = b.client_id or f"twin-{uid}"
    b.republish_prefix = (b.republish_prefix or f"twin/{uid}").rstrip("/")
    b.events_topic = b.events_topic or f"{b.republish_prefix}/events"
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
    if not 0.0 < m.exhaust_moisture_warn < m.exhaust_moisture_alarm < 1.0:
        add("monitoring.exhaust_moisture_alarm", "warn and alarm limits out of order; expected "
            "0 < exhaust_moisture_warn < exhaust_moisture_alarm < 1")


# -------------------------------------------------------------------- loading ---
def load_config(path: str | Path) -> PlantConfig:
    """Read, validate and convert a plant file.

    Parameters
    ----------
    path : str or Path
        TOML plant file.

    Raises
    ------
    FileNotFoundError, OSError
        The file cannot be read.
    ConfigError
        The file is not valid TOML or breaks the schema; one line per problem.
    """
    path = Path(path)
    raw = path.read_bytes()
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError as exc:
        raise ConfigError([f"{path}: not UTF-8 text ({exc.reason}); expected a UTF-8 TOML file"], path) from None
    except tomllib.TOMLDecodeError as exc:
        m = re.search(r"^(.*?)\s*\(at line (\d+), column (\d+)\)", str(exc))
        where, what = (f"{path}:{m.group(2)}:{m.group(3)}", m.group(1)) if m else (str(path), str(exc))
        raise ConfigError([f"{where}: TOML syntax error: {what}; expected valid TOML"], path) from None
    cfg = validate_config(data, source=path)
    base = path.parent
    b = cfg.broker
    if b.password_file is not None:
        b.password_file = base / b.password_file
    if b.tls is not None:
        for key in ("ca_file", "cert_file", "key_file"):
            if getattr(b.tls, key) is not None:
                setattr(b.tls, key, base / getattr(b.tls, key))
    cfg._source_path = path
    return cfg


def validate_config(data: Mapping[str, Any], source: str | Path = "<config>") -> PlantConfig:
    """Validate an already-parsed plant document; errors as in :func:`load_config`."""
    try:
        return PlantConfig.model_validate(data)
    except ValidationError as exc:
        raise ConfigError(_format_errors(exc, data, str(source)), source) from None


def json_schema() -> dict[str, Any]:
    """The JSON Schema of the plant file format."""
    schema = PlantConfig.model_json_schema(mode="validation")
    schema["title"] = "twin plant configuration"
    return schema


def _format_errors(exc: ValidationError, data: Any, source: str) -> list[str]:
    merged: dict[str, list[str]] = {}
    for err in exc.errors(include_url=False):
        prefix, dropped = _loc_path(err["loc"], data, err["type"])
        ctx_error = (err.get("ctx") or {}).get("error")
        if isinstance(ctx_error, _Problems):
            for path, msg in ctx_error.items:
                merged.setdefault(".".join(p for p in (prefix, path) if p), []).append(msg)
            continue
        what, expected = _describe(err)
        key = prefix or "(top level)"
        if dropped and key in merged:  # several members of a union failed: merge the expectations
            merged[key][0] = f"{merged[key][0]} or {expected}"
        else:
            merged.setdefault(key, []).append(f"{what}; expected {expected}" if expected else what)
    return [f"{source}: {path}: {msg}" for path, msgs in merged.items() for msg in msgs]


def _loc_path(loc: tuple[Any, ...], data: Any, err_type: str) -> tuple[str, bool]:
    parts: list[str] = []
    dropped = False
    node = data
    for i, key in enumerate(loc):
        if isinstance(node, list) and isinstance(key, int) and 0 <= key < len(node):
            item = node[key]
            label = item.get("id", item.get("tag")) if isinstance(item, dict) else None
            parts[-1:] = [f"{parts[-1] if parts else ''}[{label if isinstance(label, str) else key}]"]
            node = item
        elif isinstance(node, dict) and key in node:
            parts.append(str(key))
            node = node[key]
        elif i == len(loc) - 1 and err_type == "missing":
            parts.append(str(key))
        else:
            dropped = True  # a union member or validator name, not a key of the file
    return ".".join(parts), dropped


def _describe(err: Any) -> tuple[str, str]:
    t, msg, value = err["type"], err["msg"], err.get("input")
    shown = repr(value)
    shown = shown if len(shown) <= 60 else shown[:57] + "..."
    if t == "missing":
        return "required key is missing", "a value"
    if t == "extra_forbidden":
        fields = _fields_at(err["loc"][:-1])
        return "unknown key", "one of " + ", ".join(fields) if fields else "no such key"
    if t == "value_error":
        text = str((err.get("ctx") or {}).get("error", msg))
        what, _, expected = text.partition("; expected ")
        return what, expected
    if t == "string_pattern_mismatch":
        return f"invalid id {shown}", f"letters, digits, '_', '-' matching {err['ctx']['pattern']}"
    what = f"wrong type {type(value).__name__} ({shown})" if t.endswith("_type") else f"wrong value {shown}"
    expected = msg[len("Input should be "):] if msg.startswith("Input should be ") else msg
    return what, expected


def _fields_at(loc: tuple[Any, ...]) -> list[str]:
    model: Any = PlantConfig
    for key in loc:
        if isinstance(key, int):
            continue
        field = model.model_fields.get(key)
        model = _inner_model(field.annotation) if field is not None else None
        if model is None:
            return []
    return list(model.model_fields)


def _inner_model(tp: Any) -> type[BaseModel] | None:
    if isinstance(tp, type) and issubclass(tp, BaseModel):
        return tp
    for arg in getattr(tp, "__args__", ()):
        found = _inner_model(arg)
        if found is not None:
            return found
    return None
