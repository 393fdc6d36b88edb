"""Shared fixtures: private Mosquitto brokers for tests that need control over one.

Fixtures
--------
``mosquitto_factory``
    A callable ``mosquitto_factory(users=None, tls=False, max_queued_messages=None,
    extra="", config=None)`` that starts a real ``mosquitto -c <generated
    conf>`` on a free port on 127.0.0.1 and returns a :class:`Broker` once the
    port accepts connections. ``users={"name": "password"}`` writes a password
    file with ``mosquitto_passwd -b -c`` and turns anonymous access off;
    ``tls=True`` serves TLS with a server certificate for 127.0.0.1/localhost
    signed by a test CA (see ``tls_files``); ``max_queued_messages`` sets the
    per-client queue; ``extra`` is appended to the config verbatim;
    ``config`` replaces the generated config entirely (``{port}`` in it becomes
    the chosen port, which must be a listener). Every broker started is killed
    by PID at teardown.
``mosquitto``
    A plain broker (anonymous, no TLS) for one test.
``tls_files``
    Session-wide :class:`TlsFiles`: a CA, a server key/cert signed by it, and a
    second CA that signed nothing (for "untrusted CA" tests).

:class:`Broker` has ``host``, ``port``, ``pid``, ``tls`` (the :class:`TlsFiles`
or None), ``log_path``, ``stop(kill=False)`` and ``restart()`` (same port).
Tests skip with a clear reason when ``mosquitto`` (or, for users/TLS,
``mosquitto_passwd``/``openssl``) is missing; CI installs them.

The machine's shared broker on 127.0.0.1:1883 is not used here: tests that
stop, restart or reconfigure a broker need their own.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import socket
import subprocess
import time
import urllib.parse
import urllib.request
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest

MOSQUITTO = shutil.which("mosquitto") or (
    "/usr/sbin/mosquitto" if os.access("/usr/sbin/mosquitto", os.X_OK) else None
)


def free_port() -> int:
    """A TCP port on 127.0.0.1 that was free a moment ago."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _port_accepts(host: str, port: int) -> bool:
    try:
        with socket.create_connection((host, port), timeout=0.2):
            return True
    except OSError:
        return False


@dataclass(frozen=True)
class TlsFiles:
    ca: Path
    server_cert: Path
    server_key: Path
    other_ca: Path  # a CA that did not sign the server certificate


def _openssl(*args: str, cwd: Path) -> None:
    subprocess.run(["openssl", *args], cwd=cwd, check=True, capture_output=True)


def make_tls_files(d: Path) -> TlsFiles:
    """Generate a test CA, a server certificate for 127.0.0.1 and an unrelated CA."""
    d.mkdir(parents=True, exist_ok=True)
    ec = ["-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes"]
    for name in ("ca", "other_ca"):
        _openssl(
            "req",
            "-x509",
            *ec,
            "-keyout",
            f"{name}.key",
            "-out",
            f"{name}.crt",
            "-days",
            "2",
            "-subj",
            f"/CN=twin test {name}",
            "-addext",
            "basicConstraints=critical,CA:TRUE",
            "-addext",
            "keyUsage=critical,keyCertSign,cRLSign",
            cwd=d,
        )
    _openssl(
        "req", *ec, "-keyout", "server.key", "-out", "server.csr", "-subj", "/CN=127.0.0.1", cwd=d
    )
    (d / "server.ext").write_text(
        "subjectAltName=IP:127.0.0.1,DNS:localhost\n"
        "basicConstraints=critical,CA:FALSE\n"
        "keyUsage=critical,digitalSignature,keyEncipherment\n"
        "extendedKeyUsage=serverAuth\n"
    )
    _openssl(
        "x509",
        "-req",
        "-in",
        "server.csr",
        "-CA",
        "ca.crt",
        "-CAkey",
        "ca.key",
        "-CAcreateserial",
        "-out",
        "server.crt",
        "-days",
        "2",
        "-extfile",
        "server.ext",
        cwd=d,
    )
    return TlsFiles(d / "ca.crt", d / "server.crt", d / "server.key", d / "other_ca.crt")


class Broker:
    """A private Mosquitto process on a fixed port of 127.0.0.1."""

    host = "127.0.0.1"

    def __init__(self, conf: Path, port: int, log_path: Path, tls: TlsFiles | None) -> None:
        self.conf = conf
        self.port = port
        self.log_path = log_path
        self.tls = tls
        self._proc: subprocess.Popen[bytes] | None = None
        self.start()

    @property
    def pid(self) -> int | None:
        return self._proc.pid if self._proc is not None else None

    def start(self, wait_seconds: float = 10.0) -> None:
        assert MOSQUITTO is not None
        with open(self.log_path, "ab") as log:
            self._proc = subprocess.Popen(
                [MOSQUITTO, "-c", str(self.conf)], stdout=log, stderr=subprocess.STDOUT
            )
        deadline = time.monotonic() + wait_seconds
        while not _port_accepts(self.host, self.port):
            if self._proc.poll() is not None or time.monotonic() > deadline:
                self.stop(kill=True)
                raise RuntimeError(
                    f"mosquitto on port {self.port} did not start; log:\n"
                    + self.log_path.read_text(errors="replace")[-2000:]
                )
            time.sleep(0.02)

    def stop(self, kill: bool = False) -> None:
        """Stop the broker: SIGTERM (clean) or SIGKILL (``kill=True``, a crash)."""
        p, self._proc = self._proc, None
        if p is None or p.poll() is not None:
            return
        p.send_signal(signal.SIGKILL if kill else signal.SIGTERM)
        try:
            p.wait(timeout=5)
        except subprocess.TimeoutExpired:
            p.kill()
            p.wait()

    def restart(self, kill: bool = False) -> None:
        """Stop and start again on the same port."""
        self.stop(kill=kill)
        self.start()


BrokerFactory = Callable[..., Broker]


@pytest.fixture(scope="session")
def tls_files(tmp_path_factory: pytest.TempPathFactory) -> TlsFiles:
    if shutil.which("openssl") is None:
        pytest.skip("openssl is not installed (apt-get install openssl)")
    return make_tls_files(tmp_path_factory.mktemp("tls"))


@pytest.fixture
def mosquitto_factory(tmp_path: Path, request: pytest.FixtureRequest) -> Iterator[BrokerFactory]:
    if MOSQUITTO is None:
        pytest.skip("mosquitto is not installed (apt-get install mosquitto mosquitto-clients)")
    brokers: list[Broker] = []

    def factory(
        users: dict[str, str] | None = None,
        tls: bool = False,
        max_queued_messages: int | None = None,
        extra: str = "",
        config: str | None = None,
    ) -> Broker:
        n = len(brokers)
        port = free_port()
        if config is not None:  # a complete config of the caller's, "{port}" = the port
            conf = tmp_path / f"mosquitto{n}.conf"
            text = config.replace("{port}", str(port))
            if os.geteuid() == 0 and "\nuser " not in text:
                text += "\nuser root\n"
            conf.write_text(text)
            broker = Broker(conf, port, tmp_path / f"mosquitto{n}.log", None)
            brokers.append(broker)
            return broker
        lines = [
            f"listener {port} 127.0.0.1",
            "persistence false",
            "log_type error",
            "log_type warning",
            "log_type notice",
            "log_dest stdout",
        ]
        if os.geteuid() == 0:
            lines.append("user root")  # else mosquitto drops to a user who cannot read tmp_path
        if users:
            if shutil.which("mosquitto_passwd") is None:
                pytest.skip("mosquitto_passwd is not installed (apt-get install mosquitto)")
            pw = tmp_path / f"passwd{n}"
            for i, (name, secret) in enumerate(users.items()):
                flags = ["-b", "-c"] if i == 0 else ["-b"]
                subprocess.run(
                    ["mosquitto_passwd", *flags, str(pw), name, secret],
                    check=True,
                    capture_output=True,
                )
            lines += ["allow_anonymous false", f"password_file {pw}"]
        else:
            lines.append("allow_anonymous true")
        tls_files_ = None
        if tls:
            tls_files_ = request.getfixturevalue("tls_files")
            lines += [
                f"cafile {tls_files_.ca}",
                f"certfile {tls_files_.server_cert}",
                f"keyfile {tls_files_.server_key}",
            ]
        if max_queued_messages is not None:
            lines.append(f"max_queued_messages {max_queued_messages}")
        if extra:
            lines.append(extra)
        conf = tmp_path / f"mosquitto{n}.conf"
        conf.write_text("\n".join(lines) + "\n")
        broker = Broker(conf, port, tmp_path / f"mosquitto{n}.log", tls_files_)
        brokers.append(broker)
        return broker

    yield factory
    for b in brokers:
        b.stop(kill=True)


@pytest.fixture
def mosquitto(mosquitto_factory: BrokerFactory) -> Broker:
    """A plain private broker (anonymous, no TLS) on a free port."""
    return mosquitto_factory()


def wait_for(predicate: Callable[[], object], timeout: float = 10.0, step: float = 0.01) -> bool:
    """Poll ``predicate`` until true or ``timeout`` [s]; returns its last truth value.

    A guard against hanging, not a speed requirement.
    """
    deadline = time.monotonic() + timeout
    while True:
        if predicate():
            return True
        if time.monotonic() > deadline:
            return bool(predicate())
        time.sleep(step)


@pytest.fixture(name="wait_for")
def wait_for_fixture() -> Callable[..., bool]:
    """The :func:`wait_for` helper, as a fixture (no import of conftest needed)."""
    return wait_for


# ---------------------------------------------------------------- prometheus ---
# ``prometheus_factory(targets, rule_files=(), scrape_interval="1s", job=None)`` starts a
# real ``prometheus`` on a free port of 127.0.0.1 with a generated config that
# scrapes ``targets`` ("host:port") as job "twin" (``job`` adds keys to that scrape
# job, e.g. ``{"scheme": "https", "tls_config": {...}}``) and loads ``rule_files``; it
# returns a :class:`PrometheusServer` once ``/-/ready`` answers. Every server
# started is stopped by PID at teardown. Skips when the binary is missing.

PROMETHEUS = shutil.which("prometheus")


class PrometheusServer:
    """A private Prometheus process and a minimal client of its HTTP API."""

    host = "127.0.0.1"

    def __init__(self, args: list[str], port: int, log_path: Path, wait_seconds: float = 30.0) -> None:
        self.port = port
        self.log_path = log_path
        with open(log_path, "ab") as log:
            self._proc: subprocess.Popen[bytes] | None = subprocess.Popen(
                args, stdout=log, stderr=subprocess.STDOUT
            )
        if not wait_for(self._ready, timeout=wait_seconds, step=0.1):
            self.stop()
            raise RuntimeError(
                f"prometheus on port {port} did not become ready; log:\n"
                + log_path.read_text(errors="replace")[-2000:]
            )

    @property
    def url(self) -> str:
        return f"http://{self.host}:{self.port}"

    @property
    def pid(self) -> int | None:
        return self._proc.pid if self._proc is not None else None

    def _ready(self) -> bool:
        if self._proc is None or self._proc.poll() is not None:
            raise RuntimeError(
                "prometheus exited; log:\n" + self.log_path.read_text(errors="replace")[-2000:]
            )
        try:
            with urllib.request.urlopen(f"{self.url}/-/ready", timeout=1) as resp:
                return resp.status == 200
        except OSError:
            return False

    def query(self, expr: str) -> list[dict]:
        """Instant query; the ``data.result`` list of the API answer."""
        q = urllib.parse.urlencode({"query": expr})
        with urllib.request.urlopen(f"{self.url}/api/v1/query?{q}", timeout=5) as resp:
            body = json.load(resp)
        if body.get("status") != "success":
            raise RuntimeError(f"query {expr!r} failed: {body}")
        return body["data"]["result"]

    def wait_for_result(self, expr: str, timeout: float = 30.0) -> list[dict]:
        """Poll ``expr`` until it returns a non-empty result (a bounded wait, not a timing test)."""
        found: list[list[dict]] = []

        def has_result() -> bool:
            r = self.query(expr)
            if r:
                found.append(r)
            return bool(r)

        if not wait_for(has_result, timeout=timeout, step=0.25):
            raise AssertionError(f"no result for {expr!r} within {timeout} s")
        return found[-1]

    def stop(self) -> None:
        p, self._proc = self._proc, None
        if p is None or p.poll() is not None:
            return
        p.send_signal(signal.SIGTERM)
        try:
            p.wait(timeout=10)
        except subprocess.TimeoutExpired:
            p.kill()
            p.wait()


PrometheusFactory = Callable[..., PrometheusServer]


@pytest.fixture
def prometheus_factory(tmp_path: Path) -> Iterator[PrometheusFactory]:
    if PROMETHEUS is None:
        pytest.skip("prometheus is not installed (apt-get install --no-install-recommends prometheus)")
    servers: list[PrometheusServer] = []

    def factory(
        targets: list[str],
        rule_files: tuple[Path, ...] = (),
        scrape_interval: str = "1s",
        job: dict[str, object] | None = None,
        storage: Path | None = None,
        extra_args: tuple[str, ...] = (),
    ) -> PrometheusServer:
        n = len(servers)
        port = free_port()
        conf = tmp_path / f"prometheus{n}.yml"
        lines = [
            "global:",
            f"  scrape_interval: {scrape_interval}",
            f"  evaluation_interval: {scrape_interval}",
            "rule_files:",
            *[f"  - {json.dumps(str(Path(p).resolve()))}" for p in rule_files],
            "scrape_configs:",
            "  - job_name: twin",
            "    static_configs:",
            f"      - targets: {json.dumps(list(targets))}",
            # more keys of the scrape job (e.g. scheme, tls_config), as JSON (valid YAML)
            *[f"    {key}: {json.dumps(value)}" for key, value in (job or {}).items()],
        ]
        if not rule_files:
            lines[3] = "rule_files: []"
        conf.write_text("\n".join(lines) + "\n")
        args = [
            PROMETHEUS,
            f"--config.file={conf}",
            f"--storage.tsdb.path={storage or tmp_path / f'prometheus{n}-data'}",
            f"--web.listen-address={PrometheusServer.host}:{port}",
            "--log.level=warn",
            *extra_args,
        ]
        server = PrometheusServer(args, port, tmp_path / f"prometheus{n}.log")
        servers.append(server)
        return server

    yield factory
    for s in servers:
        s.stop()
