"""The demo's screen: panel on a terminal, plain lines otherwise, nothing claimed that a window lacks."""

from __future__ import annotations

import io
import math
from pathlib import Path

import pytest

from twin.config import load_config
from twin.demo.scenario import DemoScenario
from twin.demo.screen import LEGEND, DemoScreen, Event, make_on_result, scenario_events
from twin.result import AlarmView, CycleResult, Estimate, TagResult

CONFIG = Path(__file__).resolve().parents[1] / "configs" / "demo-u1.toml"
T0 = 1_700_000_000.0


@pytest.fixture(scope="module")
def config():
    return load_config(CONFIG)


def _result(minute: float, *, converged: bool = True, steady: bool = True, moisture: float = 0.104) -> CycleResult:
    kpis = {
        "load_fraction": Estimate(1.0, 0.006, True),
        "gross_power": Estimate(373.2e6, 0.9e6, True),
        "net_power": Estimate(350.5e6, 0.9e6, True),
        "gross_efficiency": Estimate(0.4559, 0.002, True),
        "net_efficiency": Estimate(0.4282, 0.002, True),
        "turbine_heat_rate": Estimate(2.1935, 0.01, True),
        "section_efficiency.HP": Estimate(0.851, 0.006, True),
        "section_efficiency.IP": Estimate(0.908, 0.006, True),
        "section_efficiency.LP": Estimate(0.890, 0.01, True),
        "exhaust_moisture_elep": Estimate(moisture, 0.004, True),
        "exhaust_moisture_ueep": Estimate(moisture - 0.009, 0.004, True),
    }
    if not converged:
        kpis = {k: Estimate() for k in kpis}
    return CycleResult(
        unit_id="demo-u1", window_start=T0 + minute * 60 - 30, window_end=T0 + minute * 60,
        steady=steady, steady_status="steady" if steady else "transient",
        reconcile_status="converged" if converged else "not_converged",
        reconcile_message="" if converged else "no convergence in 40 iterations",
        global_test=48.2, global_test_dof=57, global_test_p_value=0.78,
        tags={"FW-F1": TagResult("FW-F1", "mass_flow", valid=True, suspect=converged),
              "FW-F2": TagResult("FW-F2", "mass_flow", valid=True)},
        kpis=kpis,
        expected={"turbine_heat_rate": 2.1880, "section_efficiency.HP": 0.860},
        heat_rate_deviation=(2.1935 - 2.1880) if converged else math.nan,
        heat_rate_deviation_by_cause={"hp_efficiency": 0.0040, "condenser_pressure": -0.0021, "unaccounted": 0.0036,
                                      "reheat_temperature": 1e-6, "ip_efficiency": math.nan},
        alarms={"exhaust_moisture": AlarmView("exhaust_moisture", "active", "warning", math.nan, True),
                "suspect_FW-F1": AlarmView("suspect_FW-F1", "active", "suspect", math.nan, True),
                "efficiency_HP": AlarmView("efficiency_HP", "normal")},
    )


def test_scenario_events_come_from_the_default_timeline(config):
    events = scenario_events(DemoScenario.default(config))
    text = {round(e.time / 60): e.announce() for e in events}
    # the default timeline (twin/demo/scenario.py): load ramps at 10 and 25, cold spell 30-58,
    # FW-F1 drifting 60-68, HP efficiency falling from minute 0
    assert text[30].startswith("minute 30: cooling water cold spell begins: inlet 20 → 6 °C")
    assert text[10] == "minute 10: load falls from 100 % to 75 % (by minute 15)"
    assert text[25] == "minute 25: load rises from 75 % to 100 % (by minute 30)"
    assert text[55].startswith("minute 55: cold spell ends")
    assert text[60] == "minute 60: transmitter FW-F1 starts to drift: +3 % of reading by minute 68"
    assert text[0].startswith("minute 0: HP efficiency starts a slow decline: 2.0 points")
    assert [e.time for e in events] == sorted(e.time for e in events)


def test_plain_lines_announce_events_and_show_the_top_causes(config):
    out = io.StringIO()
    screen = DemoScreen(config, T0, 80 * 60, [Event(30 * 60, "cooling water cold spell begins")], out=out, tty=False)
    screen.show(_result(29.5))
    screen.show(_result(30.0))
    lines = out.getvalue().splitlines()
    assert lines[1] == "--- minute 30: cooling water cold spell begins"
    assert lines[0].startswith("t= 29.5 min steady ")
    # top causes, largest first, in kJ/kWh (x3600): HP efficiency +14, unaccounted +13, back-pressure -8
    assert "dev +20 (HP efficiency +14, unaccounted +13, back-pressure -8)" in lines[0]
    assert "suspects FW-F1" in lines[0] and "alarms exhaust_moisture warning,suspect_FW-F1" in lines[0]
    assert "\x1b[" not in out.getvalue()


def test_a_failed_window_is_not_marked_steady_and_prints_no_nan(config):
    out = io.StringIO()
    screen = DemoScreen(config, T0, 80 * 60, out=out, tty=False)
    screen.show(_result(12.0, converged=False, steady=True))
    line = out.getvalue()
    assert "not_converged" in line and " steady " not in line
    assert "nan" not in line.lower() and "n/a" not in line
    assert "dev -" in line


def test_a_window_without_kpis_says_so_and_how_many_tags_it_had(config):
    from dataclasses import replace

    r = _result(14.0)
    r = replace(r, kpis={k: Estimate() for k in r.kpis},
                tags={**r.tags, "FW-F2": TagResult("FW-F2", "mass_flow", valid=False, reason="stale")})
    out = io.StringIO()
    DemoScreen(config, T0, 80 * 60, out=out, tty=False).show(r)
    line = out.getvalue()
    assert line.startswith("t= 14.0 min unobservable 1/2 tags") and " steady " not in line


def test_nothing_is_shown_past_the_scenario_end(config):
    out = io.StringIO()
    stopped = []
    screen = DemoScreen(config, T0, 80 * 60, out=out, tty=False)
    on_result = make_on_result(screen, lambda: stopped.append(True))
    on_result(_result(80.0))
    on_result(_result(81.4))
    assert out.getvalue().count("\n") == 1 and "t= 80.0 min" in out.getvalue()
    assert stopped == [True]


def test_terminal_panel_has_every_part_a_legend_and_the_clock(config):
    out = io.StringIO()
    screen = DemoScreen(config, T0, 80 * 60, [Event(30 * 60, "cooling water cold spell begins")], out=out,
                        tty=True, color=False)
    screen.show(_result(31.25))
    text = out.getvalue()
    assert text.startswith("\x1b[H\x1b[J")  # redrawn in place
    for needed in ("simulated clock 00:31:15  (minute 31.2 of 80)", "load ", "gross 45.59 ± 0.2 %",
                   "net 42.82 ± 0.2 %", "heat rate   7897 ± 36 kJ/kWh  (exp 7877)", "dev +20 kJ/kWh",
                   "HP efficiency +14", "HP 85.1 % (exp 86.0)", "moisture ELEP 10.4 ± 0.4 %", "UEEP 9.5 %",
                   "limits 10 % warning, 12 % alarm  WARNING", "suspects    FW-F1",
                   "alarms      exhaust_moisture warning, suspect_FW-F1",
                   "events      minute 30: cooling water cold spell begins", LEGEND):
        assert needed in text, needed
    assert "nan" not in text.lower() and "n/a" not in text


def test_the_panel_fits_a_terminal(config):
    screen = DemoScreen(config, T0, 80 * 60, out=io.StringIO(), tty=True, color=False)
    lines = screen.panel(_result(40.0))
    assert len(lines) <= 20
    assert max(len(ln) for ln in lines if ln != LEGEND) <= 130


def test_every_heat_rate_cause_has_a_screen_label():
    """A cause added to the expected model shows under a readable name, not its key."""
    from twin.demo.screen import CAUSE_LABELS
    from twin.performance.expected import CAUSES

    assert set(CAUSES) | {"unaccounted"} <= set(CAUSE_LABELS)


def test_a_signalling_drift_chart_is_listed_with_the_alarms(config):
    """The drift alarm carries the name it has in the log and the MQTT events (twin.cycle.drift_alarm_name)."""
    from dataclasses import replace

    from twin.result import DriftView

    out = io.StringIO()
    screen = DemoScreen(config, T0, 80 * 60, out=out, tty=False)
    drift = {"section_efficiency.HP": DriftView("section_efficiency.HP", -0.012, -0.004, 0.004, 0.0, 0.03, True, "down"),
             "turbine_heat_rate": DriftView("turbine_heat_rate", 0.001, -0.004, 0.004, 0.0, 0.0, False, "none")}
    screen.show(replace(_result(70.0), drift=drift))
    line = out.getvalue().splitlines()[0]
    assert "alarms exhaust_moisture warning,suspect_FW-F1,drift_section_efficiency.HP down" in line
    assert "drift_turbine_heat_rate" not in line
