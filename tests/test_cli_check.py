"""``twin check`` and ``twin schema`` through the CLI dispatch."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from twin.cli import main
from twin.commands import check

DEMO = Path(__file__).resolve().parent.parent / "configs" / "demo-u1.toml"


def test_check_demo_exits_zero_with_summary(capsys):
    assert main(["check", str(DEMO)]) == 0
    out = capsys.readouterr().out
    assert f"{DEMO}: OK" in out
    assert "unit: demo-u1" in out
    assert "streams: 54" in out  # 54 [[streams]] tables in configs/demo-u1.toml
    assert "closed_heater 6" in out and "turbine_group 8" in out
    assert "sensors: 91 (" in out and "power 4" in out
    assert "broker: 127.0.0.1:1883 MQTT 3.1.1" in out
    assert "metrics: http://127.0.0.1:9108/metrics" in out


def test_check_bad_file_prints_one_line_per_problem(tmp_path, capsys):
    text = DEMO.read_text(encoding="utf-8")
    text = text.replace('kind = "turbine_group"\nports = { inlet = "hp_inlet"',
                        'kind = "turbine"\nports = { inlet = "hp_inlet"', 1)
    text = text.replace('unit = "t/h"', 'unit = "gal/min"', 1)
    bad = tmp_path / "bad.toml"
    bad.write_text(text, encoding="utf-8")
    assert main(["check", str(bad)]) == 1
    captured = capsys.readouterr()
    assert captured.out == ""
    lines = captured.err.splitlines()
    assert any(x.startswith(f"{bad}: equipment[hp].kind: unknown equipment kind 'turbine'; expected one of")
               for x in lines)
    assert any(x.startswith(f"{bad}: sensors[HP-MS-F1].unit: unit 'gal/min' is an unknown unit")
               for x in lines)


def test_check_toml_syntax_error(tmp_path, capsys):
    bad = tmp_path / "syntax.toml"
    bad.write_text('[unit]\nid = "x"\n\n[[streams]\n', encoding="utf-8")
    assert main(["check", str(bad)]) == 1
    assert capsys.readouterr().err.startswith(f"{bad}:4:")


def test_check_missing_file_exits_two(tmp_path, capsys):
    assert main(["check", str(tmp_path / "absent.toml")]) == 2
    assert "cannot read" in capsys.readouterr().err


def test_report_sections_can_be_appended(monkeypatch, capsys):
    # another report (e.g. redundancy) is one function appended to check.REPORTS
    monkeypatch.setattr(check, "REPORTS", [*check.REPORTS, lambda cfg: [f"extra: {len(cfg.sensors)}"]])
    assert main(["check", str(DEMO)]) == 0
    assert capsys.readouterr().out.rstrip().endswith("extra: 91")


def test_schema_prints_valid_json(capsys):
    assert main(["schema"]) == 0
    schema = json.loads(capsys.readouterr().out)
    assert schema["type"] == "object"
    assert "sensors" in schema["properties"]


@pytest.mark.slow
def test_twin_check_as_a_process():
    proc = subprocess.run([sys.executable, "-m", "twin.cli", "check", str(DEMO)],
                          capture_output=True, text=True, check=False)
    assert proc.returncode == 0, proc.stderr
    assert "unit: demo-u1" in proc.stdout
