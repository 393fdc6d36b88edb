"""Design-time redundancy report: how well each instrument is checked, how well each KPI is known.

Reconciles noiseless readings at the design point (every sensor valid) and
reads off, per tag, the redundancy ``h = 1 − Var(x̂)/Var(y)`` and the
minimum bias the measurement test detects with 90 % power, and per KPI
whether it is observable and its expected 95 % uncertainty. Tags with no
redundancy cannot be checked by the balances at all: that is where one more
instrument pays.

References
----------
Narasimhan & Jordache (2000), §7.3 (power of the measurement test);
VDI 2048 Blatt 1 (2017) (redundancy, quality of reconciled values).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from twin.performance.plant_reconcile import MODEL_BASED_SHARE, PlantReconciler
from twin.reconcile import REDUNDANCY_FLOOR, minimum_detectable_bias, sidak_critical


@dataclass(frozen=True)
class TagRedundancy:
    tag: str
    unit: str
    redundancy: float  # [-]
    sigma: float  # measurement σ in the sensor's unit
    mdb_sigma: float  # minimum detectable bias at 90 % power [σ]
    mdb: float  # the same in the sensor's unit


@dataclass(frozen=True)
class RedundancyReport:
    status: str
    dof: int
    sidak_critical: float
    tags: tuple[TagRedundancy, ...]
    kpis: tuple[tuple[str, bool, float, str], ...]  # name, observable, U95, unit
    soft: tuple[tuple[str, float, str], ...] = ()  # soft relation, U95 (= 1.96 σ), unit
    kpi_soft_share: Mapping[str, float] = field(default_factory=dict)  # share of the variance from soft relations


def redundancy(config: Any, reconciler: PlantReconciler | None = None) -> RedundancyReport:
    """Redundancy of every sensor and expected KPI uncertainty at the design point."""
    pr = reconciler or PlantReconciler(config, max_eliminations=0)
    z0 = pr.system.initial_point(pr.design.z)
    values = {b.tag: float(z0[b.column]) for b in pr.system.sensors}
    rec = pr.reconcile(values, z0=z0)
    pr.reset()
    if not rec.converged:
        return RedundancyReport(rec.status, 0, math.nan, (), ())
    n_red = sum(1 for t in rec.tags.values() if t.valid and t.redundancy > REDUNDANCY_FLOOR)
    zc = sidak_critical(0.05, max(n_red, 1))
    sensors = {s.tag: s for s in config.sensors}
    tags = []
    for tag, t in rec.tags.items():
        s = sensors[tag]
        scale = abs(s.conversion.scale)
        h = max(t.redundancy, 0.0) if math.isfinite(t.redundancy) else 0.0
        k = float(minimum_detectable_bias(h, zc, 0.9)) if h > REDUNDANCY_FLOOR else math.inf
        tags.append(TagRedundancy(tag, s.unit, h, t.sigma / scale, k, k * t.sigma / scale))
    units = {d.name: d.unit for d in pr.kpi_defs}
    kpis = tuple((name, e.available, e.uncertainty, units.get(name, "")) for name, e in rec.kpis.items())
    soft = tuple((r.name, 1.96 * r.sigma, r.unit) for r in pr.system.soft)
    shares = {name: e.soft_share for name, e in rec.kpis.items()}
    return RedundancyReport("converged", rec.dof, zc, tuple(tags), kpis, soft, shares)


# A bias beyond this many standard uncertainties is a broken instrument (caught by the
# valid-range check), not something the balances detect: reported as "never". [common practice]
PRACTICAL_MDB_SIGMA = 100.0


def report_lines(r: RedundancyReport) -> list[str]:
    """The report as text lines for ``twin check``."""
    if r.status != "converged":
        return [f"redundancy: not available (design-point reconciliation {r.status})"]
    lines = [
        f"redundancy at the design point: {r.dof} degrees of freedom; measurement test "
        f"|z| > {r.sidak_critical:.2f} (Šidák, 5 % family-wise)",
        f"  {'tag':<12} {'unit':<7} {'redund.':>7} {'σ':>10} {'MDB90 σ':>8} {'MDB90':>10}",
    ]
    def checkable(t: TagRedundancy) -> bool:
        return math.isfinite(t.mdb_sigma) and t.mdb_sigma <= PRACTICAL_MDB_SIGMA

    for t in r.tags:
        mdb = f"{t.mdb:10.4g}" if checkable(t) else "never"
        mdb_s = f"{t.mdb_sigma:8.2f}" if checkable(t) else "-"
        lines.append(f"  {t.tag:<12} {t.unit:<7} {t.redundancy:7.3f} {t.sigma:10.4g} {mdb_s:>8} {mdb:>10}")
    lonely = [t.tag for t in r.tags if not checkable(t)]
    if lonely:
        lines.append(f"  not checkable by the balances (redundancy ≤ {REDUNDANCY_FLOOR:g}: no z, never flagged; "
                     f"or a detectable bias past {PRACTICAL_MDB_SIGMA:.0f} σ; "
                     f"one more instrument would make them redundant): {', '.join(lonely)}")
    lines.append("soft model relations (pseudo-measurements 0 ± σ; every σ is a 95 % half-width / 1.96)")
    for name, u95, unit in r.soft:
        lines.append(f"  {name:<36} U95 {u95:.4g} {unit}")
    lines.append("expected KPI uncertainty at the design point (95 %); soft: share of its variance from the "
                 f"model relations (≥ {MODEL_BASED_SHARE:.0%}: model_based)")
    for name, ok, u, unit in r.kpis:
        share = r.kpi_soft_share.get(name, math.nan)
        if not ok:
            lines.append(f"  {name:<36} unobservable")
            continue
        scale, label = {"ratio": (100.0, "% points"), "W": (1e-6, "MW"), "Pa": (1e-3, "kPa")}.get(unit, (1.0, unit))
        if name.endswith("heat_rate"):
            scale, label = 3600.0, "kJ/kWh"
        soft = f"{share:4.0%}" if math.isfinite(share) else "-"
        lines.append(f"  {name:<36} ± {u * scale:<10.4g} {label:<9} soft {soft}")
    return lines


def redundancy_report(config: Any) -> list[str]:
    """``twin check`` section: skipped for a plant file without a load stream or sensors."""
    if not getattr(config, "sensors", None) or config.performance.load_stream is None:
        return ["redundancy: skipped (no sensors or no performance.load_stream)"]
    return report_lines(redundancy(config))
