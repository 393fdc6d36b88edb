"""Water and steam properties (IAPWS-IF97) for the rest of twin.

A package: CoolProp enters through :mod:`twin.properties.backend` alone. It wraps one low-level
``AbstractState("IF97", "Water")`` per :class:`Water` object and adds what the
plant model needs on top of it:

* forward consistency: CoolProp's ``T(p, h)`` and ``T(p, s)`` are the IF97
  backward polynomials, whose error is up to about 25 mK (``h_pT(p, T_ph(p, h))``
  off by up to ~80 J/kg). Every (p, h) and (p, s) function here refines that
  temperature with Newton steps on the forward equation, so that
  ``h_pT(p, T_ph(p, h)) == h`` to ~1e-9 relative and all derivatives are
  consistent with the functions they differentiate;
* two-phase states from the saturation line (region 4) with the lever rule;
* exact phase selection at the saturation lines: a (p, h) or (p, s) state whose
  quality lies within ``X_SATURATED`` (1e-9) of [0, 1] is saturated, and every
  single-phase temperature keeps a relative margin ``SAT_MARGIN`` (1e-12) from
  T_sat, because CoolProp's IF97 region choice in a (p, T) update (p against its
  p_sat(T)) matches its T_sat(p) only to ~20 ulps and can otherwise return the
  other phase or fail with "Cannot use Region 4". Public (p, T) functions return
  the phase of T's side of T_sat(p), the saturated liquid on the line itself;
* partial derivatives (CoolProp has none for IF97) from exact thermodynamic
  identities: in region-1 liquid (∂v/∂p)_T and (∂v/∂T)_p from cv and the speed
  of sound, elsewhere central differences on cheap (p, T) updates;
  (∂x/∂p)_h is computed on first access;
* saturation work only next to the saturation lines: a table of the line
  (:func:`twin.properties.guess.line_side`) tells that a (p, h) or (p, s) state is
  well inside one phase, and then x and (∂x/∂h)_p of a (p, h) state are computed on
  first access too (the same numbers);
* a saturation cache: the line with its slopes, kept per :class:`Water` by exact
  pressure (a model evaluation asks for it at the same pressure several times);
* warm starts: ``Water.ph(p, h, T_guess=...)`` (and ``ps``, ``h_ps``) start the
  forward-equation refinement from a previous temperature, e.g. the same
  stream's state at the previous evaluation; any guess is safe (a useless one
  falls back to the start table);
* :class:`PropertyError` naming the function and its inputs for NaN or
  out-of-range input, never a silent number;
* ``*_array`` variants that return NaN ("no valid state") instead of raising.

Units are SI base units throughout: pressure [Pa] (absolute), temperature [K],
specific enthalpy [J/kg], specific entropy [J/(kg K)], specific volume [m3/kg].

Speed, twin against a raw CoolProp ``AbstractState`` doing the same in the same
process (``twin bench properties``: median paired ratios; instruction counts of
valgrind's callgrind beside them, which do not depend on the machine's load):
``h_pT`` x1.2-1.3 (the kelvin-bucket test for "next to the saturation line" and
the Python call are the extra cost); ``T_ph`` x0.85-0.95 against the raw
backward-only flash; ``ph()`` with all partial derivatives x0.75-0.85 against a
raw (p, h) update with T, s, v and cp getters (x0.83 in instructions; x0.75
warm-started); the 45 distinct property calls of one demo-u1 model evaluation
4.2 M instructions cold, 3.9 M warm-started, against 6.8 M before the line
table, the lazy quality, the saturation cache and the warm start.

Modules: ``backend`` (CoolProp), ``states`` (constants, errors, result types),
``base`` ((p, T) and the saturation line), ``guess`` (start temperatures),
``inverse`` ((p, h) and (p, s) inversion), ``water`` (the full state with derivatives, :class:`Water`); this
module keeps every public name (thread default, module-level functions, NaN
arrays).

References
----------
IAPWS R7-97(2012), Revised Release on the IAPWS Industrial Formulation 1997 for
the Thermodynamic Properties of Water and Steam (IAPWS-IF97), 2007/2012.
"""

from __future__ import annotations

import math
import threading

import numpy as np

from twin.properties.states import (
    FORMULATION,
    P_CRIT,
    P_TRIPLE,
    SAT_MARGIN,
    T_CRIT,
    X_SATURATED,
    PHState,
    PropertyError,
    PSState,
    SatState,
)
from twin.properties.water import Water

__all__ = [
    "FORMULATION",
    "P_CRIT",
    "P_TRIPLE",
    "SAT_MARGIN",
    "T_CRIT",
    "X_SATURATED",
    "PHState",
    "PSState",
    "PropertyError",
    "SatState",
    "T_ph",
    "T_ph_array",
    "T_sat",
    "T_sat_array",
    "Water",
    "cp_pT",
    "dh_dp_T",
    "h_f",
    "h_g",
    "h_pT",
    "h_pT_array",
    "h_ps",
    "h_ps_array",
    "p_sat",
    "ph",
    "ps",
    "s_f",
    "s_g",
    "s_pT",
    "s_ph",
    "s_ph_array",
    "sat",
    "v_f",
    "v_g",
    "v_pT",
    "v_ph",
    "w_pT",
    "water",
    "x_ph",
    "x_ph_array",
]
_NAN = math.nan


# ---------------------------------------------------------------- module level
_local = threading.local()


def water() -> Water:
    """The calling thread's default :class:`Water` instance (created on first use)."""
    w: Water | None = getattr(_local, "water", None)
    if w is None:
        w = _local.water = Water()
    return w


def h_pT(p: float, T: float) -> float: return water().h_pT(p, T)
def s_pT(p: float, T: float) -> float: return water().s_pT(p, T)
def v_pT(p: float, T: float) -> float: return water().v_pT(p, T)
def cp_pT(p: float, T: float) -> float: return water().cp_pT(p, T)
def w_pT(p: float, T: float) -> float: return water().w_pT(p, T)
def dh_dp_T(p: float, T: float) -> float: return water().dh_dp_T(p, T)
def T_ph(p: float, h: float) -> float: return water().T_ph(p, h)
def s_ph(p: float, h: float) -> float: return water().s_ph(p, h)
def v_ph(p: float, h: float) -> float: return water().v_ph(p, h)
def x_ph(p: float, h: float) -> float: return water().x_ph(p, h)
def h_ps(p: float, s: float, T_guess: float | None = None) -> float: return water().h_ps(p, s, T_guess)
def T_sat(p: float) -> float: return water().T_sat(p)
def p_sat(T: float) -> float: return water().p_sat(T)
def h_f(p: float) -> float: return water().h_f(p)
def h_g(p: float) -> float: return water().h_g(p)
def s_f(p: float) -> float: return water().s_f(p)
def s_g(p: float) -> float: return water().s_g(p)
def v_f(p: float) -> float: return water().v_f(p)
def v_g(p: float) -> float: return water().v_g(p)
def sat(p: float) -> SatState: return water().sat(p)
def ph(p: float, h: float, T_guess: float | None = None) -> PHState: return water().ph(p, h, T_guess)
def ps(p: float, s: float, T_guess: float | None = None) -> PSState: return water().ps(p, s, T_guess)


for _f in (h_pT, s_pT, v_pT, cp_pT, w_pT, dh_dp_T, T_ph, s_ph, v_ph, x_ph, h_ps, T_sat, p_sat,
           h_f, h_g, s_f, s_g, v_f, v_g, sat, ph, ps):
    _f.__doc__ = f"Module-level :meth:`Water.{_f.__name__}` on the thread's default instance.\n\n" + (
        getattr(Water, _f.__name__).__doc__ or "")


# ----------------------------------------------------------- vectorised (NaN)
def _vectorised(name: str, *arrays: np.typing.ArrayLike) -> np.ndarray:
    method = getattr(water(), name)
    args = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in arrays))
    out = np.empty(args[0].shape)
    flat = out.reshape(-1)
    for i, values in enumerate(zip(*(a.ravel().tolist() for a in args), strict=True)):
        try:
            flat[i] = method(*values)
        except PropertyError:
            flat[i] = _NAN
    return out


def h_pT_array(p: np.typing.ArrayLike, T: np.typing.ArrayLike) -> np.ndarray:
    """Vectorised :func:`h_pT`: h [J/kg] from p [Pa], T [K]; broadcasting; NaN = no valid state."""
    return _vectorised("h_pT", p, T)


def T_ph_array(p: np.typing.ArrayLike, h: np.typing.ArrayLike) -> np.ndarray:
    """Vectorised :func:`T_ph`: T [K] from p [Pa], h [J/kg]; broadcasting; NaN = no valid state."""
    return _vectorised("T_ph", p, h)


def s_ph_array(p: np.typing.ArrayLike, h: np.typing.ArrayLike) -> np.ndarray:
    """Vectorised :func:`s_ph`: s [J/(kg K)] from p [Pa], h [J/kg]; NaN = no valid state."""
    return _vectorised("s_ph", p, h)


def h_ps_array(p: np.typing.ArrayLike, s: np.typing.ArrayLike) -> np.ndarray:
    """Vectorised :func:`h_ps`: h [J/kg] from p [Pa], s [J/(kg K)]; NaN = no valid state."""
    return _vectorised("h_ps", p, s)


def x_ph_array(p: np.typing.ArrayLike, h: np.typing.ArrayLike) -> np.ndarray:
    """Vectorised :func:`x_ph`: x [-] from p [Pa], h [J/kg]; NaN = no valid state."""
    return _vectorised("x_ph", p, h)


def T_sat_array(p: np.typing.ArrayLike) -> np.ndarray:
    """Vectorised :func:`T_sat`: T_sat [K] from p [Pa]; NaN = no valid state."""
    return _vectorised("T_sat", p)
