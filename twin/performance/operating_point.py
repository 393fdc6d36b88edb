"""Expected heat balances cached on an operating-point grid, and heat-rate sensitivities there.

The expected model (:mod:`twin.performance.expected`) is a forward heat balance at
the present load and cooling-water inlet temperature. Solving it every window costs
several Newton solves; the unit's operating point moves little from one window to
the next. :class:`OperatingPoints` solves it once per *node* of a fixed grid, load
every :data:`LOAD_STEP` and cooling-water inlet every :data:`CW_STEP` from the
configured design value, and interpolates between nodes with the three-point
(quadratic) Lagrange formula in each direction. A new solve happens only when the
operating point moves into a cell whose nodes are not cached yet, i.e. past a
threshold of half a grid step from the nearest solved node.

Error bound: with quadratic interpolation the error is of the order
``h³ |f'''| / 27``; for demo-u1 over 30–110 % load and ±8 K of cooling water it is
below 0.05 kJ/kWh on the turbine heat rate (``tests/test_operating_point.py``
compares with fresh forward solves at random points; the fresh solve is the truth).

Kinks of the throttle-pressure control are not interpolated across: a stencil keeps
to one side of a schedule row's load, and a stencil whose nodes were solved in
different pressure modes (it straddles the load where the control valves open wide)
is not used, that window's point is solved directly.

While the load or the cooling water moves by more than a grid step from one window
to the next (a ramp, a step), the expected model solves that window's point directly instead of adding
grid rows it would use once (:meth:`twin.performance.expected.ExpectedModel.deviation`);
while it ramps more slowly, each window solves at most one node of the row ahead
(:meth:`OperatingPoints.prefetch`), so a new row is not built in one window. The
live cycle also spreads a new cell's stencil (:meth:`OperatingPoints.fill`): until
the operating point has stayed in one cell for a few windows, the window's expected
values are a direct solve at its point and at most :data:`FILL_PER_WINDOW` stencil
nodes are solved (:attr:`twin.performance.expected.ExpectedModel.settle_windows`).

Every node is solved from the design point, never from the previous window's
solution, so a cached value depends only on the node, not on the order in which the
windows came: the cache is not state (it is left out of ``UnitCycle.snapshot``) and
a restarted process, a back-fill chunk and the live daemon get the same numbers.

:func:`linear_response` gives the first-order change of the heat rate per unit change
of a model parameter (a constant such as an efficiency factor or TTD, or a specified
value) at a solved state, from one factorisation of the heat-balance Jacobian and one
residual evaluation per parameter (implicit-function theorem: ``dz = −J⁻¹ ∂F/∂θ dθ``).
"""

from __future__ import annotations

import math
from collections import OrderedDict
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import scipy.sparse.linalg as spla

from twin.model.flowsheet import Flowsheet, Spec
from twin.model.solve import HeatBalance

#: Grid step of the load fraction [-] (nodes at multiples of it, 0.2 … 1.2).
LOAD_STEP = 0.02
#: Grid step of the cooling-water inlet temperature [K] (nodes at design ± multiples of it).
CW_STEP = 1.0
#: Nodes kept (least recently used dropped first).
MAX_NODES = 256
#: Stencil nodes a window solves while its operating point settles into a cell.
FILL_PER_WINDOW = 2

_LOAD_MIN, _LOAD_MAX = 10, 60  # node indices of 0.2 and 1.2 at LOAD_STEP


@dataclass
class Node:
    """One solved grid point: the expected state, its KPI values and (lazily) sensitivities."""

    load: float  # [-]
    cw_inlet: float | None  # [K]; None = the configured cooling-water inlet
    hb: HeatBalance | None
    values: dict[str, float]
    error: str = ""
    sensitivities: dict[str, float] | None = None
    extra: dict[str, Any] = field(default_factory=dict)


def _weights(t: float) -> tuple[float, float, float]:
    """Three-point Lagrange weights at ``t`` = (x − x₀)/h for the nodes −1, 0, +1."""
    return 0.5 * t * (t - 1.0), 1.0 - t * t, 0.5 * t * (t + 1.0)


class OperatingPoints:
    """Expected values on the operating-point grid (see the module docstring).

    Parameters
    ----------
    solve : callable
        ``solve(load, cw_inlet) -> HeatBalance``: the expected model's deterministic solve.
    evaluate : callable
        ``evaluate(hb) -> dict``: the values to interpolate (KPIs and the like) at a state.
    cw_design : float or None
        The configured cooling-water inlet temperature [K] (grid origin); None: no cw axis.
    load_knots : sequence of float
        Loads [-] where the expected state has a kink (the rows of a throttle-pressure
        schedule): a load stencil never straddles one, it takes its three nodes on the
        point's side (one-sided quadratic), so the kink is not smeared over a grid step.
    """

    def __init__(self, solve: Callable[[float, float | None], HeatBalance],
                 evaluate: Callable[[HeatBalance], dict[str, float]], cw_design: float | None,
                 load_knots: Sequence[float] = ()) -> None:
        self._solve, self._evaluate = solve, evaluate
        self.cw_design = cw_design
        self._knots = tuple(sorted(k / LOAD_STEP for k in load_knots))
        self._nodes: OrderedDict[tuple[int, int], Node] = OrderedDict()
        self.solves = 0  # node solves so far (bench and tests)

    def __len__(self) -> int:
        return len(self._nodes)

    def node(self, i: int, j: int) -> Node:
        """The node at load index ``i`` and cooling-water index ``j`` (solved on first use)."""
        key = (i, j)
        got = self._nodes.get(key)
        if got is not None:
            self._nodes.move_to_end(key)
            return got
        load = i / round(1.0 / LOAD_STEP)
        cw = None if self.cw_design is None else self.cw_design + j * CW_STEP
        self.solves += 1
        try:
            hb = self._solve(load, cw)
            node = Node(load, cw, hb, self._evaluate(hb))
        except (ValueError, ArithmeticError, RuntimeError) as exc:  # SolveError, PropertyError included
            node = Node(load, cw, None, {}, type(exc).__name__)
        self._nodes[key] = node
        while len(self._nodes) > MAX_NODES:
            self._nodes.popitem(last=False)
        return node

    def _index(self, load: float, cw: float | None) -> tuple[int, float, int, float]:
        x = load / LOAD_STEP
        i = min(max(round(x), _LOAD_MIN + 1), _LOAD_MAX - 1)
        for k in self._knots:
            if i - 1 < k < i + 1:  # the stencil would straddle a kink: keep to the point's side of it
                i = math.ceil(k) + 1 if x >= k else math.floor(k) - 1
                i = min(max(i, _LOAD_MIN + 1), _LOAD_MAX - 1)
                break
        if self.cw_design is None or cw is None or not math.isfinite(cw):
            return i, x - i, 0, 0.0
        y = (cw - self.cw_design) / CW_STEP
        j = round(y)
        return i, x - i, j, y - j

    def nearest(self, load: float, cw: float | None) -> Node:
        """The solved node nearest to (``load`` [-], ``cw`` [K])."""
        x = load / LOAD_STEP
        i = min(max(round(x), _LOAD_MIN), _LOAD_MAX)
        _, _, j, _ = self._index(load, cw)
        return self.node(i, j)

    def interpolate(self, load: float, cw: float | None) -> dict[str, float]:
        """Interpolated values at (``load`` [-], ``cw`` [K]).

        Raises
        ------
        ValueError
            If a node of the stencil could not be solved (the message names it), or
            the stencil straddles the load where the control valves open wide (its
            nodes solved in different pressure modes: a kink the caller solves directly).
        """
        out: dict[str, float] = {}
        modes = set()
        for (i, j), w in self._stencil(load, cw):
            n = self.node(i, j)
            if n.hb is None:
                raise ValueError(f"expected model node load {n.load:g}, cooling water {n.cw_inlet}: {n.error}")
            modes.add(n.hb.pressure_mode)
            if len(modes) > 1:
                raise ValueError(f"expected model stencil at load {load:g} straddles the valves-wide-open load")
            for k, v in n.values.items():
                out[k] = out.get(k, 0.0) + w * v
        return out

    def _stencil(self, load: float, cw: float | None) -> list[tuple[tuple[int, int], float]]:
        """The nodes (load index, cooling-water index) and weights of the point's interpolation."""
        i, t, j, u = self._index(load, cw)
        wi = _weights(t)
        wj = _weights(u) if (self.cw_design is not None and cw is not None and math.isfinite(cw)) else None
        cols = ((j - 1, wj[0]), (j, wj[1]), (j + 1, wj[2])) if wj is not None else ((j, 1.0),)
        return [((i + di, jj), a * b) for di, a in zip((-1, 0, 1), wi, strict=True) for jj, b in cols]

    def cell(self, load: float, cw: float | None) -> tuple[int, int]:
        """The centre (load index, cooling-water index) of the point's interpolation stencil."""
        i, _, j, _ = self._index(load, cw)
        return i, j

    def fill(self, load: float, cw: float | None, budget: int) -> int:
        """Solve up to ``budget`` missing nodes of the stencil at (``load``, ``cw``); the number solved.

        The nearest node first (the one a window's cause split is made at), then the
        stencil in order; the values are the same whenever a node is solved.
        """
        if not 0.2 <= load <= 1.2 or budget <= 0:
            return 0
        x = load / LOAD_STEP
        near = (min(max(round(x), _LOAD_MIN), _LOAD_MAX), self._index(load, cw)[2])
        keys = [near] + [k for k, _ in self._stencil(load, cw) if k != near]
        done = 0
        for key in keys:
            if done >= budget:
                break
            if key not in self._nodes:
                self.node(*key)
                done += 1
        return done

    def prefetch(self, load: float, cw: float | None) -> bool:
        """Solve one missing node of the stencil at (``load``, ``cw``); False if there was none.

        The expected model calls it for the point one grid step ahead while the load
        ramps slowly, so the next grid row is built one node per window instead of all
        at once (the values are the same whenever a node is solved).
        """
        if not 0.2 <= load <= 1.2:
            return False
        for key, _ in self._stencil(load, cw):
            if key not in self._nodes:
                self.node(*key)
                return True
        return False


def linear_response(fs: Flowsheet, z: np.ndarray, base: tuple[Sequence[Spec], frozenset[str], Mapping[str, Any]],
                    perturbed: Mapping[str, tuple[Sequence[Spec], Mapping[str, Any], float]],
                    output: Callable[[np.ndarray], float]) -> dict[str, float]:
    """All of :func:`iter_linear_response` at once, as a dict."""
    return dict(iter_linear_response(fs, z, base, perturbed, output))


def iter_linear_response(fs: Flowsheet, z: np.ndarray,
                         base: tuple[Sequence[Spec], frozenset[str], Mapping[str, Any]],
                         perturbed: Mapping[str, tuple[Sequence[Spec], Mapping[str, Any], float]],
                         output: Callable[[np.ndarray], float]) -> Iterator[tuple[str, float]]:
    """First-order change of ``output`` per unit change of each parameter at a solved state ``z``.

    Parameters
    ----------
    fs : Flowsheet
    z : ndarray
        A solution of the base system (its residuals at solver tolerance).
    base : (specs, skip, constants)
        The square system ``z`` solves.
    perturbed : mapping
        Parameter name → (specs, constants, step): the same system (same rows in the
        same order) with one parameter moved by ``step`` (in the parameter's unit).
    output : callable
        ``output(z) -> float`` (e.g. the heat rate at a state).

    Yields
    ------
    (str, float)
        Parameter name, d output / d parameter (implicit-function theorem, one
        factorisation of the base Jacobian; a parameter whose rows differ in
        structure from the base is left out), one residual evaluation each, so a
        caller can spread the work over several windows.

    References
    ----------
    Nocedal, J., Wright, S. J. (2006). *Numerical Optimization*, 2nd ed., §A.2
    (implicit function theorem).
    """
    specs, skip, constants = base
    rows = fs.evaluate(z, skip=skip, specs=specs, constants=dict(constants))
    scales = np.asarray(rows.scales)
    r0 = rows.residuals() / scales
    if r0.size != fs.n_vars:
        raise ValueError(f"the system is not square: {r0.size} equations for {fs.n_vars} variables")
    lu = spla.splu(rows.jacobian(fs.n_vars).multiply(1.0 / scales[:, None]).tocsc())
    y0 = output(z)
    for name, (p_specs, p_consts, step) in perturbed.items():
        p_rows = fs.evaluate(z, skip=skip, specs=p_specs, constants=dict(p_consts))
        if p_rows.names != rows.names:
            continue
        dz = lu.solve(-(p_rows.residuals() / scales - r0))
        yield name, (output(z + dz) - y0) / step
