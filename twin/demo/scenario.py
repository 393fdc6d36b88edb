"""The demo's operating scenario: a pure function of simulated time.

:class:`DemoScenario` maps simulated seconds since the start to a
:class:`ScenarioState`: load, HP group dry efficiency, cooling-water inlet
temperature, barometric pressure and the relative bias of drifting
instruments. Every schedule is piecewise linear between knots and holds its
last value after the final knot.

The default timeline (:meth:`DemoScenario.default`), simulated minutes:

* 0-10 full load; 10-15 ramp to 75 %; 15-25 plateau; 25-30 ramp back to 100 %.
* 30-33 the cooling water cools from 20 °C to 6 °C (cold-water episode: the
  back-pressure falls to about 2.8 kPa and the LP exhaust gets wetter, the
  expansion-line end point passing the 10 % moisture warning), held to 55,
  back to 20 °C by 58.
* 60-68 the final feedwater flow transmitter ``FW-F1`` drifts to +3 % of
  reading and stays there (a redundant measurement: FW-F2, the main-steam,
  feed-pump suction and condensate flows and the balances all cross-check it).
* 0-80 the HP group's dry efficiency falls by 2 points (0.860 → 0.840).

With the demo's steady-state gate the plateau is steady some 3-4 minutes after it is
reached and the moisture warning follows the 10 % crossing (about minute 31.5) within
about 3 minutes (README, "Steady state").

Note that a *high* back-pressure makes the exhaust drier, not wetter; the
moisture warning is reached with *cold* cooling water (low back-pressure).
"""

from __future__ import annotations

import itertools
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from twin.demo.plant import STANDARD_BAROMETRIC_PRESSURE

Knots = tuple[tuple[float, float], ...]
_C0 = 273.15


def _knots(points: Sequence[tuple[float, float]], name: str) -> Knots:
    pts = tuple((float(t), float(v)) for t, v in points)
    if not pts:
        raise ValueError(f"{name}: no knots; expected at least one (time [s], value) pair")
    times = [t for t, _ in pts]
    if any(b <= a for a, b in itertools.pairwise(times)):
        raise ValueError(f"{name}: knot times {times} must increase strictly")
    return pts


def _at(knots: Knots, t: float) -> float:
    xs, ys = zip(*knots, strict=True)
    return float(np.interp(t, xs, ys))


@dataclass(frozen=True)
class ScenarioState:
    """Boundary conditions of the simulated plant at one instant.

    Attributes
    ----------
    time : float
        Simulated seconds since the scenario start [s].
    load : float
        Main-steam flow / design flow [-].
    hp_efficiency : float
        Dry isentropic efficiency of the HP stage group [-].
    cooling_water_inlet_temperature : float
        [K]
    barometric_pressure : float
        [Pa]
    relative_bias : dict
        Tag → systematic error as a fraction of the true reading [-].
    """

    time: float
    load: float
    hp_efficiency: float
    cooling_water_inlet_temperature: float
    barometric_pressure: float
    relative_bias: Mapping[str, float] = field(default_factory=dict)

    def bias_si(self, truth: Mapping[str, float]) -> dict[str, float]:
        """Additive bias [SI] per tag at the given true values."""
        return {tag: f * truth[tag] for tag, f in self.relative_bias.items() if f != 0.0}


@dataclass(frozen=True)
class DemoScenario:
    """Piecewise-linear schedules over simulated time [s].

    Parameters
    ----------
    load, hp_efficiency, cooling_water_inlet_temperature : sequence of (t [s], value)
        Load [-], HP dry efficiency [-], cooling-water inlet temperature [K].
    bias : mapping
        Tag → knots of the relative bias [-].
    barometric_pressure : float
        [Pa], constant.
    hp_group : str
        Equipment id of the HP stage group whose efficiency drifts.
    condenser : str
        Equipment id of the condenser whose cooling water changes.
    cold_water_episode : tuple
        (start of cool-down, start of hold, end of hold, back to normal) [s],
        for reports and tests.
    """

    load: Knots
    hp_efficiency: Knots
    cooling_water_inlet_temperature: Knots
    bias: Mapping[str, Knots] = field(default_factory=dict)
    barometric_pressure: float = STANDARD_BAROMETRIC_PRESSURE
    hp_group: str = "hp"
    condenser: str = "condenser"
    cold_water_episode: tuple[float, float, float, float] | None = None

    def __post_init__(self) -> None:
        object.__setattr__(self, "load", _knots(self.load, "load"))
        object.__setattr__(self, "hp_efficiency", _knots(self.hp_efficiency, "hp_efficiency"))
        object.__setattr__(self, "cooling_water_inlet_temperature", _knots(
            self.cooling_water_inlet_temperature, "cooling_water_inlet_temperature"))
        object.__setattr__(self, "bias", {t: _knots(k, f"bias[{t}]") for t, k in self.bias.items()})
        loads = [v for _, v in self.load]
        if not all(0.2 <= v <= 1.2 for v in loads):
            raise ValueError(f"load knots {loads}; expected fractions within 0.2..1.2")
        if not all(0.0 < v < 1.0 for _, v in self.hp_efficiency):
            raise ValueError("hp_efficiency knots must lie in (0, 1)")

    def at(self, t: float) -> ScenarioState:
        """The state at simulated time ``t`` [s] (held after the last knot)."""
        return ScenarioState(
            time=float(t),
            load=_at(self.load, t),
            hp_efficiency=_at(self.hp_efficiency, t),
            cooling_water_inlet_temperature=_at(self.cooling_water_inlet_temperature, t),
            barometric_pressure=self.barometric_pressure,
            relative_bias={tag: _at(k, t) for tag, k in self.bias.items()},
        )

    @property
    def duration(self) -> float:
        """Time of the last knot of any schedule [s]; the state is constant afterwards."""
        ends = [self.load[-1][0], self.hp_efficiency[-1][0], self.cooling_water_inlet_temperature[-1][0]]
        ends += [k[-1][0] for k in self.bias.values()]
        return max(ends)

    @classmethod
    def default(
        cls,
        config: Any,
        bias_tag: str = "FW-F1",
        bias_fraction: float = 0.03,
        cold_water_temperature: float = 6.0 + _C0,
        efficiency_drop: float = 0.02,
    ) -> DemoScenario:
        """The demo timeline of the module docstring for a plant config.

        Parameters
        ----------
        config : PlantConfig
            Supplies the HP group's design efficiency and the design
            cooling-water inlet temperature (equipment ``hp`` and ``condenser``).
        bias_tag : str
            The instrument that drifts.
        bias_fraction : float
            Its final bias as a fraction of reading [-].
        cold_water_temperature : float
            Cooling-water inlet temperature during the episode [K].
        efficiency_drop : float
            Fall of the HP dry efficiency over 80 minutes [-].
        """
        eq = config.equipment_by_id
        if "hp" not in eq or "condenser" not in eq:
            raise ValueError("the default demo scenario needs equipment 'hp' and 'condenser'")
        if bias_tag not in config.sensors_by_tag:
            raise ValueError(f"bias tag {bias_tag!r} is not a configured sensor")
        eta = float(eq["hp"].params["efficiency"])
        cw = float(eq["condenser"].params["cooling_water_inlet_temperature"])
        m = 60.0
        # the cold spell is held long enough for the steady-state gate to reopen after its
        # ramp (generator output follows the back-pressure, so the ramp is a transient)
        episode = (30 * m, 33 * m, 55 * m, 58 * m)
        return cls(
            load=((0.0, 1.0), (10 * m, 1.0), (15 * m, 0.75), (25 * m, 0.75), (30 * m, 1.0)),
            hp_efficiency=((0.0, eta), (80 * m, eta - efficiency_drop)),
            cooling_water_inlet_temperature=(
                (0.0, cw), (episode[0], cw), (episode[1], cold_water_temperature),
                (episode[2], cold_water_temperature), (episode[3], cw),
            ),
            bias={bias_tag: ((0.0, 0.0), (60 * m, 0.0), (68 * m, bias_fraction), (80 * m, bias_fraction))},
            cold_water_episode=episode,
        )
