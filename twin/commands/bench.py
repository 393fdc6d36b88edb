"""``twin bench WHAT``: run one shipped benchmark and print its figures as JSON.

Each benchmark lives in ``twin.bench.<module>`` and provides
``add_arguments(parser)`` and ``run(args) -> dict``.
"""

from __future__ import annotations

import argparse
import importlib
import json
import os
import sys

BENCHMARKS: dict[str, str] = {
    "properties": "twin.bench.properties",
    "heat-balance": "twin.bench.heat_balance",
    "reconcile": "twin.bench.reconcile",
    "ingest": "twin.bench.ingest",
    "backfill": "twin.bench.backfill",
    "sparkplug": "twin.bench.sparkplug",
}


def add_arguments(parser: argparse.ArgumentParser) -> None:
    sub = parser.add_subparsers(dest="benchmark", metavar="WHAT", required=True)
    for name, module_name in BENCHMARKS.items():
        p = sub.add_parser(name, help=f"benchmark: {name}")
        try:
            module = importlib.import_module(module_name)
        except ModuleNotFoundError as exc:
            if exc.name != module_name:
                raise
            p.set_defaults(_bench=None)
            continue
        module.add_arguments(p)
        p.set_defaults(_bench=module.run)


def run(args: argparse.Namespace) -> int:
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    if args._bench is None:
        print(f"twin bench: {args.benchmark!r} is not available in this build", file=sys.stderr)
        return 2
    config = getattr(args, "config", None)
    if isinstance(config, str):  # a plant file that cannot be used: one line, not a traceback from inside
        from twin.commands._plant import load_plant

        loaded = load_plant(f"twin bench {args.benchmark}", config)
        if isinstance(loaded, int):
            return loaded
    figures = args._bench(args)
    print(json.dumps(figures, indent=2, sort_keys=True))
    return 0
