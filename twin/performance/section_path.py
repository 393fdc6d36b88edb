"""A turbine section as a chain of stage groups, expanded from the actual inlet state.

Used by the expected model (:mod:`twin.performance.expected`) to compare section
efficiencies at the *actual* boundary conditions: the design group efficiencies
walked from the actual section inlet through the actual stage pressures, and the
factor on them that reproduces the actual section outlet enthalpy. Wet groups use
the Baumann rule of :class:`twin.model.turbine.TurbineGroup` (its References).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from scipy.optimize import brentq

from twin.model.core import Context
from twin.model.turbine import TurbineGroup, _moisture


@dataclass(frozen=True)
class SectionPath:
    """A turbine section: its inlet and outlet streams and its stage groups in flow order."""

    id: str
    inlet: str
    outlet: str
    groups: tuple[TurbineGroup, ...]


def expand(w: Any, g: TurbineGroup, p_in: float, h_in: float, p_out: float, factor: float) -> float:
    """Outlet enthalpy [J/kg] of stage group ``g`` with its dry efficiency × ``factor`` [-] (Baumann).

    Parameters
    ----------
    w : Water
        The property layer.
    g : TurbineGroup
    p_in : float
        Inlet pressure [Pa].
    h_in : float
        Inlet enthalpy [J/kg].
    p_out : float
        Outlet pressure [Pa].
    factor : float
        Factor on the group's dry efficiency [-].
    """
    si = w.ph(p_in, h_in)
    hs = w.h_ps(p_out, si.s)
    eta_dry = g.params["efficiency"] * factor
    alpha = g.params["baumann_factor"]
    y_in = _moisture(si)[0]
    h_out = h_in - eta_dry * (h_in - hs)
    if alpha <= 0:
        return h_out

    def baumann(h: float) -> float:  # the Baumann-corrected outlet enthalpy given an outlet guess
        y_out = _moisture(w.ph(p_out, h))[0]
        return h_in - eta_dry * (1.0 - alpha * 0.5 * (y_in + y_out)) * (h_in - hs)

    # fixed point h = baumann(h), accelerated by the secant on baumann(h) − h (a contraction: converges either way)
    prev, f_prev = math.nan, math.nan
    for _ in range(30):
        new = baumann(h_out)
        if abs(new - h_out) < 1e-6:
            return new
        f = new - h_out
        nxt = new
        if math.isfinite(f_prev) and f != f_prev:
            nxt = h_out - f * (h_out - prev) / (f - f_prev)
        prev, f_prev, h_out = h_out, f, nxt
    return h_out


def walk(ctx: Context, path: SectionPath, factor: float) -> float:
    """Section outlet enthalpy [J/kg] from the actual inlet state and stage pressures, group factor ``factor`` [-]."""
    h = ctx.h(path.inlet)
    for g in path.groups:
        h = expand(ctx.water, g, ctx.p(g.port("inlet")), h, ctx.p(g.port("outlet")), factor)
    return h


def section_factor(ctx: Context, path: SectionPath, h_design: float) -> float:
    """Factor [-] on the section's group efficiencies that reproduces the actual outlet enthalpy.

    ``h_design`` is :func:`walk` at factor 1 [J/kg]. A secant from the design factor (the
    drop is nearly proportional to it); a bracketing search over 0.5–1.15 when it does not
    settle inside that range (``ValueError`` if there is no root there).
    """
    target = ctx.h(path.outlet)

    def miss(x: float) -> float:
        return walk(ctx, path, x) - target

    h_in = ctx.h(path.inlet)
    x0, g0 = 1.0, h_design - target
    x1 = (h_in - target) / (h_in - target - g0) if h_in - target - g0 != 0.0 else math.nan
    for _ in range(8):
        if not (math.isfinite(x1) and 0.5 <= x1 <= 1.15):
            break
        g1 = miss(x1)
        if abs(g1) < 1e-5 or abs(x1 - x0) < 1e-10:
            return float(x1)
        x0, g0, x1 = x1, g1, (x1 - g1 * (x1 - x0) / (g1 - g0) if g1 != g0 else math.nan)
    return float(brentq(miss, 0.5, 1.15, xtol=1e-10))


def expected_section_efficiency(ctx: Context, path: SectionPath, h_design: float) -> float:
    """Section efficiency [-] with design group efficiencies at the actual boundary (``h_design`` [J/kg])."""
    si = ctx.ph(path.inlet)
    p_out = ctx.p(path.outlet)
    return (si.h - h_design) / (si.h - ctx.water.h_ps(p_out, si.s))
