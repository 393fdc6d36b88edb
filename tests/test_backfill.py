"""Historian back-fill: the live window statistics and pipeline over history, chunked and resumable.

Checks against things the back-fill did not write: the live tag store
(:class:`twin.ingest.store.TagStore`), the live daemon's own window input
and cycle object (the same windows fed as the daemon feeds them), an
uninterrupted run (for resume), the local process pool (for Dask), and a
real Prometheus on promtool-built blocks.
"""

from __future__ import annotations

import json
import math
import os
import signal
import subprocess
import sys
import time
import urllib.parse
import urllib.request
from pathlib import Path

import numpy as np
import pytest

from twin.backfill import (
    BackfillOptions,
    backfill,
    make_plan,
    output_digest,
    result_rows,
    window_inputs,
)
from twin.config import load_config
from twin.history import HistoryReader, read_samples
from twin.ingest.store import TagStore

ROOT = Path(__file__).resolve().parents[1]
CONFIG = ROOT / "configs" / "demo-u1.toml"
START = 1767571200.0  # 2026-01-05T00:00:00Z
CYCLE = 60.0  # [s] a coarse grid keeps the tests short
HOURS = 0.5


@pytest.fixture(scope="module")
def config():
    return load_config(CONFIG)


@pytest.fixture(scope="module")
def history(tmp_path_factory, config) -> Path:
    """Half an hour of the demo scenario at 5 s samples (the live demo's own simulator)."""
    from twin.demo.history import write_history

    p = tmp_path_factory.mktemp("hist") / "demo.csv.gz"
    write_history(config, p, hours=HOURS, start=START, sample_interval=5.0, seed=3)
    return p


def _opts(**kw) -> BackfillOptions:
    base = {"cycle": CYCLE, "window": CYCLE, "chunk_seconds": 10 * CYCLE, "warmup_seconds": 5 * CYCLE,
            "workers": 1, "formats": ("csv", "openmetrics")}
    base.update(kw)
    return BackfillOptions(**base)


def _quiet(_: str) -> None:
    pass


def test_window_statistics_equal_the_live_tag_store(config, history):
    """Same samples: back-fill window statistics == TagStore.window (the live path), field by field."""
    samples = read_samples(HistoryReader(config), [history])
    tags = [s.tag for s in config.sensors]
    max_age = {s.tag: float(s.max_age) for s in config.sensors}
    store = TagStore(tags, capacity=4096, max_age=max_age)
    order = np.argsort(samples.t, kind="stable")
    store.add_many((tags[samples.tag[i]], float(samples.t[i]), float(samples.value[i]), bool(samples.ok[i]))
                   for i in order)
    ends = START + 60.0 * np.arange(2, 20)
    got = window_inputs(samples, tags, ends, 30.0, 10.0, [max_age[t] for t in tags],
                        config.monitoring.steady_signals, lookback=3600.0)
    for t_end, stats, gate in got:
        live = store.window(t_end - 30.0, t_end)
        live_gate = store.window(t_end - 10.0, t_end)
        for tag in tags:
            a, b = stats[tag], live[tag]
            assert (a.count, a.n_bad, a.stale) == (b.count, b.n_bad, b.stale)
            for f in ("mean", "std", "min", "max", "last_time", "age"):
                x, y = getattr(a, f), getattr(b, f)
                assert (math.isnan(x) and math.isnan(y)) or x == y, (tag, f, x, y)
        for tag, g in gate.items():
            assert g.mean == live_gate[tag].mean and g.count == live_gate[tag].count


def test_dense_irregular_windows_equal_the_live_tag_store(config):
    """Windows of 0 to ~200 samples (numpy's pairwise sums), gaps, bad quality, stale tags == TagStore.window."""
    from twin.history import Samples

    rng = np.random.default_rng(7)
    tags = [s.tag for s in config.sensors][:6]
    t, tag, value, ok = [], [], [], []
    for i in range(len(tags)):
        dt = rng.choice([0.25, 1.0, 3.0]) * rng.uniform(0.5, 1.5, 4000)  # irregular sampling per tag
        ti = START + np.cumsum(dt)
        ti = ti[(ti < START + 1500.0) | (ti > START + 2400.0)] if i == 2 else ti  # a gap: the tag goes stale
        t.append(ti)
        tag.append(np.full(len(ti), i, np.int32))
        value.append(1e5 * (i + 1) + rng.standard_normal(len(ti)) * 10 ** rng.uniform(-3, 3))
        ok.append(rng.random(len(ti)) > 0.05)
    samples = Samples(*(np.concatenate(x) for x in (t, tag, value, ok)))
    max_age = {g: 120.0 for g in tags}
    store = TagStore(tags, capacity=1 << 16, max_age=max_age)
    order = np.argsort(samples.t, kind="stable")
    store.add_many((tags[samples.tag[i]], float(samples.t[i]), float(samples.value[i]), bool(samples.ok[i]))
                   for i in order)
    ends = START + 30.0 * np.arange(1, 120)
    got = window_inputs(samples, tags, ends, 60.0, 30.0, [120.0] * len(tags), tags[:2], lookback=1e6)
    counts = set()
    for t_end, stats, gate in got:
        live, live_gate = store.window(t_end - 60.0, t_end), store.window(t_end - 30.0, t_end)
        for name, ours, theirs in [*((g, stats[g], live[g]) for g in tags), *((g, gate[g], live_gate[g]) for g in gate)]:
            assert ours == theirs or repr(ours) == repr(theirs), (name, t_end, ours, theirs)  # NaN != NaN
            counts.add(ours.count)
    assert max(counts) > 150 and 0 in counts and len(counts) > 20


def test_plan_windows_on_the_cycle_grid():
    p = make_plan(START + 5.0, START + 600.0, 60.0, 60.0, 4, 2)
    first, last, n = p.ends
    assert (first, last, n) == (START + 120.0, START + 600.0, 9)  # first whole window ends on the grid
    chunks = p.chunks()
    assert [c[2] for c in chunks] == [4, 4, 1]
    assert chunks[1][1] == START + 120.0 + 4 * 60.0


# ----------------------------------------------------------------------------- slow: real runs
@pytest.fixture(scope="module")
def reference(tmp_path_factory, history) -> Path:
    """An uninterrupted back-fill in one process (the reference for the others)."""
    out = tmp_path_factory.mktemp("ref")
    backfill(CONFIG, [history], out, _opts(), echo=_quiet)
    return out


@pytest.mark.slow
def test_live_daemon_path_gives_identical_rows(config, history, tmp_path):
    """The daemon's tag store, window input and cycle object over the same samples == back-fill rows."""
    from twin.backfill import _model_for
    from twin.daemon import Daemon, DaemonOptions, ManualClock
    from twin.performance.plant_reconcile import PlantReconciler

    n_windows = 8
    out = tmp_path / "bf"
    t_to = START + (n_windows + 1) * CYCLE
    backfill(CONFIG, [history], out, _opts(t_from=START, t_to=t_to, warmup_seconds=0.0), echo=_quiet)
    cfg = load_config(CONFIG)
    cfg.monitoring.cycle = cfg.monitoring.window = CYCLE
    daemon = Daemon(cfg, clock=ManualClock(START), options=DaemonOptions(metrics=False, republish=False),
                    reconciler=PlantReconciler(cfg, time_budget=math.inf))
    samples = read_samples(HistoryReader(cfg), [history], -math.inf, t_to)
    tags = [s.tag for s in cfg.sensors]
    order = np.argsort(samples.t, kind="stable")
    units = _model_for(str(CONFIG.resolve()), CYCLE, CYCLE)[2]
    live_rows = []
    k = 0
    for t_end in START + CYCLE * np.arange(1, n_windows + 2):
        while k < len(order) and samples.t[order[k]] < t_end:  # messages arrive in time order
            i = order[k]
            daemon.store.add(tags[samples.tag[i]], float(samples.t[i]), float(samples.value[i]), bool(samples.ok[i]))
            k += 1
        res = daemon.cycle.run(daemon.window_input(float(t_end))).result
        live_rows.extend(result_rows(res, units))
    bf_rows = (out / "reconciled.csv").read_text().splitlines(keepends=True)[1:]
    assert len(bf_rows) > 100
    assert bf_rows == live_rows


@pytest.mark.slow
def test_pool_equals_one_process_and_resume_skips(reference, history, tmp_path):
    out = tmp_path / "pool"
    s = backfill(CONFIG, [history], out, _opts(workers=2), echo=_quiet)
    assert s.chunks == 3 and s.windows == 29
    assert output_digest(out) == output_digest(reference)
    again = backfill(CONFIG, [history], out, _opts(workers=2), echo=_quiet)  # everything recorded: skipped
    assert again.chunks_skipped == 3
    assert output_digest(out) == output_digest(reference)


@pytest.mark.slow
def test_a_chunk_without_its_drift_inputs_runs_again_and_a_broken_one_is_one_line(reference, history, tmp_path):
    """The drift pass reads every chunk's drift inputs: a finished chunk missing them is recomputed
    (output identical to the uninterrupted run), an unreadable one stops with one line naming the file."""
    import shutil

    from twin.backfill import BackfillError

    out = tmp_path / "copy"
    shutil.copytree(reference, out)
    (out / "chunks" / "chunk-000001" / "drift.npy").unlink()
    again = backfill(CONFIG, [history], out, _opts(), echo=_quiet)
    assert again.chunks_skipped == 2 and output_digest(out) == output_digest(reference)
    broken = out / "chunks" / "chunk-000000" / "drift.npy"
    broken.write_bytes(b"not an array")
    with pytest.raises(BackfillError, match=r"chunk-000000/drift\.npy: unreadable drift inputs") as err:
        backfill(CONFIG, [history], out, _opts(), echo=_quiet)
    assert "\n" not in str(err.value)


@pytest.mark.slow
def test_outputs_columns_and_openmetrics(reference):
    lines = (reference / "reconciled.csv").read_text().splitlines()
    assert lines[0] == "window_end,name,value,uncertainty_95,unit,status,steady"
    names = {ln.split(",")[1] for ln in lines[1:]}
    assert {"gross_efficiency", "section_efficiency.HP", "tag:FW-F1", "expected:gross_efficiency"} <= names
    assert any(n.startswith("deviation:") for n in names)
    om = sorted((reference / "openmetrics").glob("*.om"))
    assert len(om) == 6  # per chunk: its windows' metrics, and the drift pass's charts (*.drift.om)
    for f in (f for f in om if not f.name.endswith(".drift.om")):
        text = f.read_text()
        assert text.endswith("# EOF\n")
        sample = next(ln for ln in text.splitlines() if ln.startswith("twin_gross_efficiency_ratio{"))
        ts = float(sample.rsplit(" ", 1)[1])
        assert START < ts < START + 3600 and ts % CYCLE == 0  # timestamps in seconds, on the grid


@pytest.mark.slow
def test_chunked_warmup_equals_a_single_sequential_pass(history, tmp_path):
    """Chunks with a warm-up longer than the gate's memory == one uninterrupted pass.

    Equal: steady flags, statuses, events, row names; values to 1e-6 relative
    (the reconciler's warm start differs at solver tolerance across a chunk
    boundary).
    """
    single = tmp_path / "single"
    chunked = tmp_path / "chunked"
    backfill(CONFIG, [history], single, _opts(chunk_seconds=3600.0, warmup_seconds=0.0), echo=_quiet)
    backfill(CONFIG, [history], chunked, _opts(chunk_seconds=8 * CYCLE, warmup_seconds=22 * CYCLE, workers=2),
             echo=_quiet)
    a = [ln.split(",") for ln in (single / "reconciled.csv").read_text().splitlines()[1:]]
    b = [ln.split(",") for ln in (chunked / "reconciled.csv").read_text().splitlines()[1:]]
    # compare from the first window whose warm-up reaches back to the start of the data
    first = START + 23 * CYCLE
    a = [r for r in a if _t(r[0]) >= first]
    b = [r for r in b if _t(r[0]) >= first]
    assert len(a) == len(b) > 50
    for ra, rb in zip(a, b, strict=True):
        assert (ra[0], ra[1], ra[4], ra[5], ra[6]) == (rb[0], rb[1], rb[4], rb[5], rb[6])
        assert float(ra[2]) == pytest.approx(float(rb[2]), rel=1e-6, abs=1e-9)
    ev_a = [ln for ln in (single / "events.csv").read_text().splitlines()[1:] if _t(ln.split(",")[0]) >= first]
    ev_b = [ln for ln in (chunked / "events.csv").read_text().splitlines()[1:] if _t(ln.split(",")[0]) >= first]
    assert [e.split(",")[:5] for e in ev_a] == [e.split(",")[:5] for e in ev_b]


@pytest.fixture(scope="module")
def drift_run(tmp_path_factory):
    """4 simulated hours with a 20-window drift reference, back-filled in one chunk without warm-up."""
    from twin.demo.history import write_history

    d = tmp_path_factory.mktemp("drift")
    text = CONFIG.read_text()
    assert "reference_windows = 100" in text
    cfg_path = d / "demo-u1-short-reference.toml"
    cfg_path.write_text(text.replace("reference_windows = 100", "reference_windows = 20"))
    hist = d / "h.csv.gz"
    write_history(load_config(cfg_path), hist, hours=4.0, start=START, sample_interval=10.0, seed=5)
    single = d / "single"
    s1 = backfill(cfg_path, [hist], single, _opts(chunk_seconds=5 * 3600.0, warmup_seconds=0.0), echo=_quiet)
    return cfg_path, hist, single, s1


@pytest.mark.slow
def test_chunked_drift_charts_and_alarms_equal_one_sequential_pass(drift_run, tmp_path):
    """Drift charts and drift alarms of a chunked run == one uninterrupted pass (the sequential drift pass).

    A drift chart carries its whole history (learned reference, EWMA, CUSUM), so
    the back-fill charts it in one pass over all chunks. Truth: the same history
    through one chunk without warm-up. The demo scenario's HP efficiency loss must
    raise the HP drift alarm in both, at the same window, with chunks of 40 windows
    (the CUSUM accumulates across several chunk boundaries).
    """
    cfg_path, hist, single, s1 = drift_run
    chunked = tmp_path / "chunked"
    n_chunk, n_warm = 40, 60
    s2 = backfill(cfg_path, [hist], chunked, _opts(chunk_seconds=n_chunk * CYCLE, warmup_seconds=n_warm * CYCLE,
                                                   workers=2), echo=_quiet)
    assert s1.chunks == 1 and s2.chunks >= 6
    # the first chunk's warm-up lies before the data: compare from the window its warm-up would reach
    first = START + n_warm * CYCLE
    a, b = _om_samples(single, first), _om_samples(chunked, first)
    drift_a = {k: v for k, v in a.items() if k[0].startswith("twin_kpi_drift")}
    drift_b = {k: v for k, v in b.items() if k[0].startswith("twin_kpi_drift")}
    assert len({k[2] for k in drift_a if k[0] == "twin_kpi_drift_ewma"}) >= 100  # charting, not learning
    assert drift_a.keys() == drift_b.keys()
    for k, x in drift_a.items():
        if k[0] in ("twin_kpi_drift_alarm", "twin_kpi_drift_direction"):
            assert drift_b[k] == x, k
        else:  # the KPIs agree to 1e-6 relative (warm start at solver tolerance): a thousandth of the band
            # (the band is 0 at a chart's first window: then to rounding)
            band = drift_a[("twin_kpi_drift_ewma_upper", *k[1:])] - drift_a[("twin_kpi_drift_ewma_lower", *k[1:])]
            assert abs(drift_b[k] - x) <= 1e-3 * band + 1e-12, k
    ev_a = [e.split(",")[:5] for e in (single / "events.csv").read_text().splitlines()[1:] if _t(e.split(",")[0]) >= first]
    ev_b = [e.split(",")[:5] for e in (chunked / "events.csv").read_text().splitlines()[1:] if _t(e.split(",")[0]) >= first]
    assert ev_a == ev_b
    raised = [e for e in ev_a if e[2] == "drift" and e[4] == "active"]
    assert any(e[1] == "drift_section_efficiency.HP" for e in raised), raised
    assert s1.drift_alarms_raised == s2.drift_alarms_raised >= 1
    # each drift file holds each family once (while learning: only the alarm and direction flags)
    kinds = []
    for f in sorted((chunked / "openmetrics").glob("*.drift.om")):
        heads = [ln for ln in f.read_text().splitlines() if ln.startswith("# TYPE")]
        assert len(heads) == len(set(heads)) and f.read_text().endswith("# EOF\n"), f
        kinds.append(len(heads))
    assert kinds[0] == 2 and kinds[-1] == 7, kinds


@pytest.mark.slow
def test_live_daemon_path_gives_the_backfilled_drift_charts_and_alarms(drift_run):
    """The daemon's tag store, window input and cycle object over the same 4 hours == the back-fill's
    drift pass: every chart value of every window (exactly), and the drift transitions of events.csv."""
    from twin.daemon import Daemon, DaemonOptions, ManualClock
    from twin.performance.plant_reconcile import PlantReconciler

    cfg_path, hist, single, _ = drift_run
    cfg = load_config(cfg_path)
    cfg.monitoring.cycle = cfg.monitoring.window = CYCLE
    daemon = Daemon(cfg, clock=ManualClock(START), options=DaemonOptions(metrics=False, republish=False),
                    reconciler=PlantReconciler(cfg, time_budget=math.inf))
    samples = read_samples(HistoryReader(cfg), [hist])
    tags = [s.tag for s in cfg.sensors]
    order = np.argsort(samples.t, kind="stable")
    first, _, count = make_plan(float(samples.t.min()), float(samples.t.max()) + 1e-6, CYCLE, CYCLE, 1, 0).ends
    ends = first + CYCLE * np.arange(count)  # the back-fill's grid (its range: the span of the data)
    assert count > 200
    live_samples: dict[tuple[str, str, float], float] = {}
    live_events = []
    k = 0
    for t_end in ends:
        while k < len(order) and samples.t[order[k]] < t_end:  # messages arrive in time order
            i = order[k]
            daemon.store.add(tags[samples.tag[i]], float(samples.t[i]), float(samples.value[i]), bool(samples.ok[i]))
            k += 1
        out = daemon.cycle.run(daemon.window_input(float(t_end)))
        for name, d in out.result.drift.items():
            labels = f'kpi="{name}",unit_id="{cfg.unit.id}"}}'
            for metric, v in (("ewma", d.ewma), ("ewma_lower", d.ewma_lower), ("ewma_upper", d.ewma_upper),
                              ("cusum_high", d.cusum_high), ("cusum_low", d.cusum_low)):
                if math.isfinite(v):
                    live_samples[(f"twin_kpi_drift_{metric}", labels, t_end)] = v
            live_samples[("twin_kpi_drift_alarm", labels, t_end)] = 1.0 if d.alarm else 0.0
        live_events += [[tr.alarm, tr.old, tr.new] for tr in out.transitions if tr.level == "drift"]
    got = {k: v for k, v in _om_samples(single, START).items()
           if k[0].startswith("twin_kpi_drift") and k[0] != "twin_kpi_drift_direction"}
    assert len(live_samples) > 1000 and got == live_samples
    bf_events = [e.split(",")[1:5] for e in (single / "events.csv").read_text().splitlines()[1:]]
    assert [[a, o, n] for a, lv, o, n in bf_events if lv == "drift"] == live_events and live_events


def _om_samples(out: Path, t_min: float) -> dict[tuple[str, str, float], float]:
    """(metric, labels, timestamp) -> value of every OpenMetrics sample at or after ``t_min``."""
    got = {}
    for f in sorted((out / "openmetrics").glob("*.om")):
        for ln in f.read_text().splitlines():
            if ln.startswith("#"):
                continue
            series, value, ts = ln.rsplit(" ", 2)
            name, _, labels = series.partition("{")
            if float(ts) >= t_min:
                got[(name, labels, float(ts))] = float(value)
    return got


def _t(text: str) -> float:
    from datetime import datetime

    return datetime.fromisoformat(text.replace("Z", "+00:00")).timestamp()


@pytest.mark.slow
def test_sigkill_then_resume_is_byte_identical(history, tmp_path):
    # short chunks (10 of 29 windows), so the kill lands between two of them on a busy machine too
    reference = tmp_path / "uninterrupted"
    backfill(CONFIG, [history], reference, _opts(chunk_seconds=3 * CYCLE), echo=_quiet)
    out = tmp_path / "killed"
    cmd = [sys.executable, "-m", "twin.cli", "backfill", str(CONFIG), str(history), "--out", str(out),
           "--cycle", str(CYCLE), "--window", str(CYCLE), "--chunk", str(3 * CYCLE / 3600), "--warmup",
           str(5 * CYCLE / 60), "--workers", "1", "--format", "csv,openmetrics"]
    env = {**os.environ, "PYTHONPATH": str(ROOT), "OPENBLAS_NUM_THREADS": "1"}
    proc = subprocess.Popen(cmd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    manifest = out / "manifest.json"
    deadline = time.monotonic() + 600
    while time.monotonic() < deadline and proc.poll() is None:
        try:
            if len(json.loads(manifest.read_text()).get("chunks", {})) >= 1:
                break
        except (OSError, json.JSONDecodeError):
            pass
        time.sleep(0.05)
    assert proc.poll() is None, "the run ended before it could be killed"
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    done = len(json.loads(manifest.read_text())["chunks"])
    assert 1 <= done < 10
    p2 = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=900)
    assert p2.returncode == 0, p2.stderr[-2000:]
    assert f"({done} already done)" in p2.stderr
    assert output_digest(out) == output_digest(reference)


@pytest.mark.slow
def test_dask_local_cluster_equals_process_pool(reference, history, tmp_path):
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
                                  host="127.0.0.1") as cluster:
        out = tmp_path / "dask"
        s = backfill(CONFIG, [history], out, _opts(scheduler=cluster.scheduler_address), echo=_quiet)
    assert s.windows == 29
    assert output_digest(out) == output_digest(reference)


@pytest.mark.slow
@pytest.mark.prometheus
def test_prometheus_on_backfilled_blocks(reference, tmp_path, prometheus_factory):
    """promtool blocks → a real Prometheus: KPIs equal reconciled.csv; the dashboard's queries return data."""
    import shutil

    promtool = shutil.which("promtool")
    if promtool is None:
        pytest.skip("promtool is not installed")
    tsdb = tmp_path / "tsdb"
    from twin.commands.backfill import _tsdb

    assert _tsdb(reference / "openmetrics", tsdb, START) == 0
    days = math.ceil((time.time() - START) / 86400) + 2
    prom = prometheus_factory([], storage=tsdb, extra_args=(f"--storage.tsdb.retention.time={days}d",))
    rows = [ln.split(",") for ln in (reference / "reconciled.csv").read_text().splitlines()[1:]]
    checked = 0
    for r in rows:
        if r[1] != "gross_efficiency":
            continue
        t = _t(r[0])
        res = _query(prom, 'twin_gross_efficiency_ratio{unit_id="demo-u1"}', t)
        assert len(res) == 1 and float(res[0]["value"][1]) == float(r[2])
        assert float(res[0]["value"][0]) == t
        checked += 1
    assert checked >= 20
    # the dashboard's queries on the back-filled range (recording rules filled in by promtool too)
    rules = ROOT / "deploy" / "prometheus" / "rules" / "twin-recording.yml"
    rule_blocks = tmp_path / "rule-blocks"
    end = START + HOURS * 3600
    p = subprocess.run([promtool, "tsdb", "create-blocks-from", "rules", f"--start={int(START)}",
                        f"--end={int(end)}", f"--url={prom.url}", f"--output-dir={rule_blocks}",
                        "--eval-interval=60s", str(rules)], capture_output=True, text=True, timeout=300)
    assert p.returncode == 0, p.stderr[-2000:]
    prom.stop()
    for block in rule_blocks.iterdir():
        if block.is_dir():
            shutil.move(str(block), tsdb / block.name)
    prom = prometheus_factory([], storage=tsdb, extra_args=(f"--storage.tsdb.retention.time={days}d",))
    exprs = _dashboard_exprs()
    empty = []
    for e in exprs:
        res = _query_range(prom, e, START + 20 * 60, end)
        if not res:
            empty.append(e)
    # allowed to be empty here, each for a stated reason
    reasons = {
        "suspect": "conditional: no transmitter fails the test in the first 30 minutes",
        "twin_alarm_active": "conditional: no alarm is raised in the first 30 minutes",
        "twin_kpi_drift_alarm": "conditional: no drift alarm in the first 30 minutes",
        "twin_payloads_rejected": "conditional: the simulated history has no rejected values",
        "twin_cycle_duration_seconds": "live only: the daemon's wall-clock histogram is not back-filled",
        "twin_result_compute_seconds": "live only: wall-clock figures are not written (byte-identical output)",
        "twin_kpi_drift_cusum": "learning: the charts learn their baseline over the first "
                                "[monitoring.drift] reference_windows steady windows",
        'kpi="gross_efficiency"': "gross efficiency is not one of the drift-chart KPIs (twin.cycle.DRIFT_KPIS)",
    }
    unexplained = [e for e in empty if not any(k in e for k in reasons)]
    assert not unexplained, "\n".join(unexplained)
    assert len(exprs) - len(empty) >= 30


def _dashboard_exprs() -> list[str]:
    doc = json.loads((ROOT / "deploy" / "grafana" / "twin-dashboard.json").read_text())
    found: list[str] = []

    def walk(x):
        if isinstance(x, dict):
            if "expr" in x and isinstance(x["expr"], str) and x["expr"].strip():
                found.append(x["expr"])
            for v in x.values():
                walk(v)
        elif isinstance(x, list):
            for v in x:
                walk(v)

    walk(doc.get("panels", doc))
    subs = {"$unit_id": "demo-u1", "${unit_id}": "demo-u1", "$__rate_interval": "5m", "$__interval": "1m",
            "$__range": "30m"}
    out = []
    for e in dict.fromkeys(found):
        for k, v in subs.items():
            e = e.replace(k, v)
        out.append(e)
    return out


def _query(prom, expr: str, t: float) -> list[dict]:
    q = urllib.parse.urlencode({"query": expr, "time": f"{t:.3f}"})
    with urllib.request.urlopen(f"{prom.url}/api/v1/query?{q}", timeout=10) as resp:
        body = json.load(resp)
    assert body["status"] == "success", body
    return body["data"]["result"]


def _query_range(prom, expr: str, start: float, end: float) -> list[dict]:
    q = urllib.parse.urlencode({"query": expr, "start": f"{start:.0f}", "end": f"{end:.0f}", "step": "60"})
    with urllib.request.urlopen(f"{prom.url}/api/v1/query_range?{q}", timeout=20) as resp:
        body = json.load(resp)
    assert body["status"] == "success", (expr, body)
    return body["data"]["result"]


def test_openmetrics_writer_equals_the_metrics_module():
    """The back-fill's fast writer gives exactly the text of twin.metrics.openmetrics_lines."""
    from dataclasses import replace

    from twin.backfill import openmetrics_text
    from twin.metrics import openmetrics_lines
    from twin.result import (
        AlarmView,
        CycleResult,
        DriftView,
        Estimate,
        InputStats,
        StreamState,
        TagResult,
    )

    results = []
    for k in range(3):
        t = START + 60.0 * (k + 1)
        results.append(CycleResult(
            unit_id="demo-u1", window_start=t - 60.0, window_end=t, steady=k > 0, steady_status="steady",
            reconcile_status="converged", iterations=3 + k, global_test=1.5 + k, global_test_dof=7,
            tags={"FW-F1": TagResult("FW-F1", "mass_flow", measured=300.0 + k, reconciled=299.5, reconciled_sigma=0.7,
                                     valid=True, normalised_adjustment=0.4, suspect=k == 2),
                  "HP-MS-T1": TagResult("HP-MS-T1", "temperature", measured=814.15, valid=False, reason="stale")},
            kpis={"gross_efficiency": Estimate(0.4123 + 1e-4 * k, 0.004, True),
                  "section_efficiency.HP": Estimate(0.86, 0.01, True), "net_power": Estimate()},
            expected={"gross_efficiency": 0.415}, heat_rate_deviation=1e-3 * k,
            heat_rate_deviation_by_cause={"condenser": 4e-4, "unaccounted": 1e-4},
            alarms={"exhaust_moisture": AlarmView("exhaust_moisture", "active" if k else "normal",
                                                  "warning" if k else "", active=bool(k))},
            drift={"turbine_heat_rate": DriftView("turbine_heat_rate", 0.1, -1.0, 1.0, 2.0, 0.0, False, "up")},
            inputs=InputStats(messages=1000 * k, rejected={"out_of_range": k}), compute_seconds=1e7 * k,
            steady_r={"GEN-MW1": 1.1 + k, "HP-MS-F1": math.nan}, steady_frozen=("GEN-MW1",) if k == 1 else (),
            streams={"ms": StreamState(300.0, 1.6e7, 813.0 + k, 3.4e6, math.nan),
                     "lp_exhaust": StreamState(250.0, 5e3, 306.0, 2.3e6, 0.9 - 0.01 * k)},
            heat_rate_deviation_fuel_power_by_cause={"condenser": 2.5e5 * (k - 1)},
            heat_rate_deviation_cost_by_cause={"condenser": 12.5 * k}, currency="EUR" if k else "",
        ))
    # the second unit's result interleaves its own series
    results.append(replace(results[0], unit_id="demo-u2", window_end=START + 30.0))
    assert openmetrics_text(results) == openmetrics_lines(results)


def test_backfill_command_bad_input_is_one_line_and_nonzero(tmp_path, capsys):
    from twin.cli import main

    def run(*argv: str) -> tuple[int, list[str]]:
        rc = main(["backfill", str(CONFIG), *argv])
        err = [ln for ln in capsys.readouterr().err.splitlines() if ln.startswith("twin backfill:")]
        return rc, err

    rc, err = run(str(tmp_path / "missing.csv"), "--out", str(tmp_path / "o1"))
    assert rc == 2 and len(err) == 1 and "missing.csv: no such file" in err[0]
    rc, err = run(str(tmp_path / "missing.csv"), "--out", str(tmp_path / "o2"), "--format", "csv,xml")
    assert rc == 2 and len(err) == 1 and "expected some of csv,parquet,openmetrics" in err[0]
    bad = tmp_path / "bad.csv"
    bad.write_text("when,what\n1,2\n")
    rc, err = run(str(bad), "--out", str(tmp_path / "o3"))
    assert rc == 1 and len(err) == 1 and "expected timestamp,tag,value" in err[0]
    rc, err = run(str(bad), "--out", str(tmp_path / "o4"), "--from", "yesterday")
    assert rc == 2 and len(err) == 1 and "--from 'yesterday'" in err[0]


def test_simulate_command_bad_input_is_one_line(tmp_path, capsys):
    from twin.cli import main

    rc = main(["simulate", str(CONFIG), "--hours", "1", "--out", str(tmp_path / "x.txt")])
    err = capsys.readouterr().err.strip().splitlines()
    assert rc == 2 and len(err) == 1 and "expected a name ending .csv, .csv.gz or .parquet" in err[0]
    # an invalid plant file is a config error (exit 1, the file and key named), not a bad argument
    broken = tmp_path / "broken.toml"
    broken.write_text(CONFIG.read_text().replace('[unit]', '[unit]\nbogus_key = 1', 1))
    rc = main(["simulate", str(broken), "--hours", "1", "--out", str(tmp_path / "x.csv")])
    err = capsys.readouterr().err.strip().splitlines()
    assert rc == 1 and err and all(ln.startswith(str(broken)) for ln in err) and "bogus_key" in err[0]
