"""Heat-rate bases at the demo-u1 design point, each recomputed from the forward state's own terms.

Definitions: DOMAIN.md §1–2 — turbine-cycle gross Q / P_gen; ASME PTC 6 net turbine heat
rate Q / (P_gen − P_feed pump) for a motor-driven feed pump [memory]; plant heat rate =
turbine heat rate / boiler efficiency; net plant heat rate = (Q / η_boiler) / (P_gen − P_aux).
"""

from __future__ import annotations

import pytest

from tests.model_helpers import demo_config, demo_design
from twin.model.flow import Boiler, Reheater
from twin.performance.kpi import (
    CyclePerformanceSettings,
    cycle_kpis,
    evaluate_kpis,
    kpi_definitions,
)


def test_heat_rate_bases_at_design() -> None:
    cfg = demo_config()
    fs, _, design = demo_design()
    settings = CyclePerformanceSettings.from_config(cfg)
    assert settings.feed_pumps == ("feed_pump",)  # the pump whose discharge follows the throttle pressure
    ctx = design.context()
    k = evaluate_kpis(kpi_definitions(fs, settings), ctx)
    q = sum(e.duty(ctx) for e in fs.equipment if isinstance(e, Boiler | Reheater))
    p_gen = float(ctx.z[fs.layout.extra("generator.power")])
    p_fp = float(ctx.z[fs.layout.extra("feed_pump.power")])
    p_cp = float(ctx.z[fs.layout.extra("condensate_pump.power")])
    p_aux = 6e6 + 8e6 * 1.0 + p_fp + p_cp  # demo-u1 plant file: 6 MW + 8 MW × load, plus the pump drives
    eta_b = 0.885  # demo-u1 plant file, boiler efficiency (HHV) at full load
    assert k["turbine_heat_rate"] == pytest.approx(q / p_gen, rel=1e-12)
    assert k["turbine_net_heat_rate"] == pytest.approx(q / (p_gen - p_fp), rel=1e-12)
    assert k["plant_heat_rate"] == pytest.approx(q / p_gen / eta_b, rel=1e-9)
    assert k["net_plant_heat_rate"] == pytest.approx(q / eta_b / (p_gen - p_aux), rel=1e-9)
    # orders of magnitude [memory]: a 16 MPa / 540 °C reheat unit, turbine cycle ≈ 7600–8200 kJ/kWh
    assert 7600 < 3600 * k["turbine_heat_rate"] < 8200
    assert k["turbine_heat_rate"] < k["turbine_net_heat_rate"] < k["plant_heat_rate"] < k["net_plant_heat_rate"]
    # the forward report is built from the same definitions
    report = cycle_kpis(fs, ctx, settings)
    for name in ("turbine_heat_rate", "turbine_net_heat_rate", "plant_heat_rate", "net_plant_heat_rate"):
        assert report[name] == k[name]
        assert report[f"{name}_kj_per_kwh"] == pytest.approx(3600 * k[name], rel=1e-15)
    assert report["feed_pump_power"] == p_fp


def test_a_turbine_driven_feed_pump_is_not_deducted(tmp_path) -> None:
    from tests.model_helpers import DEMO, config_from_text

    text = DEMO.read_text().replace('pressure_control = "sliding"',
                                    'pressure_control = "sliding"\nmotor_driven_feed_pumps = []')
    cfg = config_from_text(tmp_path, text)
    fs, _, design = demo_design()
    k = evaluate_kpis(kpi_definitions(fs, CyclePerformanceSettings.from_config(cfg)), design.context())
    assert k["turbine_net_heat_rate"] == k["turbine_heat_rate"]


def test_a_feed_pump_that_is_no_pump_is_a_one_line_error(tmp_path) -> None:
    from tests.model_helpers import DEMO
    from twin.config import ConfigError, load_config

    path = tmp_path / "plant.toml"
    path.write_text(DEMO.read_text().replace('pressure_control = "sliding"',
                                             'pressure_control = "sliding"\nmotor_driven_feed_pumps = ["boiler"]'))
    with pytest.raises(ConfigError) as exc:
        load_config(path)
    assert "performance.motor_driven_feed_pumps" in str(exc.value) and "expected the id of a pump" in str(exc.value)
