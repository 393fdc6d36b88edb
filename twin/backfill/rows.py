"""Rows of ``reconciled.csv`` and ``events.csv`` (see the README for the names)."""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from datetime import UTC, datetime
from typing import Any

from twin.result import CycleResult

RECONCILED_HEADER = "window_end,name,value,uncertainty_95,unit,status,steady\n"
EVENTS_HEADER = "time,alarm,level,old,new,value,reason\n"
RECONCILED_COLUMNS = (("window_end", "timestamp"), ("name", "string"), ("value", "float"),
                      ("uncertainty_95", "float"), ("unit", "string"), ("status", "string"), ("steady", "bool"))
_QUANTITY_UNITS = {"mass_flow": "kg/s", "pressure": "Pa", "temperature": "K", "power": "W",
                   "cooling_water_inlet_temperature": "K", "cooling_water_outlet_temperature": "K"}


def rfc3339(t: float) -> str:
    """Unix seconds → ``YYYY-MM-DDTHH:MM:SS[.ffffff]Z``."""
    dt = datetime.fromtimestamp(t, UTC)
    text = dt.strftime("%Y-%m-%dT%H:%M:%S")
    if dt.microsecond:
        text += f".{dt.microsecond:06d}".rstrip("0")
    return text + "Z"


def _num(x: float) -> str:
    return repr(float(x)) if x is not None and math.isfinite(x) else ""


def result_rows(r: CycleResult, kpi_units: Mapping[str, str]) -> Iterable[str]:
    """The reconciled.csv lines of one window (see the README for the names)."""
    when = rfc3339(r.window_end)
    tail = f"{r.reconcile_status},{'true' if r.steady else 'false'}\n"
    for key, e in r.kpis.items():
        if e.available and math.isfinite(e.value):
            yield f"{when},{key},{_num(e.value)},{_num(e.uncertainty)},{kpi_units.get(key, '1')},{tail}"
    for tag, t in r.tags.items():
        if math.isfinite(t.reconciled):
            yield (f"{when},tag:{tag},{_num(t.reconciled)},{_num(1.96 * t.reconciled_sigma)},"
                   f"{_QUANTITY_UNITS.get(t.quantity, '')},{tail}")
    for key, v in r.expected.items():
        if math.isfinite(v):
            yield f"{when},expected:{key},{_num(v)},,{kpi_units.get(key, '1')},{tail}"
    if math.isfinite(r.heat_rate_deviation):
        yield f"{when},deviation:total,{_num(r.heat_rate_deviation)},,1,{tail}"
    for cause, v in r.heat_rate_deviation_by_cause.items():
        if math.isfinite(v):
            yield f"{when},deviation:{cause},{_num(v)},,1,{tail}"


def event_row(tr: Any) -> str:
    reason = str(tr.reason).replace('"', "'")
    return (f"{rfc3339(tr.time)},{tr.alarm},{tr.level},{tr.old},{tr.new},{_num(tr.value)},"
            f"\"{reason}\"\n")

