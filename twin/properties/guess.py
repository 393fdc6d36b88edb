"""Start temperatures for the (p, h) and (p, s) inversions, from a table of forward values.

CoolProp's (p, h) flash (the IF97 backward equations plus its region search)
costs about ten (p, T) getters, and twin refines its temperature on the forward
equation anyway. A start within ~0.1 K lets that refinement converge in two or
three forward evaluations instead, so the flash is skipped: this table holds
h(p, T) and s(p, T) on temperature nodes at 161 pressures (log-spaced, 611.657 Pa
- 100 MPa), one column per phase (liquid from 273.15 K up to T_sat, vapour from
T_sat up to 1073.15 K, one column above the critical pressure), and a start is
the column interpolation in h (or s) blended linearly in ln p. The table is
built once per process on first use (~8 000 forward evaluations, a few tens of
ms) and is only a start: every result is refined on the forward equation and
checked, and a start outside the table falls back to the flash.

A second, denser table holds the saturation line itself (h_f, h_g, s_f, s_g at
1 000 pressures, 611.657 Pa up to just below the critical pressure, with a
bound on the error of linear interpolation in ln p): :func:`line_side` tells
from it, without a saturation evaluation, that a (p, h) or (p, s) state lies
well inside one single phase, so the exact phase test on the saturation line is
made only next to the lines.
"""

from __future__ import annotations

import math
import threading
from bisect import bisect_right
from math import floor as _floor

from twin.properties.backend import PQ, PT, new_state
from twin.properties.states import _LIQ, _NOLINE, _VAP, P_CRIT, P_TRIPLE, X_SATURATED

N_P = 161  # pressure nodes
N_T = 25  # temperature nodes per column
P_TOP = 100e6  # [Pa], top of IAPWS-IF97 regions 1-3
_L0 = math.log(P_TRIPLE)
_DL = (math.log(P_TOP) - _L0) / (N_P - 1)
_T_MIN, _T_MAX = 273.15, 1073.15  # [K]
_EDGE = 1e-9  # [-] relative distance of the first/last node from T_sat

# per pressure node and phase: (T nodes, h nodes, s nodes), or None where the phase has no column
_Column = tuple[list[float], list[float], list[float]]
_table: list[dict[int, _Column]] | None = None
_lock = threading.Lock()


def _build() -> list[dict[int, _Column]]:
    st = new_state()
    table: list[dict[int, _Column]] = []
    u = [j / (N_T - 1) for j in range(N_T)]
    for i in range(N_P):
        p = math.exp(_L0 + i * _DL) if i < N_P - 1 else P_TOP
        p = max(p, P_TRIPLE)
        cols: dict[int, list[float]] = {}
        if p < P_CRIT:
            st.update(PQ, p, 0.0)
            tsat = st.T()
            t_liq = tsat * (1.0 - _EDGE)
            t_vap = tsat * (1.0 + _EDGE)
            cols[_LIQ] = [_T_MIN + (t_liq - _T_MIN) * (1.0 - (1.0 - a) ** 2) for a in u]  # dense near T_sat
            cols[_VAP] = [t_vap + (_T_MAX - t_vap) * a * a for a in u]  # dense near T_sat
        else:
            cols[_NOLINE] = [_T_MIN + (_T_MAX - _T_MIN) * a for a in u]
        node: dict[int, _Column] = {}
        for phase, temps in cols.items():
            hs, ss = [], []
            for T in temps:
                st.update(PT, p, T)
                hs.append(st.hmass())
                ss.append(st.smass())
            node[phase] = (temps, hs, ss)
        table.append(node)
    return table


def _get_table() -> list[dict[int, _Column]]:
    global _table
    if _table is None:
        with _lock:
            if _table is None:
                _table = _build()
    return _table


def _column_T(col: _Column, f: float, by_s: bool) -> float:
    temps, fs = col[0], (col[2] if by_s else col[1])
    j = bisect_right(fs, f)
    j = 1 if j < 1 else (N_T - 1 if j > N_T - 1 else j)
    f0, f1 = fs[j - 1], fs[j]
    return temps[j - 1] + (f - f0) * (temps[j] - temps[j - 1]) / (f1 - f0)


def start_T(p: float, f: float, by_s: bool, phase: int) -> float:
    """Start temperature [K] for the phase's state at pressure p [Pa] and h [J/kg] (or s [J/(kg K)]).

    ``phase`` is the phase the caller has established (_LIQ, _VAP, or _NOLINE
    above the critical pressure / below the triple point, where the vapour
    column is used). NaN where the table has no column for it.
    """
    table = _get_table()
    if phase == _NOLINE and p < P_CRIT:
        phase = _VAP  # below the triple-point pressure: vapour only
    t = (math.log(p) - _L0) / _DL
    i = int(t) if t > 0.0 else 0
    if i > N_P - 2:
        i = N_P - 2
    w = t - i
    a, b = table[i].get(phase), table[i + 1].get(phase)
    if a is None:
        return math.nan if b is None else _column_T(b, f, by_s)
    if b is None:
        return _column_T(a, f, by_s)
    return (1.0 - w) * _column_T(a, f, by_s) + w * _column_T(b, f, by_s)


# ------------------------------------------------------------ saturation line
N_LINE = 1000  # pressure nodes of the line table
_P_LINE_TOP = P_CRIT * (1.0 - 1e-4)  # [Pa] last node; above it (and up to P_CRIT) always "near"
_LL0 = math.log(P_TRIPLE)
_DLL = (math.log(_P_LINE_TOP) - _LL0) / (N_LINE - 1)
# [-] slack of the bounds, relative to h_fg (or s_fg): well above X_SATURATED and rounding
_SLACK = 1e3 * X_SATURATED
# per node i: lower bound of h_f, upper bound of h_g (h) and of s_f, s_g (s) over [p_i, p_i+1],
# as (f_f at node i, slope, margin, f_g at node i, slope, margin) of the linear interpolation
_Line = tuple[list[float], list[float], list[float], list[float], list[float], list[float]]
_line: tuple[_Line, _Line] | None = None


def _build_line() -> tuple[_Line, _Line]:
    st = new_state()

    def at(lp: float) -> tuple[float, float, float, float]:
        p = max(min(math.exp(lp), _P_LINE_TOP), P_TRIPLE)
        st.update(PQ, p, 0.0)
        hf, sf = st.hmass(), st.smass()
        st.update(PQ, p, 1.0)
        return hf, st.hmass(), sf, st.smass()

    nodes = [at(_LL0 + i * _DLL) for i in range(N_LINE)]
    mids = [at(_LL0 + (i + 0.5) * _DLL) for i in range(N_LINE - 1)]
    out = []
    for k in (0, 2):  # h columns, then s columns
        cols: list[list[float]] = [[], [], [], [], [], []]
        for i in range(N_LINE - 1):
            a, b, m = nodes[i], nodes[i + 1], mids[i]
            fg_width = max(abs(a[k + 1] - a[k]), abs(b[k + 1] - b[k]))
            for j, col in ((0, 0), (1, 3)):  # liquid, vapour
                fa, fb, fm = a[k + j], b[k + j], m[k + j]
                # a smooth line departs from its chord by at most ~2x the midpoint departure
                margin = 2.0 * abs(fm - 0.5 * (fa + fb)) + _SLACK * fg_width
                cols[col].append(fa)
                cols[col + 1].append(fb - fa)
                cols[col + 2].append(margin)
        out.append(tuple(cols))
    return out[0], out[1]  # type: ignore[return-value]


def _get_line() -> tuple[_Line, _Line]:
    global _line
    if _line is None:
        with _lock:
            if _line is None:
                _line = _build_line()
    return _line


def line_side(p: float, f: float, by_s: bool) -> int:
    """_LIQ or _VAP if h [J/kg] (or s [J/(kg K)]) at pressure p [Pa] is surely in that phase; else -1.

    "Surely": f is below h_f(p) (above h_g(p)) by more than the interpolation
    error of the line table plus a slack of 1e-6 h_fg, so that the exact test
    on the saturation line (x outside [-X_SATURATED, 1 + X_SATURATED]) would
    give the same phase. -1 (not sure: make the exact test) next to the lines,
    next to the critical point (p above the last node) and for
    p < P_TRIPLE or p >= P_CRIT, where the caller has no line.
    """
    t = (math.log(p) - _LL0) / _DLL if p >= P_TRIPLE else -1.0
    if not 0.0 <= t < N_LINE - 1:
        return -1
    i = _floor(t)
    w = t - i
    cf, dcf, mf, cg, dcg, mg = _get_line()[1 if by_s else 0]
    if f < cf[i] + w * dcf[i] - mf[i]:
        return _LIQ
    if f > cg[i] + w * dcg[i] + mg[i]:
        return _VAP
    return -1
