"""Constants, errors and result types of the property layer.

Units: pressure [Pa] (absolute), temperature [K], specific enthalpy [J/kg],
specific entropy [J/(kg K)], specific volume [m3/kg].
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from math import isfinite
from typing import Any

FORMULATION: str = "IAPWS-IF97"
P_CRIT: float = 22.064e6  # [Pa], IAPWS-IF97 Eq. (3)
T_CRIT: float = 647.096  # [K]
P_TRIPLE: float = 611.657  # [Pa], lowest pressure of the saturation line
_NAN = math.nan

_DT = 0.01  # [K] temperature step of central differences
_DP_REL = 1e-4  # [-] relative pressure step of central differences
_TOL_T = 1e-7  # [K] accepted residual of the forward refinement (as dh/cp or ds*T/cp)
_T_LO, _T_HI = 273.15, 1073.15  # [K] bracket of the fallback solver (regions 1-3)
# Saturation lines. CoolProp's IF97 (p, T) update picks region 1 or 2 by comparing p with
# its p_sat(T), which agrees with its T_sat(p) only to ~20 ulps (measured): a temperature
# one ulp from T_sat(p) can get the other phase, or "Cannot use Region 4" on the line.
X_SATURATED = 1e-9  # [-] |x| (or |x - 1|) up to this is read as saturated (lever rule)
SAT_MARGIN = 1e-12  # [-] relative distance from T_sat kept by single-phase temperatures
_T_SAT_TOP = T_CRIT * (1.0 + 2.0 * SAT_MARGIN)  # [K] no saturation line above
_WET, _LIQ, _VAP, _NOLINE = 0, 1, 2, 3  # phase of a (p, h) or (p, s) state


class PropertyError(ValueError):
    """Input outside the IAPWS-IF97 range (or NaN); the message names function and inputs."""


def _fmt(inputs: dict[str, float]) -> str:
    units = {"p": "Pa", "T": "K", "h": "J/kg", "s": "J/(kg K)"}
    return ", ".join(f"{k}={v:.9g} {units[k]}" for k, v in inputs.items())


def _error(func: str, reason: str, **inputs: float) -> PropertyError:
    return PropertyError(f"{func}({_fmt(inputs)}): {reason}")


def _range_error(func: str, exc: Exception | None = None, **inputs: float) -> PropertyError:
    detail = f" ({exc})" if exc is not None else ""
    return _error(func, f"outside IAPWS-IF97 range{detail}", **inputs)


def _check(func: str, **inputs: float) -> None:
    for value in inputs.values():
        if not isfinite(value):
            raise _error(func, "input is not a finite number", **inputs)


@dataclass(slots=True)
class SatState:
    """Saturation line at one pressure, with derivatives along it.

    Attributes: p [Pa]; T [K]; h_f, h_g [J/kg]; s_f, s_g [J/(kg K)]; v_f, v_g
    [m3/kg]; dT_dp [K/Pa]; dh_f_dp, dh_g_dp [m3/kg]; ds_f_dp, ds_g_dp
    [J/(kg K Pa)]; dv_f_dp, dv_g_dp [m3/(kg Pa)]. Derivatives are central
    differences of the IF97 saturation states (one-sided next to the triple or
    critical point).

    Read-only by convention (not a frozen dataclass: see :class:`PHState`).
    """

    p: float
    T: float
    h_f: float
    h_g: float
    s_f: float
    s_g: float
    v_f: float
    v_g: float
    dT_dp: float
    dh_f_dp: float
    dh_g_dp: float
    ds_f_dp: float
    ds_g_dp: float
    dv_f_dp: float
    dv_g_dp: float


_UNSET: Any = None  # PHState(..., x=_UNSET ...): computed on first access


@dataclass(slots=True, init=False)
class PHState:
    """State fixed by pressure p [Pa] and specific enthalpy h [J/kg].

    T [K], s [J/(kg K)], v [m3/kg], x [-] (equivalent quality (h-h_f)/(h_g-h_f),
    not clipped, NaN for p >= P_CRIT), cp [J/(kg K)] (NaN in two-phase),
    two_phase. Partial derivatives at constant h (``d*_dp``, per Pa) and at
    constant p (``d*_dh``, per J/kg) of T, s, v and x.

    Away from the saturation lines x and dx_dh (two saturation evaluations) and
    dx_dp (four more) are computed on first access by the
    :class:`~twin.properties.Water` that made the state (so read them in that
    Water's thread) and then stored; ``dataclasses.replace`` copies them (reading
    them first). The result is the same number as an eager computation.

    Read-only by convention: not a frozen dataclass, because a frozen
    dataclass's ``__init__`` (one ``object.__setattr__`` per field) costs about
    nine times a plain one, and a state is made for every stream evaluation.
    """

    p: float
    h: float
    T: float
    s: float
    v: float
    x: float
    cp: float
    two_phase: bool
    dT_dp: float
    dT_dh: float
    ds_dp: float
    ds_dh: float
    dv_dp: float
    dv_dh: float
    dx_dp: float
    dx_dh: float
    _water: Any = field(compare=False, repr=False)

    def __init__(self, p: float, h: float, T: float, s: float, v: float, x: float, cp: float,
                 two_phase: bool, dT_dp: float, dT_dh: float, ds_dp: float, ds_dh: float,
                 dv_dp: float, dv_dh: float, dx_dp: float = _UNSET, dx_dh: float = _UNSET,
                 _water: Any = None) -> None:
        self.p = p
        self.h = h
        self.T = T
        self.s = s
        self.v = v
        self.cp = cp
        self.two_phase = two_phase
        self.dT_dp = dT_dp
        self.dT_dh = dT_dh
        self.ds_dp = ds_dp
        self.ds_dh = ds_dh
        self.dv_dp = dv_dp
        self.dv_dh = dv_dh
        self._water = _water
        # a lazy field is left unset: reading it calls __getattr__ once
        if x is not _UNSET:
            self.x = x
        if dx_dp is not _UNSET:
            self.dx_dp = dx_dp
        if dx_dh is not _UNSET:
            self.dx_dh = dx_dh

    def __getattr__(self, name: str) -> float:
        """Compute a lazy field (x, dx_dh: the lever rule at p; dx_dp: the line's slopes)."""
        if name in ("x", "dx_dh", "dx_dp"):
            water = self._water
            if water is None:
                raise AttributeError(f"PHState.{name} was not set and no Water can compute it")
            try:
                x = object.__getattribute__(self, "x")
                dx_dh = object.__getattribute__(self, "dx_dh")
            except AttributeError:
                x, hf, hg = water._lever(self.p, self.h)
                dx_dh = 1.0 / (hg - hf)
                self.x, self.dx_dh = x, dx_dh
            if name == "dx_dp":
                self.dx_dp = water._dx_dp(self.p, x, dx_dh)
            return float(object.__getattribute__(self, name))
        raise AttributeError(name)


@dataclass(slots=True)
class PSState:
    """State fixed by pressure p [Pa] and specific entropy s [J/(kg K)].

    h [J/kg], T [K], v [m3/kg], x [-] (equivalent quality, NaN for p >= P_CRIT),
    two_phase, and the exact partials dh_dp = v [m3/kg] (at constant s) and
    dh_ds = T [K] (at constant p), from dh = T ds + v dp. Read-only by convention
    (not a frozen dataclass: see :class:`PHState`).
    """

    p: float
    s: float
    h: float
    T: float
    v: float
    x: float
    two_phase: bool
    dh_dp: float
    dh_ds: float
