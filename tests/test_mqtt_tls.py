"""MqttClient against a TLS + password-file Mosquitto (real broker, certificates from openssl)."""

from __future__ import annotations

import threading

import pytest

from twin.mqtt import MqttClient, MqttError, MqttSettings

pytestmark = pytest.mark.broker

USERS = {"twin": "correct horse", "other": "battery staple"}


@pytest.fixture
def secure_broker(mosquitto_factory):
    return mosquitto_factory(users=USERS, tls=True)


def _client(broker, on_message=None, **kw) -> MqttClient:
    kw.setdefault("tls_ca", str(broker.tls.ca))
    kw.setdefault("username", "twin")
    kw.setdefault("password", USERS["twin"])
    settings = MqttSettings(
        host=broker.host, port=broker.port, reconnect_min_delay=0.1, reconnect_max_delay=0.5, **kw
    )
    return MqttClient(settings, on_message or (lambda *a: None))


@pytest.mark.parametrize("protocol", ["3.1.1", "5"])
def test_connects_with_right_credentials_and_ca(secure_broker, wait_for, protocol):
    got: list[bytes] = []
    lock = threading.Lock()

    def on_message(topic, payload, now):
        with lock:
            got.append(payload)

    sub = _client(secure_broker, on_message, protocol=protocol)
    pub = _client(secure_broker, protocol=protocol, username="other", password=USERS["other"])
    sub.subscribe(["secure/t"])
    sub.start()
    pub.start()
    try:
        assert sub.wait_connected(10), sub.last_error
        assert pub.wait_connected(10), pub.last_error
        assert wait_for(lambda: pub.publish("secure/t", b"42") and got, step=0.2)
        assert got[0] == b"42"
        assert sub.stats().connect_failures == 0
    finally:
        sub.stop()
        pub.stop()


@pytest.mark.parametrize("protocol", ["3.1.1", "5"])
def test_wrong_password_gives_clear_error(secure_broker, wait_for, protocol):
    c = _client(secure_broker, protocol=protocol, password="wrong")
    c.start()
    try:
        assert wait_for(lambda: c.stats().connect_failures > 0)
        assert not c.connected
        msg = c.last_error or ""
        assert f"{secure_broker.host}:{secure_broker.port}" in msg
        assert "refused the connection" in msg
        assert "check the username and password" in msg
    finally:
        c.stop()


def test_untrusted_ca_gives_clear_tls_error(secure_broker, wait_for):
    c = _client(secure_broker, tls_ca=str(secure_broker.tls.other_ca))
    c.start()
    try:
        assert wait_for(lambda: c.stats().connect_failures > 0)
        assert not c.connected
        msg = c.last_error or ""
        assert f"TLS handshake with MQTT broker {secure_broker.host}:{secure_broker.port}" in msg
        assert "certificate verify failed" in msg.lower()
    finally:
        c.stop()


def test_plain_client_against_tls_listener_fails_cleanly(secure_broker, wait_for):
    c = _client(secure_broker, tls_ca=None)  # no TLS at all
    c.start()
    try:
        assert wait_for(lambda: c.stats().connect_failures > 0 or c.stats().disconnects > 0)
        assert not c.connected
        assert c.last_error
    finally:
        c.stop()


def test_missing_ca_file_is_a_setup_error(tmp_path):
    with pytest.raises(MqttError, match=r"TLS set-up for 127\.0\.0\.1:8883 failed"):
        MqttClient(MqttSettings(port=8883, tls_ca=str(tmp_path / "nope.crt")), lambda *a: None)
