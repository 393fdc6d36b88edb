"""Sensor truth from the forward model, VDI 2048 noise, engineering-unit conversion."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from iapws import IAPWS97

from twin.config import load_config
from twin.demo.plant import noisy_readings, sensor_truth, to_engineering
from twin.model.flowsheet import Flowsheet
from twin.model.solve import Operation, solve_design, solve_off_design

CONFIG = Path(__file__).resolve().parents[1] / "configs" / "demo-u1.toml"


@pytest.fixture(scope="module")
def config():
    return load_config(CONFIG)


@pytest.fixture(scope="module")
def design_point(config):
    fs = Flowsheet.from_config(config)
    op = Operation.from_config(config)
    design = solve_design(fs, op)
    return solve_off_design(fs, op, design, 1.0)


def test_truth_at_the_design_point_is_the_forward_model(config, design_point):
    hb = design_point
    truth = sensor_truth(config, hb)
    assert set(truth) == {s.tag for s in config.sensors}
    ctx = hb.context()
    fs = hb.flowsheet
    # the design inputs of demo-u1 (shared/DOMAIN.md §7): 295 kg/s, 16.2 MPa, 541 °C at the stop valve
    assert truth["HP-MS-F1"] == pytest.approx(295.0, rel=1e-9)
    assert truth["HP-MS-P1"] == pytest.approx(16.2e6, rel=1e-9)
    assert truth["HP-MS-T1"] == pytest.approx(541.0 + 273.15, abs=1e-6)
    assert truth["CD-BP1"] == pytest.approx(6.2e3, rel=1e-9)  # condenser 6.2 kPa at design
    assert truth["GEN-MW1"] == float(hb.z[fs.layout.extra("generator.power")])
    assert truth["FP-MW1"] == float(hb.z[fs.layout.extra("feed_pump.power")])
    assert truth["CP-KW1"] == float(hb.z[fs.layout.extra("condensate_pump.power")])
    # stream temperatures from (p, h) agree with the iapws package (IAPWS-IF97, independent code)
    for tag, stream in (("FW-T1", "feedwater"), ("RH-CRH-T1", "cold_reheat"), ("DA-T1", "da_outlet")):
        ref = IAPWS97(P=ctx.p(stream) / 1e6, h=ctx.h(stream) / 1e3).T  # iapws: MPa, kJ/kg → K
        assert truth[tag] == pytest.approx(ref, abs=0.02), tag
    # cooling water at design: 20 °C inlet, 9.5 K rise (shared/DOMAIN.md §7)
    assert truth["CW-IN-T1"] == pytest.approx(293.15, abs=1e-9)
    assert truth["CW-OUT-T1"] - truth["CW-IN-T1"] == pytest.approx(9.5, abs=1e-6)
    assert truth["AMB-PB1"] == 101_325.0  # standard atmosphere (ISO 2533)


def test_noise_has_the_vdi2048_standard_deviation(config, design_point):
    truth = sensor_truth(config, design_point)
    n = 20_000
    draws = noisy_readings(truth, config, np.random.default_rng(2048), size=n)
    sensors = config.sensors_by_tag
    for tag, x in truth.items():
        sigma = sensors[tag].sigma_si(x)  # VDI 2048: σ = U95 / 1.96
        y = draws[tag]
        # sample std of N normal draws: relative standard error 1/sqrt(2N) = 0.5 %; 5 % is 10 SE
        assert np.std(y, ddof=1) == pytest.approx(sigma, rel=0.05), tag
        assert abs(np.mean(y) - x) <= 5 * sigma / np.sqrt(n), tag  # unbiased without a bias (σ = 0 at zero flow)
    # hand check of one σ: FW-F1 ±0.7 % of reading at 95 % → σ = 0.007 m / 1.96
    assert sensors["FW-F1"].sigma_si(truth["FW-F1"]) == pytest.approx(0.007 * truth["FW-F1"] / 1.96)


def test_bias_shifts_the_mean_and_single_draws_are_floats(config, design_point):
    truth = sensor_truth(config, design_point)
    bias = {"FW-F1": 0.03 * truth["FW-F1"]}
    draws = noisy_readings(truth, config, np.random.default_rng(7), bias=bias, size=10_000)
    sigma = config.sensors_by_tag["FW-F1"].sigma_si(truth["FW-F1"])
    assert abs(np.mean(draws["FW-F1"]) - 1.03 * truth["FW-F1"]) < 5 * sigma / 100.0  # 5 SE
    one = noisy_readings(truth, config, np.random.default_rng(7))
    assert all(isinstance(v, float) for v in one.values())
    with pytest.raises(ValueError, match="NOPE"):
        noisy_readings(truth, config, np.random.default_rng(7), bias={"NOPE": 1.0})


def test_engineering_units_round_trip(config):
    s = config.sensors_by_tag
    # gauge: 16.2 MPa absolute with 101.325 kPa ambient → 16.098675 MPa(g) (hand arithmetic)
    assert to_engineering(config, "HP-MS-P1", 16.2e6) == pytest.approx(16.098675, abs=1e-12)
    assert to_engineering(config, "HP-MS-P2", 16.2e6) == pytest.approx(160.98675, abs=1e-10)  # bar(g)
    # another barometric pressure moves a gauge reading by the difference
    assert to_engineering(config, "HP-MS-P1", 16.2e6, barometric_pressure=95_000.0) == pytest.approx(16.105, abs=1e-12)
    # absolute kPa ignores the barometer; °C = K − 273.15 (ITS-90 definition)
    assert to_engineering(config, "CD-BP1", 6200.0, barometric_pressure=95_000.0) == pytest.approx(6.2)
    assert to_engineering(config, "HP-MS-T1", 814.15) == pytest.approx(541.0, abs=1e-12)
    assert to_engineering(config, "CD-BP3", 6200.0) == pytest.approx(62.0)  # mbar
    assert to_engineering(config, "FW-F1", 295.0) == pytest.approx(295.0 * 3.6)  # t/h
    for tag, v in (("HP-MS-P1", 16.2e6), ("DA-ST-P1", 6.1e5), ("HP-MS-T1", 814.15), ("FW-F1", 290.0)):
        assert s[tag].conversion.to_si(to_engineering(config, tag, v)) == pytest.approx(v, rel=1e-12)
    with pytest.raises(ValueError, match="unknown sensor tag"):
        to_engineering(config, "NOPE", 1.0)
