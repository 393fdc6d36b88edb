"""``twin bench properties``: cost of the IAPWS-IF97 property layer.

Times ``h_pT``, ``T_ph`` and the full ``ph()`` state through :mod:`twin.properties`
against a raw CoolProp ``AbstractState("IF97", "Water")`` loop doing the same
update and getter in the same process, and reports µs per evaluation and the
ratio twin/raw. The raw ``T(p, h)`` is CoolProp's backward polynomial; twin adds a
forward-consistency refinement, so that ratio includes the extra accuracy.
The raw ``ph`` reference is one (p, h) update with T, s, v and cp getters.
"""

from __future__ import annotations

import argparse
import os
import platform
import time
from collections.abc import Callable

import numpy as np


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--n", type=int, default=20000, help="evaluations per figure (default 20000)")
    parser.add_argument("--repeat", type=int, default=5, help="repeats; the best is kept (default 5)")
    parser.add_argument("--seed", type=int, default=1, help="random seed of the state sample")


def _best_us(fn: Callable[[float, float], object], a: list[float], b: list[float], repeat: int) -> float:
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        for x, y in zip(a, b, strict=True):
            fn(x, y)
        best = min(best, time.perf_counter() - t0)
    return best / len(a) * 1e6


def run(args: argparse.Namespace) -> dict:
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    from twin import properties as props
    from twin.properties import backend

    raw_state = backend.new_state()  # raw reference, same library build
    PT, HP = backend.PT, backend.HP
    rng = np.random.default_rng(args.seed)
    n = args.n
    # Superheated steam 0.1-16 MPa (x > 1 at its pressure) and compressed liquid up to 20 MPa.
    p_vap = rng.uniform(0.1e6, 16e6, n).tolist()
    T_vap = [props.T_sat(p) + d for p, d in zip(p_vap, rng.uniform(5.0, 250.0, n), strict=True)]
    p_liq = rng.uniform(1e6, 20e6, n).tolist()
    T_liq = rng.uniform(290.0, 520.0, n).tolist()
    p_all = p_vap + p_liq
    T_all = T_vap + T_liq
    h_all = [props.h_pT(p, T) for p, T in zip(p_all, T_all, strict=True)]
    w = props.Water()

    def raw_h(p: float, T: float) -> float:
        raw_state.update(PT, p, T)
        return raw_state.hmass()

    def raw_T(p: float, h: float) -> float:
        raw_state.update(HP, h, p)
        return raw_state.T()

    def raw_ph(p: float, h: float) -> tuple[float, ...]:
        raw_state.update(HP, h, p)
        return raw_state.T(), raw_state.smass(), raw_state.rhomass(), raw_state.cpmass()

    r = args.repeat
    figures: dict[str, object] = {
        "benchmark": "properties",
        "formulation": props.FORMULATION,
        "evaluations": 2 * n,
        "python": platform.python_version(),
    }
    for name, twin_fn, raw_fn, x2 in (
        ("h_pT", w.h_pT, raw_h, T_all),
        ("T_ph", w.T_ph, raw_T, h_all),
        ("ph_state", w.ph, raw_ph, h_all),
    ):
        t_twin = _best_us(twin_fn, p_all, x2, r)
        t_raw = _best_us(raw_fn, p_all, x2, r)
        figures[f"{name}_twin_us"] = round(t_twin, 3)
        figures[f"{name}_raw_us"] = round(t_raw, 3)
        figures[f"{name}_ratio"] = round(t_twin / t_raw, 3)
    figures["ratio_goal_plain_functions"] = 1.5
    return figures
