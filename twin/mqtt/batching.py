"""Batched receive under paho's packet handling (:class:`_BatchingClient`), used by :class:`twin.mqtt.MqttClient`."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import paho.mqtt.client as paho
from paho.mqtt.enums import CallbackAPIVersion, MQTTErrorCode

_RECV_BLOCK = 65536
_PUBACK = 0x40
_DISCONNECT = 0xE0
# paho internals the batching client relies on (checked once; absent = plain paho).
_PAHO_INTERNALS = (
    "_sock_recv",
    "_send_puback",
    "_packet_read",
    "_packet_write",
    "_loop_rc_handle",
    "_out_packet",
    "_in_packet",
    "_msgtime_mutex",
    "_last_bytes_received",
    "_protocol",
)


class _BatchingClient(paho.Client):
    """paho client that reads in blocks and acknowledges QoS 1 messages in batches.

    paho reads every packet with three ``recv`` calls (type byte, length
    byte, body), handles one packet per ``select`` and writes one PUBACK per
    message (plus a wake-up byte to its own socket pair): ~7 system calls
    per message, which caps a QoS 1 subscriber at a few thousand messages/s.
    This subclass changes only the transport under paho's packet handling:

    * ``_sock_recv`` serves paho's small reads from one ``recv`` of up to
      64 KiB (the buffer belongs to one socket and is dropped with it);
    * ``loop_read`` keeps handling packets until that buffer is empty, so no
      data ever waits in it while the loop sleeps in ``select``;
    * ``_send_puback`` collects the acknowledgements (in arrival order); they
      are written in one packet before the next ``recv`` from the socket and
      at the end of ``loop_read``, i.e. always after the message callbacks;
    * complete QoS 0/1 PUBLISH packets found in the buffer (MQTT 5: only
      those without properties) are parsed here and handed to ``deliver(topic
      bytes, payload)`` without building paho message objects; anything else
      (QoS 2, properties, other packet types, a packet split across reads, a
      malformed header) goes through paho's ``_packet_read`` unchanged.

    Only for the threaded loop (``loop_start``) and automatic acknowledgement;
    everything else (connect, keep-alive, reconnect, TLS, QoS 2, publishing)
    is paho's own code.

    Measured with ``twin bench ingest`` (200 000 QoS 1 JSON messages drained
    from Mosquitto 2.0.11, paho 2.2, a shared 2-core machine, 3 runs): the
    whole ingest path (receive, decode, convert, store) at 41 000–66 000
    messages/s and ~150 000 per CPU second, ``mosquitto_sub`` at
    34 000–57 000 on the same stream; paho's own receive path at
    8 000–11 000 (~11 000 per CPU second).
    """

    def __init__(
        self, *args: Any, deliver: Callable[[bytes, bytes], None] | None = None, **kwargs: Any
    ) -> None:
        super().__init__(*args, **kwargs)
        self._deliver = deliver
        self._rsock: Any = None
        self._rbuf = b""
        self._rpos = 0
        self._acks = bytearray()
        self._acks_sock: Any = None

    def _flush_acks(self) -> None:
        acks, sock = self._acks, self._sock
        if not acks:
            return
        if sock is None or sock is not self._acks_sock:  # acks of a closed connection
            acks.clear()
            return
        packet = {
            "command": _PUBACK,
            "mid": 0,
            "qos": 0,
            "pos": 0,
            "to_process": len(acks),
            "packet": bytes(acks),
            "info": None,
        }
        acks.clear()
        queue = self._out_packet
        if queue and queue[-1]["command"] & 0xF0 == _DISCONNECT:
            # stop() queued a DISCONNECT from another thread: acknowledge first,
            # or the broker would deliver these messages again
            queue.insert(len(queue) - 1, packet)  # type: ignore[arg-type]
        else:
            queue.append(packet)  # type: ignore[arg-type]
        # Errors stay for paho's next read or write to find; a partial write
        # leaves the rest queued and the loop's select waits for writability.
        self._packet_write()

    def _sock_recv(self, bufsize: int) -> bytes:
        sock = self._sock
        if sock is not self._rsock:  # a new connection: forget the old one's bytes
            self._rsock, self._rbuf, self._rpos = sock, b"", 0
        buf, pos = self._rbuf, self._rpos
        if pos >= len(buf):
            self._flush_acks()
            buf = super()._sock_recv(_RECV_BLOCK)  # BlockingIOError when nothing is there
            if not buf:
                return buf
            self._rbuf, pos = buf, 0
            with self._msgtime_mutex:  # the fast path below skips paho's own update
                self._last_bytes_received = paho.time_func()
        self._rpos = pos + bufsize
        return buf[pos : pos + bufsize]

    def _send_puback(self, mid: int) -> MQTTErrorCode:
        if self._manual_ack:  # never set by MqttClient; keep paho's own path
            return super()._send_puback(mid)
        if self._acks_sock is not self._sock:
            self._acks.clear()
            self._acks_sock = self._sock
        self._acks += bytes((_PUBACK, 2, mid >> 8, mid & 0xFF))
        return MQTTErrorCode.MQTT_ERR_SUCCESS

    def loop_read(self, max_packets: int = 1) -> MQTTErrorCode:
        if self._sock is None:
            return MQTTErrorCode.MQTT_ERR_NO_CONN
        n = 0
        fast = self._deliver is not None
        try:
            while True:
                if self._sock is None:
                    return MQTTErrorCode.MQTT_ERR_NO_CONN
                if fast and self._in_packet["command"] == 0 and self._rsock is self._sock:
                    n += self._fast_publishes()
                rc = self._packet_read()
                n += 1
                if rc > 0:
                    return self._loop_rc_handle(rc)
                drained = self._rpos >= len(self._rbuf)
                if drained and (rc == MQTTErrorCode.MQTT_ERR_AGAIN or n >= max_packets):
                    return MQTTErrorCode.MQTT_ERR_SUCCESS
        finally:
            self._flush_acks()

    def _fast_publishes(self) -> int:
        """Deliver the complete QoS 0/1 PUBLISH packets at the head of the buffer."""
        buf, pos, end = self._rbuf, self._rpos, len(self._rbuf)
        deliver, acks = self._deliver, self._acks
        assert deliver is not None
        v5 = self._protocol == paho.MQTTv5
        if acks and self._acks_sock is not self._sock:
            acks.clear()
        self._acks_sock = self._sock
        count = 0
        while end - pos >= 4:
            cmd = buf[pos]
            qos = (cmd >> 1) & 3
            if cmd >> 4 != 3 or qos == 2 or qos == 3:
                break
            # remaining length: 1..4 bytes, 7 bits each
            length, shift, i = 0, 0, pos + 1
            while i < end and i - pos <= 4:
                byte = buf[i]
                length |= (byte & 0x7F) << shift
                shift += 7
                i += 1
                if not byte & 0x80:
                    break
            else:
                break  # incomplete or malformed: paho's reader decides
            stop = i + length
            if stop > end or length < 2:
                break
            j = i + 2 + ((buf[i] << 8) | buf[i + 1])
            topic = buf[i + 2 : j]
            if qos:
                mid = buf[j : j + 2]
                j += 2
            if v5:
                if j >= stop or buf[j] != 0:  # properties present: let paho parse them
                    break
                j += 1
            if j > stop:
                break  # header longer than the packet: malformed, paho decides
            deliver(topic, buf[j:stop])
            if qos:
                acks += b"\x40\x02" + mid
            pos = stop
            count += 1
        self._rpos = pos
        return count


def _batching_supported() -> bool:
    probe = paho.Client(CallbackAPIVersion.VERSION2)
    return all(hasattr(probe, name) for name in _PAHO_INTERNALS)


BATCH_RECEIVE_SUPPORTED = _batching_supported()
