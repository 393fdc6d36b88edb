"""Commands fail in one line and exit cleanly; log lines carry RFC 3339 UTC times (text or JSON)."""

from __future__ import annotations

import json
import logging
import os
import re
import signal
import subprocess
import sys
import time
from datetime import UTC, datetime
from pathlib import Path

import pytest

from twin.cli import setup_logging
from twin.daemon import log_event

DEMO = Path(__file__).resolve().parent.parent / "configs" / "demo-u1.toml"
ENV = {**os.environ, "OPENBLAS_NUM_THREADS": "1", "PYTHONUNBUFFERED": "1"}
RFC3339_UTC = r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{3}Z"


def _twin(*args: str) -> subprocess.Popen[str]:
    return subprocess.Popen([sys.executable, "-m", "twin.cli", *args], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, env=ENV)


def _catches_sigterm(pid: int) -> bool:
    """The process has a handler for SIGTERM (Linux /proc/<pid>/status, SigCgt bit mask)."""
    try:
        status = Path(f"/proc/{pid}/status").read_text()
    except OSError:
        return False
    m = re.search(r"^SigCgt:\s*([0-9a-f]+)$", status, re.M)
    return bool(m and int(m.group(1), 16) >> (signal.SIGTERM - 1) & 1)


@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="needs Linux /proc")
@pytest.mark.parametrize("delay", [0.0, pytest.param(2.0, marks=pytest.mark.slow)])
def test_sigterm_during_start_up_is_a_clean_exit(delay: float) -> None:
    """The handler is in place before the heavy imports and the model build; SIGTERM then exits 0."""
    p = _twin("run", str(DEMO), "--log-level", "DEBUG")
    deadline = time.monotonic() + 30
    while not _catches_sigterm(p.pid) and p.poll() is None and time.monotonic() < deadline:
        time.sleep(0.005)
    time.sleep(delay)  # 0: imports under way; 2 s: the model build
    p.send_signal(signal.SIGTERM)
    _, err = p.communicate(timeout=60)
    assert p.returncode == 0, err
    assert "Traceback" not in err


@pytest.mark.slow
def test_demo_against_an_unreachable_broker_exits_1_with_one_line() -> None:
    p = _twin("demo", "--broker", "127.0.0.1:1", "--metrics-port", "0")
    _, err = p.communicate(timeout=120)
    assert p.returncode == 1
    assert err.splitlines() == ["twin demo: cannot connect to MQTT broker 127.0.0.1:1: Connection refused"]


def _capture(fmt: str, capsys: pytest.CaptureFixture[str]) -> list[str]:
    setup_logging("INFO", fmt)
    try:
        log_event(logging.WARNING, "windows_skipped", count=2, window_end=1_800_000_010.0, text="fell behind")
    finally:
        root = logging.getLogger()
        for h in [h for h in root.handlers if h.get_name() == "twin"]:
            root.removeHandler(h)
    return capsys.readouterr().err.splitlines()


def test_text_log_lines_carry_rfc3339_utc_times(capsys: pytest.CaptureFixture[str]) -> None:
    (line,) = _capture("text", capsys)
    m = re.fullmatch(rf"({RFC3339_UTC}) WARNING twin\.daemon event=windows_skipped count=2 "
                     rf"window_end=({RFC3339_UTC}) text=\"fell behind\"", line)
    assert m, line
    # 1 800 000 010 s after the epoch, formatted independently by the standard library
    assert m.group(2) == datetime.fromtimestamp(1_800_000_010, UTC).strftime("%Y-%m-%dT%H:%M:%S.000Z")
    logged = datetime.strptime(m.group(1), "%Y-%m-%dT%H:%M:%S.%fZ").replace(tzinfo=UTC)
    assert abs(logged.timestamp() - time.time()) < 3600  # UTC, not local time


def test_json_log_lines_are_one_object_each(capsys: pytest.CaptureFixture[str]) -> None:
    (line,) = _capture("json", capsys)
    doc = json.loads(line)
    assert doc["event"] == "windows_skipped" and doc["count"] == 2 and doc["level"] == "WARNING"
    assert re.fullmatch(RFC3339_UTC, doc["time"]) and re.fullmatch(RFC3339_UTC, doc["window_end"])


def test_run_with_an_unusable_ca_file_exits_1_with_one_line(tmp_path: Path) -> None:
    """A CA file that exists but holds no certificate: MqttError at start, one line, no traceback."""
    from tests.test_daemon_e2e import demo_config_text

    ca = tmp_path / "garbage.crt"
    ca.write_text("not a certificate\n")
    plant = tmp_path / "plant.toml"
    plant.write_text(demo_config_text(broker=f'host = "127.0.0.1"\nport = 1\ntls = {{ ca_file = "{ca}" }}\n'))
    p = _twin("run", str(plant), "--no-state")
    _, err = p.communicate(timeout=180)
    assert p.returncode == 1
    lines = [ln for ln in err.splitlines() if not re.match(rf"{RFC3339_UTC} INFO twin\.run event=starting ", ln)]
    assert lines == [f"twin run: {plant}: MQTT TLS set-up for 127.0.0.1:1 failed: CA file "
                                f"'{ca}': no certificate or crl found"]
