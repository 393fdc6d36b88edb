"""Parts of ``twin bench reconcile``: where one warm reconciliation spends its time, and the cycle.

:func:`profile_split` repeats warm demo-u1 solves with timers on the property calls,
the model evaluation, the KKT steps and the covariance (an instrumented pass: the
timers add a little overhead, so its total is a bit above the plain warm median).
:func:`evaluation_baseline` times the fast model evaluation against the straightforward
one (a fresh property context per part, coordinate-format Jacobian) in the same
process, so a reader can tell machine load from code speed.
:func:`cycle_figures` drives :class:`twin.cycle.UnitCycle` directly with noisy demo-u1
windows: the window-close → result time of every cycle, steady ones (heat-rate
deviation split into causes) and others apart.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from typing import Any

import numpy as np


class _TimedWater:
    """Forwards every property call to a :class:`twin.properties.Water`, adding up the time (bench only)."""

    def __init__(self, water: Any) -> None:
        self._water = water
        self.seconds = 0.0
        self.calls = 0

    def __getattr__(self, name: str) -> Any:
        attr = getattr(self._water, name)
        if not callable(attr):
            return attr

        def timed(*args: Any, **kwargs: Any) -> Any:  # kwargs: T_guess
            t0 = time.perf_counter()
            try:
                return attr(*args, **kwargs)
            finally:
                self.seconds += time.perf_counter() - t0
                self.calls += 1

        return timed


class _Clock:
    def __init__(self) -> None:
        self.seconds = 0.0

    def wrap(self, fn: Callable[..., Any]) -> Callable[..., Any]:
        def timed(*args: Any, **kwargs: Any) -> Any:
            t0 = time.perf_counter()
            try:
                return fn(*args, **kwargs)
            finally:
                self.seconds += time.perf_counter() - t0
        return timed


def profile_split(ps: Any, z_warm: np.ndarray, measured: np.ndarray, y_true: np.ndarray, sigma: np.ndarray,
                  cls: Any, rng: np.random.Generator, runs: int) -> dict[str, Any]:
    """Median per-solve milliseconds in properties / model / KKT steps / covariance / other."""
    from twin.reconcile import nonlinear, reconcile

    fs = ps.fs
    water = fs.water
    tw = _TimedWater(water)
    model, kkt, cov = _Clock(), _Clock(), _Clock()
    orig_eval, orig_step, orig_final = ps._evaluate, nonlinear._SparseStep.__call__, nonlinear._final_sparse
    rows: dict[str, list[float]] = {k: [] for k in ("total", "properties", "model", "kkt", "covariance", "other")}
    calls: list[int] = []
    fs.water = tw
    ps._evaluate = model.wrap(orig_eval)
    nonlinear._SparseStep.__call__ = kkt.wrap(orig_step)  # type: ignore[method-assign]
    nonlinear._final_sparse = cov.wrap(orig_final)
    try:
        V = sigma**2
        for _ in range(max(1, runs)):
            y = y_true + sigma * rng.standard_normal(sigma.size)
            tw.seconds, tw.calls, model.seconds, kkt.seconds, cov.seconds = 0.0, 0, 0.0, 0.0, 0.0
            t0 = time.perf_counter()
            r = reconcile(ps, z_warm, measured, y, V, classification=cls)
            total = time.perf_counter() - t0
            if not r.converged:
                continue
            z_warm = r.z_warm
            rows["total"].append(total)
            rows["properties"].append(tw.seconds)
            rows["model"].append(model.seconds - tw.seconds)
            rows["kkt"].append(kkt.seconds)
            rows["covariance"].append(cov.seconds)
            rows["other"].append(total - model.seconds - kkt.seconds - cov.seconds)
            calls.append(tw.calls)
    finally:
        fs.water = water
        ps._evaluate = orig_eval
        nonlinear._SparseStep.__call__ = orig_step  # type: ignore[method-assign]
        nonlinear._final_sparse = orig_final
    out: dict[str, Any] = {f"{k}_ms": (round(float(np.median(v)) * 1e3, 3) if v else None) for k, v in rows.items()}
    out["property_calls_median"] = float(np.median(calls)) if calls else None
    out["n"] = len(rows["total"])
    return out


def straightforward_evaluation(ps: Any, z: np.ndarray) -> tuple[np.ndarray, Any]:
    """Residuals and sparse Jacobian the straightforward way: independent contexts, COO assembly.

    The same-process baseline of the bench and the reference of the equivalence tests.
    """
    import scipy.sparse as sp

    from twin.performance.plant import sensor_temperature

    fs = ps.fs
    rows = fs.evaluate(z, skip=ps._skip, constants=ps.constants, fixed_pattern=False)
    values = list(rows.values)
    r, c, d = (list(a) for a in rows.entries())
    for i, name in enumerate(rows.names):
        soft = ps.soft_by_name.get(name)
        if soft is not None:
            values[i] -= float(z[soft.column])
            r.append(i)
            c.append(soft.column)
            d.append(-1.0)
    ctx = fs.context(z, ps.constants, warm=False)
    lay = fs.layout

    def add(value: float, grad: dict[int, float]) -> None:
        i = len(values)
        values.append(float(value))
        for col, dv in grad.items():
            r.append(i)
            c.append(col)
            d.append(float(dv))

    for col, soft in ps._levels:  # line level priors: factor − 1 = e
        add(z[col] - 1.0 - z[soft.column], {col: 1.0, soft.column: -1.0})
    for e, soft in ps._supply:
        col = lay.p(e.port("outlet"))
        add(z[col] - float(ps.design.z[col]) - z[soft.column], {col: 1.0, soft.column: -1.0})
    for b in ps.sensors:
        if b.kind == "T":
            T, dT_dp, dT_dh = sensor_temperature(ctx, b.target)
            add(z[b.column] - T, {b.column: 1.0, lay.p(b.target): -dT_dp, lay.h(b.target): -dT_dh})
        else:
            add(z[b.column] - z[b.target_column], {b.column: 1.0, b.target_column: -1.0})
    return np.asarray(values), sp.csr_matrix((d, (r, c)), shape=(len(values), ps.n_vars))


def evaluation_baseline(ps: Any, z: np.ndarray, repeat: int = 30) -> dict[str, Any]:
    """Median ms of one evaluation (residuals + Jacobian): fast path and straightforward path, alternated.

    A second, instrumented pass times the property calls of each path, which splits each
    evaluation into ``properties_ms`` and ``model_ms`` (everything else: equations, rows,
    Jacobian assembly; the timers' overhead falls mostly on the properties side).
    """
    fast, plain = [], []
    for k in range(max(1, repeat)):
        zk = z * (1.0 + 1e-9 * (k + 1))  # a new vector every time: no result cache
        t0 = time.perf_counter()
        ps.residuals(zk)
        ps.jacobian(zk)
        fast.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        straightforward_evaluation(ps, zk)
        plain.append(time.perf_counter() - t0)
    f, p = float(np.median(fast)) * 1e3, float(np.median(plain)) * 1e3
    out: dict[str, Any] = {"fast_ms": round(f, 3), "straightforward_ms": round(p, 3),
                           "ratio": round(p / f, 2) if f > 0 else None}
    water = ps.fs.water
    tw = _TimedWater(water)
    split: dict[str, dict[str, list[float]]] = {
        name: {"total": [], "properties": [], "calls": []} for name in ("fast", "straightforward")}
    ps.fs.water = tw
    try:
        for k in range(max(1, repeat)):
            zk = z * (1.0 - 1e-9 * (k + 1))
            for name, run in (("fast", lambda v: (ps.residuals(v), ps.jacobian(v))),
                              ("straightforward", lambda v: straightforward_evaluation(ps, v))):
                tw.seconds, tw.calls = 0.0, 0
                t0 = time.perf_counter()
                run(zk)
                split[name]["total"].append(time.perf_counter() - t0)
                split[name]["properties"].append(tw.seconds)
                split[name]["calls"].append(tw.calls)
    finally:
        ps.fs.water = water
    for name, d in split.items():
        total, props = np.asarray(d["total"]), np.asarray(d["properties"])
        out[f"{name}_split"] = {"properties_ms": round(float(np.median(props)) * 1e3, 3),
                                "model_ms": round(float(np.median(total - props)) * 1e3, 3),
                                "property_calls": float(np.median(d["calls"]))}
    return out


def _percentiles(times: list[float]) -> dict[str, Any]:
    a = np.asarray(times) * 1e3
    if a.size == 0:
        return {"median_ms": None, "p99_ms": None, "max_ms": None, "n": 0}
    return {"median_ms": round(float(np.median(a)), 2), "p99_ms": round(float(np.percentile(a, 99)), 2),
            "max_ms": round(float(a.max()), 2), "n": int(a.size)}


def cycle_figures(config_path: str, cycles: int, seed: int, loads: tuple[float, ...] = (1.0,)) -> dict[str, Any]:
    """Window close → result of ``UnitCycle.run`` over noisy demo-u1 windows.

    The cycles are spread evenly over ``loads`` (sliding pressure, in that order), so
    every change of load is a new operating point of the expected model; the first
    split window after each change (where the node's sensitivities are computed) is
    reported apart in ``first_split_at_new_load``. ``cycle_split`` is where each
    cycle's time goes (medians and p99 of: reconciliation without the KPIs, KPIs ± U,
    expected values, deviation by cause, monitors, and the rest of ``UnitCycle.run``).
    """
    from twin.config import load_config
    from twin.cycle import UnitCycle, WindowInput
    from twin.demo.plant import sensor_truth
    from twin.ingest.store import WindowStats
    from twin.model.solve import solve_off_design

    cfg = load_config(config_path)
    uc = UnitCycle(cfg)
    rec = uc.reconciler
    rng = np.random.default_rng(seed)
    cycle_s = float(uc.cycle_seconds)
    t_end = 1_700_000_000.0
    all_t: list[float] = []
    cpu_t: list[float] = []  # this process's CPU time per cycle (less sensitive to a shared machine)
    split_t: list[float] = []
    other_t: list[float] = []
    rec_t: list[float] = []
    dev_t: list[float] = []
    first_split: list[float] = []
    parts: dict[str, list[float]] = {k: [] for k in ("reconcile", "kpis", "expected", "deviation_by_cause",
                                                     "monitors", "other")}
    statuses: dict[str, int] = {}
    runs = 0
    n_cycles = max(1, cycles)
    per_load = max(1, n_cycles // len(loads))
    for k in range(n_cycles):
        load = loads[min(k // per_load, len(loads) - 1)]
        if k % per_load == 0 and k // per_load < len(loads):
            hb = rec.design if load == 1.0 else solve_off_design(uc.fs, uc.op, rec.design, load, "sliding")
            truth = {t: v for t, v in sensor_truth(cfg, hb).items() if t in rec.system.sensor_by_tag}
            sig = {t: rec.sigma(t, v) for t, v in truth.items()}
            split_seen = False
        t_end += cycle_s
        stats = {}
        for tag, v in truth.items():
            m = v + sig[tag] * rng.standard_normal()
            stats[tag] = WindowStats(m, sig[tag], 300, 0, t_end - 0.05, 0.05, m, m, False)
        t0, c0 = time.perf_counter(), time.process_time()
        out = uc.run(WindowInput(t_end, float(uc.window_seconds), stats, stats))
        dt = time.perf_counter() - t0
        cpu_t.append(time.process_time() - c0)
        res = out.result
        all_t.append(dt)
        if math.isfinite(out.reconcile_seconds):
            rec_t.append(out.reconcile_seconds)
        dev_s = getattr(out, "deviation_seconds", math.nan)
        if math.isfinite(dev_s):
            dev_t.append(dev_s)
        runs += int(getattr(out, "cause_model_runs", 0))
        got = {k: float(getattr(out, f"{k}_seconds", math.nan)) for k in ("kpi", "expected", "monitors")}
        got["kpis"] = got.pop("kpi")
        got["reconcile"] = out.reconcile_seconds - got["kpis"]
        got["deviation_by_cause"] = dev_s - got["expected"]
        got["other"] = dt - out.reconcile_seconds - dev_s - got["monitors"]
        for key, v in got.items():
            parts[key].append(v if math.isfinite(v) else 0.0)
        status = str(getattr(res, "heat_rate_deviation_status", "") or "").split(":")[0] or "n/a"
        statuses[status] = statuses.get(status, 0) + 1
        if res.heat_rate_deviation_by_cause:
            split_t.append(dt)
            if not split_seen:
                first_split.append(round(dt * 1e3, 1))
                split_seen = True
        else:
            other_t.append(dt)
    grid = getattr(uc.expected_model, "grid", None)
    return {"loads": list(loads), "all": _percentiles(all_t), "all_cpu": _percentiles(cpu_t),
            "deviation_split": _percentiles(split_t),
            "without_split": _percentiles(other_t), "reconcile_part": _percentiles(rec_t),
            "deviation_part": _percentiles(dev_t), "first_split_at_new_load_ms": first_split,
            "exact_cause_runs": runs, "expected_node_solves": getattr(grid, "solves", None),
            "expected_direct_solves": getattr(uc.expected_model, "direct_solves", None),
            "deviation_status": statuses,
            "cycle_split": {k: {"median_ms": _percentiles(v)["median_ms"], "p99_ms": _percentiles(v)["p99_ms"]}
                            for k, v in parts.items()}}
