"""Safe to expose: metrics over TLS with client certificates (a real Prometheus scrapes them),
start-up warnings, and the shipped Mosquitto ACL enforced by a real broker."""

from __future__ import annotations

import datetime as dt
import ipaddress
import ssl
import subprocess
import threading
import time
import urllib.error
import urllib.request
from pathlib import Path
from typing import Any

import pytest

from tests.conftest import wait_for
from tests.test_daemon_e2e import demo_config
from tests.test_metrics import full_result
from twin.daemon import exposure_warnings, mqtt_settings_from_config
from twin.metrics import MetricsServer, MetricsTls
from twin.mqtt import MqttClient, MqttSettings

DEPLOY = Path(__file__).resolve().parent.parent / "deploy" / "mosquitto"


def _client_cert(tls: Any, d: Path, cn: str = "prometheus") -> tuple[Path, Path]:
    """A client certificate (clientAuth) signed by the test CA."""
    from cryptography import x509
    from cryptography.hazmat.primitives import hashes, serialization
    from cryptography.hazmat.primitives.asymmetric import ec
    from cryptography.x509.oid import ExtendedKeyUsageOID, NameOID

    ca_key = serialization.load_pem_private_key(tls.ca.with_suffix(".key").read_bytes(), None)
    ca_cert = x509.load_pem_x509_certificate(tls.ca.read_bytes())
    key = ec.generate_private_key(ec.SECP256R1())
    now = dt.datetime.now(dt.UTC)
    cert = (
        x509.CertificateBuilder()
        .subject_name(x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, cn)]))
        .issuer_name(ca_cert.subject)
        .public_key(key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(now - dt.timedelta(hours=1))
        .not_valid_after(now + dt.timedelta(days=1))
        .add_extension(x509.ExtendedKeyUsage([ExtendedKeyUsageOID.CLIENT_AUTH]), False)
        .add_extension(x509.SubjectAlternativeName([x509.IPAddress(ipaddress.ip_address("127.0.0.1"))]), False)
        .sign(ca_key, hashes.SHA256())  # type: ignore[arg-type]
    )
    crt, k = d / f"{cn}.crt", d / f"{cn}.key"
    crt.write_bytes(cert.public_bytes(serialization.Encoding.PEM))
    k.write_bytes(key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8,
                                    serialization.NoEncryption()))
    return crt, k


def _get(url: str, ctx: ssl.SSLContext | None = None) -> int:
    with urllib.request.urlopen(url, timeout=5, context=ctx) as resp:
        return int(resp.status)


@pytest.mark.prometheus
def test_prometheus_scrapes_metrics_over_tls_with_a_client_certificate(
        prometheus_factory: Any, tls_files: Any, tmp_path: Path) -> None:
    crt, key = _client_cert(tls_files, tmp_path)
    result = full_result()
    server = MetricsServer(lambda: result, port=0,
                           tls=MetricsTls(str(tls_files.server_cert), str(tls_files.server_key), str(tls_files.ca)))
    with server:
        url = f"https://127.0.0.1:{server.port}/metrics"
        ctx = ssl.create_default_context(cafile=str(tls_files.ca))
        ctx.load_cert_chain(str(crt), str(key))
        assert _get(url, ctx) == 200
        # without a client certificate, or in plain HTTP, nothing is served
        with pytest.raises((ssl.SSLError, urllib.error.URLError, ConnectionError)):
            _get(url, ssl.create_default_context(cafile=str(tls_files.ca)))
        with pytest.raises((urllib.error.URLError, ConnectionError, OSError)):
            _get(f"http://127.0.0.1:{server.port}/metrics")
        prom = prometheus_factory([f"127.0.0.1:{server.port}"], job={
            "scheme": "https",
            "tls_config": {"ca_file": str(tls_files.ca), "cert_file": str(crt), "key_file": str(key)},
        })
        got = prom.wait_for_result("twin_gross_efficiency_ratio", timeout=30)
        assert float(got[0]["value"][1]) == result.kpi("gross_efficiency")
        up = prom.query('up{job="twin"}')
        assert [float(s["value"][1]) for s in up] == [1.0]


def test_start_up_warns_about_plain_exposure(tmp_path: Path) -> None:
    config = demo_config()
    settings = mqtt_settings_from_config(config, {})
    assert exposure_warnings(config, settings) == []  # loopback metrics, no password
    config.metrics.address = "0.0.0.0"
    from dataclasses import replace

    plain_pw = replace(settings, username="twin", password="pw")
    warnings = exposure_warnings(config, plain_pw)
    assert len(warnings) == 2
    assert "beyond loopback without TLS" in warnings[0] and "travels without TLS" in warnings[1]
    assert exposure_warnings(config, replace(plain_pw, tls=True)) == warnings[:1]


# ------------------------------------------------------------------ the ACL ---

PASSWORDS = {"twin": "pw-twin", "gateway": "pw-gw", "twin-reader": "pw-rd", "auditor": "pw-au"}


@pytest.fixture
def acl_broker(mosquitto_factory: Any, tmp_path: Path) -> Any:
    """Mosquitto with the shipped ACL plus an auditor account that reads everything it is allowed to see."""
    passwd = tmp_path / "passwd"
    for i, (user, pw) in enumerate(PASSWORDS.items()):
        subprocess.run(["mosquitto_passwd", "-b", *(["-c"] if i == 0 else []), str(passwd), user, pw],
                       check=True, capture_output=True)
    acl = tmp_path / "twin.acl"
    acl.write_text((DEPLOY / "twin.acl").read_text() + "\n# test only\nuser auditor\ntopic read #\n")
    return mosquitto_factory(config=f"listener {{port}} 127.0.0.1\nallow_anonymous false\n"
                             f"password_file {passwd}\nacl_file {acl}\npersistence false\n")


class Sub:
    def __init__(self, broker: Any, user: str, topics: list[str]) -> None:
        self.got: list[tuple[str, bytes]] = []
        self._lock = threading.Lock()
        self.c = MqttClient(MqttSettings(host=broker.host, port=broker.port, client_id=f"acl-{user}",
                                         username=user, password=PASSWORDS[user]), self._on)
        self.c.subscribe(topics)
        self.c.start()
        assert self.c.wait_connected(10), self.c.last_error

    def _on(self, topic: str, payload: bytes, now: float) -> None:
        with self._lock:
            self.got.append((topic, payload))

    def topics(self) -> set[str]:
        with self._lock:
            return {t for t, _ in self.got}


@pytest.mark.broker
def test_shipped_acl_lets_twin_read_sensors_and_write_only_its_prefix(acl_broker: Any) -> None:
    auditor = Sub(acl_broker, "auditor", ["#"])
    twin = Sub(acl_broker, "twin", ["plant/demo-u1/#", "other/#", "twin/demo-u1/#"])
    gateway = Sub(acl_broker, "gateway", [])
    reader = Sub(acl_broker, "twin-reader", ["twin/demo-u1/#", "plant/demo-u1/#"])
    time.sleep(0.5)  # let the subscriptions settle
    try:
        for c, topic in ((gateway.c, "plant/demo-u1/hp/p"), (gateway.c, "other/x"), (twin.c, "twin/demo-u1/kpi/x"),
                         (twin.c, "plant/demo-u1/hp/p-forged"), (twin.c, "other/from-twin"),
                         (reader.c, "twin/demo-u1/kpi/forged")):
            assert c.publish(topic, b"1", qos=1)
        # the allowed messages arrive (bounded waits)...
        assert wait_for(lambda: {"plant/demo-u1/hp/p", "twin/demo-u1/kpi/x"} <= auditor.topics())
        assert wait_for(lambda: "plant/demo-u1/hp/p" in twin.topics())
        assert wait_for(lambda: "twin/demo-u1/kpi/x" in reader.topics())
        # ...and, once a later message has passed the broker, the refused ones never did
        assert gateway.c.publish("plant/demo-u1/marker", b"1", qos=1)
        assert wait_for(lambda: "plant/demo-u1/marker" in auditor.topics())
        seen = auditor.topics()
        assert "plant/demo-u1/hp/p-forged" not in seen  # twin may not write sensor topics
        assert "other/from-twin" not in seen  # nor anything outside its prefix
        assert "twin/demo-u1/kpi/forged" not in seen  # a reader may not write twin's results
        assert "other/x" not in seen  # the gateway writes only the unit's sensor topics
        assert "other/x" not in twin.topics()
        assert "plant/demo-u1/hp/p" not in reader.topics()  # a reader of results sees no raw sensors
    finally:
        for s in (auditor, twin, gateway, reader):
            s.c.stop()
