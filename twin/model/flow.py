"""Flow equipment: source, cycle loss, boiler, reheater, valves and pipes, splitter, mixer, pump."""

from __future__ import annotations

from twin.model.base import Equipment, Guess
from twin.model.core import (
    BALANCE,
    PERFORMANCE,
    SCALE_ENERGY_FLOW,
    SCALE_ENTHALPY,
    SCALE_MASS,
    SCALE_PRESSURE,
    Context,
    Rows,
)


class Source(Equipment):
    """Boundary inflow (make-up). No equations; its state comes from specifications."""

    kind = "source"

    def balances(self, ctx: Context, rows: Rows) -> None:
        return None

    def guess(self, g: Guess) -> bool:
        return g.set(self.port("outlet"), "m", 0.0)


class CycleLoss(Equipment):
    """Boundary outflow: steam or water that leaves the cycle (leak, blowdown, steam lost).

    No balance: the inlet stream leaves the flowsheet, and the cycle's mass
    balance makes the make-up (a ``source``) replace it. Performance (the
    normal loss, used by the forward heat balance and the expected model):
    ``m_in = normal_fraction · m[normal_reference] + normal_flow`` [kg/s]. The
    reconciliation leaves the relation out, so the loss is free and the
    make-up flow meter determines it.
    """

    kind = "cycle_loss"

    def balances(self, ctx: Context, rows: Rows) -> None:
        return None

    def _rule(self) -> tuple[float, str, float]:
        """(fraction [-], reference stream or "" when the fraction is 0, fixed flow [kg/s])."""
        f, ref = float(self.params["normal_fraction"]), str(self.params.get("normal_reference") or "")
        return f, (ref if f != 0.0 else ""), float(self.params["normal_flow"])

    def performance(self, ctx: Context, rows: Rows, skip: frozenset[str]) -> None:
        name = self.relation("flow")
        if name in skip:
            return
        a = self.port("inlet")
        lay = ctx.layout
        f, ref, m0 = self._rule()
        r = ctx.m(a) - m0
        grad = {lay.m(a): 1.0}
        if ref:
            r -= f * ctx.m(ref)
            grad[lay.m(ref)] = grad.get(lay.m(ref), 0.0) - f
        rows.add(name, PERFORMANCE, r, grad, SCALE_MASS)

    def lost_energy(self, ctx: Context) -> float:
        """Energy flow leaving the cycle with the loss, m h [W] (IAPWS-IF97 reference state)."""
        a = self.port("inlet")
        return ctx.m(a) * ctx.h(a)

    def guess(self, g: Guess) -> bool:
        f, ref, m0 = self._rule()
        if ref:
            if not g.has(ref, "m"):
                return False
            m0 += f * g.get(ref, "m")
        return g.set(self.port("inlet"), "m", m0)


class Boiler(Equipment):
    """Steam generator: m_steam = m_feedwater; duty Q = m (h_steam − h_feedwater) [W]."""

    kind = "boiler"

    def balances(self, ctx: Context, rows: Rows) -> None:
        self.equal_mass(ctx, rows, self.port("feedwater"), self.port("steam"))

    def guess(self, g: Guess) -> bool:
        fw, st = self.port("feedwater"), self.port("steam")
        changed = False
        if g.has(st, "m"):
            changed |= g.set(fw, "m", g.get(st, "m"))
        return changed

    def duty(self, ctx: Context) -> float:
        st = self.port("steam")
        return ctx.m(st) * (ctx.h(st) - ctx.h(self.port("feedwater")))


class Reheater(Equipment):
    """Reheater: mass balance; p_out = (1 − f) p_in (performance)."""

    kind = "reheater"

    def balances(self, ctx: Context, rows: Rows) -> None:
        self.equal_mass(ctx, rows, self.port("inlet"), self.port("outlet"))

    def performance(self, ctx: Context, rows: Rows, skip: frozenset[str]) -> None:
        name = self.relation("pressure_drop")
        if name in skip:
            return
        a, b = self.port("inlet"), self.port("outlet")
        f = self.params["pressure_drop_fraction"]
        lay = ctx.layout
        rows.add(name, PERFORMANCE, ctx.p(b) - (1 - f) * ctx.p(a), {lay.p(b): 1.0, lay.p(a): -(1 - f)}, SCALE_PRESSURE)

    def guess(self, g: Guess) -> bool:
        a, b = self.port("inlet"), self.port("outlet")
        changed = g.copy_state(a, b, "m")
        if g.has(a, "p"):
            changed |= g.set(b, "p", g.get(a, "p") * (1 - self.params["pressure_drop_fraction"]))
        if g.has(b, "p") and not g.has(a, "p"):
            changed |= g.set(a, "p", g.get(b, "p") / (1 - self.params["pressure_drop_fraction"]))
        return changed

    def duty(self, ctx: Context) -> float:
        a, b = self.port("inlet"), self.port("outlet")
        return ctx.m(b) * (ctx.h(b) - ctx.h(a))


class _Isenthalpic(Equipment):
    """Shared balances of valves and pipes: equal mass flow and enthalpy."""

    def balances(self, ctx: Context, rows: Rows) -> None:
        a, b = self.port("inlet"), self.port("outlet")
        self.equal_mass(ctx, rows, a, b)
        self.equal_enthalpy(ctx, rows, a, b)

    def _pressure_map(self) -> tuple[float, float]:
        """p_out = k p_in − d."""
        return 1.0, 0.0

    def guess(self, g: Guess) -> bool:
        a, b = self.port("inlet"), self.port("outlet")
        changed = g.copy_state(a, b, "mh") | g.copy_state(b, a, "mh")
        k, d = self._pressure_map()
        if g.has(a, "p"):
            changed |= g.set(b, "p", k * g.get(a, "p") - d)
        elif g.has(b, "p"):
            changed |= g.set(a, "p", (g.get(b, "p") + d) / k)
        return changed


class ThrottleValve(_Isenthalpic):
    """Turbine control valve: wide open (p_out = p_in) unless its relation is skipped."""

    kind = "throttle_valve"

    def performance(self, ctx: Context, rows: Rows, skip: frozenset[str]) -> None:
        name = self.relation("open")
        if name not in skip:
            self.equal_pressure(ctx, rows, self.port("inlet"), self.port("outlet"), "open", PERFORMANCE)


class Pipe(_Isenthalpic):
    """Pipe or line: p_out = p_in (1 − f) − Δp (performance)."""

    kind = "pipe"

    def _pressure_map(self) -> tuple[float, float]:
        return 1.0 - self.params["pressure_drop_fraction"], self.params["pressure_drop"]

    def performance(self, ctx: Context, rows: Rows, skip: frozenset[str]) -> None:
        name = self.relation("pressure_drop")
        if name in skip:
            return
        a, b = self.port("inlet"), self.port("outlet")
        k, d = self._pressure_map()
        lay = ctx.layout
        rows.add(name, PERFORMANCE, ctx.p(b) - k * ctx.p(a) + d, {lay.p(b): 1.0, lay.p(a): -k}, SCALE_PRESSURE)


class Splitter(Equipment):
    """One inlet to several outlets at equal pressure and enthalpy."""

    kind = "splitter"

    def balances(self, ctx: Context, rows: Rows) -> None:
        a = self.port("inlet")
        outs = self.port_list("outlets")
        self.mass_sum(ctx, rows, [a], outs)
        for i, b in enumerate(outs):
            self.equal_pressure(ctx, rows, a, b, f"pressure[{i}]")
            self.equal_enthalpy(ctx, rows, a, b, f"enthalpy[{i}]")

    def guess(self, g: Guess) -> bool:
        a = self.port("inlet")
        outs = self.port_list("outlets")
        changed = False
        for b in outs:
            changed |= g.copy_state(a, b, "ph") | g.copy_state(b, a, "ph")
        # the first outlet is the main path; branch flows come from downstream
        # (heater energy balances) or from the flowsheet's fallback
        if g.has(a, "m") and all(g.has(b, "m") for b in outs[1:]):
            changed |= g.set(outs[0], "m", g.get(a, "m") - sum(g.get(b, "m") for b in outs[1:]))
        if all(g.has(b, "m") for b in outs):
            changed |= g.set(a, "m", sum(g.get(b, "m") for b in outs))
        return changed


class Mixer(Equipment):
    """Adiabatic mixer; the outlet takes the pressure of the first inlet."""

    kind = "mixer"

    def balances(self, ctx: Context, rows: Rows) -> None:
        ins, b = self.port_list("inlets"), self.port("outlet")
        self.mass_sum(ctx, rows, ins, [b])
        self.energy_sum(ctx, rows, ins, [b])
        self.equal_pressure(ctx, rows, ins[0], b, "pressure")

    def guess(self, g: Guess) -> bool:
        ins, b = self.port_list("inlets"), self.port("outlet")
        changed = g.copy_state(ins[0], b, "p")
        if all(g.has(s, "m") and g.has(s, "h") for s in ins):
            m = sum(g.get(s, "m") for s in ins)
            changed |= g.set(b, "m", m)
            if m > 0:
                changed |= g.set(b, "h", sum(g.get(s, "m") * g.get(s, "h") for s in ins) / m)
        return changed


class Pump(Equipment):
    """Pump with drive: isentropic efficiency, discharge pressure rule, drive power.

    Balances: m_out = m_in; P_drive η_drive = m (h_out − h_in).
    Performance: h_out = h_in + (h_s(p_out, s_in) − h_in)/η; discharge pressure
    fixed or ``factor · p[reference] + offset``.
    """

    kind = "pump"

    def extras(self) -> tuple[str, ...]:
        return (f"{self.id}.power",)

    def balances(self, ctx: Context, rows: Rows) -> None:
        a, b = self.port("inlet"), self.port("outlet")
        lay = ctx.layout
        self.equal_mass(ctx, rows, a, b)
        eta_d = self.params["drive_efficiency"]
        col = lay.extra(f"{self.id}.power")
        m, ha, hb = ctx.m(a), ctx.h(a), ctx.h(b)
        rows.add(
            self.relation("drive"),
            BALANCE,
            ctx.z[col] * eta_d - m * (hb - ha),
            {col: eta_d, lay.m(a): -(hb - ha), lay.h(b): -m, lay.h(a): m},
            SCALE_ENERGY_FLOW,
        )

    def performance(self, ctx: Context, rows: Rows, skip: frozenset[str]) -> None:
        a, b = self.port("inlet"), self.port("outlet")
        lay = ctx.layout
        name = self.relation("efficiency")
        if name not in skip:
            eta = self.params["efficiency"]
            st = ctx.ph(a)
            ps = ctx.ps(ctx.p(b), st.s)
            # r = h_out − h_in − (h_s − h_in)/η
            r = ctx.h(b) - st.h - (ps.h - st.h) / eta
            grad = {
                lay.h(b): 1.0,
                lay.h(a): -1.0 - (ps.dh_ds * st.ds_dh - 1.0) / eta,
                lay.p(a): -(ps.dh_ds * st.ds_dp) / eta,
            }
            grad[lay.p(b)] = grad.get(lay.p(b), 0.0) - ps.dh_dp / eta
            rows.add(name, PERFORMANCE, r, grad, SCALE_ENTHALPY)
        name = self.relation("discharge")
        if name not in skip:
            ref = self.params.get("discharge_reference") or ""
            if ref:
                f, off = self.params["discharge_factor"], self.params["discharge_offset"]
                r = ctx.p(b) - f * ctx.p(ref) - off
                grad = {lay.p(b): 1.0}
                grad[lay.p(ref)] = grad.get(lay.p(ref), 0.0) - f
            else:
                r = ctx.p(b) - self.params["discharge_pressure"]
                grad = {lay.p(b): 1.0}
            rows.add(name, PERFORMANCE, r, grad, SCALE_PRESSURE)

    def discharge_guess(self, g: Guess) -> float:
        ref = self.params.get("discharge_reference") or ""
        if ref:
            if not g.has(ref, "p"):
                return float("nan")
            return self.params["discharge_factor"] * g.get(ref, "p") + self.params["discharge_offset"]
        return float(self.params["discharge_pressure"])

    def guess(self, g: Guess) -> bool:
        a, b = self.port("inlet"), self.port("outlet")
        changed = g.copy_state(a, b, "m") | g.copy_state(b, a, "m")
        changed |= g.set(b, "p", self.discharge_guess(g))
        if g.has(a, "h") and g.has(a, "p") and g.has(b, "p"):
            s = g.water.s_ph(g.get(a, "p"), g.get(a, "h"))
            hs = g.water.h_ps(g.get(b, "p"), s)
            ha = g.get(a, "h")
            changed |= g.set(b, "h", ha + (hs - ha) / self.params["efficiency"])
        if g.has(a, "m") and g.has(a, "h") and g.has(b, "h"):
            col = g.layout.extra(f"{self.id}.power")
            if g.z[col] != g.z[col]:
                g.z[col] = g.get(a, "m") * (g.get(b, "h") - g.get(a, "h")) / self.params["drive_efficiency"]
                changed = True
        return changed
