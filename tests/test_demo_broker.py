"""The embedded demo broker (amqtt in a child process), exercised with real clients."""

from __future__ import annotations

import os
import socket
import threading

import pytest

from twin.demo.broker import BrokerStartError, EmbeddedBroker
from twin.mqtt import MqttClient, MqttSettings


def _gone(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    return False


def test_qos1_messages_arrive_without_loss_and_stop_leaves_no_child(wait_for):
    n = 400
    received: list[bytes] = []
    probes: list[bytes] = []
    lock = threading.Lock()

    def on_message(topic: str, payload: bytes, now: float) -> None:
        with lock:
            if topic == "demo/test/probe":
                probes.append(payload)
            else:
                received.append(payload)

    with EmbeddedBroker() as broker:
        assert broker.port and broker.running
        pid = broker.pid
        sub = MqttClient(MqttSettings(port=broker.port, client_id="demo-sub", qos=1), on_message)
        sub.subscribe(["demo/test/#"])
        pub = MqttClient(MqttSettings(port=broker.port, client_id="demo-pub", qos=1), lambda *a: None)
        try:
            sub.start()
            pub.start()
            assert sub.wait_connected(10) and pub.wait_connected(10)
            assert wait_for(lambda: sub.stats().connects == 1)
            # a subscription round trip: publish a probe until the subscriber sees it
            assert wait_for(lambda: pub.publish("demo/test/probe", b"probe") and probes, step=0.1)
            sent = [f"message {i}".encode() for i in range(n)]
            for i, payload in enumerate(sent):
                assert wait_for(lambda: pub.stats().pending < 200)
                assert pub.publish(f"demo/test/t{i % 20}", payload)
            assert wait_for(lambda: len(received) >= n, timeout=60)
            assert wait_for(lambda: pub.stats().pending == 0)
        finally:
            sub.stop()
            pub.stop()
        assert sorted(received) == sorted(sent)  # every message exactly once (QoS 1, no loss)
        assert pub.stats().publish_dropped == 0
    assert not broker.running
    assert pid is not None and _gone(pid)


def test_start_fails_clearly_when_the_port_is_taken():
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        port = taken.getsockname()[1]
        broker = EmbeddedBroker(port=port)
        with pytest.raises(BrokerStartError, match=rf"127\.0\.0\.1:{port} did not start"):
            broker.start(timeout=20)
        assert not broker.running and broker.pid is None


def test_rejects_a_bad_port():
    with pytest.raises(ValueError, match="expected 0"):
        EmbeddedBroker(port=70000)
