"""The embedded MQTT broker of ``twin demo``: amqtt in a child process.

The broker runs in its own Python process (``python -m
twin.demo._broker_main``) so that its asyncio loop never competes with the
simulator or the daemon for the interpreter lock; run in-process it dropped
messages under load. It speaks MQTT 3.1.1 only, accepts anonymous clients and
binds to 127.0.0.1 by default. For the demo only: production uses Mosquitto.
"""

from __future__ import annotations

import queue
import socket
import subprocess
import sys
import tempfile
import threading
import time
from types import TracebackType
from typing import IO


class BrokerStartError(RuntimeError):
    """The embedded broker did not come up; the message says why."""


def _port_accepts(host: str, port: int) -> bool:
    try:
        with socket.create_connection((host, port), timeout=0.2):
            return True
    except OSError:
        return False


class EmbeddedBroker:
    """A pure-Python MQTT 3.1.1 broker (amqtt) in a child process.

    Parameters
    ----------
    host : str
        Address to bind (default loopback only).
    port : int
        TCP port; 0 = a free port chosen by the system (see :attr:`port`
        after :meth:`start`).
    python : str
        Interpreter for the child (default: this one).

    Examples
    --------
    >>> with EmbeddedBroker() as broker:          # doctest: +SKIP
    ...     print(broker.port)
    """

    def __init__(self, host: str = "127.0.0.1", port: int = 0, python: str = sys.executable) -> None:
        if not 0 <= port < 65536:
            raise ValueError(f"broker port {port!r}; expected 0 (any free port) to 65535")
        self.host = host
        self._requested_port = port
        self._python = python
        self._proc: subprocess.Popen[bytes] | None = None
        self._stderr: IO[bytes] | None = None
        self.port: int | None = None

    @property
    def pid(self) -> int | None:
        """Process id of the broker child, or None when not running."""
        return self._proc.pid if self._proc is not None else None

    @property
    def running(self) -> bool:
        return self._proc is not None and self._proc.poll() is None

    def start(self, timeout: float = 20.0) -> EmbeddedBroker:
        """Start the child and return once its port accepts connections.

        Raises
        ------
        BrokerStartError
            The child exited, reported a failure (e.g. the port is taken) or
            did not listen within ``timeout`` [s]; the message carries its
            last output.
        """
        if self._proc is not None:
            raise RuntimeError("EmbeddedBroker.start() called twice")
        self._stderr = tempfile.TemporaryFile()  # noqa: SIM115 (closed in stop)
        self._proc = subprocess.Popen(
            [self._python, "-m", "twin.demo._broker_main", self.host, str(self._requested_port)],
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
            stderr=self._stderr,
        )
        lines: queue.Queue[str] = queue.Queue()
        out = self._proc.stdout
        assert out is not None

        def read_stdout() -> None:
            for raw in out:
                lines.put(raw.decode("utf-8", "replace").strip())
            lines.put("")  # EOF

        threading.Thread(target=read_stdout, name="twin-demo-broker-out", daemon=True).start()
        deadline = time.monotonic() + timeout
        try:
            line = lines.get(timeout=max(0.0, deadline - time.monotonic()))
        except queue.Empty:
            self._fail(f"no answer within {timeout:g} s")
        if not line.startswith("READY "):
            self._fail(line.removeprefix("FAILED ") or "the broker process exited")
        self.port = int(line.split()[1])
        while not _port_accepts(self.host, self.port):
            if self._proc.poll() is not None or time.monotonic() > deadline:
                self._fail(f"port {self.port} does not accept connections")
            time.sleep(0.02)
        return self

    def _fail(self, reason: str) -> None:
        detail = self._stderr_tail()
        self.stop()
        where = f"{self.host}:{self._requested_port or 'any'}"
        raise BrokerStartError(
            f"embedded MQTT broker (amqtt) on {where} did not start: {reason}"
            + (f"\n{detail}" if detail else "")
        )

    def _stderr_tail(self, limit: int = 2000) -> str:
        if self._stderr is None:
            return ""
        self._stderr.seek(0)
        return self._stderr.read().decode("utf-8", "replace")[-limit:].strip()

    def stop(self, timeout: float = 5.0) -> None:
        """Terminate the child (SIGTERM), wait, and kill it if it lingers."""
        p, self._proc = self._proc, None
        if p is not None:
            if p.poll() is None:
                p.terminate()
                try:
                    p.wait(timeout=timeout)
                except subprocess.TimeoutExpired:
                    p.kill()
                    p.wait()
            for stream in (p.stdin, p.stdout):
                if stream is not None:
                    stream.close()
        if self._stderr is not None:
            self._stderr.close()
            self._stderr = None

    def __enter__(self) -> EmbeddedBroker:
        if self._proc is None:
            self.start()
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.stop()

    def __del__(self) -> None:  # last resort: never leave an orphan broker behind
        p = getattr(self, "_proc", None)
        if p is not None and p.poll() is None:
            p.kill()
