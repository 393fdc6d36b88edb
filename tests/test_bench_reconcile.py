"""Smoke test: ``twin bench reconcile --quick`` runs and reports every figure (no timing asserts)."""

from __future__ import annotations

import argparse

import pytest

from twin.bench import reconcile as bench


def test_bench_reconcile_quick_returns_all_keys():
    parser = argparse.ArgumentParser()
    bench.add_arguments(parser)
    out = bench.run(parser.parse_args(["--quick"]))
    demo = out["demo_u1"]
    for key in ("cold", "warm", "warm_no_covariance", "warm_diagonal_kpis", "slsqp"):
        assert {"median_ms", "p95_ms", "n"} <= set(demo[key])
    assert demo["warm"]["failed"] == 0 and demo["n_measured"] > 0
    assert "speedup_vs_slsqp" in demo
    win = out["demo_u1_windows"]
    assert win["n"] == 12 and win["not_converged"] == sum(n for st, n in win["by_status"].items() if st != "converged")
    for clock in ("wall", "cpu"):
        assert {"median_ms", "p99_ms", "worst_ms", "p99_over_median"} <= set(win[clock])
    assert {"p99_ms", "worst_ms"} <= set(demo["warm"])
    split = demo["profile_split"]
    assert {"total_ms", "properties_ms", "model_ms", "kkt_ms", "covariance_ms", "other_ms"} <= set(split)
    assert split["n"] > 0 and split["properties_ms"] > 0 and split["property_calls_median"] > 0
    base = demo["evaluation_baseline"]
    assert base["fast_ms"] > 0 and base["straightforward_ms"] > 0
    cycle = out["cycle"]
    assert cycle["all"]["n"] == 4 and {"median_ms", "p99_ms", "max_ms"} <= set(cycle["all"])
    assert sum(cycle["deviation_status"].values()) == 4
    for kind in ("linear", "bilinear"):
        for cov in ("covariance_full", "covariance_diagonal", "covariance_kpi", "covariance_none"):
            row = out["synthetic"][kind][cov]
            assert set(row["median_ms"]) == {"100", "200"} and "loglog_slope" in row


def test_bench_reconcile_cycle_only_over_load_steps(monkeypatch):
    # the one-off expected-model work of a window is bounded in CPU time, so how many grid
    # nodes six windows solve depends on the machine's load: unbounded here, the count is
    # what the windows ask for
    import math

    import twin.performance.expected as expected

    monkeypatch.setattr(expected, "EXTRA_SECONDS", math.inf)
    parser = argparse.ArgumentParser()
    bench.add_arguments(parser)
    out = bench.run(parser.parse_args(["--only-cycle", "--cycles", "6", "--cycle-loads", "1.0,0.9"]))
    assert set(out) == {"openblas_num_threads", "cycle"}
    cycle = out["cycle"]
    assert cycle["loads"] == [1.0, 0.9] and cycle["all"]["n"] == 6
    assert {"deviation_part", "first_split_at_new_load_ms", "exact_cause_runs", "all_cpu"} <= set(cycle)
    assert cycle["expected_node_solves"] >= 9  # at least the first grid cell
    split = cycle["cycle_split"]
    assert set(split) == {"reconcile", "kpis", "expected", "deviation_by_cause", "monitors", "other"}
    assert all({"median_ms", "p99_ms"} <= set(v) for v in split.values()) and split["kpis"]["median_ms"] > 0


def test_bench_reconcile_rejects_bad_cycle_loads(capsys):
    parser = argparse.ArgumentParser()
    bench.add_arguments(parser)
    with pytest.raises(SystemExit) as exc:
        parser.parse_args(["--cycle-loads", "1.0,1.9"])
    assert exc.value.code == 2 and "expected load fractions within 0.2-1.2" in capsys.readouterr().err


@pytest.mark.parametrize("what", ["backfill", "reconcile", "properties"])
def test_bench_with_an_unusable_plant_file_says_so_in_one_line(what, tmp_path, capsys, monkeypatch):
    # a benchmark's plant file is checked like every command's: one line naming it, exit 2
    # (missing) or 1 (broken), no traceback; the default is found from the package, so the
    # benchmarks also run from another working directory
    from twin.bench import DEFAULT_CONFIG
    from twin.cli import main

    assert DEFAULT_CONFIG.is_file()
    monkeypatch.chdir(tmp_path)
    assert main(["bench", what, "--config", str(tmp_path / "absent.toml")]) == 2
    err = capsys.readouterr().err
    assert err == f"twin bench {what}: cannot read {tmp_path / 'absent.toml'}: no such file\n"
    broken = tmp_path / "broken.toml"
    broken.write_text("[unit\n", encoding="utf-8")
    assert main(["bench", what, "--config", str(broken)]) == 1
    err = capsys.readouterr().err
    assert err.startswith(f"{broken}:1:") and "Traceback" not in err
