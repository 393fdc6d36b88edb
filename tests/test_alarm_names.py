"""One name per alarm: the result's AlarmView, the transitions (logs, MQTT events) and metrics agree."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from tests.test_cycle import CYCLE, T0, noisy
from tests.test_daemon_e2e import demo_config, plant_truth, shared_reconciler
from twin.cycle import UnitCycle, WindowInput, suspect_alarm_name
from twin.ingest.store import WindowStats
from twin.metrics import build_families


def window(config: Any, values: Mapping[str, float], t_end: float) -> WindowInput:
    """Window statistics as the tag store makes them, each signal with its instrument's noise as spread."""
    sensors = config.sensors_by_tag
    st = {tag: WindowStats(mean=float(v), std=float(sensors[tag].sigma_si(v)), count=6, n_bad=0,
                           last_time=t_end - 1.0, age=1.0, min=float(v), max=float(v), stale=False)
          for tag, v in values.items()}
    return WindowInput(t_end, 30.0, st, gate_stats=st)


def test_suspect_alarm_has_the_same_name_in_transitions_results_and_metrics() -> None:
    config = demo_config()
    config.monitoring.steady_hold = 20.0  # two cycles instead of two minutes
    rec = shared_reconciler()
    rec.reset()
    cyc = UnitCycle(config, reconciler=rec)
    # the demo's drifted transmitter: +3 % of reading on the redundant final-feedwater flow
    bias = {"FW-F1": 0.03 * plant_truth().sensors["FW-F1"]}
    raised = None
    for k in range(1, 40):  # the steady-state gate opens after its filters warm up
        out = cyc.run(window(config, noisy(100 + k, bias=bias), T0 + k * CYCLE))
        up = [tr for tr in out.transitions if tr.new == "active" and "FW-F1" in tr.alarm]
        if up:
            raised = (up[0], out.result)
            break
    assert raised is not None, "the suspect alarm was never raised"
    tr, result = raised
    name = suspect_alarm_name("FW-F1")
    assert tr.alarm == name  # what the daemon logs and publishes on the events topic
    assert name in result.alarms and result.alarms[name].name == name  # what the screen shows
    fams = {f.name: f for f in build_families(result)}
    assert {s.labels["alarm"] for s in fams["twin_alarm_active"].samples if s.value == 1.0} >= {name}
