"""A bulk MQTT 3.1.1 QoS 1 publisher for ``twin bench ingest`` (benchmark load only).

The benchmark needs a publisher that is not the bottleneck: one Python paho
client sends a few thousand QoS 1 messages per second, far below what the
subscribers under test read. This one pre-encodes every PUBLISH packet, writes
them in large chunks on a plain socket and reads the PUBACKs in bulk, with a
bounded window of unacknowledged messages. Every acknowledgement is checked:
its packet type, its length and that it answers a message actually in flight;
anything else aborts the run with :class:`PublishError`. It is deliberately
small (no TLS, no reconnect): a lost connection fails the benchmark.
"""

from __future__ import annotations

import contextlib
import select
import socket
import struct
import time
from collections.abc import Sequence

_CONNACK = 0x20
_PUBACK = 0x40
_PUBLISH_QOS1 = 0x32
_MAX_MID = 65_535


class PublishError(RuntimeError):
    """The broker refused, closed the connection or acknowledged something unexpected."""


def _remaining_length(n: int) -> bytes:
    out = bytearray()
    while True:
        byte, n = n % 128, n // 128
        out.append(byte | (0x80 if n else 0))
        if not n:
            return bytes(out)


def _utf8(text: str) -> bytes:
    raw = text.encode("utf-8")
    return struct.pack("!H", len(raw)) + raw


def encode_connect(client_id: str, keepalive: int = 60) -> bytes:
    """An MQTT 3.1.1 CONNECT packet with a clean session and no credentials."""
    body = _utf8("MQTT") + bytes([4, 0x02]) + struct.pack("!H", keepalive) + _utf8(client_id)
    return bytes([0x10]) + _remaining_length(len(body)) + body


def encode_publish(topic: str, payload: bytes, mid: int) -> bytes:
    """One QoS 1 PUBLISH packet (no retain, no dup) with message id ``mid`` (1..65535)."""
    if not 0 < mid <= _MAX_MID:
        raise ValueError(f"message id {mid!r} is not in 1..{_MAX_MID}")
    body = _utf8(topic) + struct.pack("!H", mid) + payload
    return bytes([_PUBLISH_QOS1]) + _remaining_length(len(body)) + body


def _recv_exact(sock: socket.socket, n: int) -> bytes:
    data = b""
    while len(data) < n:
        chunk = sock.recv(n - len(data))
        if not chunk:
            raise PublishError("the broker closed the connection")
        data += chunk
    return data


class BulkPublisher:
    """One QoS 1 publishing connection with a bounded in-flight window.

    Parameters
    ----------
    host, port : str, int
        Broker address (plain TCP).
    client_id : str
        MQTT client id.
    window : int
        Messages sent but not yet acknowledged, at most (1..65535).
    chunk : int
        Messages written per ``sendall``.
    """

    def __init__(
        self, host: str, port: int, client_id: str, window: int = 1000, chunk: int = 256
    ) -> None:
        if not 0 < window <= _MAX_MID:
            raise ValueError(f"window {window!r} is not in 1..{_MAX_MID}")
        if chunk < 1:
            raise ValueError(f"chunk {chunk!r} must be at least 1")
        self.window, self.chunk = int(window), int(chunk)
        self._sock = socket.create_connection((host, port), timeout=30)
        self._sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        self._sock.sendall(encode_connect(client_id))
        ack = _recv_exact(self._sock, 4)
        if ack[0] != _CONNACK or ack[1] != 2 or ack[3] != 0:
            self.close()
            raise PublishError(f"the broker refused the connection: CONNACK {ack.hex()}")
        self._inflight = bytearray(_MAX_MID + 1)  # 1 = sent, awaiting its PUBACK
        self._next_mid = 1
        self.sent = 0
        self.acknowledged = 0

    def _take_mid(self) -> int:
        mid = self._next_mid
        if self._inflight[mid]:
            raise PublishError(f"message id {mid} is still in flight (window too large)")
        self._next_mid = 1 if mid == _MAX_MID else mid + 1
        self._inflight[mid] = 1
        return mid

    def _read_acks(self, block: bool, buf: bytearray) -> None:
        timeout = 30.0 if block else 0.0
        ready, _, _ = select.select([self._sock], [], [], timeout)
        if not ready:
            if block:
                raise PublishError("no PUBACK within 30 s")
            return
        data = self._sock.recv(65536)
        if not data:
            raise PublishError("the broker closed the connection")
        buf += data
        n = len(buf) // 4
        for i in range(0, 4 * n, 4):
            if buf[i] != _PUBACK or buf[i + 1] != 2:
                raise PublishError(
                    f"unexpected packet {bytes(buf[i : i + 4]).hex()} (not a PUBACK)"
                )
            mid = (buf[i + 2] << 8) | buf[i + 3]
            if not self._inflight[mid]:
                raise PublishError(f"PUBACK for message id {mid}, which is not in flight")
            self._inflight[mid] = 0
        self.acknowledged += n
        del buf[: 4 * n]

    def publish_all(self, messages: Sequence[tuple[str, bytes]]) -> dict[str, float]:
        """Send every ``(topic, payload)`` at QoS 1 and wait for all PUBACKs.

        Returns ``publish_seconds`` (last message written) and ``acked_seconds``
        (last acknowledgement read), both from the call.
        """
        topics: dict[str, bytes] = {t: _utf8(t) for t, _ in messages}
        t0 = time.perf_counter()
        buf = bytearray()
        total = len(messages)
        goal = self.acknowledged + total  # the counters run over every call
        i = 0
        t_sent = t0
        while self.acknowledged < goal:
            room = self.window - (self.sent - self.acknowledged)
            if i < total and room > 0:
                parts: list[bytes] = []
                for topic, payload in messages[i : i + min(room, self.chunk)]:
                    body_len = len(topics[topic]) + 2 + len(payload)
                    parts += (
                        bytes([_PUBLISH_QOS1]),
                        _remaining_length(body_len),
                        topics[topic],
                        struct.pack("!H", self._take_mid()),
                        payload,
                    )
                n = len(parts) // 5
                self._sock.sendall(b"".join(parts))
                i += n
                self.sent += n
                if i == total:
                    t_sent = time.perf_counter()
                self._read_acks(False, buf)
            else:
                self._read_acks(True, buf)
        if buf:
            raise PublishError(f"a partial packet {bytes(buf).hex()} after the last PUBACK")
        return {"publish_seconds": t_sent - t0, "acked_seconds": time.perf_counter() - t0}

    def close(self) -> None:
        """Send DISCONNECT and close the socket."""
        with contextlib.suppress(OSError):
            self._sock.sendall(b"\xe0\x00")
        self._sock.close()
