"""End-to-end: the live daemon against a real Mosquitto, read back through ``/metrics``.

The simulated plant's truth comes from the forward heat balance
(:class:`twin.demo.simulator.TruthModel`, IAPWS-IF97), its readings are truth
plus VDI 2048 noise (:func:`twin.demo.plant.noisy_readings`) in each sensor's
engineering unit and payload format (:func:`twin.demo.simulator.encode_messages`),
published through the broker. The daemon runs on a clock the test moves
(:class:`ManualClock`): readings carry chosen timestamps, the test waits until
the daemon has received them and then closes the window with ``run_cycle``, so
no test waits on wall-clock cycles.

The helpers here (:class:`ManualClock`, :class:`PlantFeed`, :func:`scrape`,
:func:`plant_truth`, :func:`shared_reconciler`, :func:`demo_config`) are shared
with the other ``test_daemon_*`` modules.
"""

from __future__ import annotations

import functools
import json
import re
import urllib.request
from collections.abc import Iterator, Mapping
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from tests.conftest import wait_for
from twin.config import load_config
from twin.daemon import Daemon, DaemonOptions, ManualClock, mqtt_settings_from_config
from twin.demo.plant import noisy_readings, to_engineering
from twin.demo.scenario import DemoScenario
from twin.demo.simulator import Truth, TruthModel, encode_messages
from twin.mqtt import MqttClient, MqttSettings
from twin.performance.plant_reconcile import PlantReconciler

pytestmark = pytest.mark.broker

DEMO_CONFIG = Path(__file__).resolve().parents[1] / "configs" / "demo-u1.toml"
C0 = 273.15  # [K] at 0 °C
T0 = 1_700_000_000.0  # window times: Unix seconds, a multiple of the 10 s cycle
SAMPLE_INTERVAL = 5.0  # [s] between readings of every sensor


# ------------------------------------------------------------------ helpers ---
def demo_config() -> Any:
    """A fresh copy of the demo plant config with the metrics endpoint on a free port."""
    config = load_config(DEMO_CONFIG)
    config.metrics.port = 0
    return config


@functools.cache
def shared_reconciler() -> PlantReconciler:
    """One reconciliation problem for every daemon of the test run (it takes a second to build)."""
    return PlantReconciler(load_config(DEMO_CONFIG))


@functools.cache
def _truth_model() -> TruthModel:
    return TruthModel(load_config(DEMO_CONFIG), _constant_scenario(20.0 + C0))


def _constant_scenario(cw_inlet: float, load: float = 1.0) -> DemoScenario:
    eta = 0.860  # the HP group's design efficiency in configs/demo-u1.toml
    return DemoScenario(load=((0.0, load),), hp_efficiency=((0.0, eta),),
                        cooling_water_inlet_temperature=((0.0, cw_inlet),))


@functools.cache
def plant_truth(cw_inlet: float = 20.0 + C0, load: float = 1.0) -> Truth:
    """The simulated plant's true sensors [SI] and KPIs at a cooling-water inlet [K] and load [-]."""
    model = _truth_model()
    model.scenario = _constant_scenario(cw_inlet, load)
    truth, _ = model.exact(0.0)
    return truth


class PlantFeed:
    """Publishes noisy readings of a true plant state through the broker and waits for the daemon.

    Parameters
    ----------
    daemon : Daemon
        Started; its ingestor's message count tells when a batch has arrived.
    settings : MqttSettings
        Broker settings for the feed's own client.
    seed : int
        Noise seed.
    """

    def __init__(self, daemon: Daemon, settings: MqttSettings, seed: int = 1) -> None:
        self.daemon = daemon
        self.config = daemon.config
        self.clock = daemon.clock
        self.rng = np.random.default_rng(seed)
        self.client = MqttClient(client_settings(settings, "feed"), lambda topic, payload, now: None)
        self.client.start()
        assert self.client.wait_connected(10), self.client.last_error

    def messages(self, t: float, truth: Mapping[str, float],
                 bias: Mapping[str, float] | None = None) -> list[tuple[str, bytes]]:
        """One reading of every sensor at time ``t`` [s], as the sensors' payloads."""
        readings = noisy_readings(truth, self.config, self.rng, bias=bias)
        eng = {tag: float(to_engineering(self.config, tag, v)) for tag, v in readings.items()}
        return encode_messages(self.config, eng, t)

    def send(self, t: float, messages: list[tuple[str, bytes]]) -> None:
        """Publish at clock time ``t`` [s] and wait until the daemon has received them all."""
        self.clock.t = t  # bare-number payloads are stamped with the receive time
        target = self.daemon.ingestor.messages + len(messages)
        for topic, payload in messages:
            assert self.client.publish(topic, payload, qos=1)
        assert wait_for(lambda: self.daemon.ingestor.messages >= target), (
            f"daemon received {self.daemon.ingestor.messages} of {target} messages")

    def cycle(self, t_end: float, truth: Mapping[str, float],
              bias: Mapping[str, float] | None = None) -> Any:
        """Readings for the cycle ending at ``t_end``, then close its window."""
        cycle = self.daemon.cycle_seconds
        t = t_end - cycle
        while t < t_end - 1e-9:
            self.send(t, self.messages(t, truth, bias))
            t += SAMPLE_INTERVAL
        self.clock.t = t_end
        return self.daemon.run_cycle(t_end)

    def stop(self) -> None:
        self.client.stop()


_SAMPLE = re.compile(r"^([a-zA-Z_:][a-zA-Z0-9_:]*)(?:\{(.*)\})? (\S+)$")
_LABEL = re.compile(r'(\w+)="((?:[^"\\]|\\.)*)"')


def parse_exposition(text: str) -> dict[tuple[str, frozenset], float]:
    """Samples of a Prometheus text exposition: (name, labels) → value."""
    out = {}
    for line in text.splitlines():
        if not line or line.startswith("#"):
            continue
        m = _SAMPLE.match(line)
        assert m, f"unparsable exposition line {line!r}"
        labels = frozenset(_LABEL.findall(m.group(2) or ""))
        out[(m.group(1), labels)] = float(m.group(3))
    return out


class Scrape:
    """One scrape of the daemon's ``/metrics``."""

    def __init__(self, text: str) -> None:
        self.text = text
        self.samples = parse_exposition(text)

    def get(self, name: str, **labels: str) -> float | None:
        """The value of the sample with exactly these labels (``unit_id`` implied), or None."""
        want = {"unit_id": "demo-u1", **labels}
        for (n, ls), v in self.samples.items():
            if n == name and dict(ls) == want:
                return v
        return None

    def __contains__(self, name: str) -> bool:
        return any(n == name for n, _ in self.samples)


def scrape(daemon: Daemon) -> Scrape:
    """GET the daemon's ``/metrics`` over HTTP."""
    assert daemon.metrics is not None
    url = f"http://127.0.0.1:{daemon.metrics.port}/metrics"
    with urllib.request.urlopen(url, timeout=5) as resp:
        assert resp.status == 200
        return Scrape(resp.read().decode("utf-8"))


def broker_settings(config: Any, broker: Any) -> MqttSettings:
    """The config's broker settings (production reconnect delays) pointed at a test broker."""
    return replace(mqtt_settings_from_config(config, {}), host=broker.host, port=broker.port)


def client_settings(settings: MqttSettings, name: str) -> MqttSettings:
    """Settings for a test's own client next to the daemon: own client id, quick reconnects."""
    return replace(settings, client_id=f"{settings.client_id}-{name}", reconnect_min_delay=0.1,
                   reconnect_max_delay=0.5)


def replace_section(text: str, section: str, body: str) -> str:
    """TOML ``text`` with the body of ``[section]`` (up to the next header or rule) replaced."""
    lines = text.splitlines()
    start = lines.index(f"[{section}]")
    end = start + 1
    while end < len(lines) and not lines[end].startswith(("[", "# ---")):
        end += 1
    return "\n".join([*lines[: start + 1], body.strip(), "", *lines[end:]]) + "\n"


def demo_config_text(broker: str, metrics: str | None = None, **monitoring: str) -> str:
    """configs/demo-u1.toml with a new ``[broker]`` (and ``[metrics]``) body and changed
    ``[monitoring]`` keys (TOML values as text, e.g. ``cycle='"2 s"'``).

    The config schema takes metrics ports 1..65535 only (no 0 for "any free port").
    """
    text = DEMO_CONFIG.read_text(encoding="utf-8")
    text = replace_section(text, "broker", broker)
    if metrics is not None:
        text = replace_section(text, "metrics", metrics)
    for key, value in monitoring.items():
        text, n = re.subn(rf"(?m)^{key} = .*$", f"{key} = {value}", text, count=1)
        assert n == 1, key
    return text


def start_daemon(config: Any, settings: MqttSettings | None = None, clock: ManualClock | None = None,
                 connected: bool = True) -> Daemon:
    """A started daemon on a manual clock, sharing the test run's reconciler.

    ``settings`` None takes the broker from the config (with its password file);
    ``connected`` waits for the connection.
    """
    reconciler = shared_reconciler()
    reconciler.reset()
    daemon = Daemon(config, clock=clock or ManualClock(T0), mqtt_settings=settings,
                    options=DaemonOptions(grace_seconds=0.0), reconciler=reconciler)
    daemon.start()
    assert daemon.mqtt is not None
    if connected:
        assert daemon.mqtt.wait_connected(10), daemon.mqtt.last_error
    return daemon


class EventLog:
    """Collects the daemon's alarm events from its MQTT events topic."""

    def __init__(self, settings: MqttSettings, topic: str) -> None:
        self.events: list[dict] = []
        self.client = MqttClient(client_settings(settings, "events"),
                                 lambda t, payload, now: self.events.append(json.loads(payload)))
        self.client.subscribe([topic], qos=1)
        self.client.start()
        assert self.client.wait_connected(10), self.client.last_error

    def stop(self) -> None:
        self.client.stop()


@pytest.fixture
def plant(mosquitto: Any) -> Iterator[Any]:
    """``plant(config) -> (daemon, feed)`` against a private Mosquitto; stopped at teardown."""
    started: list[tuple[Daemon, PlantFeed]] = []

    def make(config: Any, seed: int = 1) -> tuple[Daemon, PlantFeed]:
        settings = broker_settings(config, mosquitto)
        daemon = start_daemon(config, settings)
        feed = PlantFeed(daemon, settings, seed)
        started.append((daemon, feed))
        return daemon, feed

    make.broker = mosquitto  # type: ignore[attr-defined]
    yield make
    for daemon, feed in started:
        feed.stop()
        daemon.stop()


# -------------------------------------------------------------------- tests ---
KPI_METRICS = {  # KPI key -> (metric, labels)
    "gross_efficiency": ("twin_gross_efficiency_ratio", {}),
    "turbine_heat_rate": ("twin_turbine_heat_rate_ratio", {}),
    "section_efficiency.HP": ("twin_section_efficiency_ratio", {"section": "HP"}),
    "exhaust_quality_elep": ("twin_exhaust_quality_ratio", {"point": "elep"}),
}


def assert_kpis_match_truth(m: Scrape, truth: Truth) -> None:
    """Scraped KPIs against the forward model's truth within 3 of their standard uncertainties."""
    for key, (name, labels) in KPI_METRICS.items():
        value = m.get(name, **labels)
        u95 = m.get(name.replace("_ratio", "_uncertainty_ratio"), **labels)
        assert value is not None and u95 is not None and u95 > 0, key
        sigma = u95 / 1.96  # the exposition carries U95 = 1.96 sigma (VDI 2048)
        assert abs(value - truth.kpis[key]) < 3.0 * sigma, (key, value, truth.kpis[key], sigma)


def test_reconciled_kpis_on_metrics_match_the_simulated_truth(plant: Any) -> None:
    daemon, feed = plant(demo_config())
    t = T0
    for load in (1.0, 0.75):  # full load, then a new window at 75 % (warm start from full load)
        truth = plant_truth(load=load)
        for _ in range(3):  # one full 30 s window of readings at this load
            t += 10.0
            r = feed.cycle(t, truth.sensors)
        assert r.reconcile_status == "converged", r.reconcile_message
        m = scrape(daemon)
        assert m.get("twin_load_ratio") == pytest.approx(load, abs=0.02)
        # truth: the simulated plant's forward heat balance (TruthModel, IAPWS-IF97)
        assert_kpis_match_truth(m, truth)
        assert m.get("twin_mqtt_connected") == 1.0
        assert m.get("twin_reconcile_status", status="converged") == 1.0
        print(f"load {load}: cycle compute {r.compute_seconds:.3f} s")


def test_biased_transmitter_raises_its_suspect_alarm_after_persistent_steady_windows(plant: Any) -> None:
    config = demo_config()
    config.monitoring.steady_hold = 20.0  # two cycles instead of two minutes
    persistence = config.monitoring.suspect_persistence
    daemon, feed = plant(config, seed=2)
    truth = plant_truth()
    # the demo scenario's drifted transmitter: +3 % of reading on a redundant feedwater flow
    # (a +5 % bias makes some windows fail to converge in 40 iterations: see the report)
    bias = {"FW-F1": 0.03 * truth.sensors["FW-F1"]}
    t = T0
    results = []
    steady_windows = 0
    while steady_windows < persistence:
        t += 10.0
        r = feed.cycle(t, truth.sensors, bias)
        results.append(r)
        assert r.reconcile_status == "converged", r.reconcile_message
        if r.steady:
            steady_windows += 1
            assert r.tags["FW-F1"].suspect
        # the alarm needs `persistence` steady windows in which FW-F1 fails its test
        assert ("suspect_FW-F1" in r.alarms) == (steady_windows >= persistence)
        assert len(results) < 40, "the steady-state gate never opened"
    assert not results[0].steady  # the gate warms up first (Cao & Rhinehart filters)
    m = scrape(daemon)
    assert m.get("twin_steady_state") == 1.0
    assert m.get("twin_sensor_suspect", tag="FW-F1") == 1.0
    assert m.get("twin_alarm_active", alarm="suspect_FW-F1", level="suspect") == 1.0
    assert m.get("twin_alarm_state", alarm="suspect_FW-F1", state="active") == 1.0
    # a tag that fails one window (e.g. FW-F2 beside an uneliminated FW-F1) raises no alarm
    alarms = {dict(ls)["alarm"] for (n, ls), v in m.samples.items()
              if n == "twin_alarm_active" and dict(ls).get("level") == "suspect" and v == 1.0}
    assert alarms == {"suspect_FW-F1"}
    print(f"steady after {results.index(next(r for r in results if r.steady)) + 1} cycles; "
          f"cycle compute seconds: {[round(r.compute_seconds, 3) for r in results]}")


def test_exhaust_moisture_alarm_follows_cold_cooling_water_with_hysteresis(plant: Any) -> None:
    config = demo_config()
    mon = config.monitoring
    mon.steady_signals = []  # gate off: every window counts (the suspect test has it on)
    mon.on_delay = 20.0
    mon.off_delay = 20.0
    warn, clear = mon.exhaust_moisture_warn, mon.exhaust_moisture_warn - mon.alarm_deadband
    daemon, feed = plant(config)
    events = EventLog(daemon.mqtt_settings, config.broker.events_topic)
    # phases of constant cooling-water inlet temperature: design, cold, mild, design
    phases = [(20.0, 3), (6.0, 6), (15.0, 6), (20.0, 6)]
    truths = {cw: plant_truth(cw + C0) for cw, _ in phases}
    # truth at the phase values (forward model): below clear, above set, between clear and set
    # (10 % warning and 0.5 % deadband: common practice defaults of configs/demo-u1.toml)
    assert truths[20.0].kpis["exhaust_moisture_elep"] < clear
    assert truths[6.0].kpis["exhaust_moisture_elep"] > warn
    assert clear + 0.001 < truths[15.0].kpis["exhaust_moisture_elep"] < warn - 0.001
    t = T0
    seen: list[tuple[float, float, str]] = []  # (cw, moisture, state) per cycle
    for cw, n in phases:
        for _ in range(n):
            t += 10.0
            r = feed.cycle(t, truths[cw].sensors)
            moisture = r.kpi("exhaust_moisture_elep")  # NaN in a window that did not reconcile
            state = scrape_state(daemon)
            seen.append((cw, moisture, state))
    states = [s for _, _, s in seen]
    # 20 °C: normal; 6 °C: pending, then active after the on-delay
    assert set(states[:3]) == {"normal"}
    cold = states[3:9]
    assert "pending" in cold and cold[-1] == "active"
    assert cold.index("active") > cold.index("pending")
    # 15 °C: moisture back under the set threshold but above the clear threshold keeps it set
    mild = seen[9:15]
    full = [m for _, m, _ in mild[3:] if m == m]  # full windows at 15 °C that reconciled
    assert full and all(clear < m < warn for m in full)
    assert [s for _, _, s in mild] == ["active"] * 6
    # 20 °C again: clearing, then normal after the off-delay
    warm = states[15:]
    assert "clearing" in warm and warm[-1] == "normal"
    assert warm.index("normal") > warm.index("clearing")
    assert wait_for(lambda: len([e for e in events.events if e["alarm"] == "exhaust_moisture"]) >= 4)
    events.stop()
    moves = [(e["from"], e["to"]) for e in events.events if e["alarm"] == "exhaust_moisture"]
    assert moves == [("normal", "pending"), ("pending", "active"), ("active", "clearing"),
                     ("clearing", "normal")]
    assert all(e["level"] == "warning" and e["advisory"] is True for e in events.events)


def scrape_state(daemon: Daemon) -> str:
    """The exhaust-moisture alarm's state as exposed on ``/metrics``."""
    m = scrape(daemon)
    on = [dict(ls)["state"] for (n, ls), v in m.samples.items()
          if n == "twin_alarm_state" and dict(ls).get("alarm") == "exhaust_moisture" and v == 1.0]
    assert len(on) == 1, on
    return on[0]


def test_bad_payloads_are_counted_and_never_stop_the_daemon(plant: Any) -> None:
    config = demo_config()
    daemon, feed = plant(config)
    truth = plant_truth()
    good = feed.messages(T0 + 5.0, truth.sensors)
    ts = T0 + 2.0
    bad = [  # (topic, payload, expected reason)
        ("plant/demo-u1/amb/amb-pb1", b"high", "not_a_number"),
        ("plant/demo-u1/amb/amb-pb1", b"nan", "not_finite"),
        ("plant/demo-u1/hp/hp-ms-t1", b"{\"v\": 541.0, \"ts\": ", "bad_json"),
        ("plant/demo-u1/hp/hp-ms-t1", b"\xff\xfe", "bad_json"),
        ("plant/demo-u1/hp/hp-ms-t1", json.dumps({"v": "hot", "ts": ts, "q": "good"}).encode(), "not_a_number"),
        ("plant/demo-u1/hp/hp-ms-t1", b'{"v": NaN, "ts": %r, "q": "good"}' % ts, "not_finite"),
        ("plant/demo-u1/hp/hp-ms-t1", json.dumps({"v": True, "ts": ts, "q": "good"}).encode(), "wrong_type"),
        ("plant/demo-u1/hp/hp-ms-t1", json.dumps({"v": [541.0], "ts": ts, "q": "good"}).encode(), "wrong_type"),
        ("plant/demo-u1/hp/hp-ms-t1", json.dumps({"ts": ts, "q": "good"}).encode(), "missing_value"),
        ("plant/demo-u1/hp/hp-ms-t1", json.dumps({"v": 541.0, "ts": "yesterday", "q": "good"}).encode(), "bad_timestamp"),
        ("plant/demo-u1/hp/hp-ms-t1", json.dumps({"v": 9999.0, "ts": ts, "q": "good"}).encode(), "out_of_range"),
        ("plant/demo-u1/hp/hp-ms-t1", json.dumps({"v": 541.0, "ts": ts, "q": "x" * 70_000}).encode(), "oversize"),
    ]
    feed.clock.t = ts
    feed.send(ts, [(topic, payload) for topic, payload, _ in bad])
    # a topic under the plant prefix that no sensor uses is not subscribed: never delivered
    before = daemon.ingestor.messages
    assert feed.client.publish("plant/demo-u1/hp/unknown-tag", b"1.0", qos=1)
    feed.send(T0 + 5.0, good)  # flows after the bad ones, on the same connection
    assert daemon.ingestor.messages == before + len(good)
    r = None
    for k in range(3):
        r = feed.cycle(T0 + 10.0 * (k + 1), truth.sensors)
    assert r is not None and r.reconcile_status == "converged"
    expected: dict[str, int] = {}
    for _, _, reason in bad:
        expected[reason] = expected.get(reason, 0) + 1
    m = scrape(daemon)
    for reason, n in expected.items():
        assert m.get("twin_payloads_rejected_total", reason=reason) == n, reason
    assert m.get("twin_payloads_rejected_total", reason="unknown_topic") == 0
    assert daemon.mqtt is not None
    stats = daemon.mqtt.stats()
    assert stats.connected and stats.callback_errors == 0, stats.last_error
    assert m.get("twin_mqtt_connected") == 1.0
