"""``twin diagram CONFIG [VALUES] [--load F] -o FILE.png|.svg``: the cycle on T–s and h–s charts.

Without VALUES: the forward heat balance at ``--load`` (design point at 1.0), with the
design point faint behind it off design. With VALUES (a file of tag values as for
``twin reconcile``): the reconciled cycle, with the expected cycle at the reconciled
load and cooling-water temperature faint behind it, and the reconciled temperatures'
95 % uncertainty bars. Needs matplotlib (``pip install 'twin[plot]'``).
"""

from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path

from twin.commands._plant import load_plant, load_values


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("config", help="plant configuration file (TOML)")
    parser.add_argument("values", nargs="?", default=None,
                        help="tag values to reconcile (CSV 'tag,value' or JSON); without it, the heat balance")
    parser.add_argument("--load", type=float, default=1.0,
                        help="main-steam flow / design flow for the heat balance, 0.2 to 1.2 (ignored with VALUES)")
    parser.add_argument("-o", "--output", required=True, metavar="FILE", help="output file, .png or .svg")


def run(args: argparse.Namespace) -> int:
    out = Path(args.output)
    fmt = out.suffix.lower().lstrip(".")
    if fmt not in ("png", "svg"):
        print(f"twin diagram: -o {args.output}: expected a file name ending in .png or .svg", file=sys.stderr)
        return 2
    import importlib.util

    if importlib.util.find_spec("matplotlib") is None:
        print("twin diagram: needs matplotlib: pip install 'twin[plot]'", file=sys.stderr)
        return 2

    config = load_plant("twin diagram", args.config)
    if isinstance(config, int):
        return config
    from twin import diagram
    from twin.model.solve import SolveError

    mon = config.monitoring
    limits = (mon.exhaust_moisture_warn, mon.exhaust_moisture_alarm)
    expected = diagram.ExpectedCycle(config)
    try:
        if args.values is None:
            if not 0.2 <= args.load <= 1.2:
                print(f"twin diagram: --load {args.load}: expected a fraction within 0.2..1.2", file=sys.stderr)
                return 2
            from twin.commands.heat_balance import solve

            design, hb = solve(config, args.load)
            drawing = diagram.cycle_drawing(config, expected._states(hb))
            reference = diagram.cycle_drawing(config, expected._states(design)) if args.load != 1.0 else None
            fig = diagram.draw(drawing, reference=reference, limits=limits, label=f"heat balance at load {args.load:g}",
                               reference_label="design point",
                               title=f"{config.unit.id} · forward heat balance at load {100 * args.load:.0f} %")
        else:
            from twin.performance.plant_reconcile import PlantReconciler

            vf = load_values("twin diagram", args.values, config)
            if isinstance(vf, int):
                return vf
            rec = PlantReconciler(config).reconcile(vf.values, excluded=vf.excluded)
            if not rec.converged:
                print(f"twin diagram: {args.values}: reconciliation {rec.status} ({rec.message}); nothing drawn",
                      file=sys.stderr)
                return 1
            unc: dict[str, float] = {}
            for s in config.sensors:
                t = rec.tags.get(s.tag)
                if s.quantity == "temperature" and s.stream and t is not None and math.isfinite(t.reconciled_sigma):
                    unc[s.stream] = min(unc.get(s.stream, math.inf), 1.96 * t.reconciled_sigma)
            drawing = diagram.cycle_drawing(config, {k: (v.pressure, v.enthalpy) for k, v in rec.streams.items()}, unc)
            load_est = rec.kpis.get("load_fraction")
            load = load_est.value if load_est is not None and load_est.available else math.nan
            cw = [rec.tags[s.tag].reconciled for s in config.sensors
                  if s.quantity == "cooling_water_inlet_temperature" and s.tag in rec.tags
                  and math.isfinite(rec.tags[s.tag].reconciled)]
            reference = (diagram.cycle_drawing(config, expected.at(load, sum(cw) / len(cw) if cw else None))
                         if math.isfinite(load) else None)
            fig = diagram.draw(drawing, reference=reference, limits=limits, label="reconciled",
                               reference_label=f"expected at load {100 * load:.0f} %",
                               title=f"{config.unit.id} · reconciled from {Path(args.values).name}")
    except (SolveError, ValueError) as exc:
        print(f"twin diagram: {args.config}: {exc}", file=sys.stderr)
        return 1
    try:
        out.write_bytes(diagram.render(fig, fmt))
    except OSError as exc:
        print(f"twin diagram: cannot write {out}: {exc.strerror or exc}", file=sys.stderr)
        return 2
    print(f"{out}: T–s and h–s diagram of {config.unit.id} ({len(drawing.points)} stream states)")
    return 0
