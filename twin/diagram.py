"""The cycle on a chart: T–s and h–s diagrams of the water–steam cycle (matplotlib).

The only module that imports matplotlib (the optional extra ``twin[plot]``). It draws,
side by side, a temperature–entropy and an enthalpy–entropy chart with

- the saturation dome (IAPWS-IF97 saturated liquid and vapour, triple point to near
  the critical point),
- every stream state (p, h) → (T, s), with the heat-addition and heat-rejection paths
  drawn along their pressure (boiler, reheater, heaters, condenser) and the rest
  straight,
- the turbine expansion line through the extraction points to the expansion-line end
  point (ELEP) and on to the used-energy end point (UEEP),
- lines of constant moisture at the warning and alarm limits,
- a reference cycle faint behind the main one (expected at the same load and cooling
  water, or the design point), and
- uncertainty bars (95 %) of reconciled temperatures, where they are large enough to see.

:func:`cycle_drawing` computes the plotted coordinates (tests read them); :func:`draw`
makes a :class:`matplotlib.figure.Figure` without pyplot (thread-safe, no display);
:class:`DiagramService` renders the latest window's SVG for the daemon's ``/diagram.svg``.
Advisory only: a chart of the model, not an instrument.
"""

from __future__ import annotations

import io
import math
import threading
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from twin import properties as props

P_TRIPLE = 611.657  # [Pa] IAPWS-IF97 triple-point pressure
P_CRIT = 22.064e6  # [Pa] IAPWS-IF97 critical pressure
_C0 = 273.15

# equipment kinds whose (main) path is a heat exchange at about constant pressure:
# kind -> list of (inlet port, outlet port)
_HEAT_PATHS = {
    "boiler": [("feedwater", "steam")],
    "reheater": [("inlet", "outlet")],
    "closed_heater": [("tube_in", "tube_out"), ("steam_in", "drain_out")],
    "open_heater": [("steam_in", "outlet")],
    "condenser": [("exhaust", "outlet")],
}
# heat paths of condensing steam: on the T–s chart only (on h–s they hide the expansion line)
_CONDENSING = {("closed_heater", "steam_in"), ("open_heater", "steam_in"), ("condenser", "exhaust")}
_STRAIGHT = {"pump": [("inlet", "outlet")], "throttle_valve": [("inlet", "outlet")], "pipe": [("inlet", "outlet")]}
_EXPANSION = {"turbine_group": [("inlet", "outlet")], "exhaust_loss": [("inlet", "outlet")]}


@dataclass(frozen=True)
class StatePoint:
    """One stream's plotted state: pressure [Pa], enthalpy [J/kg], temperature [K], entropy [J/(kg K)]."""

    stream: str
    p: float
    h: float
    T: float
    s: float
    x: float = math.nan  # quality [-] in the two-phase region, NaN outside
    T_uncertainty: float = math.nan  # 95 % half-width of a reconciled temperature [K]


@dataclass(frozen=True)
class Path:
    """A process drawn between two states: ``kind`` heat / expansion / straight; coordinates [SI]."""

    equipment: str
    kind: str
    T: tuple[float, ...]
    s: tuple[float, ...]
    h: tuple[float, ...]
    section: str = ""
    mollier: bool = True  # drawn on the h–s chart too (condensing steam is drawn on T–s only)


@dataclass(frozen=True)
class CycleDrawing:
    """Everything plotted for one cycle (SI): states by stream, process paths, ELEP/UEEP stream ids."""

    points: Mapping[str, StatePoint]
    paths: tuple[Path, ...]
    elep: str | None = None
    ueep: str | None = None
    extraction_points: tuple[str, ...] = ()


def _state(stream: str, p: float, h: float, T_unc: float = math.nan) -> StatePoint:
    st = props.ph(p, h)
    x = float(st.x) if st.two_phase else math.nan
    return StatePoint(stream, float(p), float(h), float(st.T), float(st.s), x, T_unc)


def _isobar_path(a: StatePoint, b: StatePoint, n: int = 24) -> tuple[list[float], list[float], list[float]]:
    """States along a heat exchange from a to b: h linear, p linear between the ends."""
    T, s, h = [], [], []
    for f in np.linspace(0.0, 1.0, n):
        p = a.p + f * (b.p - a.p)
        hh = a.h + f * (b.h - a.h)
        st = props.ph(p, hh)
        T.append(float(st.T))
        s.append(float(st.s))
        h.append(float(hh))
    return T, s, h


def cycle_drawing(config: Any, states: Mapping[str, tuple[float, float]],
                  T_uncertainty: Mapping[str, float] | None = None) -> CycleDrawing:
    """Plotted coordinates of a cycle.

    Parameters
    ----------
    config : PlantConfig
        Flowsheet (equipment kinds and ports).
    states : mapping of str to (float, float)
        Stream id → (pressure [Pa], enthalpy [J/kg]); streams missing or not finite are
        left out (and so are the paths that need them).
    T_uncertainty : mapping of str to float, optional
        Stream id → 95 % half-width of its reconciled temperature [K].
    """
    unc = T_uncertainty or {}
    points: dict[str, StatePoint] = {}
    for sid, (p, h) in states.items():
        if math.isfinite(p) and math.isfinite(h) and p > 0:
            try:
                points[sid] = _state(sid, p, h, unc.get(sid, math.nan))
            except ValueError:
                continue  # outside IF97's range: not drawn
    paths: list[Path] = []
    elep = ueep = None
    extraction: list[str] = []
    for e in config.equipment:
        kind = e.kind
        pairs = _HEAT_PATHS.get(kind) or _STRAIGHT.get(kind) or _EXPANSION.get(kind) or []
        for a_port, b_port in pairs:
            a, b = e.ports.get(a_port), e.ports.get(b_port)
            if not isinstance(a, str) or not isinstance(b, str) or a not in points or b not in points:
                continue
            pa, pb = points[a], points[b]
            if kind in _HEAT_PATHS:
                Ts, ss, hs = _isobar_path(pa, pb)
                paths.append(Path(e.id, "heat", tuple(Ts), tuple(ss), tuple(hs),
                                  mollier=(kind, a_port) not in _CONDENSING))
            elif kind in _EXPANSION:
                section = str(e.params.get("section", "")) if kind == "turbine_group" else "exhaust loss"
                paths.append(Path(e.id, "expansion", (pa.T, pb.T), (pa.s, pb.s), (pa.h, pb.h), section))
                if kind == "exhaust_loss":
                    elep, ueep = a, b
                else:
                    extraction.append(b)
            else:
                paths.append(Path(e.id, "straight", (pa.T, pb.T), (pa.s, pb.s), (pa.h, pb.h)))
        if kind in ("mixer", "open_heater"):  # splitters: all ends at one state, nothing to draw
            ins = list(e.ports.get("inlets", []))
            outs = [e.ports.get("outlet")]
            for a in ins:
                for b in outs:
                    if isinstance(a, str) and isinstance(b, str) and a in points and b in points:
                        pa, pb = points[a], points[b]
                        paths.append(Path(e.id, "straight", (pa.T, pb.T), (pa.s, pb.s), (pa.h, pb.h)))
    if elep in extraction:
        extraction.remove(elep)
    return CycleDrawing(points, tuple(paths), elep, ueep, tuple(extraction))


def saturation_dome(n: int = 160) -> dict[str, np.ndarray]:
    """Saturated liquid and vapour from the triple point to 0.999 of the critical pressure (IF97).

    Returns arrays ``p`` [Pa], ``T`` [K], ``s_f``, ``s_g`` [J/(kg K)], ``h_f``, ``h_g`` [J/kg].
    """
    p = np.geomspace(P_TRIPLE * 1.0001, 0.999 * P_CRIT, n)
    T = np.array([props.T_sat(x) for x in p])
    return {"p": p, "T": T, "s_f": np.array([props.s_f(x) for x in p]), "s_g": np.array([props.s_g(x) for x in p]),
            "h_f": np.array([props.h_f(x) for x in p]), "h_g": np.array([props.h_g(x) for x in p])}


def moisture_line(moisture: float, dome: Mapping[str, np.ndarray]) -> dict[str, np.ndarray]:
    """The line of constant moisture y (quality 1 − y) across the dome: ``T`` [K], ``s``, ``h`` (SI)."""
    x = 1.0 - moisture
    return {"T": dome["T"], "s": dome["s_f"] + x * (dome["s_g"] - dome["s_f"]),
            "h": dome["h_f"] + x * (dome["h_g"] - dome["h_f"])}


# ------------------------------------------------------------------ drawing
_SECTION_COLOURS = {"HP": "#b2182b", "IP": "#ef8a62", "LP": "#2166ac", "exhaust loss": "#67a9cf"}


def _plot_cycle(ax_ts: Any, ax_hs: Any, d: CycleDrawing, faint: bool, label: str) -> None:
    alpha = 0.28 if faint else 1.0
    lw = 1.0 if faint else 1.4
    z = 1 if faint else 3
    first = True
    for path in d.paths:
        s_k = np.asarray(path.s) / 1e3
        if path.kind == "expansion":
            colour = "#888888" if faint else _SECTION_COLOURS.get(path.section, "#2166ac")
            kw = {"color": colour, "lw": lw + 1.6, "alpha": alpha, "zorder": z + 1, "solid_capstyle": "round"}
        else:
            kw = {"color": "#555555" if faint else "#1b7837", "lw": lw, "alpha": alpha, "zorder": z,
                  "ls": "--" if faint else "-"}
        lab = label if first else None
        first = False
        ax_ts.plot(s_k, np.asarray(path.T) - _C0, label=lab, **kw)
        if path.mollier:
            ax_hs.plot(s_k, np.asarray(path.h) / 1e3, label=lab, **kw)
    pts = list(d.points.values())
    s = np.array([q.s for q in pts]) / 1e3
    ax_ts.scatter(s, [q.T - _C0 for q in pts], s=9 if faint else 14, color="#333333", alpha=alpha, zorder=z + 2)
    ax_hs.scatter(s, [q.h / 1e3 for q in pts], s=9 if faint else 14, color="#333333", alpha=alpha, zorder=z + 2)
    if faint:
        return
    bars = [q for q in pts if math.isfinite(q.T_uncertainty) and q.T_uncertainty > 0]
    if bars:
        ax_ts.errorbar([q.s / 1e3 for q in bars], [q.T - _C0 for q in bars], yerr=[q.T_uncertainty for q in bars],
                       fmt="none", ecolor="black", elinewidth=0.9, capsize=2.5, zorder=z + 3,
                       label="reconciled T ± 95 %")
    for sid, tag in ((d.elep, "ELEP"), (d.ueep, "UEEP")):
        if sid and sid in d.points:
            q = d.points[sid]
            ax_hs.annotate(tag, (q.s / 1e3, q.h / 1e3), xytext=(-32, -12) if tag == "ELEP" else (6, 2),
                           textcoords="offset points", fontsize=8)
            ax_ts.annotate(tag, (q.s / 1e3, q.T - _C0), xytext=(-30, 6) if tag == "ELEP" else (5, -11),
                           textcoords="offset points", fontsize=8)
    labelled = set()
    for path in d.paths:
        if path.kind == "expansion" and path.section and path.section not in labelled and path.section != "exhaust loss":
            labelled.add(path.section)
            ax_hs.annotate(path.section, (path.s[0] / 1e3, path.h[0] / 1e3), xytext=(-16, -4),
                           textcoords="offset points", fontsize=8, color=_SECTION_COLOURS.get(path.section, "black"))
    for sid in d.extraction_points:
        if sid in d.points:
            q = d.points[sid]
            ax_hs.scatter([q.s / 1e3], [q.h / 1e3], s=26, facecolors="none", edgecolors="#2166ac", zorder=z + 3)


def draw(drawing: CycleDrawing, *, reference: CycleDrawing | None = None, limits: tuple[float, ...] = (0.10, 0.12),
         title: str = "", label: str = "reconciled", reference_label: str = "expected") -> Any:
    """T–s and h–s charts of a cycle as a :class:`matplotlib.figure.Figure` (no pyplot, no display).

    ``limits`` are exhaust moistures [-] drawn as constant-moisture lines (warning, alarm).
    """
    from matplotlib.figure import Figure

    dome = saturation_dome()
    fig = Figure(figsize=(13.5, 6.2), dpi=100, layout="constrained")
    ax_ts, ax_hs = fig.subplots(1, 2)
    for ax, y_f, y_g, scale, off in ((ax_ts, "T", "T", 1.0, -_C0), (ax_hs, "h_f", "h_g", 1e-3, 0.0)):
        ax.plot(dome["s_f"] / 1e3, dome[y_f] * scale + off, color="black", lw=1.0, label="saturation (IF97)")
        ax.plot(dome["s_g"] / 1e3, dome[y_g] * scale + off, color="black", lw=1.0)
    styles = ("-.", ":", "--")
    for i, y in enumerate(limits):
        line = moisture_line(y, dome)
        kind = ("warning", "alarm")[i] if i < 2 else "limit"
        kw = {"color": "#d6604d" if i else "#f4a582", "lw": 1.0, "ls": styles[i % 3]}
        ax_ts.plot(line["s"] / 1e3, line["T"] - _C0, label=f"{100 * y:.0f} % moisture ({kind})", **kw)
        ax_hs.plot(line["s"] / 1e3, line["h"] / 1e3, label=f"{100 * y:.0f} % moisture ({kind})", **kw)
    if reference is not None:
        _plot_cycle(ax_ts, ax_hs, reference, True, reference_label)
    _plot_cycle(ax_ts, ax_hs, drawing, False, label)
    ax_ts.set_xlabel("specific entropy s [kJ/(kg K)]")
    ax_ts.set_ylabel("temperature T [°C]")
    ax_hs.set_xlabel("specific entropy s [kJ/(kg K)]")
    ax_hs.set_ylabel("specific enthalpy h [kJ/kg]")
    ax_ts.set_title("T–s")
    ax_hs.set_title("h–s")
    s_all = [q.s / 1e3 for q in drawing.points.values()] or [0.0, 9.0]
    for ax in (ax_ts, ax_hs):
        ax.set_xlim(max(min(s_all) - 0.4, -0.1), max(s_all) + 0.6)
        ax.grid(True, lw=0.4, alpha=0.5)
    if drawing.points:
        t_max = max(q.T for q in drawing.points.values()) - _C0
        h_max = max(q.h for q in drawing.points.values()) / 1e3
        ax_ts.set_ylim(0.0, t_max + 40.0)
        ax_hs.set_ylim(0.0, h_max + 150.0)
    ax_ts.legend(loc="upper left", fontsize=8)
    ax_hs.text(0.01, 0.99, "expansion line: HP red, IP orange, LP blue; ○ extraction points",
               transform=ax_hs.transAxes, fontsize=8, va="top")
    if title:
        fig.suptitle(title + "  ·  advisory: a model chart, not an instrument", fontsize=10)
    return fig


def render(fig: Any, fmt: str) -> bytes:
    """The figure as ``png`` or ``svg`` bytes."""
    if fmt not in ("png", "svg"):
        raise ValueError(f"diagram format {fmt!r}: expected png or svg")
    buf = io.BytesIO()
    fig.savefig(buf, format=fmt, dpi=110 if fmt == "png" else None)
    return buf.getvalue()


# --------------------------------------------------------- inputs from results
def states_of_result(result: Any) -> dict[str, tuple[float, float]]:
    """(p [Pa], h [J/kg]) of every stream of a :class:`twin.result.CycleResult`."""
    return {sid: (st.pressure, st.enthalpy) for sid, st in result.streams.items()}


def temperature_uncertainty_of_result(config: Any, result: Any) -> dict[str, float]:
    """Stream → 95 % half-width [K] of the reconciled temperature (best temperature sensor of the stream)."""
    out: dict[str, float] = {}
    for s in config.sensors:
        t = result.tags.get(s.tag)
        if s.quantity != "temperature" or s.stream is None or t is None or not math.isfinite(t.reconciled_sigma):
            continue
        u = 1.96 * t.reconciled_sigma
        out[s.stream] = min(out.get(s.stream, math.inf), u)
    return out


def cooling_water_inlet_of_result(config: Any, result: Any) -> float | None:
    """Mean reconciled (else measured) cooling-water inlet temperature [K], or None."""
    vals = []
    for s in config.sensors:
        t = result.tags.get(s.tag)
        if s.quantity == "cooling_water_inlet_temperature" and t is not None:
            v = t.reconciled if math.isfinite(t.reconciled) else t.measured
            if math.isfinite(v):
                vals.append(v)
    return sum(vals) / len(vals) if vals else None


@dataclass
class ExpectedCycle:
    """The forward model of a plant for reference cycles: design point, or expected at a load.

    Builds its own flowsheet (properties are per thread), so it can run in any one thread;
    off design the throttle pressure follows the plant file's ``[performance]`` pressure control.
    """

    config: Any
    _built: Any = field(default=None, init=False, repr=False)
    _cache: dict[tuple[float, float], dict[str, tuple[float, float]]] = field(default_factory=dict, init=False)

    def _build(self) -> Any:
        if self._built is None:
            from twin.model.flowsheet import Flowsheet
            from twin.model.solve import Operation, solve_design
            from twin.performance.expected import ExpectedModel
            from twin.performance.kpi import CyclePerformanceSettings

            fs = Flowsheet.from_config(self.config)
            op = Operation.from_config(self.config)
            design = solve_design(fs, op)
            model = ExpectedModel.from_config(self.config, fs, op, design,
                                              CyclePerformanceSettings.from_config(self.config))
            self._built = (fs, design, model)
        return self._built

    @staticmethod
    def _states(hb: Any) -> dict[str, tuple[float, float]]:
        ctx = hb.context()
        return {sid: (float(ctx.p(sid)), float(ctx.h(sid))) for sid in hb.flowsheet.layout.streams}

    def design(self) -> dict[str, tuple[float, float]]:
        """Design-point stream states (p [Pa], h [J/kg])."""
        return self._states(self._build()[1])

    def at(self, load: float, cooling_water_inlet: float | None = None) -> dict[str, tuple[float, float]]:
        """Expected stream states at a load [-] and cooling-water inlet temperature [K] (design if None)."""
        key = (round(float(load), 3), round(float(cooling_water_inlet), 1) if cooling_water_inlet else 0.0)
        if key not in self._cache:
            ref, _ = self._build()[2].expected(min(max(load, 0.2), 1.2), cooling_water_inlet)
            if len(self._cache) > 32:
                self._cache.clear()
            self._cache[key] = self._states(ref)
        return self._cache[key]


class DiagramService:
    """The daemon's ``/diagram.svg``: the latest window's cycle over the expected one, rendered on request.

    Parameters
    ----------
    config : PlantConfig
        The plant.
    provider : callable
        Returns the latest :class:`twin.result.CycleResult` or None.

    Rendering happens in the caller's (HTTP) thread, one request at a time, cached per
    window; a window without reconciled streams gives None (the route answers 503).
    """

    def __init__(self, config: Any, provider: Callable[[], Any]) -> None:
        self.config = config
        self.provider = provider
        self.expected = ExpectedCycle(config)
        self._lock = threading.Lock()
        self._cached: tuple[float, bytes] | None = None

    def svg(self) -> bytes | None:
        result = self.provider()
        if result is None or not result.streams:
            return None
        with self._lock:
            if self._cached is not None and self._cached[0] == result.window_end:
                return self._cached[1]
            data = diagram_of_result(self.config, result, self.expected)
            self._cached = (result.window_end, data)
            return data


def diagram_of_result(config: Any, result: Any, expected: ExpectedCycle, fmt: str = "svg") -> bytes:
    """One window's diagram: reconciled cycle over the expected one at its load and cooling water."""
    import datetime as _dt

    drawing = cycle_drawing(config, states_of_result(result), temperature_uncertainty_of_result(config, result))
    load = result.kpi("load_fraction")
    reference = None
    if math.isfinite(load):
        try:
            reference = cycle_drawing(config, expected.at(load, cooling_water_inlet_of_result(config, result)))
        except ValueError:
            reference = None
    mon = config.monitoring
    when = _dt.datetime.fromtimestamp(result.window_end, tz=_dt.UTC).strftime("%Y-%m-%d %H:%M:%S UTC")
    status = "reconciled" if result.reconciled else f"model ({result.reconcile_status})"
    fig = draw(drawing, reference=reference, limits=(mon.exhaust_moisture_warn, mon.exhaust_moisture_alarm),
               title=f"{config.unit.id} · window ending {when} · {status}",
               label=status, reference_label=f"expected at load {100 * load:.0f} %" if reference else "expected")
    return render(fig, fmt)
