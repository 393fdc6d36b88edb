"""Plant-unit conversions against published conversion factors."""

from __future__ import annotations

import math

import pytest

from twin.units import Conversion, conversion, parse_quantity, split_quantity, units_for


@pytest.mark.parametrize(
    ("text", "dimension", "expected", "rel"),
    [
        # NIST SP 811 (2008) Appendix B.8: psi (lbf/in²) = 6.894 757 E+03 Pa (7 digits printed)
        ("1 psi", "pressure", 6.894757e3, 1e-7),
        ("1 psia", "pressure", 6.894757e3, 1e-7),
        # SI Brochure (BIPM 2019) Table 8: 1 bar = 1e5 Pa exactly
        ("1 bar", "pressure", 1e5, 0.0),
        ("16.2 MPa", "pressure", 16.2e6, 1e-15),
        ("101.325 kPa", "pressure", 101325.0, 1e-15),
        ("62 mbar", "pressure", 6200.0, 1e-15),
        # NIST SP 811 (2008) B.8: pound per hour = 1.259 979 E-04 kg/s
        ("1 lb/h", "mass_flow", 1.259979e-4, 1e-6),
        # 1 t = 1000 kg, 1 h = 3600 s (SI Brochure Table 8, exact)
        ("1062 t/h", "mass_flow", 1062.0 / 3.6, 1e-15),
        ("3600 kg/h", "mass_flow", 1.0, 1e-15),
        ("295 kg/s", "mass_flow", 295.0, 0.0),
        ("6 MW", "power", 6e6, 0.0),
        ("850 kW", "power", 850e3, 0.0),
        ("3400 kJ/kg", "specific_enthalpy", 3.4e6, 1e-15),
        # NIST SP 811 (2008) B.8: Btu_IT/lb = 2.326 E+03 J/kg exactly
        ("1 Btu/lb", "specific_enthalpy", 2326.0, 0.0),
        ("4.18 kJ/(kg K)", "specific_heat", 4180.0, 1e-15),
        ("4180 J/kg/K", "specific_heat", 4180.0, 0.0),
        ("4180 J/(kg·K)", "specific_heat", 4180.0, 0.0),
        ("20 m2", "area", 20.0, 0.0),
        ("20 m²", "area", 20.0, 0.0),
        ("120 m/s", "velocity", 120.0, 0.0),
        ("85 %", "ratio", 0.85, 1e-15),
        ("0.85 -", "ratio", 0.85, 0.0),
        ("30 s", "duration", 30.0, 0.0),
        ("250 ms", "duration", 0.25, 1e-15),
        ("2 min", "duration", 120.0, 0.0),
        ("1 h", "duration", 3600.0, 0.0),
    ],
)
def test_factor_matches_published_value(text, dimension, expected, rel):
    assert parse_quantity(text, dimension) == pytest.approx(expected, rel=rel, abs=0.0)


@pytest.mark.parametrize("spelling", ["degC", "°C", "C", "deg C"])
def test_celsius_spellings(spelling):
    # SI Brochure (BIPM 2019) 2.3.1: t/°C = T/K - 273.15 (exact)
    assert parse_quantity(f"541 {spelling}", "temperature") == pytest.approx(814.15, abs=1e-12)


def test_fahrenheit_fixed_points():
    # NIST SP 811 (2008) B.8: T/K = (t/°F + 459.67)/1.8 -> 32 °F = 273.15 K, 212 °F = 373.15 K
    assert parse_quantity("32 degF", "temperature") == pytest.approx(273.15, abs=1e-12)
    assert parse_quantity("212 °F", "temperature") == pytest.approx(373.15, abs=1e-12)
    # NIST SP 811 (2008) B.8: a temperature interval of 1 °F = 5/9 K
    assert parse_quantity("9 degF", "temperature_difference") == pytest.approx(5.0, abs=1e-12)


def test_temperature_difference_has_no_offset():
    # A difference in °C equals the same difference in K (SI Brochure 2.3.1)
    assert parse_quantity("-1.7 K", "temperature_difference") == -1.7
    assert parse_quantity("5.6 degC", "temperature_difference") == 5.6
    assert conversion("°C", "temperature_difference") == Conversion(1.0, 0.0, False)


@pytest.mark.parametrize(
    ("unit", "reading", "expected"),
    [
        ("bar(g)", 161.0, 161.0e5 + 98000.0),
        ("barg", 161.0, 161.0e5 + 98000.0),
        ("kPa(g)", 540.0, 540e3 + 98000.0),
        ("MPa(g)", 16.1, 16.1e6 + 98000.0),
        # NIST SP 811 (2008) B.8 psi factor, plus the barometric pressure
        ("psig", 100.0, 100.0 * 6.894757e3 + 98000.0),
    ],
)
def test_gauge_adds_barometric_pressure(unit, reading, expected):
    # absolute = gauge + barometric (definition of gauge pressure)
    conv = conversion(unit, "pressure", barometric_pressure=98000.0)
    assert conv.gauge
    assert conv.to_si(reading) == pytest.approx(expected, rel=1e-7)
    assert conv.from_si(conv.to_si(reading)) == pytest.approx(reading, rel=1e-12)


def test_gauge_without_barometric_pressure_is_an_error():
    with pytest.raises(ValueError, match=r"gauge unit 'bar\(g\)' needs a barometric pressure"):
        conversion("bar(g)", "pressure")


def test_with_barometric_replaces_the_offset():
    conv = conversion("kPa(g)", "pressure", barometric_pressure=101325.0).with_barometric(95000.0)
    assert conv.to_si(0.0) == 95000.0
    with pytest.raises(ValueError, match="not a gauge"):
        conversion("kPa", "pressure").with_barometric(95000.0)


def test_wrong_dimension_names_unit_dimension_and_valid_set():
    with pytest.raises(ValueError, match=r"unit 'MPa' is a pressure unit, not a temperature unit; "
                       r"expected one of K, degC, degF for temperature"):
        conversion("MPa", "temperature")


def test_unknown_unit_names_valid_set():
    with pytest.raises(ValueError, match=r"unit 'furlong/fortnight' is an unknown unit; expected one "
                       r"of kg/s, kg/h, t/h, lb/h for mass_flow"):
        conversion("furlong/fortnight", "mass_flow")


def test_unknown_dimension():
    with pytest.raises(ValueError, match="unknown dimension 'luminosity'"):
        units_for("luminosity")


def test_gauge_units_are_not_pressure_differences():
    with pytest.raises(ValueError, match="pressure_difference"):
        conversion("bar(g)", "pressure_difference", barometric_pressure=1e5)


def test_split_and_bare_number():
    assert split_quantity(" -1.5e3  kPa ") == (-1500.0, "kPa")
    assert parse_quantity("0.86", "ratio") == 0.86  # no unit: SI
    with pytest.raises(ValueError, match="is not a quantity"):
        parse_quantity("MPa 16", "pressure")


def test_round_trip_is_exact_to_rounding():
    for unit, dim in [("degF", "temperature"), ("t/h", "mass_flow"), ("mbar", "pressure")]:
        conv = conversion(unit, dim)
        for v in (-40.0, 0.0, 12.345, 1e4):
            assert math.isclose(conv.from_si(conv.to_si(v)), v, rel_tol=1e-12, abs_tol=1e-12)
