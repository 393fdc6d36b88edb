"""A flood beyond the broker's queue: Mosquitto drops messages silently, ``samples_missing`` counts them.

A real Mosquitto with its default per-client queue (1 000 messages) feeds a
subscriber that is deliberately slow (1 ms per message), while a bulk publisher
sends 1 Hz readings of three tags (stamped on a synthetic timeline) as fast as it
can. The broker drops what does not fit, logging it only on its side. The test
counts what the subscriber really received (its own count, independent of twin)
and checks that the sample-rate monitor, fed from the tag store the way the
daemon feeds it, reports exactly that shortfall (± its one-sample slack per tag).
"""

from __future__ import annotations

import json
import threading
import time
from typing import Any

import pytest

from tests.conftest import wait_for
from twin.bench.ingest_publisher import BulkPublisher
from twin.ingest.decode import PayloadFormat, TagBinding, TopicMap
from twin.ingest.pipeline import Ingestor
from twin.ingest.rate import SampleRateMonitor
from twin.ingest.store import TagStore
from twin.mqtt import MqttClient, MqttSettings

pytestmark = pytest.mark.broker

T0 = 1_800_000_000.0
TAGS = ("A", "B", "C")
PERIOD = 1.0  # [s] between readings of each tag
SECONDS = 2000  # readings per tag


def test_broker_side_drops_show_up_as_samples_missing(mosquitto_factory: Any) -> None:
    broker = mosquitto_factory()  # Mosquitto's default queue: 1000 messages per client
    fmt = PayloadFormat("json", "v", "ts", "epoch_s")
    tm = TopicMap([TagBinding(t, f"flood/{t}", fmt) for t in TAGS])
    store = TagStore(TAGS, capacity=SECONDS + 10)
    ing = Ingestor(tm, store)
    received = dict.fromkeys(TAGS, 0)
    lock = threading.Lock()

    def slow(topic: str, payload: bytes, now: float) -> None:
        time.sleep(0.001)  # a subscriber that cannot keep up with a flood
        with lock:
            received[topic.rsplit("/", 1)[1]] += 1
        ing(topic, payload, T0 + SECONDS)  # receive time: the end of the synthetic timeline

    sub = MqttClient(MqttSettings(host=broker.host, port=broker.port, client_id="flood-sub"), slow)
    sub.subscribe({f"flood/{t}": 1 for t in TAGS})
    sub.start()
    assert sub.wait_connected(10), sub.last_error
    messages = [(f"flood/{t}", json.dumps({"v": 1.0, "ts": T0 + k * PERIOD}).encode())
                for k in range(SECONDS) for t in TAGS]
    pub = BulkPublisher(broker.host, broker.port, "flood-pub", window=2000)
    try:
        pub.publish_all(messages)
        # drained: nothing more arrives for a second (bounded wait)
        last = [-1]

        def settled() -> bool:
            with lock:
                n = sum(received.values())
            done, last[0] = n == last[0], n
            return done

        assert wait_for(settled, timeout=120, step=1.0)
    finally:
        pub.close()
        sub.stop()
    got = sum(received.values())
    lost = len(messages) - got
    assert lost > 0, "the broker dropped nothing: the flood did not exceed its queue"
    # account the timeline in 10 s cycles, as the daemon does after each window
    rates = SampleRateMonitor(TAGS, dict.fromkeys(TAGS, PERIOD), slack=1.0)
    cycle = 10.0
    for end in range(int(cycle), SECONDS + 1, int(cycle)):
        w = store.window(T0 + end - cycle, T0 + end)
        rates.update(cycle, {t: s.count + s.n_bad for t, s in w.items()})
    missing = sum(rates.missing.values())
    print(f"flood: {len(messages)} published, {got} received, {lost} dropped by the broker; "
          f"samples_missing {missing} ({rates.missing})")
    assert got == ing.messages
    # the subscriber's own count is the truth; each tag may hold back its one-sample slack
    assert lost - len(TAGS) <= missing <= lost
