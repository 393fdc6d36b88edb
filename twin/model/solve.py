"""Forward heat balance: Newton on balances + performance relations + boundary conditions.

Design point: every design value in the plant file is held (stage pressures,
condenser pressure, throttle conditions); afterwards the Stodola constant of
each stage group and the condenser's cooling-water flow and UA are computed.

Off design: only the ``held`` values (e.g. steam temperatures), the load
(main-steam flow) and, in fixed-pressure operation, the throttle pressure
are specified; stage pressures follow from the Stodola cone law, the
back-pressure from the fixed-UA condenser.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import scipy.sparse.linalg as spla

from twin.model.flowsheet import Flowsheet, Spec
from twin.model.heat_exchange import Condenser
from twin.model.turbine import TurbineGroup
from twin.properties import PropertyError

PRESSURE_MODES = ("sliding", "fixed")


class SolveError(RuntimeError):
    """The forward heat balance did not converge; carries the last state and residual."""

    def __init__(self, message: str, z: np.ndarray | None = None, worst: str = "") -> None:
        super().__init__(message)
        self.z = z
        self.worst = worst


@dataclass(frozen=True)
class Operation:
    """Which streams and valve define load and throttle pressure (from ``[performance]``)."""

    load_stream: str
    throttle_stream: str
    throttle_valve: str

    @classmethod
    def from_config(cls, config: Any) -> Operation:
        perf = config.performance
        return cls(perf.load_stream, perf.throttle_stream, perf.throttle_valve)


@dataclass
class NewtonInfo:
    converged: bool
    iterations: int
    max_scaled_residual: float
    worst: str
    history: list[float] = field(default_factory=list)


def newton(
    fs: Flowsheet,
    z0: np.ndarray,
    *,
    specs: list[Spec],
    skip: frozenset[str],
    constants: dict,
    tol: float = 1e-10,
    max_iter: int = 40,
) -> tuple[np.ndarray, NewtonInfo]:
    """Solve the square system by Newton's method with a backtracking line search.

    Convergence: the largest scaled residual below ``tol`` (scales in
    ``twin.model.core``: 100 kg/s, 1e5 J/kg, 1e5 Pa, 10 K, 1e7 W).
    """

    def evaluate(z: np.ndarray):
        rows = fs.evaluate(z, skip=skip, specs=specs, constants=constants)
        scales = np.asarray(rows.scales)
        return rows, rows.residuals() / scales, scales

    z = np.array(z0, dtype=float)
    rows, r, scales = evaluate(z)
    n = fs.n_vars
    if len(r) != n:
        raise SolveError(f"the system is not square: {len(r)} equations for {n} variables")
    history = [float(np.max(np.abs(r)))]
    for it in range(1, max_iter + 1):
        if history[-1] < tol:
            return z, NewtonInfo(True, it - 1, history[-1], "", history)
        J = rows.jacobian(n).multiply(1.0 / scales[:, None]).tocsc()
        try:
            dz = spla.splu(J).solve(-r)
        except RuntimeError as exc:  # singular factor
            raise SolveError(f"singular Jacobian at iteration {it}: {exc}", z) from exc
        norm0 = float(np.linalg.norm(r))
        t = 1.0
        for _ in range(30):
            z_try = z + t * dz
            try:
                rows_t, r_t, scales_t = evaluate(z_try)
            except (PropertyError, ValueError, ZeroDivisionError):
                t *= 0.5
                continue
            if np.all(np.isfinite(r_t)) and np.linalg.norm(r_t) <= (1 - 1e-4 * t) * norm0 + 1e-14:
                break
            t *= 0.5
        else:
            worst = rows.names[int(np.argmax(np.abs(r)))]
            raise SolveError(f"line search failed at iteration {it} (worst residual {worst})", z, worst)
        z, rows, r, scales = z_try, rows_t, r_t, scales_t
        history.append(float(np.max(np.abs(r))))
    worst = rows.names[int(np.argmax(np.abs(r)))]
    return z, NewtonInfo(history[-1] < tol, max_iter, history[-1], worst, history)


@dataclass
class HeatBalance:
    """A solved state of the flowsheet with what produced it."""

    flowsheet: Flowsheet
    z: np.ndarray
    constants: dict
    load: float
    pressure_mode: str
    info: NewtonInfo

    def context(self):
        return self.flowsheet.context(self.z, self.constants)


def design_specs(fs: Flowsheet) -> list[Spec]:
    """Every design value of every stream as a specification."""
    return [
        Spec(sid, q, float(v))
        for sid, cfg in fs.stream_configs.items()
        for q, v in (cfg.design or {}).items()
    ]


def off_design_specs(fs: Flowsheet, op: Operation, load: float, pressure_mode: str) -> list[Spec]:
    """Held design values, the load flow and (fixed pressure) the throttle pressure as specs.

    ``load`` is the main-steam flow / design flow [-]; ``pressure_mode`` one of ``PRESSURE_MODES``.
    """
    if pressure_mode not in PRESSURE_MODES:
        raise ValueError(f"pressure mode {pressure_mode!r}; expected one of {PRESSURE_MODES}")
    specs = []
    for sid, cfg in fs.stream_configs.items():
        for q in cfg.held or ():
            specs.append(Spec(sid, q, float(cfg.design[q])))
    design_flow = fs.stream_configs[op.load_stream].design["mass_flow"]
    specs.append(Spec(op.load_stream, "mass_flow", load * design_flow))
    if pressure_mode == "fixed":
        specs.append(Spec(op.throttle_stream, "pressure", float(fs.stream_configs[op.throttle_stream].design["pressure"])))
    return specs


def off_design_relations(fs: Flowsheet) -> frozenset[str]:
    """Relations that hold only off design (their constants come from the design point)."""
    names = {e.relation("stodola") for e in fs.of_kind(TurbineGroup)}
    names |= {e.relation("cooling") for e in fs.of_kind(Condenser)}
    return frozenset(names)


def calibrate(fs: Flowsheet, z: np.ndarray) -> dict:
    """Design-point constants: Stodola K per stage group, condenser cooling water and UA."""
    ctx = fs.context(z)
    constants: dict[str, dict[str, float]] = {}
    for e in fs.of_kind(TurbineGroup):
        assert isinstance(e, TurbineGroup)
        constants[e.id] = {"stodola": e.stodola_constant(ctx)}
    for e in fs.of_kind(Condenser):
        assert isinstance(e, Condenser)
        constants[e.id] = e.calibrate(ctx)
    return constants


def solve_design(fs: Flowsheet, op: Operation) -> HeatBalance:
    """Solve the design point and compute the off-design constants from it."""
    specs = design_specs(fs)
    ref = fs.stream_configs[op.load_stream].design["mass_flow"]
    z0 = fs.initial_guess(specs, ref)
    z, info = newton(fs, z0, specs=specs, skip=off_design_relations(fs), constants={})
    if not info.converged:
        raise SolveError(f"design point did not converge (worst residual {info.worst})", z, info.worst)
    return HeatBalance(fs, z, calibrate(fs, z), 1.0, "design", info)


def _apply_overrides(specs: list[Spec], overrides: dict[tuple[str, str], float] | None) -> list[Spec]:
    if not overrides:
        return specs
    out = [s for s in specs if (s.stream, s.quantity) not in overrides]
    return out + [Spec(stream, q, float(v)) for (stream, q), v in overrides.items()]


def merge_constants(base: dict, extra: dict | None) -> dict:
    """Design constants with per-equipment overrides (efficiency factors, TTD/DCA, cooling-water inlet)."""
    out = {k: dict(v) for k, v in base.items()}
    for k, v in (extra or {}).items():
        out.setdefault(k, {}).update(v)
    return out


def solve_off_design(
    fs: Flowsheet, op: Operation, design: HeatBalance, load: float, pressure_mode: str = "sliding",
    z0: np.ndarray | None = None, *, overrides: dict[tuple[str, str], float] | None = None,
    skip: frozenset[str] = frozenset(), constants: dict | None = None,
) -> HeatBalance:
    """Solve the unit at ``load`` (main-steam flow / design flow) [-].

    Starts from ``z0`` (for example the previous solution) or the design
    point; if Newton fails from there it walks the load down in steps
    (continuation).

    Parameters
    ----------
    overrides : dict, optional
        ``{(stream, quantity): value}`` specs that replace or add to the held
        values (SI), e.g. the actual main-steam temperature or, with
        ``skip={"condenser.cooling"}``, the actual back-pressure.
    skip : frozenset of str
        Further relations to leave out.
    constants : dict, optional
        Per-equipment overrides merged into the design constants
        (``efficiency_factor``, ``ttd``, ``dca``, ``cw_inlet``).
    """
    if not 0.2 <= load <= 1.2:
        raise ValueError(f"load fraction {load}; expected 0.2 to 1.2 of the design main-steam flow")
    skip_all = frozenset(skip) | (
        frozenset({fs.by_id[op.throttle_valve].relation("open")}) if pressure_mode == "fixed" else frozenset()
    )
    consts = merge_constants(design.constants, constants)

    def specs_at(lf: float) -> list[Spec]:
        return _apply_overrides(off_design_specs(fs, op, lf, pressure_mode), overrides)

    start = design.z if z0 is None else z0
    try:
        z, info = newton(fs, start, specs=specs_at(load), skip=skip_all, constants=consts)
        if info.converged:
            return HeatBalance(fs, z, consts, load, pressure_mode, info)
    except SolveError:
        pass
    # continuation from the design point in small load steps
    z = design.z
    steps = np.linspace(1.0, load, max(2, int(abs(1.0 - load) / 0.05) + 2))[1:]
    for step in steps:
        z, info = newton(fs, z, specs=specs_at(float(step)), skip=skip_all, constants=consts)
    if not info.converged:
        raise SolveError(f"off-design point at load {load} did not converge (worst residual {info.worst})", z, info.worst)
    return HeatBalance(fs, z, consts, load, pressure_mode, info)
