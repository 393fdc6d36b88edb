"""Heat exchangers: closed feedwater heater, open heater (deaerator), condenser."""

from __future__ import annotations

import math

from twin.model.base import Equipment, Guess
from twin.model.core import (
    BALANCE,
    PERFORMANCE,
    SCALE_ENTHALPY,
    SCALE_PRESSURE,
    SCALE_TEMPERATURE,
    Context,
    Rows,
)


def _saturated_liquid(eq: Equipment, ctx: Context, rows: Rows, stream: str) -> None:
    """h = h_f(p): the stream leaves as saturated liquid (hotwell, deaerator outlet)."""
    lay = ctx.layout
    sat = ctx.sat(ctx.p(stream))
    rows.add(
        eq.relation("saturated"),
        BALANCE,
        ctx.h(stream) - sat.h_f,
        {lay.h(stream): 1.0, lay.p(stream): -sat.dh_f_dp},
        SCALE_ENTHALPY,
    )


class ClosedHeater(Equipment):
    """Closed feedwater heater with drain cooler.

    Balances: tube mass, shell mass (steam + drains in = drain out), energy,
    drain leaves at shell pressure. Performance (ASME PTC 12.1 terms):
    TTD = Tsat(p_shell) − T_tube_out, DCA = T_drain_out − T_tube_in,
    tube-side pressure drop.
    """

    kind = "closed_heater"

    def _shell_inlets(self) -> list[str]:
        d = self.optional_port("drain_in")
        return [self.port("steam_in")] + ([d] if d else [])

    def balances(self, ctx: Context, rows: Rows) -> None:
        ti, to, do = self.port("tube_in"), self.port("tube_out"), self.port("drain_out")
        self.equal_mass(ctx, rows, ti, to, "tube_mass")
        self.mass_sum(ctx, rows, self._shell_inlets(), [do], "shell_mass")
        self.energy_sum(ctx, rows, [ti, *self._shell_inlets()], [to, do])
        self.equal_pressure(ctx, rows, self.port("steam_in"), do, "shell_pressure")

    def performance(self, ctx: Context, rows: Rows, skip: frozenset[str]) -> None:
        ti, to = self.port("tube_in"), self.port("tube_out")
        st_in, do = self.port("steam_in"), self.port("drain_out")
        lay = ctx.layout
        name = self.relation("tube_pressure_drop")
        if name not in skip:
            dp = self.params["tube_pressure_drop"]
            rows.add(name, PERFORMANCE, ctx.p(to) - ctx.p(ti) + dp, {lay.p(to): 1.0, lay.p(ti): -1.0}, SCALE_PRESSURE)
        k = ctx.constants.get(self.id, {})  # off-design overrides of TTD/DCA
        name = self.relation("ttd")
        if name not in skip:
            sat = ctx.sat(ctx.p(st_in))
            so = ctx.ph(to)
            rows.add(
                name,
                PERFORMANCE,
                sat.T - so.T - k.get("ttd", self.params["ttd"]),
                {lay.p(st_in): sat.dT_dp, lay.p(to): -so.dT_dp, lay.h(to): -so.dT_dh},
                SCALE_TEMPERATURE,
            )
        name = self.relation("dca")
        if name not in skip:
            sd, si = ctx.ph(do), ctx.ph(ti)
            rows.add(
                name,
                PERFORMANCE,
                sd.T - si.T - k.get("dca", self.params["dca"]),
                {lay.p(do): sd.dT_dp, lay.h(do): sd.dT_dh, lay.p(ti): -si.dT_dp, lay.h(ti): -si.dT_dh},
                SCALE_TEMPERATURE,
            )

    def guess(self, g: Guess) -> bool:
        ti, to = self.port("tube_in"), self.port("tube_out")
        st_in, do = self.port("steam_in"), self.port("drain_out")
        di = self.optional_port("drain_in")
        w = g.water
        changed = g.copy_state(ti, to, "m") | g.copy_state(to, ti, "m")
        changed |= g.copy_state(st_in, do, "p")
        if g.has(ti, "p"):
            changed |= g.set(to, "p", g.get(ti, "p") - self.params["tube_pressure_drop"])
        elif g.has(to, "p"):
            changed |= g.set(ti, "p", g.get(to, "p") + self.params["tube_pressure_drop"])
        if g.has(st_in, "p") and g.has(to, "p"):
            t_out = w.T_sat(g.get(st_in, "p")) - self.params["ttd"]
            changed |= g.set(to, "h", w.h_pT(g.get(to, "p"), t_out))
        if g.has(ti, "p") and g.has(ti, "h") and g.has(do, "p"):
            t_drain = w.T_ph(g.get(ti, "p"), g.get(ti, "h")) + self.params["dca"]
            t_drain = min(t_drain, w.T_sat(g.get(do, "p")) - 0.5)
            changed |= g.set(do, "h", w.h_pT(g.get(do, "p"), t_drain))
        # extraction flow from the energy balance once the other terms are known
        need = [(ti, "m"), (ti, "h"), (to, "h"), (do, "h"), (st_in, "h")]
        if di:
            need += [(di, "m"), (di, "h")]
        if not g.has(st_in, "m") and all(g.has(s, q) for s, q in need):
            m_t = g.get(ti, "m")
            duty = m_t * (g.get(to, "h") - g.get(ti, "h"))
            m_di = g.get(di, "m") if di else 0.0
            h_do = g.get(do, "h")
            if di:
                duty -= m_di * (g.get(di, "h") - h_do)
            m_s = max(duty / (g.get(st_in, "h") - h_do), 0.0)
            changed |= g.set(st_in, "m", m_s)
        if g.has(st_in, "m") and (not di or g.has(di, "m")):
            changed |= g.set(do, "m", g.get(st_in, "m") + (g.get(di, "m") if di else 0.0))
        return changed


class OpenHeater(Equipment):
    """Open heater or deaerator: outlet saturated liquid at the steam-inlet pressure."""

    kind = "open_heater"

    def balances(self, ctx: Context, rows: Rows) -> None:
        st, ins, out = self.port("steam_in"), self.port_list("inlets"), self.port("outlet")
        self.mass_sum(ctx, rows, [st, *ins], [out])
        self.energy_sum(ctx, rows, [st, *ins], [out])
        self.equal_pressure(ctx, rows, st, out, "pressure")
        _saturated_liquid(self, ctx, rows, out)

    def guess(self, g: Guess) -> bool:
        st, ins, out = self.port("steam_in"), self.port_list("inlets"), self.port("outlet")
        changed = g.copy_state(st, out, "p")
        if g.has(out, "p"):
            changed |= g.set(out, "h", g.water.h_f(g.get(out, "p")))
        streams = [st, *ins]
        unknown_m = [s for s in streams if not g.has(s, "m")]
        if (
            len(unknown_m) == 2
            and st in unknown_m
            and g.has(out, "m")
            and g.has(out, "h")
            and all(g.has(s, "h") for s in streams)
        ):
            other = next(s for s in unknown_m if s != st)
            m_out, h_out = g.get(out, "m"), g.get(out, "h")
            known = [s for s in streams if s not in unknown_m]
            m_k = sum(g.get(s, "m") for s in known)
            e_k = sum(g.get(s, "m") * g.get(s, "h") for s in known)
            h_s, h_o = g.get(st, "h"), g.get(other, "h")
            m_s = ((m_out - m_k) * h_o - (m_out * h_out - e_k)) / (h_o - h_s)
            changed |= g.set(st, "m", max(m_s, 0.0))
            changed |= g.set(other, "m", m_out - m_k - max(m_s, 0.0))
        if all(g.has(s, "m") for s in streams):
            changed |= g.set(out, "m", sum(g.get(s, "m") for s in streams))
        return changed


class Condenser(Equipment):
    """Surface condenser.

    Balances: mass; hotwell at the exhaust pressure; hotwell saturated liquid.
    Performance off design (``cooling``): with the cooling-water flow and UA
    of the design point held, Tsat(p) = T_cw,in + Q / (m_cw c_p (1 − exp(−UA/(m_cw c_p)))).
    ``constants[id]["cw_inlet"]`` overrides the configured inlet temperature [K].
    """

    kind = "condenser"

    def _inlets(self) -> list[str]:
        return [self.port("exhaust"), *self.port_list("inlets")]

    def balances(self, ctx: Context, rows: Rows) -> None:
        out = self.port("outlet")
        self.mass_sum(ctx, rows, self._inlets(), [out])
        self.equal_pressure(ctx, rows, self.port("exhaust"), out, "pressure")
        _saturated_liquid(self, ctx, rows, out)

    def duty(self, ctx: Context) -> float:
        """Heat rejected to the cooling water [W]."""
        out = self.port("outlet")
        return sum(ctx.m(s) * ctx.h(s) for s in self._inlets()) - ctx.m(out) * ctx.h(out)

    def cooling_factor(self, cw_flow: float, ua: float) -> float:
        """1/(m_cw c_p (1 − exp(−NTU))) [K/W] for cooling-water flow cw_flow [kg/s] and ua [W/K]."""
        c = cw_flow * self.params["cooling_water_cp"]
        return 1.0 / (c * (1.0 - math.exp(-ua / c)))

    def performance(self, ctx: Context, rows: Rows, skip: frozenset[str]) -> None:
        name = self.relation("cooling")
        if name in skip:
            return
        k = ctx.constants[self.id]
        f = self.cooling_factor(k["cw_flow"], k["ua"])
        ex, out = self.port("exhaust"), self.port("outlet")
        lay = ctx.layout
        sat = ctx.sat(ctx.p(ex))
        grad: dict[int, float] = {lay.p(ex): sat.dT_dp}
        for s in self._inlets():
            grad[lay.m(s)] = grad.get(lay.m(s), 0.0) - f * ctx.h(s)
            grad[lay.h(s)] = grad.get(lay.h(s), 0.0) - f * ctx.m(s)
        grad[lay.m(out)] = grad.get(lay.m(out), 0.0) + f * ctx.h(out)
        grad[lay.h(out)] = grad.get(lay.h(out), 0.0) + f * ctx.m(out)
        r = sat.T - k.get("cw_inlet", self.params["cooling_water_inlet_temperature"]) - f * self.duty(ctx)
        rows.add(name, PERFORMANCE, r, grad, SCALE_TEMPERATURE)

    def calibrate(self, ctx: Context) -> dict[str, float]:
        """Cooling-water flow [kg/s] and UA [W/K] from a design-point state."""
        P = self.params
        duty = self.duty(ctx)
        cw_flow = duty / (P["cooling_water_cp"] * P["cooling_water_rise"])
        itd = ctx.sat(ctx.p(self.port("exhaust"))).T - P["cooling_water_inlet_temperature"]
        ttd = itd - P["cooling_water_rise"]
        if ttd <= 0:
            raise ValueError(
                f"condenser {self.id!r}: design cooling-water rise {P['cooling_water_rise']:.2f} K "
                f"exceeds the inlet temperature difference {itd:.2f} K; expected rise < ITD"
            )
        ua = cw_flow * P["cooling_water_cp"] * math.log(itd / ttd)
        return {"cw_flow": cw_flow, "ua": ua, "u_clean": ua / P["area"] / P["design_cleanliness"]}

    def guess(self, g: Guess) -> bool:
        out, ex = self.port("outlet"), self.port("exhaust")
        changed = g.copy_state(ex, out, "p")
        if g.has(out, "p"):
            changed |= g.set(out, "h", g.water.h_f(g.get(out, "p")))
        ins = self._inlets()
        if all(g.has(s, "m") for s in ins):
            changed |= g.set(out, "m", sum(g.get(s, "m") for s in ins))
        return changed
