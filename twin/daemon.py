"""The live daemon: MQTT in, one reconciled cycle per window out (metrics, MQTT, events).

The daemon owns the outside world: the MQTT client, the tag store the
ingest fills, the clock that closes a window every cycle, the metrics
endpoint and the log. Each cycle (``run_cycle``) it hands the window's tag
statistics to the per-window pipeline :class:`twin.cycle.UnitCycle`
(validity, steady gate, reconciliation, KPIs, expected, deviation, alarms,
drift), swaps the immutable :class:`twin.result.CycleResult` in atomically
(the metrics collector reads it at scrape time), republishes it on MQTT and
logs the alarm transitions.

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

from twin.config import PlantConfig
from twin.cycle import DRIFT_KPIS, CycleOptions, UnitCycle, WindowInput
from twin.ingest.decode import PayloadFormat, TagBinding, TopicMap
from twin.ingest.pipeline import Ingestor, LogRateLimiter
from twin.ingest.rate import SampleRateMonitor
from twin.ingest.sparkplug import HistoricalFile, SparkplugOutcome, SparkplugSession
from twin.ingest.store import TagStore, WindowStats
from twin.metrics import Health, MetricsServer, MetricsTls, SparkplugHealth
from twin.monitor import Transition
from twin.mqtt import ConnectionEvent, MqttClient, MqttSettings, read_secret
from twin.performance.plant_reconcile import PlantReconciler
from twin.result import CycleResult, InputStats
from twin.state import StateError, plant_sha256, read_state, usable, write_state
from twin.units import rfc3339

log = logging.getLogger("twin.daemon")

CAUTION = (
    "twin is advisory monitoring only: never used to trip, interlock or operate equipment. "
    "Default limits (exhaust moisture 10 % warning, 12 % alarm) are common practice, not "
    "manufacturer limits; defer to plant procedures, manufacturers' limits, local codes and "
    "licensed engineers."
)

__all__ = ["CAUTION", "DRIFT_KPIS", "Daemon", "DaemonOptions", "ManualClock", "ScaledClock", "SystemClock",
           "bindings_from_config", "exposure_warnings", "log_event", "mqtt_settings_from_config"]


# Fields holding a Unix time [s]; logged as RFC 3339 UTC.
_TIME_FIELDS = frozenset({"time", "window_start", "window_end", "last_message", "since"})


def log_event(severity: int, event: str, /, **fields: Any) -> None:
    """One structured log line: ``event=<name> key=value ...``.

    Time fields (``time``, ``window_end`` ...) are written in RFC 3339 UTC;
    the fields also travel on the record (``twin_fields``) for the JSON log format.
    """
    parts = [f"event={event}"]
    doc: dict[str, Any] = {"event": event}
    for k, v in fields.items():
        if isinstance(v, float) and k in _TIME_FIELDS:
            v = rfc3339(v)
        elif isinstance(v, float):
            v = repr(v) if abs(v) >= 1e6 else f"{v:.6g}"
        doc[k] = v if isinstance(v, int | float | bool | str) or v is None else str(v)
        s = str(v)
        parts.append(f"{k}={json.dumps(s) if (' ' in s or '=' in s) else s}")
    log.log(severity, " ".join(parts), extra={"twin_fields": doc})


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
def bindings_from_config(config: PlantConfig) -> list[TagBinding]:
    """One ingest binding per sensor: topic, payload layout, SI conversion, valid range."""
    out = []
    for s in config.sensors:
        pl = s.payload
        if pl.format == "number":
            fmt = PayloadFormat("number")
        elif pl.format == "sparkplug":
            fmt = PayloadFormat("sparkplug", metric=pl.metric)
        else:
            fmt = PayloadFormat(pl.format, pl.value, pl.timestamp, pl.timestamp_format, pl.quality,
                                frozenset(pl.good_quality) if pl.good_quality else None)
        lo, hi = s.range_si if s.range_si is not None else (math.nan, math.nan)
        conv = s.conversion
        out.append(TagBinding(s.tag, s.topic, fmt, conv.scale, conv.offset, lo, hi))
    return out


def mqtt_settings_from_config(config: PlantConfig, environ: Mapping[str, str]) -> MqttSettings:
    """Broker settings; the password comes from the file or environment variable named in the config."""
    b = config.broker
    password = None
    if b.password_file or b.password_env:
        password = read_secret(file=str(b.password_file) if b.password_file else None, env=b.password_env,
                               environ=environ)
    tls = b.tls
    return MqttSettings(
        host=b.host, port=int(b.port or (8883 if b.tls else 1883)), protocol=b.protocol,
        client_id=b.client_id or f"twin-{config.unit.id}", keepalive=int(b.keepalive),
        tls=tls is not None,
        tls_ca=str(tls.ca_file) if tls and tls.ca_file else None,
        tls_cert=str(tls.cert_file) if tls and tls.cert_file else None,
        tls_key=str(tls.key_file) if tls and tls.key_file else None,
        tls_insecure=bool(tls.insecure) if tls else False,
        username=b.username, password=password, qos=int(b.qos),
        reconnect_min_delay=float(b.reconnect_min_delay), reconnect_max_delay=float(b.reconnect_max_delay),
    )


def exposure_warnings(config: PlantConfig, settings: MqttSettings) -> list[str]:
    """Plain-text warnings about how the daemon is exposed (logged at start)."""
    out = []
    m = config.metrics
    if m.tls is None and m.address not in ("127.0.0.1", "localhost", "::1"):
        out.append(f"metrics are served on {m.address}:{m.port} beyond loopback without TLS: anyone who "
                   "can reach it reads the plant's performance; set [metrics] tls = {cert_file, key_file, "
                   "client_ca_file} or bind to 127.0.0.1 behind a proxy")
    if settings.password is not None and not settings.uses_tls:
        out.append(f"the MQTT password for user {settings.username!r} travels without TLS to "
                   f"{settings.address}; set [broker] tls")
    return out


@dataclass(frozen=True)
class DaemonOptions:
    """Policy knobs of the daemon that are not plant configuration."""

    max_eliminations: int = 3
    alpha: float = 0.05
    republish: bool = True
    store_capacity: int = 2048
    metrics: bool = True
    grace_seconds: float = 1.0  # clock seconds to wait after a window ends for late messages
    diagram: bool = True  # serve /diagram.svg beside /metrics (when matplotlib is installed)
    state: bool = False  # keep the [state] file: restore at start, write every [state] every

    def cycle_options(self) -> CycleOptions:
        return CycleOptions(max_eliminations=self.max_eliminations, alpha=self.alpha)


class Daemon:
    """One unit's live twin: MQTT and the tag store around one :class:`twin.cycle.UnitCycle`.

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

    def __init__(self, config: PlantConfig, *, clock: Any = None, environ: Mapping[str, str] | None = None,
                 options: DaemonOptions | None = None, mqtt_settings: MqttSettings | None = None,
                 reconciler: PlantReconciler | None = None) -> None:
        self.config = config
        self.clock = clock or SystemClock()
        self.options = options or DaemonOptions()
        mon = config.monitoring
        self.cycle_seconds = float(mon.cycle)
        self.window_seconds = float(mon.window or mon.cycle)
        # ingest: Sparkplug B metrics through the Sparkplug session, every other payload through the topic map
        bindings = bindings_from_config(config)
        self.topic_map = TopicMap([b for b in bindings if b.fmt.kind != "sparkplug"])
        sp = [b for b in bindings if b.fmt.kind == "sparkplug"]
        spc = config.sparkplug
        self.sparkplug = SparkplugSession(sp, rebirth_interval=float(spc.rebirth_interval)) if sp else None
        self.historical_file = HistoricalFile(spc.historical_file) if sp and spc.historical_file else None
        self.historical_written = self.historical_write_failures = 0
        self._sparkplug_log = LogRateLimiter()
        max_age = {s.tag: float(s.max_age) for s in config.sensors}
        self.store = TagStore([s.tag for s in config.sensors], capacity=self.options.store_capacity, max_age=max_age)
        # a sample older than any window still to close is useless; one far ahead is a clock fault
        horizon = self.window_seconds + self.cycle_seconds + self.options.grace_seconds
        self.ingestor = Ingestor(self.topic_map, self.store, on_reject=self._on_reject, horizon=horizon,
                                 future_tolerance=float(config.broker.future_tolerance),
                                 sparkplug=self.sparkplug, on_sparkplug=self._on_sparkplug)
        self.rates = SampleRateMonitor([s.tag for s in config.sensors],
                                       {s.tag: s.sample_period for s in config.sensors})
        self.windows_skipped = 0
        self.cycles_failed = 0
        self._missing_unlogged, self._missing_logged_at = 0, -math.inf
        self.started_at = self.clock.now()
        # the state file (twin run turns it on; tests and the demo leave it off)
        st = config.state
        self.state_path = st.file if self.options.state and st.enabled and st.file is not None else None
        self._plant_hash = (plant_sha256(config.source_path)
                            if self.state_path is not None and config.source_path is not None else "")
        self.state_saved_at = math.nan
        self.state_write_failures = 0
        self.mqtt_settings = mqtt_settings or mqtt_settings_from_config(config, environ or {})
        self.mqtt: MqttClient | None = None
        # the per-window pipeline (model, reconciliation, monitors)
        self.cycle = UnitCycle(config, reconciler=reconciler, options=self.options.cycle_options())
        self.reconciler = self.cycle.reconciler
        self.latest: CycleResult | None = None
        self._lock = threading.Lock()
        self.metrics: MetricsServer | None = None
        self._stop = threading.Event()

    def _on_reject(self, rejection: Any, suppressed: int) -> None:
        log_event(logging.WARNING, "payload_rejected", key=rejection.key, reason=rejection.reason,
                  detail=getattr(rejection, "detail", ""), suppressed_since_last=suppressed)

    def _on_sparkplug(self, out: SparkplugOutcome) -> None:
        """Sparkplug session events: one log line each (gaps rate-limited), rebirth requests published."""
        now = self.clock.now()
        for event, fields in out.events:
            if event == "sparkplug_sequence_gap":
                log, n = self._sparkplug_log.should_log(str(fields["node"]), event, now)
                if not log:
                    continue
                fields = {**fields, "suppressed_since_last": n}
            quiet = event == "sparkplug_birth" and not fields.get("missing")
            log_event(logging.INFO if quiet else logging.WARNING, event, **fields)
        if out.commands and self.mqtt is not None:
            for topic, payload in out.commands:
                self.mqtt.publish(topic, payload, qos=0)
        if out.historical:
            self._route_historical(out, now)

    def _route_historical(self, out: SparkplugOutcome, now: float) -> None:
        """Store-and-forward samples: appended to ``[sparkplug] historical_file`` (if set), never live."""
        file = self.historical_file
        try:
            if file is not None:
                self.historical_written += file.append(out.historical)
        except OSError as exc:
            assert file is not None
            self.historical_write_failures += len(out.historical)
            log, n = self._sparkplug_log.should_log("historical", "write_failed", now)
            if log:
                log_event(logging.ERROR, "sparkplug_historical_write_failed", file=str(file.path), error=str(exc),
                          samples=len(out.historical), failed_total=self.historical_write_failures,
                          suppressed_since_last=n)
            return
        log, n = self._sparkplug_log.should_log("historical", "routed", now)
        if log:
            log_event(logging.INFO, "sparkplug_historical_routed", samples=len(out.historical),
                      file=str(file.path) if file is not None else "none (counted only)", suppressed_since_last=n,
                      text="store-and-forward samples go to back-fill, never into live windows")

    def current(self) -> CycleResult | None:
        """The latest result (read by the metrics collector at scrape time)."""
        return self.latest

    def _routes(self) -> dict[str, Any]:
        """Extra HTTP routes beside /metrics: the latest window's cycle diagram (twin[plot])."""
        import importlib.util

        if not self.options.diagram:
            return {}
        if importlib.util.find_spec("matplotlib") is None:
            log_event(logging.INFO, "diagram_unavailable", reason="matplotlib not installed (pip install 'twin[plot]')")
            return {}
        from twin.diagram import DiagramService

        service = DiagramService(self.config, self.current)

        def diagram_svg() -> tuple[bytes, str] | None:
            body = service.svg()
            return (body, "image/svg+xml") if body is not None else None

        return {"/diagram.svg": diagram_svg}

    def health(self) -> Health:
        """Live input and loop health (read by the metrics collector at scrape time)."""
        st = self.mqtt.stats() if self.mqtt is not None else None
        return Health(
            unit_id=self.config.unit.id, now=self.clock.now(), started=self.started_at,
            connected=bool(st and st.connected), reconnects=st.disconnects if st else 0,
            failures_by_reason=dict(st.failures_by_reason) if st else {},
            last_failure_reason=st.last_failure_reason if st else "",
            last_failure_time=st.last_failure_time if st else math.nan,
            last_message_time=self.ingestor.last_message_time, messages=self.ingestor.messages,
            rejected=self.ingestor.rejects.counts(),
            callback_errors=st.callback_errors if st else 0, publish_dropped=st.publish_dropped if st else 0,
            tag_last_time=self.store.latest_times(), overwritten=self.store.overwritten(),
            samples_missing=dict(self.rates.missing), sample_period=dict(self.rates.period),
            windows_skipped=self.windows_skipped, cycles_failed=self.cycles_failed,
            cycle_period=self.cycle_seconds, state_saved_time=self.state_saved_at,
            state_write_failures=self.state_write_failures, sparkplug=self._sparkplug_health(),
        )

    def _sparkplug_health(self) -> SparkplugHealth | None:
        sp = self.sparkplug
        if sp is None:
            return None
        offline = self.store.offline()
        return SparkplugHealth({t: t in offline for t in sp.bindings}, sp.online(), dict(sp.sequence_gaps),
                               dict(sp.rebirth_requests), dict(sp.deaths_ignored), sp.historical, sp.ignored,
                               self.historical_write_failures)

    # ------------------------------------------------------------------ state file
    def state_parts(self) -> dict[str, Any]:
        """What the state file holds: the pipeline's snapshot and the ingest's sample-rate totals."""
        return {"cycle": self.cycle.snapshot(), "ingest": {"sample_rates": self.rates.snapshot()}}

    def restore_state(self) -> bool:
        """Resume from the state file when it is usable; one log line either way. True if restored."""
        path = self.state_path
        if path is None:
            return False
        try:
            saved = read_state(path)
        except FileNotFoundError:
            log_event(logging.INFO, "state_fresh", file=str(path), reason="no state file yet")
            return False
        except StateError as exc:
            log_event(logging.WARNING, "state_not_restored", file=str(path), reason=str(exc))
            return False
        why = usable(saved, unit_id=self.config.unit.id, plant_hash=self._plant_hash, now=self.clock.now(),
                     max_age=float(self.config.state.max_age))
        if why is not None:
            log_event(logging.WARNING, "state_not_restored", file=str(path), reason=f"starting fresh: {why}")
            return False
        try:
            self.cycle.restore(saved.parts["cycle"])
            self.rates.restore(saved.parts.get("ingest", {}).get("sample_rates", {}))
        except (KeyError, TypeError, ValueError, AttributeError) as exc:
            log_event(logging.WARNING, "state_not_restored", file=str(path),
                      reason=f"starting fresh: unusable content ({type(exc).__name__}: {exc})")
            self.cycle = UnitCycle(self.config, reconciler=self.reconciler, options=self.options.cycle_options())
            return False
        log_event(logging.INFO, "state_restored", file=str(path), saved_at=saved.saved_at,
                  age_s=saved.age(self.clock.now()))
        return True

    def save_state(self, force: bool = False) -> None:
        """Write the state file if due (every ``[state] every`` clock seconds) or ``force``."""
        path = self.state_path
        if path is None or self.config.source_path is None:
            return
        now = self.clock.now()
        if not force and math.isfinite(self.state_saved_at) and now - self.state_saved_at < float(
                self.config.state.every):
            return
        try:
            write_state(path, self.state_parts(), unit_id=self.config.unit.id,
                        plant_file=str(self.config.source_path), plant_hash=self._plant_hash, now=now)
        except StateError as exc:
            self.state_write_failures += 1
            if self.state_write_failures == 1 or self.state_write_failures % 100 == 0:
                log_event(logging.ERROR, "state_write_failed", error=str(exc), failures=self.state_write_failures)
            return
        self.state_saved_at = now

    def _on_connection(self, ev: ConnectionEvent) -> None:
        """One log line per change of the broker connection's state."""
        if ev.state == "failed":
            log_event(logging.ERROR, "mqtt_connect_failed", reason=ev.reason, detail=ev.detail,
                      attempts=ev.attempts)
        elif ev.state == "lost":
            log_event(logging.WARNING, "mqtt_connection_lost", detail=ev.detail)
        else:
            log_event(logging.INFO, f"mqtt_{ev.state}", broker=self.mqtt_settings.address,
                      tls=self.mqtt_settings.uses_tls)

    def start(self) -> None:
        """Restore the state file, connect to the broker and start the metrics endpoint."""
        # built first: a bad CA or certificate file fails here, before anything listens
        self.mqtt = MqttClient(self.mqtt_settings, self.ingestor, clock=self.clock.now,
                               on_event=self._on_connection)
        self.restore_state()
        for text in exposure_warnings(self.config, self.mqtt_settings):
            log_event(logging.WARNING, "exposure", text=text)
        if self.options.metrics and self.metrics is None:
            m = self.config.metrics
            tls = (MetricsTls(str(m.tls.cert_file), str(m.tls.key_file),
                              str(m.tls.client_ca_file) if m.tls.client_ca_file else None)
                   if m.tls is not None else None)
            self.metrics = MetricsServer(self.current, address=m.address, port=int(m.port), health=self.health,
                                         tls=tls, routes=self._routes())
            self.metrics.start()
            log_event(logging.INFO, "metrics_listening", address=m.address, port=self.metrics.port,
                      scheme=self.metrics.scheme, client_certificates=bool(tls and tls.client_ca_file))
        topics = self.topic_map.topics + (self.sparkplug.subscriptions if self.sparkplug is not None else [])
        self.mqtt.subscribe({t: int(self.mqtt_settings.qos) for t in topics})
        self.mqtt.start()
        log_event(logging.INFO, "started", unit=self.config.unit.id, broker=f"{self.mqtt_settings.host}:{self.mqtt_settings.port}",
                  tags=len(self.config.sensors), cycle_s=self.cycle_seconds, window_s=self.window_seconds)
        log_event(logging.INFO, "caution", text=CAUTION)

    def stop(self) -> None:
        """Stop the loop, the MQTT client and the metrics endpoint (returns within seconds)."""
        self._stop.set()
        if self.state_path is not None and self.latest is not None:
            self.save_state(force=True)
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
                self.cycles_failed += 1
                log_event(logging.ERROR, "cycle_failed", window_end=next_t, error=f"{type(exc).__name__}: {exc}")
                log.debug("cycle failed", exc_info=True)
            else:
                self.save_state()
                if on_result is not None:
                    on_result(result)
            next_t += self.cycle_seconds
            if self.clock.now() - next_t > self.cycle_seconds:  # fell behind: skip missed windows
                resume = (math.floor(self.clock.now() / self.cycle_seconds) + 1) * self.cycle_seconds
                skipped = round((resume - next_t) / self.cycle_seconds)
                self.windows_skipped += skipped
                log_event(logging.WARNING, "windows_skipped", count=skipped, window_end=next_t,
                          since=next_t - self.cycle_seconds, total=self.windows_skipped,
                          text="the daemon fell behind; these windows are never closed")
                next_t = resume

    # ------------------------------------------------------------------ one cycle
    def window_input(self, t_end: float) -> WindowInput:
        """The window ending at ``t_end`` as the tag store holds it."""
        stats = self.store.window(t_end - self.window_seconds, t_end)
        gate: dict[str, WindowStats] = {}
        if self.cycle.steady is not None:
            short = self.store.window(t_end - self.cycle_seconds, t_end)
            gate = {t: short[t] for t in self.cycle.steady.signals if t in short}
        mstats = self.mqtt.stats() if self.mqtt is not None else None
        inputs = InputStats(
            messages=self.ingestor.messages, rejected=self.ingestor.rejects.counts(),
            connected=bool(mstats.connected) if mstats is not None else False,
            reconnects=int(getattr(mstats, "reconnects", getattr(mstats, "disconnects", 0))) if mstats is not None else 0,
        )
        return WindowInput(t_end, self.window_seconds, stats, gate, inputs)

    def run_cycle(self, t_end: float) -> CycleResult:
        """Close the window ending at ``t_end`` and publish its result."""
        started = time.perf_counter()
        self._account_samples(t_end)
        out = self.cycle.run(self.window_input(t_end))
        result = replace(out.result, compute_seconds=time.perf_counter() - started)
        with self._lock:
            self.latest = result
        if self.metrics is not None:
            self.metrics.observe_cycle(result.compute_seconds)
        for tr in out.transitions:
            log_event(logging.WARNING if tr.new == "active" else logging.INFO, "alarm_transition", alarm=tr.alarm,
                      level=tr.level, old=tr.old, new=tr.new, value=tr.value, reason=tr.reason, time=tr.time)
        self._publish(result, out.transitions)
        for event, fields in out.notes:
            log_event(logging.WARNING, event, **fields)
        log_event(logging.DEBUG, "cycle", window_end=t_end, steady=result.steady, status=result.reconcile_status,
                  iterations=result.iterations, reconcile_ms=1e3 * out.reconcile_seconds,
                  total_ms=1e3 * result.compute_seconds,
                  valid_tags=sum(1 for t in result.tags.values() if t.valid),
                  excluded=sum(1 for t in result.tags.values() if not t.valid))
        return result

    def _account_samples(self, t_end: float) -> None:
        """Samples expected vs received over the cycle ending at ``t_end`` (loss shows as missing)."""
        rates = self.rates
        for tag in rates.learned():
            new = tag not in rates.period
            t, _, _ = self.store.snapshot(tag)
            period = rates.learn(tag, t, t_end)
            if new and period is not None:
                log_event(logging.INFO, "sample_period_learned", tag=tag, period_s=period)
        if not rates.period:
            return
        short = self.store.window(t_end - self.cycle_seconds, t_end)
        before = sum(rates.missing.values())
        rates.update(self.cycle_seconds, {t: w.count + w.n_bad for t, w in short.items()})
        self._missing_unlogged += sum(rates.missing.values()) - before
        if self._missing_unlogged > 0 and t_end - self._missing_logged_at >= 60.0:  # at most once a minute
            worst = max(rates.missing, key=rates.missing.__getitem__)
            log_event(logging.WARNING, "samples_missing", window_end=t_end, count=self._missing_unlogged,
                      total=sum(rates.missing.values()), worst_tag=worst)
            self._missing_unlogged, self._missing_logged_at = 0, t_end

    # ------------------------------------------------------------------ outputs
    def _publish(self, result: CycleResult, transitions: list[Transition]) -> None:
        if self.mqtt is None or not self.options.republish:
            return
        prefix = self.config.broker.republish_prefix or f"twin/{result.unit_id}"
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
                 "by_cause": {k: v for k, v in result.heat_rate_deviation_by_cause.items() if math.isfinite(v)},
                 "status": result.heat_rate_deviation_status}))
        for tr in transitions:
            self.mqtt.publish(self.config.broker.events_topic or f"{prefix}/events", json.dumps(
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
