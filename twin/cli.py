"""The ``twin`` command line: parses arguments and dispatches to one module per command.

Each command lives in ``twin.commands.<module>`` and provides
``add_arguments(parser)`` and ``run(args) -> int``. Modules are imported only when
their command runs, so ``twin check`` does not pay for paho-mqtt or prometheus.
"""

from __future__ import annotations

import argparse
import importlib
import json
import logging
import os
import signal
import sys
import threading

from twin import __version__
from twin.commands._text import HelpFormatter, uniform_metavars
from twin.units import rfc3339

# command name -> (module, one-line help)
COMMANDS: dict[str, tuple[str, str]] = {
    "check": ("twin.commands.check", "validate a plant config and print a summary"),
    "schema": ("twin.commands.schema", "print the JSON Schema of plant config files"),
    "heat-balance": ("twin.commands.heat_balance", "solve the forward heat balance"),
    "reconcile": ("twin.commands.reconcile", "reconcile one file of tag values"),
    "run": ("twin.commands.run", "run the live daemon against an MQTT broker"),
    "demo": ("twin.commands.demo", "run the self-contained live demo"),
    "diagram": ("twin.commands.diagram", "draw the cycle on T-s and h-s charts (PNG or SVG)"),
    "state": ("twin.commands.state", "show or reset the per-unit state file of twin run"),
    "simulate": ("twin.commands.simulate", "write the demo scenario as a historian export"),
    "backfill": ("twin.commands.backfill", "back-fill a historian span: reconciled series, events, OpenMetrics"),
    "bench": ("twin.commands.bench", "run a benchmark and print JSON figures"),
}


LOG_FORMATS = ("text", "json")


class TextFormatter(logging.Formatter):
    """``<RFC 3339 UTC time> <LEVEL> <logger> <message>``, one line per record."""

    def format(self, record: logging.LogRecord) -> str:
        line = f"{rfc3339(record.created)} {record.levelname} {record.name} {record.getMessage()}"
        if record.exc_info:
            line += " " + json.dumps(self.formatException(record.exc_info))  # keep it one line
        return line


class JsonFormatter(logging.Formatter):
    """One JSON object per line: ``time``, ``level``, ``logger``, ``event`` and the event's fields.

    Records from :func:`twin.daemon.log_event` carry their fields (``record.twin_fields``);
    any other record gives ``message``.
    """

    def format(self, record: logging.LogRecord) -> str:
        doc: dict[str, object] = {"time": rfc3339(record.created), "level": record.levelname,
                                  "logger": record.name}
        fields = getattr(record, "twin_fields", None)
        if isinstance(fields, dict):
            doc.update(fields)
        else:
            doc["message"] = record.getMessage()
        if record.exc_info:
            doc["exception"] = self.formatException(record.exc_info)
        return json.dumps(doc, default=str)


def setup_logging(level: str = "INFO", fmt: str = "text") -> None:
    """Log to stderr, one line per record, times in RFC 3339 UTC (``fmt`` text or json)."""
    if fmt not in LOG_FORMATS:
        raise ValueError(f"log format {fmt!r} is not one of {LOG_FORMATS}")
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(JsonFormatter() if fmt == "json" else TextFormatter())
    handler.set_name("twin")
    root = logging.getLogger()
    for old in [h for h in root.handlers if h.get_name() == "twin"]:  # ours from an earlier call only
        root.removeHandler(old)
    root.addHandler(handler)
    root.setLevel(getattr(logging, level))


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="twin",
        description="Live digital twin of a steam power plant's water-steam cycle "
        "(advisory monitoring only).",
    )
    parser.add_argument("--version", action="version", version=f"twin {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, (module_name, help_text) in COMMANDS.items():
        p = sub.add_parser(name, help=help_text, description=help_text, formatter_class=HelpFormatter)
        try:
            module = importlib.import_module(module_name)
        except ModuleNotFoundError as exc:
            if exc.name != module_name:
                raise
            p.set_defaults(_unavailable=name)
            continue
        module.add_arguments(p)
        p.add_argument("--log-format", choices=LOG_FORMATS, default="text",
                       help="log lines as text or one JSON object per line; times RFC 3339 UTC")
        _polish(p)
        p.set_defaults(_run=module.run)
    return parser


def _polish(parser: argparse.ArgumentParser) -> None:
    """One help style for a command and its sub-commands: defaults shown, upper-case metavars."""
    uniform_metavars(parser)
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for child in action.choices.values():
                child.formatter_class = HelpFormatter
                _polish(child)


def _exit_during_start_up(signum: int, frame: object) -> None:
    """SIGTERM/SIGINT before a command installs its own handlers: a clean exit, not a kill."""
    raise SystemExit(0 if signum == signal.SIGTERM else 128 + signum)


def main(argv: list[str] | None = None) -> int:
    # Small dense solves: threaded BLAS on 2-core machines is slower and erratic.
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    saved = {}
    if threading.current_thread() is threading.main_thread():
        for sig in (signal.SIGTERM, signal.SIGINT):
            saved[sig] = signal.signal(sig, _exit_during_start_up)
    try:
        return _main(argv)
    finally:
        for sig, handler in saved.items():
            signal.signal(sig, handler)


def _main(argv: list[str] | None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 2
    if getattr(args, "_unavailable", None):
        print(f"twin: command {args.command!r} is not available in this build", file=sys.stderr)
        return 2
    setup_logging(getattr(args, "log_level", "WARNING"), getattr(args, "log_format", "text"))
    try:
        return int(args._run(args) or 0)
    except BrokenPipeError:  # output piped into head/less that closed early
        sys.stderr.close()
        return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
