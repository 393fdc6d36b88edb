"""The simulator publishes every sensor to a real Mosquitto; payloads decode to the truth."""

from __future__ import annotations

import math
import threading
from pathlib import Path

import pytest

from twin.config import load_config
from twin.daemon import bindings_from_config
from twin.demo.scenario import DemoScenario
from twin.demo.simulator import Simulator
from twin.ingest.decode import TopicMap
from twin.mqtt import MqttClient, MqttSettings

CONFIG = Path(__file__).resolve().parents[1] / "configs" / "demo-u1.toml"
START = 1_700_000_000.0  # simulated epoch of scenario time 0


@pytest.mark.broker
def test_publishes_every_tag_decodable_to_the_truth_within_noise(mosquitto, wait_for):
    config = load_config(CONFIG)
    topic_map = TopicMap(bindings_from_config(config))
    samples = []
    lock = threading.Lock()

    def on_message(topic: str, payload: bytes, now: float) -> None:
        out = topic_map.decode(topic, payload, now)
        with lock:
            samples.extend(out.samples)
            rejected.extend(out.rejections)

    rejected: list = []
    sub = MqttClient(MqttSettings(port=mosquitto.port, client_id="demo-test-sub"), on_message)
    sub.subscribe(["plant/demo-u1/#"])
    sub.start()
    try:
        assert sub.wait_connected(10) and wait_for(lambda: sub.stats().connects == 1)
        # start late in the scenario: the FW-F1 bias is at its full +3 %
        t0 = 69 * 60.0
        sim = Simulator(
            config, DemoScenario.default(config),
            MqttSettings(port=mosquitto.port, client_id="demo-test-sim", qos=1),
            speed=50.0, start_time=START, rng_seed=11,
        )
        sim.next_time = t0
        steps = 6
        stats = sim.run(steps * 1.0, threading.Event())
        assert stats.steps == steps and stats.dropped == 0
        n_tags = len(config.sensors)
        assert wait_for(lambda: len(samples) >= steps * n_tags, timeout=20)
    finally:
        sub.stop()
    assert rejected == []
    assert len(samples) == steps * n_tags
    by_tag: dict[str, list] = {}
    for smp in samples:
        by_tag.setdefault(smp.tag, []).append(smp)
    assert set(by_tag) == {s.tag for s in config.sensors}
    sensors = config.sensors_by_tag
    for tag, got in by_tag.items():
        assert len(got) == steps
        for smp in got:
            assert smp.quality_ok
            if sensors[tag].payload.format == "number":
                continue  # bare numbers carry no time: the receive time stands in
            t = smp.time - START
            assert t0 <= t < t0 + steps and math.isclose(t, round(t))  # simulated epoch seconds
            truth = sim.truth_at(t)
            expected = truth.sensors[tag] * (1.0 + truth.state.relative_bias.get(tag, 0.0))
            sigma = sensors[tag].sigma_si(truth.sensors[tag])
            # 5σ: with ~550 Gaussian draws the chance of a false failure is ~3e-4 (normal tail)
            assert abs(smp.value - expected) <= 5 * sigma + 1e-6 * abs(expected), tag  # σ = 0 at zero flow
    # the drifting transmitter reads about 3 % above its healthy twin FW-F2 (σ 0.36 %)
    mean = lambda tag: sum(s.value for s in by_tag[tag]) / steps  # noqa: E731
    assert mean("FW-F1") / mean("FW-F2") == pytest.approx(1.03, abs=0.006)


def test_step_without_a_client_returns_the_messages():
    config = load_config(CONFIG)
    sim = Simulator(config, start_time=START, rng_seed=3)
    messages = sim.step(0.0)
    topics = [t for t, _ in messages]
    assert len(topics) == len(set(topics)) == len({s.topic for s in config.sensors})
    payload = dict(messages)["plant/demo-u1/gen/gen-mw1"]
    assert payload.startswith(b'{"v":') and b'"ts":1700000000.0' in payload and b'"q":"good"' in payload
    float(dict(messages)["plant/demo-u1/cond/cw-in-t1"])  # a bare number
