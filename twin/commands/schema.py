"""``twin schema``: print the JSON Schema of plant config files."""

from __future__ import annotations

import argparse
import json

from twin.config import json_schema


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--indent", type=int, default=2, help="JSON indent (default 2)")


def run(args: argparse.Namespace) -> int:
    print(json.dumps(json_schema(), indent=args.indent, sort_keys=True))
    return 0
