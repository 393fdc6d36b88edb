"""The published heat-rate split and its total come from the same window (daemon, no broker)."""

from __future__ import annotations

import math

import pytest

from tests.model_helpers import demo_config, demo_design
from twin.daemon import Daemon, DaemonOptions, ManualClock
from twin.demo.plant import sensor_truth
from twin.model.solve import solve_off_design
from twin.model.turbine import TurbineGroup

T0 = 1_800_000_000.0


def _feed(daemon: Daemon, values: dict[str, float], t_end: float) -> None:
    for k in range(5):
        t = t_end - daemon.window_seconds + (k + 0.5) * daemon.window_seconds / 5
        for tag, v in values.items():
            daemon.store.add(tag, t, v)


def test_each_window_publishes_its_own_split() -> None:
    """Two forward-model truths (LP −1 point, then hot reheat −10 K) in consecutive steady windows."""
    cfg = demo_config()
    fs, op, design = demo_design()
    daemon = Daemon(cfg, clock=ManualClock(T0), options=DaemonOptions(metrics=False, republish=False))
    daemon.cycle.steady = None  # every window steady: this test is about the split, not the gate
    lp = {g.id: {"efficiency_factor": 1.0 - 0.01 / g.params["efficiency"]}
          for g in fs.of_kind(TurbineGroup) if g.params["section"] == "LP"}
    truths = [
        ("lp_efficiency", solve_off_design(fs, op, design, 0.9, "sliding", constants=lp)),
        ("reheat_temperature", solve_off_design(fs, op, design, 0.9, "sliding",
                                                overrides={("hot_reheat", "temperature"): 803.15})),
    ]
    t = T0
    for cause, hb in truths:
        t += daemon.window_seconds
        _feed(daemon, sensor_truth(cfg, hb), t)
        r = daemon.run_cycle(t)
        assert r.reconciled, r.reconcile_message
        assert r.heat_rate_deviation_status == "complete"
        by = r.heat_rate_deviation_by_cause
        # Monte Carlo truth without noise: the window's own cause, and the parts sum to this window's total
        assert max(by, key=lambda c: abs(by[c])) == cause
        assert sum(by.values()) == pytest.approx(r.heat_rate_deviation, abs=1e-12)
        assert r.heat_rate_deviation == pytest.approx(r.kpi("turbine_heat_rate") - r.expected["turbine_heat_rate"],
                                                      abs=1e-12)
        assert set(r.heat_rate_deviation_fuel_power_by_cause) == set(by)
        assert r.currency == cfg.performance.currency
        assert all(math.isfinite(v) for v in r.heat_rate_deviation_cost_by_cause.values())
