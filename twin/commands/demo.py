"""``twin demo``: the live twin of the invented unit demo-u1, self-contained.

Starts an embedded MQTT broker (or uses ``--broker HOST:PORT``), a simulated
plant publishing its instruments (slow load changes, one transmitter that
develops a bias, a slow HP efficiency loss, an episode of cold cooling water
that lowers the back-pressure and wets the LP exhaust), the daemon and its
metrics endpoint, and prints a summary line per cycle.
"""

from __future__ import annotations

import argparse
import logging
import os
import sys
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from twin.commands._plant import load_plant

DEFAULT_CONFIG = Path(__file__).resolve().parents[2] / "configs" / "demo-u1.toml"

CAUTION = """\
CAUTION: twin is advisory monitoring only. It never trips, interlocks or operates equipment.
The default exhaust-moisture limits (10 % warning, 12 % alarm) are common practice, not
manufacturer limits. Defer to plant procedures, manufacturers' limits, local codes and
licensed engineers. demo-u1 is an invented unit; its data are simulated.
"""


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--config", default=str(DEFAULT_CONFIG), help="plant file (default: configs/demo-u1.toml)")
    parser.add_argument("--duration", type=float, default=None,
                        help="stop after this many wall-clock seconds (default: the whole scenario)")
    parser.add_argument("--speed", type=float, default=20.0, help="simulated seconds per real second (default 20)")
    parser.add_argument("--broker", default=None, metavar="HOST:PORT",
                        help="use an existing MQTT broker instead of the embedded one")
    parser.add_argument("--metrics-port", type=int, default=None, help="metrics port (default: config; 0 = any free)")
    parser.add_argument("--sample-interval", type=float, default=5.0,
                        help="simulated seconds between instrument readings (default 5)")
    parser.add_argument("--seed", type=int, default=1, help="noise seed (default 1)")
    parser.add_argument("--log-level", default="WARNING", choices=("DEBUG", "INFO", "WARNING", "ERROR"),
                        help="log level of the daemon's messages on stderr")


LEGEND_PLAIN = ("dev = actual − expected turbine heat rate in kJ/kWh (+ is worse) with its top causes; "
                "efficiencies and exhaust moisture in %; '-' = not available this window")


class SimMinute(logging.Filter):
    """Adds the demo's simulated minute (``sim_minute=``) to every log record."""

    def __init__(self, now: Callable[[], float], start: float) -> None:
        super().__init__()
        self.now, self.start = now, float(start)

    def filter(self, record: logging.LogRecord) -> bool:
        minute = round((self.now() - self.start) / 60.0, 2)
        fields = getattr(record, "twin_fields", None)
        if isinstance(fields, dict):
            record.twin_fields = {**fields, "sim_minute": minute}
        record.msg, record.args = f"{record.getMessage()} sim_minute={minute:.2f}", ()
        return True


def add_sim_minute(clock: Any, start: float) -> None:
    """Put the simulated minute on the log lines of every handler of the root logger."""
    for handler in logging.getLogger().handlers:
        handler.addFilter(SimMinute(clock.now, start))


def run(args: argparse.Namespace) -> int:
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    logging.basicConfig(level=getattr(logging, args.log_level), stream=sys.stderr,
                        format="%(asctime)s %(levelname)s %(name)s %(message)s")
    print(CAUTION, flush=True)
    if not args.speed > 0:
        print(f"twin demo: --speed {args.speed}: expected a positive factor", file=sys.stderr)
        return 2
    from twin.commands.run import install_stop_handlers

    config = load_plant("twin demo", args.config)
    if isinstance(config, int):
        return config
    if args.metrics_port is not None:
        config.metrics.port = args.metrics_port
    from twin.daemon import Daemon, DaemonOptions, ScaledClock, mqtt_settings_from_config
    from twin.demo.broker import BrokerStartError, EmbeddedBroker
    from twin.demo.simulator import Simulator

    stop = threading.Event()
    install_stop_handlers(stop)
    broker = None
    if args.broker:
        host, _, port = args.broker.rpartition(":")
        if not host or not port.isdigit():
            print(f"twin demo: --broker {args.broker!r}: expected HOST:PORT", file=sys.stderr)
            return 2
        import socket

        try:  # fail at the door: before the model is built, in one line
            socket.create_connection((host, int(port)), timeout=5).close()
        except (OSError, OverflowError) as exc:
            why = getattr(exc, "strerror", None) or str(exc)
            print(f"twin demo: cannot connect to MQTT broker {host}:{port}: {why}", file=sys.stderr)
            return 1
    else:
        broker = EmbeddedBroker()
        try:
            broker.start()
        except BrokerStartError as exc:
            print(f"twin demo: {exc}", file=sys.stderr)
            return 1
        host, port = "127.0.0.1", str(broker.port)
        print(f"embedded MQTT broker on {host}:{port} (MQTT 3.1.1)")
    base = mqtt_settings_from_config(config, {})
    from dataclasses import replace

    settings = replace(base, host=host, port=int(port), protocol="3.1.1")
    sim_settings = replace(settings, client_id=f"{settings.client_id}-simulator")
    start = time.time()
    print("building the model of demo-u1 (design point, reconciliation problem)...", flush=True)
    try:
        daemon = Daemon(config, clock=ScaledClock(start, args.speed), mqtt_settings=settings,
                        options=DaemonOptions(grace_seconds=config.monitoring.cycle))
        simulator = Simulator(config, client=sim_settings, speed=args.speed, rng_seed=args.seed,
                              sample_interval=args.sample_interval)
    except (ValueError, OSError) as exc:
        print(f"twin demo: {exc}", file=sys.stderr)
        if broker:
            broker.stop()
        return 1
    sim_start = simulator.start_time
    daemon.clock = ScaledClock(sim_start, args.speed)
    add_sim_minute(daemon.clock, sim_start)
    try:
        daemon.start()
    except OSError as exc:  # metrics port taken: fall back to any free port
        print(f"twin demo: metrics port {config.metrics.port} unavailable ({exc}); using a free port", file=sys.stderr)
        config.metrics.port = 0
        daemon.start()
    if daemon.mqtt is not None and not daemon.mqtt.wait_connected(15):
        print(f"twin demo: {daemon.mqtt.last_error or 'no connection to the MQTT broker'}", file=sys.stderr)
        daemon.stop()
        if broker:
            broker.stop()
        return 1
    if daemon.metrics is not None:
        print(f"metrics: http://{config.metrics.address}:{daemon.metrics.port}/metrics")
    scenario = simulator.scenario
    print(f"scenario: {scenario.duration / 60:.0f} simulated minutes at ×{args.speed:g} "
          f"({scenario.duration / args.speed / 60:.1f} real minutes); Ctrl-C stops\n", flush=True)
    sim_thread = threading.Thread(target=simulator.run, args=(scenario.duration, stop), daemon=True)
    sim_thread.start()
    deadline = time.monotonic() + (args.duration if args.duration else scenario.duration / args.speed + 5)

    def stop_at_deadline() -> None:
        stop.wait(max(deadline - time.monotonic(), 0))
        stop.set()

    watchdog = threading.Thread(target=stop_at_deadline, daemon=True)
    watchdog.start()
    from twin.demo.screen import DemoScreen, make_on_result, scenario_events

    screen = DemoScreen(config, sim_start, scenario.duration, scenario_events(scenario))
    if not screen.tty:
        print("one line per cycle; " + LEGEND_PLAIN, flush=True)
    try:
        daemon.run(stop, on_result=make_on_result(screen, stop.set))
    finally:
        stop.set()
        daemon.stop()
        sim_thread.join(timeout=5)
        if broker:
            broker.stop()
    print(f"\nsimulator published {simulator.stats.published} messages ({simulator.stats.dropped} dropped); "
          f"daemon received {daemon.ingestor.messages}")
    print(CAUTION)
    return 0
