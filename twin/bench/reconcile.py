"""``twin bench reconcile``: cost of one reconciliation.

(a) demo-u1 with all sensors and the soft model relations, fresh Gaussian noise on
every run, warm-started from the previous ``z_warm`` with the classification cached
(as the live daemon does between changes of the valid-tag set), and cold from the
design point; the model's own evaluation time is reported apart.
(b) scipy's SLSQP on the same demo-u1 problem, and the ratio of its median time to
the warm-started sparse solver's.
(c) noisy demo-u1 windows through the plant reconciler (restarts and serial
elimination included) at design, 75 % and 50 % load, sliding and fixed pressure, in
worker processes: the not-converged count and the median, p99 and worst solve times.
(d) synthetic steam-metering networks of 100…2000 measurements (linear and bilinear),
median time per reconciliation with the full covariance, with the measured variances and
20 KPI-like linear functionals, with the functionals only, and without covariance, and
the fitted log-log slope of time against size for each.
The warm demo-u1 figures come with the full covariance (``warm``), with the measured
variances and 20 KPI-like rows (``warm_diagonal_kpis``, what a cycle reads) and without
covariance (``warm_no_covariance``).
(e) where a warm demo-u1 solve spends its time (properties / model / KKT / covariance /
other, an instrumented pass), the model evaluation against the straightforward one in the
same process (the baseline that tells machine load from code speed), and the per-window
cycle (:class:`twin.cycle.UnitCycle` driven directly: window close → result, median, p99
and worst, with and without the heat-rate deviation split).

The machine is shared: quote medians, and compare figures only within one run.
"""

from __future__ import annotations

import argparse
import os
import time

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numpy as np

from twin.bench import DEFAULT_CONFIG


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--config", default=str(DEFAULT_CONFIG), help="plant config (default demo-u1)")
    parser.add_argument("--runs", type=int, default=50, help="warm-started demo-u1 runs (default 50)")
    parser.add_argument("--slsqp-runs", type=int, default=3, help="SLSQP runs (default 3)")
    parser.add_argument("--repeat", type=int, default=5, help="runs per synthetic size (default 5)")
    parser.add_argument("--seed", type=int, default=1, help="random seed")
    parser.add_argument("--windows", type=int, default=3000,
                        help="noisy demo-u1 windows through the plant reconciler, over design, 75 %% and 50 %% "
                             "load, sliding and fixed pressure (default 3000)")
    parser.add_argument("--workers", type=int, default=2, help="worker processes for the noisy windows (default 2)")
    parser.add_argument("--cycles", type=int, default=60, help="UnitCycle windows for the cycle figure (default 60)")
    parser.add_argument("--cycle-loads", type=_loads, default=(1.0,),
                        help="comma-separated loads the cycle windows step through, each a new operating point "
                             "(default 1.0)")
    parser.add_argument("--only-cycle", action="store_true", help="the cycle figure only (skip the other parts)")
    parser.add_argument("--quick", action="store_true", help="tiny sizes (smoke test)")


def _loads(text: str) -> tuple[float, ...]:
    """``--cycle-loads``: comma-separated load fractions within 0.2-1.2."""
    try:
        loads = tuple(float(x) for x in text.split(","))
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r}: expected comma-separated load fractions, e.g. 1.0,0.8") from None
    if not all(0.2 <= x <= 1.2 for x in loads):
        raise argparse.ArgumentTypeError(f"{text!r}: expected load fractions within 0.2-1.2")
    return loads


class _Timed:
    """Wraps a constraint system, timing its evaluations (bench only).

    Also maps ``IndexError`` escaping the property layer to ``ValueError`` so that the
    solvers treat it as "no value here" like every other out-of-range property call.
    """

    def __init__(self, system):
        self.system = system
        self.n_vars = system.n_vars
        self.seconds = 0.0
        self.calls = 0

    def scales(self):
        return self.system.scales()

    def _call(self, fn, z):
        t0 = time.perf_counter()
        try:
            return fn(z)
        except IndexError as exc:
            raise ValueError(str(exc)) from None
        finally:
            self.seconds += time.perf_counter() - t0
            self.calls += 1

    def residuals(self, z):
        return self._call(self.system.residuals, z)

    def jacobian(self, z):
        return self._call(self.system.jacobian, z)


def _stats_ms(times: list[float]) -> dict:
    a = np.asarray(times) * 1e3
    if a.size == 0:
        return {"median_ms": None, "p95_ms": None, "p99_ms": None, "worst_ms": None, "n": 0}
    return {"median_ms": round(float(np.median(a)), 3),
            "p95_ms": round(float(np.percentile(a, 95)), 3),
            "p99_ms": round(float(np.percentile(a, 99)), 3),
            "worst_ms": round(float(np.max(a)), 3), "n": int(a.size)}


def _demo_problem(config: str):
    from twin.config import load_config
    from twin.model.flowsheet import Flowsheet
    from twin.model.solve import Operation, solve_design
    from twin.performance.plant import PlantSystem

    cfg = load_config(config)
    fs = Flowsheet.from_config(cfg)
    design = solve_design(fs, Operation.from_config(cfg))
    ps = PlantSystem(fs, cfg.sensors, design)
    z0 = ps.initial_point(design.z)
    n_sens = len(ps.sensors)
    measured = np.array([b.column for b in ps.sensors] + [r.column for r in ps.soft], dtype=int)
    sigma = np.array([cfg.sensors_by_tag[b.tag].sigma_si(float(z0[b.column])) for b in ps.sensors]
                     + [r.sigma for r in ps.soft])
    y_true = z0[measured].copy()
    y_true[n_sens:] = 0.0
    return ps, z0, measured, y_true, sigma


def _demo(args, rng) -> dict:
    from twin.reconcile import SolveOptions, reconcile

    ps, z0, measured, y_true, sigma = _demo_problem(args.config)
    system = _Timed(ps)
    V = sigma**2
    out: dict = {"n_vars": int(ps.n_vars), "n_constraints": int(ps.residuals(z0).size),
                 "n_measured": int(measured.size)}
    # cold: from the design point, classification decided at the solution
    cold_t, cold_it, cls, z_warm = [], [], None, z0
    for _ in range(max(1, args.runs // 10)):
        y = y_true + sigma * rng.standard_normal(sigma.size)
        t0 = time.perf_counter()
        r = reconcile(system, z0, measured, y, V)
        cold_t.append(time.perf_counter() - t0)
        cold_it.append(r.iterations)
        if r.converged:
            cls, z_warm = r.classification, r.z_warm
    out["cold"] = {**_stats_ms(cold_t), "iterations_median": float(np.median(cold_it))}
    # warm: previous z_warm, cached classification; a failed warm solve restarts from the
    # design point once (as the plant reconciler does), counted in "restarted"
    warm_t, warm_it, model_t, failed, restarted = [], [], [], 0, 0
    for _ in range(args.runs):
        y = y_true + sigma * rng.standard_normal(sigma.size)
        system.seconds = 0.0
        t0 = time.perf_counter()
        r = reconcile(system, z_warm, measured, y, V, classification=cls)
        if not r.converged:
            restarted += 1
            r = reconcile(system, z0, measured, y, V, classification=cls)
        warm_t.append(time.perf_counter() - t0)
        model_t.append(system.seconds)
        warm_it.append(r.iterations)
        if r.converged:
            z_warm = r.z_warm
        else:
            failed += 1
    engine = [a - b for a, b in zip(warm_t, model_t, strict=True)]
    out["warm"] = {**_stats_ms(warm_t), "iterations_median": float(np.median(warm_it)),
                   "failed": failed, "restarted": restarted, "model_evaluation": _stats_ms(model_t),
                   "engine_only": _stats_ms(engine)}

    def timed(covariance: str, kpi_rows: np.ndarray | None = None) -> list[float]:
        """Warm solves with fresh noise in one covariance mode (and the KPI rows' covariance)."""
        times = []
        for _ in range(max(1, args.runs // 5)):
            y = y_true + sigma * rng.standard_normal(sigma.size)
            t0 = time.perf_counter()
            res = reconcile(system, z_warm, measured, y, V, classification=cls,
                            options=SolveOptions(covariance=covariance))
            if kpi_rows is not None and res.converged:
                res.functional_covariance(kpi_rows)
            times.append(time.perf_counter() - t0)
        return times

    out["warm_no_covariance"] = _stats_ms(timed("none"))
    # what a cycle reads: the measured variances and the covariance of 20 KPI-like rows
    G = _kpi_rows(r, ps.n_vars, args.seed) if r.converged else None
    diag_t = timed("diagonal", G)
    out["warm_diagonal_kpis"] = {**_stats_ms(diag_t), "kpi_rows": SYNTHETIC_KPIS}
    from twin.bench.reconcile_profile import evaluation_baseline, profile_split

    out["profile_split"] = profile_split(ps, z_warm, measured, y_true, sigma, cls, rng, max(3, args.runs // 2))
    out["evaluation_baseline"] = evaluation_baseline(ps, z_warm, 5 if args.quick else 30)
    out["slsqp"] = _slsqp(system, z_warm, measured, y_true, sigma, rng, args)
    med = out["warm"]["median_ms"]
    sl = out["slsqp"]["median_ms"]
    out["speedup_vs_slsqp"] = round(sl / med, 1) if (sl and med) else None
    return out


def _slsqp(system, z_start, measured, y_true, sigma, rng, args) -> dict:
    """SLSQP on the same weighted problem, variables scaled by σ / the system's scales."""
    from scipy import optimize

    vs = np.asarray(system.scales()[0], dtype=float).copy()
    vs[measured] = sigma
    times, ok, errors = [], 0, []
    for _ in range(max(1, args.slsqp_runs)):
        y = y_true + sigma * rng.standard_normal(sigma.size)

        def obj(w, y=y):
            r = (y - (w * vs)[measured]) / sigma
            return 0.5 * float(r @ r)

        def jac(w, y=y):
            g = np.zeros_like(w)
            g[measured] = -(y - (w * vs)[measured]) / sigma
            return g

        def cfun(w):
            return system.residuals(w * vs) / system.scales()[1]

        def cjac(w):
            J = system.jacobian(w * vs)
            J = J.toarray() if hasattr(J, "toarray") else np.asarray(J)
            return J * vs / system.scales()[1][:, None]

        t0 = time.perf_counter()
        try:
            res = optimize.minimize(obj, z_start / vs, jac=jac, method="SLSQP",
                                    constraints=[{"type": "eq", "fun": cfun, "jac": cjac}],
                                    options={"ftol": 1e-10, "maxiter": 5 if args.quick else 300})
            ok += bool(res.success)
        except ValueError as exc:  # SLSQP cannot back off from an out-of-range model state
            errors.append(str(exc)[:120])
        times.append(time.perf_counter() - t0)
    return {**_stats_ms(times), "converged": ok, "model_errors": errors}


#: Covariance figures of the synthetic networks: (name, ``SolveOptions.covariance``, KPI rows read).
SYNTHETIC_COVARIANCES = (("full", "full", False), ("diagonal", "diagonal", True), ("kpi", "none", True),
                         ("none", "none", False))
#: Linear functionals ("KPIs") whose covariance the synthetic figures read, and variables per row.
SYNTHETIC_KPIS, SYNTHETIC_KPI_TERMS = 20, 5


def _kpi_rows(first, n_vars: int, seed: int):
    """``SYNTHETIC_KPIS`` sparse rows, each a signed sum of a few determined variables (KPI-like)."""
    import scipy.sparse as sp

    determined = np.ones(n_vars, bool)
    determined[first.unmeasured[~first.observable]] = False
    cols = np.flatnonzero(determined)
    rng = np.random.default_rng(seed)
    k, t = SYNTHETIC_KPIS, SYNTHETIC_KPI_TERMS
    c = np.concatenate([rng.choice(cols, size=t, replace=False) for _ in range(k)])
    return sp.csr_matrix((rng.choice([-1.0, 1.0], size=k * t), (np.repeat(np.arange(k), t), c)),
                         shape=(k, n_vars))


def _synthetic(args) -> dict:
    """Synthetic networks: median time per reconciliation and the log-log slope, per covariance figure.

    ``full``: the whole linearised covariance; ``diagonal``: the measured variances (tests)
    and the covariance of :data:`SYNTHETIC_KPIS` linear functionals; ``kpi``: only the
    functionals' covariance (``Result.functional_covariance`` after a ``"none"`` solve);
    ``none``: no covariance. ``V`` is passed 1-D (its diagonal), as a plant does.
    """
    from twin.reconcile import SolveOptions, reconcile, synthetic_network

    sizes = (100, 200) if args.quick else (100, 200, 500, 1000, 2000)
    out: dict = {"kpi_rows": SYNTHETIC_KPIS}
    failures: list[str] = []
    for kind in ("linear", "bilinear"):
        med: dict[str, list[float]] = {name: [] for name, _, _ in SYNTHETIC_COVARIANCES}
        for n in sizes:
            net = synthetic_network(n, seed=args.seed, kind=kind)
            V = np.diag(net.V).copy()
            first = reconcile(net.system, net.z0, net.measured, net.y, V)
            cls = first.classification
            start = first.z_warm if first.converged else net.z0
            if not first.converged:
                failures.append(f"{kind} n={n}: {first.status}")
            G = _kpi_rows(first, net.system.n_vars, args.seed) if first.converged else None
            sd = np.sqrt(V)
            for name, cov, reads_kpis in SYNTHETIC_COVARIANCES:
                rng = np.random.default_rng(args.seed)  # the same draws for every figure
                times = []
                for _ in range(max(1, args.repeat)):
                    y = net.z_true[net.measured] + sd * rng.standard_normal(sd.size)
                    t0 = time.perf_counter()
                    r = reconcile(net.system, start, net.measured, y, V,
                                  classification=cls, options=SolveOptions(covariance=cov))
                    if reads_kpis and G is not None and r.converged:
                        r.functional_covariance(G)
                    times.append(time.perf_counter() - t0)
                med[name].append(float(np.median(times)))
        rows = {}
        for name, t in med.items():
            slope = float(np.polyfit(np.log(sizes), np.log(t), 1)[0])
            rows[f"covariance_{name}"] = {
                "median_ms": {str(n): round(x * 1e3, 3) for n, x in zip(sizes, t, strict=True)},
                "loglog_slope": round(slope, 2),
            }
        out[kind] = rows
    out["failures"] = sorted(set(failures))
    return out


#: Operating points of the noisy-window runs: (load fraction [-], pressure mode).
WINDOW_POINTS = ((1.0, "sliding"), (0.75, "sliding"), (0.5, "sliding"),
                 (1.0, "fixed"), (0.75, "fixed"), (0.5, "fixed"))


def _window_worker(job: tuple[str, tuple[tuple[float, str], ...], int, int, dict[str, float]]) -> dict:
    """Noisy windows at each of ``points`` in turn with one warm-started reconciler (one process)."""
    from twin.config import load_config
    from twin.demo.plant import noisy_readings, sensor_truth
    from twin.model.flowsheet import Flowsheet
    from twin.model.solve import Operation, solve_design, solve_off_design
    from twin.performance.plant_reconcile import PlantReconciler

    config, points, n_per_point, seed, bias_fraction = job
    cfg = load_config(config)
    fs = Flowsheet.from_config(cfg)
    op = Operation.from_config(cfg)
    design = solve_design(fs, op)
    rec = PlantReconciler(cfg, flowsheet=fs, design=design)
    rng = np.random.default_rng(seed)
    statuses: list[str] = []
    seconds: list[float] = []
    cpu: list[float] = []
    messages: list[str] = []
    for load, mode in points:
        hb = design if (load == 1.0 and mode == "sliding") else solve_off_design(fs, op, design, load, mode)
        truth = {t: v for t, v in sensor_truth(cfg, hb).items() if t in rec.system.sensor_by_tag}
        bias = {t: f * truth[t] for t, f in bias_fraction.items()}
        for _ in range(n_per_point):
            values = noisy_readings(truth, cfg, rng, bias=bias)
            t0, c0 = time.perf_counter(), time.process_time()
            r = rec.reconcile(values, kpis=())
            seconds.append(time.perf_counter() - t0)
            cpu.append(time.process_time() - c0)
            statuses.append(r.status)
            if not r.converged:
                messages.append(f"{load:g} {mode}: {r.status}: {r.message[:160]}")
    return {"statuses": statuses, "seconds": seconds, "cpu": cpu, "messages": messages}


def noisy_windows(config: str, n_windows: int, *, seed: int = 1, workers: int = 2,
                  bias_fraction: dict[str, float] | None = None) -> dict:
    """Reconcile ``n_windows`` noisy demo windows over :data:`WINDOW_POINTS` in worker processes.

    Each worker takes a share of the operating points and runs them in sequence with one
    warm-started :class:`~twin.performance.plant_reconcile.PlantReconciler` (elimination
    on, as in every live window), so every change of point is a stale warm start.

    Returns
    -------
    dict
        ``n``, ``not_converged`` (count of windows not ``converged``), ``by_status``,
        solve times per window, wall clock and the process's CPU time (``median_ms``,
        ``p99_ms``, ``worst_ms``, ``p99_over_median``), and up to five failure messages.
    """
    from concurrent.futures import ProcessPoolExecutor

    workers = max(1, min(workers, len(WINDOW_POINTS)))
    per_point = max(1, n_windows // len(WINDOW_POINTS))
    shares = [WINDOW_POINTS[w::workers] for w in range(workers)]
    jobs = [(config, pts, per_point, seed + 101 * w, dict(bias_fraction or {})) for w, pts in enumerate(shares)]
    if workers == 1:
        parts = [_window_worker(jobs[0])]
    else:
        with ProcessPoolExecutor(max_workers=workers) as pool:
            parts = list(pool.map(_window_worker, jobs))
    statuses = [s for p in parts for s in p["statuses"]]
    by_status: dict[str, int] = {}
    for st in statuses:
        by_status[st] = by_status.get(st, 0) + 1

    def times(key: str) -> dict:
        t = np.asarray([x for p in parts for x in p[key]]) * 1e3
        med, p99 = float(np.median(t)), float(np.percentile(t, 99))
        return {"median_ms": round(med, 2), "p99_ms": round(p99, 2), "worst_ms": round(float(np.max(t)), 2),
                "p99_over_median": round(p99 / med, 2) if med > 0 else None}

    return {
        "n": len(statuses),
        "points": [f"{load:g} {mode}" for load, mode in WINDOW_POINTS],
        "not_converged": sum(1 for st in statuses if st != "converged"),
        "by_status": by_status,
        "wall": times("seconds"),  # includes waiting for a shared CPU
        "cpu": times("cpu"),  # this process's CPU time per window
        "failures": [m for p in parts for m in p["messages"]][:5],
    }


def run(args: argparse.Namespace) -> dict:
    rng = np.random.default_rng(args.seed)
    if args.quick:
        args.runs = min(args.runs, 3)
        args.slsqp_runs = 1
        args.repeat = 1
    from twin.bench.reconcile_profile import cycle_figures

    windows = 12 if args.quick else args.windows
    cycle = cycle_figures(args.config, 4 if args.quick else max(1, args.cycles), args.seed, args.cycle_loads)
    if args.only_cycle:
        return {"openblas_num_threads": os.environ.get("OPENBLAS_NUM_THREADS"), "cycle": cycle}
    demo = _demo(args, rng)
    return {
        "openblas_num_threads": os.environ.get("OPENBLAS_NUM_THREADS"),
        "demo_u1": demo,
        "demo_u1_windows": noisy_windows(args.config, windows, seed=args.seed, workers=args.workers),
        "cycle": cycle,
        "synthetic": _synthetic(args),
    }
