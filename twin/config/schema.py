"""Plant-file sections: the pydantic models of a plant file (shapes, types, defaults)."""

from __future__ import annotations

from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import BeforeValidator, Field, PrivateAttr, model_validator

from twin import kinds
from twin.config.checks import check_plant
from twin.config.types import (
    Delay,
    Duration,
    Ident,
    Pair,
    Power,
    Pressure,
    Ratio,
    Slug,
    _Model,
    _Problems,
)
from twin.units import Conversion


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
    pressure_control: Literal["sliding", "fixed", "schedule"] = Field(
        default="sliding",
        description="how the throttle pressure follows load off design: 'sliding' (valves wide open, "
        "pressure from the HP swallowing capacity), 'fixed' (design pressure, valves throttle) or "
        "'schedule' (pressure_schedule, valves throttle down to the HP inlet pressure)",
    )
    pressure_schedule: list[tuple[Ratio, Pressure]] = Field(
        default_factory=list,
        description="[load_fraction, throttle pressure] rows, load increasing (pressure_control = 'schedule')",
    )
    motor_driven_feed_pumps: list[str] | None = Field(
        default=None,
        description="motor-driven feed pumps whose power the ASME PTC 6 net turbine heat rate deducts; "
        "default: pumps with a discharge_reference (the boiler feed pump); [] for a turbine-driven pump",
    )
    fuel_price: float | None = Field(
        default=None, ge=0.0,
        description="fuel price in currency per GJ of fuel heat (on fuel_basis), for the cost of each loss",
    )
    currency: str = Field(default="", description="currency label of fuel_price, e.g. 'EUR'")


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
    ``"sparkplug"``: a Sparkplug B metric named by ``metric``; the sensor's topic
    is the NDATA topic of its edge node or the DDATA topic of its device
    (``value``, ``timestamp``, ``quality`` do not apply; see :mod:`twin.ingest.sparkplug`).
    """

    format: Literal["json", "number", "batch", "sparkplug"] = "json"
    value: str = "/v"
    timestamp: str | None = "/ts"
    quality: str | None = "/q"
    timestamp_format: Literal["epoch_s", "epoch_ms", "rfc3339", "auto"] = "epoch_s"
    good_quality: list[str | int | bool] = Field(default_factory=lambda: list[str | int | bool](["good"]))
    metric: str | None = Field(default=None, description='Sparkplug B metric name (format = "sparkplug" only)')

    @model_validator(mode="after")
    def _pointers(self) -> PayloadConfig:
        if self.format == "sparkplug" and not self.metric:
            raise _Problems([("metric", 'missing; expected the Sparkplug B metric name, e.g. '
                              'payload = { format = "sparkplug", metric = "Turbine/HP/Inlet Pressure" }')])
        if self.format != "sparkplug" and self.metric is not None:
            raise _Problems([("metric", f'only a format = "sparkplug" payload names a metric, not format = '
                              f'"{self.format}"')])
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
    sample_period: Duration | None = Field(
        default=None, description="expected time between samples; default: learned from the first minutes")
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
        return self.sigma_rule()(value_si)

    def sigma_rule(self) -> Callable[[Any], Any]:
        """:meth:`sigma_si` as a plain function of the reading, the configuration read once
        (for callers that ask for many readings' σ: the same numbers, no model attribute lookups)."""
        u = self.uncertainty
        conv = self.conversion
        scale, offset, value = conv.scale, conv.offset, u.value
        if u.kind == "percent_of_reading":
            def percent(value_si: Any) -> Any:
                return abs((value_si - offset) / scale) * (value / 100.0) * scale / 1.96
            return percent
        if u.kind == "absolute":
            half = value * scale
        else:
            assert self.span is not None  # checked at load
            half = (self.span[1] - self.span[0]) * (value / 100.0) * scale

        sigma = half / 1.96

        def constant(value_si: Any) -> Any:
            return sigma
        return constant


class SensorDefaults(_Model):
    """``[sensor_defaults]``: defaults merged into every sensor (key by key for payload)."""

    payload: PayloadConfig = Field(default_factory=PayloadConfig)
    max_age: Duration = 30.0
    sample_period: Duration | None = None


class TlsConfig(_Model):
    """``[broker.tls]``: CA bundle (default: the system store), client certificate and key."""

    ca_file: Path | None = None
    cert_file: Path | None = None
    key_file: Path | None = None
    insecure: bool = False


class MetricsTlsConfig(_Model):
    """``[metrics.tls]``: serve the metrics over HTTPS; ``client_ca_file`` requires client certificates."""

    cert_file: Path
    key_file: Path
    client_ca_file: Path | None = None


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
    reconnect_min_delay: Duration = Field(default=0.5, description="first wait before reconnecting")
    reconnect_max_delay: Duration = Field(default=2.0, description="cap of the exponential reconnect backoff")
    future_tolerance: Delay = Field(
        default=5.0, description="samples stamped further ahead of their receipt are rejected (future_timestamp)")

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
    tls: MetricsTlsConfig | None = None


class SparkplugConfig(_Model):
    """``[sparkplug]``: the host side of Sparkplug B sessions (sensors with ``format = "sparkplug"``)."""

    rebirth_interval: Duration = Field(
        default=30.0, description="least time between two rebirth requests (NCMD) to one edge node")
    historical_file: Path | None = Field(
        default=None, description="CSV (timestamp,tag,value; relative to the plant file) that is_historical "
        "samples are appended to for twin backfill; default: counted only")


class StateConfig(_Model):
    """``[state]``: the per-unit state file that lets a restart resume drift charts and alarms."""

    enabled: bool = True
    file: Path | None = Field(default=None, description='default "<unit id>.state.json" beside the plant file')
    every: Delay = Field(default=60.0, description="write interval; 0 s = after every cycle")
    max_age: Duration = Field(default=6 * 3600.0, description="an older state file is not restored")


class DriftConfig(_Model):
    """``[monitoring.drift]``: EWMA and tabular CUSUM on the deviation from expected (Montgomery).

    μ0 and σ of each chart are learned from the first ``reference_windows``
    steady, non-overlapping windows (σ from the average moving range). With the
    defaults the in-control average run length of the two charts together is
    about 700 used windows and a 1σ step is signalled after about 10 (Monte
    Carlo, tests/test_drift_calibration.py).
    """

    ewma_lambda: float = Field(default=0.1, gt=0.0, le=1.0)
    ewma_L: float = Field(default=3.0, gt=0.0, description="EWMA limit width in sigmas")
    cusum_k: float = Field(default=0.5, ge=0.0, description="CUSUM reference value K in sigmas")
    cusum_h: float = Field(default=6.0, gt=0.0, description="CUSUM decision interval H in sigmas")
    reference_windows: int = Field(default=100, ge=10, description="steady non-overlapping windows that set "
                                   "each chart's target and sigma (the reference period)")


class MonitoringConfig(_Model):
    """``[monitoring]``: cycle, steady-state gate, alarm and drift settings.

    ``steady_critical_r`` defaults to 2.0, a deliberately tolerant threshold for
    the Cao & Rhinehart (1995) R statistic: simulated white noise gives critical
    values of about 1.4 (95 %) to 1.7 (99 %) with the default filters; real
    plant signals are coloured, so a stricter value flags steady periods as
    transient. A steady plant turns transient only when some R reaches
    ``steady_exit_r`` (hysteresis). A key signal whose spread stays at or below
    ``steady_frozen_fraction`` × its stated standard uncertainty for
    ``steady_frozen_windows`` windows is frozen and keeps the gate closed.
    ``steady_warmup`` is the number of windows per signal before its R counts.
    ``steady_jump_critical`` is the step test's threshold (about the 10⁻⁴ point
    for white noise with the default filters, Monte Carlo).
    The exhaust-moisture
    limits (10 % warn, 12 % alarm) are common practice, not a manufacturer
    limit; plant procedures and manufacturers' limits take precedence.
    """

    cycle: Duration = 10.0
    window: Duration | None = Field(default=None, description="default: cycle")
    steady_signals: list[str] = Field(default_factory=list)
    steady_lambdas: tuple[float, float, float] = (0.2, 0.1, 0.1)
    steady_critical_r: float = Field(default=2.0, gt=1.0)
    steady_exit_r: float = Field(default=3.0, gt=1.0, description="R at which a steady plant turns transient")
    steady_hold: Duration = 60.0
    steady_warmup: int = Field(default=5, ge=1, description="windows before a signal's R counts")
    steady_frozen_fraction: Ratio = Field(default=0.01, ge=0.0, description="noise floor / stated σ")
    steady_frozen_windows: int = Field(default=3, ge=1, description="flat windows before frozen")
    steady_jump_critical: float | None = Field(default=25.0, gt=0.0, description="step test; none = off")
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
    state: StateConfig = Field(default_factory=StateConfig)
    sparkplug: SparkplugConfig = Field(default_factory=SparkplugConfig)
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
                for key in ("max_age", "sample_period"):
                    if key in defaults:
                        s.setdefault(key, defaults[key])
                if isinstance(defaults.get("payload"), dict) and isinstance(s.get("payload", {}), dict):
                    s["payload"] = {**defaults["payload"], **s.get("payload", {})}
            sensors.append(s)
        return {**data, "sensors": sensors}

    @model_validator(mode="after")
    def _cross_check(self) -> PlantConfig:
        problems = check_plant(self)
        if problems:
            raise _Problems(problems)
        return self

