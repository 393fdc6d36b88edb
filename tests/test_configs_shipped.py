"""Every shipped plant file in configs/: passes ``twin check``, solves the heat balance, obeys physics."""

from __future__ import annotations

import contextlib
import io
import json
from pathlib import Path

import pytest

from twin.cli import main
from twin.config import load_config

CONFIGS = sorted((Path(__file__).resolve().parent.parent / "configs").glob("*.toml"))


def _run(argv: list[str]) -> tuple[int, str]:
    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        rc = main(argv)
    return rc, buf.getvalue()


def test_both_examples_are_shipped():
    assert {p.name for p in CONFIGS} >= {"demo-u1.toml", "example-small.toml"}


@pytest.mark.parametrize("path", CONFIGS, ids=lambda p: p.name)
def test_twin_check_passes_with_redundancy_report(path):
    rc, out = _run(["check", str(path)])
    assert rc == 0
    assert f"{path}: OK" in out
    assert "redundancy at the design point:" in out and "expected KPI uncertainty" in out


@pytest.mark.parametrize("path", CONFIGS, ids=lambda p: p.name)
def test_heat_balance_solves_and_obeys_physics(path):
    from iapws import IAPWS97

    cfg = load_config(path)
    rc, out = _run(["heat-balance", str(path), "--json"])
    assert rc == 0
    r = json.loads(out)
    ms = r["streams"][cfg.performance.load_stream]
    # main-steam enthalpy from (p, T) agrees with the independent iapws package (IAPWS-IF97)
    ref = IAPWS97(P=ms["pressure_pascals"] / 1e6, T=ms["temperature_kelvin"])
    assert ms["enthalpy_joules_per_kilogram"] == pytest.approx(ref.h * 1e3, abs=50.0)
    # second law: the cycle cannot beat Carnot between main steam and the cooling water
    cond = next(e for e in cfg.equipment if e.kind == "condenser")
    t_cold = cond.params["cooling_water_inlet_temperature"]
    carnot = 1.0 - t_cold / ms["temperature_kelvin"]
    assert 0.2 < r["gross_efficiency"] < carnot
    # first law over the whole cycle: heat in = gross shaft work + condenser duty + losses, within 1 %
    losses = r["equipment"]["generator"]["shaft_power_watts"] - r["gross_power_watts"]
    pumps = sum(v.get("power_watts", 0.0) for k, v in r["equipment"].items()
                if next(e for e in cfg.equipment if e.id == k).kind == "pump")
    condenser = sum(c["duty_watts"] for c in r["condensers"].values())
    lhs = r["heat_input_watts"] + pumps * 1.0
    rhs = r["gross_power_watts"] + losses + condenser
    assert lhs == pytest.approx(rhs, rel=0.01)


def test_small_example_is_a_non_reheat_unit_with_two_heaters():
    cfg = load_config(CONFIGS[0].parent / "example-small.toml")
    kinds = [e.kind for e in cfg.equipment]
    assert "reheater" not in kinds
    assert kinds.count("closed_heater") + kinds.count("open_heater") == 2


GUIDE = CONFIGS[0].parent.parent / "docs" / "plant-file.md"


def test_guide_documents_every_kind_and_parameter():
    from twin.kinds import KINDS, MEASURED_QUANTITIES

    text = GUIDE.read_text(encoding="utf-8")
    for kind in KINDS.values():
        assert f"### `{kind.name}`" in text, kind.name
        for p in kind.params:
            assert f"| `{p.name}` |" in text, (kind.name, p.name)
    for q in MEASURED_QUANTITIES:
        assert f"`{q}`" in text, q


def test_guide_redundancy_example_is_what_twin_check_prints():
    text = GUIDE.read_text(encoding="utf-8")
    block = text.split("```text\n", 1)[1].split("```", 1)[0]
    rc, out = _run(["check", str(CONFIGS[0].parent / "example-small.toml")])
    assert rc == 0
    printed = set(out.splitlines())
    for line in block.splitlines():
        if line.strip() == "..." or "(...)" in line:
            continue
        assert line in printed, line
