"""The flowsheet: equipment built from a plant configuration, one variable vector, one residual function."""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from twin.model.base import Equipment, Guess
from twin.model.core import (
    BALANCE,
    PERFORMANCE,
    SCALE_ENTHALPY,
    SCALE_MASS,
    SCALE_PRESSURE,
    SCALE_TEMPERATURE,
    Context,
    Layout,
    Rows,
    SparsityPattern,
)
from twin.model.flow import (
    Boiler,
    CycleLoss,
    Mixer,
    Pipe,
    Pump,
    Reheater,
    Source,
    Splitter,
    ThrottleValve,
)
from twin.model.heat_exchange import ClosedHeater, Condenser, OpenHeater
from twin.model.turbine import ExhaustLoss, Generator, TurbineGroup
from twin.properties import Water, water

EQUIPMENT_CLASSES: dict[str, type[Equipment]] = {
    cls.kind: cls
    for cls in (
        Source,
        CycleLoss,
        Boiler,
        Reheater,
        ThrottleValve,
        Pipe,
        TurbineGroup,
        ExhaustLoss,
        Splitter,
        Mixer,
        Pump,
        ClosedHeater,
        OpenHeater,
        Condenser,
        Generator,
    )
}

SPEC_QUANTITIES = ("mass_flow", "pressure", "temperature", "specific_enthalpy")


@dataclass(frozen=True)
class Spec:
    """A specified value of one stream quantity (boundary condition or design value), SI."""

    stream: str
    quantity: str  # one of SPEC_QUANTITIES
    value: float

    @property
    def name(self) -> str:
        return f"spec.{self.stream}.{self.quantity}"


class Flowsheet:
    """Streams and equipment of one unit, with the residuals of their equations.

    Parameters
    ----------
    streams : sequence
        Objects with ``id``, ``design`` (dict of SI values by quantity) and ``held``.
    equipment : sequence
        Objects with ``id``, ``kind``, ``ports`` and ``params`` (SI, defaults filled).
    props : Water, optional
        Property calculator; the per-thread default when omitted.
    warm_start : bool
        Start each stream's (p, h) state from the temperature its previous state had
        (``Water.ph(p, h, T_guess)``). The states agree with the table-started ones
        to the refinement tolerance (~1e-10 relative), not bit for bit, so results
        then depend, at that level, on what was evaluated before; off by default.
    """

    def __init__(self, streams: Sequence[Any], equipment: Sequence[Any], props: Water | None = None,
                 warm_start: bool = False) -> None:
        self.water = props or water()
        self.stream_configs = {s.id: s for s in streams}
        self.equipment: list[Equipment] = []
        for cfg in equipment:
            cls = EQUIPMENT_CLASSES.get(cfg.kind)
            if cls is None:
                raise ValueError(f"equipment {cfg.id!r}: unknown kind {cfg.kind!r}; expected one of {sorted(EQUIPMENT_CLASSES)}")
            self.equipment.append(cls(cfg))
        self.by_id = {e.id: e for e in self.equipment}
        for e in self.equipment:
            if isinstance(e, Generator):
                e.members = [self.by_id[t] for t in e.params["turbines"]]
        extras = tuple(x for e in self.equipment for x in e.extras())
        self.layout = Layout(tuple(s.id for s in streams), extras)
        self.previous_T: list[float] | None = [math.nan] * len(self.layout.streams) if warm_start else None
        # one Jacobian structure per kind of evaluation (performance, skipped relations, specs)
        self._patterns: dict[tuple, SparsityPattern] = {}

    @classmethod
    def from_config(cls, config: Any, props: Water | None = None, warm_start: bool = False) -> Flowsheet:
        return cls(config.streams, config.equipment, props, warm_start)

    # ------------------------------------------------------------ queries
    @property
    def n_vars(self) -> int:
        return self.layout.n_vars

    def of_kind(self, kind: type[Equipment] | str) -> list[Equipment]:
        if isinstance(kind, str):
            return [e for e in self.equipment if e.kind == kind]
        return [e for e in self.equipment if isinstance(e, kind)]

    def context(self, z: np.ndarray, constants: dict | None = None, warm: bool = True) -> Context:
        """An evaluation context at ``z``; ``warm=False``: states from the start table even with ``warm_start``."""
        return Context(self.layout, z, self.water, constants or {}, self.previous_T if warm else None)

    # ------------------------------------------------------------ equations
    def evaluate(
        self,
        z: np.ndarray,
        *,
        performance: bool = True,
        skip: Iterable[str] = (),
        specs: Sequence[Spec] = (),
        constants: dict | None = None,
        context: Context | None = None,
        fixed_pattern: bool = True,
    ) -> Rows:
        """Residuals and gradients of the balances, performance relations and specs at ``z``.

        Parameters
        ----------
        z : ndarray
            All variables (see ``twin.model.core``).
        performance : bool
            Include the performance relations (the expected model) or only the balances.
        skip : iterable of str
            Relation names to leave out (``"hp.stodola"``, ``"condenser.cooling"``...).
        specs : sequence of Spec
            Specified stream values appended as rows.
        constants : dict
            Design-point constants by equipment id (Stodola K, condenser UA...).
        context : Context, optional
            The evaluation context at this ``z`` (with ``constants``) when the caller shares
            its property cache; a new one otherwise.
        fixed_pattern : bool
            Attach the :class:`SparsityPattern` kept for this kind of evaluation and compute
            the stream states it read last time in one pass first (the default); False
            gives the straightforward evaluation (states read lazily from the start table,
            Jacobian from coordinate triplets), the reference the fast path is tested against.

        Returns
        -------
        Rows
            With a :class:`SparsityPattern` attached that is kept per kind of evaluation, so
            the Jacobian's CSR structure is built once.
        """
        ctx = context if context is not None else self.context(z, constants, warm=fixed_pattern)
        skipped = frozenset(skip)
        if fixed_pattern:
            key = (performance, skipped, tuple(spec.name for spec in specs))
            pattern = self._patterns.get(key)
            if pattern is None:
                if len(self._patterns) > 64:
                    self._patterns.clear()
                pattern = self._patterns[key] = SparsityPattern()
            ctx.prefetch(pattern.states)  # every stream state this kind of evaluation reads, in one pass
            rows = Rows(pattern, ctx)
        else:
            rows = Rows()
        for e in self.equipment:
            e.balances(ctx, rows)
        if performance:
            for e in self.equipment:
                e.performance(ctx, rows, skipped)
        for spec in specs:
            self._spec_row(ctx, rows, spec)
        return rows

    def relation_names(self, z: np.ndarray, constants: dict | None = None, skip: Iterable[str] = ()) -> list[str]:
        return self.evaluate(z, constants=constants, skip=skip).names

    def _spec_row(self, ctx: Context, rows: Rows, spec: Spec) -> None:
        lay = ctx.layout
        s, q, v = spec.stream, spec.quantity, spec.value
        if q == "mass_flow":
            rows.add(spec.name, "spec", ctx.m(s) - v, {lay.m(s): 1.0}, SCALE_MASS)
        elif q == "pressure":
            rows.add(spec.name, "spec", ctx.p(s) - v, {lay.p(s): 1.0}, SCALE_PRESSURE)
        elif q == "specific_enthalpy":
            rows.add(spec.name, "spec", ctx.h(s) - v, {lay.h(s): 1.0}, SCALE_ENTHALPY)
        elif q == "temperature":
            st = ctx.ph(s)
            rows.add(spec.name, "spec", st.T - v, {lay.p(s): st.dT_dp, lay.h(s): st.dT_dh}, SCALE_TEMPERATURE)
        else:
            raise ValueError(f"spec for stream {s!r}: unknown quantity {q!r}; expected one of {SPEC_QUANTITIES}")

    # ------------------------------------------------------------ initial guess
    def initial_guess(self, specs: Sequence[Spec], reference_flow: float, max_sweeps: int = 60) -> np.ndarray:
        """A starting point for Newton from the specs, by sweeping each equipment's guess rule.

        Parameters
        ----------
        specs : sequence of Spec
            Specified stream values; they are set first.
        reference_flow : float
            Typical mass flow [kg/s] (the design main-steam flow) for flows with no other guess.
        max_sweeps : int
            Passes over the equipment before giving up.

        Raises
        ------
        ValueError
            If some variable cannot be guessed (a disconnected or under-specified flowsheet).
        """
        g = Guess(self.layout, self.water, reference_flow)
        temperatures = []
        for spec in specs:
            if spec.quantity == "mass_flow":
                g.set(spec.stream, "m", spec.value)
            elif spec.quantity == "pressure":
                g.set(spec.stream, "p", spec.value)
            elif spec.quantity == "specific_enthalpy":
                g.set(spec.stream, "h", spec.value)
            else:
                temperatures.append(spec)
        fallback_used = False
        for _ in range(max_sweeps):
            for spec in temperatures:
                if g.has(spec.stream, "p"):
                    g.set(spec.stream, "h", self.water.h_pT(g.get(spec.stream, "p"), spec.value))
            changed = False
            for e in self.equipment:
                changed |= e.guess(g)
            if not np.isnan(g.z).any():
                break
            if not changed:
                if fallback_used:
                    break
                fallback_used = self._fallback(g)
        missing = [self.layout.name_of(int(i)) for i in np.flatnonzero(np.isnan(g.z))]
        if missing:
            raise ValueError(f"no initial guess for {len(missing)} variables (first: {', '.join(missing[:6])})")
        return g.z

    def _fallback(self, g: Guess) -> bool:
        """Break circular dependencies: unknown splitter branches start at a few percent."""
        changed = False
        for e in self.of_kind(Splitter):
            a = e.port("inlet")
            if g.has(a, "m"):
                for b in e.port_list("outlets")[1:]:
                    changed |= g.set(b, "m", 0.04 * g.get(a, "m"))
        return changed


def balance_rows(fs: Flowsheet, z: np.ndarray) -> Rows:
    """Only the balances (mass, energy, equal pressure, saturation) at ``z``."""
    return fs.evaluate(z, performance=False)


__all__ = ["BALANCE", "EQUIPMENT_CLASSES", "PERFORMANCE", "Flowsheet", "Spec", "balance_rows"]
