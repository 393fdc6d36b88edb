"""``twin reconcile CONFIG VALUES``: reconcile one file of tag values and print the report."""

from __future__ import annotations

import argparse
import json
import math
import sys
from typing import Any

from twin.commands._plant import load_plant, load_values

CAUTION = (
    "Advisory results only: not for protection or control; defer to plant procedures, "
    "manufacturers' limits, local codes and licensed engineers."
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("config", help="plant configuration file (TOML)")
    parser.add_argument("values", help="tag values in engineering units: CSV 'tag,value' or JSON {tag: value}")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.add_argument("--max-eliminations", type=int, default=3, help="bound on serially eliminated suspects (default 3)")
    parser.add_argument("--alpha", type=float, default=0.05, help="family-wise significance of the measurement test (default 0.05)")


# KPI display: name -> (scale, unit label); values are SI
_KPI_DISPLAY = {
    "W": (1e-6, "MW"),
    "ratio": (100.0, "%"),
    "K": (1.0, "K"),
    "Pa": (1e-3, "kPa"),
    "kg/s": (1.0, "kg/s"),
}


def _num(x: float) -> float | None:
    return float(x) + 0.0 if isinstance(x, float | int) and math.isfinite(x) else None  # + 0.0: no -0.0


def _estimate(e: Any) -> dict[str, Any]:
    """One estimate: value, U95, status (reconciled / model_based / unavailable), soft-relation share."""
    return {"value": _num(e.value), "uncertainty_95": _num(e.uncertainty), "available": e.available,
            "status": e.status, "soft_share": _num(e.soft_share)}


def report(config: Any, vf: Any, rec: Any, reconciler: Any) -> dict[str, Any]:
    """The reconciliation as a JSON-ready dict (tags in engineering units, KPIs in SI)."""
    sensors = {s.tag: s for s in config.sensors}
    tags = {}
    for tag, t in rec.tags.items():
        s = sensors[tag]
        conv = s.conversion

        def eng(v: float, conv: Any = conv) -> float | None:
            return _num(float(conv.from_si(v))) if math.isfinite(v) else None

        tags[tag] = {
            "unit": s.unit,
            "measured": _num(vf.raw.get(tag, math.nan)),
            "reconciled": eng(t.reconciled),
            "reconciled_uncertainty": _num(1.96 * t.reconciled_sigma * abs(1 / conv.scale)) if math.isfinite(t.reconciled_sigma) else None,
            "adjustment": _num(t.adjustment / conv.scale) if math.isfinite(t.adjustment) else None,
            "normalised_adjustment": _num(t.normalised_adjustment),
            "redundancy": _num(t.redundancy),
            "suspect": t.suspect,
            "flagged_vdi": t.flagged_vdi,
            "valid": t.valid,
            "reason": t.reason,
        }
    return {
        "unit_id": config.unit.id,
        "status": rec.status,
        "message": rec.message,
        "iterations": rec.iterations,
        "global_test": {"statistic": _num(rec.global_test), "dof": rec.dof, "critical_95": _num(rec.global_test_critical),
                        "p_value": _num(rec.p_value), "passed": bool(rec.global_test <= rec.global_test_critical) if rec.converged else None},
        "suspects": list(rec.suspects),
        "model_suspects": list(rec.model_suspects),
        "depends_on": list(rec.depends_on),
        "input_errors": vf.errors,
        "tags": tags,
        "unmeasured": {k: _estimate(e) for k, e in rec.unmeasured.items()},
        "kpis": {k: _estimate(e) for k, e in rec.kpis.items()},
        "kpi_units": {d.name: d.unit for d in reconciler.kpi_defs},
    }


def _share(e: dict[str, Any]) -> str:
    return "-" if e["soft_share"] is None else f"{e['soft_share']:4.0%}"


def _marker(e: dict[str, Any]) -> str:
    return "  MODEL-BASED (its instruments are invalid: the model relations carry it)" \
        if e["status"] == "model_based" else ""


def _print_text(r: dict[str, Any]) -> None:
    w = sys.stdout.write
    w(f"Reconciliation of {r['unit_id']}: {r['status']} ({r['message']})\n{CAUTION}\n\n")
    for e in r["input_errors"]:
        w(f"input: {e}\n")
    g = r["global_test"]
    if r["status"] == "converged":
        verdict = "passed" if g["passed"] else "FAILED"
        w(f"global test γ = {g['statistic']:.2f}, {g['dof']} degrees of freedom, 95 % limit {g['critical_95']:.2f}: {verdict}\n\n")
    w(f"{'tag':<12} {'unit':<7} {'measured':>11} {'reconciled':>11} {'±95%':>8} {'adjust':>9} {'z':>6} {'redund':>6}  flag\n")

    def f(x: float | None, fmt: str) -> str:
        return format(x, fmt) if x is not None else "-".rjust(int(fmt.split(".")[0]))

    for tag, t in r["tags"].items():
        flag = "SUSPECT" if t["suspect"] else ("z>1.96" if t["flagged_vdi"] else "")
        if not t["valid"]:
            flag = f"excluded: {t['reason']}"
        w(f"{tag:<12} {t['unit']:<7} {f(t['measured'], '11.4f')} {f(t['reconciled'], '11.4f')} "
          f"{f(t['reconciled_uncertainty'], '8.4f')} {f(t['adjustment'], '9.4f')} {f(t['normalised_adjustment'], '6.2f')} "
          f"{f(t['redundancy'], '6.3f')}  {flag}\n")
    w(f"\nsuspect instruments: {', '.join(r['suspects']) or 'none'}\n")
    if r["model_suspects"]:
        w(f"model relations disagreeing with the data: {', '.join(r['model_suspects'])}\n")
    w("\nz = adjustment / σ(adjustment), adjustment = measured − reconciled; '-': not redundant (not tested)\n")
    w("\nunmeasured estimates (±95 %; soft: share of the variance from model relations)\n")
    for k, e in r["unmeasured"].items():
        if e["available"]:
            scale, unit = (1e-3, "kJ/kg") if k.endswith("enthalpy") else (1.0, "")
            w(f"  {k:<34} {e['value'] * scale:12.4f} ± {e['uncertainty_95'] * scale:.4f} {unit:<6} "
              f"soft {_share(e)}{_marker(e)}\n")
        else:
            w(f"  {k:<34} unobservable\n")
    w("\nKPIs (±95 %; soft: share of the variance from model relations)\n")
    for k, e in r["kpis"].items():
        scale, unit = _KPI_DISPLAY.get(r["kpi_units"].get(k, ""), (1.0, ""))
        if k.endswith("heat_rate"):
            scale, unit = 3600.0, "kJ/kWh"
        if e["available"]:
            w(f"  {k:<36} {e['value'] * scale:12.4f} ± {e['uncertainty_95'] * scale:.4f} {unit:<6} "
              f"soft {_share(e)}{_marker(e)}\n")
        else:
            w(f"  {k:<36} unavailable (unobservable)\n")
    w(f"\nresults depend on the model relations: {', '.join(r['depends_on'])}\n")
    from twin.commands._deviation import print_deviation

    print_deviation(r)


def run(args: argparse.Namespace) -> int:
    config = load_plant("twin reconcile", args.config)
    if isinstance(config, int):
        return config
    vf = load_values("twin reconcile", args.values, config)  # errors reported; the exit status says so
    if isinstance(vf, int):
        return vf
    from twin.performance.plant_reconcile import PlantReconciler

    reconciler = PlantReconciler(config, alpha=args.alpha, max_eliminations=args.max_eliminations)
    rec = reconciler.reconcile(vf.values, excluded=vf.excluded)
    r = report(config, vf, rec, reconciler)
    from twin.commands._deviation import deviation_report

    r.update(deviation_report(config, reconciler, rec))
    if args.json:
        print(json.dumps(r, indent=1))
    else:
        from twin.commands._text import print_text

        print_text(_print_text, r)
    return 0 if rec.converged and not vf.errors else 1
