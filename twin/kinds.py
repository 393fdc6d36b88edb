"""Equipment kinds: the ports and parameters each kind takes.

This table is the contract between the configuration schema (``twin.config``,
which validates a plant file against it and converts parameter values to SI)
and the flowsheet model (``twin.model``, which implements the equations of each
kind). It imports nothing from twin so both layers can use it.

Parameter dimensions name how a value written with a unit is converted
(see ``twin.units``): a bare number is taken as already in SI.
"""

from __future__ import annotations

from dataclasses import dataclass, field

# Dimensions a parameter can have. "text" is a plain string (a label or a
# reference to a stream or equipment id), "text_list" a list of such strings.
DIMENSIONS = (
    "pressure",  # [Pa], absolute unless the unit says gauge
    "pressure_difference",  # [Pa]
    "temperature",  # [K]
    "temperature_difference",  # [K]
    "mass_flow",  # [kg/s]
    "power",  # [W]
    "specific_enthalpy",  # [J/kg]
    "specific_heat",  # [J/(kg K)]
    "area",  # [m2]
    "velocity",  # [m/s]
    "ratio",  # [-]
    "text",
    "text_list",
)


@dataclass(frozen=True)
class Port:
    """One connection point of an equipment kind.

    Attributes
    ----------
    name : str
        Port name as written in the plant file (``ports = {inlet = "s1"}``).
    direction : str
        ``"in"`` (the stream enters the equipment) or ``"out"``.
    many : bool
        The port takes a list of stream ids.
    optional : bool
        The port may be left out.
    """

    name: str
    direction: str
    many: bool = False
    optional: bool = False


@dataclass(frozen=True)
class Param:
    """A parameter of an equipment kind; ``default is None`` means required."""

    name: str
    dimension: str
    default: float | str | None = None
    doc: str = ""

    @property
    def required(self) -> bool:
        return self.default is None


@dataclass(frozen=True)
class Kind:
    """An equipment kind: its ports, parameters and a one-line description."""

    name: str
    doc: str
    ports: tuple[Port, ...] = ()
    params: tuple[Param, ...] = field(default_factory=tuple)

    def port(self, name: str) -> Port:
        for p in self.ports:
            if p.name == name:
                return p
        raise KeyError(name)

    def param(self, name: str) -> Param:
        for p in self.params:
            if p.name == name:
                return p
        raise KeyError(name)


def _in(name: str, many: bool = False, optional: bool = False) -> Port:
    return Port(name, "in", many, optional)


def _out(name: str, many: bool = False, optional: bool = False) -> Port:
    return Port(name, "out", many, optional)


KINDS: dict[str, Kind] = {
    k.name: k
    for k in (
        Kind(
            "source",
            "Boundary inflow (make-up water). Its flow is free and closes the cycle's mass balance.",
            (_out("outlet"),),
        ),
        Kind(
            "cycle_loss",
            "Cycle loss sink (steam or water leaving the cycle: a leak, blowdown, steam lost): its "
            "inlet stream leaves the water-steam cycle and the make-up replaces it. Forward heat "
            "balance: flow = normal_fraction m[normal_reference] + normal_flow (the normal loss); "
            "reconciliation: flow free (the make-up flow meter determines it).",
            (_in("inlet"),),
            (
                Param("normal_fraction", "ratio", 0.0,
                      "normal loss as a fraction of the flow of normal_reference [-]"),
                Param("normal_reference", "text", "", "stream whose flow normal_fraction scales"),
                Param("normal_flow", "mass_flow", 0.0, "normal loss as a fixed mass flow [kg/s]"),
            ),
        ),
        Kind(
            "boiler",
            "Steam generator: feedwater in, main steam out; duty = m (h_steam - h_feedwater).",
            (_in("feedwater"), _out("steam")),
        ),
        Kind(
            "reheater",
            "Reheater: cold reheat in, hot reheat out with a pressure drop fraction.",
            (_in("inlet"), _out("outlet")),
            (Param("pressure_drop_fraction", "ratio", doc="(p_in - p_out)/p_in [-]"),),
        ),
        Kind(
            "throttle_valve",
            "Turbine control valve: isenthalpic; wide open (no drop) at design and in sliding-pressure "
            "operation, free (throttling) in fixed-pressure operation.",
            (_in("inlet"), _out("outlet")),
        ),
        Kind(
            "pipe",
            "Isenthalpic pipe or line: p_out = p_in (1 - pressure_drop_fraction) - pressure_drop "
            "(a negative pressure_drop is a static-head gain).",
            (_in("inlet"), _out("outlet")),
            (
                Param("pressure_drop_fraction", "ratio", 0.0),
                Param("pressure_drop", "pressure_difference", 0.0),
            ),
        ),
        Kind(
            "turbine_group",
            "Turbine stage group between two extraction points: enthalpy-drop efficiency "
            "(Baumann wet-stage correction), Stodola cone law off design.",
            (_in("inlet"), _out("outlet")),
            (
                Param("section", "text", doc="section label, e.g. HP, IP, LP"),
                Param("efficiency", "ratio", doc="dry isentropic (enthalpy-drop) efficiency [-]"),
                Param("baumann_factor", "ratio", 0.0, "Baumann alpha; 0 = no wet correction [-]"),
            ),
        ),
        Kind(
            "exhaust_loss",
            "Last-stage exhaust loss: expansion-line end point in, used-energy end point out; "
            "EL = a V^2 + b (c/V)^2 times a wetness factor, V = m v / A.",
            (_in("inlet"), _out("outlet")),
            (
                Param("annulus_area", "area", doc="total exhaust annulus area [m2]"),
                Param("velocity_coefficient", "ratio", 0.6, "a [-]"),
                Param("low_velocity_coefficient", "specific_enthalpy", 8000.0, "b [J/kg]"),
                Param("reference_velocity", "velocity", 120.0, "c [m/s]"),
                Param("minimum_velocity", "velocity", 20.0, "V is clipped below this [m/s]"),
                Param("wet_factor", "ratio", 0.87, "wet multiplier w0 (1 - w1 Y)(1 - w2 Y), Y in %"),
                Param("wet_slope_1", "ratio", 0.01),
                Param("wet_slope_2", "ratio", 0.0065),
            ),
        ),
        Kind(
            "splitter",
            "Splits one stream into several at equal pressure and enthalpy.",
            (_in("inlet"), _out("outlets", many=True)),
        ),
        Kind(
            "mixer",
            "Adiabatic mixing; the outlet takes the pressure of the first inlet.",
            (_in("inlets", many=True), _out("outlet")),
        ),
        Kind(
            "pump",
            "Pump: h_out = h_in + (h_s(p_out, s_in) - h_in)/efficiency; discharge pressure fixed "
            "(discharge_pressure) or tied to another stream "
            "(discharge_factor * p[discharge_reference] + discharge_offset).",
            (_in("inlet"), _out("outlet")),
            (
                Param("efficiency", "ratio", doc="isentropic efficiency [-]"),
                Param("drive_efficiency", "ratio", 1.0, "motor or drive efficiency [-]"),
                Param("discharge_pressure", "pressure", 0.0, "fixed discharge pressure [Pa]; 0 = not fixed"),
                Param("discharge_reference", "text", "", "stream whose pressure sets the discharge"),
                Param("discharge_factor", "ratio", 1.0),
                Param("discharge_offset", "pressure_difference", 0.0),
            ),
        ),
        Kind(
            "closed_heater",
            "Closed feedwater heater with drain cooler (ASME PTC 12.1 terms): "
            "TTD = Tsat(p_shell) - T_tube_out, DCA = T_drain_out - T_tube_in.",
            (
                _in("tube_in"),
                _out("tube_out"),
                _in("steam_in"),
                _in("drain_in", optional=True),
                _out("drain_out"),
            ),
            (
                Param("ttd", "temperature_difference", doc="terminal temperature difference [K]"),
                Param("dca", "temperature_difference", doc="drain cooler approach [K]"),
                Param("tube_pressure_drop", "pressure_difference", 0.0),
            ),
        ),
        Kind(
            "open_heater",
            "Open (direct-contact) heater or deaerator: outlet is saturated liquid at the steam "
            "inlet pressure.",
            (_in("steam_in"), _in("inlets", many=True), _out("outlet")),
        ),
        Kind(
            "condenser",
            "Surface condenser: hotwell saturated liquid at the exhaust pressure; off design the "
            "UA and cooling-water flow found at design stay fixed and the back-pressure floats.",
            (_in("exhaust"), _in("inlets", many=True, optional=True), _out("outlet")),
            (
                Param("area", "area", doc="heat-transfer surface [m2]"),
                Param("cooling_water_inlet_temperature", "temperature"),
                Param("cooling_water_rise", "temperature_difference", doc="design rise [K]"),
                Param("cooling_water_cp", "specific_heat", 4180.0),
                Param("design_cleanliness", "ratio", 0.85),
            ),
        ),
        Kind(
            "generator",
            "Turbine-generator power balance: shaft power = sum of the listed turbine elements' "
            "m (h_in - h_out); P_gen = shaft - mechanical_loss - fixed_loss - load_loss (P_gen/rated)^2.",
            (),
            (
                Param("turbines", "text_list", doc="ids of turbine_group and exhaust_loss elements"),
                Param("rated_power", "power"),
                Param("mechanical_loss", "power", 0.0),
                Param("fixed_loss", "power", 0.0),
                Param("load_loss", "power", 0.0),
            ),
        ),
    )
}

# Quantities a sensor can measure, with the dimension of its unit and what it
# attaches to ("stream" or "equipment" or "unit").
MEASURED_QUANTITIES: dict[str, tuple[str, str]] = {
    "mass_flow": ("mass_flow", "stream"),
    "pressure": ("pressure", "stream"),
    "temperature": ("temperature", "stream"),
    "power": ("power", "equipment"),  # generator terminal output, pump drive input
    "cooling_water_inlet_temperature": ("temperature", "equipment"),
    "cooling_water_outlet_temperature": ("temperature", "equipment"),
    "barometric_pressure": ("pressure", "unit"),
}

STREAM_DESIGN_QUANTITIES: dict[str, str] = {
    "mass_flow": "mass_flow",
    "pressure": "pressure",
    "temperature": "temperature",
    "specific_enthalpy": "specific_enthalpy",
}
