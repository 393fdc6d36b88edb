"""Tests of deploy/prometheus and deploy/grafana against twin's real exposition.

promtool checks and unit-tests the rules; a real Prometheus scrapes a
:class:`~twin.metrics.MetricsServer` and evaluates the recording rules; every
metric a rule or the dashboard names must exist in the exposition of a fully
populated hand-built result.
"""

from __future__ import annotations

import dataclasses
import json
import re
import shutil
import subprocess
from pathlib import Path

import pytest

from tests.test_metrics import full_result
from twin.metrics import Health, MetricsServer, SparkplugHealth, exposition
from twin.mqtt import CONNECT_FAILURE_REASONS
from twin.result import CycleResult, Estimate

# PyYAML arrives with amqtt (a runtime dependency); skip rather than fail without it.
yaml = pytest.importorskip("yaml", reason="PyYAML is needed to read the rule files")

PROMTOOL = shutil.which("promtool")
needs_promtool = pytest.mark.skipif(
    PROMTOOL is None, reason="promtool is not installed (apt-get install --no-install-recommends prometheus)"
)

DEPLOY = Path(__file__).resolve().parent.parent / "deploy"
PROM = DEPLOY / "prometheus"
RULE_FILES = sorted((PROM / "rules").glob("*.yml"))
RULE_TESTS = sorted((PROM / "tests").glob("*.test.yml"))
DASHBOARD = DEPLOY / "grafana" / "twin-dashboard.json"

# Every KPI key documented on CycleResult, keyed ones with one invented key each.
ALL_KPIS = (
    "gross_power", "net_power", "heat_input", "gross_efficiency", "net_efficiency",
    "turbine_heat_rate", "turbine_net_heat_rate", "plant_heat_rate", "net_plant_heat_rate", "load_fraction", "exhaust_quality_elep",
    "exhaust_quality_ueep", "exhaust_moisture_elep", "exhaust_moisture_ueep",
    "section_efficiency.hp", "heater_ttd.fwh7", "heater_dca.fwh7",
    "heater_temperature_rise.fwh7", "extraction_flow.fwh7", "condenser_pressure.main",
    "condenser_cleanliness.main", "condenser_itd.main", "condenser_ttd.main",
)
METRIC_RE = re.compile(r"(?<![\w:])twin_[a-z0-9_]+")
RULE_NAME_RE = re.compile(r"(?<![\w:])twin:[a-z0-9_:]+")


def populated_result() -> CycleResult:
    """The hand-built result with every documented KPI available and expected."""
    r = full_result()
    kpis = {k: Estimate(0.5, 0.01, True, soft_share=0.25) for k in ALL_KPIS}
    return dataclasses.replace(r, kpis=kpis, expected={k: 0.5 for k in ALL_KPIS})


def full_health() -> Health:
    """A live health snapshot with every family populated."""
    tags = {"HP-MS-P1": 1.7e9 - 3.0}
    return Health(unit_id="demo-u1", now=1.7e9, started=1.7e9 - 600.0, connected=True, reconnects=1,
                  failures_by_reason=dict.fromkeys(CONNECT_FAILURE_REASONS, 0) | {"unreachable": 2},
                  last_failure_reason="unreachable", last_failure_time=1.7e9 - 100.0,
                  last_message_time=1.7e9 - 0.5, messages=10, rejected={"too_old": 1},
                  tag_last_time=tags, overwritten=dict.fromkeys(tags, 0), samples_missing=dict.fromkeys(tags, 3),
                  sample_period=dict.fromkeys(tags, 1.0), cycle_period=10.0,
                  state_saved_time=1.7e9 - 30.0,
                  sparkplug=SparkplugHealth({"HP-MS-P1": False}, {"plant/edge1": True}, {"plant/edge1": 1},
                                            {"plant/edge1": 1}, {"plant/edge1": 0}, 2, 3))


def exported_names() -> set[str]:
    """Sample names in the exposition of the populated result and health plus the cycle histogram."""
    server = MetricsServer(populated_result, port=0, health=full_health)
    server.observe_cycle(0.1)
    text = exposition(server.registry).decode()
    return {ln.split("{")[0].split(" ")[0] for ln in text.splitlines() if ln and not ln.startswith("#")}


def rules() -> list[dict]:
    out = []
    for path in RULE_FILES:
        for group in yaml.safe_load(path.read_text())["groups"]:
            out.extend(group["rules"])
    return out


def recorded_names() -> set[str]:
    return {r["record"] for r in rules() if "record" in r}


def run(*args: str) -> subprocess.CompletedProcess[str]:
    assert PROMTOOL is not None
    return subprocess.run([PROMTOOL, *args], capture_output=True, text=True, cwd=PROM)


# ---------------------------------------------------------------- promtool ---


@needs_promtool
def test_example_config_and_rules_pass_promtool_check() -> None:
    proc = run("check", "config", "prometheus.yml")
    assert proc.returncode == 0, proc.stdout + proc.stderr
    proc = run("check", "rules", *map(str, RULE_FILES))
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert len(RULE_FILES) == 3


@needs_promtool
@pytest.mark.parametrize("test_file", RULE_TESTS, ids=lambda p: p.name)
def test_promtool_unit_tests_of_rules(test_file: Path) -> None:
    proc = run("test", "rules", str(test_file))
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert "SUCCESS" in proc.stdout


def test_rule_tests_cover_every_alert_and_recording_conversion() -> None:
    alerts = {r["alert"] for r in rules() if "alert" in r}
    tested_alerts: set[str] = set()
    tested_exprs: set[str] = set()
    for path in RULE_TESTS:
        for t in yaml.safe_load(path.read_text())["tests"]:
            tested_alerts |= {a["alertname"] for a in t.get("alert_rule_test", []) if a.get("exp_alerts")}
            tested_exprs |= {e["expr"] for e in t.get("promql_expr_test", [])}
    assert alerts - tested_alerts == set()  # every alert has a firing case
    assert {"twin:turbine_heat_rate:kj_per_kwh", "twin:turbine_heat_rate:btu_per_kwh"} <= tested_exprs


def test_alerts_carry_the_advisory_caution() -> None:
    alerts = [r for r in rules() if "alert" in r]
    assert len(alerts) >= 8
    for a in alerts:
        assert a["labels"]["advisory"] == "true", a["alert"]
        assert "Advisory only" in a["annotations"]["description"], a["alert"]
    for a in alerts:
        if "moisture" in a["alert"].lower():
            assert "common practice, not a manufacturer limit" in a["annotations"]["description"]


def test_heat_rate_conversion_factors() -> None:
    exprs = {r["record"]: r["expr"] for r in rules() if "record" in r}
    # 1 kWh = 3.6e6 J (SI); 1 Btu_IT = 1055.05585262 J (NIST SP 811, App. B.8)
    btu_per_kwh = 3.6e6 / 1055.05585262
    assert btu_per_kwh == pytest.approx(3412.1416, abs=5e-5)
    for name, expr in exprs.items():
        if name.endswith(":kj_per_kwh"):
            assert expr.endswith("* 3600"), name
        if name.endswith(":btu_per_kwh"):
            assert expr.endswith("* 3412.1416"), name


def test_rule_metrics_exist_in_exposition() -> None:
    names = exported_names()
    used: set[str] = set()
    for r in rules():
        used |= set(METRIC_RE.findall(r["expr"]))
        for ref in RULE_NAME_RE.findall(r["expr"]):
            assert ref in recorded_names(), ref
    assert used, "no twin_ metric referenced by the rules"
    assert used - names == set()


# --------------------------------------------------------------- dashboard ---


def dashboard_targets(dash: dict) -> list[tuple[str, str]]:
    out = []
    for p in dash["panels"]:
        for t in p.get("targets", []):
            out.append((p["title"], t["expr"]))
    return out


def test_dashboard_is_a_grafana_dashboard() -> None:
    dash = json.loads(DASHBOARD.read_text())
    for field in ("title", "uid", "schemaVersion", "panels", "templating"):
        assert field in dash, field
    ids = [p["id"] for p in dash["panels"]]
    assert len(ids) == len(set(ids))
    for p in dash["panels"]:
        g = p["gridPos"]
        assert g["x"] >= 0 and g["x"] + g["w"] <= 24 and g["h"] > 0, p["title"]
        if p["type"] not in ("row", "text"):
            assert p["targets"], p["title"]
            assert p["datasource"]["type"] == "prometheus"
    variables = {v["name"] for v in dash["templating"]["list"]}
    assert {"datasource", "unit_id"} <= variables
    assert "Advisory" in dash["description"]


def test_dashboard_queries_name_only_exported_or_recorded_metrics() -> None:
    dash = json.loads(DASHBOARD.read_text())
    names, recorded = exported_names(), recorded_names()
    unit_var = json.dumps(dash["templating"]["list"])
    bad = []
    for title, expr in dashboard_targets(dash):
        metrics = METRIC_RE.findall(expr)
        records = RULE_NAME_RE.findall(expr)
        assert metrics or records, title
        bad += [(title, m) for m in metrics if m not in names]
        bad += [(title, m) for m in records if m not in recorded]
        # fleet dashboards: every query is scoped to the selected unit
        assert 'unit_id="$unit_id"' in expr, title
    assert bad == []
    assert "twin_cycle_result_available" in unit_var


def test_dashboard_panels_cover_the_main_families() -> None:
    exprs = " ".join(e for _, e in dashboard_targets(json.loads(DASHBOARD.read_text())))
    for needed in ("twin_gross_efficiency_ratio", "twin:turbine_heat_rate:kj_per_kwh",
                   "twin:heat_rate_deviation_by_cause:kj_per_kwh", "twin_exhaust_moisture_ratio",
                   "twin_sensor_suspect", "twin_reconcile_status", "twin_alarm_state",
                   "twin_kpi_drift_alarm", "twin_cycle_duration_seconds_bucket"):
        assert needed in exprs, needed


# ------------------------------------------------------ real Prometheus e2e ---


@pytest.mark.prometheus
def test_prometheus_scrapes_twin_and_records_trade_units(prometheus_factory) -> None:
    result = full_result()
    with MetricsServer(lambda: result, port=0) as server:
        prom = prometheus_factory([f"127.0.0.1:{server.port}"], rule_files=tuple(RULE_FILES))
        # a fresh Prometheus stores its first sample after a few seconds: poll, bounded
        got = prom.wait_for_result("twin_gross_efficiency_ratio", timeout=30)
        assert len(got) == 1
        assert got[0]["metric"]["unit_id"] == "demo-u1"
        assert got[0]["metric"]["job"] == "twin"
        assert float(got[0]["value"][1]) == result.kpi("gross_efficiency")
        hr = prom.wait_for_result("twin:turbine_heat_rate:kj_per_kwh", timeout=30)
        # 1 kWh = 3600 kJ: heat rate 2.5 (η = 0.4) is 9000 kJ/kWh
        assert float(hr[0]["value"][1]) == pytest.approx(result.kpi("turbine_heat_rate") * 3600)
        by_cause = prom.wait_for_result("twin:heat_rate_deviation_by_cause:kj_per_kwh", timeout=30)
        assert {s["metric"]["cause"]: float(s["value"][1]) for s in by_cause} == pytest.approx(
            {c: v * 3600 for c, v in result.heat_rate_deviation_by_cause.items()}
        )
        # the unavailable KPI never reached the TSDB, its availability flag did
        assert prom.query('twin_section_efficiency_ratio{section="lp"}') == []
        avail = prom.query('twin_kpi_available{kpi="section_efficiency.lp"}')
        assert [float(s["value"][1]) for s in avail] == [0.0]
        # ELEP moisture 12.5 % ≥ 12 % (common practice): the alarm rule is at least pending
        alerts = prom.wait_for_result('ALERTS{alertname="TwinExhaustMoistureAlarm"}', timeout=30)
        assert alerts[0]["metric"]["alertstate"] in ("pending", "firing")
