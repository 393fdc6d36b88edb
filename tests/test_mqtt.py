"""MqttClient against real private Mosquitto brokers (no mocks)."""

from __future__ import annotations

import json
import socket
import threading

import numpy as np
import pytest

from twin.ingest import Ingestor, PayloadFormat, TagBinding, TagStore, TopicMap
from twin.mqtt import MqttClient, MqttSettings, read_secret

pytestmark = pytest.mark.broker


def _settings(broker, protocol="3.1.1", **kw) -> MqttSettings:
    kw.setdefault("reconnect_min_delay", 0.1)
    kw.setdefault("reconnect_max_delay", 1.0)
    return MqttSettings(host=broker.host, port=broker.port, protocol=protocol, **kw)


class Received:
    """Thread-safe list of received messages."""

    def __init__(self) -> None:
        self.items: list[tuple[str, bytes, float]] = []
        self._lock = threading.Lock()

    def __call__(self, topic: str, payload: bytes, now: float) -> None:
        with self._lock:
            self.items.append((topic, payload, now))

    def __len__(self) -> int:
        with self._lock:
            return len(self.items)


@pytest.mark.parametrize("protocol", ["3.1.1", "5"])
def test_round_trip_decodes_into_tag_store(mosquitto, wait_for, protocol):
    bindings = [
        TagBinding("p_main", "u1/p_main", PayloadFormat("number"), scale=1e5),  # bar -> Pa
        TagBinding(
            "t_main",
            "u1/t_main",
            PayloadFormat("json", value="/v", timestamp="/ts", timestamp_format="epoch_ms"),
            offset=273.15,
        ),  # degC -> K
        TagBinding("m_fw", "u1/batch", PayloadFormat("batch"), scale=1 / 3.6),  # t/h -> kg/s
    ]
    topic_map = TopicMap(bindings)
    store = TagStore([b.tag for b in bindings], capacity=256)
    ingest = Ingestor(topic_map, store)
    t0 = 1_700_000_000.0
    sub = MqttClient(_settings(mosquitto, protocol), ingest, clock=lambda: t0 + 5.0)
    pub = MqttClient(_settings(mosquitto, protocol), Received())
    sub.subscribe(topic_map.topics, qos=1)
    sub.start()
    pub.start()
    try:
        assert sub.wait_connected(10) and pub.wait_connected(10), sub.last_error
        assert wait_for(lambda: sub.stats().connects == 1)
        # a subscription is in force once a probe comes back through it
        assert wait_for(
            lambda: pub.publish("u1/p_main", b"160.0") and ingest.messages > 0, step=0.2
        )
        n0 = ingest.messages
        p_bar = [160.0, 161.0, 162.5, 159.5]
        t_c = [540.0, 541.0, 539.0, 540.5]
        m_th = [1062.0, 1065.6, 1058.4]
        for k, x in enumerate(p_bar):
            assert pub.publish("u1/p_main", str(x).encode(), qos=1)
            assert pub.publish("u1/t_main", json.dumps({"v": t_c[k], "ts": (t0 + k) * 1000}), qos=1)
        for k, x in enumerate(m_th):
            assert pub.publish("u1/batch", json.dumps({"ts": t0 + k, "values": {"m_fw": x}}), qos=1)
        sent = 2 * len(p_bar) + len(m_th)
        assert wait_for(lambda: ingest.messages >= n0 + sent), ingest.messages
        assert ingest.rejects.total == 0
        stats = store.window(t0, t0 + 5.0 + 1e-3)
        # expected values: numpy on the unit-converted inputs (1 bar = 1e5 Pa, 0 degC =
        # 273.15 K, 1 t/h = 1/3.6 kg/s; SI brochure)
        assert stats["t_main"].count == len(t_c)
        assert stats["t_main"].mean == pytest.approx(np.mean(t_c) + 273.15, rel=1e-12)
        assert stats["m_fw"].mean == pytest.approx(np.mean(m_th) / 3.6, rel=1e-12)
        assert stats["m_fw"].std == pytest.approx(np.std(np.divide(m_th, 3.6), ddof=1), rel=1e-9)
        # number payloads take the receive time (the injected clock: t0 + 5)
        p_values = store.snapshot("p_main")[1][-len(p_bar) :]
        np.testing.assert_allclose(p_values, np.multiply(p_bar, 1e5), rtol=1e-12)
        assert stats["p_main"].last_time == t0 + 5.0
        s = sub.stats()
        assert s.callback_errors == 0 and s.disconnects == 0
    finally:
        sub.stop()
        pub.stop()
    assert not sub.connected


def test_reconnects_and_resubscribes_after_broker_restart(mosquitto, wait_for):
    got = Received()
    sub = MqttClient(_settings(mosquitto, reconnect_max_delay=2.0), got)
    pub = MqttClient(_settings(mosquitto, reconnect_max_delay=2.0), Received())
    sub.subscribe(["plant/x"])
    sub.start()
    pub.start()
    try:
        assert sub.wait_connected(10) and pub.wait_connected(10)
        assert wait_for(lambda: pub.publish("plant/x", b"1") and len(got) > 0, step=0.2)
        mosquitto.stop(kill=True)  # a crash, not a clean shutdown
        assert wait_for(lambda: not sub.connected and not pub.connected)
        mosquitto.restart()
        # within 10 s (reconnect backoff capped at 2 s): reconnected and resubscribed
        assert sub.wait_connected(10) and pub.wait_connected(10), sub.last_error
        n = len(got)
        assert wait_for(lambda: pub.publish("plant/x", b"2") and len(got) > n, step=0.2)
        s = sub.stats()
        assert s.disconnects >= 1 and s.connects >= 2
        assert s.callback_errors == 0
        assert got.items[-1][1] == b"2"
    finally:
        sub.stop()
        pub.stop()


def test_publish_back_pressure_is_bounded_and_reported(mosquitto, wait_for):
    got = Received()
    sub = MqttClient(_settings(mosquitto), got)
    sub.subscribe(["bp/#"])
    pub = MqttClient(_settings(mosquitto, max_inflight=2, max_queued=5), Received())
    sub.start()
    pub.start()
    try:
        assert sub.wait_connected(10) and pub.wait_connected(10)
        mosquitto.stop(kill=True)
        assert wait_for(lambda: not pub.connected)
        # disconnected: QoS 1 messages wait in the bounded queue; the rest are refused
        results = [pub.publish(f"bp/{k}", b"x", qos=1) for k in range(20)]
        assert results.count(True) == 5 and results.count(False) == 15
        assert pub.publish("bp/q0", b"x", qos=0) is False  # QoS 0 cannot wait
        s = pub.stats()
        assert s.publish_dropped == 16 and s.pending == 5
        assert "dropped" in (pub.last_error or "")
        mosquitto.restart()
        # after reconnecting the queued five are delivered and acknowledged
        assert wait_for(lambda: pub.stats().pending == 0), pub.stats()
        assert pub.stats().acknowledged >= 5
    finally:
        sub.stop()
        pub.stop()


def test_stop_without_broker_returns(wait_for):
    with socket.socket() as s:  # a port nobody listens on
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    client = MqttClient(
        MqttSettings(port=port, reconnect_min_delay=0.1, reconnect_max_delay=0.2), Received()
    )
    client.start()
    assert wait_for(lambda: client.stats().connect_failures > 0)
    assert "cannot connect to MQTT broker 127.0.0.1:" in client.last_error
    client.stop()
    assert not client.connected


def test_settings_reject_bad_values():
    with pytest.raises(ValueError, match="protocol '4'"):
        MqttSettings(protocol="4")
    with pytest.raises(ValueError, match="max_queued 70000"):
        MqttSettings(max_queued=70_000)
    with pytest.raises(ValueError, match="password is set without a username"):
        MqttSettings(password="x")
    assert "secret" not in repr(MqttSettings(username="u", password="secret"))


def test_read_secret(tmp_path):
    f = tmp_path / "pw"
    f.write_text("s3cret\n")
    assert read_secret(file=f) == "s3cret"
    assert read_secret(env="TWIN_PW", environ={"TWIN_PW": "abc"}) == "abc"
    with pytest.raises(ValueError, match="not both"):
        read_secret(file=f, env="TWIN_PW")
    with pytest.raises(ValueError, match="not neither"):
        read_secret()
    with pytest.raises(ValueError, match="'TWIN_PW' is not set"):
        read_secret(env="TWIN_PW", environ={})
    with pytest.raises(ValueError, match="cannot read secret file"):
        read_secret(file=tmp_path / "missing")
