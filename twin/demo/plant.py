"""Sensor truth from a forward heat balance, and noisy instrument readings.

Pure functions, no I/O: the demo simulator uses them to publish readings,
and reconciliation tests use them to draw Monte Carlo measurement sets.

References
----------
VDI 2048 Part 1 (2017), *Control and quality improvement of process data and
their uncertainties by means of correction calculation* (σ = U95 / 1.96).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from twin.model.heat_exchange import Condenser
from twin.model.solve import HeatBalance

STANDARD_BAROMETRIC_PRESSURE = 101_325.0  # [Pa], standard atmosphere


def condenser_cooling_water(
    hb: HeatBalance, condenser_id: str, inlet_temperature: float | None = None
) -> tuple[float, float]:
    """Cooling-water inlet and outlet temperatures [K] of a condenser in a solved state.

    The outlet is ``T_in + Q / (m_cw c_p)`` with the condenser duty Q [W], the
    design cooling-water flow m_cw [kg/s] (held off design) and c_p [J/(kg K)].

    Parameters
    ----------
    hb : HeatBalance
        A solved off-design (or design) state; its constants hold ``cw_flow``.
    condenser_id : str
        Equipment id of the condenser.
    inlet_temperature : float, optional
        Inlet temperature [K]; default the condenser's present
        ``cooling_water_inlet_temperature`` parameter.
    """
    e = hb.flowsheet.by_id.get(condenser_id)
    if not isinstance(e, Condenser):
        raise ValueError(f"equipment {condenser_id!r} is not a condenser of this flowsheet")
    t_in = e.params["cooling_water_inlet_temperature"] if inlet_temperature is None else inlet_temperature
    k = hb.constants.get(condenser_id, {})
    cp = e.params["cooling_water_cp"]
    if "cw_flow" in k:
        rise = e.duty(hb.context()) / (k["cw_flow"] * cp)
    else:
        rise = e.params["cooling_water_rise"]
    return float(t_in), float(t_in + rise)


def stream_temperature(ctx: Any, stream: str) -> float:
    """Temperature [K] of a stream in a model context.

    A saturated liquid or vapour whose enthalpy lies a rounding error outside
    the two-phase dome (e.g. the deaerator outlet) can make the single-phase
    (p, T) property path fail on the saturation line; that state is then
    returned as T_sat(p).
    """
    try:
        return float(ctx.ph(stream).T)
    except (IndexError, ValueError):
        p, h = ctx.p(stream), ctx.h(stream)
        w = ctx.water
        for h_sat in (w.h_f(p), w.h_g(p)):
            if abs(h - h_sat) <= 1e-6 * abs(h_sat) + 1e-3:
                return float(w.T_sat(p))
        raise


def sensor_truth(
    config: Any,
    hb: HeatBalance,
    cooling_water_inlet: float | None = None,
    barometric_pressure: float = STANDARD_BAROMETRIC_PRESSURE,
) -> dict[str, float]:
    """True value [SI] of every configured sensor in a solved heat balance.

    Parameters
    ----------
    config : PlantConfig
        Its ``sensors`` say what each tag measures.
    hb : HeatBalance
        The solved state (its flowsheet's parameters are the truth).
    cooling_water_inlet : float, optional
        Cooling-water inlet temperature [K]; default the condenser parameter.
    barometric_pressure : float
        Ambient pressure [Pa] for ``barometric_pressure`` sensors.

    Returns
    -------
    dict
        Tag → value: mass flow [kg/s], pressure [Pa] (absolute), temperature
        [K], power [W] (generator terminal output, pump drive input).
    """
    ctx = hb.context()
    fs = hb.flowsheet
    cw: dict[str, tuple[float, float]] = {}
    out: dict[str, float] = {}
    for s in config.sensors:
        q = s.quantity
        if q == "mass_flow":
            v = max(ctx.m(s.stream), 0.0)  # a zero flow solves to ±1e-14; transmitters read ≥ 0
        elif q == "pressure":
            v = ctx.p(s.stream)
        elif q == "temperature":
            v = stream_temperature(ctx, s.stream)
        elif q == "power":
            v = float(hb.z[fs.layout.extra(f"{s.equipment}.power")])
        elif q in ("cooling_water_inlet_temperature", "cooling_water_outlet_temperature"):
            if s.equipment not in cw:
                cw[s.equipment] = condenser_cooling_water(hb, s.equipment, cooling_water_inlet)
            v = cw[s.equipment][0 if q == "cooling_water_inlet_temperature" else 1]
        elif q == "barometric_pressure":
            v = barometric_pressure
        else:  # a quantity added to the schema but not simulated yet
            raise ValueError(f"sensor {s.tag!r}: quantity {q!r} has no simulated truth")
        out[s.tag] = float(v)
    return out


def noisy_readings(
    truth: Mapping[str, float],
    config: Any,
    rng: np.random.Generator,
    bias: Mapping[str, float] | None = None,
    size: int | None = None,
) -> dict[str, Any]:
    """Readings = truth + bias + Gaussian noise with σ = sensor.sigma_si(truth) [SI].

    σ is the VDI 2048 standard uncertainty (half-width of the 95 % interval
    / 1.96), evaluated at the true value for percent-of-reading instruments.

    Parameters
    ----------
    truth : mapping
        Tag → true value [SI] (e.g. from :func:`sensor_truth`).
    config : PlantConfig
        Supplies each tag's uncertainty.
    rng : numpy.random.Generator
        Noise source (seed it for reproducible draws).
    bias : mapping, optional
        Tag → additive systematic error [SI].
    size : int, optional
        Number of independent draws; each value is then an array of that length.

    Returns
    -------
    dict
        Tag → reading [SI] (float, or array when ``size`` is given).

    References
    ----------
    VDI 2048 Part 1 (2017).
    """
    sensors = config.sensors_by_tag
    unknown = [t for t in (bias or {}) if t not in truth]
    if unknown:
        raise ValueError(f"bias on tags {unknown} that have no true value; expected tags of `truth`")
    tags = list(truth)
    missing = [t for t in tags if t not in sensors]
    if missing:
        raise ValueError(f"tags {missing} are not configured sensors")
    shape = (len(tags),) if size is None else (len(tags), size)
    e = rng.standard_normal(shape)
    out: dict[str, Any] = {}
    for i, tag in enumerate(tags):
        x = truth[tag]
        sigma = float(sensors[tag].sigma_si(x))
        b = (bias or {}).get(tag, 0.0)
        out[tag] = float(x + b + sigma * e[i]) if size is None else x + b + sigma * e[i]
    return out


def to_engineering(
    config: Any, tag: str, value_si: Any, barometric_pressure: float | None = None
) -> Any:
    """An SI value [SI] in the sensor's engineering unit (as published).

    Parameters
    ----------
    config : PlantConfig
    tag : str
        Sensor tag.
    value_si : float or array
        Value [SI] (absolute pressure [Pa], temperature [K], ...).
    barometric_pressure : float, optional
        Ambient pressure [Pa] for gauge units; default the one fixed at config load.
    """
    sensor = config.sensors_by_tag.get(tag)
    if sensor is None:
        raise ValueError(f"unknown sensor tag {tag!r}")
    conv = sensor.conversion
    if conv.gauge and barometric_pressure is not None:
        conv = conv.with_barometric(barometric_pressure)
    return conv.from_si(value_si)
