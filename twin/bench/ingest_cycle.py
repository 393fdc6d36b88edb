"""Cycle latency for ``twin bench ingest``: window close → result published on MQTT.

A :class:`twin.daemon.Daemon` for a plant file (default ``demo-u1``) runs
against the benchmark's broker on a manual clock. For each of K cycles the
simulated plant's readings for one window are published through the broker
(QoS 1, :class:`~twin.bench.ingest_publisher.BulkPublisher`) and received by
the daemon's own ingest path; then the window is closed with
``Daemon.run_cycle`` and a separate subscriber on the republish prefix waits
for every message that cycle published. Figures per cycle: the daemon's
compute time and the latency from the window close to the first and to the
last republished message [s]; then their median and maximum.
"""

from __future__ import annotations

import statistics
import threading
import time
from dataclasses import replace
from pathlib import Path
from typing import Any

from twin.bench.ingest_publisher import BulkPublisher
from twin.mqtt import MqttClient

T0 = 1_700_000_000.0  # simulated epoch of the first window [s]


class _Arrivals:
    def __init__(self) -> None:
        self.times: list[float] = []
        self.cond = threading.Condition()

    def __call__(self, topic: str, payload: bytes, now: float) -> None:
        t = time.perf_counter()
        with self.cond:
            self.times.append(t)
            self.cond.notify_all()

    def wait_count(self, n: int, timeout: float) -> bool:
        with self.cond:
            return self.cond.wait_for(lambda: len(self.times) >= n, timeout)


def _wait(predicate: Any, timeout: float) -> bool:
    deadline = time.monotonic() + timeout
    while not predicate():
        if time.monotonic() > deadline:
            return False
        time.sleep(0.002)
    return True


def cycle_latency(
    port: int, cycles: int, config_path: str | Path, timeout: float
) -> dict[str, Any]:
    """Run ``cycles`` windows through a daemon on the broker at 127.0.0.1:``port``."""
    # the daemon and the plant model are imported here: only this half needs them
    from twin.config import load_config
    from twin.daemon import Daemon, DaemonOptions, ManualClock, mqtt_settings_from_config
    from twin.demo.simulator import Simulator

    config = load_config(config_path)
    cycle_s = float(config.monitoring.cycle)
    window_s = float(config.monitoring.window or cycle_s)
    base = replace(
        mqtt_settings_from_config(config, {}),
        host="127.0.0.1",
        port=port,
        tls=False,
        tls_ca=None,
        tls_cert=None,
        tls_key=None,
        username=None,
        password=None,
        client_id="bench-daemon",
    )
    clock = ManualClock(T0)
    daemon = Daemon(
        config,
        clock=clock,
        mqtt_settings=base,
        options=DaemonOptions(metrics=False, grace_seconds=0.0),
    )
    simulator = Simulator(config, client=None, start_time=T0, rng_seed=1)
    arrivals = _Arrivals()
    watcher = MqttClient(replace(base, client_id="bench-daemon-watch"), arrivals)
    watcher.subscribe({f"{config.broker.republish_prefix}/#": 1})
    pub = None
    rows: list[dict[str, float]] = []
    try:
        daemon.start()
        watcher.start()
        assert daemon.mqtt is not None
        if not (daemon.mqtt.wait_connected(30) and watcher.wait_connected(30)):
            raise RuntimeError(f"daemon could not connect: {daemon.mqtt.last_error}")
        pub = BulkPublisher("127.0.0.1", port, "bench-daemon-feed", window=1000)
        # the daemon's subscriptions are in force once a first reading comes back
        probe = simulator.step(0.0)[:1]
        if not _wait(
            lambda: bool(pub.publish_all(probe)) and daemon.ingestor.messages > 0, timeout
        ):
            raise RuntimeError("the daemon received nothing")
        t_sim = 0.0
        t_end = T0 + window_s
        for _ in range(max(1, cycles)):
            messages: list[tuple[str, bytes]] = []
            while T0 + t_sim < t_end:
                messages += simulator.step(t_sim)
                t_sim += simulator.sample_interval
            goal = daemon.ingestor.messages + len(messages)
            pub.publish_all(messages)
            if not _wait(lambda goal=goal: daemon.ingestor.messages >= goal, timeout):
                raise RuntimeError("the daemon did not receive a window's readings")
            clock.t = t_end
            published0 = daemon.mqtt.stats().published
            seen0 = len(arrivals.times)
            t_close = time.perf_counter()
            result = daemon.run_cycle(t_end)
            t_computed = time.perf_counter()
            n_out = daemon.mqtt.stats().published - published0
            if n_out and not arrivals.wait_count(seen0 + n_out, timeout):
                raise RuntimeError("the republished results did not all arrive")
            times = arrivals.times[seen0 : seen0 + n_out]
            rows.append(
                {
                    "compute_seconds": result.compute_seconds,
                    "run_cycle_seconds": t_computed - t_close,
                    "first_published_seconds": (times[0] - t_close) if times else float("nan"),
                    "last_published_seconds": (times[-1] - t_close) if times else float("nan"),
                    "messages_published": float(n_out),
                    "messages_in_window": float(len(messages)),
                }
            )
            t_end += cycle_s  # the next window ends one cycle later (windows may overlap)
    finally:
        if pub is not None:
            pub.close()
        watcher.stop()
        daemon.stop()
    out: dict[str, Any] = {"cycles": len(rows), "window_seconds": window_s, "per_cycle": rows}
    for key in ("compute_seconds", "last_published_seconds"):
        values = [r[key] for r in rows]
        out[f"{key}_median"] = statistics.median(values)
        out[f"{key}_max"] = max(values)
    return out
