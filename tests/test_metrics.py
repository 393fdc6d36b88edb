"""Tests of twin.metrics: exposition format, naming, unit conversion, the HTTP server.

# golden: hand-built result — these are format-conformance tests. The
# CycleResult below is invented (unit demo-u1) and chosen so that kelvin →
# °C conversions are exact in binary floating point (e.g. 814.15 K → 541.0 °C).
"""

from __future__ import annotations

import math
import re
import shutil
import subprocess
import urllib.request
from pathlib import Path

import pytest
from prometheus_client import REGISTRY, CollectorRegistry
from prometheus_client.parser import text_string_to_metric_families

from twin.metrics import (
    ALARM_LEVELS,
    CycleCollector,
    MetricsServer,
    exposition,
    kpi_metric,
    openmetrics_lines,
)
from twin.monitor.alarms import STATES as ALARM_STATES
from twin.result import (
    NAN,
    RECONCILE_STATUSES,
    AlarmView,
    CycleResult,
    DriftView,
    Estimate,
    InputStats,
    StreamState,
    TagResult,
)

PROMTOOL = shutil.which("promtool")
needs_promtool = pytest.mark.skipif(
    PROMTOOL is None, reason="promtool is not installed (apt-get install --no-install-recommends prometheus)"
)

ALLOWED_LABELS = {
    "unit_id", "section", "heater", "condenser", "cause", "tag", "stream", "alarm", "level",
    "state", "status", "reason", "kpi", "point", "le",  # le: histogram buckets
    "version", "formulation",  # twin_build_info only
    "currency",  # the plant file's fuel-price currency: one value per unit
}

WINDOW_END = 1_700_000_000.0  # Unix time [s], 2023-11-14T22:13:20Z


def full_result(window_end: float = WINDOW_END, efficiency: float = 0.4) -> CycleResult:
    """A small invented result with every part of CycleResult populated."""
    heat_input = 925.0e6  # [W]
    return CycleResult(
        unit_id="demo-u1",
        window_start=window_end - 30.0,
        window_end=window_end,
        formulation="IAPWS-IF97",
        steady=True,
        steady_status="steady",
        steady_r={"GEN-MW1": 1.25, "HP-MS-P1": 0.75},
        steady_frozen=("HP-MS-P1",),
        reconcile_status="converged",
        iterations=4,
        global_test=12.5,
        global_test_dof=9,
        global_test_p_value=0.1875,
        tags={
            "HP-MS-T1": TagResult("HP-MS-T1", "temperature", measured=814.15, spread=0.5, count=30,
                                  age_seconds=1.5, valid=True, sigma=1.0, reconciled=813.15,
                                  reconciled_sigma=0.5, adjustment=1.0, normalised_adjustment=1.25,
                                  redundancy=0.75),
            "FW-F1": TagResult("FW-F1", "mass_flow", measured=296.5, count=30, age_seconds=0.5,
                               valid=True, reconciled=295.0, reconciled_sigma=1.0,
                               normalised_adjustment=-0.5, redundancy=0.5),
            "CD-BP1": TagResult("CD-BP1", "pressure", measured=6500.0, count=30, age_seconds=2.0,
                                valid=True, reconciled=6200.0, reconciled_sigma=25.0,
                                normalised_adjustment=4.5, redundancy=0.25, suspect=True,
                                flagged_vdi=True),
            "GEN-MW1": TagResult("GEN-MW1", "power", measured=370.0e6, count=30, age_seconds=0.25,
                                 valid=True, reconciled=370.0e6, reconciled_sigma=1.0e6,
                                 redundancy=0.0),
            "CW-T1": TagResult("CW-T1", "cooling_water_inlet_temperature", measured=293.15,
                               count=30, age_seconds=3.0, valid=True),
            "LP-EXT1-P1": TagResult("LP-EXT1-P1", "pressure", age_seconds=600.0, valid=False,
                                    reason="stale"),
        },
        streams={
            "main_steam": StreamState(295.0, 16.2e6, 814.15, 3.4e6),
            "lp_ueep": StreamState(250.0, 6200.0, 310.15, 2.3e6, 0.875),
        },
        kpis={
            "gross_power": Estimate(370.0e6, 2.0e6, True),
            "heat_input": Estimate(heat_input, 5.0e6, True),
            "gross_efficiency": Estimate(efficiency, 0.004, True, soft_share=0.12),
            "turbine_heat_rate": Estimate(1.0 / efficiency, 0.025, True),
            "load_fraction": Estimate(0.985, 0.01, True),
            "exhaust_moisture_ueep": Estimate(0.105, 0.0125, True),
            "exhaust_moisture_elep": Estimate(0.125, 0.0125, True),
            "exhaust_quality_ueep": Estimate(0.895, 0.0125, True),
            "section_efficiency.hp": Estimate(0.86, 0.005, True),
            "section_efficiency.lp": Estimate(0.88, 0.05, False),  # unobservable: not exported
            "heater_ttd.fwh7": Estimate(-1.75, 0.5, True),
            "extraction_flow.fwh7": Estimate(21.5, 0.5, True),
            "condenser_pressure.main": Estimate(6200.0, 50.0, True),
            "condenser_itd.main": Estimate(17.0, 0.25, True),
        },
        expected={"turbine_heat_rate": 2.45, "gross_efficiency": 0.408, "condenser_pressure.main": 6000.0},
        heat_rate_deviation=0.05,
        heat_rate_deviation_by_cause={"condenser_pressure": 0.03, "main_steam_temperature": 0.005,
                                      "unaccounted": 0.015},
        heat_rate_deviation_fuel_power_by_cause={"condenser_pressure": 1.2e7},
        heat_rate_deviation_cost_by_cause={"condenser_pressure": 240.0}, currency="EUR",
        alarms={
            "exhaust_moisture": AlarmView("exhaust_moisture", "active", "warning", 0.105, True),
            "gross_efficiency_margin": AlarmView("gross_efficiency_margin", "pending", "", 0.4, False),
        },
        drift={"gross_efficiency": DriftView("gross_efficiency", 0.401, 0.402, 0.414, 0.0, 0.03,
                                             True, "down")},
        inputs=InputStats(messages=12345, rejected={"parse_error": 3, "out_of_range": 1},
                          stale_tags=("LP-EXT1-P1",), connected=True, reconnects=2),
        depends_on=("lp_expansion_line",),
        compute_seconds=0.125,
    )


def registry_for(result: CycleResult | None) -> CollectorRegistry:
    reg = CollectorRegistry()
    reg.register(CycleCollector(lambda: result))
    return reg


def text_of(result: CycleResult | None) -> str:
    return exposition(registry_for(result)).decode()


def samples(text: str) -> dict[tuple[str, frozenset], float]:
    """(sample name, labels) → value, parsed by prometheus_client's own text parser."""
    out = {}
    for fam in text_string_to_metric_families(text):
        for s in fam.samples:
            out[(s.name, frozenset(s.labels.items()))] = s.value
    return out


def key(name: str, **labels: str) -> tuple[str, frozenset]:
    return name, frozenset({"unit_id": "demo-u1", **labels}.items())


# ----------------------------------------------------------------- golden ---

GOLDEN = """\
twin_cycle_result_available{unit_id="demo-u1"} 1.0
twin_window_end_timestamp_seconds{unit_id="demo-u1"} 1.7e+09
twin_steady_state{unit_id="demo-u1"} 1.0
twin_steady_state_r{tag="GEN-MW1",unit_id="demo-u1"} 1.25
twin_steady_state_frozen{tag="GEN-MW1",unit_id="demo-u1"} 0.0
twin_steady_state_frozen{tag="HP-MS-P1",unit_id="demo-u1"} 1.0
twin_reconcile_status{status="converged",unit_id="demo-u1"} 1.0
twin_reconcile_status{status="not_steady",unit_id="demo-u1"} 0.0
twin_reconcile_global_test_statistic{unit_id="demo-u1"} 12.5
twin_reconcile_global_test_degrees_of_freedom{unit_id="demo-u1"} 9.0
twin_reconcile_global_test_p_value{unit_id="demo-u1"} 0.1875
twin_messages_received_total{unit_id="demo-u1"} 12345.0
twin_payloads_rejected_total{reason="parse_error",unit_id="demo-u1"} 3.0
twin_stale_tags{unit_id="demo-u1"} 1.0
twin_mqtt_connected{unit_id="demo-u1"} 1.0
twin_mqtt_reconnects_total{unit_id="demo-u1"} 2.0
twin_stream_mass_flow_kilograms_per_second{stream="main_steam",unit_id="demo-u1"} 295.0
twin_stream_pressure_pascals{stream="main_steam",unit_id="demo-u1"} 1.62e+07
twin_stream_temperature_celsius{stream="main_steam",unit_id="demo-u1"} 541.0
twin_stream_temperature_celsius{stream="lp_ueep",unit_id="demo-u1"} 37.0
twin_stream_enthalpy_joules_per_kilogram{stream="main_steam",unit_id="demo-u1"} 3.4e+06
twin_stream_quality_ratio{stream="lp_ueep",unit_id="demo-u1"} 0.875
twin_sensor_measured_temperature_celsius{tag="HP-MS-T1",unit_id="demo-u1"} 541.0
twin_sensor_reconciled_temperature_celsius{tag="HP-MS-T1",unit_id="demo-u1"} 540.0
twin_sensor_reconciled_uncertainty_temperature_celsius{tag="HP-MS-T1",unit_id="demo-u1"} 0.98
twin_sensor_measured_temperature_celsius{tag="CW-T1",unit_id="demo-u1"} 20.0
twin_sensor_measured_mass_flow_kilograms_per_second{tag="FW-F1",unit_id="demo-u1"} 296.5
twin_sensor_measured_pressure_pascals{tag="CD-BP1",unit_id="demo-u1"} 6500.0
twin_sensor_reconciled_pressure_pascals{tag="CD-BP1",unit_id="demo-u1"} 6200.0
twin_sensor_measured_power_watts{tag="GEN-MW1",unit_id="demo-u1"} 3.7e+08
twin_sensor_normalised_adjustment{tag="CD-BP1",unit_id="demo-u1"} 4.5
twin_sensor_redundancy_ratio{tag="HP-MS-T1",unit_id="demo-u1"} 0.75
twin_sensor_suspect{tag="CD-BP1",unit_id="demo-u1"} 1.0
twin_sensor_suspect{tag="FW-F1",unit_id="demo-u1"} 0.0
twin_sensor_vdi_flagged{tag="CD-BP1",unit_id="demo-u1"} 1.0
twin_sensor_valid{tag="LP-EXT1-P1",unit_id="demo-u1"} 0.0
twin_sensor_excluded{reason="stale",tag="LP-EXT1-P1",unit_id="demo-u1"} 1.0
twin_sensor_age_seconds{tag="LP-EXT1-P1",unit_id="demo-u1"} 600.0
twin_kpi_available{kpi="gross_efficiency",unit_id="demo-u1"} 1.0
twin_kpi_available{kpi="section_efficiency.lp",unit_id="demo-u1"} 0.0
twin_gross_efficiency_ratio{unit_id="demo-u1"} 0.4
twin_gross_efficiency_uncertainty_ratio{unit_id="demo-u1"} 0.004
twin_turbine_heat_rate_ratio{unit_id="demo-u1"} 2.5
twin_gross_power_watts{unit_id="demo-u1"} 3.7e+08
twin_load_ratio{unit_id="demo-u1"} 0.985
twin_exhaust_moisture_ratio{point="ueep",unit_id="demo-u1"} 0.105
twin_exhaust_moisture_ratio{point="elep",unit_id="demo-u1"} 0.125
twin_section_efficiency_ratio{section="hp",unit_id="demo-u1"} 0.86
twin_heater_ttd_celsius{heater="fwh7",unit_id="demo-u1"} -1.75
twin_extraction_mass_flow_kilograms_per_second{heater="fwh7",unit_id="demo-u1"} 21.5
twin_condenser_pressure_pascals{condenser="main",unit_id="demo-u1"} 6200.0
twin_condenser_itd_celsius{condenser="main",unit_id="demo-u1"} 17.0
twin_expected_turbine_heat_rate_ratio{unit_id="demo-u1"} 2.45
twin_expected_condenser_pressure_pascals{condenser="main",unit_id="demo-u1"} 6000.0
twin_heat_rate_deviation_ratio{unit_id="demo-u1"} 0.05
twin_heat_rate_deviation_by_cause_ratio{cause="condenser_pressure",unit_id="demo-u1"} 0.03
twin_heat_rate_deviation_by_cause_ratio{cause="unaccounted",unit_id="demo-u1"} 0.015
twin_heat_rate_deviation_fuel_power_watts{cause="condenser_pressure",unit_id="demo-u1"} 1.2e+07
twin_heat_rate_deviation_cost_per_hour{cause="condenser_pressure",currency="EUR",unit_id="demo-u1"} 240.0
twin_alarm_state{alarm="exhaust_moisture",state="active",unit_id="demo-u1"} 1.0
twin_alarm_state{alarm="exhaust_moisture",state="normal",unit_id="demo-u1"} 0.0
twin_alarm_active{alarm="exhaust_moisture",level="warning",unit_id="demo-u1"} 1.0
twin_alarm_active{alarm="exhaust_moisture",level="alarm",unit_id="demo-u1"} 0.0
twin_alarm_active{alarm="gross_efficiency_margin",level="warning",unit_id="demo-u1"} 0.0
twin_kpi_drift_ewma{kpi="gross_efficiency",unit_id="demo-u1"} 0.401
twin_kpi_drift_alarm{kpi="gross_efficiency",unit_id="demo-u1"} 1.0
twin_kpi_drift_direction{kpi="gross_efficiency",unit_id="demo-u1"} -1.0
twin_build_info{formulation="IAPWS-IF97",version="0.1.0"} 1.0
"""


def test_golden_lines_appear_verbatim() -> None:
    # golden: hand-built result
    lines = set(text_of(full_result()).splitlines())
    missing = [g for g in GOLDEN.splitlines() if g not in lines]
    assert missing == []


def test_unavailable_kpi_is_omitted_but_flagged() -> None:
    text = text_of(full_result())
    assert 'twin_section_efficiency_ratio{section="lp"' not in text
    assert 'twin_section_efficiency_uncertainty_ratio{section="lp"' not in text
    s = samples(text)
    assert s[key("twin_kpi_available", kpi="section_efficiency.lp")] == 0.0
    assert s[key("twin_section_efficiency_ratio", section="hp")] == 0.86


def test_nan_values_are_omitted_not_exported_as_nan() -> None:
    text = text_of(full_result())
    assert "NaN" not in text
    # single-phase main steam has no quality; GEN-MW1 is not redundant (no z)
    assert 'twin_stream_quality_ratio{stream="main_steam"' not in text
    assert 'twin_sensor_normalised_adjustment{tag="GEN-MW1"' not in text


def test_temperatures_are_celsius_and_differences_unchanged() -> None:
    r = full_result()
    s = samples(text_of(r))
    # 0 °C = 273.15 K exactly (SI Brochure, 9th ed., 2019, section 2.3.1)
    for tag in ("HP-MS-T1", "CW-T1"):
        got = s[key("twin_sensor_measured_temperature_celsius", tag=tag)]
        assert got == pytest.approx(r.tags[tag].measured - 273.15, abs=1e-9)
    assert s[key("twin_stream_temperature_celsius", stream="lp_ueep")] == pytest.approx(37.0, abs=1e-9)
    # differences (TTD, ITD, expanded uncertainty of a temperature) are the same in K and °C
    assert s[key("twin_heater_ttd_celsius", heater="fwh7")] == -1.75
    assert s[key("twin_sensor_reconciled_uncertainty_temperature_celsius", tag="HP-MS-T1")] == pytest.approx(1.96 * 0.5)


def test_enum_gauges_have_exactly_one_current_state() -> None:
    s = samples(text_of(full_result()))
    status = {dict(k[1])["status"]: v for k, v in s.items() if k[0] == "twin_reconcile_status"}
    assert set(status) == set(RECONCILE_STATUSES)
    assert status == {st: float(st == "converged") for st in RECONCILE_STATUSES}
    for alarm in ("exhaust_moisture", "gross_efficiency_margin"):
        states = {dict(k[1])["state"]: v for k, v in s.items()
                  if k[0] == "twin_alarm_state" and dict(k[1])["alarm"] == alarm}
        assert set(states) == set(ALARM_STATES)
        assert sum(states.values()) == 1.0
    levels = {dict(k[1])["level"] for k in s if k[0] == "twin_alarm_active"}
    assert levels == set(ALARM_LEVELS)


def test_unknown_alarm_state_still_exported_as_current() -> None:
    r = full_result()
    odd = CycleResult("demo-u1", 0.0, 30.0, alarms={"x": AlarmView("x", "acknowledged", "critical", 1.0, True)})
    s = samples(text_of(odd))
    assert s[key("twin_alarm_state", alarm="x", state="acknowledged")] == 1.0
    assert s[key("twin_alarm_active", alarm="x", level="critical")] == 1.0
    assert r.alarms  # the full result is unaffected by the odd one


def test_alarm_help_says_advisory_and_common_practice() -> None:
    text = text_of(full_result())
    for name in ("twin_alarm_state", "twin_alarm_active", "twin_kpi_drift_alarm"):
        help_line = next(ln for ln in text.splitlines() if ln.startswith(f"# HELP {name} "))
        assert "Advisory only" in help_line and "not for protection" in help_line
        assert "common practice, not manufacturer limits" in help_line


def test_celsius_help_says_so() -> None:
    text = text_of(full_result())
    helps = [ln for ln in text.splitlines() if ln.startswith("# HELP ") and "_celsius " in ln]
    assert helps
    for ln in helps:
        assert "Celsius" in ln


def test_labels_come_from_the_bounded_set_and_samples_carry_no_timestamps() -> None:
    reg = registry_for(full_result())
    for fam in reg.collect():
        assert fam.name.startswith("twin_")
        for s in fam.samples:
            assert set(s.labels) <= ALLOWED_LABELS, (s.name, s.labels)
            assert s.timestamp is None


def test_no_result_yet_gives_only_liveness() -> None:
    s = samples(text_of(None))
    assert s == {
        ("twin_cycle_result_available", frozenset()): 0.0,
        ("twin_build_info", frozenset({"version": "0.1.0", "formulation": "unknown"}.items())): 1.0,
    }


def test_provider_is_called_at_scrape_time() -> None:
    current: list[CycleResult | None] = [None]
    reg = CollectorRegistry()
    reg.register(CycleCollector(lambda: current[0]))
    assert "twin_gross_efficiency_ratio" not in exposition(reg).decode()
    current[0] = full_result(efficiency=0.375)
    assert samples(exposition(reg).decode())[key("twin_gross_efficiency_ratio")] == 0.375


def test_kpi_metric_names() -> None:
    assert kpi_metric("turbine_heat_rate")[:3] == ("turbine_heat_rate", "ratio", {})
    assert kpi_metric("condenser_cleanliness.main")[:3] == ("condenser_cleanliness", "ratio", {"condenser": "main"})
    assert kpi_metric("exhaust_quality_elep")[:3] == ("exhaust_quality", "ratio", {"point": "elep"})
    assert kpi_metric("section_efficiency") is None  # keyed KPI without its key
    assert kpi_metric("gross_efficiency.hp") is None
    assert kpi_metric("no_such_kpi") is None


def test_bad_arguments_are_rejected() -> None:
    with pytest.raises(TypeError, match="provider must be callable"):
        CycleCollector(full_result())  # type: ignore[arg-type]
    with pytest.raises(ValueError, match=r"port must be in 0\.\.65535, got 70000"):
        MetricsServer(lambda: None, port=70000)
    server = MetricsServer(lambda: None)
    with pytest.raises(ValueError, match=r"cycle duration .* got -1"):
        server.observe_cycle(-1.0)
    with pytest.raises(ValueError, match=r"cycle duration .* got nan"):
        server.observe_cycle(math.nan)


# ------------------------------------------------------------ HTTP server ---


def _get(url: str) -> str:
    with urllib.request.urlopen(url, timeout=5) as resp:
        return resp.read().decode()


def test_server_serves_latest_result_and_histogram() -> None:
    current = [full_result()]
    server = MetricsServer(lambda: current[0], port=0)
    assert server.registry is not REGISTRY
    server.start()
    try:
        assert server.port > 0
        for seconds in (0.02, 0.2, 3.0):
            server.observe_cycle(seconds)
        s = samples(_get(f"http://127.0.0.1:{server.port}/metrics"))
        assert s[key("twin_gross_efficiency_ratio")] == 0.4
        assert s[("twin_cycle_duration_seconds_count", frozenset())] == 3.0
        assert s[("twin_cycle_duration_seconds_sum", frozenset())] == pytest.approx(3.22)
        assert s[("twin_cycle_duration_seconds_bucket", frozenset({"le": "0.25"}.items()))] == 2.0
        current[0] = full_result(window_end=WINDOW_END + 10, efficiency=0.375)
        s = samples(_get(f"http://127.0.0.1:{server.port}/metrics"))
        assert s[key("twin_gross_efficiency_ratio")] == 0.375
    finally:
        server.stop()
    assert not server.running
    with pytest.raises(OSError):
        _get(f"http://127.0.0.1:{server.port}/metrics")
    server.stop()  # idempotent
    # nothing leaked into the process-wide default registry
    assert REGISTRY.get_sample_value("twin_cycle_duration_seconds_count") is None


def test_server_refuses_double_start() -> None:
    with MetricsServer(lambda: None, port=0) as server:
        with pytest.raises(RuntimeError, match="already running"):
            server.start()
        assert "twin_cycle_result_available 0.0" in _get(f"http://127.0.0.1:{server.port}/metrics")


# ---------------------------------------------------------------- promtool ---


@needs_promtool
def test_promtool_check_metrics_accepts_exposition() -> None:
    server = MetricsServer(full_result, port=0)
    server.observe_cycle(0.5)
    text = exposition(server.registry).decode()
    proc = subprocess.run([PROMTOOL, "check", "metrics"], input=text, capture_output=True, text=True)
    # The one deliberate departure from promtool's lint: Prometheus convention takes
    # the gram as base unit of mass, twin follows SI (kilogram) as DESIGN.md says,
    # so every *_kilograms_per_second name draws exactly this message and no other.
    lint = re.compile(r'^(twin_\w+_kilograms_per_second) use base unit "grams" instead of "kilograms"$')
    problems = [ln for ln in (proc.stdout + proc.stderr).splitlines() if ln.strip()]
    flagged = {m.group(1) for ln in problems if (m := lint.match(ln))}
    assert [ln for ln in problems if not lint.match(ln)] == []
    mass_flow_names = set(re.findall(r"^# TYPE (twin_\w+_kilograms_per_second) ", text, re.M))
    assert flagged == mass_flow_names
    assert proc.returncode in (0, 3)  # 3: lint findings only (1 would be a parse error)


# -------------------------------------------------------------- back-fill ---


def test_openmetrics_lines_have_window_timestamps_and_eof() -> None:
    results = [full_result(WINDOW_END + 10 * i, efficiency=0.40 - 0.005 * i) for i in range(3)]
    text = openmetrics_lines(list(reversed(results)))
    assert text.endswith("# EOF\n")
    lines = text.splitlines()
    eff = [ln for ln in lines if ln.startswith("twin_gross_efficiency_ratio{")]
    assert eff == [
        f'twin_gross_efficiency_ratio{{unit_id="demo-u1"}} {0.40 - 0.005 * i} {WINDOW_END + 10 * i}'
        for i in range(3)
    ]
    # one TYPE line per family even across results; counters end in _total
    types = [ln for ln in lines if ln.startswith("# TYPE ")]
    assert len(types) == len(set(types))
    assert "# TYPE twin_messages_received counter" in types
    assert any(ln.startswith("twin_messages_received_total{") for ln in lines)
    assert "twin_cycle_result_available" not in text
    untimed = openmetrics_lines(results[0], timestamp=False)
    assert 'twin_gross_efficiency_ratio{unit_id="demo-u1"} 0.4\n' in untimed


def test_openmetrics_lines_reject_duplicate_times() -> None:
    with pytest.raises(ValueError, match="distinct window_end"):
        openmetrics_lines([full_result(), full_result()])
    with pytest.raises(ValueError, match="no finite window_end"):
        openmetrics_lines(CycleResult("demo-u1", NAN, NAN))


@needs_promtool
def test_promtool_builds_tsdb_blocks_from_backfill(tmp_path: Path) -> None:
    results = [full_result(WINDOW_END + 10 * i, efficiency=0.40 - 0.005 * i) for i in range(6)]
    src = tmp_path / "backfill.om"
    src.write_text(openmetrics_lines(results))
    out = tmp_path / "blocks"
    proc = subprocess.run([PROMTOOL, "tsdb", "create-blocks-from", "openmetrics", str(src), str(out)],
                          capture_output=True, text=True)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    listing = subprocess.run([PROMTOOL, "tsdb", "list", str(out)], capture_output=True, text=True)
    assert listing.returncode == 0, listing.stderr
    rows = [ln.split() for ln in listing.stdout.splitlines()[1:] if ln.strip()]
    assert len(rows) == 1
    # columns: BLOCK ULID, MIN TIME, MAX TIME, DURATION, NUM SAMPLES, NUM CHUNKS, NUM SERIES, SIZE
    min_ms, max_ms = int(rows[0][1]), int(rows[0][2])
    assert min_ms == int(WINDOW_END * 1000)
    assert max_ms >= int((WINDOW_END + 50) * 1000)
