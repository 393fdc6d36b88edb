"""`twin bench heat-balance` smoke test: one repetition, JSON figures with every key (no timing asserts)."""

from __future__ import annotations

import argparse
import json
from pathlib import Path

import pytest

from twin.bench import heat_balance as bench
from twin.cli import main

DEMO = Path(__file__).resolve().parents[1] / "configs" / "demo-u1.toml"
CASES = ("design", "part_load_sliding", "part_load_fixed")
CASE_KEYS = {
    "median_ms",
    "min_ms",
    "newton_iterations",
    "residual_evaluations",
    "property_calls",
    "coolprop_updates",
}


def _args(*argv: str) -> argparse.Namespace:
    parser = argparse.ArgumentParser()
    bench.add_arguments(parser)
    return parser.parse_args(list(argv))


@pytest.fixture(scope="module")
def figures() -> dict:
    return bench.run(_args(str(DEMO), "--repeat", "1", "--evaluations", "1"))


def test_figures_have_every_case_and_count(figures):
    json.dumps(figures, allow_nan=False)  # printable as strict JSON
    assert figures["benchmark"] == "heat-balance" and figures["unit_id"] == "demo-u1"
    assert figures["repeat"] == 1 and figures["variables"] > 0
    for case in CASES:
        assert set(figures[case]) >= CASE_KEYS, case
        c = figures[case]
        assert 0 < c["min_ms"] <= c["median_ms"]
        assert c["newton_iterations"] >= 1
        # Every Newton iteration evaluates the residuals at least once more than it factors.
        assert c["residual_evaluations"] >= c["newton_iterations"] + 1
        assert 0 < c["property_calls"] <= c["coolprop_updates"]
    for case in ("part_load_sliding", "part_load_fixed"):
        assert figures[case]["load"] == 0.75
    ev = figures["evaluation"]
    assert set(ev) == {
        "residuals_ms",
        "jacobian_assembly_ms",
        "lu_factor_solve_ms",
        "design_initial_guess_ms",
        "design_calibrate_ms",
        "property_calls",
        "coolprop_updates",
    }
    # A design solve evaluates the residuals at least residual_evaluations times.
    d = figures["design"]
    assert d["property_calls"] >= d["residual_evaluations"] * ev["property_calls"]
    assert isinstance(figures["within_goal"], bool) and figures["goal_ms"] == 50.0


def test_dispatched_by_twin_bench(capsys):
    rc = main(["bench", "heat-balance", str(DEMO), "--repeat", "1", "--evaluations", "1", "--load", "0.9"])
    assert rc == 0
    out = json.loads(capsys.readouterr().out)
    assert out["part_load_fixed"]["load"] == 0.9 and set(CASES) <= set(out)


def test_bad_repeat_is_rejected():
    with pytest.raises(ValueError, match="--repeat 0"):
        bench.run(_args(str(DEMO), "--repeat", "0"))
