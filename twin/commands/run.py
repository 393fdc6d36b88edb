"""``twin run CONFIG``: the live daemon against the configured MQTT broker."""

from __future__ import annotations

import argparse
import logging
import os
import signal
import sys
import threading


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("config", help="plant configuration file (TOML)")
    parser.add_argument("--log-level", default="INFO", choices=("DEBUG", "INFO", "WARNING", "ERROR"),
                        help="log level (default INFO)")
    parser.add_argument("--no-republish", action="store_true", help="do not publish reconciled values on MQTT")


def setup_logging(level: str) -> None:
    """One line per event on stderr: time, level, logger, message (key=value fields)."""
    logging.basicConfig(level=getattr(logging, level), stream=sys.stderr,
                        format="%(asctime)s %(levelname)s %(name)s %(message)s")


def install_stop_handlers(stop: threading.Event) -> None:
    """SIGTERM and SIGINT set ``stop``; the daemon then shuts down within seconds."""
    def handler(signum: int, frame: object) -> None:
        stop.set()

    signal.signal(signal.SIGTERM, handler)
    signal.signal(signal.SIGINT, handler)


def run(args: argparse.Namespace) -> int:
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    setup_logging(args.log_level)
    from twin.config import ConfigError, load_config

    try:
        config = load_config(args.config)
    except FileNotFoundError:
        print(f"twin run: {args.config}: no such file", file=sys.stderr)
        return 2
    except ConfigError as exc:
        print(str(exc), file=sys.stderr)
        return 1
    from twin.daemon import Daemon, DaemonOptions

    stop = threading.Event()
    install_stop_handlers(stop)
    try:
        daemon = Daemon(config, environ=os.environ,
                        options=DaemonOptions(republish=not args.no_republish))
        daemon.start()
    except (ValueError, OSError) as exc:
        print(f"twin run: {args.config}: {exc}", file=sys.stderr)
        return 1
    try:
        daemon.run(stop)
    finally:
        daemon.stop()
    return 0
