"""Base class of equipment models and the initial-guess state."""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from twin.model.core import (
    BALANCE,
    SCALE_ENERGY_FLOW,
    SCALE_ENTHALPY,
    SCALE_MASS,
    SCALE_PRESSURE,
    Context,
    Layout,
    Rows,
)
from twin.properties import Water


class Guess:
    """Partial initial state: NaN marks a value not yet guessed.

    Parameters
    ----------
    layout : Layout
        Variable index of the flowsheet.
    water : Water
        Property calculator.
    reference_flow : float
        Typical mass flow [kg/s] (the design main-steam flow) for guesses that have no other scale.
    """

    def __init__(self, layout: Layout, water: Water, reference_flow: float) -> None:
        self.layout = layout
        self.water = water
        self.reference_flow = reference_flow
        self.z = np.full(layout.n_vars, np.nan)

    def get(self, stream: str, q: str) -> float:
        return float(self.z[getattr(self.layout, q)(stream)])

    def has(self, stream: str, q: str) -> bool:
        return not math.isnan(self.get(stream, q))

    def set(self, stream: str, q: str, value: float) -> bool:
        """Set a value if it is unknown; return True when something changed."""
        i = getattr(self.layout, q)(stream)
        if math.isnan(self.z[i]) and not math.isnan(value):
            self.z[i] = value
            return True
        return False

    def copy_state(self, src: str, dst: str, qs: str = "mph") -> bool:
        changed = False
        for q in qs:
            if self.has(src, q):
                changed |= self.set(dst, q, self.get(src, q))
        return changed


class Equipment:
    """One piece of equipment: its streams, its equations and its initial guess.

    Subclasses implement ``balances`` (always true: mass, energy, equal
    pressure where physics demands) and ``performance`` (true in the expected
    model: efficiencies, pressure drops, TTD/DCA, Stodola, loss curves).
    """

    kind = ""

    def __init__(self, cfg: Any) -> None:
        self.id: str = cfg.id
        self.ports: dict[str, str | list[str]] = dict(cfg.ports)
        self.params: dict[str, Any] = dict(cfg.params)
        self._relations: dict[str, str] = {}
        self._single_ports = {k: v for k, v in self.ports.items() if isinstance(v, str)}

    # ----------------------------------------------------------- structure
    def port(self, name: str) -> str:
        try:
            return self._single_ports[name]
        except KeyError:
            value = self.ports[name]
            assert isinstance(value, str)
            return value

    def port_list(self, name: str) -> list[str]:
        value = self.ports.get(name, [])
        if isinstance(value, str):
            return [value]
        return list(value)

    def optional_port(self, name: str) -> str | None:
        value = self.ports.get(name)
        return value if isinstance(value, str) and value else None

    def extras(self) -> tuple[str, ...]:
        """Names of equipment variables this equipment adds to ``z``."""
        return ()

    def relation(self, rel: str) -> str:
        """The row name ``<id>.<rel>``; the same string object every call (a cheap layout guard)."""
        name = self._relations.get(rel)
        if name is None:
            name = self._relations[rel] = f"{self.id}.{rel}"
        return name

    # ----------------------------------------------------------- equations
    def balances(self, ctx: Context, rows: Rows) -> None:
        raise NotImplementedError

    def performance(self, ctx: Context, rows: Rows, skip: frozenset[str]) -> None:
        """Performance relations; a relation whose name is in ``skip`` is left out."""

    def guess(self, g: Guess) -> bool:
        """Fill in outlet values from known inlet values; True if anything changed."""
        return False

    # ----------------------------------------------------------- helpers
    def equal_mass(self, ctx: Context, rows: Rows, a: str, b: str, rel: str = "mass") -> None:
        lay = ctx.layout
        rows.add(self.relation(rel), BALANCE, ctx.m(b) - ctx.m(a), {lay.m(b): 1.0, lay.m(a): -1.0}, SCALE_MASS)

    def equal_enthalpy(self, ctx: Context, rows: Rows, a: str, b: str, rel: str = "enthalpy") -> None:
        lay = ctx.layout
        rows.add(self.relation(rel), BALANCE, ctx.h(b) - ctx.h(a), {lay.h(b): 1.0, lay.h(a): -1.0}, SCALE_ENTHALPY)

    def equal_pressure(self, ctx: Context, rows: Rows, a: str, b: str, rel: str, eq_set: str = BALANCE) -> None:
        lay = ctx.layout
        rows.add(self.relation(rel), eq_set, ctx.p(b) - ctx.p(a), {lay.p(b): 1.0, lay.p(a): -1.0}, SCALE_PRESSURE)

    def mass_sum(self, ctx: Context, rows: Rows, inlets: list[str], outlets: list[str], rel: str = "mass") -> None:
        """Σ m_in − Σ m_out = 0."""
        lay = ctx.layout
        grad: dict[int, float] = {}
        value = 0.0
        for s in inlets:
            value += ctx.m(s)
            col = lay.m(s)
            grad[col] = grad.get(col, 0.0) + 1.0
        for s in outlets:
            value -= ctx.m(s)
            col = lay.m(s)
            grad[col] = grad.get(col, 0.0) - 1.0
        rows.add(self.relation(rel), BALANCE, value, grad, SCALE_MASS)

    def energy_sum(
        self, ctx: Context, rows: Rows, inlets: list[str], outlets: list[str], rel: str = "energy", extra: float = 0.0,
        extra_grad: dict[int, float] | None = None,
    ) -> None:
        """Σ m_in h_in − Σ m_out h_out + extra = 0 [W]."""
        lay = ctx.layout
        grad: dict[int, float] = dict(extra_grad or {})
        value = extra
        for sign, streams in ((1.0, inlets), (-1.0, outlets)):
            for s in streams:
                m, h = ctx.m(s), ctx.h(s)
                value += sign * m * h
                cm, ch = lay.m(s), lay.h(s)
                grad[cm] = grad.get(cm, 0.0) + sign * h
                grad[ch] = grad.get(ch, 0.0) + sign * m
        rows.add(self.relation(rel), BALANCE, value, grad, SCALE_ENERGY_FLOW)
