"""Simulated demo plant: forward model truth, noisy readings, MQTT publishing.

:class:`Simulator` walks simulated time in steps of ``sample_interval``
(1 s by default), paced against the wall clock by ``speed`` (×N). The
forward heat balance is solved every ``model_interval`` simulated seconds
(warm-started from the previous solution) on a private flowsheet whose HP
efficiency and cooling-water temperature follow the scenario; sensor truths
and KPIs are interpolated linearly in between. Each step draws one noisy
reading per sensor (VDI 2048 σ, plus the scenario's instrument biases),
converts it to the sensor's engineering unit and publishes it as the
sensor's payload format with the *simulated* epoch time as timestamp, so a
daemon windows on payload time.
"""

from __future__ import annotations

import json
import math
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

import numpy as np

from twin.config import pointer_keys
from twin.demo.plant import noisy_readings as _noisy
from twin.demo.plant import sensor_truth, to_engineering
from twin.demo.scenario import DemoScenario, ScenarioState
from twin.model.flowsheet import Flowsheet
from twin.model.solve import HeatBalance, Operation, SolveError, solve_design, solve_off_design
from twin.mqtt import MqttClient, MqttError, MqttSettings
from twin.performance.kpi import CyclePerformanceSettings, cycle_kpis


@dataclass(frozen=True)
class Truth:
    """The simulated plant's true state at one simulated time.

    Attributes
    ----------
    time : float
        Simulated seconds since the scenario start [s].
    state : ScenarioState
        Boundary conditions at that time.
    sensors : dict
        Tag → true value [SI].
    kpis : dict
        Flat KPI name → value [SI or -] from :func:`twin.performance.kpi.cycle_kpis`;
        nested entries are joined with dots (``"section_efficiency.HP"``,
        ``"condensers.condenser.pressure"``).
    """

    time: float
    state: ScenarioState
    sensors: dict[str, float]
    kpis: dict[str, float]


def flatten_kpis(k: dict[str, Any], prefix: str = "") -> dict[str, float]:
    """Nested KPI dict → flat ``{"a.b": float}`` (non-numbers dropped)."""
    out: dict[str, float] = {}
    for key, v in k.items():
        name = f"{prefix}{key}"
        if isinstance(v, dict):
            out.update(flatten_kpis(v, name + "."))
        elif isinstance(v, int | float) and not isinstance(v, bool):
            out[name] = float(v)
    return out


class TruthModel:
    """The forward model of the simulated plant, solved on a time grid.

    Parameters
    ----------
    config : PlantConfig
        Not modified: the model runs on its own flowsheet built from it.
    scenario : DemoScenario
    model_interval : float
        Simulated seconds between forward solves [s].
    pressure_mode : str
        ``"sliding"`` or ``"fixed"`` throttle pressure.
    """

    def __init__(
        self, config: Any, scenario: DemoScenario, model_interval: float = 15.0,
        pressure_mode: str = "sliding", cache_size: int = 16,
    ) -> None:
        if not model_interval > 0:
            raise ValueError(f"model_interval {model_interval!r}; expected a positive number of seconds")
        self.config = config
        self.scenario = scenario
        self.model_interval = float(model_interval)
        self.pressure_mode = pressure_mode
        self._fs = Flowsheet.from_config(config)  # private: its parameters follow the scenario
        for eid in (scenario.hp_group, scenario.condenser):
            if eid not in self._fs.by_id:
                raise ValueError(f"scenario equipment {eid!r} is not in the flowsheet")
        self._op = Operation.from_config(config)
        self._settings = CyclePerformanceSettings.from_config(config)
        self.design = solve_design(self._fs, self._op)
        self._cache: dict[int, Truth] = {}
        self._z: dict[int, np.ndarray] = {}
        self._cache_size = cache_size
        self.solves = 0

    def solve(self, state: ScenarioState, z0: np.ndarray | None = None) -> HeatBalance:
        """Solve the plant at a scenario state (warm start ``z0``)."""
        self._fs.by_id[self.scenario.hp_group].params["efficiency"] = state.hp_efficiency
        self._fs.by_id[self.scenario.condenser].params["cooling_water_inlet_temperature"] = (
            state.cooling_water_inlet_temperature)
        self.solves += 1
        try:
            return solve_off_design(self._fs, self._op, self.design, state.load, self.pressure_mode, z0=z0)
        except (SolveError, IndexError, ValueError):
            if z0 is None:
                raise
        # a warm start can stop on a saturation-line rounding case: start from the design point
        return solve_off_design(self._fs, self._op, self.design, state.load, self.pressure_mode)

    def exact(self, t: float, z0: np.ndarray | None = None) -> tuple[Truth, np.ndarray]:
        """Truth from a solve at exactly ``t`` [s] (no interpolation)."""
        state = self.scenario.at(t)
        hb = self.solve(state, z0)
        sensors = sensor_truth(self.config, hb, barometric_pressure=state.barometric_pressure)
        kpis = flatten_kpis(cycle_kpis(self._fs, hb.context(), self._settings))
        return Truth(float(t), state, sensors, kpis), hb.z

    def _grid(self, k: int) -> Truth:
        if k not in self._cache:
            near = min(self._z, key=lambda j: abs(j - k), default=None)
            truth, z = self.exact(k * self.model_interval, None if near is None else self._z[near])
            self._cache[k], self._z[k] = truth, z
            while len(self._cache) > self._cache_size:
                oldest = next(iter(self._cache))
                del self._cache[oldest], self._z[oldest]
        return self._cache[k]

    def at(self, t: float) -> Truth:
        """Truth at ``t`` [s]: linear between the two neighbouring grid solves."""
        x = t / self.model_interval
        k = math.floor(x)
        w = x - k
        a = self._grid(k)
        if w < 1e-12:
            return Truth(float(t), self.scenario.at(t), dict(a.sensors), dict(a.kpis))
        b = self._grid(k + 1)
        mix = lambda p, q: {n: (1.0 - w) * p[n] + w * q[n] for n in p if n in q}  # noqa: E731
        return Truth(float(t), self.scenario.at(t), mix(a.sensors, b.sensors), mix(a.kpis, b.kpis))


def _put(doc: dict[str, Any], pointer: str, value: Any) -> None:
    keys = pointer_keys(pointer)
    if not keys:
        raise ValueError("a payload pointer must name a field, not the whole document")
    for key in keys[:-1]:
        doc = doc.setdefault(key, {})
    doc[keys[-1]] = value


def format_timestamp(epoch_s: float, fmt: str) -> Any:
    """A timestamp [s since the epoch] as a payload field in ``fmt``."""
    if fmt == "epoch_ms":
        return round(epoch_s * 1000.0)
    if fmt == "rfc3339":
        return datetime.fromtimestamp(epoch_s, UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")
    return round(epoch_s, 3)  # epoch_s, auto


def encode_messages(
    config: Any, values: dict[str, float], epoch_s: float
) -> list[tuple[str, bytes]]:
    """Payloads for engineering-unit ``values`` at simulated time ``epoch_s`` [s].

    One message per topic: bare numbers for ``format = "number"``; a JSON
    document with each tag's value, timestamp and quality at its pointers for
    ``"json"`` (tags sharing a topic share the document); for ``"batch"`` a
    document with the tag values by name under the value pointer.
    """
    docs: dict[str, dict[str, Any]] = {}
    out: list[tuple[str, bytes]] = []
    for s in config.sensors:
        if s.tag not in values:
            continue
        v = float(f"{values[s.tag]:.8g}")
        p = s.payload
        if p.format == "number":
            out.append((s.topic, repr(v).encode()))
            continue
        doc = docs.setdefault(s.topic, {})
        if p.format == "batch":
            _put(doc, p.value, {**_get(doc, p.value), s.tag: v})
        else:
            _put(doc, p.value, v)
            if p.quality is not None and p.good_quality:
                _put(doc, p.quality, p.good_quality[0])
        if p.timestamp is not None:
            _put(doc, p.timestamp, format_timestamp(epoch_s, p.timestamp_format))
    out.extend((topic, json.dumps(doc, separators=(",", ":")).encode()) for topic, doc in docs.items())
    return out


def _get(doc: dict[str, Any], pointer: str) -> dict[str, Any]:
    for key in pointer_keys(pointer):
        doc = doc.get(key, {})
    return doc


@dataclass
class SimulatorStats:
    steps: int = 0
    published: int = 0
    dropped: int = 0
    last_error: str | None = None
    sim_time: float = field(default=math.nan)


class Simulator:
    """The simulated demo plant publishing its instruments on MQTT.

    Parameters
    ----------
    config : PlantConfig
    scenario : DemoScenario, optional
        Default :meth:`DemoScenario.default`.
    client : MqttClient, MqttSettings or None
        A started client (the caller owns it), settings for a client the
        simulator starts and stops in :meth:`run`, or None (no publishing;
        :meth:`step` still returns the messages).
    speed : float
        Simulated seconds per wall second (×N).
    start_time : float, optional
        Simulated epoch time [s] of scenario time 0; default the wall clock now.
    rng_seed : int, optional
        Seed of the measurement noise.
    sample_interval : float
        Simulated seconds between readings of every sensor [s].
    model_interval : float
        Simulated seconds between forward solves [s].
    max_pending : int
        Outgoing QoS 1/2 messages awaiting acknowledgement before publishing pauses.
    clock, wall_clock : callable
        Monotonic pacing clock [s] and epoch clock [s] (injectable for tests).
    """

    def __init__(
        self,
        config: Any,
        scenario: DemoScenario | None = None,
        client: MqttClient | MqttSettings | None = None,
        speed: float = 1.0,
        start_time: float | None = None,
        rng_seed: int | None = None,
        sample_interval: float = 1.0,
        model_interval: float = 15.0,
        pressure_mode: str = "sliding",
        max_pending: int = 2000,
        clock: Callable[[], float] = time.monotonic,
        wall_clock: Callable[[], float] = time.time,
    ) -> None:
        if not speed > 0:
            raise ValueError(f"speed {speed!r}; expected a positive factor")
        if not sample_interval > 0:
            raise ValueError(f"sample_interval {sample_interval!r}; expected a positive number of seconds")
        self.config = config
        self.scenario = scenario or DemoScenario.default(config)
        self.model = TruthModel(config, self.scenario, model_interval, pressure_mode)
        self._client_arg = client
        self.speed = float(speed)
        self.start_time = wall_clock() if start_time is None else float(start_time)
        self.rng = np.random.default_rng(rng_seed)
        self.sample_interval = float(sample_interval)
        self.max_pending = int(max_pending)
        self.qos = int(config.broker.qos)
        self._clock = clock
        self._client: MqttClient | None = client if isinstance(client, MqttClient) else None
        self.stats = SimulatorStats()
        self.next_time = 0.0

    def truth_at(self, t: float) -> Truth:
        """True sensor values and KPIs at simulated time ``t`` [s] (as published)."""
        return self.model.at(t)

    def readings_at(self, t: float) -> tuple[Truth, dict[str, float]]:
        """Truth and one noisy SI reading per sensor (with biases) at ``t`` [s]."""
        truth = self.truth_at(t)
        bias = truth.state.bias_si(truth.sensors)
        return truth, _noisy(truth.sensors, self.config, self.rng, bias=bias)

    def step(self, t: float) -> list[tuple[str, bytes]]:
        """Draw, encode and (with a client) publish every sensor at ``t`` [s].

        Returns the ``(topic, payload)`` messages of this step.
        """
        truth, readings = self.readings_at(t)
        baro = truth.state.barometric_pressure
        eng = {tag: float(to_engineering(self.config, tag, v, baro)) for tag, v in readings.items()}
        messages = encode_messages(self.config, eng, self.start_time + t)
        if self._client is not None:
            for topic, payload in messages:
                self._publish(topic, payload)
        self.stats.steps += 1
        self.stats.sim_time = t
        self.next_time = t + self.sample_interval
        return messages

    def _publish(self, topic: str, payload: bytes, stop: threading.Event | None = None) -> None:
        client = self._client
        assert client is not None
        if self.qos > 0:
            while client.stats().pending >= self.max_pending:
                if stop is not None and stop.is_set():
                    break
                time.sleep(0.002)
        if client.publish(topic, payload, qos=self.qos):
            self.stats.published += 1
        else:
            self.stats.dropped += 1
            self.stats.last_error = client.last_error

    def run(self, duration: float | None, stop_event: threading.Event | None = None,
            connect_timeout: float = 10.0) -> SimulatorStats:
        """Publish from :attr:`next_time` for ``duration`` simulated seconds (None = until stopped).

        Paced so that simulated time advances ``speed`` times faster than the
        wall clock; when behind, steps run back to back until caught up.
        """
        stop = stop_event or threading.Event()
        own = isinstance(self._client_arg, MqttSettings)
        if own:
            assert isinstance(self._client_arg, MqttSettings)
            self._client = MqttClient(self._client_arg, lambda topic, payload, now: None)
            self._client.start()
            if not self._client.wait_connected(connect_timeout):
                err = self._client.last_error
                self._client.stop()
                self._client = None
                raise MqttError(f"simulator: cannot connect to the MQTT broker: {err or 'timed out'}")
        try:
            t0 = t = self.next_time
            wall0 = self._clock()
            while (duration is None or t - t0 < duration - 1e-9) and not stop.is_set():
                delay = wall0 + (t - t0) / self.speed - self._clock()
                if delay > 0 and stop.wait(delay):
                    break
                self.step(t)
                t = self.next_time
        finally:
            if own and self._client is not None:
                deadline = self._clock() + 5.0
                while self._client.stats().pending > 0 and self._clock() < deadline:
                    time.sleep(0.01)
                self._client.stop()
                self._client = None
        return self.stats
