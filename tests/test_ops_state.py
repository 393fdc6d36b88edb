"""The per-unit state file: atomic, versioned, tied to the plant file; ``twin state``; kill -9 and resume."""

from __future__ import annotations

import json
import os
import signal
import time
from pathlib import Path
from typing import Any

import pytest

from tests.conftest import wait_for
from tests.test_daemon_cli import WallClockFeed, _run_config, twin
from tests.test_daemon_e2e import demo_config
from twin.cli import main
from twin.state import (
    FORMAT,
    VERSION,
    StateError,
    plant_sha256,
    read_state,
    reset_state,
    usable,
    write_state,
)

NOW = 1_800_000_000.0
PARTS = {"cycle": {"version": 1, "unit_id": "u1", "steady_windows": 7, "drift": {"x": [1.5, -2.0]}},
         "ingest": {"sample_rates": {"period": {"A": 1.0}, "missing": {"A": 3}}}}


def _write(path: Path, **kw: Any) -> None:
    args = {"unit_id": "u1", "plant_file": "/p.toml", "plant_hash": "ab" * 32, "now": NOW, **kw}
    write_state(path, PARTS, **args)


def test_round_trip_and_header(tmp_path: Path) -> None:
    path = tmp_path / "sub" / "u1.state.json"
    _write(path)
    doc = json.loads(path.read_text())
    assert doc["format"] == FORMAT and doc["version"] == VERSION and doc["saved_at_utc"] == "2027-01-15T08:00:00.000Z"
    saved = read_state(path)
    assert saved.parts == PARTS and saved.unit_id == "u1" and saved.saved_at == NOW
    assert usable(saved, unit_id="u1", plant_hash="ab" * 32, now=NOW + 10, max_age=60) is None
    assert [p.name for p in path.parent.iterdir()] == ["u1.state.json"]  # no temporary file left


def test_refusals_have_one_line_reasons(tmp_path: Path) -> None:
    path = tmp_path / "s.json"
    _write(path)
    saved = read_state(path)
    assert "unit 'u1', not 'u2'" in (usable(saved, unit_id="u2", plant_hash="ab" * 32, now=NOW, max_age=60) or "")
    assert "plant file changed" in (usable(saved, unit_id="u1", plant_hash="cd" * 32, now=NOW, max_age=60) or "")
    assert "7200 s old" in (usable(saved, unit_id="u1", plant_hash="ab" * 32, now=NOW + 7200, max_age=3600) or "")


@pytest.mark.parametrize(("text", "match"), [
    ("{not json", "not a JSON state file"),
    ('{"format": "other"}', "not a twin state file"),
    (json.dumps({"format": FORMAT, "version": 99}), "version 99; this twin reads version 1"),
    (json.dumps({"format": FORMAT, "version": 1, "unit_id": "u1"}), "lacks or mangles key"),
    ("", "not a JSON state file"),
])
def test_unreadable_state_files_are_one_line_errors(tmp_path: Path, text: str, match: str) -> None:
    path = tmp_path / "s.json"
    path.write_text(text)
    with pytest.raises(StateError, match=match) as info:
        read_state(path)
    assert str(path) in str(info.value) and "\n" not in str(info.value)


def test_write_is_atomic_a_failed_write_keeps_the_old_file(tmp_path: Path) -> None:
    path = tmp_path / "s.json"
    _write(path)
    with pytest.raises(StateError, match="not JSON-able"):
        write_state(path, {"cycle": {"bad": float("nan")}}, unit_id="u1", plant_file="/p", plant_hash="x", now=NOW)
    assert read_state(path).parts == PARTS
    assert reset_state(path) and not path.exists() and not reset_state(path)


def test_twin_state_show_and_reset(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    plant = tmp_path / "plant.toml"
    plant.write_text((Path(__file__).resolve().parent.parent / "configs" / "demo-u1.toml").read_text())
    state = tmp_path / "demo-u1.state.json"
    assert main(["state", "show", str(plant)]) == 1
    assert capsys.readouterr().err.strip() == f"twin state: no state file at {state}"
    write_state(state, PARTS, unit_id="demo-u1", plant_file=str(plant), plant_hash=plant_sha256(plant),
                now=time.time())
    assert main(["state", "show", str(plant)]) == 0
    out = capsys.readouterr().out
    assert "twin run would restore it" in out and "steady windows seen: 7" in out
    assert "samples missing so far: 3" in out
    plant.write_text(plant.read_text() + "\n# edited\n")
    assert main(["state", "show", str(plant)]) == 0
    assert "would start fresh: the plant file changed" in capsys.readouterr().out
    assert main(["state", "show", "--json", str(plant)]) == 0
    assert json.loads(capsys.readouterr().out)["parts"] == PARTS
    # relearn-drift drops the drift charts only; everything else (and the header) stays
    assert main(["state", "relearn-drift", str(plant)]) == 0
    assert "next start learns a new baseline" in capsys.readouterr().out
    after = json.loads(state.read_text())
    assert after["parts"]["cycle"]["drift"] is None
    assert {k: v for k, v in after["parts"]["cycle"].items() if k != "drift"} == {
        k: v for k, v in PARTS["cycle"].items() if k != "drift"}
    assert after["parts"]["ingest"] == PARTS["ingest"]
    assert main(["state", "reset", str(plant)]) == 0
    assert capsys.readouterr().out.strip() == f"removed {state}"
    state.write_text("{torn")
    assert main(["state", "show", str(plant)]) == 1
    err = capsys.readouterr().err.splitlines()
    assert len(err) == 1 and "not a JSON state file" in err[0]


def _state(path: Path) -> dict:
    return json.loads(path.read_text())


@pytest.mark.broker
@pytest.mark.slow
def test_kill_9_and_restart_resumes_the_monitors(tmp_path: Path, mosquitto: Any) -> None:
    """A real ``twin run`` killed with SIGKILL resumes from its state file: counters continue, not restart."""
    feed = WallClockFeed(demo_config(), mosquitto)
    path, _ = _run_config(tmp_path, mosquitto, "state")
    path.write_text(path.read_text() + '\n[state]\nevery = "0 s"\n', encoding="utf-8")
    state = tmp_path / "demo-u1.state.json"
    procs = []
    try:
        p = twin("run", str(path), "--log-level", "DEBUG")
        procs.append(p)
        assert wait_for(lambda: p.has("event=state_fresh") or p.popen.poll() is not None, timeout=120), p.stderr[-20:]
        # several steady windows saved (the feed is steady plant data every 0.5 s)
        assert wait_for(lambda: (state.exists() and _state(state)["parts"]["cycle"]["steady_windows"] >= 3)
                        or p.popen.poll() is not None, timeout=180, step=0.2), p.stderr[-20:]
        before = _state(state)
        os.kill(p.popen.pid, signal.SIGKILL)  # no clean shutdown, no final write
        p.popen.wait(timeout=10)
        killed = _state(state)  # the file is whole: an atomic rename, never a torn write
        assert killed["parts"]["cycle"]["steady_windows"] >= before["parts"]["cycle"]["steady_windows"]
        p2 = twin("run", str(path), "--log-level", "DEBUG")
        procs.append(p2)
        assert wait_for(lambda: p2.has("event=state_restored") or p2.popen.poll() is not None, timeout=120), \
            p2.stderr[-20:]
        n0 = killed["parts"]["cycle"]["steady_windows"]
        assert wait_for(lambda: _state(state)["saved_at"] > killed["saved_at"] or p2.popen.poll() is not None,
                        timeout=120, step=0.1)
        after = _state(state)["parts"]
        # resumed: the first write after the restart carries the saved count on (a fresh start
        # counts from 0 and has at most 1 steady window after its first cycle)
        assert n0 >= 3 and after["cycle"]["steady_windows"] >= n0
        assert after["cycle"]["suspects"].keys() == killed["parts"]["cycle"]["suspects"].keys()
        assert after["ingest"]["sample_rates"]["period"].keys() >= killed["parts"]["ingest"]["sample_rates"][
            "period"].keys()
        print(f"steady windows: {n0} saved before kill -9, {after['cycle']['steady_windows']} after restart")
        p2.popen.send_signal(signal.SIGTERM)
        assert p2.popen.wait(timeout=30) == 0
    finally:
        for q in procs:
            if q.popen.poll() is None:
                q.popen.kill()
                q.popen.wait()
        feed.stop()
