"""Metric families of one :class:`~twin.result.CycleResult` (live and back-fill), and its OpenMetrics text.

:func:`write_result` describes a result as samples to a :class:`SampleSink`:
the live endpoint's families (:func:`build_families`), the back-fill's OpenMetrics
writer (:class:`twin.backfill.openmetrics.OpenMetricsWriter`) and
:func:`openmetrics_lines` all take their names, labels and help texts from it.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Iterable, Iterator, Mapping
from typing import Any

from prometheus_client import CollectorRegistry
from prometheus_client.core import (
    CounterMetricFamily,
    GaugeMetricFamily,
    InfoMetricFamily,
    Metric,
)
from prometheus_client.openmetrics.exposition import generate_latest as generate_openmetrics

from twin import __version__
from twin.kinds import MEASURED_QUANTITIES
from twin.monitor.alarms import STATES as ALARM_STATES
from twin.monitor.drift import CLEAR_WINDOWS as DRIFT_CLEAR_WINDOWS
from twin.monitor.steady import STEADY_STATUSES
from twin.result import ESTIMATE_STATUSES, RECONCILE_STATUSES, CycleResult, DriftView

ZERO_CELSIUS = 273.15  # [K]
ALARM_LEVELS = ("warning", "alarm")

ADVISORY = (
    " Advisory only: not for protection, tripping or control. Default limits "
    "(e.g. exhaust moisture 10 % warn, 12 % alarm) are common practice, not "
    "manufacturer limits."
)
_DIFF = " (a temperature difference: kelvin and degrees Celsius agree)"
_EXPANDED = " Expanded uncertainty at about 95 % (1.96 standard uncertainties)."

# Measured-quantity dimension -> (metric word, unit suffix, absolute temperature?).
_DIMENSIONS: dict[str, tuple[str, str, bool]] = {
    "mass_flow": ("mass_flow", "kilograms_per_second", False),
    "pressure": ("pressure", "pascals", False),
    "temperature": ("temperature", "celsius", True),
    "power": ("power", "watts", False),
}

# KPI key (before any ".<name>") -> (metric stem, unit, label for the key suffix, meaning).
_KPIS: dict[str, tuple[str, str, str | None, str]] = {
    "gross_power": ("gross_power", "watts", None, "Gross electrical output at the generator terminals"),
    "net_power": ("net_power", "watts", None, "Net electrical output (gross minus auxiliary power)"),
    "heat_input": ("heat_input", "watts", None, "Heat added to the water-steam cycle (feedwater to main steam plus reheat)"),
    "gross_efficiency": ("gross_efficiency", "ratio", None, "Gross cycle efficiency, gross power / heat input"),
    "net_efficiency": ("net_efficiency", "ratio", None, "Net cycle efficiency, net power / heat input"),
    "turbine_heat_rate": ("turbine_heat_rate", "ratio", None, "Turbine-cycle gross heat rate, cycle heat input / generator output, dimensionless (x3600 = kJ/kWh)"),
    "turbine_net_heat_rate": ("turbine_net_heat_rate", "ratio", None, "Turbine-cycle net heat rate (ASME PTC 6), cycle heat input / (generator output - motor-driven feed-pump power), dimensionless (x3600 = kJ/kWh)"),
    "plant_heat_rate": ("plant_heat_rate", "ratio", None, "Plant heat rate, turbine-cycle gross heat rate / boiler efficiency, on the plant file's fuel basis (HHV or LHV), dimensionless (x3600 = kJ/kWh)"),
    "net_plant_heat_rate": ("net_plant_heat_rate", "ratio", None, "Net plant heat rate, (cycle heat input / boiler efficiency) / (generator output - auxiliary power), on the plant file's fuel basis (HHV or LHV), dimensionless (x3600 = kJ/kWh)"),
    "load_fraction": ("load", "ratio", None, "Load as a fraction of design"),
    "section_efficiency": ("section_efficiency", "ratio", "section", "Turbine section (enthalpy-drop) isentropic efficiency"),
    "heater_ttd": ("heater_ttd", "celsius", "heater", "Feedwater heater terminal temperature difference, Tsat(shell) - feedwater outlet" + _DIFF),
    "heater_dca": ("heater_dca", "celsius", "heater", "Feedwater heater drain cooler approach, drain outlet - feedwater inlet" + _DIFF),
    "heater_temperature_rise": ("heater_temperature_rise", "celsius", "heater", "Feedwater temperature rise across the heater" + _DIFF),
    "extraction_flow": ("extraction_mass_flow", "kilograms_per_second", "heater", "Extraction steam flow to the heater (heater energy balance)"),
    "condenser_pressure": ("condenser_pressure", "pascals", "condenser", "Condenser (back) pressure, absolute"),
    "condenser_cleanliness": ("condenser_cleanliness", "ratio", "condenser", "Condenser cleanliness factor U / U_clean"),
    "condenser_itd": ("condenser_itd", "celsius", "condenser", "Condenser initial temperature difference, Tsat - cooling water inlet" + _DIFF),
    "condenser_ttd": ("condenser_ttd", "celsius", "condenser", "Condenser terminal temperature difference, Tsat - cooling water outlet" + _DIFF),
}
# Exhaust KPIs carry the end-point convention in the ``point`` label.
_POINT_KPIS = {
    f"exhaust_{q}_{p}": (f"exhaust_{q}", p)
    for q in ("quality", "moisture")
    for p in ("elep", "ueep")
}
_POINT_HELP = {
    "exhaust_quality": "LP turbine exhaust steam quality (dryness fraction); point=elep expansion-line end point, ueep used-energy end point",
    "exhaust_moisture": "LP turbine exhaust moisture, 1 - quality; point=elep expansion-line end point, ueep used-energy end point",
}


def kpi_metric(key: str) -> tuple[str, str, dict[str, str], str] | None:
    """Metric stem, unit suffix, extra labels and meaning of a KPI key; None if unknown."""
    if key in _POINT_KPIS:
        stem, point = _POINT_KPIS[key]
        return stem, "ratio", {"point": point}, _POINT_HELP[stem]
    base, _, name = key.partition(".")
    spec = _KPIS.get(base)
    if spec is None or (spec[2] is None) != (name == ""):
        return None
    stem, unit, label, meaning = spec
    return stem, unit, ({label: name} if label else {}), meaning


def _finite(x: float) -> bool:
    return x is not None and math.isfinite(x)


class SampleSink:
    """What :func:`write_result` writes to: gauges, flags, counters, info and enum samples.

    Subclasses give ``gauge`` and ``flag`` (and the rest); ``enum`` is written here once, as one
    flag per state.
    """

    def gauge(self, name: str, doc: str, value: float, **labels: str) -> None:
        raise NotImplementedError

    def flag(self, name: str, doc: str, value: bool, **labels: str) -> None:
        raise NotImplementedError

    def enum(self, name: str, doc: str, label: str, current: str, values: Iterable[str], **labels: str) -> None:
        """One sample per value of ``values`` (plus ``current`` if foreign), 1 for ``current``."""
        states = list(values)
        if current not in states:
            states.append(current)
        for s in states:
            self.flag(name, doc, s == current, **labels, **{label: s})


class _Families(SampleSink):
    """Metric families collected in first-use order, with optional sample timestamp."""

    def __init__(self, common: dict[str, str], timestamp: float | None) -> None:
        self.common = common
        self.timestamp = timestamp
        self.families: dict[str, Metric] = {}

    def _family(self, cls: type, name: str, doc: str, labels: dict[str, str]) -> Any:
        fam = self.families.get(name)
        if fam is None:
            fam = cls(name, doc, labels=list({**self.common, **labels}))
            self.families[name] = fam
        return fam

    def gauge(self, name: str, doc: str, value: float, **labels: str) -> None:
        if not _finite(value):
            return
        fam = self._family(GaugeMetricFamily, name, doc, labels)
        fam.add_metric([*self.common.values(), *labels.values()], float(value), timestamp=self.timestamp)

    def flag(self, name: str, doc: str, value: bool, **labels: str) -> None:
        self.gauge(name, doc, 1.0 if value else 0.0, **labels)

    def counter(self, name: str, doc: str, value: float, **labels: str) -> None:
        fam = self._family(CounterMetricFamily, name, doc, labels)
        fam.add_metric([*self.common.values(), *labels.values()], float(value), timestamp=self.timestamp)

    def info(self, name: str, doc: str, values: dict[str, str]) -> None:
        """An info family of one sample (no common labels)."""
        fam = InfoMetricFamily(name, doc)
        fam.add_metric([], values, timestamp=self.timestamp)
        self.families[name] = fam



def _kelvin_to_celsius(value: float) -> float:
    return value - ZERO_CELSIUS


def build_families(result: CycleResult | None, timestamp: float | None = None) -> list[Metric]:
    """Metric families of one result (``timestamp`` [s] stamped on every sample, or none).

    ``None`` (no cycle finished yet) gives only ``twin_build_info`` and
    ``twin_cycle_result_available 0``.
    """
    f = _Families({"unit_id": result.unit_id} if result is not None else {}, timestamp)
    write_result(f, result)
    return list(f.families.values())


def write_result(f: Any, result: CycleResult | None) -> None:
    """Every sample of one result, as calls on ``f`` (the methods of ``_Families``).

    :func:`build_families` passes a collector of prometheus-client families; the
    back-fill passes its own text writer (``twin.backfill.openmetrics``), so both
    write the same names, labels and values from this one place.
    """
    f.info("twin_build", "twin version and steam-property formulation of the result",
           {"version": __version__, "formulation": result.formulation if result else "unknown"})
    if result is None:
        f.flag("twin_cycle_result_available", "1 once a monitoring cycle has produced a result", False)
        return
    f.flag("twin_cycle_result_available", "1 once a monitoring cycle has produced a result", True)
    _window(f, result)
    _inputs(f, result)
    _streams(f, result)
    _sensors(f, result)
    _kpis(f, result)
    _deviation(f, result)
    _alarms(f, result)
    _drift(f, result)


def _window(f: _Families, r: CycleResult) -> None:
    f.gauge("twin_window_start_timestamp_seconds", "Start of the latest closed window, Unix time", r.window_start)
    f.gauge("twin_window_end_timestamp_seconds", "End of the latest closed window, Unix time", r.window_end)
    f.gauge("twin_result_compute_seconds", "Time from window close to result ready for the latest window", r.compute_seconds)
    f.flag("twin_steady_state", "1 when the steady-state gate (Cao & Rhinehart R-statistic) is open", r.steady)
    for tag, value in r.steady_r.items():
        f.gauge("twin_steady_state_r", "Cao & Rhinehart R-statistic of a key signal (about 1 at steady state), dimensionless", value, tag=tag)
    f.enum("twin_steady_state_status", "Steady-state verdict, 1 for the current one", "status",
           r.steady_status, STEADY_STATUSES)
    for tag in r.steady_r:
        f.flag("twin_steady_state_frozen", "1 when a key signal is frozen: its spread has stayed at or below its "
               "noise floor for several windows (a stuck transmitter, a tripped unit)", tag in r.steady_frozen, tag=tag)
    f.enum("twin_reconcile_status", "Reconciliation outcome of the latest window, 1 for the current status",
           "status", r.reconcile_status, RECONCILE_STATUSES)
    f.gauge("twin_reconcile_iterations", "Solver iterations of the latest reconciliation", r.iterations)
    f.gauge("twin_reconcile_global_test_statistic", "Global test statistic gamma = a' V^-1 a of the latest reconciliation, dimensionless", r.global_test)
    f.gauge("twin_reconcile_global_test_degrees_of_freedom", "Degrees of freedom (redundancy) of the global test", r.global_test_dof)
    f.gauge("twin_reconcile_global_test_p_value", "p-value of the global test, chi-square with the given degrees of freedom", r.global_test_p_value)


def _inputs(f: _Families, r: CycleResult) -> None:
    s = r.inputs
    f.counter("twin_messages_received", "MQTT messages received since start", s.messages)
    for reason, n in s.rejected.items():
        f.counter("twin_payloads_rejected", "Payloads rejected since start, by reason", n, reason=reason)
    f.gauge("twin_stale_tags", "Number of sensor tags older than their maximum age at window close", len(s.stale_tags))
    f.flag("twin_mqtt_connected", "1 while connected to the MQTT broker", s.connected)
    f.counter("twin_mqtt_reconnects", "MQTT reconnections since start", s.reconnects)


def _streams(f: _Families, r: CycleResult) -> None:
    for name, st in r.streams.items():
        f.gauge("twin_stream_mass_flow_kilograms_per_second", "Reconciled (or model) stream mass flow", st.mass_flow, stream=name)
        f.gauge("twin_stream_pressure_pascals", "Reconciled (or model) stream pressure, absolute", st.pressure, stream=name)
        f.gauge("twin_stream_temperature_celsius", "Reconciled (or model) stream temperature in degrees Celsius", _kelvin_to_celsius(st.temperature), stream=name)
        f.gauge("twin_stream_enthalpy_joules_per_kilogram", "Reconciled (or model) stream specific enthalpy (IAPWS-IF97 reference state)", st.enthalpy, stream=name)
        f.gauge("twin_stream_quality_ratio", "Steam quality (dryness fraction) of a two-phase stream; absent in single phase", st.quality, stream=name)


@functools.cache  # a handful of quantities; every window writes every tag's
def _sensor_families(quantity: str) -> tuple[str, str, str, str, str, str, Any] | None:
    """Names and help texts of a sensor quantity's measured, reconciled and uncertainty gauges,
    and the conversion of its values; None for a dimension without them."""
    dim = MEASURED_QUANTITIES.get(quantity, (quantity, ""))[0]
    spec = _DIMENSIONS.get(dim)
    if spec is None:
        return None
    word, unit, absolute = spec
    what = f"{word.replace('_', ' ')}" + (" in degrees Celsius" if unit == "celsius" else "")
    return (f"twin_sensor_measured_{word}_{unit}", f"Window mean of a {what} sensor",
            f"twin_sensor_reconciled_{word}_{unit}", f"Reconciled value at a {what} sensor",
            f"twin_sensor_reconciled_uncertainty_{word}_{unit}",
            f"Uncertainty of the reconciled value at a {word.replace('_', ' ')} sensor"
            + (_DIFF if unit == "celsius" else "") + "." + _EXPANDED,
            _kelvin_to_celsius if absolute else float)


def _sensors(f: _Families, r: CycleResult) -> None:
    for tag, t in r.tags.items():
        spec = _sensor_families(t.quantity)
        if spec is not None:
            measured, measured_doc, reconciled, reconciled_doc, uncertainty, uncertainty_doc, conv = spec
            f.gauge(measured, measured_doc, conv(t.measured), tag=tag)
            f.gauge(reconciled, reconciled_doc, conv(t.reconciled), tag=tag)
            f.gauge(uncertainty, uncertainty_doc, 1.96 * t.reconciled_sigma, tag=tag)
        f.gauge("twin_sensor_normalised_adjustment", "Measurement-test statistic z = (measured - reconciled) / sd of the adjustment; absent when not redundant", t.normalised_adjustment, tag=tag)
        f.gauge("twin_sensor_redundancy_ratio", "Redundancy of a measurement, 1 - Var(reconciled) / Var(measured)", t.redundancy, tag=tag)
        f.flag("twin_sensor_suspect", "1 when the sensor fails the family-wise (Sidak-corrected) measurement test this window", t.suspect, tag=tag)
        f.flag("twin_sensor_vdi_flagged", "1 when |z| > 1.96, the VDI 2048 per-measurement criterion", t.flagged_vdi, tag=tag)
        f.flag("twin_sensor_valid", "1 when the sensor's window value entered the reconciliation", t.valid, tag=tag)
        if not t.valid and t.reason:
            f.flag("twin_sensor_excluded", "1 for a sensor excluded from the window, labelled with the reason", True, tag=tag, reason=t.reason)
        f.gauge("twin_sensor_age_seconds", "Age of the newest sample of the sensor at window close", t.age_seconds, tag=tag)
        f.gauge("twin_sensor_window_samples", "Number of samples of the sensor in the window", t.count, tag=tag)


def _kpis(f: _Families, r: CycleResult) -> None:
    for key, est in r.kpis.items():
        f.flag("twin_kpi_available", "1 when the KPI is observable this window; an unavailable KPI has no value sample", est.available, kpi=key)
        f.enum("twin_kpi_status", "How the KPI was obtained this window, 1 for the current status: reconciled (instruments), model_based (carried by the soft model relations: the instruments that would observe it are invalid), unavailable", "status", est.status, ESTIMATE_STATUSES, kpi=key)
        if est.available and math.isfinite(est.soft_share):
            f.gauge("twin_kpi_soft_share_ratio", "Share of the KPI's variance that comes from soft model relations rather than instruments, dimensionless", est.soft_share, kpi=key)
        spec = kpi_metric(key)
        if spec is None or not est.available:
            continue
        stem, unit, labels, meaning = spec
        f.gauge(f"twin_{stem}_{unit}", meaning, est.value, **labels)
        f.gauge(f"twin_{stem}_uncertainty_{unit}", f"Uncertainty of: {meaning}.{_EXPANDED}", est.uncertainty, **labels)
    for key, value in r.expected.items():
        spec = kpi_metric(key)
        if spec is not None:
            stem, unit, labels, meaning = spec
            f.gauge(f"twin_expected_{stem}_{unit}", f"Expected at current conditions (forward model): {meaning}", value, **labels)


def _deviation(f: _Families, r: CycleResult) -> None:
    f.gauge("twin_heat_rate_deviation_ratio", "Turbine-cycle gross heat rate, actual - expected at the present load and boundary conditions, dimensionless (x3600 = kJ/kWh)", r.heat_rate_deviation)
    for cause, value in r.heat_rate_deviation_by_cause.items():
        f.gauge("twin_heat_rate_deviation_by_cause_ratio", "Turbine-cycle gross heat-rate deviation attributed to a cause, dimensionless; causes and 'unaccounted' of the same window sum to the total", value, cause=cause)
    for cause, value in r.heat_rate_deviation_fuel_power_by_cause.items():
        f.gauge("twin_heat_rate_deviation_fuel_power_watts", "Extra fuel power (boiler heat input basis) a heat-rate deviation cause costs at the present output, W; negative is a gain", value, cause=cause)
    for cause, value in r.heat_rate_deviation_cost_by_cause.items():
        f.gauge("twin_heat_rate_deviation_cost_per_hour", "Fuel cost per hour of a heat-rate deviation cause at the configured fuel price, in the configured currency; negative is a saving", value, cause=cause, currency=r.currency or "none")


def _alarms(f: _Families, r: CycleResult) -> None:
    for name, a in r.alarms.items():
        f.enum("twin_alarm_state", "Alarm state machine, 1 for the current state." + ADVISORY, "state",
               a.state, ALARM_STATES, alarm=name)
        levels = list(ALARM_LEVELS) + ([a.severity] if a.severity and a.severity not in ALARM_LEVELS else [])
        for level in levels:
            f.flag("twin_alarm_active", "1 when the alarm is raised at this level (its highest raised level)." + ADVISORY,
                   a.active and a.severity == level, alarm=name, level=level)


def _drift(f: _Families, r: CycleResult) -> None:
    write_drift(f, r.drift)


def write_drift(f: SampleSink, drift: Mapping[str, DriftView]) -> None:
    """The drift-chart families of one window's charts (the live collector's, and the back-fill's drift pass)."""
    unit = " In the unit of the KPI's own metric."
    for key, d in drift.items():
        f.gauge("twin_kpi_drift_ewma", "EWMA of a KPI over steady windows." + unit, d.ewma, kpi=key)
        f.gauge("twin_kpi_drift_ewma_lower", "Lower EWMA control limit of a KPI." + unit, d.ewma_lower, kpi=key)
        f.gauge("twin_kpi_drift_ewma_upper", "Upper EWMA control limit of a KPI." + unit, d.ewma_upper, kpi=key)
        f.gauge("twin_kpi_drift_cusum_high", "Upper tabular CUSUM statistic of a KPI." + unit, d.cusum_high, kpi=key)
        f.gauge("twin_kpi_drift_cusum_low", "Lower tabular CUSUM statistic of a KPI." + unit, d.cusum_low, kpi=key)
        f.flag("twin_kpi_drift_alarm", "1 from the window an EWMA or CUSUM chart of a KPI signals drift until the charts have been quiet "
               f"for {DRIFT_CLEAR_WINDOWS} charted windows." + ADVISORY, d.alarm, kpi=key)
        f.gauge("twin_kpi_drift_direction", "Direction of a KPI's drift: 1 up, -1 down, 0 none",
                {"up": 1.0, "down": -1.0}.get(d.direction, 0.0), kpi=key)


class _Static:
    """A collector yielding fixed families (for one-off OpenMetrics output)."""

    def __init__(self, families: list[Metric]) -> None:
        self._families = families

    def collect(self) -> Iterator[Metric]:
        yield from self._families


def openmetrics_lines(results: CycleResult | Iterable[CycleResult], timestamp: bool = True) -> str:
    """OpenMetrics text of one or more results for ``promtool tsdb create-blocks-from openmetrics``.

    Every sample is stamped with its result's ``window_end`` (Unix seconds)
    when ``timestamp`` is true. Samples of several results are merged per
    family and grouped per series in time order, as OpenMetrics requires; the
    text ends with ``# EOF``.
    """
    if isinstance(results, CycleResult):
        results = [results]
    ordered = sorted(results, key=lambda r: r.window_end)
    if timestamp and len({r.window_end for r in ordered}) != len(ordered):
        raise ValueError("results must have distinct window_end times to be written with timestamps")
    merged: dict[str, Metric] = {}
    for r in ordered:
        if not _finite(r.window_end) and timestamp:
            raise ValueError(f"result of unit {r.unit_id!r} has no finite window_end")
        for fam in build_families(r, r.window_end if timestamp else None):
            if fam.name == "twin_cycle_result_available":
                continue  # a live-endpoint liveness signal, meaningless in history
            if fam.name in merged:
                merged[fam.name].samples.extend(fam.samples)
            else:
                merged[fam.name] = fam
    for fam in merged.values():
        order: dict[tuple, int] = {}
        for s in fam.samples:
            order.setdefault((s.name, tuple(sorted(s.labels.items()))), len(order))
        fam.samples.sort(key=lambda s: (order[(s.name, tuple(sorted(s.labels.items())))], s.timestamp or 0))
    registry = CollectorRegistry(auto_describe=False)
    registry.register(_Static(list(merged.values())))
    return generate_openmetrics(registry).decode("utf-8")
