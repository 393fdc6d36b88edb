"""A real Prometheus scrapes the live daemon; promtool lints the daemon's exposition."""

from __future__ import annotations

import re
import shutil
import subprocess
from typing import Any

import pytest

from tests.test_daemon_e2e import (
    T0,
    PlantFeed,
    broker_settings,
    demo_config,
    plant_truth,
    scrape,
    start_daemon,
)

pytestmark = [pytest.mark.broker, pytest.mark.prometheus]

PROMTOOL = shutil.which("promtool")


@pytest.fixture
def running_daemon(mosquitto: Any) -> Any:
    """A daemon with three closed windows of the simulated plant at full load."""
    config = demo_config()
    settings = broker_settings(config, mosquitto)
    daemon = start_daemon(config, settings)
    feed = PlantFeed(daemon, settings)
    for k in range(3):
        r = feed.cycle(T0 + 10.0 * (k + 1), plant_truth().sensors)
    assert r.reconcile_status == "converged", r.reconcile_message
    yield daemon
    feed.stop()
    daemon.stop()


def test_prometheus_scrapes_the_daemon_and_answers_kpi_queries(running_daemon: Any, prometheus_factory: Any) -> None:
    daemon = running_daemon
    result = daemon.current()
    prom = prometheus_factory([f"127.0.0.1:{daemon.metrics.port}"])
    up = prom.wait_for_result('up{job="twin"} == 1')
    assert len(up) == 1
    eff = prom.wait_for_result('twin_gross_efficiency_ratio{job="twin",unit_id="demo-u1"}')
    assert len(eff) == 1
    # Prometheus returns the float it scraped; the exposition writes it with full precision
    assert float(eff[0]["value"][1]) == pytest.approx(result.kpis["gross_efficiency"].value, rel=1e-12)
    # heat rate in kJ/kWh as the deploy recording rules compute it (x3600)
    hr = prom.wait_for_result('twin_turbine_heat_rate_ratio{job="twin"} * 3600')
    assert float(hr[0]["value"][1]) == pytest.approx(3600 * result.kpis["turbine_heat_rate"].value, rel=1e-12)
    hp = prom.wait_for_result('twin_section_efficiency_ratio{job="twin",section="HP"}')
    assert float(hp[0]["value"][1]) == pytest.approx(result.kpis["section_efficiency.HP"].value, rel=1e-12)
    cycles = prom.wait_for_result('twin_cycle_duration_seconds_count{job="twin"}')
    assert float(cycles[0]["value"][1]) == 3.0


@pytest.mark.skipif(PROMTOOL is None, reason="promtool is not installed (apt-get install --no-install-recommends prometheus)")
def test_promtool_accepts_the_live_exposition(running_daemon: Any) -> None:
    text = scrape(running_daemon).text
    assert "twin_gross_efficiency_ratio" in text and "twin_alarm_state" in text
    proc = subprocess.run([PROMTOOL, "check", "metrics"], input=text, capture_output=True, text=True)
    # As in tests/test_metrics.py: promtool's lint wants grams as the mass base unit, twin
    # follows SI (kilograms, DESIGN.md); every *_kilograms_per_second family draws exactly
    # this message and nothing else may appear.
    lint = re.compile(r'^(twin_\w+_kilograms_per_second) use base unit "grams" instead of "kilograms"$')
    problems = [ln for ln in (proc.stdout + proc.stderr).splitlines() if ln.strip()]
    assert [ln for ln in problems if not lint.match(ln)] == []
    flagged = {m.group(1) for ln in problems if (m := lint.match(ln))}
    assert flagged == set(re.findall(r"^# TYPE (twin_\w+_kilograms_per_second) ", text, re.M))
    assert proc.returncode in (0, 3)  # 3: lint findings only (1 would be a parse error)


def test_kpi_availability_stays_in_every_scrape_and_reads_zero_after_a_failed_window(
        running_daemon: Any, prometheus_factory: Any) -> None:
    daemon = running_daemon
    n_kpis = len(daemon.cycle.kpi_names)
    prom = prometheus_factory([f"127.0.0.1:{daemon.metrics.port}"])
    ok = prom.wait_for_result('count(twin_kpi_available{job="twin"} == 1)')
    assert int(float(ok[0]["value"][1])) == sum(e.available for e in daemon.current().kpis.values())
    # a window far past the last reading: every tag stale, nothing to reconcile
    failed = daemon.run_cycle(T0 + 10.0 * 3 + 3600.0)
    assert failed.reconcile_status == "insufficient_data"
    # the alert expression `twin_kpi_available == 0` must see every KPI, not an empty set
    zero = prom.wait_for_result(f'count(twin_kpi_available{{job="twin"}} == 0) == {n_kpis}')
    assert int(float(zero[0]["value"][1])) == n_kpis
    # ... while the value itself is gone (no stale number): Prometheus marks the series stale
    prom.wait_for_result('absent(twin_gross_efficiency_ratio{job="twin"})')
