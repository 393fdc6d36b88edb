"""``twin backfill --publish``: reconciled.csv rows republished on a real Mosquitto.

The broker is a private ``mosquitto`` on a free port (tests/conftest.py); the
subscriber is ``mosquitto_sub`` (the broker's own client, not twin's), started
before publishing and stopped by PID. What it receives is compared with the
rows of reconciled.csv as Python's csv and datetime read them.
"""

from __future__ import annotations

import csv
import json
import os
import re
import shutil
import signal
import subprocess
import threading
import time
from datetime import datetime
from pathlib import Path

import pytest

from tests.conftest import free_port, wait_for
from twin.commands._publish import PublishError, connect, publish_file, settings_for_backfill
from twin.mqtt import MqttSettings

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "configs" / "demo-u1.toml"
SUB = shutil.which("mosquitto_sub")
PUB = shutil.which("mosquitto_pub")
PREFIX = "twin/demo-u1/backfill"

pytestmark = [pytest.mark.broker,
              pytest.mark.skipif(SUB is None or PUB is None, reason="needs mosquitto-clients (mosquitto_sub/_pub)")]


class Subscriber:
    """``mosquitto_sub -v`` on ``topic``: collects (topic, payload) lines; ready once a probe came back."""

    def __init__(self, port: int, topic: str) -> None:
        self.port = port
        self.lines: list[tuple[str, str]] = []
        self.proc = subprocess.Popen([SUB, "-h", "127.0.0.1", "-p", str(port), "-q", "1", "-v", "-t", topic],
                                     stdout=subprocess.PIPE, text=True)
        self._t = threading.Thread(target=self._read, daemon=True)
        self._t.start()
        probe = topic.replace("#", "probe")
        assert wait_for(lambda: self._probe(probe), timeout=20, step=0.2), "subscriber never saw its probe"
        self.lines.clear()

    def _probe(self, topic: str) -> bool:
        subprocess.run([PUB, "-h", "127.0.0.1", "-p", str(self.port), "-t", topic, "-m", "probe"], check=True)
        time.sleep(0.1)
        return any(t == topic for t, _ in self.lines)

    def _read(self) -> None:
        assert self.proc.stdout is not None
        for line in self.proc.stdout:
            topic, _, payload = line.rstrip("\n").partition(" ")
            self.lines.append((topic, payload))

    def stop(self) -> None:
        self.proc.send_signal(signal.SIGTERM)
        self.proc.wait(timeout=10)


def _expected(path: Path, prefix: str) -> list[tuple[str, dict]]:
    """The messages a reconciled.csv asks for, worked out here from the README's description."""
    out = []
    with open(path, newline="") as f:
        for row in csv.DictReader(f):
            name = row["name"]
            kind, sep, rest = name.partition(":")
            topic = f"{prefix}/{kind}/{rest}" if sep else f"{prefix}/kpi/{name}"
            out.append((topic, {
                "ts": datetime.fromisoformat(row["window_end"].replace("Z", "+00:00")).timestamp(),
                "window_end": row["window_end"], "name": name, "value": float(row["value"]),
                "uncertainty_95": float(row["uncertainty_95"]) if row["uncertainty_95"] else None,
                "unit": row["unit"], "status": row["status"], "steady": row["steady"] == "true"}))
    return out


def _received(sub: Subscriber) -> list[tuple[str, dict]]:
    return [(t, json.loads(p)) for t, p in sub.lines]


def _key(msg: tuple[str, dict]) -> str:
    return msg[0] + " " + json.dumps(msg[1], sort_keys=True)


SMALL_CSV = """window_end,name,value,uncertainty_95,unit,status,steady
2026-01-05T00:01:00Z,gross_efficiency,0.4123456789,0.0031,1,converged,true
2026-01-05T00:01:00Z,section_efficiency.HP,0.86,0.004,1,converged,true
2026-01-05T00:01:00Z,tag:HP-MS-P1,16200000.0,41000.0,Pa,converged,true
2026-01-05T00:01:00Z,expected:gross_efficiency,0.415,,1,converged,true
2026-01-05T00:01:00Z,deviation:condenser_pressure,0.0012,,1,converged,true
2026-01-05T00:02:00Z,gross_efficiency,0.4121,0.0031,1,not_converged,false
"""


def _client(port: int):
    return connect(settings_for_backfill(MqttSettings(port=port, client_id="twin-test")), timeout=10)


def test_rows_arrive_as_written_bounded_in_flight(mosquitto, tmp_path):
    path = tmp_path / "reconciled.csv"
    rows = SMALL_CSV.splitlines(keepends=True)
    # many windows so the in-flight bound is reached many times over
    body = [r.replace("00:01:00Z", f"{h:02d}:{m:02d}:00Z") for h in range(10) for m in range(60) for r in rows[1:6]]
    path.write_text(rows[0] + "".join(body) + rows[6])
    sub = Subscriber(mosquitto.port, f"{PREFIX}/#")
    client = _client(mosquitto.port)
    try:
        counts = publish_file(client, path, PREFIX, qos=1, max_in_flight=5, timeout=20)
    finally:
        client.stop()
    n = len(body) + 1
    assert (counts.rows, counts.published, counts.acknowledged, counts.refused) == (n, n, n, 0)
    assert wait_for(lambda: len(sub.lines) >= n, timeout=30)
    sub.stop()
    got, want = _received(sub), _expected(path, PREFIX)
    assert sorted(map(_key, got)) == sorted(map(_key, want))
    assert got[0][0] == f"{PREFIX}/kpi/gross_efficiency" and got[0][1]["ts"] == 1767571200.0  # 2026-01-05T00:00Z
    assert 1 <= counts.peak_in_flight <= 5


def test_a_stalled_broker_is_one_line_not_a_hang(mosquitto, tmp_path):
    path = tmp_path / "reconciled.csv"
    path.write_text(SMALL_CSV)
    client = _client(mosquitto.port)
    os.kill(mosquitto.pid, signal.SIGSTOP)  # the broker stops answering (stopped, not killed)
    try:
        with pytest.raises(PublishError, match=r"acknowledged nothing for 1 s .*expected a broker that takes QoS 1"):
            publish_file(client, path, PREFIX, qos=1, max_in_flight=2, timeout=1.0)
    finally:
        os.kill(mosquitto.pid, signal.SIGCONT)
        client.stop()


def test_no_broker_and_bad_rows_are_one_line(tmp_path):
    with pytest.raises(PublishError, match=r"cannot publish: .*127\.0\.0\.1:\d+.*; expected a reachable MQTT broker"):
        _client(free_port())
    bad = tmp_path / "reconciled.csv"
    bad.write_text(SMALL_CSV.replace("0.86,0.004", "high,0.004"))
    from twin.commands._publish import messages

    with pytest.raises(PublishError, match=rf"{re.escape(str(bad))}:3: .*expected an RFC 3339 window_end and numbers"):
        list(messages(bad))


def test_publish_needs_the_csv_output(tmp_path, capsys):
    from twin.cli import main

    rc = main(["backfill", str(DEMO), str(tmp_path / "h.csv"), "--out", str(tmp_path / "o"), "--publish",
               "--format", "parquet"])
    err = [ln for ln in capsys.readouterr().err.splitlines() if ln.startswith("twin backfill:")]
    assert rc == 2 and len(err) == 1 and "--publish sends the rows of reconciled.csv" in err[0]


def test_backfill_publish_equals_reconciled_csv(mosquitto, tmp_path, capsys):
    from twin.cli import main
    from twin.config import load_config
    from twin.demo.history import write_history

    text, n = re.subn(r"(?ms)^\[broker\]\n.*?(?=^\[)", f'[broker]\nhost = "127.0.0.1"\nport = {mosquitto.port}\n'
                      'client_id = "twin-demo-u1"\n\n', DEMO.read_text(), count=1)
    assert n == 1
    cfg_path = tmp_path / "plant.toml"
    cfg_path.write_text(text)
    hist = tmp_path / "h.csv.gz"
    write_history(load_config(cfg_path), hist, hours=0.25, start=1767571200.0, sample_interval=5.0, seed=3)
    out = tmp_path / "bf"
    argv = ["backfill", str(cfg_path), str(hist), "--out", str(out), "--workers", "1", "--cycle", "60",
            "--window", "60", "--warmup", "5", "--chunk", "1", "--publish", "--publish-in-flight", "20"]
    sub = Subscriber(mosquitto.port, f"{PREFIX}/#")
    assert main(argv) == 0
    want = _expected(out / "reconciled.csv", PREFIX)
    assert len(want) > 100
    lines = capsys.readouterr().err.splitlines()
    assert f"published {len(want)} of {len(want)} rows to {PREFIX}/..., {len(want)} acknowledged, 0 refused, " \
           "0 unacknowledged" in lines
    assert wait_for(lambda: len(sub.lines) >= len(want), timeout=30)
    sub.stop()
    got = _received(sub)
    assert sorted(map(_key, got)) == sorted(map(_key, want))
    assert {m["window_end"] for _, m in got} == {m["window_end"] for _, m in want}
    # the broker gone: the same command (finished chunks are not recomputed) fails in one line, exit 1
    mosquitto.stop()
    assert main(argv) == 1
    err = [ln for ln in capsys.readouterr().err.splitlines() if ln.startswith("twin backfill:")]
    assert len(err) == 1 and "--publish: cannot publish:" in err[0] and str(mosquitto.port) in err[0]
