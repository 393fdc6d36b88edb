"""What ``twin demo`` shows: a compact live panel on a terminal, plain lines otherwise.

:class:`DemoScreen` takes one :class:`twin.result.CycleResult` per cycle and writes
either a panel redrawn in place (a terminal: load, gross/net efficiency, heat rate and
its deviation with the top causes in kJ/kWh, section efficiencies against expected,
exhaust moisture at the ELEP and UEEP against the limits, suspects, alarms, the
scenario's events, a one-line legend and the simulated clock) or one summary line per
cycle (a pipe or a file). Scenario events are announced as the simulated clock reaches
them ("minute 30: cooling water cold spell begins"). Alarm names are the result's
``AlarmView.name`` — the same names as in the logs, metrics and MQTT events.

A row never claims more than the window gives: a window whose reconciliation did not
converge shows its status instead of "steady" and no numbers; undefined values print
as "-", never "nan"; results past the end of the scenario are not shown.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any, TextIO

from twin.cycle import drift_alarm_name
from twin.result import CycleResult

CAUSE_LABELS = {
    "main_steam_temperature": "main-steam temp.",
    "main_steam_pressure": "main-steam press.",
    "throttling": "valve throttling",
    "reheat_temperature": "reheat temp.",
    "condenser_pressure": "back-pressure",
    "hp_efficiency": "HP efficiency",
    "ip_efficiency": "IP efficiency",
    "lp_efficiency": "LP efficiency",
    "feedwater_heaters": "FW heaters",
    "cycle_isolation": "make-up / leaks",
    "unaccounted": "unaccounted",
}

LEGEND = ("legend: dev = actual − expected heat rate at this load and cooling water, kJ/kWh (+ is worse); "
          "± = 95 % uncertainty; (exp) = expected; alarms are evaluated only in steady windows")

_C0 = 273.15
_RESET = "\x1b[0m"
_BOLD = "\x1b[1m"
_YELLOW = "\x1b[33m"
_RED = "\x1b[31m"
_HOME_CLEAR = "\x1b[H\x1b[J"


@dataclass(frozen=True)
class Event:
    """A scenario event: simulated seconds since the start and what happens."""

    time: float
    text: str

    def announce(self) -> str:
        return f"minute {self.time / 60:.0f}: {self.text}"


def _ramps(knots: Sequence[tuple[float, float]]) -> list[tuple[float, float, float, float]]:
    """Segments (t0, t1, v0, v1) along which a piecewise-linear schedule changes."""
    return [(t0, t1, v0, v1) for (t0, v0), (t1, v1) in itertools.pairwise(knots) if v1 != v0]


def scenario_events(scenario: Any) -> list[Event]:
    """The events of a :class:`twin.demo.scenario.DemoScenario`, in time order, from its schedules."""
    out: list[Event] = []
    for t0, t1, v0, v1 in _ramps(scenario.load):
        out.append(Event(t0, f"load {'falls' if v1 < v0 else 'rises'} from {100 * v0:.0f} % to "
                             f"{100 * v1:.0f} % (by minute {t1 / 60:.0f})"))
    ep = scenario.cold_water_episode
    cw = scenario.cooling_water_inlet_temperature
    if ep is not None:
        warm, cold = cw[0][1] - _C0, min(v for _, v in cw) - _C0
        out.append(Event(ep[0], f"cooling water cold spell begins: inlet {warm:.0f} → {cold:.0f} °C by minute "
                                f"{ep[1] / 60:.0f}, held to minute {ep[2] / 60:.0f} (lower back-pressure, wetter LP exhaust)"))
        out.append(Event(ep[2], f"cold spell ends: cooling water back to {warm:.0f} °C by minute {ep[3] / 60:.0f}"))
    else:
        for t0, t1, v0, v1 in _ramps(cw):
            out.append(Event(t0, f"cooling water inlet {v0 - _C0:.0f} → {v1 - _C0:.0f} °C (by minute {t1 / 60:.0f})"))
    for tag, knots in scenario.bias.items():
        for t0, t1, v0, v1 in _ramps(knots):
            if v0 == 0.0:
                out.append(Event(t0, f"transmitter {tag} starts to drift: {100 * v1:+.0f} % of reading "
                                     f"by minute {t1 / 60:.0f}"))
    hp = _ramps(scenario.hp_efficiency)
    if hp:
        t0, t1, v0, _ = hp[0]
        drop = 100 * (v0 - scenario.hp_efficiency[-1][1])
        out.append(Event(t0, f"HP efficiency starts a slow decline: {drop:.1f} points by minute {t1 / 60:.0f}"))
    return sorted(out, key=lambda e: e.time)


def _num(v: float, fmt: str, scale: float = 1.0) -> str:
    """``v * scale`` formatted, '-' when undefined, never a negative zero."""
    if v is None or not math.isfinite(v):
        return "-"
    s = format(v * scale, fmt)
    try:
        if float(s) == 0.0:
            s = format(0.0, fmt)  # rounds to zero: drop the sign of -0
    except ValueError:
        pass
    return s


class DemoScreen:
    """Renders each cycle's result for the demo (see the module docstring).

    Parameters
    ----------
    config : PlantConfig
        For the unit id and the exhaust-moisture limits.
    sim_start : float
        Simulated Unix time of the scenario start [s].
    duration : float
        Scenario length [s]; results after it are not shown.
    events : sequence of Event
        Scenario events to announce.
    out : text stream
        Where to write.
    tty : bool
        Redraw a panel in place (True) or print one line per cycle (False).
    """

    def __init__(self, config: Any, sim_start: float, duration: float, events: Sequence[Event] = (),
                 out: TextIO | None = None, tty: bool | None = None, color: bool | None = None) -> None:
        import sys

        self.config = config
        self.sim_start = float(sim_start)
        self.duration = float(duration)
        self.events = sorted(events, key=lambda e: e.time)
        self.out: TextIO = out if out is not None else sys.stdout
        self.tty = bool(tty) if tty is not None else bool(getattr(self.out, "isatty", lambda: False)())
        self.color = self.tty if color is None else color
        self._announced = 0
        self.recent: list[Event] = []
        self.shown = 0

    # ------------------------------------------------------------ the clock
    def minute(self, result: CycleResult) -> float:
        return (result.window_end - self.sim_start) / 60.0

    def past_end(self, result: CycleResult) -> bool:
        return result.window_end - self.sim_start > self.duration + 1e-6

    # --------------------------------------------------------------- output
    def show(self, result: CycleResult) -> bool:
        """Write the result; False (and nothing written) once it is past the scenario end."""
        if self.past_end(result):
            return False
        due = self._due(result.window_end - self.sim_start)
        if self.tty:
            self.out.write(_HOME_CLEAR + "\n".join(self.panel(result)) + "\n")
        else:
            for e in due:
                self.out.write(f"--- {e.announce()}\n")
            self.out.write(self.line(result) + "\n")
        self.out.flush()
        self.shown += 1
        return True

    def _due(self, t: float) -> list[Event]:
        due = []
        while self._announced < len(self.events) and self.events[self._announced].time <= t:
            due.append(self.events[self._announced])
            self._announced += 1
        self.recent = (self.recent + due)[-3:]
        return due

    # ----------------------------------------------------------- the pieces
    def _state(self, r: CycleResult) -> str:
        if not r.reconciled:
            return r.reconcile_status  # no numbers this window: never marked steady
        if not any(e.available for e in r.kpis.values()):
            return "unobservable"  # converged on too few instruments to give any KPI
        return "steady" if r.steady else "transient"

    def _tags_used(self, r: CycleResult) -> str:
        """'' when every instrument entered the window, else 'k/n tags' (stale or rejected ones left out)."""
        valid = sum(1 for t in r.tags.values() if t.valid)
        return "" if valid == len(r.tags) else f" {valid}/{len(r.tags)} tags"

    def _k(self, r: CycleResult, name: str, scale: float, fmt: str, unc: bool = False) -> str:
        e = r.kpis.get(name)
        if e is None or not e.available or not r.reconciled:
            return "-"
        s = _num(e.value, fmt, scale)
        if unc and math.isfinite(e.uncertainty):
            s += f" ± {_num(e.uncertainty, '.2g' if e.uncertainty * scale < 1 else '.0f', scale)}"
        return s

    def _dev(self, r: CycleResult) -> tuple[str, list[tuple[str, float]]]:
        dev = r.heat_rate_deviation
        if not r.reconciled or not math.isfinite(dev):
            return "-", []
        causes = [(k, v * 3600.0) for k, v in r.heat_rate_deviation_by_cause.items() if math.isfinite(v)]
        causes.sort(key=lambda kv: -abs(kv[1]))
        return _num(dev, "+.0f", 3600.0), causes[:3]

    def _alarms(self, r: CycleResult) -> list[str]:
        out = []
        for a in r.alarms.values():
            if a.active:
                out.append(f"{a.name} {a.severity}" if a.severity and a.severity != "suspect" else a.name)
            elif a.state == "pending":
                out.append(f"{a.name} pending")
        # drift charts signalling (their alarm name as in the log and the MQTT events)
        out += [f"{drift_alarm_name(k)} {d.direction}" for k, d in r.drift.items() if d.alarm]
        return out

    def _suspects(self, r: CycleResult) -> list[str]:
        return [t for t, x in r.tags.items() if x.suspect]

    def _paint(self, text: str, color: str) -> str:
        return f"{color}{text}{_RESET}" if self.color else text

    def line(self, r: CycleResult) -> str:
        """One plain summary line (not a terminal)."""
        dev, causes = self._dev(r)
        top = ", ".join(f"{CAUSE_LABELS.get(k, k)} {_num(v, '+.0f')}" for k, v in causes) or "-"
        hr = self._k(r, "turbine_heat_rate", 3600.0, ".0f")
        return (f"t={self.minute(r):5.1f} min {self._state(r) + self._tags_used(r):<13} load {self._k(r, 'load_fraction', 100, '.1f')} % "
                f"| gross {self._k(r, 'gross_power', 1e-6, '.1f')} MW eff {self._k(r, 'gross_efficiency', 100, '.2f')} % "
                f"net {self._k(r, 'net_efficiency', 100, '.2f')} % "
                f"| HR {hr} kJ/kWh dev {dev} ({top}) "
                f"| HP {self._k(r, 'section_efficiency.HP', 100, '.1f')} IP {self._k(r, 'section_efficiency.IP', 100, '.1f')} "
                f"LP {self._k(r, 'section_efficiency.LP', 100, '.1f')} % "
                f"| moisture ELEP {self._k(r, 'exhaust_moisture_elep', 100, '.1f')} UEEP "
                f"{self._k(r, 'exhaust_moisture_ueep', 100, '.1f')} % "
                f"| suspects {','.join(self._suspects(r)) or '-'} | alarms {','.join(self._alarms(r)) or '-'}")

    def panel(self, r: CycleResult) -> list[str]:
        """The terminal panel, one string per line."""
        mon = self.config.monitoring
        minute = self.minute(r)
        hh, rest = divmod(round(minute * 60), 3600)
        mm, ss = divmod(rest, 60)
        state = self._state(r)
        state_s = self._paint(state, _YELLOW) if state != "steady" else state
        fit = (f"χ² {_num(r.global_test, '.1f')} / {r.global_test_dof} dof, p {_num(r.global_test_p_value, '.2f')}"
               if r.reconciled else r.reconcile_message[:60])
        dev, causes = self._dev(r)
        exp_hr = r.expected.get("turbine_heat_rate", math.nan) if r.reconciled else math.nan
        lines = [
            self._paint(f"twin demo · {r.unit_id} (invented unit, simulated data) · advisory only", _BOLD),
            f"simulated clock {hh:02d}:{mm:02d}:{ss:02d}  (minute {minute:.1f} of {self.duration / 60:.0f})   "
            f"window {state_s}{self._tags_used(r)}   reconciliation {fit}",
            "",
            f"  load        {self._k(r, 'load_fraction', 100, '.1f', True)} %     gross {self._k(r, 'gross_power', 1e-6, '.1f', True)} MW"
            f"     net {self._k(r, 'net_power', 1e-6, '.1f')} MW",
            f"  efficiency  gross {self._k(r, 'gross_efficiency', 100, '.2f', True)} %     net {self._k(r, 'net_efficiency', 100, '.2f', True)} %",
            f"  heat rate   {self._k(r, 'turbine_heat_rate', 3600.0, '.0f', True)} kJ/kWh  (exp {_num(exp_hr, '.0f', 3600.0)})"
            f"     dev {dev} kJ/kWh",
            "  dev causes  " + ("   ".join(f"{CAUSE_LABELS.get(k, k)} {_num(v, '+.0f')}" for k, v in causes) or "-"),
        ]
        secs = []
        for s in ("HP", "IP", "LP"):
            name = f"section_efficiency.{s}"
            if name in r.kpis:
                exp = r.expected.get(name, math.nan) if r.reconciled else math.nan
                secs.append(f"{s} {self._k(r, name, 100, '.1f')} % (exp {_num(exp, '.1f', 100)})")
        lines.append("  sections    " + ("   ".join(secs) or "-"))
        warn, alarm = mon.exhaust_moisture_warn, mon.exhaust_moisture_alarm
        elep = r.kpis.get("exhaust_moisture_elep")
        y = elep.value if elep is not None and elep.available and r.reconciled else math.nan
        level = "" if not math.isfinite(y) else ("ALARM" if y >= alarm else ("WARNING" if y >= warn else "ok"))
        level_s = self._paint(level, _RED if level == "ALARM" else _YELLOW) if level in ("ALARM", "WARNING") else level
        lines.append(f"  LP exhaust  moisture ELEP {self._k(r, 'exhaust_moisture_elep', 100, '.1f', True)} %   "
                     f"UEEP {self._k(r, 'exhaust_moisture_ueep', 100, '.1f')} %   limits {100 * warn:.0f} % warning, "
                     f"{100 * alarm:.0f} % alarm  {level_s}")
        sus = self._suspects(r)
        lines.append("  suspects    " + (self._paint(", ".join(sus), _YELLOW) if sus else "none"))
        al = self._alarms(r)
        lines.append("  alarms      " + (self._paint(", ".join(al), _RED) if al else "none"))
        recent = [e.announce() for e in self.recent] or ["-"]
        lines += [("  events      " if i == 0 else " " * 14) + text for i, text in enumerate(recent)]
        lines += ["", LEGEND]
        return lines


def make_on_result(screen: DemoScreen, on_end: Callable[[], None]) -> Callable[[CycleResult], None]:
    """The daemon's per-result callback: show, and call ``on_end`` once past the scenario end."""
    def on_result(result: CycleResult) -> None:
        if not screen.show(result):
            on_end()

    return on_result
