"""`twin bench ingest` end to end on a small run: zero loss for both subscribers, JSON figures."""

from __future__ import annotations

import argparse
import json
import shutil

import pytest

from twin.bench import ingest as bench

pytestmark = [pytest.mark.broker, pytest.mark.slow]


def _args(*argv: str) -> argparse.Namespace:
    parser = argparse.ArgumentParser()
    bench.add_arguments(parser)
    return parser.parse_args(list(argv))


@pytest.mark.parametrize("mode", ["backlog", "live"])
def test_bench_small_run_loses_nothing(mode, monkeypatch):
    if shutil.which("mosquitto") is None and shutil.which("/usr/sbin/mosquitto") is None:
        pytest.skip("mosquitto is not installed (apt-get install mosquitto mosquitto-clients)")
    seen = {}

    def hook(store, topic_map, args):
        seen["tags"] = len(store.tags)
        return {"hooked": True}

    monkeypatch.setattr(bench, "CYCLE_HOOK", hook)
    n = 1500
    figures = bench.run(
        _args("--messages", str(n), "--topics", "15", "--mode", mode, "--inflight", "50")
    )
    json.dumps(figures)  # printable as JSON
    assert figures["twin_received"] == n and figures["twin_lost"] == 0
    assert figures["twin_samples_stored"] == n and figures["twin_rejections"] == 0
    assert figures["publisher_unacknowledged"] == 0
    if shutil.which("mosquitto_sub"):
        assert figures["mosquitto_sub_complete"] is True
        assert figures["twin_to_mosquitto_sub_ratio"] > 0
    assert figures["cycle"] == {"hooked": True} and seen["tags"] == 15
    # every configuration read the same stream without loss, each with its own figures
    assert set(figures["configurations"]) == set(bench.CONFIGURATIONS)
    for name, summary in figures["configurations"].items():
        assert summary["lost"] == 0, name
        (r,) = summary["runs"]
        assert r["twin_received"] == n and r["twin_samples_stored"] == n, name
        assert r["twin_callback_errors"] == 0 and r["twin_messages_per_second"] > 0, name
    assert figures["reported_configuration"] == bench.DEFAULT_CONFIGURATION


def test_bench_rejects_unknown_configuration():
    with pytest.raises(SystemExit, match="unknown configurations"):
        bench.run(_args("--configs", "batched,fastest"))


def test_bench_cycle_latency_through_a_daemon():
    """The cycle half: a daemon closes windows of simulated readings fed through Mosquitto."""
    if shutil.which("mosquitto") is None and shutil.which("/usr/sbin/mosquitto") is None:
        pytest.skip("mosquitto is not installed (apt-get install mosquitto mosquitto-clients)")
    figures = bench.run(
        _args(
            "--messages", "500", "--topics", "5", "--configs", "batched",
            "--no-mosquitto-sub", "--cycles", "2",
        )
    )  # fmt: skip
    cycle = figures["cycle"]
    assert cycle["cycles"] == 2 and len(cycle["per_cycle"]) == 2
    for row in cycle["per_cycle"]:
        # every reading of the window reached the daemon, and the cycle republished results
        assert row["messages_in_window"] > 0 and row["messages_published"] > 0
        # causality: published after computing began, the last no earlier than the first
        assert 0 < row["compute_seconds"] <= row["run_cycle_seconds"]
        assert 0 < row["first_published_seconds"] <= row["last_published_seconds"]
    assert cycle["last_published_seconds_max"] >= cycle["last_published_seconds_median"]
