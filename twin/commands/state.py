"""``twin state show|reset CONFIG``: the per-unit state file that lets a restart resume.

``show`` prints what the file holds and whether ``twin run`` would restore it
(``--json``: the whole document); ``reset`` deletes it, so the next start is
fresh; ``relearn-drift`` keeps everything but the drift charts, so the next start
learns a new baseline over a new reference period (after an overhaul changed the
as-built performance, say). Stop ``twin run`` first: a running daemon rewrites the file. Exit status 0 on success, 1 when there is no usable file or it cannot
be read or deleted (one line on stderr), 2 when the plant file cannot be read.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from typing import Any

from twin.commands._plant import load_plant


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("action", choices=("show", "reset", "relearn-drift"),
                        help="show the state file, delete it, or drop only its drift charts")
    parser.add_argument("config", metavar="CONFIG", help="plant config file (TOML)")
    parser.add_argument("--json", action="store_true", help="show: print the whole state document as JSON")


def _summary(parts: dict[str, Any]) -> list[str]:
    cycle = parts.get("cycle") or {}
    out = [f"steady windows seen: {cycle.get('steady_windows', 'n/a')}",
           f"reconciliation warm start: {'yes' if cycle.get('warm_start') else 'no'}"]
    for name in ("steady", "moisture_alarm", "suspects", "drift"):
        part = cycle.get(name)
        out.append(f"{name}: {'saved' if part is not None else 'not saved'}")
    eff = cycle.get("efficiency_alarms") or {}
    out.append(f"efficiency alarms: {', '.join(sorted(eff)) or 'none'}")
    rates = (parts.get("ingest") or {}).get("sample_rates") or {}
    missing = rates.get("missing") or {}
    out.append(f"learned sample periods: {len(rates.get('period') or {})} tags; "
               f"samples missing so far: {sum(int(v) for v in missing.values())}")
    return out


def run(args: argparse.Namespace) -> int:
    from twin.state import StateError, plant_sha256, read_state, reset_state, usable, write_state
    from twin.units import rfc3339

    config = load_plant("twin state", args.config)
    if isinstance(config, int):
        return config
    path = config.state.file
    assert path is not None  # resolved at load
    try:
        if args.action == "reset":
            print(f"removed {path}" if reset_state(path) else f"no state file at {path}; nothing to remove")
            return 0
        try:
            saved = read_state(path)
        except FileNotFoundError:
            print(f"twin state: no state file at {path}", file=sys.stderr)
            return 1
        if args.action == "relearn-drift":
            parts = dict(saved.parts)
            cycle = dict(parts.get("cycle") or {})
            had = cycle.get("drift") is not None
            cycle["drift"] = None
            parts["cycle"] = cycle
            write_state(path, parts, unit_id=saved.unit_id, plant_file=saved.plant_file,
                        plant_hash=saved.plant_sha256, now=saved.saved_at)
            print(f"drift charts dropped from {path}; the next start learns a new baseline" if had
                  else f"no drift charts in {path}; the next start learns a baseline anyway")
            return 0
        if args.json:
            print(json.dumps(json.loads(path.read_text(encoding="utf-8")), indent=2))
            return 0
        now = time.time()
        why = usable(saved, unit_id=config.unit.id, plant_hash=plant_sha256(args.config), now=now,
                     max_age=float(config.state.max_age))
        print(f"state file: {path}")
        print(f"unit: {saved.unit_id}; plant file: {saved.plant_file} (sha256 {saved.plant_sha256[:12]})")
        print(f"saved at {rfc3339(saved.saved_at)} ({saved.age(now):.0f} s ago)")
        print("twin run would restore it" if why is None else f"twin run would start fresh: {why}")
        for line in _summary(dict(saved.parts)):
            print(line)
        return 0
    except StateError as exc:
        print(f"twin state: {exc}", file=sys.stderr)
        return 1
