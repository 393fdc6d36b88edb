"""``twin bench heat-balance [CONFIG]``: cost of the forward heat balance.

Times, from a cold start and ``--repeat`` times each:

* the design point: a fresh :class:`~twin.model.flowsheet.Flowsheet` (own
  property state) solved from its initial guess, including the calibration of
  the off-design constants (``solve_design``);
* a part load (``--load``, default 75 %) in sliding and in fixed throttle
  pressure, each from that design point (``solve_off_design`` without a previous
  solution to warm-start from).

Reported per case: median and minimum wall time [ms], Newton iterations and, from
one extra instrumented run (not timed), the residual evaluations, the property
calls made by the equations (outermost :class:`~twin.properties.Water` method
calls) and the CoolProp state updates behind them. The cost split times one
evaluation of residuals, the sparse Jacobian assembly and the sparse LU
factorisation and solve at the design point, and the design point's initial
guess and calibration. The goal is under 50 ms per solve
on one core (``OPENBLAS_NUM_THREADS=1``).
"""

from __future__ import annotations

import argparse
import os
import platform
import statistics
import time
from collections.abc import Callable
from dataclasses import replace
from typing import Any

from twin.bench import DEFAULT_CONFIG

GOAL_MS = 50.0


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "config", nargs="?", default=str(DEFAULT_CONFIG),
        help="plant configuration file (default: configs/demo-u1.toml of the source tree)",
    )
    parser.add_argument("--repeat", type=int, default=10, help="timed solves per case (default 10)")
    parser.add_argument("--load", type=float, default=0.75, help="part-load fraction of design main-steam flow (default 0.75)")
    parser.add_argument("--evaluations", type=int, default=50, help="evaluations timed for the cost split (default 50)")


def _counting_water() -> Any:
    """A :class:`Water` that counts its outermost public calls and its CoolProp updates."""
    from twin.properties import Water

    class CountingWater(Water):
        __slots__ = ("_depth", "calls", "updates")

        def __init__(self) -> None:
            super().__init__()
            self.calls = 0
            self.updates = 0
            self._depth = 0
            update = self._up

            def counted_update(*args: Any) -> None:
                self.updates += 1
                update(*args)

            self._up = counted_update

    def counted(name: str) -> Callable[..., Any]:
        method = getattr(Water, name)

        def wrapper(self: Any, *args: float, **kwargs: Any) -> Any:  # kwargs: T_guess
            if self._depth == 0:
                self.calls += 1
            self._depth += 1
            try:
                return method(self, *args, **kwargs)
            finally:
                self._depth -= 1

        wrapper.__name__ = name
        return wrapper

    for name in dir(Water):
        if not name.startswith("_") and callable(getattr(Water, name)):
            setattr(CountingWater, name, counted(name))
    return CountingWater()


def _ms(samples: list[float]) -> dict[str, float]:
    return {
        "median_ms": round(statistics.median(samples) * 1e3, 3),
        "min_ms": round(min(samples) * 1e3, 3),
    }


def run(args: argparse.Namespace) -> dict:
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    import numpy as np
    import scipy.sparse.linalg as spla

    from twin.config import load_config
    from twin.model.flowsheet import Flowsheet
    from twin.model.solve import (
        Operation,
        calibrate,
        design_specs,
        off_design_relations,
        solve_design,
        solve_off_design,
    )
    from twin.properties import FORMULATION

    if args.repeat < 1:
        raise ValueError(f"--repeat {args.repeat}; expected at least 1")
    if args.evaluations < 1:
        raise ValueError(f"--evaluations {args.evaluations}; expected at least 1")
    config = load_config(args.config)
    op = Operation.from_config(config)
    modes = ("sliding", "fixed")

    # ------------------------------------------------------------ timed solves
    build: list[float] = []
    design_t: list[float] = []
    part_t: dict[str, list[float]] = {m: [] for m in modes}
    iterations: dict[str, int] = {}
    for _ in range(args.repeat):
        t0 = time.perf_counter()
        fs = Flowsheet.from_config(config)
        t1 = time.perf_counter()
        design = solve_design(fs, op)
        t2 = time.perf_counter()
        build.append(t1 - t0)
        design_t.append(t2 - t1)
        iterations["design"] = design.info.iterations
        for mode in modes:
            t0 = time.perf_counter()
            hb = solve_off_design(fs, op, design, args.load, mode)
            part_t[mode].append(time.perf_counter() - t0)
            iterations[mode] = hb.info.iterations

    # ------------------------------------------------------------ one counted run per case
    def counted_solve(solve: Callable[[Any], Any]) -> dict[str, int]:
        w = _counting_water()
        fs = Flowsheet.from_config(config, props=w)
        n_eval = 0
        evaluate = fs.evaluate

        def counting_evaluate(*a: Any, **k: Any) -> Any:
            nonlocal n_eval
            n_eval += 1
            return evaluate(*a, **k)

        fs.evaluate = counting_evaluate  # type: ignore[method-assign]
        solve(fs)
        return {"residual_evaluations": n_eval, "property_calls": w.calls, "coolprop_updates": w.updates}

    fs0 = Flowsheet.from_config(config)
    design0 = solve_design(fs0, op)
    counts = {"design": counted_solve(lambda fs: solve_design(fs, op))}
    for mode in modes:

        def part_load(fs: Flowsheet, mode: str = mode) -> Any:
            return solve_off_design(fs, op, replace(design0, flowsheet=fs), args.load, mode)

        counts[mode] = counted_solve(part_load)

    # ------------------------------------------------------------ cost split at the design point
    specs = design_specs(fs0)
    skip = off_design_relations(fs0)
    n = fs0.n_vars
    ref_flow = fs0.stream_configs[op.load_stream].design["mass_flow"]
    resid_t, jac_t, lu_t, guess_t, calib_t = [], [], [], [], []
    for _ in range(args.evaluations):
        t0 = time.perf_counter()
        rows = fs0.evaluate(design0.z, specs=specs, skip=skip, constants={})
        r = rows.residuals() / np.asarray(rows.scales)
        t1 = time.perf_counter()
        J = rows.jacobian(n).multiply(1.0 / np.asarray(rows.scales)[:, None]).tocsc()
        t2 = time.perf_counter()
        spla.splu(J).solve(-r)
        t3 = time.perf_counter()
        fs0.initial_guess(specs, ref_flow)
        t4 = time.perf_counter()
        calibrate(fs0, design0.z)
        t5 = time.perf_counter()
        guess_t.append(t4 - t3)
        calib_t.append(t5 - t4)
        resid_t.append(t1 - t0)
        jac_t.append(t2 - t1)
        lu_t.append(t3 - t2)
    w = _counting_water()
    fs_count = Flowsheet.from_config(config, props=w)
    fs_count.evaluate(design0.z, specs=specs, skip=skip, constants={})

    figures: dict[str, Any] = {
        "benchmark": "heat-balance",
        "unit_id": config.unit.id,
        "formulation": FORMULATION,
        "python": platform.python_version(),
        "repeat": args.repeat,
        "variables": n,
        "equations_nonzeros": int(J.nnz),
        "goal_ms": GOAL_MS,
        "build_flowsheet_ms": _ms(build)["median_ms"],
        "design": {**_ms(design_t), "newton_iterations": iterations["design"], **counts["design"]},
    }
    for mode in modes:
        figures[f"part_load_{mode}"] = {
            "load": args.load,
            **_ms(part_t[mode]),
            "newton_iterations": iterations[mode],
            **counts[mode],
        }
    figures["evaluation"] = {
        "residuals_ms": _ms(resid_t)["median_ms"],
        "jacobian_assembly_ms": _ms(jac_t)["median_ms"],
        "lu_factor_solve_ms": _ms(lu_t)["median_ms"],
        "design_initial_guess_ms": _ms(guess_t)["median_ms"],
        "design_calibrate_ms": _ms(calib_t)["median_ms"],
        "property_calls": w.calls,
        "coolprop_updates": w.updates,
    }
    figures["within_goal"] = all(
        figures[k]["median_ms"] < GOAL_MS for k in ("design", "part_load_sliding", "part_load_fixed")
    )
    return figures
