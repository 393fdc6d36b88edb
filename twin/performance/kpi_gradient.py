"""Analytic gradients of the cycle KPIs with respect to the state ``z``.

Each KPI of :mod:`twin.performance.kpi` is a function of stream states; its
gradient follows from the chain rule through each stream state's own partial
derivatives (:class:`twin.properties.PHState`: ``dT_dp``, ``dT_dh``, ``ds_dp``,
``ds_dh``, ``dx_dp``, ``dx_dh``), the saturation line's ``dT_dp`` and the
isentropic state's ``dh/dp = v``, ``dh/ds = T`` (``dh = T ds + v dp``). A gradient
is a sparse ``{column: derivative}`` dict; the reconciliation propagates the
covariance through it (``Var = gᵀ C g``).

``tests/test_kpi_gradient.py`` compares every KPI's gradient with central
differences over fresh property evaluations.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence

from twin.model.core import Context
from twin.model.flow import Boiler, Reheater
from twin.model.heat_exchange import Condenser

Grad = dict[int, float]


def combine(*terms: tuple[float, Mapping[int, float]]) -> Grad:
    """Σ a·g over ``(a, g)`` terms, as one sparse gradient."""
    out: Grad = {}
    for a, g in terms:
        for c, d in g.items():
            out[c] = out.get(c, 0.0) + a * d
    return out


def ratio(a: float, ga: Mapping[int, float], b: float, gb: Mapping[int, float]) -> Grad:
    """Gradient of a / b from the values and gradients of a and b."""
    return combine((1.0 / b, ga), (-a / (b * b), gb))


def temperature(ctx: Context, stream: str) -> Grad:
    """Gradient of the stream's temperature T(p, h) [K per column unit]."""
    st = ctx.ph(stream)
    lay = ctx.layout
    return combine((st.dT_dp, {lay.p(stream): 1.0}), (st.dT_dh, {lay.h(stream): 1.0}))


def saturation_temperature(ctx: Context, stream: str) -> Grad:
    """Gradient of T_sat at the stream's pressure [K/Pa] (the saturation line's own derivative)."""
    return {ctx.layout.p(stream): ctx.sat(ctx.p(stream)).dT_dp}


def quality(ctx: Context, stream: str) -> Grad:
    """Gradient of the clipped quality min(max(x, 0), 1): zero outside the two-phase range."""
    st = ctx.ph(stream)
    if not 0.0 < st.x < 1.0:
        return {}
    lay = ctx.layout
    return combine((st.dx_dp, {lay.p(stream): 1.0}), (st.dx_dh, {lay.h(stream): 1.0}))


def section_efficiency(ctx: Context, inlet: str, outlet: str) -> Grad:
    """Gradient of (h_in − h_out)/(h_in − h_s(p_out, s_in)).

    h_s moves with T_s per unit of entropy and with v_s per unit of outlet pressure
    (the isentropic state's ``dh_ds`` and ``dh_dp``; on the wet side those of the lever rule).
    """
    lay = ctx.layout
    si = ctx.ph(inlet)
    iso = ctx.water.ps(ctx.p(outlet), si.s)
    num, den = si.h - ctx.h(outlet), si.h - iso.h
    g_num = {lay.h(inlet): 1.0, lay.h(outlet): -1.0}
    # dD = dh_in − T_s (ds_in/dp dp_in + ds_in/dh dh_in) − v_s dp_out
    g_den = combine((1.0 - iso.dh_ds * si.ds_dh, {lay.h(inlet): 1.0}),
                    (-iso.dh_ds * si.ds_dp, {lay.p(inlet): 1.0}),
                    (-iso.dh_dp, {lay.p(outlet): 1.0}))
    return ratio(num, g_num, den, g_den)


def duty(ctx: Context, e: Boiler | Reheater | Condenser) -> Grad:
    """Gradient of an equipment's duty (``e.duty``) [W per column unit]: m Δh terms."""
    lay = ctx.layout
    if isinstance(e, Boiler):
        st, fw = e.port("steam"), e.port("feedwater")
        return combine((ctx.h(st) - ctx.h(fw), {lay.m(st): 1.0}), (ctx.m(st), {lay.h(st): 1.0}),
                       (-ctx.m(st), {lay.h(fw): 1.0}))
    if isinstance(e, Reheater):
        a, b = e.port("inlet"), e.port("outlet")
        return combine((ctx.h(b) - ctx.h(a), {lay.m(b): 1.0}), (ctx.m(b), {lay.h(b): 1.0}),
                       (-ctx.m(b), {lay.h(a): 1.0}))
    out = e.port("outlet")
    terms = [(ctx.h(s), {lay.m(s): 1.0}) for s in e._inlets()] + [(ctx.m(s), {lay.h(s): 1.0}) for s in e._inlets()]
    return combine(*terms, (-ctx.h(out), {lay.m(out): 1.0}), (-ctx.m(out), {lay.h(out): 1.0}))


def interpolation_slope(table: Sequence[tuple[float, float]], x: float) -> float:
    """d/dx of the linear table interpolation held flat outside (``np.interp``) [per unit of x].

    At a knot the mean of the two one-sided slopes (what a central difference gives).
    """
    if not table or not math.isfinite(x):
        return math.nan if not table else 0.0
    xs, ys = zip(*sorted(table), strict=True)

    def segment(right: bool) -> float:
        for i in range(len(xs) - 1):
            lo, hi = xs[i], xs[i + 1]
            if (lo <= x < hi) if right else (lo < x <= hi):
                return (ys[i + 1] - ys[i]) / (hi - lo)
        return 0.0

    return 0.5 * (segment(True) + segment(False))


def lmtd_partials(itd: float, ttd: float) -> tuple[float, float]:
    """(∂LMTD/∂ITD, ∂LMTD/∂TTD) of LMTD = (ITD − TTD)/ln(ITD/TTD) [-]."""
    q = math.log(itd / ttd)
    d = itd - ttd
    return (q - d / itd) / (q * q), (d / ttd - q) / (q * q)
