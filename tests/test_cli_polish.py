"""Command-line conventions: --version, help style, no negative zeros, JSON key units."""

from __future__ import annotations

import argparse
import json
import math
import re
from pathlib import Path

import pytest

import twin
from twin.cli import COMMANDS, build_parser, main
from twin.commands._text import no_negative_zero
from twin.performance.redundancy import (
    PRACTICAL_MDB_SIGMA,
    RedundancyReport,
    TagRedundancy,
    report_lines,
)

DEMO = Path(__file__).resolve().parent.parent / "configs" / "demo-u1.toml"


def test_version(capsys):
    with pytest.raises(SystemExit) as e:
        main(["--version"])
    assert e.value.code == 0
    assert capsys.readouterr().out.strip() == f"twin {twin.__version__}"


def _subparsers(parser: argparse.ArgumentParser):
    for a in parser._actions:
        if isinstance(a, argparse._SubParsersAction):
            for name, p in a.choices.items():
                yield name, p
                yield from _subparsers(p)


def test_help_style_is_uniform():
    parser = build_parser()
    seen = dict(_subparsers(parser))
    assert set(COMMANDS) <= set(seen)
    for name, p in seen.items():
        text = p.format_help()
        for a in p._actions:
            if a.nargs == 0 or a.choices is not None or isinstance(a, argparse._SubParsersAction):
                continue
            # one metavar style: upper case
            assert a.metavar is not None and a.metavar == a.metavar.upper(), (name, a.dest, a.metavar)
            if a.option_strings and a.default not in (None, False) and a.help:
                assert "default" in (a.help or "") or f"(default: {a.default})" in " ".join(text.split()), (name, a.dest)
        assert "(default " not in " ".join(text.split()), name  # one way of writing defaults


@pytest.mark.parametrize(("raw", "clean"), [
    ("dev -0 kJ/kWh", "dev  0 kJ/kWh"),
    ("x=-0.00, y=-0.001, z=-10.0", "x=0.00, y=-0.001, z=-10.0"),
    ("  -0.0 %", "   0.0 %"),
    ("(-0.000)", "(0.000)"),
    ("1e-05 and -0e5 and 2-0", "1e-05 and -0e5 and 2-0"),
    ("tag HP-0 ok", "tag HP-0 ok"),
])
def test_no_negative_zero(raw, clean):
    assert no_negative_zero(raw) == clean


def test_never_instead_of_a_huge_detectable_bias():
    tags = (TagRedundancy("A", "degC", 0.5, 0.2, 6.6, 1.32),
            TagRedundancy("B", "degC", 1e-6, 0.5, PRACTICAL_MDB_SIGMA * 30, 1500.0),
            TagRedundancy("C", "degC", 0.0, 0.5, math.inf, math.inf))
    lines = report_lines(RedundancyReport("converged", 3, 2.39, tags, ()))
    row = {ln.split()[0]: ln for ln in lines if ln.startswith("  ") and ln.split()[0] in "ABC"}
    assert row["A"].split()[-1] == "1.32"
    assert row["B"].split()[-1] == "never" and row["C"].split()[-1] == "never"
    assert "1500" not in row["B"]
    assert any("not checkable" in ln and "B, C" in ln for ln in lines)


_UNIT_WORDS = ("watts", "kilograms_per_second", "joules_per_kilogram", "pascals", "kelvin",
               "kilojoules_per_kilowatt_hour", "btu_per_kilowatt_hour", "watts_per_kelvin",
               "watts_per_square_metre_kelvin")
_RATIOS = {"gross_efficiency", "net_efficiency", "turbine_heat_rate", "boiler_efficiency", "load_fraction",
           "exhaust_moisture_elep", "exhaust_quality_elep", "exhaust_moisture_ueep", "exhaust_quality_ueep",
           "quality", "cleanliness"}


def _keys(d, out):
    for k, v in d.items():
        out.append(k)
        if isinstance(v, dict):
            _keys(v, out)
    return out


@pytest.fixture(scope="module")
def hb_json():
    import contextlib
    import io

    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        assert main(["heat-balance", str(DEMO), "--json"]) == 0
    return json.loads(buf.getvalue())


def test_heat_balance_json_keys_name_their_unit(hb_json):
    r = hb_json
    structural = {"unit_id", "formulation", "pressure_mode", "fuel_basis", "section_efficiency", "heaters", "condensers",
                  "equipment", "streams", "newton_iterations", "newton_iterations_design",
                  "newton_iterations_operating_point"}
    ids = set(r["streams"]) | set(r["heaters"]) | set(r["condensers"]) | set(r["equipment"]) | set(r["section_efficiency"])
    ids |= set(r["extraction_flow_kilograms_per_second"])
    for k in _keys(r, []):
        if k in structural or k in ids or k in _RATIOS:
            continue
        assert any(k.endswith("_" + w) for w in _UNIT_WORDS), k
        assert not re.search(r"_(kg_per_s|kj_per_kwh|btu_per_kwh)$", k), k
    # SI values: the temperature in kelvin, the pressure in pascals (demo-u1: 16.2 MPa throttle, 541 degC)
    ms = r["streams"]["main_steam"] if "main_steam" in r["streams"] else next(iter(r["streams"].values()))
    assert ms["temperature_kelvin"] > 273.15 and ms["pressure_pascals"] > 1e5


def test_newton_iterations_count_the_solves(hb_json):
    # At the design load the operating-point solve starts on the design solution; the count
    # includes the design solve from the cold start (several Newton steps, not 0).
    r = hb_json
    assert r["newton_iterations_design"] >= 2
    assert r["newton_iterations"] == r["newton_iterations_design"] + r["newton_iterations_operating_point"]


def test_heat_balance_text_has_no_negative_zero(capsys):
    assert main(["heat-balance", str(DEMO), "--load", "0.75"]) == 0
    out = capsys.readouterr().out
    assert not re.search(r"(?<![\w.])-0(\.0+)?(?![\d.])", out)
