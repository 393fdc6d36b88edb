"""Plant units to SI, decided once at load time as a scale and an offset.

A configured unit becomes a :class:`Conversion` (``si = value * scale + offset``)
so that ingest converts each sample with one multiply and one add. Gauge
pressures carry the barometric pressure in the offset.

Dimensions follow :data:`twin.kinds.DIMENSIONS` plus ``"duration"``. Unit
strings are matched after removing blanks and writing ``°`` as ``deg``, ``²`` as
``2`` and ``·`` as nothing, so ``"°C"``, ``"degC"``, ``"J/(kg K)"`` and
``"J/(kg·K)"`` are all accepted.

References
----------
NIST Special Publication 811 (2008), *Guide for the Use of the International
System of Units (SI)*, Appendix B (conversion factors).
"""

from __future__ import annotations

import re
from dataclasses import dataclass, replace
from typing import Any

# Exact factors.
_LB = 0.45359237  # [kg], international avoirdupois pound (exact)
_PSI = _LB * 9.80665 / 0.0254**2  # [Pa], lbf/in² (= 6894.757... Pa)
_F = 5.0 / 9.0  # kelvin per degree Fahrenheit
_C0 = 273.15  # [K], 0 °C

STANDARD_ATMOSPHERE = 101325.0  # [Pa], exact by definition


@dataclass(frozen=True)
class Conversion:
    """A linear map from a plant unit to SI: ``si = value * scale + offset``.

    Attributes
    ----------
    scale : float
        SI units per plant unit (always > 0).
    offset : float
        SI value of a plant reading of zero (273.15 K for °C; the barometric
        pressure [Pa] for a gauge pressure).
    gauge : bool
        The unit is a gauge pressure: ``offset`` is the barometric pressure.
    """

    scale: float
    offset: float = 0.0
    gauge: bool = False

    def to_si(self, value: Any) -> Any:
        """Plant-unit value (float or numpy array) to SI."""
        return value * self.scale + self.offset

    def from_si(self, value: Any) -> Any:
        """SI value (float or numpy array) to the plant unit."""
        return (value - self.offset) / self.scale

    def with_barometric(self, barometric_pressure: float) -> Conversion:
        """The same gauge conversion with another barometric pressure [Pa]."""
        if not self.gauge:
            raise ValueError("with_barometric: conversion is not a gauge pressure")
        return replace(self, offset=float(barometric_pressure))


# dimension -> canonical unit -> (scale, offset, gauge)
_UNITS: dict[str, dict[str, tuple[float, float, bool]]] = {
    "pressure": {
        "Pa": (1.0, 0.0, False),
        "kPa": (1e3, 0.0, False),
        "MPa": (1e6, 0.0, False),
        "bar": (1e5, 0.0, False),
        "mbar": (1e2, 0.0, False),
        "psi": (_PSI, 0.0, False),
        "psia": (_PSI, 0.0, False),
        "kPa(g)": (1e3, 0.0, True),
        "MPa(g)": (1e6, 0.0, True),
        "bar(g)": (1e5, 0.0, True),
        "mbar(g)": (1e2, 0.0, True),
        "psig": (_PSI, 0.0, True),
    },
    "pressure_difference": {
        "Pa": (1.0, 0.0, False),
        "kPa": (1e3, 0.0, False),
        "MPa": (1e6, 0.0, False),
        "bar": (1e5, 0.0, False),
        "mbar": (1e2, 0.0, False),
        "psi": (_PSI, 0.0, False),
    },
    "temperature": {
        "K": (1.0, 0.0, False),
        "degC": (1.0, _C0, False),
        "degF": (_F, _C0 - 32.0 * _F, False),
    },
    "temperature_difference": {
        "K": (1.0, 0.0, False),
        "degC": (1.0, 0.0, False),
        "degF": (_F, 0.0, False),
    },
    "mass_flow": {
        "kg/s": (1.0, 0.0, False),
        "kg/h": (1.0 / 3600.0, 0.0, False),
        "t/h": (1000.0 / 3600.0, 0.0, False),
        "lb/h": (_LB / 3600.0, 0.0, False),
    },
    "power": {
        "W": (1.0, 0.0, False),
        "kW": (1e3, 0.0, False),
        "MW": (1e6, 0.0, False),
    },
    "specific_enthalpy": {
        "J/kg": (1.0, 0.0, False),
        "kJ/kg": (1e3, 0.0, False),
        "Btu/lb": (2326.0, 0.0, False),  # Btu_IT/lb = 2.326 kJ/kg exactly
    },
    "specific_heat": {
        "J/(kgK)": (1.0, 0.0, False),
        "kJ/(kgK)": (1e3, 0.0, False),
    },
    "area": {"m2": (1.0, 0.0, False)},
    "velocity": {"m/s": (1.0, 0.0, False)},
    "ratio": {
        "-": (1.0, 0.0, False),
        "1": (1.0, 0.0, False),
        "%": (0.01, 0.0, False),
    },
    "duration": {
        "s": (1.0, 0.0, False),
        "ms": (1e-3, 0.0, False),
        "min": (60.0, 0.0, False),
        "h": (3600.0, 0.0, False),
    },
}

# spelling (after normalisation) -> canonical unit
_ALIASES: dict[str, str] = {
    "C": "degC",
    "F": "degF",
    "barg": "bar(g)",
    "bara": "bar",
    "kPag": "kPa(g)",
    "kPaa": "kPa",
    "MPag": "MPa(g)",
    "MPaa": "MPa",
    "mbarg": "mbar(g)",
    "mbara": "mbar",
    "psi(g)": "psig",
    "psi(a)": "psia",
    "J/kg/K": "J/(kgK)",
    "J/kgK": "J/(kgK)",
    "kJ/kg/K": "kJ/(kgK)",
    "kJ/kgK": "kJ/(kgK)",
    "m^2": "m2",
    "sec": "s",
}

DIMENSIONS: tuple[str, ...] = tuple(_UNITS)


def _normalise(unit: str) -> str:
    u = re.sub(r"\s+", "", unit).replace("°", "deg").replace("²", "2").replace("·", "")
    return _ALIASES.get(u, u)


def units_for(dimension: str) -> tuple[str, ...]:
    """The canonical unit names accepted for ``dimension``."""
    if dimension not in _UNITS:
        raise ValueError(
            f"unknown dimension {dimension!r}; expected one of {', '.join(_UNITS)}"
        )
    return tuple(_UNITS[dimension])


def conversion(
    unit: str, dimension: str, *, barometric_pressure: float | None = None
) -> Conversion:
    """The conversion of ``unit`` (of ``dimension``) to SI.

    Parameters
    ----------
    unit : str
        Plant unit, e.g. ``"bar(g)"``, ``"°C"``, ``"t/h"``.
    dimension : str
        What the value measures, e.g. ``"pressure"``, ``"temperature_difference"``.
    barometric_pressure : float, optional
        Barometric pressure [Pa]; required for a gauge pressure unit.

    Raises
    ------
    ValueError
        Unknown unit, a unit of another dimension, or a gauge unit without a
        barometric pressure; the message names the unit, the dimension and the
        valid units.
    """
    valid = units_for(dimension)
    if not isinstance(unit, str):
        raise ValueError(
            f"unit {unit!r} is not a string; expected one of {', '.join(valid)} for {dimension}"
        )
    name = _normalise(unit)
    if name not in _UNITS[dimension]:
        others = [d for d, table in _UNITS.items() if name in table]
        what = f"a {others[0]} unit, not a {dimension} unit" if others else "an unknown unit"
        raise ValueError(
            f"unit {unit!r} is {what}; expected one of {', '.join(valid)} for {dimension}"
        )
    scale, offset, gauge = _UNITS[dimension][name]
    if gauge:
        if barometric_pressure is None:
            raise ValueError(
                f"gauge unit {unit!r} needs a barometric pressure; "
                "expected a configured barometric_pressure or barometric_tag"
            )
        offset = float(barometric_pressure)
    return Conversion(scale, offset, gauge)


_QUANTITY = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(.*?)\s*$")


def split_quantity(text: str) -> tuple[float, str]:
    """Split ``"16.2 MPa"`` into ``(16.2, "MPa")``; the unit may be empty."""
    m = _QUANTITY.match(text)
    if m is None:
        raise ValueError(f"{text!r} is not a quantity; expected a number and a unit, e.g. '16.2 MPa'")
    return float(m.group(1)), m.group(2)


def parse_quantity(
    text: str, dimension: str, *, barometric_pressure: float | None = None
) -> float:
    """A quantity written with its unit, converted to SI.

    Parameters
    ----------
    text : str
        Number and unit, e.g. ``"16.2 MPa"``, ``"541 degC"``, ``"-1.7 K"``,
        ``"295 kg/s"``, ``"30 s"``. A number without a unit is taken as SI.
    dimension : str
        Dimension of the quantity (see :data:`DIMENSIONS`).
    barometric_pressure : float, optional
        Barometric pressure [Pa] for gauge pressures.

    Returns
    -------
    float
        The value in SI base units (K, Pa absolute, kg/s, W, J/kg, s, ...).
    """
    value, unit = split_quantity(text)
    if unit == "":
        units_for(dimension)
        return value
    return float(conversion(unit, dimension, barometric_pressure=barometric_pressure).to_si(value))


def rfc3339(t: float) -> str:
    """Unix time [s] as RFC 3339 UTC with milliseconds, e.g. ``"2026-12-02T07:58:00.125Z"``.

    A time that is not finite or out of range is written as its number.
    """
    from datetime import UTC, datetime

    try:
        return datetime.fromtimestamp(t, UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")
    except (ValueError, OverflowError, OSError, TypeError):
        return repr(t)


# A number as text, strictly (Python's float() also takes blanks, "_" and "infinity" spellings).
_NUMBER_TEXT = r"[+-]?(?:(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?|(?i:nan|inf|infinity))"
_NUMBER_BYTES = re.compile(_NUMBER_TEXT.encode()).fullmatch
_NUMBER_STR = re.compile(_NUMBER_TEXT, re.ASCII).fullmatch


def strict_float(text: str | bytes) -> float:
    """Parse a number written as text, strictly; ``ValueError`` otherwise.

    >>> strict_float(b"-1.5e3")
    -1500.0
    """
    ok = _NUMBER_BYTES(text) if isinstance(text, bytes) else _NUMBER_STR(text)
    if ok is None:
        raise ValueError(f"not a plain number: {text[:32]!r}")
    return float(text)
