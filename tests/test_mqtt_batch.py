"""Batched receive (block reads, batched PUBACKs, own PUBLISH parsing) against real Mosquitto.

Every test runs the same stream through the batching client and through
paho's own per-packet path (``batch_receive=False``) and requires the same
result: every message exactly once and in order per topic, byte-exact, and
every QoS 1 message acknowledged (a persistent session that is resumed
receives nothing again: the broker resends unacknowledged QoS 1 messages).
"""

from __future__ import annotations

import shutil
import subprocess
import threading

import pytest

from twin.bench.ingest_publisher import BulkPublisher, PublishError, encode_publish
from twin.mqtt import BATCH_RECEIVE_SUPPORTED, MqttClient, MqttSettings

pytestmark = pytest.mark.broker

BIG_QUEUE = "max_queued_messages 100000\nmax_inflight_messages 500"


class Collect:
    """Thread-safe record of (topic, payload) in arrival order."""

    def __init__(self) -> None:
        self.items: list[tuple[str, bytes]] = []
        self._lock = threading.Lock()

    def __call__(self, topic: str, payload: bytes, now: float) -> None:
        with self._lock:
            self.items.append((topic, payload))

    def __len__(self) -> int:
        with self._lock:
            return len(self.items)

    def payloads(self, topic: str) -> list[bytes]:
        with self._lock:
            return [p for t, p in self.items if t == topic]


def _settings(broker, batch: bool, protocol: str = "3.1.1", **kw) -> MqttSettings:
    kw.setdefault("reconnect_min_delay", 0.1)
    kw.setdefault("reconnect_max_delay", 1.0)
    return MqttSettings(
        host=broker.host, port=broker.port, protocol=protocol, batch_receive=batch, **kw
    )


def _stream(n: int, n_topics: int) -> list[tuple[str, bytes]]:
    # sizes vary so packets straddle the 64 KiB read blocks at every offset
    return [(f"s/t{k % n_topics}", b"%d:" % k + b"x" * (k % 37)) for k in range(n)]


def _probe_through(sub: MqttClient, got: Collect, broker, wait_for, topic: str) -> None:
    """Publish a probe on ``topic`` until it comes back (subscription in force)."""
    pub = BulkPublisher(broker.host, broker.port, "probe")
    try:
        n0 = len(got.payloads(topic))
        assert wait_for(
            lambda: pub.publish_all([(topic, b"probe")]) and len(got.payloads(topic)) > n0,
            step=0.2,
        )
    finally:
        pub.close()


def test_batching_client_is_used():
    assert BATCH_RECEIVE_SUPPORTED  # the pinned paho has the internals the fast path needs


@pytest.mark.parametrize("protocol", ["3.1.1", "5"])
@pytest.mark.parametrize("batch", [True, False])
def test_qos1_stream_exactly_once_in_order_and_all_acknowledged(
    mosquitto_factory, wait_for, batch, protocol
):
    broker = mosquitto_factory(extra=BIG_QUEUE)
    n, n_topics = 10_000, 7
    got = Collect()
    settings = _settings(broker, batch, protocol, client_id="sub-b", clean_session=False)
    sub = MqttClient(settings, got)
    sub.subscribe({"s/#": 1})
    sub.start()
    try:
        assert sub.wait_connected(10), sub.last_error
        _probe_through(sub, got, broker, wait_for, "s/probe")
        sent = _stream(n, n_topics)
        pub = BulkPublisher(broker.host, broker.port, "pub-b", window=500)
        pub.publish_all(sent)
        pub.close()
        assert wait_for(lambda: len(got) >= n + 1, timeout=60), len(got)
    finally:
        sub.stop()
    for k in range(n_topics):
        topic = f"s/t{k}"
        assert got.payloads(topic) == [p for t, p in sent if t == topic]
    s = sub.stats()
    assert s.callback_errors == 0 and s.messages_received == len(got)
    # resume the session: anything not acknowledged would be sent again now
    again = Collect()
    sub2 = MqttClient(settings, again)
    sub2.start()
    try:
        assert sub2.wait_connected(10), sub2.last_error
        _probe_through(sub2, again, broker, wait_for, "s/probe2")
    finally:
        sub2.stop()
    assert [t for t, _ in again.items if t != "s/probe2"] == []


@pytest.mark.parametrize("batch", [True, False])
def test_mixed_qos_large_payloads_and_v5_properties(mosquitto_factory, wait_for, batch):
    """QoS 0/1/2, payloads larger than a read block and MQTT 5 properties in one stream."""
    if shutil.which("mosquitto_pub") is None:
        pytest.skip("mosquitto_pub is not installed (apt-get install mosquitto-clients)")
    broker = mosquitto_factory(extra=BIG_QUEUE)
    got = Collect()
    sub = MqttClient(_settings(broker, batch, "5"), got)
    sub.subscribe({"m/#": 2})  # each message arrives at the QoS it was published with
    pub = MqttClient(_settings(broker, True, "5"), Collect())
    sub.start()
    pub.start()
    expected: list[bytes] = []
    try:
        assert sub.wait_connected(10) and pub.wait_connected(10), sub.last_error
        _probe_through(sub, got, broker, wait_for, "m/probe")
        for k in range(300):
            payload = b"%d;" % k + (b"L" * 150_000 if k % 50 == 7 else b"s" * (k % 11))
            assert pub.publish("m/x", payload, qos=k % 3)
            expected.append(payload)
        # a message carrying MQTT 5 properties (the fast path leaves it to paho)
        subprocess.run(
            [
                "mosquitto_pub",
                "-h",
                broker.host,
                "-p",
                str(broker.port),
                "-V",
                "5",
                "-q",
                "1",
                "-t",
                "m/x",
                "-m",
                "with-props",
                "-D",
                "publish",
                "user-property",
                "k",
                "v",
            ],
            check=True,
            timeout=30,
        )
        expected.append(b"with-props")
        assert wait_for(lambda: len(got.payloads("m/x")) >= len(expected), timeout=60)
    finally:
        sub.stop()
        pub.stop()
    # one publisher, one topic: MQTT keeps the order within each QoS level
    received = got.payloads("m/x")
    assert sorted(received) == sorted(expected)
    for q in (0, 1, 2):
        assert [p for p in received if p in expected[q:300:3]] == expected[q:300:3]
    assert sub.stats().callback_errors == 0


@pytest.mark.parametrize("batch", [True, False])
def test_stream_survives_subscriber_restart_without_loss(mosquitto_factory, wait_for, batch):
    """Stop the subscriber mid-stream and resume its session: at-least-once, nothing lost."""
    broker = mosquitto_factory(extra=BIG_QUEUE)
    n = 10_000
    got = Collect()
    settings = _settings(broker, batch, client_id="sub-r", clean_session=False)
    sub = MqttClient(settings, got)
    sub.subscribe({"s/#": 1})
    sub.start()
    assert sub.wait_connected(10), sub.last_error
    _probe_through(sub, got, broker, wait_for, "s/probe")
    sent = _stream(n, 3)
    pub = BulkPublisher(broker.host, broker.port, "pub-r", window=500)
    done = threading.Thread(target=pub.publish_all, args=(sent,))
    done.start()
    try:
        assert wait_for(lambda: len(got) > n // 4, timeout=60)
        sub.stop()  # mid-stream: the broker queues the rest for the session
        sub = MqttClient(settings, got)
        sub.start()
        done.join(timeout=60)
        assert wait_for(lambda: {p for _, p in got.items} >= {p for _, p in sent}, timeout=60)
    finally:
        sub.stop()
        done.join(timeout=60)
        pub.close()
    counts: dict[bytes, int] = {}
    for _, p in got.items:
        counts[p] = counts.get(p, 0) + 1
    assert set(counts) == {p for _, p in sent} | {b"probe"}
    # duplicates of the stream are only the messages in flight when the first client stopped (the broker's
    # max_inflight_messages); the probe is left out: on a slow start it is published, and received, more than once
    assert sum(c - 1 for p, c in counts.items() if p != b"probe") <= 500


def test_tls_bulk_stream(mosquitto_factory, tls_files, wait_for):
    """Block reads over TLS (records decrypted ahead of select) lose nothing."""
    broker = mosquitto_factory(tls=True, extra=BIG_QUEUE)
    settings = _settings(broker, True, tls_ca=str(tls_files.ca), max_inflight=500)
    got = Collect()
    sub = MqttClient(settings, got)
    sub.subscribe({"s/#": 1})
    pub = MqttClient(settings, Collect())
    sub.start()
    pub.start()
    n = 3000
    sent = _stream(n, 2)
    try:
        assert sub.wait_connected(10) and pub.wait_connected(10), sub.last_error
        assert wait_for(lambda: pub.publish("s/probe", b"p") and len(got) > 0, step=0.2)
        for topic, payload in sent:
            assert wait_for(lambda t=topic, p=payload: pub.publish(t, p), step=0.001)
        assert wait_for(lambda: len(got.payloads("s/t0")) + len(got.payloads("s/t1")) >= n)
    finally:
        sub.stop()
        pub.stop()
    for topic in ("s/t0", "s/t1"):
        assert got.payloads(topic) == [p for t, p in sent if t == topic]


def test_bulk_publisher_rejects_bad_input_and_refusal(mosquitto_factory):
    with pytest.raises(ValueError, match="message id 0"):
        encode_publish("a", b"", 0)
    broker = mosquitto_factory(users={"u": "pw"})  # anonymous CONNECT is refused
    with pytest.raises(PublishError, match="refused the connection"):
        BulkPublisher(broker.host, broker.port, "anon")
