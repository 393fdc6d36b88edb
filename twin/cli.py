"""The ``twin`` command line: parses arguments and dispatches to one module per command.

Each command lives in ``twin.commands.<module>`` and provides
``add_arguments(parser)`` and ``run(args) -> int``. Modules are imported only when
their command runs, so ``twin check`` does not pay for paho-mqtt or prometheus.
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys

from twin import __version__
from twin.commands._text import HelpFormatter, uniform_metavars

# command name -> (module, one-line help)
COMMANDS: dict[str, tuple[str, str]] = {
    "check": ("twin.commands.check", "validate a plant config and print a summary"),
    "schema": ("twin.commands.schema", "print the JSON Schema of plant config files"),
    "heat-balance": ("twin.commands.heat_balance", "solve the forward heat balance"),
    "reconcile": ("twin.commands.reconcile", "reconcile one file of tag values"),
    "run": ("twin.commands.run", "run the live daemon against an MQTT broker"),
    "demo": ("twin.commands.demo", "run the self-contained live demo"),
    "diagram": ("twin.commands.diagram", "draw the cycle on T-s and h-s charts (PNG or SVG)"),
    "bench": ("twin.commands.bench", "run a benchmark and print JSON figures"),
}


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


def main(argv: list[str] | None = None) -> int:
    # Small dense solves: threaded BLAS on 2-core machines is slower and erratic.
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 2
    if getattr(args, "_unavailable", None):
        print(f"twin: command {args.command!r} is not available in this build", file=sys.stderr)
        return 2
    try:
        return int(args._run(args) or 0)
    except BrokenPipeError:  # output piped into head/less that closed early
        sys.stderr.close()
        return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
