"""``twin check`` fails at the door, in one line per problem: topics, referenced files."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from tests.test_daemon_e2e import replace_section
from twin.cli import main
from twin.config.checks import MAX_TOPIC_BYTES, topic_problem

DEMO = Path(__file__).resolve().parent.parent / "configs" / "demo-u1.toml"
FIRST_TOPIC = 'topic = "plant/demo-u1/hp/hp-ms-p1"'


def _check(tmp_path: Path, text: str, capsys: pytest.CaptureFixture[str]) -> tuple[int, list[str]]:
    path = tmp_path / "plant.toml"
    path.write_text(text, encoding="utf-8")
    rc = main(["check", "--summary-only", str(path)])
    return rc, capsys.readouterr().err.splitlines()


@pytest.mark.parametrize(("topic", "why"), [
    ("plant/demo-u1/hp\\u0000x", "contains U+0000"),  # TOML escape: a real NUL in the topic
    ("plant/+/hp", "wildcard"),
    ("plant/#", "wildcard"),
    ("plant/\\u0007bell", "control character U+0007"),
    ("", "empty"),
])
def test_invalid_sensor_topics_are_refused_in_one_line(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                                       topic: str, why: str) -> None:
    text = DEMO.read_text(encoding="utf-8").replace(FIRST_TOPIC, f'topic = "{topic}"', 1)
    rc, err = _check(tmp_path, text, capsys)
    assert rc == 1
    assert len(err) == 1, err
    assert "sensors[HP-MS-P1].topic" in err[0] and why in err[0] and "expected an MQTT topic name" in err[0]


def test_topic_length_limit_is_in_utf8_bytes() -> None:
    # MQTT 3.1.1 section 1.5.3: a UTF-8 string is at most 65 535 bytes
    assert topic_problem("a" * MAX_TOPIC_BYTES) is None
    assert "65536 bytes" in (topic_problem("a" * (MAX_TOPIC_BYTES + 1)) or "")
    assert "bytes" in (topic_problem("é" * (MAX_TOPIC_BYTES // 2 + 1)) or "")  # 2 bytes each
    assert topic_problem("plant/ünit/°C") is None


def test_republish_prefix_with_a_wildcard_is_refused(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    text = DEMO.read_text(encoding="utf-8").replace('republish_prefix = "twin/demo-u1"',
                                                    'republish_prefix = "twin/+"', 1)
    rc, err = _check(tmp_path, text, capsys)
    assert rc == 1 and len(err) == 1 and "broker.republish_prefix" in err[0], err


@pytest.mark.parametrize("key", ["ca_file", "cert_file", "password_file"])
def test_missing_referenced_files_are_named(tmp_path: Path, capsys: pytest.CaptureFixture[str], key: str) -> None:
    real = tmp_path / "real.pem"
    real.write_text("x")
    files = {"ca_file": real, "cert_file": real, "key_file": real, "password_file": real}
    files[key] = tmp_path / "nope.crt"
    broker = (f'host = "127.0.0.1"\nport = 8883\nusername = "twin"\npassword_file = "{files["password_file"]}"\n'
              f'tls = {{ ca_file = "{files["ca_file"]}", cert_file = "{files["cert_file"]}", '
              f'key_file = "{files["key_file"]}" }}\n')
    text = replace_section(DEMO.read_text(encoding="utf-8"), "broker", broker)
    rc, err = _check(tmp_path, text, capsys)
    assert rc == 1 and len(err) == 1, err
    section = "broker" if key == "password_file" else "broker.tls"
    assert f"{section}.{key}" in err[0] and "nope.crt" in err[0] and "No such file or directory" in err[0]


@pytest.mark.skipif(os.geteuid() == 0, reason="root reads any file")
def test_unreadable_metrics_key_is_named(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    key = tmp_path / "metrics.key"
    key.write_text("x")
    key.chmod(0)
    text = replace_section(DEMO.read_text(encoding="utf-8"), "metrics",
                           f'address = "127.0.0.1"\nport = 9108\ntls = {{ cert_file = "{key}", key_file = "{key}" }}\n')
    rc, err = _check(tmp_path, text, capsys)
    assert rc == 1 and "metrics.tls.cert_file" in err[0] and "Permission denied" in err[0]


def test_a_directory_is_not_a_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    text = replace_section(DEMO.read_text(encoding="utf-8"), "broker",
                           f'host = "127.0.0.1"\ntls = {{ ca_file = "{tmp_path}" }}\n')
    rc, err = _check(tmp_path, text, capsys)
    assert rc == 1 and "broker.tls.ca_file" in err[0] and "is a directory" in err[0]


def test_empty_values_file_is_one_line_and_exit_1(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    empty = tmp_path / "values.csv"
    empty.write_text("")
    assert main(["reconcile", str(DEMO), str(empty)]) == 1
    err = capsys.readouterr().err.splitlines()
    assert len(err) == 1 and str(empty) in err[0] and "no tag values" in err[0]


def test_unreadable_values_lines_are_named_and_exit_1(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from twin.config import load_config

    lines = (DEMO.parent / "demo-u1-values.csv").read_text(encoding="utf-8").splitlines()
    row = next(i for i, ln in enumerate(lines) if ln.startswith("HP-MS-P1,"))
    lines[row] = "HP-MS-P1,1_000"  # a digit separator: float() would take it, the strict reader does not
    bad = tmp_path / "values.csv"
    bad.write_text("\n".join(lines) + "\n", encoding="utf-8")
    assert main(["reconcile", str(DEMO), str(bad)]) == 1
    unit = load_config(DEMO).sensors_by_tag["HP-MS-P1"].unit
    err = capsys.readouterr().err.splitlines()
    assert err == [f"{bad}:{row + 1}: tag 'HP-MS-P1' value '1_000' is not a number; expected a number in {unit}"]


@pytest.mark.parametrize(("old", "new", "key"), [
    ('cycle = "10 s"', "cycle = 10", "monitoring.cycle"),
    ('keepalive = "60 s"', "keepalive = 60", "broker.keepalive"),
    ('keepalive = "60 s"', 'keepalive = "60"', "broker.keepalive"),  # a number in a string, still no unit
])
def test_bare_numbers_on_dimensional_keys_are_refused_with_the_key_and_an_example(
        tmp_path: Path, capsys: pytest.CaptureFixture[str], old: str, new: str, key: str) -> None:
    text = DEMO.read_text(encoding="utf-8")
    assert old in text
    rc, err = _check(tmp_path, text.replace(old, new, 1), capsys)
    assert rc == 1 and len(err) == 1, err
    assert f": {key}: " in err[0] and "has no unit" in err[0] and "'30 s'" in err[0]


def test_a_bare_pressure_in_stream_design_is_refused(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    import re

    text = DEMO.read_text(encoding="utf-8")
    m = re.search(r'pressure = "([0-9.]+) MPa"', text)
    assert m
    rc, err = _check(tmp_path, text.replace(m.group(0), f"pressure = {m.group(1)}", 1), capsys)
    assert rc == 1 and len(err) == 1, err
    assert "no unit" in err[0] and "'16.2 MPa'" in err[0] and ".design.pressure" in err[0]
