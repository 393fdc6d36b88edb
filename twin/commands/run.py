"""``twin run CONFIG``: the live daemon against the configured MQTT broker."""

from __future__ import annotations

import argparse
import json
import logging
import os
import signal
import sys
import threading

from twin.commands._plant import load_plant


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("config", help="plant configuration file (TOML)")
    parser.add_argument("--log-level", default="INFO", choices=("DEBUG", "INFO", "WARNING", "ERROR"),
                        help="log level (default INFO)")
    parser.add_argument("--no-republish", action="store_true", help="do not publish reconciled values on MQTT")
    parser.add_argument("--no-state", action="store_true",
                        help="neither restore nor write the [state] file (start fresh, keep nothing)")


def install_stop_handlers(stop: threading.Event) -> None:
    """SIGTERM and SIGINT set ``stop``; the daemon then shuts down within seconds."""
    def handler(signum: int, frame: object) -> None:
        stop.set()

    signal.signal(signal.SIGTERM, handler)
    signal.signal(signal.SIGINT, handler)


def _quiet_stop(daemon: object) -> None:
    """After a failed start: stop what did start (the metrics thread keeps the model alive otherwise)."""
    metrics = getattr(daemon, "metrics", None)
    if metrics is not None:
        metrics.stop()
    mqtt = getattr(daemon, "mqtt", None)
    if mqtt is not None:
        mqtt.stop()


def run(args: argparse.Namespace) -> int:
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    # before anything slow: a SIGTERM during start-up is a clean exit, not a kill
    stop = threading.Event()
    install_stop_handlers(stop)

    config = load_plant("twin run", args.config)
    if isinstance(config, int):
        return config
    # say something at once: the imports and the model build take seconds
    logging.getLogger("twin.run").info("event=starting unit=%s config=%s text=%s", config.unit.id,
                                       json.dumps(str(args.config)) if " " in str(args.config) else args.config,
                                       json.dumps("building the model and the reconciliation problem"))
    from twin.daemon import Daemon, DaemonOptions
    from twin.mqtt import MqttError

    if stop.is_set():
        return 0
    daemon = None
    try:
        daemon = Daemon(config, environ=os.environ,
                        options=DaemonOptions(republish=not args.no_republish,
                                              state=not args.no_state))
        if stop.is_set():
            return 0
        daemon.start()
    except (ValueError, OSError, MqttError) as exc:
        print(f"twin run: {args.config}: {exc}", file=sys.stderr)
        _quiet_stop(daemon)
        return 1
    except Exception as exc:  # e.g. the design point does not solve: still one line, no traceback
        print(f"twin run: {args.config}: cannot start: {type(exc).__name__}: {exc}", file=sys.stderr)
        _quiet_stop(daemon)
        return 1
    try:
        daemon.run(stop)
    finally:
        daemon.stop()
    return 0
