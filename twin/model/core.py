"""Variables, equation rows and the per-evaluation property cache.

The state of a flowsheet is one vector ``z`` of all variables: for every
stream its mass flow ``m`` [kg/s], pressure ``p`` [Pa] and specific enthalpy
``h`` [J/kg] (in that order, stream by stream), followed by the equipment
variables (shaft power, generator output, pump drive power) [W].

Equations are written as residuals ``r(z) = 0`` with their sparse gradients.
Each row has a name (``"<equipment>.<relation>"``), a set (``"balance"`` or
``"performance"``) and a scale used for convergence tests.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp

from twin.properties import PHState, PSState, SatState, Water

# Residual scales by kind of equation (for convergence tests and conditioning).
SCALE_MASS = 100.0  # [kg/s]
SCALE_ENTHALPY = 1.0e5  # [J/kg]
SCALE_PRESSURE = 1.0e5  # [Pa]
SCALE_TEMPERATURE = 10.0  # [K]
SCALE_POWER = 1.0e7  # [W]
SCALE_ENERGY_FLOW = 1.0e7  # [W] (m·h balances)

BALANCE = "balance"
PERFORMANCE = "performance"


@dataclass
class Rows:
    """Accumulates residual rows and their sparse gradients during one evaluation."""

    names: list[str] = field(default_factory=list)
    sets: list[str] = field(default_factory=list)
    values: list[float] = field(default_factory=list)
    scales: list[float] = field(default_factory=list)
    _rows: list[int] = field(default_factory=list)
    _cols: list[int] = field(default_factory=list)
    _data: list[float] = field(default_factory=list)

    def add(self, name: str, eq_set: str, value: float, grad: dict[int, float], scale: float) -> None:
        """Append one residual ``value`` with gradient ``{column: derivative}``."""
        i = len(self.values)
        self.names.append(name)
        self.sets.append(eq_set)
        self.values.append(float(value))
        self.scales.append(scale)
        for col, d in grad.items():
            self._rows.append(i)
            self._cols.append(col)
            self._data.append(float(d))

    def residuals(self) -> np.ndarray:
        return np.asarray(self.values, dtype=float)

    def jacobian(self, n_vars: int) -> sp.csr_matrix:
        """The gradient rows as a sparse matrix; repeated entries are summed."""
        return sp.csr_matrix(
            (self._data, (self._rows, self._cols)), shape=(len(self.values), n_vars)
        )


def add_grad(grad: dict[int, float], col: int, d: float) -> None:
    """Add ``d`` to the gradient entry of column ``col`` (one variable may appear twice)."""
    grad[col] = grad.get(col, 0.0) + d


class Context:
    """Read access to ``z`` by stream name, with cached property states.

    One context serves one evaluation of the equations at one ``z``; property
    states of a stream are computed once and shared by every equation that
    needs them.
    """

    def __init__(self, layout: Layout, z: np.ndarray, water: Water, constants: dict) -> None:
        self.layout = layout
        self.z = z
        self.water = water
        self.constants = constants
        self._ph: dict[int, PHState] = {}
        self._sat: dict[float, SatState] = {}

    def m(self, stream: str) -> float:
        return float(self.z[self.layout.m(stream)])

    def p(self, stream: str) -> float:
        return float(self.z[self.layout.p(stream)])

    def h(self, stream: str) -> float:
        return float(self.z[self.layout.h(stream)])

    def ph(self, stream: str) -> PHState:
        """Property state of a stream at its (p, h), cached for this evaluation."""
        k = self.layout.stream_index[stream]
        st = self._ph.get(k)
        if st is None:
            st = self.water.ph(self.p(stream), self.h(stream))
            self._ph[k] = st
        return st

    def sat(self, pressure: float) -> SatState:
        """Saturation state at pressure [Pa], cached for this evaluation."""
        st = self._sat.get(pressure)
        if st is None:
            st = self.water.sat(pressure)
            self._sat[pressure] = st
        return st

    def ps(self, pressure: float, entropy: float) -> PSState:
        """State at pressure [Pa] and specific entropy [J/(kg K)] (not cached)."""
        return self.water.ps(pressure, entropy)


@dataclass(frozen=True)
class Layout:
    """Index of every variable in ``z``."""

    streams: tuple[str, ...]
    extras: tuple[str, ...]

    @property
    def stream_index(self) -> dict[str, int]:
        return self._stream_index

    def __post_init__(self) -> None:
        object.__setattr__(self, "_stream_index", {s: i for i, s in enumerate(self.streams)})
        object.__setattr__(
            self, "_extra_index", {e: 3 * len(self.streams) + i for i, e in enumerate(self.extras)}
        )

    @property
    def n_vars(self) -> int:
        return 3 * len(self.streams) + len(self.extras)

    def m(self, stream: str) -> int:
        return 3 * self._stream_index[stream]

    def p(self, stream: str) -> int:
        return 3 * self._stream_index[stream] + 1

    def h(self, stream: str) -> int:
        return 3 * self._stream_index[stream] + 2

    def extra(self, name: str) -> int:
        return self._extra_index[name]  # type: ignore[attr-defined]

    def name_of(self, col: int) -> str:
        """Human name of variable ``col``, e.g. ``main_steam.p`` or ``generator.power``."""
        n_s = 3 * len(self.streams)
        if col < n_s:
            return f"{self.streams[col // 3]}.{'mph'[col % 3]}"
        return self.extras[col - n_s]
