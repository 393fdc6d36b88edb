"""Sparkplug B end to end: an edge node publishes real Sparkplug B payloads through a real
Mosquitto (started by the test) to the daemon, which subscribes to its births, data and deaths.

The edge node is a plain paho client in the test that follows the edge-node rules of the
Sparkplug 3.0 specification (§5.4 NBIRTH with bdSeq and seq 0, §5.6 DBIRTH, §6.4.6 DATA by
alias with per-metric timestamps, §5.5/§5.7 deaths); what the daemon must do is the host
side of the same sections. Plant file: configs/demo-u1.toml with three sensors moved onto
Sparkplug (two device metrics, one node metric).
"""

from __future__ import annotations

import re
import threading
from pathlib import Path
from typing import Any

import paho.mqtt.client as paho
import pytest
from paho.mqtt.enums import CallbackAPIVersion

from tests.conftest import wait_for
from tests.test_config import problems
from tests.test_daemon_e2e import DEMO_CONFIG, T0, scrape, start_daemon
from twin.config import load_config, validate_config
from twin.history.readers import HistoryReader
from twin.sparkplug import decode_payload, encode_payload

GROUP, NODE, DEVICE = "demo", "edge1", "hp"
SPARKPLUG = {  # tag -> (topic, metric)
    "HP-MS-P1": (f"spBv1.0/{GROUP}/DDATA/{NODE}/{DEVICE}", "Main steam/Pressure left"),
    "HP-MS-P2": (f"spBv1.0/{GROUP}/DDATA/{NODE}/{DEVICE}", "Main steam/Pressure right"),
    "HP-MS-T1": (f"spBv1.0/{GROUP}/NDATA/{NODE}", "Main steam/Temperature left"),
}


def sparkplug_config_text(port: int, historical_file: str = "historical.csv") -> str:
    """The demo plant file on a test broker, three sensors bound to Sparkplug metrics."""
    text = DEMO_CONFIG.read_text(encoding="utf-8")
    for tag, (topic, metric) in SPARKPLUG.items():
        text, n = re.subn(rf'(tag = "{tag}"\n(?:.*\n)*?)topic = ".*"\n',
                          rf'\g<1>topic = "{topic}"\npayload = {{ format = "sparkplug", metric = "{metric}" }}\n',
                          text, count=1)
        assert n == 1, tag
    text, n = re.subn(r"(?ms)^\[broker\]\n.*?(?=^\[)", f'[broker]\nhost = "127.0.0.1"\nport = {port}\n'
                      'client_id = "twin-sparkplug-test"\n\n[sparkplug]\nrebirth_interval = "0.1 s"\n'
                      f'historical_file = "{historical_file}"\n\n', text, count=1)
    assert n == 1
    return text


def test_plant_file_binds_sensors_to_sparkplug_metrics(tmp_path: Path) -> None:
    path = tmp_path / "plant.toml"
    path.write_text(sparkplug_config_text(1883), encoding="utf-8")
    config = load_config(path)
    s = config.sensors_by_tag["HP-MS-P1"]
    assert (s.topic, s.payload.format, s.payload.metric) == (*SPARKPLUG["HP-MS-P1"][:1], "sparkplug",
                                                            "Main steam/Pressure left")


def test_plant_file_sparkplug_mistakes_are_one_line_each() -> None:
    from tests.test_config import base

    data = base()
    data["sensors"][0]["topic"] = "spBv1.0/demo/NBIRTH/edge1"
    data["sensors"][0]["payload"] = {"format": "sparkplug", "metric": "P"}
    (line,) = problems(data)
    assert "is not a data topic; expected the NDATA topic of the edge node" in line
    data["sensors"][0]["payload"] = {"format": "sparkplug"}
    data["sensors"][0]["topic"] = "spBv1.0/demo/NDATA/edge1"
    assert any("metric: missing; expected the Sparkplug B metric name" in x for x in problems(data))
    data["sensors"][0]["payload"] = {"format": "sparkplug", "metric": "P"}
    validate_config(data)


class EdgeNode:
    """A Sparkplug B edge node with one device, publishing through its own paho client."""

    def __init__(self, port: int, will_bdseq: int | None = None) -> None:
        self.seq = 0
        self.bdseq = 0
        self.aliases: dict[str, int] = {}
        self.commands: list[bytes] = []
        self.client = paho.Client(CallbackAPIVersion.VERSION2, client_id="edge1-test")
        if will_bdseq is not None:  # §5.4: the NDEATH is registered as the MQTT will at connect
            self.client.will_set(f"spBv1.0/{GROUP}/NDEATH/{NODE}", encode_payload(
                [{"name": "bdSeq", "datatype": "Int64", "value": will_bdseq}]), qos=1)
        self.client.on_message = lambda c, u, m: self.commands.append(bytes(m.payload))
        self.connected = threading.Event()
        self.client.on_connect = lambda c, u, f, rc, p: (c.subscribe(f"spBv1.0/{GROUP}/NCMD/{NODE}", 1),
                                                         self.connected.set())
        self.client.connect("127.0.0.1", port)
        self.client.loop_start()
        assert self.connected.wait(10)

    def publish(self, kind: str, metrics: list[dict[str, Any]], seq: bool = True, ts: float | None = None,
                device: bool = True) -> None:
        topic = f"spBv1.0/{GROUP}/{kind}/{NODE}" + (f"/{DEVICE}" if device else "")
        payload = encode_payload(metrics, timestamp_ms=round(1000 * ts) if ts is not None else None,
                                 seq=self.seq if seq else None)
        if seq:
            self.seq = (self.seq + 1) % 256
        self.client.publish(topic, payload, qos=1).wait_for_publish(5)

    def births(self, t: float, values: dict[str, float], aliases: dict[str, int]) -> None:
        """NBIRTH (seq 0, bdSeq, the node metric) then DBIRTH (the device metrics), with aliases."""
        self.seq, self.aliases = 0, aliases
        ms = round(1000 * t)
        node = [{"name": "bdSeq", "timestamp": ms, "datatype": "Int64", "value": self.bdseq},
                {"name": "Node Control/Rebirth", "timestamp": ms, "datatype": "Boolean", "value": False}]
        dev = []
        for tag, (topic, metric) in SPARKPLUG.items():
            m = {"name": metric, "alias": aliases[tag], "timestamp": ms, "datatype": "Double", "value": values[tag]}
            (dev if "DDATA" in topic else node).append(m)
        self.publish("NBIRTH", node, ts=t, device=False)
        self.publish("DBIRTH", dev, ts=t)

    def data(self, tag: str, value: float, t: float, historical: bool = False, alias: int | None = None) -> None:
        topic = SPARKPLUG[tag][0]
        m = {"alias": self.aliases[tag] if alias is None else alias, "timestamp": round(1000 * t),
             "datatype": "Double", "value": value, "is_historical": historical}
        self.publish("DDATA" if "DDATA" in topic else "NDATA", [m], device="DDATA" in topic)

    def vanish(self) -> None:
        """Drop the TCP connection without an MQTT DISCONNECT (a crash, a cut cable)."""
        self.client.loop_stop()
        sock = self.client.socket()
        assert sock is not None
        sock.close()

    def stop(self) -> None:
        self.client.loop_stop()
        self.client.disconnect()


@pytest.mark.broker
@pytest.mark.slow
def test_edge_node_births_data_deaths_and_rebirth_through_mosquitto(mosquitto: Any, tmp_path: Path) -> None:
    path = tmp_path / "plant.toml"
    path.write_text(sparkplug_config_text(mosquitto.port), encoding="utf-8")
    config = load_config(path)
    config.metrics.port = 0
    daemon = start_daemon(config)
    edge = EdgeNode(mosquitto.port)
    clock = daemon.clock
    conv = {tag: config.sensors_by_tag[tag].conversion for tag in SPARKPLUG}

    def arrived(n: int) -> None:
        """Wait for the edge node's n-th message (the daemon also hears its own rebirth requests)."""
        def done() -> bool:
            assert daemon.sparkplug is not None
            return daemon.ingestor.messages >= n + sum(daemon.sparkplug.rebirth_requests.values())
        assert wait_for(done), (daemon.ingestor.messages, n)

    try:
        # births: the daemon learns the aliases; values in a BIRTH are samples at their timestamps
        clock.t = T0 + 1.0
        edge.births(T0 + 1.0, {"HP-MS-P1": 15.0, "HP-MS-P2": 150.0, "HP-MS-T1": 540.0},
                    {"HP-MS-P1": 10, "HP-MS-P2": 11, "HP-MS-T1": 12})
        arrived(2)
        # DATA by alias, each metric with its own timestamp (the payload has none)
        for i, t in enumerate((T0 + 3.0, T0 + 5.0, T0 + 7.0)):
            clock.t = t + 0.5
            edge.data("HP-MS-P1", 15.0 + 0.1 * i, t)
            edge.data("HP-MS-T1", 541.0 + i, t)
        # store-and-forward data an hour old: never into a live window
        edge.data("HP-MS-P1", 14.0, T0 - 3600.0, historical=True)
        arrived(9)
        m = scrape(daemon)
        assert m.get("twin_sparkplug_historical_samples_total") == 1.0
        # ... routed to the back-fill file, which the historian reader takes like any export
        (block,) = HistoryReader(config).read(tmp_path / "historical.csv")
        assert list(block.t) == [T0 - 3600.0]
        assert [config.sensors[i].tag for i in block.tag] == ["HP-MS-P1"]
        assert block.value[0] == conv["HP-MS-P1"].to_si(14.0)
        assert m.get("twin_sparkplug_node_online", node=f"{GROUP}/{NODE}") == 1.0
        assert m.get("twin_sparkplug_sequence_gaps_total", node=f"{GROUP}/{NODE}") == 0.0
        clock.t = T0 + 10.0
        r = daemon.run_cycle(T0 + 10.0)
        p1 = r.tags["HP-MS-P1"]
        assert p1.count == 4  # DBIRTH value + three DATA; the historical sample is not among them
        assert p1.measured == pytest.approx(conv["HP-MS-P1"].to_si((15.0 + 15.0 + 15.1 + 15.2) / 4), rel=1e-12)
        assert r.tags["HP-MS-T1"].age_seconds == pytest.approx(3.0)  # newest sample stamped T0 + 7 s
        # a lost message: seq jumps; the gap is counted and a rebirth is requested (NCMD)
        edge.seq += 1
        clock.t = T0 + 12.0
        edge.data("HP-MS-P1", 15.3, T0 + 12.0)
        arrived(10)
        assert wait_for(lambda: scrape(daemon).get("twin_sparkplug_sequence_gaps_total",
                                                   node=f"{GROUP}/{NODE}") == 1.0)
        assert wait_for(lambda: edge.commands)
        (cmd,) = decode_payload(edge.commands[0]).metrics
        assert (cmd.name, cmd.value) == ("Node Control/Rebirth", True)  # §5.17
        # DDEATH: the device's tags are stale at once (live metric, before any window closes)
        edge.publish("DDEATH", [], ts=T0 + 13.0)
        arrived(11)
        m = scrape(daemon)
        assert m.get("twin_sensor_offline", tag="HP-MS-P1") == 1.0
        assert m.get("twin_sensor_offline", tag="HP-MS-P2") == 1.0
        assert m.get("twin_sensor_offline", tag="HP-MS-T1") == 0.0
        # an NDEATH with an older bdSeq (a late will) is ignored; the current one kills the node
        edge.publish("NDEATH", [{"name": "bdSeq", "datatype": "Int64", "value": 7}], seq=False, device=False)
        edge.publish("NDEATH", [{"name": "bdSeq", "datatype": "Int64", "value": 0}], seq=False, device=False)
        arrived(13)
        m = scrape(daemon)
        assert m.get("twin_sparkplug_deaths_ignored_total", node=f"{GROUP}/{NODE}") == 1.0
        assert m.get("twin_sensor_offline", tag="HP-MS-T1") == 1.0
        assert m.get("twin_sparkplug_node_online", node=f"{GROUP}/{NODE}") == 0.0
        clock.t = T0 + 20.0
        r = daemon.run_cycle(T0 + 20.0)
        assert {r.tags[t].reason for t in SPARKPLUG} == {"stale"}  # samples are in the window, yet stale
        # rebirth with new aliases (swapped): values land on the right tags again
        edge.bdseq = 1
        clock.t = T0 + 45.0
        edge.births(T0 + 45.0, {"HP-MS-P1": 15.5, "HP-MS-P2": 155.0, "HP-MS-T1": 545.0},
                    {"HP-MS-P1": 11, "HP-MS-P2": 10, "HP-MS-T1": 12})
        edge.data("HP-MS-P2", 156.0, T0 + 46.0)
        edge.data("HP-MS-P1", 15.6, T0 + 47.0)
        edge.data("HP-MS-P1", 1.0, T0 + 48.0, alias=99)  # an alias the BIRTH did not declare
        arrived(18)
        # a payload that is not protobuf: one rejection, the daemon carries on
        edge.client.publish(f"spBv1.0/{GROUP}/DDATA/{NODE}/{DEVICE}", b'{"v": 1}', qos=1).wait_for_publish(5)
        arrived(19)
        m = scrape(daemon)
        assert m.get("twin_sensor_offline", tag="HP-MS-P1") == 0.0
        assert m.get("twin_payloads_rejected_total", reason="unknown_alias") == 1.0
        assert m.get("twin_payloads_rejected_total", reason="bad_protobuf") == 1.0
        clock.t = T0 + 50.0
        r = daemon.run_cycle(T0 + 50.0)  # window [T0 + 20 s, T0 + 50 s): the new session only
        assert r.tags["HP-MS-P1"].valid and r.tags["HP-MS-P2"].valid
        assert r.tags["HP-MS-P1"].measured == pytest.approx(conv["HP-MS-P1"].to_si((15.5 + 15.6) / 2), rel=1e-12)
        assert r.tags["HP-MS-P2"].measured == pytest.approx(conv["HP-MS-P2"].to_si((155.0 + 156.0) / 2), rel=1e-12)
    finally:
        edge.stop()
        daemon.stop()


@pytest.mark.broker
@pytest.mark.slow
def test_will_message_of_a_vanished_edge_node_marks_its_tags_stale(mosquitto: Any, tmp_path: Path) -> None:
    """§5.5: the NDEATH is the edge node's MQTT will; the broker sends it when the node's
    connection drops without DISCONNECT, and the host marks every metric of the node stale.
    Also: a back-fill file that cannot be written loses no sample silently (counted)."""
    path = tmp_path / "plant.toml"
    path.write_text(sparkplug_config_text(mosquitto.port, historical_file="no-such-dir/h.csv"), encoding="utf-8")
    config = load_config(path)
    config.metrics.port = 0
    daemon = start_daemon(config)
    edge = EdgeNode(mosquitto.port, will_bdseq=0)
    try:
        daemon.clock.t = T0 + 1.0
        edge.births(T0 + 1.0, {"HP-MS-P1": 15.0, "HP-MS-P2": 150.0, "HP-MS-T1": 540.0},
                    {"HP-MS-P1": 10, "HP-MS-P2": 11, "HP-MS-T1": 12})
        edge.data("HP-MS-P1", 14.0, T0 - 60.0, historical=True)
        assert wait_for(lambda: daemon.ingestor.messages >= 3)
        m = scrape(daemon)
        assert m.get("twin_sensor_offline", tag="HP-MS-T1") == 0.0
        assert m.get("twin_sparkplug_historical_write_failures_total") == 1.0
        edge.vanish()
        assert wait_for(lambda: scrape(daemon).get("twin_sensor_offline", tag="HP-MS-T1") == 1.0)
        m = scrape(daemon)
        assert all(m.get("twin_sensor_offline", tag=t) == 1.0 for t in SPARKPLUG)
        assert m.get("twin_sparkplug_node_online", node=f"{GROUP}/{NODE}") == 0.0
    finally:
        edge.stop()
        daemon.stop()
