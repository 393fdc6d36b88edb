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

from dataclasses import dataclass, field, replace

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


class Rows:
    """Accumulates residual rows and their sparse gradients during one evaluation.

    Gradients are kept in the order they were written (one run of entries per row,
    plus entries added to earlier rows by :meth:`add_entry`); :meth:`jacobian`
    assembles them into CSR through a :class:`SparsityPattern` when one is attached
    (``pattern``), which is built once and reused while the entry layout repeats.
    """

    __slots__ = (
        "_cols",
        "_counts",
        "_data",
        "_xcols",
        "_xdata",
        "_xrows",
        "names",
        "pattern",
        "scales",
        "sets",
        "values",
    )

    def __init__(self, pattern: SparsityPattern | None = None) -> None:
        self.names: list[str] = []
        self.sets: list[str] = []
        self.values: list[float] = []
        self.scales: list[float] = []
        self.pattern = pattern
        self._counts: list[int] = []
        self._cols: list[int] = []
        self._data: list[float] = []
        self._xrows: list[int] = []
        self._xcols: list[int] = []
        self._xdata: list[float] = []

    def add(self, name: str, eq_set: str, value: float, grad: dict[int, float], scale: float) -> None:
        """Append one residual ``value`` with gradient ``{column: derivative}``."""
        self.names.append(name)
        self.sets.append(eq_set)
        self.values.append(float(value))
        self.scales.append(scale)
        self._counts.append(len(grad))
        self._cols.extend(grad)
        self._data.extend(grad.values())

    def add_entry(self, row: int, col: int, d: float) -> None:
        """Add ``d`` to the gradient of an existing row ``row`` at column ``col``."""
        self._xrows.append(row)
        self._xcols.append(col)
        self._xdata.append(d)

    def residuals(self) -> np.ndarray:
        return np.asarray(self.values, dtype=float)

    def entries(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """All gradient entries as ``(rows, cols, values)`` in the order written."""
        counts = np.asarray(self._counts, dtype=np.int64)
        r = np.repeat(np.arange(counts.size, dtype=np.int64), counts)
        c = np.asarray(self._cols, dtype=np.int64)
        d = np.asarray(self._data, dtype=float)
        if self._xrows:
            r = np.concatenate([r, np.asarray(self._xrows, dtype=np.int64)])
            c = np.concatenate([c, np.asarray(self._xcols, dtype=np.int64)])
            d = np.concatenate([d, np.asarray(self._xdata, dtype=float)])
        return r, c, d

    def jacobian(self, n_vars: int) -> sp.csr_matrix:
        """The gradient rows as a sparse matrix; repeated entries are summed."""
        if self.pattern is not None:
            return self.pattern.assemble(self, n_vars)
        r, c, d = self.entries()
        return sp.csr_matrix((d, (r, c)), shape=(len(self.values), n_vars))


class SparsityPattern:
    """The CSR structure of a Jacobian whose entries are written in a fixed order.

    The first :meth:`assemble` sorts the entries into CSR (summing repeated
    ones) and remembers where each entry lands; later calls with the same entry
    layout (same rows, columns and order; checked every call) only scatter the
    values into that structure. A different layout rebuilds the pattern
    (counted in ``rebuilds``).
    """

    def __init__(self) -> None:
        self.rebuilds = 0
        self._counts: np.ndarray | None = None
        self._cols = np.empty(0, dtype=np.int64)
        self._xrows = np.empty(0, dtype=np.int64)
        self._shape = (0, 0)
        self._slot = np.empty(0, dtype=np.int64)
        self._indices = np.empty(0, dtype=np.int32)
        self._indptr = np.empty(0, dtype=np.int32)
        self._unique = True

    def _matches(self, counts: np.ndarray, cols: np.ndarray, xrows: np.ndarray, shape: tuple[int, int]) -> bool:
        return (self._counts is not None and shape == self._shape and np.array_equal(counts, self._counts)
                and np.array_equal(cols, self._cols) and np.array_equal(xrows, self._xrows))

    def assemble(self, rows: Rows, n_vars: int) -> sp.csr_matrix:
        """The Jacobian of ``rows`` over ``n_vars`` columns (CSR, sorted, no repeated entries)."""
        m = len(rows.values)
        counts = np.asarray(rows._counts, dtype=np.int64)
        cols = np.asarray(rows._cols + rows._xcols, dtype=np.int64)
        xrows = np.asarray(rows._xrows, dtype=np.int64)
        data = np.asarray(rows._data + rows._xdata, dtype=float)
        if not self._matches(counts, cols, xrows, (m, n_vars)):
            self._build(counts, cols, xrows, (m, n_vars))
        nnz = self._indices.size
        values: np.ndarray
        if self._unique:
            values = np.empty(nnz)
            values[self._slot] = data
        else:
            values = np.bincount(self._slot, weights=data, minlength=nnz).astype(float)
        return sp.csr_matrix((values, self._indices.copy(), self._indptr.copy()), shape=(m, n_vars))

    def _build(self, counts: np.ndarray, cols: np.ndarray, xrows: np.ndarray, shape: tuple[int, int]) -> None:
        m, n_vars = shape
        r = np.concatenate([np.repeat(np.arange(m, dtype=np.int64), counts), xrows])
        key = r * max(n_vars, 1) + cols
        uniq, slot = np.unique(key, return_inverse=True)
        self._slot = slot.astype(np.int64).reshape(-1)
        self._unique = uniq.size == key.size
        self._indices = (uniq % max(n_vars, 1)).astype(np.int32)
        self._indptr = np.searchsorted(uniq // max(n_vars, 1), np.arange(m + 1)).astype(np.int32)
        self._counts, self._cols, self._xrows, self._shape = counts, cols, xrows, shape
        self.rebuilds += 1


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

    def derive(self, z: np.ndarray) -> Context:
        """A context at another ``z`` (same layout and constants) that keeps this one's cached states.

        A stream's property state is kept where its pressure and enthalpy are the same
        in both vectors (bit for bit), so the new context gives exactly the numbers a
        fresh one would; saturation states are keyed by pressure and all kept. Used where
        many nearby vectors are evaluated (finite differences, outputs at the solution).
        """
        new = Context(self.layout, z, self.water, self.constants)
        if self._ph:
            n_s = len(self.layout.streams)
            zs, zo = z[: 3 * n_s], self.z[: 3 * n_s]
            same = (zs[1::3] == zo[1::3]) & (zs[2::3] == zo[2::3])
            new._ph = {k: st for k, st in self._ph.items() if same[k]}
        new._sat = dict(self._sat)
        return new

    def with_value(self, col: int, value: float) -> Context:
        """A context with ``z[col]`` replaced by ``value``; cached states that do not depend on it are kept.

        The numbers are those of a fresh context. Saturation states (keyed by pressure)
        are shared with this context.
        """
        new = self._shifted(col, value)
        k = self._stream_of(col)
        if k is not None:
            new._ph.pop(k, None)
        return new

    def nudged(self, col: int, value: float) -> Context:
        """Like :meth:`with_value`, but a moved stream state is this context's, extended to first order.

        The stream whose pressure or enthalpy ``col`` is gets the state
        ``X + (∂X/∂p) Δp + (∂X/∂h) Δh`` for X in T, s, v, x (the derivatives are the
        state's own). A central difference over two nudged contexts is then the
        analytic chain rule through the state's derivatives, with no property call
        for the moved stream. For derivative stencils only.
        """
        new = self._shifted(col, value)
        k = self._stream_of(col)
        if k is not None:
            st = self._ph.get(k)
            if st is None:
                new._ph.pop(k, None)
            else:
                dp = value - float(self.z[col]) if col % 3 == 1 else 0.0
                dh = value - float(self.z[col]) if col % 3 == 2 else 0.0
                new._ph[k] = replace(
                    st, p=st.p + dp, h=st.h + dh, T=st.T + st.dT_dp * dp + st.dT_dh * dh,
                    s=st.s + st.ds_dp * dp + st.ds_dh * dh, v=st.v + st.dv_dp * dp + st.dv_dh * dh,
                    x=st.x + st.dx_dp * dp + st.dx_dh * dh)
        return new

    def _shifted(self, col: int, value: float) -> Context:
        z = self.z.copy()
        z[col] = value
        new = Context(self.layout, z, self.water, self.constants)
        new._ph = dict(self._ph)
        new._sat = self._sat  # keyed by the exact pressure: valid in every context
        return new

    def _stream_of(self, col: int) -> int | None:
        """The stream whose state (p, h) column ``col`` is, else None (flows and equipment variables)."""
        if col < 3 * len(self.layout.streams) and col % 3 != 0:
            return col // 3
        return None


@dataclass(frozen=True)
class Layout:
    """Index of every variable in ``z``."""

    streams: tuple[str, ...]
    extras: tuple[str, ...]
    _stream_index: dict[str, int] = field(init=False, repr=False, compare=False)
    _extra_index: dict[str, int] = field(init=False, repr=False, compare=False)

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
        return self._extra_index[name]

    def name_of(self, col: int) -> str:
        """Human name of variable ``col``, e.g. ``main_steam.p`` or ``generator.power``."""
        n_s = 3 * len(self.streams)
        if col < n_s:
            return f"{self.streams[col // 3]}.{'mph'[col % 3]}"
        return self.extras[col - n_s]
