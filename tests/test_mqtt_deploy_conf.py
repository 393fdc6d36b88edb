"""deploy/mosquitto/twin.conf: a real Mosquitto accepts it, and the twin client connects."""

from __future__ import annotations

import re
import socket
import subprocess
from pathlib import Path

import pytest

from twin.mqtt import MqttClient, MqttSettings

pytestmark = pytest.mark.broker

CONF = Path(__file__).resolve().parents[1] / "deploy" / "mosquitto" / "twin.conf"


def _setting(text: str, name: str) -> str:
    m = re.search(rf"^{name}\s+(\S+)", text, re.MULTILINE)
    assert m, name
    return m.group(1)


def test_queue_sizing_is_deliberate():
    text = CONF.read_text()
    # Mosquitto's documented default max_queued_messages is 1000 (mosquitto.conf(5))
    assert int(_setting(text, "max_queued_messages")) > 1000
    assert int(_setting(text, "max_queued_bytes")) > 0
    assert int(_setting(text, "max_inflight_messages")) > 20  # mosquitto.conf(5) default: 20
    assert _setting(text, "allow_anonymous") == "false"


def test_broker_starts_from_shipped_config(mosquitto_factory, tls_files, tmp_path, wait_for):
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        tls_port = s.getsockname()[1]
    passwd = tmp_path / "passwd"
    subprocess.run(["mosquitto_passwd", "-b", "-c", str(passwd), "twin", "pw"], check=True)
    text = CONF.read_text()
    # only deployment-specific paths and ports change; every sizing line stays as shipped
    for old, new in {
        "listener 1883 127.0.0.1": "listener {port} 127.0.0.1",
        "listener 8883": f"listener {tls_port} 127.0.0.1",
        "/etc/mosquitto/certs/ca.crt": str(tls_files.ca),
        "/etc/mosquitto/certs/server.crt": str(tls_files.server_cert),
        "/etc/mosquitto/certs/server.key": str(tls_files.server_key),
        "/etc/mosquitto/passwd": str(passwd),
        "/etc/mosquitto/twin.acl": str(CONF.with_name("twin.acl")),
        "/var/lib/mosquitto/": f"{tmp_path}/",
        "log_dest syslog": "log_dest stdout",
    }.items():
        assert old in text, old
        text = text.replace(old, new)
    broker = mosquitto_factory(config=text)
    assert wait_for(lambda: _accepts(tls_port))
    plain = MqttClient(
        MqttSettings(port=broker.port, username="twin", password="pw"), lambda *a: None
    )
    secure = MqttClient(
        MqttSettings(port=tls_port, username="twin", password="pw", tls_ca=str(tls_files.ca)),
        lambda *a: None,
    )
    for c in (plain, secure):
        c.start()
    try:
        assert plain.wait_connected(10), plain.last_error
        assert secure.wait_connected(10), secure.last_error
    finally:
        plain.stop()
        secure.stop()


def _accepts(port: int) -> bool:
    try:
        socket.create_connection(("127.0.0.1", port), timeout=0.2).close()
        return True
    except OSError:
        return False
