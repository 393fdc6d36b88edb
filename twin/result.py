"""The immutable result of one monitoring cycle.

The live daemon builds one ``CycleResult`` per window and swaps it in
atomically; the Prometheus collector, the MQTT republisher, the terminal
summary and the back-fill writer only read it. Plain data, no imports from
the rest of twin, so every layer may use it.

All values are SI (K, Pa absolute, kg/s, J/kg, W, fractions as ratios);
temperatures are kelvin here and converted to °C only at the edges.
Uncertainties are expanded uncertainties at about 95 % (1.96 σ) unless a
field says otherwise.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from types import MappingProxyType
from typing import TYPE_CHECKING, Any, TypeVar

if TYPE_CHECKING:
    from _typeshed import DataclassInstance

NAN = float("nan")

# Reconciliation status values (bounded set, used as a metric label).
RECONCILE_STATUSES = (
    "converged",  # reconciled values are valid
    "not_steady",  # skipped: the steady-state gate is closed
    "insufficient_data",  # too few valid tags (or a KPI's inputs) for a solution
    "not_converged",  # the solver hit its iteration cap
    "model_error",  # the model could not be evaluated (property range...)
)


_R = TypeVar("_R", bound="DataclassInstance")


def evolve(record: _R, **changes: Any) -> _R:
    """``dataclasses.replace`` for the frozen records here that have no ``__post_init__`` (a
    window's 100-odd :class:`TagResult` get their window statistics this way): a copy of
    ``record``'s fields with ``changes``, 4x cheaper than ``replace`` (which runs ``__init__``).
    """
    if hasattr(record, "__post_init__"):
        return replace(record, **changes)
    unknown = changes.keys() - record.__dataclass_fields__.keys()
    if unknown:
        raise TypeError(f"{type(record).__name__} has no field(s) {sorted(unknown)}")
    new = object.__new__(type(record))
    fields = dict(record.__dict__)
    fields.update(changes)
    object.__setattr__(new, "__dict__", fields)
    return new


@dataclass(frozen=True)
class TagResult:
    """One sensor in one window.

    ``measured`` is the window mean in SI; ``valid`` false means it was excluded
    (``reason`` says why: stale, out_of_range, bad_quality, no_data, eliminated).
    """

    tag: str
    quantity: str  # mass_flow, pressure, temperature, power, ...
    measured: float = NAN
    spread: float = NAN  # window standard deviation [SI]
    count: int = 0
    age_seconds: float = NAN
    valid: bool = False
    reason: str = ""
    sigma: float = NAN  # measurement standard uncertainty (1 σ) [SI]
    reconciled: float = NAN
    reconciled_sigma: float = NAN  # 1 σ
    adjustment: float = NAN  # measured − reconciled
    normalised_adjustment: float = NAN  # NaN when not redundant
    redundancy: float = NAN  # 1 − Var(reconciled)/Var(measured)
    suspect: bool = False  # fails the family-wise (Šidák) measurement test
    flagged_vdi: bool = False  # |z| > 1.96 (VDI 2048 per-measurement criterion)


#: Status values of an :class:`Estimate` (bounded set, usable as a metric label).
ESTIMATE_STATUSES = (
    "reconciled",  # the instruments determine it (through the balances)
    "model_based",  # published, but its instruments are invalid: the model relations carry it
    "unavailable",  # unobservable or not computed: no value
)


@dataclass(frozen=True)
class Estimate:
    """A derived value with its expanded uncertainty (≈95 %); ``available`` false means unobservable.

    ``status`` is one of :data:`ESTIMATE_STATUSES` (default: ``reconciled`` when
    available, else ``unavailable``); a ``model_based`` estimate is available (it has
    a value and an uncertainty) but is carried by the model relations rather than the
    instruments. ``soft_share`` is the share of its variance that comes from the soft
    model relations' pseudo-measurements rather than from instruments [-] (NaN when
    not computed).
    """

    value: float = NAN
    uncertainty: float = NAN
    available: bool = False
    status: str = ""
    soft_share: float = NAN

    def __post_init__(self) -> None:
        if not self.status:
            object.__setattr__(self, "status", "reconciled" if self.available else "unavailable")
        elif self.status not in ESTIMATE_STATUSES:
            raise ValueError(f"Estimate status must be one of {ESTIMATE_STATUSES}, got {self.status!r}")


@dataclass(frozen=True)
class StreamState:
    """Reconciled (or, when not steady, model) state of one stream."""

    mass_flow: float = NAN  # [kg/s]
    pressure: float = NAN  # [Pa]
    temperature: float = NAN  # [K]
    enthalpy: float = NAN  # [J/kg]
    quality: float = NAN  # [-], NaN in single phase


@dataclass(frozen=True)
class AlarmView:
    """State of one alarm (``state`` from the monitor's alarm machines)."""

    name: str
    state: str  # normal, pending, active, clearing, suppressed, unavailable
    severity: str = ""  # "" / warning / alarm
    value: float = NAN
    active: bool = False


@dataclass(frozen=True)
class DriftView:
    """Drift-chart statistics of one KPI."""

    kpi: str
    ewma: float = NAN
    ewma_lower: float = NAN
    ewma_upper: float = NAN
    cusum_high: float = NAN
    cusum_low: float = NAN
    alarm: bool = False
    direction: str = "none"  # up / down / none


@dataclass(frozen=True)
class InputStats:
    """Cumulative input counters at window close (for ``_total`` metrics)."""

    messages: int = 0
    rejected: Mapping[str, int] = field(default_factory=dict)  # by reason
    stale_tags: tuple[str, ...] = ()
    connected: bool = False
    reconnects: int = 0


def frozen_map(d: Mapping | None = None) -> Mapping:
    """A read-only view of a dict (results are shared between threads)."""
    return MappingProxyType(dict(d or {}))


@dataclass(frozen=True)
class CycleResult:
    """Everything one cycle produced.

    KPI names in ``kpis`` and ``expected`` (flat, dotted where keyed):
    ``gross_power``, ``net_power``, ``heat_input``, ``gross_efficiency``,
    ``net_efficiency``, ``turbine_heat_rate`` (ratio), ``plant_heat_rate``
    (ratio, fuel basis), ``load_fraction``, ``exhaust_quality_elep``,
    ``exhaust_quality_ueep``, ``exhaust_moisture_elep``,
    ``exhaust_moisture_ueep``, ``section_efficiency.<section>``,
    ``heater_ttd.<heater>``, ``heater_dca.<heater>``,
    ``heater_temperature_rise.<heater>``, ``extraction_flow.<heater>``,
    ``condenser_pressure.<condenser>``, ``condenser_cleanliness.<condenser>``,
    ``condenser_itd.<condenser>``, ``condenser_ttd.<condenser>``.
    """

    unit_id: str
    window_start: float  # Unix time [s]
    window_end: float  # Unix time [s]
    formulation: str = "IAPWS-IF97"
    steady: bool = False
    steady_status: str = "insufficient_data"
    steady_r: Mapping[str, float] = field(default_factory=dict)  # by tag
    steady_frozen: tuple[str, ...] = ()  # key signals frozen (spread at or below their noise floor)
    reconcile_status: str = "insufficient_data"
    reconcile_message: str = ""
    iterations: int = 0
    global_test: float = NAN  # γ = aᵀV⁻¹a
    global_test_dof: int = 0
    global_test_p_value: float = NAN
    tags: Mapping[str, TagResult] = field(default_factory=dict)
    streams: Mapping[str, StreamState] = field(default_factory=dict)
    kpis: Mapping[str, Estimate] = field(default_factory=dict)
    expected: Mapping[str, float] = field(default_factory=dict)
    heat_rate_deviation: float = NAN  # actual − expected turbine heat rate [ratio]
    heat_rate_deviation_by_cause: Mapping[str, float] = field(default_factory=dict)  # [ratio], incl. "unaccounted"
    heat_rate_deviation_status: str = ""  # "complete", "partial: <causes>", "not split: ...", "unavailable: ..."
    heat_rate_deviation_fuel_power_by_cause: Mapping[str, float] = field(default_factory=dict)  # [W] fuel basis
    heat_rate_deviation_cost_by_cause: Mapping[str, float] = field(default_factory=dict)  # [currency/h]
    currency: str = ""  # label of the cost figures
    alarms: Mapping[str, AlarmView] = field(default_factory=dict)
    drift: Mapping[str, DriftView] = field(default_factory=dict)
    inputs: InputStats = field(default_factory=InputStats)
    depends_on: tuple[str, ...] = ()  # model relations (soft constraints) the result relies on
    compute_seconds: float = NAN  # window close → result ready

    @property
    def reconciled(self) -> bool:
        return self.reconcile_status == "converged"

    def kpi(self, name: str) -> float:
        est = self.kpis.get(name)
        return est.value if est is not None and est.available else NAN
