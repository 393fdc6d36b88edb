"""Plant-file value types: errors and quantities with units (``"16.2 MPa"``; bare numbers only for ratios)."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any

from pydantic import BaseModel, BeforeValidator, ConfigDict, Field, WithJsonSchema

from twin.units import conversion, split_quantity


class ConfigError(ValueError):
    """A plant file is invalid; ``problems`` holds one line per problem."""

    def __init__(self, problems: list[str], path: str | Path | None = None):
        self.problems = list(problems)
        self.path = path
        super().__init__("\n".join(self.problems))


class _Problems(ValueError):
    """Several ``(key.path, message)`` problems raised from inside a validator."""

    def __init__(self, items: list[tuple[str, str]]):
        self.items = items
        super().__init__("\n".join(f"{p}: {m}" for p, m in items))


def _to_si(value: Any, dimension: str, barometric: float | None = None) -> float:
    """A config value ``"<number> <unit>"`` to SI; ValueError if wrong.

    A number without a unit is refused on every dimensional key (a bare
    ``pressure = 16.2`` would otherwise be taken as 16.2 Pa); only ratios
    (dimensionless) may be bare numbers.
    """
    if isinstance(value, bool) or not isinstance(value, int | float | str):
        raise ValueError(
            f"wrong type {type(value).__name__} ({value!r}); "
            f"expected {'a number or ' if dimension in DIMENSIONLESS else ''}a {dimension} string such as "
            f"{_EXAMPLE[dimension]!r}"
        )
    if isinstance(value, str):
        number, unit = split_quantity(value)
        if unit == "" and dimension not in DIMENSIONLESS:
            raise ValueError(f"{value!r} has no unit; expected a {dimension} with its unit such as "
                             f"{_EXAMPLE[dimension]!r}")
        if unit == "":
            return number
        return float(conversion(unit, dimension, barometric_pressure=barometric).to_si(number))
    if dimension not in DIMENSIONLESS:
        raise ValueError(f"bare number {value!r} has no unit; expected a {dimension} with its unit such as "
                         f"{_EXAMPLE[dimension]!r}")
    return float(value)


DIMENSIONLESS = frozenset({"ratio"})


_EXAMPLE = {
    "pressure": "16.2 MPa",
    "pressure_difference": "0.1 MPa",
    "temperature": "541 degC",
    "temperature_difference": "5.6 K",
    "mass_flow": "295 kg/s",
    "power": "6 MW",
    "specific_enthalpy": "3400 kJ/kg",
    "specific_heat": "4.18 kJ/(kg K)",
    "area": "20 m2",
    "velocity": "120 m/s",
    "ratio": "85 %",
    "duration": "30 s",
}


def _si(dimension: str, minimum: float | None = None) -> BeforeValidator:
    def check(value: Any) -> float:
        si = _to_si(value, dimension)
        if minimum is not None and not si > minimum:
            raise ValueError(f"{value!r} is not above {minimum:g} (SI); expected a positive {dimension}")
        return si

    return BeforeValidator(check)


def _doc(dimension: str) -> WithJsonSchema:
    if dimension in DIMENSIONLESS:
        return WithJsonSchema({
            "anyOf": [{"type": "number"}, {"type": "string"}],
            "description": f"{dimension}: a number or a string with a unit, e.g. {_EXAMPLE[dimension]!r}",
        })
    return WithJsonSchema({
        "type": "string",
        "description": f"{dimension}: a number with its unit, e.g. {_EXAMPLE[dimension]!r} (a bare number is refused)",
    })


Duration = Annotated[float, _si("duration", 0.0), _doc("duration")]
Delay = Annotated[float, _si("duration"), _doc("duration")]
Ratio = Annotated[float, _si("ratio"), _doc("ratio")]
Power = Annotated[float, _si("power"), _doc("power")]
Pressure = Annotated[float, _si("pressure", 0.0), _doc("pressure")]
Slug = Annotated[str, Field(pattern=r"^[a-z0-9]([a-z0-9_-]*[a-z0-9])?$")]
Ident = Annotated[str, Field(pattern=r"^[A-Za-z0-9_][A-Za-z0-9_.:-]*$")]
Pair = tuple[float, float]


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid")


