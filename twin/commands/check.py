"""``twin check CONFIG``: validate a plant config and print a summary.

Exit status 0 when valid, 1 when the file has problems (one line each on
stderr), 2 when the file cannot be read.

The output is a sequence of report sections. Each report is a function
``(config) -> list[str]`` listed in :data:`REPORTS`; a new section (for example
a redundancy report) is added by appending its function there.
"""

from __future__ import annotations

import argparse
from collections import Counter
from collections.abc import Callable

from twin.commands._plant import load_plant
from twin.commands._text import no_negative_zero
from twin.config import PlantConfig

Report = Callable[[PlantConfig], list[str]]


def _counts(counter: Counter[str]) -> str:
    return ", ".join(f"{name} {n}" for name, n in sorted(counter.items())) or "none"


def summary_report(cfg: PlantConfig) -> list[str]:
    """Unit, flowsheet size, sensors by quantity, services."""
    u, b, m, mon = cfg.unit, cfg.broker, cfg.metrics, cfg.monitoring
    if u.barometric_tag:
        baro = f"tag {u.barometric_tag} (fallback {u.barometric_pressure:.0f} Pa)"
    elif u.barometric_pressure is not None:
        baro = f"{u.barometric_pressure:.0f} Pa"
    else:
        baro = "not configured"
    tls = "tls" if b.tls is not None else "plain"
    auth = f", user {b.username}" if b.username else ""
    return [
        f"unit: {u.id} ({u.name}); barometric pressure: {baro}",
        f"streams: {len(cfg.streams)}",
        f"equipment: {len(cfg.equipment)} ({_counts(Counter(e.kind for e in cfg.equipment))})",
        f"sections: {', '.join(s.id for s in cfg.sections) or 'none'}",
        f"sensors: {len(cfg.sensors)} ({_counts(Counter(s.quantity for s in cfg.sensors))})",
        f"broker: {b.host}:{b.port} MQTT {b.protocol} {tls}{auth}, client id {b.client_id}, "
        f"qos {b.qos}, republish under {b.republish_prefix}/",
        f"metrics: {'https' if m.tls is not None else 'http'}://{m.address}:{m.port}/metrics"
        + (" (client certificates required)" if m.tls is not None and m.tls.client_ca_file else ""),
        f"state file: {cfg.state.file if cfg.state.enabled else 'off'}",
        f"monitoring: cycle {mon.cycle:g} s, window {mon.window:g} s, "
        f"steady signals {len(mon.steady_signals)}",
    ]


def redundancy_section(cfg: PlantConfig) -> list[str]:
    """Per tag redundancy and detectable bias; per KPI observability and expected uncertainty."""
    from twin.performance.redundancy import redundancy_report  # CoolProp: imported on use

    return redundancy_report(cfg)


# Report sections printed in order after a successful load.
REPORTS: list[Report] = [summary_report, redundancy_section]


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("config", metavar="CONFIG", help="plant config file (TOML)")
    parser.add_argument("--summary-only", action="store_true", help="skip the redundancy report (no model solve)")


def run(args: argparse.Namespace) -> int:
    cfg = load_plant("twin check", args.config)
    if isinstance(cfg, int):
        return cfg
    print(f"{cfg.source_path}: OK")
    for report in REPORTS[:1] if getattr(args, "summary_only", False) else REPORTS:
        print()
        for line in report(cfg):
            print(no_negative_zero(line))
    return 0
