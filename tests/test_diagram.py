"""The cycle diagram: plotted coordinates against the independent ``iapws`` package, files, HTTP route."""

from __future__ import annotations

import math
import urllib.error
import urllib.request
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from iapws import IAPWS97

pytest.importorskip("matplotlib")

from tests.test_daemon_e2e import demo_config, plant_truth
from twin import diagram
from twin.cli import main
from twin.config import load_config
from twin.metrics import MetricsServer

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "configs" / "demo-u1.toml"
VALUES = ROOT / "configs" / "demo-u1-values.csv"


@pytest.fixture(scope="module")
def config() -> Any:
    return load_config(DEMO)


@pytest.fixture(scope="module")
def design_states(config: Any) -> dict[str, tuple[float, float]]:
    return diagram.ExpectedCycle(config).design()


@pytest.fixture(scope="module")
def drawing(config: Any, design_states: Any) -> diagram.CycleDrawing:
    return diagram.cycle_drawing(config, design_states, {"main_steam": 1.5})


def test_dome_is_iapws_if97_saturation() -> None:
    dome = diagram.saturation_dome(40)
    for i in range(40):
        p = float(dome["p"][i])
        liq, vap = IAPWS97(P=p / 1e6, x=0.0), IAPWS97(P=p / 1e6, x=1.0)  # iapws: MPa, kJ/kg, kJ/(kg K)
        assert dome["T"][i] == pytest.approx(liq.T, abs=0.01)
        if p <= 0.95 * diagram.P_CRIT:
            assert dome["s_f"][i] == pytest.approx(liq.s * 1e3, abs=0.5)
            assert dome["s_g"][i] == pytest.approx(vap.s * 1e3, abs=0.5)
            assert dome["h_f"][i] == pytest.approx(liq.h * 1e3, abs=50)
            assert dome["h_g"][i] == pytest.approx(vap.h * 1e3, abs=50)
        else:  # near the critical point the two IF97 implementations part by up to ~0.5 %
            for k, ref in (("s_f", liq.s), ("s_g", vap.s), ("h_f", liq.h), ("h_g", vap.h)):
                assert dome[k][i] == pytest.approx(ref * 1e3, rel=5e-3), (k, p)
    assert dome["p"][0] > diagram.P_TRIPLE and dome["p"][-1] < diagram.P_CRIT


def test_every_stream_state_is_plotted_at_its_iapws_coordinates(config: Any, drawing: Any, design_states: Any) -> None:
    assert set(drawing.points) == set(design_states) == {s.id for s in config.streams}
    for sid, q in drawing.points.items():
        p, h = design_states[sid]
        ref = IAPWS97(P=p / 1e6, h=h / 1e3)  # independent IAPWS-IF97 implementation
        temperature = q.T
        assert temperature == pytest.approx(ref.T, abs=0.05), sid
        assert q.s == pytest.approx(ref.s * 1e3, abs=0.5), sid
        if 0.0 < ref.x < 1.0:
            assert q.x == pytest.approx(ref.x, abs=1e-4), sid


def test_expansion_line_runs_through_the_extraction_points_to_elep_and_ueep(config: Any, drawing: Any) -> None:
    assert (drawing.elep, drawing.ueep) == ("lp_elep", "lp_ueep")
    groups = [e for e in config.equipment if e.kind == "turbine_group"]
    assert {p.equipment for p in drawing.paths if p.kind == "expansion"} == {e.id for e in groups} | {"exhaust_loss"}
    # every group outlet but the last is an extraction point (the splitters behind them)
    assert set(drawing.extraction_points) == {e.ports["outlet"] for e in groups} - {"lp_elep"}
    lp = [p for p in drawing.paths if p.section == "LP"]
    # down the LP expansion line: entropy rises and enthalpy falls segment by segment
    for path in lp:
        assert path.s[1] > path.s[0] and path.h[1] < path.h[0]
    ex = next(p for p in drawing.paths if p.equipment == "exhaust_loss")
    assert ex.h[1] > ex.h[0]  # UEEP = ELEP + exhaust loss
    # the ELEP sits in the wet region at the design point's moisture (IF97 via iapws)
    q = drawing.points["lp_elep"]
    ref = IAPWS97(P=q.p / 1e6, h=q.h / 1e3)
    assert 0.85 < ref.x < 0.95 and q.x == pytest.approx(ref.x, abs=1e-4)


def test_heat_paths_follow_their_pressure(config: Any, drawing: Any) -> None:
    boiler = next(p for p in drawing.paths if p.equipment == "boiler")
    assert boiler.kind == "heat" and len(boiler.T) > 10
    # a point halfway along the boiler path: the IF97 state at that (p, h)
    mid = len(boiler.h) // 2
    fw, ms = drawing.points["feedwater"], drawing.points["main_steam"]
    f = mid / (len(boiler.h) - 1)
    ref = IAPWS97(P=(fw.p + f * (ms.p - fw.p)) / 1e6, h=boiler.h[mid] / 1e3)
    assert boiler.T[mid] == pytest.approx(ref.T, abs=0.05)
    assert boiler.s[mid] == pytest.approx(ref.s * 1e3, abs=0.5)


def test_constant_moisture_lines_have_that_moisture() -> None:
    dome = diagram.saturation_dome(30)
    line = diagram.moisture_line(0.12, dome)
    for i in (2, 10, 20):
        ref = IAPWS97(P=float(dome["p"][i]) / 1e6, s=float(line["s"][i]) / 1e3)
        assert ref.x == pytest.approx(0.88, abs=1e-3)
        assert line["h"][i] == pytest.approx(ref.h * 1e3, abs=100)


def test_the_figure_plots_those_coordinates(drawing: Any, design_states: Any, config: Any) -> None:
    reference = diagram.cycle_drawing(config, diagram.ExpectedCycle(config).at(0.75))
    fig = diagram.draw(drawing, reference=reference, limits=(0.10, 0.12))
    ax_ts, ax_hs = fig.axes[:2]
    # the last scatter on each chart is the main cycle's stream states
    main_ts = next(c for c in reversed(ax_ts.collections) if len(c.get_offsets()) == len(drawing.points))
    main_hs = next(c for c in reversed(ax_hs.collections) if len(c.get_offsets()) == len(drawing.points))
    pts = list(drawing.points.values())
    assert np.allclose(np.asarray(main_ts.get_offsets()), [[q.s / 1e3, q.T - 273.15] for q in pts])
    assert np.allclose(np.asarray(main_hs.get_offsets()), [[q.s / 1e3, q.h / 1e3] for q in pts])
    labels = {line.get_label() for line in ax_ts.get_lines()}
    assert {"10 % moisture (warning)", "12 % moisture (alarm)", "saturation (IF97)", "expected", "reconciled"} <= labels
    # the uncertainty bar of the main-steam temperature: ± 1.5 K around its state
    bars = [c for c in ax_ts.collections if type(c).__name__ == "LineCollection"]
    segs = [s for c in bars for s in c.get_segments()]
    ms = drawing.points["main_steam"]
    assert any(np.allclose(seg, [[ms.s / 1e3, ms.T - 273.15 - 1.5], [ms.s / 1e3, ms.T - 273.15 + 1.5]]) for seg in segs)


@pytest.mark.parametrize("suffix", ["png", "svg"])
def test_twin_diagram_writes_the_file(tmp_path: Path, suffix: str, capsys: Any) -> None:
    out = tmp_path / f"cycle.{suffix}"
    assert main(["diagram", str(DEMO), "--load", "0.75", "-o", str(out)]) == 0
    data = out.read_bytes()
    assert data.startswith(b"\x89PNG") if suffix == "png" else b"<svg" in data[:500]
    assert "54 stream states" in capsys.readouterr().out


def test_twin_diagram_from_values_reconciles_first(tmp_path: Path) -> None:
    out = tmp_path / "rec.svg"
    assert main(["diagram", str(DEMO), str(VALUES), "-o", str(out)]) == 0
    svg = out.read_text(encoding="utf-8")
    assert "reconciled" in svg and "expected at load" in svg


def test_twin_diagram_bad_output_name_is_one_line(tmp_path: Path, capsys: Any) -> None:
    assert main(["diagram", str(DEMO), "-o", str(tmp_path / "x.jpg")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "expected a file name ending in .png or .svg" in err


def _get(url: str) -> tuple[int, bytes, str]:
    try:
        with urllib.request.urlopen(url, timeout=60) as r:
            return r.status, r.read(), r.headers.get("Content-Type", "")
    except urllib.error.HTTPError as e:
        return e.code, e.read(), e.headers.get("Content-Type", "")


def test_diagram_route_beside_metrics() -> None:
    # a result as the daemon holds it: streams from the simulator's forward model (truth)
    config = demo_config()
    truth = plant_truth()
    latest: list[Any] = [None]
    service = diagram.DiagramService(config, lambda: latest[0])

    def route() -> tuple[bytes, str] | None:
        body = service.svg()
        return (body, "image/svg+xml") if body is not None else None

    server = MetricsServer(lambda: latest[0], port=0, routes={"/diagram.svg": route})
    server.start()
    try:
        base = f"http://127.0.0.1:{server.port}"
        status, body, _ = _get(base + "/diagram.svg")
        assert status == 503 and b"not available" in body  # no window yet
        latest[0] = truth.result(config) if hasattr(truth, "result") else _result_from_truth(config, truth)
        status, body, ctype = _get(base + "/diagram.svg")
        assert status == 200 and ctype == "image/svg+xml" and b"<svg" in body[:500]
        status, body, _ = _get(base + "/metrics")
        assert status == 200 and b"twin_cycle_result_available" in body
    finally:
        server.stop()


def _result_from_truth(config: Any, truth: Any) -> Any:
    from twin.result import CycleResult, Estimate, StreamState

    states = diagram.ExpectedCycle(config).design()
    streams = {sid: StreamState(pressure=p, enthalpy=h) for sid, (p, h) in states.items()}
    return CycleResult(unit_id=config.unit.id, window_start=1.7e9 - 30, window_end=1.7e9,
                       reconcile_status="converged", streams=streams,
                       kpis={"load_fraction": Estimate(1.0, 0.01, True)})


def test_nan_streams_are_left_out(config: Any, design_states: Any) -> None:
    states = dict(design_states)
    states["hotwell"] = (math.nan, math.nan)
    d = diagram.cycle_drawing(config, states)
    assert "hotwell" not in d.points
    assert not any(p.equipment == "condensate_pump" for p in d.paths)
