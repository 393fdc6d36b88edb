"""Connection health made loud: state-change events, log lines and metrics (real Mosquitto).

Every failure case runs against a real broker started by the test: a wrong
password, a CA that signed nothing, an expired server certificate (made here
with the ``cryptography`` package, signed by the test CA), a closed port, and a
broker killed and restarted. The events are checked for their order and
reason; the daemon's log lines and ``/metrics`` for the same facts.
"""

from __future__ import annotations

import datetime as dt
import ipaddress
import logging
import re
import threading
import time
from pathlib import Path
from typing import Any

import pytest

from tests.conftest import free_port, wait_for
from tests.test_daemon_broker import _tls_config
from tests.test_daemon_e2e import T0, scrape, start_daemon
from twin.mqtt import CONNECT_FAILURE_REASONS, ConnectionEvent, MqttClient, MqttSettings

pytestmark = pytest.mark.broker

USERS = {"twin": "s3cret-pw"}


class Events:
    """Collects a client's connection events (network thread) for the test thread."""

    def __init__(self) -> None:
        self.items: list[ConnectionEvent] = []
        self._lock = threading.Lock()

    def __call__(self, ev: ConnectionEvent) -> None:
        with self._lock:
            self.items.append(ev)

    def states(self) -> list[tuple[str, str]]:
        with self._lock:
            return [(e.state, e.reason) for e in self.items]


def _client(port: int, events: Events, **kw: Any) -> MqttClient:
    settings = MqttSettings(host="127.0.0.1", port=port, reconnect_min_delay=0.1, reconnect_max_delay=0.3, **kw)
    return MqttClient(settings, lambda *a: None, on_event=events)


@pytest.fixture
def tls_broker(mosquitto_factory: Any) -> Any:
    return mosquitto_factory(users=USERS, tls=True)


def _expired_server_cert(tls: Any, d: Path) -> tuple[Path, Path]:
    """A server certificate for 127.0.0.1 signed by the test CA that expired yesterday."""
    from cryptography import x509
    from cryptography.hazmat.primitives import hashes, serialization
    from cryptography.hazmat.primitives.asymmetric import ec
    from cryptography.x509.oid import NameOID

    ca_key = serialization.load_pem_private_key(tls.ca.with_suffix(".key").read_bytes(), None)
    ca_cert = x509.load_pem_x509_certificate(tls.ca.read_bytes())
    key = ec.generate_private_key(ec.SECP256R1())
    now = dt.datetime.now(dt.UTC)
    cert = (
        x509.CertificateBuilder()
        .subject_name(x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, "127.0.0.1")]))
        .issuer_name(ca_cert.subject)
        .public_key(key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(now - dt.timedelta(days=3))
        .not_valid_after(now - dt.timedelta(days=1))
        .add_extension(x509.SubjectAlternativeName([x509.IPAddress(ipaddress.ip_address("127.0.0.1"))]), False)
        .sign(ca_key, hashes.SHA256())  # type: ignore[arg-type]
    )
    crt, k = d / "expired.crt", d / "expired.key"
    crt.write_bytes(cert.public_bytes(serialization.Encoding.PEM))
    k.write_bytes(key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8,
                                    serialization.NoEncryption()))
    return crt, k


def _wait_reason(events: Events, reason: str) -> None:
    assert wait_for(lambda: ("failed", reason) in events.states(), timeout=10), events.states()


@pytest.mark.parametrize("protocol", ["3.1.1", "5"])
def test_wrong_password_is_one_failed_event_with_a_bounded_reason(tls_broker: Any, protocol: str) -> None:
    events = Events()
    c = _client(tls_broker.port, events, tls_ca=str(tls_broker.tls.ca), username="twin", password="wrong",
                protocol=protocol)
    c.start()
    try:
        assert wait_for(lambda: c.stats().connect_failures >= 3)  # it keeps retrying...
        states = events.states()
        assert states[0] == ("connecting", "")
        reasons = {r for s, r in states if s == "failed"}
        assert reasons <= {"bad_credentials", "not_authorized"} and len(reasons) == 1
        assert len(states) == 2  # ...but reports the state change once
        st = c.stats()
        assert st.last_failure_reason in reasons and sum(st.failures_by_reason.values()) == st.connect_failures
        assert "check the username and password" in events.items[1].detail
    finally:
        c.stop()


def test_untrusted_ca_and_expired_certificate_name_the_verification_error(
        tls_broker: Any, mosquitto_factory: Any, tmp_path: Path) -> None:
    events = Events()
    c = _client(tls_broker.port, events, tls_ca=str(tls_broker.tls.other_ca), username="twin",
                password=USERS["twin"])
    c.start()
    try:
        _wait_reason(events, "tls_verify_failed")
        detail = events.items[-1].detail
        assert "certificate verify failed" in detail and str(tls_broker.tls.other_ca) in detail
    finally:
        c.stop()
    crt, key = _expired_server_cert(tls_broker.tls, tmp_path)
    expired = mosquitto_factory(config=f"listener {{port}} 127.0.0.1\nallow_anonymous true\n"
                                f"cafile {tls_broker.tls.ca}\ncertfile {crt}\nkeyfile {key}\n")
    events = Events()
    c = _client(expired.port, events, tls_ca=str(tls_broker.tls.ca))
    c.start()
    try:
        _wait_reason(events, "tls_verify_failed")
        assert "certificate has expired" in events.items[-1].detail
    finally:
        c.stop()


def test_closed_port_is_unreachable_and_a_tls_client_on_plain_mqtt_is_a_tls_error(mosquitto: Any) -> None:
    events = Events()
    c = _client(free_port(), events)
    c.start()
    try:
        _wait_reason(events, "unreachable")
        assert "Connection refused" in events.items[-1].detail
    finally:
        c.stop()
    events = Events()
    c = _client(mosquitto.port, events, tls=True)  # TLS client, plain listener
    c.start()
    try:
        assert wait_for(lambda: any(s == "failed" for s, _ in events.states()), timeout=10)
        assert {r for s, r in events.states() if s == "failed"} <= {"tls_error", "closed_before_connack"}
    finally:
        c.stop()
    assert set(CONNECT_FAILURE_REASONS) >= {r for _, r in events.states() if r}


def test_broker_kill_and_restart_ten_times_reconnects_within_the_backoff_cap(mosquitto: Any) -> None:
    """Lost → connected after each of 10 kill -9 restarts; the delays are measured and printed.

    The production default cap of the reconnect backoff (2 s) is used; the
    check is on the event order and count, the times are reported.
    """
    events = Events()
    got: list[float] = []
    c = MqttClient(MqttSettings(host=mosquitto.host, port=mosquitto.port), lambda t, p, now: got.append(now),
                   on_event=events)
    c.subscribe(["ops/restart"])
    pub = MqttClient(MqttSettings(host=mosquitto.host, port=mosquitto.port, client_id="ops-pub",
                                  reconnect_min_delay=0.05, reconnect_max_delay=0.1), lambda *a: None)
    c.start()
    pub.start()
    delays = []
    try:
        assert c.wait_connected(10) and pub.wait_connected(10)
        for _ in range(10):
            mosquitto.stop(kill=True)
            assert wait_for(lambda: not c.connected, timeout=10)
            time.sleep(0.5)
            mosquitto.start()
            back = time.time()
            n = len(got)
            assert wait_for(lambda n=n: pub.publish("ops/restart", b"1", qos=0) and len(got) > n,
                            timeout=15, step=0.05)
            delays.append(got[n] - back)
        states = [s for s, _ in events.states()]
        assert states[:2] == ["connecting", "connected"]
        assert states[2:].count("lost") == 10 and states[2:].count("connected") == 10
        # every loss is followed by a connection before the next loss
        assert re.fullmatch(r"(L(F)?C)+", "".join({"lost": "L", "failed": "F", "connected": "C"}[s]
                                                    for s in states[2:])), states
        print(f"data again after broker restart [s]: max {max(delays):.2f}, all {[round(d, 2) for d in delays]}")
    finally:
        c.stop()
        pub.stop()


@pytest.mark.parametrize(("password", "ca", "reason", "expired"), [
    ("wrong-pw", "ca", "bad_credentials|not_authorized", False),
    ("s3cret-pw", "other_ca", "tls_verify_failed", False),
    ("s3cret-pw", "ca", "tls_verify_failed", True),  # the broker's certificate expired yesterday
], ids=["wrong-password", "untrusted-ca", "expired-certificate"])
def test_daemon_logs_the_refusal_once_and_exports_it(tmp_path: Path, mosquitto_factory: Any, tls_files: Any,
                                                     password: str, ca: str, reason: str, expired: bool,
                                                     caplog: pytest.LogCaptureFixture) -> None:
    if expired:
        crt, key = _expired_server_cert(tls_files, tmp_path)
        broker = mosquitto_factory(config=f"listener {{port}} 127.0.0.1\nallow_anonymous true\n"
                                   f"cafile {tls_files.ca}\ncertfile {crt}\nkeyfile {key}\n")
        broker.tls = tls_files
    else:
        broker = mosquitto_factory(users={"twin": "s3cret-pw"}, tls=True)
    config = _tls_config(tmp_path, broker, getattr(broker.tls, ca), password)
    with caplog.at_level(logging.INFO, logger="twin.daemon"):
        daemon = start_daemon(config, connected=False)
        try:
            assert daemon.mqtt is not None
            mqtt = daemon.mqtt
            assert wait_for(lambda: mqtt.stats().connect_failures >= 2)
            daemon.run_cycle(T0 + 10.0)
            m = scrape(daemon)
        finally:
            daemon.stop()
    lines = [r.getMessage() for r in caplog.records]
    assert any(ln.startswith("event=mqtt_connecting ") for ln in lines)
    failed = [ln for ln in lines if ln.startswith("event=mqtt_connect_failed ")]
    assert len(failed) == 1 and re.search(rf"reason=({reason}) ", failed[0]), failed
    if expired:
        assert "certificate has expired" in failed[0]
    assert m.get("twin_mqtt_connected") == 0.0
    exported = {dict(ls)["reason"]: v for (n, ls), v in m.samples.items() if n == "twin_mqtt_connect_failures_total"}
    assert set(exported) == set(CONNECT_FAILURE_REASONS)
    assert sum(exported.values()) >= 2 and any(re.fullmatch(reason, r) and v >= 2 for r, v in exported.items())
    last = [dict(ls)["reason"] for (n, ls), _ in m.samples.items()
            if n == "twin_mqtt_last_connect_failure_timestamp_seconds"]
    assert len(last) == 1 and re.fullmatch(reason, last[0])
