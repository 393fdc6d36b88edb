"""Live health of the daemon's inputs and loop (:class:`Health`), exported at scrape time."""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field

from prometheus_client.core import Metric

from twin.metrics.families import _Families


@dataclass(frozen=True)
class SparkplugHealth:
    """Live state of the Sparkplug B session (part of :class:`Health`).

    Attributes
    ----------
    tag_offline : mapping of str to bool
        Per Sparkplug tag: its edge node or device is dead now (NDEATH/DDEATH, no new BIRTH yet).
    node_online : mapping of str to bool
        Per edge node (``<group>/<node>``): born and not dead since.
    sequence_gaps, rebirth_requests, deaths_ignored : mapping of str to int
        Per edge node since start: jumps of ``seq``; NCMD rebirth requests sent; NDEATHs
        ignored because their ``bdSeq`` did not match the current NBIRTH.
    historical, ignored : int
        ``is_historical`` samples routed to back-fill (not live); metrics no sensor is bound to.
    historical_write_failures : int
        ``is_historical`` samples that could not be appended to the back-fill file.
    """

    tag_offline: Mapping[str, bool]
    node_online: Mapping[str, bool]
    sequence_gaps: Mapping[str, int]
    rebirth_requests: Mapping[str, int]
    deaths_ignored: Mapping[str, int]
    historical: int
    ignored: int
    historical_write_failures: int = 0


@dataclass(frozen=True)
class Health:
    """Live state of the daemon's inputs and loop, read at scrape time (not per window).

    Attributes
    ----------
    unit_id : str
    now : float
        Time of the snapshot [s since the epoch].
    started : float
        When the daemon started [s since the epoch]; ages count from here
        while nothing has been received.
    connected : bool
        Connected to the MQTT broker now.
    reconnects : int
        Established connections that were lost since start.
    failures_by_reason : mapping of str to int
        Failed connection attempts since start, by bounded reason.
    last_failure_reason, last_failure_time : str, float
        The most recent failed attempt (``""``/NaN if none) [s since the epoch].
    last_message_time : float
        Receive time of the newest MQTT message [s since the epoch]; NaN if none.
    messages : int
        Messages received since start.
    rejected : mapping of str to int
        Samples or messages rejected since start, by reason (every reason present).
    callback_errors, publish_dropped : int
        Message-handler failures; outgoing messages that could not be queued.
    tag_last_time : mapping of str to float
        Per tag, the time of its newest stored sample [s since the epoch]; NaN if none.
    overwritten : mapping of str to int
        Per tag, samples lost to ring-buffer overflow since start.
    samples_missing : mapping of str to int
        Per tag, samples expected from its sample period but not received.
    sample_period : mapping of str to float
        Per tag, the expected sample period [s] (configured or learned); absent = not known yet.
    windows_skipped, cycles_failed : int
        Windows never closed because the daemon fell behind; cycles that raised.
    cycle_period : float
        Configured cycle [s].
    state_saved_time : float
        When the state file was last written [s since the epoch]; NaN if never.
    state_write_failures : int
        Failed writes of the state file since start.
    sparkplug : SparkplugHealth or None
        The Sparkplug B session; None when no sensor is bound to a Sparkplug metric.
    """

    unit_id: str
    now: float
    started: float
    connected: bool = False
    reconnects: int = 0
    failures_by_reason: Mapping[str, int] = field(default_factory=dict)
    last_failure_reason: str = ""
    last_failure_time: float = math.nan
    last_message_time: float = math.nan
    messages: int = 0
    rejected: Mapping[str, int] = field(default_factory=dict)
    callback_errors: int = 0
    publish_dropped: int = 0
    tag_last_time: Mapping[str, float] = field(default_factory=dict)
    overwritten: Mapping[str, int] = field(default_factory=dict)
    samples_missing: Mapping[str, int] = field(default_factory=dict)
    sample_period: Mapping[str, float] = field(default_factory=dict)
    windows_skipped: int = 0
    cycles_failed: int = 0
    cycle_period: float = math.nan
    state_saved_time: float = math.nan
    state_write_failures: int = 0
    sparkplug: SparkplugHealth | None = None


HealthProvider = Callable[[], Health]

# Families the health collector exports live; the per-window copies in a
# CycleResult are left out of the live endpoint when a health provider is set.
LIVE_FAMILIES = frozenset({"twin_messages_received", "twin_payloads_rejected", "twin_mqtt_connected",
                           "twin_mqtt_reconnects"})


def health_families(h: Health) -> list[Metric]:
    """Metric families of one :class:`Health` snapshot (live: no sample timestamps)."""
    f = _Families({"unit_id": h.unit_id}, None)
    f.counter("twin_messages_received", "MQTT messages received since start", h.messages)
    for reason, n in h.rejected.items():
        f.counter("twin_payloads_rejected", "Payloads rejected since start, by reason", n, reason=reason)
    f.flag("twin_mqtt_connected", "1 while connected to the MQTT broker", h.connected)
    f.counter("twin_mqtt_reconnects", "MQTT reconnections since start", h.reconnects)
    for reason, n in h.failures_by_reason.items():
        f.counter("twin_mqtt_connect_failures", "Failed MQTT connection attempts since start, by reason", n,
                  reason=reason)
    if h.last_failure_reason:
        f.gauge("twin_mqtt_last_connect_failure_timestamp_seconds",
                "Time of the latest failed MQTT connection attempt, Unix time, labelled with its reason",
                h.last_failure_time, reason=h.last_failure_reason)
    since = h.last_message_time if math.isfinite(h.last_message_time) else h.started
    f.gauge("twin_mqtt_last_message_age_seconds",
            "Time since the latest MQTT message (since start if none yet)", max(h.now - since, 0.0))
    f.counter("twin_mqtt_callback_errors", "Messages whose handler failed (dropped) since start", h.callback_errors)
    f.counter("twin_mqtt_publish_dropped", "Outgoing MQTT messages that could not be queued since start",
              h.publish_dropped)
    for tag, t in h.tag_last_time.items():
        since = t if math.isfinite(t) else h.started
        f.gauge("twin_sensor_last_sample_age_seconds",
                "Time since the newest stored sample of the sensor (since start if none yet)",
                max(h.now - since, 0.0), tag=tag)
    for tag, n in h.overwritten.items():
        f.counter("twin_sensor_samples_overwritten", "Samples of the sensor lost to ring-buffer overflow since start",
                  n, tag=tag)
    for tag, n in h.samples_missing.items():
        f.counter("twin_sensor_samples_missing",
                  "Samples of the sensor expected from its sample period but never received, since start", n, tag=tag)
    for tag, period in h.sample_period.items():
        f.gauge("twin_sensor_expected_sample_period_seconds",
                "Expected time between samples of the sensor (configured or learned)", period, tag=tag)
    f.counter("twin_windows_skipped", "Windows never closed because the daemon fell behind, since start",
              h.windows_skipped)
    f.counter("twin_cycles_failed", "Monitoring cycles that failed with an error, since start", h.cycles_failed)
    f.gauge("twin_cycle_period_seconds", "Configured monitoring cycle (one window closes per cycle)", h.cycle_period)
    f.gauge("twin_state_saved_timestamp_seconds", "When the state file was last written, Unix time",
            h.state_saved_time)
    f.counter("twin_state_write_failures", "Failed writes of the state file since start", h.state_write_failures)
    if h.sparkplug is not None:
        _sparkplug(f, h.sparkplug)
    return list(f.families.values())


def _sparkplug(f: _Families, h: SparkplugHealth) -> None:
    """Sparkplug B session health (only when the plant file binds Sparkplug metrics)."""
    for tag, off in h.tag_offline.items():
        f.flag("twin_sensor_offline", "1 while the sensor's Sparkplug edge node or device is dead (NDEATH or "
               "DDEATH received, no new BIRTH yet): its readings are stale at once", off, tag=tag)
    for node, up in h.node_online.items():
        f.flag("twin_sparkplug_node_online", "1 while the Sparkplug edge node is born (NBIRTH) and not dead",
               up, node=node)
    for node, n in h.sequence_gaps.items():
        f.counter("twin_sparkplug_sequence_gaps", "Sparkplug messages of the edge node whose seq did not follow "
                  "the previous one (lost or reordered messages), since start", n, node=node)
    for node, n in h.rebirth_requests.items():
        f.counter("twin_sparkplug_rebirth_requests", "Rebirth requests (NCMD Node Control/Rebirth) sent to the "
                  "edge node, since start", n, node=node)
    for node, n in h.deaths_ignored.items():
        f.counter("twin_sparkplug_deaths_ignored", "NDEATH messages ignored because their bdSeq did not match "
                  "the current NBIRTH (a late will of an older session), since start", n, node=node)
    f.counter("twin_sparkplug_historical_samples", "Sparkplug is_historical samples routed to back-fill, never "
              "into live windows, since start", h.historical)
    f.counter("twin_sparkplug_metrics_ignored", "Sparkplug metrics received that no sensor of the plant file is "
              "bound to, since start", h.ignored)
    f.counter("twin_sparkplug_historical_write_failures", "Sparkplug is_historical samples that could not be "
              "appended to the back-fill file ([sparkplug] historical_file), since start", h.historical_write_failures)


class HealthCollector:
    """Custom collector of the live :class:`Health` (read at scrape time)."""

    def __init__(self, provider: HealthProvider) -> None:
        if not callable(provider):
            raise TypeError(f"provider must be callable, got {type(provider).__name__}")
        self._provider = provider

    def describe(self) -> list[Metric]:
        return []

    def collect(self) -> Iterator[Metric]:
        yield from health_families(self._provider())
