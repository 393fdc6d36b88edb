"""Prometheus exposition of the latest :class:`~twin.result.CycleResult`.

The only package that imports ``prometheus_client``. One custom collector,
:class:`CycleCollector`, asks a provider for the latest result at scrape time
and turns it into metric families; nothing is copied into long-lived metric
objects, so a scrape always sees one whole cycle. The only stateful metric is
the cycle-duration histogram, which the daemon feeds through
:meth:`MetricsServer.observe_cycle`.

Naming (see ``docs/metrics.md`` for the full table):

* prefix ``twin_``; SI base unit as suffix (``_pascals``, ``_watts``,
  ``_kilograms_per_second``, ``_joules_per_kilogram``, ``_seconds``);
* ``_celsius`` for temperatures and temperature differences (the result holds
  kelvin: temperatures are shifted by 273.15, differences are unchanged);
* ``_ratio`` for 0-1 fractions: efficiencies, moisture, quality, load, and the
  dimensionless heat rate (heat in / electricity out);
* labels only from bounded sets (``unit_id``, ``section``, ``heater``,
  ``condenser``, ``cause``, ``tag``, ``stream``, ``alarm``, ``level``,
  ``state``, ``status``, ``reason``, ``kpi``, ``point``).

A sample whose value is undefined (NaN) is left out rather than exported as
NaN, and an unavailable KPI is left out too (``twin_kpi_available`` says 0).
Live samples carry no timestamps; :func:`openmetrics_lines` writes the same
families with the window-end timestamp for TSDB back-fill.

Advisory monitoring only: alarm metrics must not be used to trip, interlock or
operate equipment.

Modules: :mod:`.families` (a result's samples, :func:`openmetrics_lines`),
:mod:`.health` (the daemon's live health), :mod:`.server` (the endpoint).
"""

from __future__ import annotations

from twin.metrics.families import (
    ADVISORY,
    ALARM_LEVELS,
    ZERO_CELSIUS,
    SampleSink,
    build_families,
    kpi_metric,
    openmetrics_lines,
    write_drift,
    write_result,
)
from twin.metrics.health import (
    LIVE_FAMILIES,
    Health,
    HealthCollector,
    HealthProvider,
    SparkplugHealth,
    health_families,
)
from twin.metrics.server import (
    CYCLE_BUCKETS,
    CycleCollector,
    MetricsServer,
    MetricsTls,
    Provider,
    Route,
    exposition,
)

__all__ = [
    "ADVISORY",
    "ALARM_LEVELS",
    "CYCLE_BUCKETS",
    "LIVE_FAMILIES",
    "ZERO_CELSIUS",
    "CycleCollector",
    "Health",
    "HealthCollector",
    "HealthProvider",
    "MetricsServer",
    "MetricsTls",
    "Provider",
    "Route",
    "SampleSink",
    "SparkplugHealth",
    "build_families",
    "exposition",
    "health_families",
    "kpi_metric",
    "openmetrics_lines",
    "write_drift",
    "write_result",
]
