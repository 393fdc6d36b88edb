"""Plant configuration: TOML file → validated, SI-converted objects (the only pydantic user).

``load_config(path)`` reads a plant file, checks it against the schema below and
the equipment-kind contract (:mod:`twin.kinds`), converts every quantity to SI
and returns a :class:`PlantConfig`. Problems are collected and raised together
as one :class:`ConfigError`, one line per problem::

    <file>: <key.path>: <what was wrong>; expected <what>

Shapes and types are checked first; the cross-reference checks (ports against
kinds, stream connectivity, sensor targets, ...) run once those pass.

A quantity is a string with a unit (``"16.2 MPa"``, ``"541 degC"``, ``"295 kg/s"``,
``"30 s"``), see :mod:`twin.units`; a bare number is refused on every dimensional key
(it was once taken as SI: ``pressure = 16.2`` meant 16.2 Pa). Ratios may be bare numbers.

The package: :mod:`twin.config.types` (errors, quantity types),
:mod:`twin.config.schema` (the sections), :mod:`twin.config.checks`
(cross-reference checks), :mod:`twin.config.loading` (TOML, error lines).
"""

from twin.config.loading import json_schema, load_config, validate_config
from twin.config.schema import (
    BrokerConfig,
    DriftConfig,
    EquipmentConfig,
    MetricsConfig,
    MonitoringConfig,
    PayloadConfig,
    PerformanceConfig,
    PlantConfig,
    SectionConfig,
    SensorConfig,
    SensorDefaults,
    SparkplugConfig,
    StateConfig,
    StreamConfig,
    TlsConfig,
    UncertaintyConfig,
    UnitConfig,
    pointer_keys,
)
from twin.config.types import ConfigError

__all__ = [
    "BrokerConfig",
    "ConfigError",
    "DriftConfig",
    "EquipmentConfig",
    "MetricsConfig",
    "MonitoringConfig",
    "PayloadConfig",
    "PerformanceConfig",
    "PlantConfig",
    "SectionConfig",
    "SensorConfig",
    "SensorDefaults",
    "SparkplugConfig",
    "StateConfig",
    "StreamConfig",
    "TlsConfig",
    "UncertaintyConfig",
    "UnitConfig",
    "json_schema",
    "load_config",
    "pointer_keys",
    "validate_config",
]
