"""The live daemon and its broker: a crash and restart of Mosquitto, TLS with a password file.

Real Mosquitto processes started by the tests (``mosquitto_factory``); the
daemon runs on a clock the test moves (see ``tests/test_daemon_e2e.py``).
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any

import pytest

from tests.conftest import wait_for
from tests.test_daemon_e2e import (
    T0,
    PlantFeed,
    broker_settings,
    demo_config,
    demo_config_text,
    plant_truth,
    scrape,
    start_daemon,
)
from twin.config import load_config

pytestmark = pytest.mark.broker


def test_daemon_reconnects_after_broker_crash_and_reports_the_gap_as_stale(mosquitto: Any) -> None:
    config = demo_config()
    settings = broker_settings(config, mosquitto)  # the daemon keeps its production reconnect delays
    daemon = start_daemon(config, settings)
    feed = PlantFeed(daemon, settings)
    truth = plant_truth()
    try:
        t = T0
        for _ in range(3):
            t += 10.0
            r = feed.cycle(t, truth.sensors)
        assert r.reconcile_status == "converged" and r.inputs.stale_tags == ()
        assert daemon.mqtt is not None
        mqtt = daemon.mqtt
        # crash: SIGKILL, no DISCONNECT, no will; the plant's readings stop reaching anyone
        mosquitto.stop(kill=True)
        assert wait_for(lambda: not mqtt.connected)
        max_age = max(s.max_age for s in config.sensors)
        gap = []
        while t < T0 + 30.0 + max_age + 20.0:  # past the sensors' maximum age (30 s)
            t += 10.0
            feed.clock.t = t
            gap.append(daemon.run_cycle(t))  # must not raise with no data and no broker
        last = gap[-1]
        # the gap shows: no sensor enters the reconciliation, the connection gauge is 0
        assert last.reconcile_status == "insufficient_data"
        assert not last.inputs.connected
        assert not any(tr.valid for tr in last.tags.values())
        m = scrape(daemon)
        assert m.get("twin_mqtt_connected") == 0.0
        assert m.get("twin_sensor_valid", tag="FW-F1") == 0.0
        excluded = {dict(ls)["reason"] for (n, ls), v in m.samples.items()
                    if n == "twin_sensor_excluded" and v == 1.0}
        # "stale" is what the gap should say; the daemon says "no_data" once the window is
        # empty (see test_readings_that_stop_are_reported_stale below)
        assert excluded <= {"stale", "no_data"} and excluded
        # restart on the same port; the daemon reconnects on its own and resubscribes
        t_restart = time.monotonic()
        mosquitto.restart()
        assert wait_for(lambda: mqtt.connected, timeout=10.0), mqtt.last_error
        reconnect_s = time.monotonic() - t_restart
        # messages flow again: probe until one reading arrives (the subscription is renewed
        # right after the CONNACK, so the first publications may come before it)
        assert feed.client.wait_connected(10)
        probe = feed.messages(t, truth.sensors)[:1]

        def delivered() -> bool:
            before = daemon.ingestor.messages
            feed.client.publish(*probe[0], qos=1)
            return wait_for(lambda: daemon.ingestor.messages > before, timeout=0.2)

        assert wait_for(delivered, timeout=10.0, step=0.0)
        resume_s = time.monotonic() - t_restart
        for _ in range(3):
            t += 10.0
            r = feed.cycle(t, truth.sensors)
        assert r.reconcile_status == "converged", r.reconcile_message
        assert r.inputs.stale_tags == () and r.inputs.connected
        m = scrape(daemon)
        assert m.get("twin_mqtt_connected") == 1.0
        assert m.get("twin_stale_tags") == 0.0
        assert m.get("twin_mqtt_reconnects_total") == 1.0
        assert all(tr.valid for tr in r.tags.values())
        assert mqtt.stats().callback_errors == 0
        print(f"reconnected {reconnect_s:.2f} s and resumed {resume_s:.2f} s after the broker restart")
    finally:
        feed.stop()
        daemon.stop()


@pytest.fixture
def tls_broker(mosquitto_factory: Any) -> Any:
    return mosquitto_factory(users={"twin": "s3cret-pw"}, tls=True)


def _tls_config(tmp_path: Path, broker: Any, ca: Path, password: str) -> Any:
    secret = tmp_path / f"broker-password-{password}"
    secret.write_text(password + "\n", encoding="utf-8")
    text = demo_config_text(broker=f"""
host = "127.0.0.1"
port = {broker.port}
client_id = "twin-demo-u1"
tls = {{ ca_file = "{ca}" }}
username = "twin"
password_file = "{secret}"
qos = 1
""")
    path = tmp_path / f"tls-{password}.toml"
    path.write_text(text, encoding="utf-8")
    config = load_config(path)
    config.metrics.port = 0  # any free port (the schema takes 1..65535 only)
    return config


def test_daemon_connects_over_tls_with_a_password_file(tmp_path: Path, tls_broker: Any) -> None:
    config = _tls_config(tmp_path, tls_broker, tls_broker.tls.ca, "s3cret-pw")
    daemon = start_daemon(config)  # broker settings, CA and password all from the config
    assert daemon.mqtt_settings.tls and daemon.mqtt_settings.password == "s3cret-pw"
    feed = PlantFeed(daemon, daemon.mqtt_settings)
    try:
        truth = plant_truth()
        r = None
        for k in range(3):
            r = feed.cycle(T0 + 10.0 * (k + 1), truth.sensors)
        assert r is not None and r.reconcile_status == "converged", r.reconcile_message
        assert scrape(daemon).get("twin_mqtt_connected") == 1.0
    finally:
        feed.stop()
        daemon.stop()


@pytest.mark.parametrize(("password", "ca", "message"), [
    ("wrong-pw", "ca", "check the username and password"),
    ("s3cret-pw", "other_ca", "TLS handshake"),
])
def test_daemon_reports_a_refused_connection_and_keeps_running(
    tmp_path: Path, tls_broker: Any, password: str, ca: str, message: str
) -> None:
    config = _tls_config(tmp_path, tls_broker, getattr(tls_broker.tls, ca), password)
    daemon = start_daemon(config, connected=False)
    try:
        assert daemon.mqtt is not None
        mqtt = daemon.mqtt
        assert wait_for(lambda: mqtt.last_error is not None and message in mqtt.last_error), mqtt.last_error
        assert not mqtt.connected
        r = daemon.run_cycle(T0 + 10.0)  # no data, no broker: a result, not an exception
        assert r.reconcile_status == "insufficient_data" and not r.inputs.connected
        m = scrape(daemon)
        assert m.get("twin_mqtt_connected") == 0.0
        assert m.get("twin_cycle_result_available") == 1.0
        print(f"last_error: {mqtt.last_error}")
    finally:
        daemon.stop()


def test_readings_that_stop_are_reported_stale(mosquitto: Any) -> None:
    config = demo_config()
    settings = broker_settings(config, mosquitto)
    daemon = start_daemon(config, settings)
    feed = PlantFeed(daemon, settings)
    try:
        t = T0
        for _ in range(3):
            t += 10.0
            feed.cycle(t, plant_truth().sensors)
        max_age = max(s.max_age for s in config.sensors)
        states = []
        while t < T0 + 30.0 + max_age + 20.0:  # readings stop; the clock runs on
            t += 10.0
            feed.clock.t = t
            r = daemon.run_cycle(t)
            states.append((t - (T0 + 25.0), len(r.inputs.stale_tags)))
        # every window whose newest reading is older than max_age reports the tags stale
        assert all(n == len(config.sensors) for age, n in states if age > max_age), states
        assert scrape(daemon).get("twin_stale_tags") == len(config.sensors)
    finally:
        feed.stop()
        daemon.stop()
