"""Expected values and the heat-rate deviation by cause in ``twin reconcile`` (JSON and text)."""

from __future__ import annotations

import math
import sys
from typing import Any

from twin.performance.kpi import BTU_PER_KWH, KJ_PER_KWH

BASIS = "turbine-cycle gross heat rate (heat input to the cycle / generator output, ASME PTC 6 convention)"


def _num(x: float) -> float | None:
    return float(x) + 0.0 if isinstance(x, float | int) and math.isfinite(x) else None


def deviation_report(config: Any, reconciler: Any, rec: Any) -> dict[str, Any]:
    """``expected`` ({KPI: value} [SI], names as in ``kpis``) and ``heat_rate_deviation`` of one window.

    ``heat_rate_deviation`` = ``{"total": ratio, "by_cause": {cause: ratio, ..., "unaccounted": ratio},
    "status", "basis", "fuel_basis", "fuel_power_by_cause" [W], "cost_per_hour_by_cause", "currency"}``;
    ratios are dimensionless (×3600 = kJ/kWh).
    """
    from twin.performance.expected import ExpectedModel, window_deviation

    model = ExpectedModel.from_config(config, reconciler.fs, reconciler.op, reconciler.design, reconciler.settings)
    cols = reconciler.system.cooling_water_columns
    cw = None
    if cols and rec.z is not None:
        v = float(rec.z[next(iter(cols.values()))[0]])
        cw = v if math.isfinite(v) else None
    d = window_deviation(model, rec, cw)
    perf = config.performance
    return {
        "expected": {k: _num(v) for k, v in d.expected.items()},
        "heat_rate_deviation": {
            "total": _num(d.total),
            "by_cause": {k: _num(v) for k, v in d.by_cause.items()},
            "status": d.status,
            "basis": BASIS,
            "pressure_control": perf.pressure_control,
            "fuel_basis": perf.fuel_basis,
            "fuel_power_by_cause": {k: _num(v) for k, v in d.fuel_power_by_cause.items()},
            "cost_per_hour_by_cause": {k: _num(v) for k, v in d.cost_per_hour_by_cause.items()},
            "currency": perf.currency,
        },
    }


def print_deviation(r: dict[str, Any]) -> None:
    """The split as a table: kJ/kWh, Btu/kWh, fuel MW and cost per hour."""
    w = sys.stdout.write
    hd = r.get("heat_rate_deviation")
    if not hd:
        return
    w(f"\nheat-rate deviation, actual − expected ({hd['basis']}; {hd['pressure_control']} pressure): {hd['status']}\n")
    if hd["total"] is None:
        return
    cur = hd["currency"] or "currency"
    w(f"  {'cause':<24} {'kJ/kWh':>9} {'Btu/kWh':>9} {'fuel MW':>8} {cur + '/h':>10}\n")
    rows = sorted(hd["by_cause"].items(), key=lambda kv: (kv[0] == "unaccounted", -abs(kv[1] or 0.0)))
    for cause, v in [*rows, ("total", hd["total"])]:
        if v is None:
            continue
        fuel = hd["fuel_power_by_cause"].get(cause)
        cost = hd["cost_per_hour_by_cause"].get(cause)
        if cause == "total":
            fuel = sum(x for x in hd["fuel_power_by_cause"].values() if x is not None) if hd["fuel_power_by_cause"] else None
            cost = sum(x for x in hd["cost_per_hour_by_cause"].values() if x is not None) if hd["cost_per_hour_by_cause"] else None
        w(f"  {cause:<24} {v * KJ_PER_KWH:9.2f} {v * BTU_PER_KWH:9.2f} "
          f"{format(fuel / 1e6, '8.3f') if fuel is not None else '       -'} "
          f"{format(cost, '10.2f') if cost is not None else '         -'}\n")
    w(f"  fuel power on the {hd['fuel_basis']} basis; positive = worse than expected\n")
