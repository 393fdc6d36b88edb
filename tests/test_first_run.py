"""The README's two set-up commands: shape here, a real run on a clean Debian chroot (slow)."""

from __future__ import annotations

import os
import re
import shutil
import subprocess
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def _readme_command(n: int) -> str:
    lines = (ROOT / "README.md").read_text(encoding="utf-8").splitlines()
    for i, line in enumerate(lines):
        if line.startswith(f"# {n}. "):
            return lines[i + 1]
    raise AssertionError(f"README has no '# {n}.' command")


def _packages(cmd: str) -> list[str]:
    m = re.search(r"for p in ([a-z0-9 .+-]+); do", cmd)
    assert m, cmd
    return m.group(1).split()


def _missing_part(cmd: str) -> str:
    """The command's own 'which packages are missing' snippet, cut out verbatim."""
    start = cmd.index("M=$(")
    end = cmd.index("done)", start) + len("done)")
    return cmd[start:end]


@pytest.mark.parametrize("n", [1, 2])
def test_readme_command_is_one_valid_shell_line(n: int) -> None:
    cmd = _readme_command(n)
    assert "\n" not in cmd
    subprocess.run(["bash", "-n", "-c", cmd], check=True)
    # works as root (no sudo) and as a user (sudo): decided by the command itself
    assert cmd.startswith('S=$([ "$(id -u)" = 0 ] || echo sudo);')
    assert "sudo apt-get" not in cmd and "$S apt-get install -y --no-install-recommends $M" in cmd
    assert "--upgrade" not in cmd and "upgrade" not in cmd


@pytest.mark.skipif(shutil.which("dpkg-query") is None, reason="not a Debian system (no dpkg-query)")
def test_only_missing_packages_are_installed() -> None:
    # Run the README's own snippet with one package that cannot be installed here.
    snippet = _missing_part(_readme_command(2)).replace("for p in ", "for p in twin-no-such-package-x ")
    out = subprocess.run(["bash", "-c", snippet + '; echo "[$M]"'], capture_output=True, text=True, check=True)
    missing = out.stdout.strip().strip("[]").split()
    assert "twin-no-such-package-x" in missing
    installed = subprocess.run(["dpkg-query", "-W", "-f=${Package} ${Status}\n"], capture_output=True,
                               text=True).stdout
    present = {ln.split()[0] for ln in installed.splitlines() if ln.endswith("ok installed")}
    for p in _packages(_readme_command(2)):
        assert (p in missing) == (p not in present), p


def test_ci_installs_what_the_readme_installs() -> None:
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8")
    ci_pkgs = set(re.findall(r"need_apt\+=\(([^)]*)\)", ci))
    ci_names = {w for group in ci_pkgs for w in group.split()}
    readme = set(_packages(_readme_command(2)))
    assert ci_names <= readme, ci_names - readme
    assert set(_packages(_readme_command(1))) <= readme
    assert "python3 -m pytest -q" in ci and _readme_command(2).endswith("python -m pytest -q")


@pytest.mark.slow
@pytest.mark.skipif(shutil.which("debootstrap") is None, reason="debootstrap not installed (apt-get install debootstrap)")
@pytest.mark.skipif(os.geteuid() != 0, reason="debootstrap and chroot need root")
@pytest.mark.skipif(os.environ.get("TWIN_FIRST_RUN") != "1",
                    reason="downloads a Debian system and the Python packages (~10 min): set TWIN_FIRST_RUN=1")
def test_readme_commands_on_a_clean_debian_chroot() -> None:
    out = subprocess.run([str(ROOT / ".ci" / "first-run")], capture_output=True, text=True, timeout=3600)
    assert out.returncode == 0, out.stdout[-3000:] + out.stderr[-3000:]
    assert "command 1 added" in out.stdout and "changed none" in out.stdout
    assert "both README commands worked" in out.stdout
