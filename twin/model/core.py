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

from collections.abc import Iterable
from dataclasses import dataclass, field, replace
from itertools import chain

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

    Each row keeps its gradient dictionary as written (plus entries added to earlier
    rows by :meth:`add_entry`); :meth:`jacobian` flattens them once and assembles
    CSR through a :class:`SparsityPattern` when one is attached (``pattern``): built
    once per kind of evaluation, later evaluations only gather their values into it.
    ``context`` is the evaluation context the rows were written from (the pattern
    learns from it which stream states an evaluation of its kind reads, see
    :meth:`Context.prefetch`).
    """

    __slots__ = ("_grads", "_xcols", "_xdata", "_xrows", "context", "names", "pattern", "scales", "sets", "values")

    def __init__(self, pattern: SparsityPattern | None = None, context: Context | None = None) -> None:
        self.names: list[str] = []
        self.sets: list[str] = []
        self.values: list[float] = []
        self.scales: list[float] = []
        self.pattern = pattern
        self.context = context
        self._grads: list[dict[int, float]] = []
        self._xrows: list[int] = []
        self._xcols: list[int] = []
        self._xdata: list[float] = []

    def add(self, name: str, eq_set: str, value: float, grad: dict[int, float], scale: float) -> None:
        """Append one residual ``value`` with gradient ``{column: derivative}`` (kept, not copied)."""
        self.names.append(name)
        self.sets.append(eq_set)
        self.values.append(float(value))
        self.scales.append(scale)
        self._grads.append(grad)

    def add_entry(self, row: int, col: int, d: float) -> None:
        """Add ``d`` to the gradient of an existing row ``row`` at column ``col``."""
        self._xrows.append(row)
        self._xcols.append(col)
        self._xdata.append(d)

    def residuals(self) -> np.ndarray:
        return np.asarray(self.values, dtype=float)

    def counts(self) -> list[int]:
        """Number of gradient entries written with each row (not counting :meth:`add_entry`)."""
        return list(map(len, self._grads))

    def columns(self) -> list[int]:
        """Columns of all gradient entries in the order written (rows' own, then added ones)."""
        return [*chain.from_iterable(self._grads), *self._xcols]

    def data(self) -> list[float]:
        """Values of all gradient entries, in the order of :meth:`columns`."""
        return [*chain.from_iterable(map(dict.values, self._grads)), *self._xdata]

    def entries(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """All gradient entries as ``(rows, cols, values)`` in the order written."""
        counts = np.asarray(self.counts(), dtype=np.int64)
        r = np.repeat(np.arange(counts.size, dtype=np.int64), counts)
        if self._xrows:
            r = np.concatenate([r, np.asarray(self._xrows, dtype=np.int64)])
        return r, np.asarray(self.columns(), dtype=np.int64), np.asarray(self.data(), dtype=float)

    def jacobian(self, n_vars: int) -> sp.csr_matrix:
        """The gradient rows as a sparse matrix; repeated entries are summed."""
        if self.pattern is not None:
            return self.pattern.assemble(self, n_vars)
        r, c, d = self.entries()
        return sp.csr_matrix((d, (r, c)), shape=(len(self.values), n_vars))


class SparsityPattern:
    """The CSR structure of a Jacobian whose entries are written in a fixed order.

    The first :meth:`assemble` sorts the entries into CSR (summing repeated ones)
    and remembers where each entry lands; later calls only gather the values into
    that structure. The guard is cheap: the counts of rows, entries and added
    entries, the column count and the row names (the same string objects every call
    for the equipment rows, see :meth:`twin.model.base.Equipment.relation`); a
    different layout rebuilds the pattern (counted in ``rebuilds``). The columns of a
    named row depend only on the plant, the constants and the equipment code, not on
    the state, so a layout that passes the guard has the same columns; with
    ``verify`` set (tests) every call also compares the columns entry by entry and
    raises if the guard missed a change.

    It also keeps ``states``: the streams whose property state evaluations of this
    kind read (learned from the rows' context), which the next evaluation computes
    in one pass up front (:meth:`Context.prefetch`).
    """

    #: Compare every entry's row and column with the kept structure on every call (tests).
    verify = False

    def __init__(self) -> None:
        self.rebuilds = 0
        self.states: tuple[int, ...] = ()
        self._state_set: frozenset[int] = frozenset()
        self._signature: tuple[int, int, int, int] | None = None
        self._names: list[str] = []
        self._layout: tuple[list[int], list[int], list[int]] = ([], [], [])
        self._shape = (0, 0)
        self._gather = np.empty(0, dtype=np.int64)
        self._slot = np.empty(0, dtype=np.int64)
        self._indices = np.empty(0, dtype=np.int32)
        self._indptr = np.empty(0, dtype=np.int32)
        self._unique = True

    def assemble(self, rows: Rows, n_vars: int) -> sp.csr_matrix:
        """The Jacobian of ``rows`` over ``n_vars`` columns (CSR, sorted, no repeated entries)."""
        data = rows.data()
        signature = (len(rows.values), n_vars, len(data), len(rows._xdata))
        if signature != self._signature or rows.names != self._names:
            self._build(rows, signature)
        elif self.verify and self._layout != (rows.counts(), rows.columns(), rows._xrows):
            raise RuntimeError("SparsityPattern: the entry layout changed but the guard (counts, row names) passed")
        if rows.context is not None:
            self._learn(rows.context)
        values: np.ndarray
        if self._unique:
            values = np.asarray(data, dtype=float)[self._gather]
        else:
            values = np.bincount(self._slot, weights=data, minlength=self._indices.size).astype(float)
        return sp.csr_matrix((values, self._indices.copy(), self._indptr.copy()), shape=self._shape)

    def _build(self, rows: Rows, signature: tuple[int, int, int, int]) -> None:
        m, n_vars = signature[0], signature[1]
        r, c, _ = rows.entries()
        key = r * max(n_vars, 1) + c
        uniq, slot = np.unique(key, return_inverse=True)
        self._slot = slot.astype(np.int64).reshape(-1)
        self._unique = uniq.size == key.size
        # unique entries: CSR value k is written entry _gather[k] (the inverse permutation of _slot)
        self._gather = np.argsort(self._slot, kind="stable") if self._unique else np.empty(0, dtype=np.int64)
        self._indices = (uniq % max(n_vars, 1)).astype(np.int32)
        self._indptr = np.searchsorted(uniq // max(n_vars, 1), np.arange(m + 1)).astype(np.int32)
        self._signature, self._shape = signature, (m, n_vars)
        self._names = list(rows.names)
        self._layout = (rows.counts(), rows.columns(), list(rows._xrows))
        self.rebuilds += 1

    def _learn(self, ctx: Context) -> None:
        if not ctx._ph.keys() <= self._state_set:
            self._state_set = self._state_set.union(ctx._ph)
            self.states = tuple(sorted(self._state_set))


def add_grad(grad: dict[int, float], col: int, d: float) -> None:
    """Add ``d`` to the gradient entry of column ``col`` (one variable may appear twice)."""
    grad[col] = grad.get(col, 0.0) + d


class Context:
    """Read access to ``z`` by stream name, with cached property states.

    One context serves one evaluation of the equations at one ``z`` (``z`` is read
    once, when the context is made: change it through :meth:`with_value`, not in
    place); property states of a stream are computed once and shared by every
    equation that needs them.
    """

    def __init__(self, layout: Layout, z: np.ndarray, water: Water, constants: dict,
                 previous_T: list[float] | None = None) -> None:
        self.layout = layout
        self.z = z
        self.water = water
        self.constants = constants
        # each stream's last computed temperature [K], the Newton start of its next state
        # (shared by the contexts of one flowsheet; None: every state from the start table)
        self.previous_T = previous_T
        self._ph: dict[int, PHState] = {}
        self._sat: dict[float, SatState] = {}
        # z as Python floats: the stream accessors below are read hundreds of times per evaluation
        self._zl: list[float] = np.asarray(z, dtype=float).tolist()

    def m(self, stream: str) -> float:
        return self._zl[self.layout._m[stream]]

    def p(self, stream: str) -> float:
        return self._zl[self.layout._p[stream]]

    def h(self, stream: str) -> float:
        return self._zl[self.layout._h[stream]]

    def ph(self, stream: str) -> PHState:
        """Property state of a stream at its (p, h), cached for this evaluation."""
        k = self.layout._stream_index[stream]
        st = self._ph.get(k)
        if st is None:
            zl, tp = self._zl, self.previous_T
            if tp is None:
                st = self.water.ph(zl[3 * k + 1], zl[3 * k + 2])
            else:
                st = self.water.ph(zl[3 * k + 1], zl[3 * k + 2], tp[k])
                tp[k] = st.T
            self._ph[k] = st
        return st

    def prefetch(self, streams: Iterable[int]) -> None:
        """Compute the property states of ``streams`` (indices into the layout) in one pass.

        :meth:`Flowsheet.evaluate <twin.model.flowsheet.Flowsheet.evaluate>` calls it at
        the start of an evaluation with the streams the previous evaluation of the same
        kind read, so the states come from one loop instead of one by one from inside
        the equations; each is exactly the state :meth:`ph` would compute. A stream
        whose state cannot be computed (outside the property range) is left to
        :meth:`ph`, so the error is raised where, and only if, the state is read.
        """
        cache, zl, ph, tp = self._ph, self._zl, self.water.ph, self.previous_T
        for k in streams:
            if k not in cache:
                try:
                    st = ph(zl[3 * k + 1], zl[3 * k + 2]) if tp is None else ph(zl[3 * k + 1], zl[3 * k + 2], tp[k])
                except ValueError:
                    continue
                cache[k] = st
                if tp is not None:
                    tp[k] = st.T

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
        new = Context(self.layout, z, self.water, self.constants, self.previous_T)
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
        new = Context(self.layout, z, self.water, self.constants, self.previous_T)
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
    _m: dict[str, int] = field(init=False, repr=False, compare=False)
    _p: dict[str, int] = field(init=False, repr=False, compare=False)
    _h: dict[str, int] = field(init=False, repr=False, compare=False)

    @property
    def stream_index(self) -> dict[str, int]:
        return self._stream_index

    def __post_init__(self) -> None:
        object.__setattr__(self, "_stream_index", {s: i for i, s in enumerate(self.streams)})
        object.__setattr__(
            self, "_extra_index", {e: 3 * len(self.streams) + i for i, e in enumerate(self.extras)}
        )
        for q, offset in (("_m", 0), ("_p", 1), ("_h", 2)):  # column of each stream's m, p, h
            object.__setattr__(self, q, {s: 3 * i + offset for i, s in enumerate(self.streams)})

    @property
    def n_vars(self) -> int:
        return 3 * len(self.streams) + len(self.extras)

    def m(self, stream: str) -> int:
        return self._m[stream]

    def p(self, stream: str) -> int:
        return self._p[stream]

    def h(self, stream: str) -> int:
        return self._h[stream]

    def extra(self, name: str) -> int:
        return self._extra_index[name]

    def name_of(self, col: int) -> str:
        """Human name of variable ``col``, e.g. ``main_steam.p`` or ``generator.power``."""
        n_s = 3 * len(self.streams)
        if col < n_s:
            return f"{self.streams[col // 3]}.{'mph'[col % 3]}"
        return self.extras[col - n_s]
