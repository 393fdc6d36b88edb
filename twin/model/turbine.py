"""Turbine stage groups, the last-stage exhaust loss and the generator power balance."""

from __future__ import annotations

import math

from twin.model.base import Equipment, Guess
from twin.model.core import (
    BALANCE,
    PERFORMANCE,
    SCALE_ENTHALPY,
    SCALE_MASS,
    SCALE_POWER,
    Context,
    Rows,
)
from twin.properties import PHState

#: Width of the smoothing of the moisture max(0, 1 − x) at the dew line [-].
MOISTURE_SMOOTHING = 0.002


def _moisture(st: PHState) -> tuple[float, float, float]:
    """Moisture y ≈ max(0, 1 − x) [-] and its derivatives d/dp, d/dh at const h, p.

    The corner at x = 1 is rounded, y = ε ln(1 + exp((1 − x)/ε)) with
    ε = MOISTURE_SMOOTHING, so that Newton and Gauss-Newton do not stall on a stage
    group whose end point sits on the dew line; it adds at most ε ln 2 ≈ 0.14 % moisture
    there and nothing measurable a few ε away.
    """
    if st.x != st.x:
        return 0.0, 0.0, 0.0
    eps = MOISTURE_SMOOTHING
    u = (1.0 - st.x) / eps
    if u > 30.0:
        return 1.0 - st.x, -st.dx_dp, -st.dx_dh
    if u < -30.0:
        return 0.0, 0.0, 0.0
    y = eps * math.log1p(math.exp(u))
    dy_du = 1.0 / (1.0 + math.exp(-u))  # dy/d(1 − x)
    return y, -dy_du * st.dx_dp, -dy_du * st.dx_dh


class TurbineGroup(Equipment):
    """Stage group between two extraction points.

    Performance: the enthalpy-drop relation with the Baumann wet-stage rule,

        h_out = h_in − η (h_in − h_s(p_out, s_in)),  η = η_dry (1 − α ȳ),

    ȳ the mean of inlet and outlet moisture, and off design the Stodola cone law

        m_in = K sqrt((p_in² − p_out²) / (p_in v_in)),

    with K from the design point (``constants[id]["stodola"]``).

    References
    ----------
    K. Baumann, "Recent developments in steam turbine practice", J. IEE 48 (1912).
    A. Stodola, *Steam and Gas Turbines* (1927).
    """

    kind = "turbine_group"

    def balances(self, ctx: Context, rows: Rows) -> None:
        self.equal_mass(ctx, rows, self.port("inlet"), self.port("outlet"))

    def efficiency(self, y_in: float, y_out: float) -> float:
        """Wet efficiency [-] by the Baumann rule from inlet and outlet moisture y_in [-], y_out [-]."""
        return self.params["efficiency"] * (1.0 - self.params["baumann_factor"] * 0.5 * (y_in + y_out))

    def performance(self, ctx: Context, rows: Rows, skip: frozenset[str]) -> None:
        a, b = self.port("inlet"), self.port("outlet")
        lay = ctx.layout
        name = self.relation("expansion")
        if name not in skip:
            si = ctx.ph(a)
            so = ctx.ph(b)
            pb = ctx.p(b)
            ps = ctx.ps(pb, si.s)
            # reconciliation may scale the dry efficiency by a factor shared along an
            # expansion line (the line keeps its design shape, its level floats)
            k = ctx.constants.get(self.id, {})
            eff_col = k.get("efficiency_factor_column")
            eta_design = self.params["efficiency"] * k.get("efficiency_factor", 1.0)
            eta_dry = eta_design * float(ctx.z[eff_col]) if eff_col is not None else eta_design
            alpha = self.params["baumann_factor"]
            y_in, dyi_dp, dyi_dh = _moisture(si)
            y_out, dyo_dp, dyo_dh = _moisture(so)
            eta = eta_dry * (1.0 - alpha * 0.5 * (y_in + y_out))
            k = -eta_dry * alpha * 0.5  # dη/dy
            drop_s = si.h - ps.h
            # r = h_out − h_in + η (h_in − h_s)
            r = so.h - si.h + eta * drop_s
            grad = {
                lay.h(a): -1.0 + eta * (1.0 - ps.dh_ds * si.ds_dh) + drop_s * k * dyi_dh,
                lay.p(a): eta * (-ps.dh_ds * si.ds_dp) + drop_s * k * dyi_dp,
                lay.h(b): 1.0 + drop_s * k * dyo_dh,
                lay.p(b): eta * (-ps.dh_dp) + drop_s * k * dyo_dp,
            }
            if eff_col is not None:
                grad[eff_col] = eta_design * (1.0 - alpha * 0.5 * (y_in + y_out)) * drop_s
            rows.add(name, PERFORMANCE, r, grad, SCALE_ENTHALPY)
        name = self.relation("stodola")
        if name not in skip:
            K = ctx.constants[self.id]["stodola"]
            si = ctx.ph(a)
            pa, pb, m = ctx.p(a), ctx.p(b), ctx.m(a)
            phi = (pa * pa - pb * pb) / (pa * si.v)
            root = math.sqrt(max(phi, 1e-30))
            dr_dphi = -K / (2.0 * root)
            dphi_dpa = 2.0 / si.v - phi / pa - phi / si.v * si.dv_dp
            dphi_dpb = -2.0 * pb / (pa * si.v)
            dphi_dha = -phi / si.v * si.dv_dh
            rows.add(
                name,
                PERFORMANCE,
                m - K * root,
                {lay.m(a): 1.0, lay.p(a): dr_dphi * dphi_dpa, lay.p(b): dr_dphi * dphi_dpb, lay.h(a): dr_dphi * dphi_dha},
                SCALE_MASS,
            )

    def stodola_constant(self, ctx: Context) -> float:
        """K = m / sqrt((p_in² − p_out²)/(p_in v_in)) at the present state [kg/s·sqrt(kg/m3)/Pa^0]."""
        a, b = self.port("inlet"), self.port("outlet")
        si = ctx.ph(a)
        pa, pb = ctx.p(a), ctx.p(b)
        return ctx.m(a) / math.sqrt((pa * pa - pb * pb) / (pa * si.v))

    def power(self, ctx: Context) -> float:
        """Shaft power of the group m (h_in − h_out) [W]."""
        a, b = self.port("inlet"), self.port("outlet")
        return ctx.m(a) * (ctx.h(a) - ctx.h(b))

    def guess(self, g: Guess) -> bool:
        a, b = self.port("inlet"), self.port("outlet")
        changed = g.copy_state(a, b, "m") | g.copy_state(b, a, "m")
        if g.has(a, "p") and g.has(a, "h") and g.has(b, "p") and not g.has(b, "h"):
            w = g.water
            s = w.s_ph(g.get(a, "p"), g.get(a, "h"))
            hs = w.h_ps(g.get(b, "p"), s)
            ha = g.get(a, "h")
            changed |= g.set(b, "h", ha - self.params["efficiency"] * 0.95 * (ha - hs))
        return changed


class ExhaustLoss(Equipment):
    """Last-stage exhaust loss between the expansion-line end point and the UEEP.

    h_UEEP = h_ELEP + EL, EL = [a V² + b (c/V)²] · w0 (1 − w1 Y)(1 − w2 Y),
    V = max(m v / A, V_min) with v and the moisture Y [%] at the ELEP.
    The form and coefficients are the configured curve (the demo unit's is invented).
    """

    kind = "exhaust_loss"

    def balances(self, ctx: Context, rows: Rows) -> None:
        a, b = self.port("inlet"), self.port("outlet")
        self.equal_mass(ctx, rows, a, b)
        self.equal_pressure(ctx, rows, a, b, "pressure")

    def loss(self, m: float, st: PHState) -> tuple[float, float, float, float]:
        """EL [J/kg] and its derivatives with respect to m, p and h at the inlet.

        ``m`` is the exhaust mass flow [kg/s], ``st`` the inlet state.
        """
        P = self.params
        A = P["annulus_area"]
        vel = m * st.v / A
        dvel_dm, dvel_dp, dvel_dh = st.v / A, m * st.dv_dp / A, m * st.dv_dh / A
        if vel < P["minimum_velocity"]:
            vel, dvel_dm, dvel_dp, dvel_dh = P["minimum_velocity"], 0.0, 0.0, 0.0
        a, b, c = P["velocity_coefficient"], P["low_velocity_coefficient"], P["reference_velocity"]
        el_dry = a * vel * vel + b * (c / vel) ** 2
        del_dvel = 2 * a * vel - 2 * b * c * c / vel**3
        y, dy_dp, dy_dh = _moisture(st)
        Y = 100.0 * y
        w0, w1, w2 = P["wet_factor"], P["wet_slope_1"], P["wet_slope_2"]
        wet = w0 * (1 - w1 * Y) * (1 - w2 * Y)
        dwet_dY = w0 * (-w1 * (1 - w2 * Y) - w2 * (1 - w1 * Y))
        el = el_dry * wet
        return (
            el,
            del_dvel * dvel_dm * wet,
            del_dvel * dvel_dp * wet + el_dry * dwet_dY * 100.0 * dy_dp,
            del_dvel * dvel_dh * wet + el_dry * dwet_dY * 100.0 * dy_dh,
        )

    def performance(self, ctx: Context, rows: Rows, skip: frozenset[str]) -> None:
        name = self.relation("curve")
        if name in skip:
            return
        a, b = self.port("inlet"), self.port("outlet")
        lay = ctx.layout
        el, dm, dp, dh = self.loss(ctx.m(a), ctx.ph(a))
        rows.add(
            name,
            PERFORMANCE,
            ctx.h(b) - ctx.h(a) - el,
            {lay.h(b): 1.0, lay.h(a): -1.0 - dh, lay.m(a): -dm, lay.p(a): -dp},
            SCALE_ENTHALPY,
        )

    def power(self, ctx: Context) -> float:
        """m (h_in − h_out) [W]: the exhaust loss as a (negative) contribution to shaft power."""
        a, b = self.port("inlet"), self.port("outlet")
        return ctx.m(a) * (ctx.h(a) - ctx.h(b))

    def guess(self, g: Guess) -> bool:
        a, b = self.port("inlet"), self.port("outlet")
        changed = g.copy_state(a, b, "mp") | g.copy_state(b, a, "mp")
        if g.has(a, "h"):
            changed |= g.set(b, "h", g.get(a, "h") + 30e3)
        return changed


class Generator(Equipment):
    """Turbine-generator power balance.

    Balance: Σ m (h_in − h_out) over the listed turbine elements = P_shaft.
    Performance (loss curve): P_shaft = P_gen + mechanical + fixed + load·(P_gen/rated)².
    """

    kind = "generator"
    members: list[Equipment]  # the turbine elements, set when the flowsheet is built

    def extras(self) -> tuple[str, ...]:
        return (f"{self.id}.shaft_power", f"{self.id}.power")

    def balances(self, ctx: Context, rows: Rows) -> None:
        lay = ctx.layout
        col = lay.extra(f"{self.id}.shaft_power")
        grad: dict[int, float] = {col: -1.0}
        value = -float(ctx.z[col])
        for el in self.members:
            a, b = el.port("inlet"), el.port("outlet")
            m, ha, hb = ctx.m(a), ctx.h(a), ctx.h(b)
            value += m * (ha - hb)
            for c, d in ((lay.m(a), ha - hb), (lay.h(a), m), (lay.h(b), -m)):
                grad[c] = grad.get(c, 0.0) + d
        rows.add(self.relation("shaft"), BALANCE, value, grad, SCALE_POWER)

    def losses(self, p_gen: float) -> tuple[float, float]:
        """Shaft-to-terminal losses [W] at terminal output p_gen [W], and their derivative d/dp_gen [-]."""
        P = self.params
        r = P["rated_power"]
        return (
            P["mechanical_loss"] + P["fixed_loss"] + P["load_loss"] * (p_gen / r) ** 2,
            2 * P["load_loss"] * p_gen / r**2,
        )

    def performance(self, ctx: Context, rows: Rows, skip: frozenset[str]) -> None:
        name = self.relation("losses")
        if name in skip:
            return
        lay = ctx.layout
        cs, cg = lay.extra(f"{self.id}.shaft_power"), lay.extra(f"{self.id}.power")
        pg = float(ctx.z[cg])
        loss, dloss = self.losses(pg)
        rows.add(name, PERFORMANCE, ctx.z[cs] - pg - loss, {cs: 1.0, cg: -1.0 - dloss}, SCALE_POWER)

    def guess(self, g: Guess) -> bool:
        cs, cg = g.layout.extra(f"{self.id}.shaft_power"), g.layout.extra(f"{self.id}.power")
        if g.z[cs] == g.z[cs]:
            return False
        g.z[cs] = 0.9 * self.params["rated_power"]
        g.z[cg] = 0.88 * self.params["rated_power"]
        return True
