"""Deployment files: the systemd unit, Grafana provisioning, the Alertmanager example, TLS steps."""

from __future__ import annotations

import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from twin.cli import build_parser

yaml = pytest.importorskip("yaml", reason="PyYAML reads the provisioning and Alertmanager files")

ROOT = Path(__file__).resolve().parents[1]
DEPLOY = ROOT / "deploy"
UNIT = DEPLOY / "systemd" / "twin@.service"
ALERTMANAGER = DEPLOY / "alertmanager" / "alertmanager.yml"
RULES = sorted((DEPLOY / "prometheus" / "rules").glob("*.yml"))
SYSTEMD_ANALYZE = shutil.which("systemd-analyze")
AMTOOL = shutil.which("amtool")


def _directives(text: str) -> dict[str, list[str]]:
    out: dict[str, list[str]] = {}
    for line in text.splitlines():
        if "=" in line and not line.lstrip().startswith(("#", "[")):
            k, v = line.split("=", 1)
            out.setdefault(k.strip(), []).append(v.strip())
    return out


def test_unit_has_the_instance_layout_and_hardening():
    d = _directives(UNIT.read_text(encoding="utf-8"))
    assert d["ExecStart"] == ["/opt/twin/venv/bin/twin run /etc/twin/%i.toml"]
    assert d["EnvironmentFile"] == ["-/etc/twin/%i.env"]
    for key, value in {"Restart": "on-failure", "DynamicUser": "yes", "StateDirectory": "twin",
                       "ProtectSystem": "strict", "ProtectHome": "yes", "PrivateTmp": "yes",
                       "NoNewPrivileges": "yes", "PrivateDevices": "yes", "RestrictSUIDSGID": "yes",
                       "CapabilityBoundingSet": ""}.items():
        assert d.get(key) == [value], key
    # the command line the unit runs is one twin accepts
    args = build_parser().parse_args(d["ExecStart"][0].split()[1:])
    assert args.command == "run" and args.config == "/etc/twin/%i.toml"


@pytest.mark.skipif(SYSTEMD_ANALYZE is None,
                    reason="systemd-analyze is not installed here (no systemd), so the unit cannot be verified")
def test_unit_passes_systemd_analyze_verify(tmp_path: Path):
    # an instance of the template, run by this interpreter (verify checks the executable exists)
    text = UNIT.read_text(encoding="utf-8").replace("/opt/twin/venv/bin/twin", f"{sys.executable} -m twin.cli")
    inst = tmp_path / "twin@demo-u1.service"
    inst.write_text(text, encoding="utf-8")
    out = subprocess.run([SYSTEMD_ANALYZE, "verify", str(inst)], capture_output=True, text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    ours = [ln for ln in out.stderr.splitlines() if "twin@demo-u1" in ln]
    assert not ours, ours
    sec = subprocess.run([SYSTEMD_ANALYZE, "security", "--offline=yes", str(inst)], capture_output=True,
                         text=True, timeout=60)
    if sec.returncode == 0 or "Overall exposure" in sec.stdout:
        m = re.search(r"Overall exposure level for \S+: ([0-9.]+)", sec.stdout)
        assert m and float(m.group(1)) <= 2.0, sec.stdout[-500:]


def test_grafana_provisioning_shape_and_dashboard_path():
    ds = yaml.safe_load((DEPLOY / "grafana/provisioning/datasources/twin-prometheus.yml").read_text())
    assert ds["apiVersion"] == 1
    (prom,) = ds["datasources"]
    assert prom["type"] == "prometheus" and prom["access"] == "proxy" and prom["url"].startswith("http")
    prov = yaml.safe_load((DEPLOY / "grafana/provisioning/dashboards/twin.yml").read_text())
    assert prov["apiVersion"] == 1
    (p,) = prov["providers"]
    assert p["type"] == "file" and p["options"]["path"].startswith("/")
    # the install line in the provider's comment copies a dashboard that exists into that path
    text = (DEPLOY / "grafana/provisioning/dashboards/twin.yml").read_text()
    src, dst = re.search(r"install -D -m 0644 (\S+) (\S+)", text).groups()
    assert (ROOT / src).is_file() and str(Path(dst).parent) == p["options"]["path"]
    # the dashboard chooses a Prometheus data source through its variable, so the provisioned one fits
    import json

    dash = json.loads((ROOT / src).read_text())
    var = next(v for v in dash["templating"]["list"] if v["type"] == "datasource")
    assert var["query"] == prom["type"]


def _alerts() -> list[tuple[str, str, dict[str, str]]]:
    out = []
    for f in RULES:
        for g in yaml.safe_load(f.read_text()).get("groups", []):
            for r in g["rules"]:
                if "alert" in r:
                    out.append((g["name"], r["alert"], {k: str(v) for k, v in r.get("labels", {}).items()}))
    return out


def _expected_receiver(group: str, labels: dict[str, str]) -> str:
    """The routing the example promises (its header comment), by rule group and severity."""
    if group in ("twin-pipeline", "twin-health"):
        return "twin-operations"
    if group == "twin-instruments" or labels.get("severity") == "suspect":
        return "instrument-technicians"
    if labels.get("severity") in ("critical", "alarm"):
        return "performance-engineers-urgent"
    return "performance-engineers"


needs_amtool = pytest.mark.skipif(
    AMTOOL is None, reason="amtool is not installed (apt-get install --no-install-recommends prometheus-alertmanager)")


@needs_amtool
def test_alertmanager_example_passes_amtool_check_config():
    out = subprocess.run([AMTOOL, "check-config", str(ALERTMANAGER)], capture_output=True, text=True, timeout=60)
    assert out.returncode == 0 and "SUCCESS" in out.stdout, out.stdout + out.stderr


@needs_amtool
def test_every_shipped_alert_reaches_its_receiver():
    alerts = _alerts()
    assert len(alerts) >= 10
    for group, name, labels in alerts:
        levels = ["warning", "alarm", "suspect"] if "{{" in labels.get("severity", "") else [labels.get("severity", "")]
        for sev in levels:
            lab = {**labels, "severity": sev, "alertname": name, "unit_id": "demo-u1"}
            out = subprocess.run([AMTOOL, "config", "routes", "test", f"--config.file={ALERTMANAGER}",
                                  *[f"{k}={v}" for k, v in lab.items()]], capture_output=True, text=True, timeout=60)
            assert out.returncode == 0, out.stderr
            assert out.stdout.strip() == _expected_receiver(group, lab), (name, sev, out.stdout)


@pytest.mark.skipif(shutil.which("openssl") is None, reason="openssl is not installed")
def test_readme_tls_steps_make_a_verifiable_chain(tmp_path: Path):
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    block = text.split("### TLS certificates", 1)[1].split("```sh\n", 1)[1].split("```", 1)[0]
    out = subprocess.run(["bash", "-euo", "pipefail", "-c", block], cwd=tmp_path, capture_output=True, text=True,
                         timeout=300)
    assert out.returncode == 0, out.stderr[-2000:]
    assert "broker.crt: OK" in out.stdout and "twin.crt: OK" in out.stdout  # openssl verify against the CA
    san = subprocess.run(["openssl", "x509", "-in", "broker.crt", "-noout", "-ext", "subjectAltName"], cwd=tmp_path,
                         capture_output=True, text=True, check=True).stdout
    assert "DNS:broker.example" in san and "IP Address:127.0.0.1" in san
    assert oct((tmp_path / "twin.key").stat().st_mode & 0o777) == "0o600"
