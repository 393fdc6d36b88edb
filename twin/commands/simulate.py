"""``twin simulate CONFIG --hours N --out FILE``: the demo scenario as a historian export."""

from __future__ import annotations

import argparse
import sys
import time
from datetime import datetime

from twin.commands._plant import load_plant

DEFAULT_START = "2026-01-05T00:00:00Z"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("config", help="plant file (the demo scenario needs equipment 'hp' and 'condenser', "
                                       "e.g. configs/demo-u1.toml)")
    parser.add_argument("--hours", type=float, required=True, help="simulated span [h]")
    parser.add_argument("--out", required=True, help="output file: .csv, .csv.gz or .parquet")
    parser.add_argument("--start", default=DEFAULT_START, help=f"RFC 3339 time of scenario start (default {DEFAULT_START})")
    parser.add_argument("--sample-interval", type=float, default=5.0, help="seconds between readings (default 5)")
    parser.add_argument("--model-interval", type=float, default=15.0,
                        help="simulated seconds between forward solves of the truth (default 15)")
    parser.add_argument("--layout", choices=("long", "wide"), default="long", help="long: timestamp,tag,value,quality; "
                        "wide: timestamp,<TAG>,... (default long)")
    parser.add_argument("--timestamps", choices=("rfc3339", "epoch_s", "epoch_ms"), default="rfc3339",
                        help="timestamp kind written (default rfc3339, UTC)")
    parser.add_argument("--seed", type=int, default=1, help="noise seed (default 1)")


def parse_time(text: str, what: str) -> float:
    """RFC 3339 text (offset required) or epoch seconds → Unix seconds; ValueError naming ``what``."""
    try:
        return float(text)
    except ValueError:
        pass
    try:
        dt = datetime.fromisoformat(text.strip().replace("z", "Z").replace("Z", "+00:00"))
    except ValueError:
        raise ValueError(f"{what} {text!r}; expected RFC 3339 with an offset (2026-01-05T00:00:00Z) "
                         "or epoch seconds") from None
    if dt.tzinfo is None:
        raise ValueError(f"{what} {text!r} has no zone offset; expected e.g. {text}Z")
    return dt.timestamp()


def run(args: argparse.Namespace) -> int:
    try:
        start = parse_time(args.start, "--start")
    except ValueError as exc:
        print(f"twin simulate: {exc}", file=sys.stderr)
        return 2
    config = load_plant("twin simulate", args.config)  # a ConfigError is a ValueError: load it apart
    if isinstance(config, int):
        return config
    from twin.demo.history import write_history
    from twin.history.writers import table_format

    try:
        table_format(args.out)
    except ValueError as exc:
        print(f"twin simulate: --out {exc}", file=sys.stderr)
        return 2
    t0 = time.monotonic()
    tty = sys.stderr.isatty()

    def progress(done: int, total: int) -> None:
        if tty:
            print(f"\rsimulating: {done}/{total} steps", end="", file=sys.stderr, flush=True)

    try:
        w = write_history(config, args.out, hours=args.hours, start=start, sample_interval=args.sample_interval,
                          seed=args.seed, layout=args.layout, timestamps=args.timestamps,
                          model_interval=args.model_interval, progress=progress)
    except (ValueError, OSError) as exc:
        print(f"\ntwin simulate: {exc}", file=sys.stderr)
        return 1
    if tty:
        print(file=sys.stderr)
    print(f"wrote {w.path}: {w.samples} samples ({w.rows} rows, {args.layout}) of {config.unit.id} over "
          f"{args.hours:g} h from {args.start} every {args.sample_interval:g} s in {time.monotonic() - t0:.1f} s "
          "(simulated data: demo scenario with noise, the FW-F1 bias and the HP efficiency drift)")
    return 0
