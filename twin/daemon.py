"""The live daemon: MQTT in, one reconciled cycle per window out (metrics, MQTT, events).

Per cycle (``run_cycle``): window statistics of every tag → validity
(stale, no data, bad quality) → steady-state gate on the key signals →
plant reconciliation (warm start) → expected performance at the present load
→ heat-rate deviation by cause (every few cycles) → alarms and drift charts
(steady windows only) → one immutable :class:`twin.result.CycleResult`,
swapped in atomically; the metrics collector and the republisher read it.

Advisory monitoring only: nothing here trips, interlocks or operates equipment.
"""

from __future__ import annotations

import json
import logging
import math
import threading
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from typing import Any

from twin.ingest.decode import PayloadFormat, TagBinding, TopicMap
from twin.ingest.pipeline import Ingestor
from twin.ingest.store import TagStore, WindowStats
from twin.metrics import MetricsServer
from twin.model.flowsheet import Flowsheet
from twin.model.solve import Operation, SolveError, solve_design
from twin.monitor import (
    DriftBank,
    DriftSettings,
    LevelAlarm,
    SteadyStateDetector,
    SuspectTracker,
    Transition,
    exhaust_moisture_alarm,
    suppression_reason,
)
from twin.mqtt import MqttClient, MqttSettings, read_secret
from twin.performance.expected import Deviation, ExpectedModel, actual_conditions
from twin.performance.plant_reconcile import PlantReconciler
from twin.result import AlarmView, CycleResult, DriftView, InputStats, TagResult

log = logging.getLogger("twin.daemon")

CAUTION = (
    "twin is advisory monitoring only: never used to trip, interlock or operate equipment. "
    "Default limits (exhaust moisture 10 % warning, 12 % alarm) are common practice, not "
    "manufacturer limits; defer to plant procedures, manufacturers' limits, local codes and "
    "licensed engineers."
)

#: KPIs whose deviation from expected feeds the drift charts.
DRIFT_KPIS = ("section_efficiency.HP", "section_efficiency.IP", "section_efficiency.LP", "turbine_heat_rate")


def log_event(severity: int, event: str, /, **fields: Any) -> None:
    """One structured log line: ``event=<name> key=value ...``."""
    parts = [f"event={event}"]
    for k, v in fields.items():
        if isinstance(v, float):
            v = repr(v) if abs(v) >= 1e6 else f"{v:.6g}"  # times keep full precision
        s = str(v)
        parts.append(f"{k}={json.dumps(s) if (' ' in s or '=' in s) else s}")
    log.log(severity, " ".join(parts))


# ----------------------------------------------------------------------------- clocks
class SystemClock:
    """Wall-clock time; ``sleep`` returns early when ``stop`` is set."""

    def now(self) -> float:
        return time.time()

    def sleep(self, seconds: float, stop: threading.Event) -> None:
        stop.wait(max(seconds, 0.0))


class ManualClock:
    """A clock moved by its owner (tests, benchmarks): ``now`` returns ``t``; ``sleep`` barely waits."""

    def __init__(self, t: float) -> None:
        self.t = float(t)

    def now(self) -> float:
        return self.t

    def sleep(self, seconds: float, stop: threading.Event) -> None:
        stop.wait(0.005)


class ScaledClock:
    """Simulated time running ``speed`` times faster than the wall clock (for the demo)."""

    def __init__(self, start: float, speed: float = 1.0, wall: Callable[[], float] = time.monotonic) -> None:
        self.start, self.speed, self.wall = float(start), float(speed), wall
        self._w0 = wall()

    def now(self) -> float:
        return self.start + (self.wall() - self._w0) * self.speed

    def sleep(self, seconds: float, stop: threading.Event) -> None:
        stop.wait(max(seconds, 0.0) / self.speed)


# ----------------------------------------------------------------------------- config mapping
def bindings_from_config(config: Any) -> list[TagBinding]:
    """One ingest binding per sensor: topic, payload layout, SI conversion, valid range."""
    out = []
    for s in config.sensors:
        pl = s.payload
        if pl.format == "number":
            fmt = PayloadFormat("number")
        else:
            fmt = PayloadFormat(pl.format, pl.value, pl.timestamp, pl.timestamp_format, pl.quality,
                                frozenset(pl.good_quality) if pl.good_quality else None)
        lo, hi = s.range_si if s.range_si is not None else (math.nan, math.nan)
        conv = s.conversion
        out.append(TagBinding(s.tag, s.topic, fmt, conv.scale, conv.offset, lo, hi))
    return out


def mqtt_settings_from_config(config: Any, environ: Mapping[str, str]) -> MqttSettings:
    """Broker settings; the password comes from the file or environment variable named in the config."""
    b = config.broker
    password = None
    if b.password_file or b.password_env:
        password = read_secret(file=str(b.password_file) if b.password_file else None, env=b.password_env,
                               environ=environ)
    tls = b.tls
    return MqttSettings(
        host=b.host, port=int(b.port), protocol=b.protocol, client_id=b.client_id, keepalive=int(b.keepalive),
        tls=tls is not None,
        tls_ca=str(tls.ca_file) if tls and tls.ca_file else None,
        tls_cert=str(tls.cert_file) if tls and tls.cert_file else None,
        tls_key=str(tls.key_file) if tls and tls.key_file else None,
        tls_insecure=bool(tls.insecure) if tls else False,
        username=b.username, password=password, qos=int(b.qos),
    )


@dataclass(frozen=True)
class DaemonOptions:
    """Policy knobs of the daemon that are not plant configuration."""

    deviation_every: int = 6  # cycles between heat-rate deviation accounting runs
    max_eliminations: int = 3
    alpha: float = 0.05
    pressure_mode: str = "sliding"
    republish: bool = True
    store_capacity: int = 2048
    metrics: bool = True
    grace_seconds: float = 1.0  # clock seconds to wait after a window ends for late messages


class Daemon:
    """One unit's live twin.

    Parameters
    ----------
    config : PlantConfig
    clock : SystemClock or ScaledClock
        Time source for windows (payload times are on the same clock).
    environ : mapping
        Where ``password_env`` is looked up (``os.environ`` in production).
    options : DaemonOptions
    mqtt_settings : MqttSettings, optional
        Override the broker settings of the config (the demo's embedded broker).
    reconciler : PlantReconciler, optional
        Reuse a built reconciler (tests).
    """

    def __init__(self, config: Any, *, clock: Any = None, environ: Mapping[str, str] | None = None,
                 options: DaemonOptions | None = None, mqtt_settings: MqttSettings | None = None,
                 reconciler: PlantReconciler | None = None) -> None:
        self.config = config
        self.clock = clock or SystemClock()
        self.options = options or DaemonOptions()
        mon = config.monitoring
        self.cycle_seconds = float(mon.cycle)
        self.window_seconds = float(mon.window or mon.cycle)
        # ingest
        self.topic_map = TopicMap(bindings_from_config(config))
        max_age = {s.tag: float(s.max_age) for s in config.sensors}
        self.store = TagStore([s.tag for s in config.sensors], capacity=self.options.store_capacity, max_age=max_age)
        self.ingestor = Ingestor(self.topic_map, self.store, on_reject=self._on_reject)
        self.mqtt_settings = mqtt_settings or mqtt_settings_from_config(config, environ or {})
        self.mqtt: MqttClient | None = None
        # model
        fs = reconciler.fs if reconciler else Flowsheet.from_config(config)
        op = Operation.from_config(config)
        design = reconciler.design if reconciler else solve_design(fs, op)
        self.reconciler = reconciler or PlantReconciler(config, flowsheet=fs, design=design, alpha=self.options.alpha,
                                                        max_eliminations=self.options.max_eliminations)
        self.expected_model = ExpectedModel(fs, op, design, self.reconciler.settings, self.options.pressure_mode)
        self.fs, self.op = fs, op
        # monitors
        self.steady = SteadyStateDetector(mon.steady_signals, mon.steady_lambdas, mon.steady_critical_r,
                                          hold_seconds=float(mon.steady_hold)) if mon.steady_signals else None
        self.moisture_alarm = exhaust_moisture_alarm(
            warning=mon.exhaust_moisture_warn, alarm=mon.exhaust_moisture_alarm, deadband=mon.alarm_deadband,
            on_delay=mon.on_delay, off_delay=mon.off_delay, unavailable_after=10 * self.cycle_seconds)
        self.efficiency_alarms = {
            s.id: LevelAlarm(f"efficiency_{s.id}", mon.efficiency_margin, deadband=mon.efficiency_margin / 4,
                             on_delay=mon.on_delay, off_delay=mon.off_delay)
            for s in self.reconciler.settings.sections
        }
        self.suspects = SuspectTracker(mon.suspect_persistence)
        self.drift = self._drift_bank()
        self.latest: CycleResult | None = None
        self._lock = threading.Lock()
        self._cycles = 0
        self._deviation: Deviation | None = None
        self.metrics: MetricsServer | None = None
        self._stop = threading.Event()

    # ------------------------------------------------------------------ set-up
    def _drift_bank(self) -> DriftBank:
        """Drift charts on actual − expected, σ from the design-point KPI uncertainty."""
        from twin.performance.redundancy import redundancy

        mon = self.config.monitoring.drift
        try:
            rr = redundancy(self.config, self.reconciler)
            sig = {name: u / 1.96 for name, ok, u, _ in rr.kpis if ok and math.isfinite(u) and u > 0}
        except (SolveError, ValueError):
            sig = {}
        settings = {}
        for k in DRIFT_KPIS:
            if k in sig:
                settings[k] = DriftSettings(0.0, sig[k], mon.ewma_lambda, mon.ewma_L, mon.cusum_k, mon.cusum_h)
        return DriftBank(settings)

    def _on_reject(self, rejection: Any, suppressed: int) -> None:
        log_event(logging.WARNING, "payload_rejected", key=rejection.key, reason=rejection.reason,
                  detail=getattr(rejection, "detail", ""), suppressed_since_last=suppressed)

    def current(self) -> CycleResult | None:
        """The latest result (read by the metrics collector at scrape time)."""
        return self.latest

    def start(self) -> None:
        """Connect to the broker and start the metrics endpoint."""
        if self.options.metrics and self.metrics is None:
            m = self.config.metrics
            self.metrics = MetricsServer(self.current, address=m.address, port=int(m.port))
            self.metrics.start()
            log_event(logging.INFO, "metrics_listening", address=m.address, port=self.metrics.port)
        self.mqtt = MqttClient(self.mqtt_settings, self.ingestor, clock=self.clock.now)
        self.mqtt.subscribe({t: int(self.mqtt_settings.qos) for t in self.topic_map.topics})
        self.mqtt.start()
        log_event(logging.INFO, "started", unit=self.config.unit.id, broker=f"{self.mqtt_settings.host}:{self.mqtt_settings.port}",
                  tags=len(self.config.sensors), cycle_s=self.cycle_seconds, window_s=self.window_seconds)
        log_event(logging.INFO, "caution", text=CAUTION)

    def stop(self) -> None:
        """Stop the loop, the MQTT client and the metrics endpoint (returns within seconds)."""
        self._stop.set()
        if self.mqtt is not None:
            self.mqtt.stop()
        if self.metrics is not None:
            self.metrics.stop()
            self.metrics = None
        log_event(logging.INFO, "stopped", unit=self.config.unit.id)

    def run(self, stop: threading.Event | None = None, duration: float | None = None,
            on_result: Callable[[CycleResult], None] | None = None) -> None:
        """Close a window every cycle until ``stop`` is set (or ``duration`` clock seconds pass)."""
        stop = stop or self._stop
        t0 = self.clock.now()
        next_t = (math.floor(t0 / self.cycle_seconds) + 1) * self.cycle_seconds
        while not stop.is_set() and not self._stop.is_set():
            now = self.clock.now()
            if duration is not None and now - t0 >= duration:
                break
            due = next_t + self.options.grace_seconds
            if now < due:
                self.clock.sleep(min(due - now, 1.0), stop)
                continue
            try:
                result = self.run_cycle(next_t)
            except Exception as exc:  # a bad cycle must never stop the daemon
                log_event(logging.ERROR, "cycle_failed", window_end=next_t, error=f"{type(exc).__name__}: {exc}")
                log.debug("cycle failed", exc_info=True)
            else:
                if on_result is not None:
                    on_result(result)
            next_t += self.cycle_seconds
            if self.clock.now() - next_t > self.cycle_seconds:  # fell behind: skip missed windows
                next_t = (math.floor(self.clock.now() / self.cycle_seconds) + 1) * self.cycle_seconds

    # ------------------------------------------------------------------ one cycle
    def _window_values(self, stats: Mapping[str, WindowStats]) -> tuple[dict[str, float], dict[str, str]]:
        values: dict[str, float] = {}
        excluded: dict[str, str] = {}
        for s in self.config.sensors:
            w = stats.get(s.tag)
            if w is None or (w.count == 0 and not math.isfinite(w.last_time)):
                excluded[s.tag] = "no_data"  # never heard from
            elif w.stale:
                excluded[s.tag] = "stale"  # heard from before, nothing recent enough
            elif w.count == 0:
                excluded[s.tag] = "no_data" if w.n_bad == 0 else "bad_quality"
            elif not math.isfinite(w.mean):
                excluded[s.tag] = "not_finite"
            else:
                values[s.tag] = float(w.mean)
        # gauge pressures were converted with the configured barometric pressure; use the live one
        baro_tag = getattr(self.config.unit, "barometric_tag", None)
        if baro_tag and baro_tag in values and self.config.unit.barometric_pressure is not None:
            delta = values[baro_tag] - float(self.config.unit.barometric_pressure)
            for s in self.config.sensors:
                if s.tag in values and s.gauge and s.quantity == "pressure":
                    values[s.tag] += delta
        return values, excluded

    def run_cycle(self, t_end: float) -> CycleResult:
        """Close the window ending at ``t_end`` and publish its result."""
        started = time.perf_counter()
        stats = self.store.window(t_end - self.window_seconds, t_end)
        values, excluded = self._window_values(stats)
        # steady state on non-overlapping cycle means of the key signals
        verdict = None
        if self.steady is not None:
            short = self.store.window(t_end - self.cycle_seconds, t_end)
            verdict = self.steady.update({t: short[t].mean if t in short and short[t].count else math.nan
                                          for t in self.steady.signals}, t_end)
        steady = bool(verdict.steady) if verdict is not None else True
        self.reconciler.max_eliminations = self.options.max_eliminations if steady else 0
        t_rec = time.perf_counter()
        rec = self.reconciler.reconcile(values, excluded=excluded)
        t_rec = time.perf_counter() - t_rec
        unit = self.config.unit.id
        kpis = dict(rec.kpis) if rec.converged else {}
        load = kpis["load_fraction"].value if "load_fraction" in kpis and kpis["load_fraction"].available else math.nan
        expected: dict[str, float] = {}
        deviation = None
        if rec.converged and math.isfinite(load):
            cw = self._cooling_water_inlet(rec)
            try:
                ref, expected = self.expected_model.expected(min(max(load, 0.2), 1.2), cw)
                if steady and (self._deviation is None or self._cycles % self.options.deviation_every == 0):
                    self._deviation = self.expected_model.deviation(
                        ref, expected, actual_conditions(rec, self.fs, self.op, self.reconciler.settings), cw)
                deviation = self._deviation
            except (SolveError, ValueError) as exc:
                log_event(logging.WARNING, "expected_model_failed", window_end=t_end, error=str(exc))
        transitions = self._update_monitors(t_end, steady, load, rec, kpis, expected)
        tags = {}
        for s in self.config.sensors:
            w = stats.get(s.tag)
            base = rec.tags.get(s.tag) or TagResult(s.tag, s.quantity, valid=s.tag in values,
                                                   reason=excluded.get(s.tag, ""),
                                                   measured=values.get(s.tag, math.nan))
            if w is not None:
                base = replace(base, spread=w.std, count=w.count, age_seconds=w.age,
                               measured=values.get(s.tag, base.measured))
            tags[s.tag] = base
        hr_dev = math.nan
        if "turbine_heat_rate" in kpis and kpis["turbine_heat_rate"].available and "turbine_heat_rate" in expected:
            hr_dev = kpis["turbine_heat_rate"].value - expected["turbine_heat_rate"]
        by_cause = dict(deviation.by_cause) if deviation is not None else {}
        mstats = self.mqtt.stats() if self.mqtt is not None else None
        result = CycleResult(
            unit_id=unit, window_start=t_end - self.window_seconds, window_end=t_end,
            steady=steady, steady_status=verdict.status if verdict is not None else "steady",
            steady_r={k: float(v) for k, v in (verdict.r if verdict is not None else {}).items()},
            reconcile_status=rec.status, reconcile_message=rec.message, iterations=rec.iterations,
            global_test=rec.global_test, global_test_dof=rec.dof, global_test_p_value=rec.p_value,
            tags=tags, streams=dict(rec.streams), kpis=kpis, expected=expected,
            heat_rate_deviation=hr_dev, heat_rate_deviation_by_cause=by_cause,
            alarms=self._alarm_views(), drift=self._drift_views(),
            inputs=InputStats(
                messages=self.ingestor.messages, rejected=self.ingestor.rejects.counts(),
                stale_tags=tuple(sorted(t for t, r in excluded.items() if r == "stale")),
                connected=bool(mstats.connected) if mstats is not None else False,
                reconnects=int(getattr(mstats, "reconnects", getattr(mstats, "disconnects", 0))) if mstats is not None else 0,
            ),
            depends_on=tuple(rec.depends_on), compute_seconds=time.perf_counter() - started,
        )
        with self._lock:
            self.latest = result
        self._cycles += 1
        if self.metrics is not None:
            self.metrics.observe_cycle(result.compute_seconds)
        self._publish(result, transitions)
        if not rec.converged:
            log_event(logging.WARNING, "reconcile_failed", window_end=t_end, status=rec.status, message=rec.message)
        log_event(logging.DEBUG, "cycle", window_end=t_end, steady=steady, status=rec.status,
                  iterations=rec.iterations, reconcile_ms=1e3 * t_rec, total_ms=1e3 * result.compute_seconds,
                  valid_tags=len(values), excluded=len(excluded))
        return result

    def _cooling_water_inlet(self, rec: Any) -> float | None:
        cols = self.reconciler.system.cooling_water_columns
        if not cols or rec.z is None:
            return None
        v = float(rec.z[next(iter(cols.values()))[0]])
        return v if math.isfinite(v) else None

    def _update_monitors(self, t: float, steady: bool, load: float, rec: Any, kpis: Mapping[str, Any],
                         expected: Mapping[str, float]) -> list[Transition]:
        mon = self.config.monitoring
        suppress = suppression_reason(steady, load if math.isfinite(load) else None, mon.min_load)
        out: list[Transition] = []

        def value(name: str) -> float:
            e = kpis.get(name)
            return e.value if e is not None and e.available else math.nan

        out += self.moisture_alarm.update(value("exhaust_moisture_elep"), t, suppress)
        for sec, alarm in self.efficiency_alarms.items():
            out += alarm.update(value(f"section_efficiency.{sec}"), expected.get(f"section_efficiency.{sec}", math.nan), t, suppress)
        if rec.converged:
            tested = [tag for tag, tr in rec.tags.items() if tr.valid]
            out += self.suspects.update(rec.suspects, t, steady=steady and suppress is None, tested=tested)
        devs = {k: value(k) - expected.get(k, math.nan) for k in DRIFT_KPIS}
        if len(self.drift):
            self.drift.update({k: v for k, v in devs.items() if k in self.drift.statuses()}, steady and suppress is None, t)
        for tr in out:
            log_event(logging.WARNING if tr.new == "active" else logging.INFO, "alarm_transition", alarm=tr.alarm,
                      level=tr.level, old=tr.old, new=tr.new, value=tr.value, reason=tr.reason, time=tr.time)
        return out

    def _alarm_views(self) -> dict[str, AlarmView]:
        views = {}
        m = self.moisture_alarm
        sev = m.severity or ""
        states = m.states
        state = states[sev] if sev else states.get("warning", "normal")
        views[m.name] = AlarmView(m.name, state, sev, math.nan, bool(sev))
        for sec, a in self.efficiency_alarms.items():
            views[f"efficiency_{sec}"] = AlarmView(f"efficiency_{sec}", a.state, "warning" if a.raised else "", math.nan, a.raised)
        raised = self.suspects.raised
        for tag in sorted(raised):
            views[f"suspect_{tag}"] = AlarmView(f"suspect_{tag}", "active", "suspect", math.nan, True)
        return views

    def _drift_views(self) -> dict[str, DriftView]:
        out = {}
        for name, st in self.drift.statuses().items():
            out[name] = DriftView(name, st.ewma, st.ewma_lower, st.ewma_upper, st.cusum_high, st.cusum_low,
                                  bool(st.alarm), st.direction)
        return out

    # ------------------------------------------------------------------ outputs
    def _publish(self, result: CycleResult, transitions: list[Transition]) -> None:
        if self.mqtt is None or not self.options.republish:
            return
        prefix = self.config.broker.republish_prefix
        ts = result.window_end
        for name, e in result.kpis.items():
            if e.available:
                self.mqtt.publish(f"{prefix}/kpi/{name}", json.dumps(
                    {"ts": ts, "value": e.value, "uncertainty": e.uncertainty, "unit": _kpi_unit(name),
                     "steady": result.steady}))
        for tag, t in result.tags.items():
            if math.isfinite(t.reconciled):
                self.mqtt.publish(f"{prefix}/tag/{tag}", json.dumps(
                    {"ts": ts, "value": t.reconciled, "uncertainty": 1.96 * t.reconciled_sigma,
                     "unit": _QUANTITY_UNITS.get(t.quantity, ""), "suspect": t.suspect}))
        if math.isfinite(result.heat_rate_deviation):
            self.mqtt.publish(f"{prefix}/heat_rate_deviation", json.dumps(
                {"ts": ts, "value": result.heat_rate_deviation, "unit": "1",
                 "kj_per_kwh": result.heat_rate_deviation * 3600.0,
                 "by_cause": {k: v for k, v in result.heat_rate_deviation_by_cause.items() if math.isfinite(v)}}))
        for tr in transitions:
            self.mqtt.publish(self.config.broker.events_topic, json.dumps(
                {"ts": tr.time, "unit_id": result.unit_id, "alarm": tr.alarm, "level": tr.level, "from": tr.old,
                 "to": tr.new, "value": tr.value if math.isfinite(tr.value) else None, "reason": tr.reason,
                 "advisory": True}))


_QUANTITY_UNITS = {"mass_flow": "kg/s", "pressure": "Pa", "temperature": "K", "power": "W",
                   "cooling_water_inlet_temperature": "K", "cooling_water_outlet_temperature": "K"}


def _kpi_unit(name: str) -> str:
    if name.startswith(("heater_", "condenser_itd", "condenser_ttd")):
        return "K"
    if name.startswith("condenser_pressure"):
        return "Pa"
    if name.startswith("extraction_flow"):
        return "kg/s"
    if name in ("gross_power", "net_power", "heat_input"):
        return "W"
    return "1"
