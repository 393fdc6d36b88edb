"""``twin backfill --publish``: the rows of ``reconciled.csv`` republished on MQTT.

One message per row, in file order (window order), to
``<prefix>/<kind>/<name>``: ``kpi/<KPI>`` for a KPI name, ``tag/<TAG>``,
``expected/<KPI>``, ``deviation/<cause>`` for the ``tag:``, ``expected:`` and
``deviation:`` names. The prefix defaults to ``<republish_prefix>/backfill``
(``twin/<unit id>/backfill``) so history never lands on the live topics. The
payload is the row as JSON, with the window timestamp::

    {"ts": 1767571230.0, "window_end": "2026-01-05T00:00:30Z", "name": "tag:HP-MS-P1",
     "value": 16217814.647168215, "uncertainty_95": 43855.689066768166, "unit": "Pa",
     "status": "converged", "steady": false}

(``uncertainty_95`` is null where the row has none). Messages go out with QoS 1
(or the plant file's QoS 2) so every one is acknowledged: at most
``max_in_flight`` are unacknowledged at any time; the publisher waits for
acknowledgements before sending more. A message the client refuses, a broker
that does not accept the connection, or no acknowledgement for ``timeout``
seconds stops the publishing with one line (:class:`PublishError`).
"""

from __future__ import annotations

import csv
import json
import math
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, replace
from datetime import datetime
from pathlib import Path
from typing import Any

COLUMNS = ("window_end", "name", "value", "uncertainty_95", "unit", "status", "steady")
WILDCARDS = ("+", "#", "\x00")


class PublishError(Exception):
    """Publishing cannot go on (the message says where and why)."""


@dataclass
class PublishCounts:
    """What happened to the rows (nothing dropped without a count)."""

    rows: int = 0  # rows of reconciled.csv read
    published: int = 0  # messages the client took
    acknowledged: int = 0  # acknowledged by the broker
    refused: int = 0  # refused by the client (stops the run)
    unacknowledged: int = 0  # still waiting when publishing stopped
    peak_in_flight: int = 0  # most messages taken and not yet acknowledged at one time

    def line(self, prefix: str) -> str:
        return (f"published {self.published} of {self.rows} rows to {prefix}/..., {self.acknowledged} acknowledged, "
                f"{self.refused} refused, {self.unacknowledged} unacknowledged")


def topic_for(prefix: str, name: str) -> str:
    """The topic of a reconciled.csv ``name`` (see the module docstring)."""
    kind, sep, rest = name.partition(":")
    return f"{prefix}/{kind}/{rest}" if sep else f"{prefix}/kpi/{name}"


def messages(path: Path) -> Iterator[tuple[int, str, dict[str, Any]]]:
    """``(line, name, payload)`` of every row of a reconciled.csv, streamed."""
    with open(path, encoding="utf-8", newline="") as f:
        reader = csv.reader(f)
        header = next(reader, None)
        if header is None or tuple(header) != COLUMNS:
            raise PublishError(f"{path}:1: header {','.join(header or [])!r}; expected {','.join(COLUMNS)}")
        for row in reader:
            line = reader.line_num
            if len(row) != len(COLUMNS):
                raise PublishError(f"{path}:{line}: {len(row)} fields; expected {len(COLUMNS)} ({','.join(COLUMNS)})")
            when, name, value, unc, unit, status, steady = row
            try:
                ts = datetime.fromisoformat(when.replace("Z", "+00:00")).timestamp()
                v = float(value)
                u = float(unc) if unc else None
            except ValueError as exc:
                raise PublishError(f"{path}:{line}: {exc}; expected an RFC 3339 window_end and numbers") from None
            if steady not in ("true", "false") or not math.isfinite(v):
                raise PublishError(f"{path}:{line}: value {value!r}, steady {steady!r}; expected a finite value "
                                   "and true/false")
            yield line, name, {"ts": ts, "window_end": when, "name": name, "value": v, "uncertainty_95": u,
                               "unit": unit, "status": status, "steady": steady == "true"}


class Publisher:
    """Publishes through a started :class:`twin.mqtt.MqttClient`, bounded in flight.

    Parameters
    ----------
    client : MqttClient
        Connected client (its ``publish`` and ``stats`` are used).
    qos : int
        1 or 2.
    max_in_flight : int
        Messages taken but not yet acknowledged, at most.
    timeout : float
        Longest wait for the broker to acknowledge anything [s].
    clock, sleep : callable
        Time source [s] and wait, for the waits.
    """

    def __init__(self, client: Any, qos: int = 1, max_in_flight: int = 100, timeout: float = 30.0,
                 clock: Callable[[], float] = time.monotonic, sleep: Callable[[float], None] = time.sleep) -> None:
        if qos not in (1, 2):
            raise ValueError(f"qos {qos!r}; expected 1 or 2 (every message acknowledged)")
        self.client = client
        self.qos = qos
        self.max_in_flight = max(1, int(max_in_flight))
        self.timeout = float(timeout)
        self.clock = clock
        self.sleep = sleep
        self.counts = PublishCounts()
        self._acked0 = client.stats().acknowledged

    def _acked(self) -> int:
        return self.client.stats().acknowledged - self._acked0

    def _wait(self, until_in_flight: int, what: str) -> None:
        """Wait until at most ``until_in_flight`` messages are unacknowledged."""
        last, since = self._acked(), self.clock()
        while self.counts.published - last > until_in_flight:
            self.sleep(0.002)
            now_acked = self._acked()
            if now_acked != last:
                last, since = now_acked, self.clock()
            elif self.clock() - since > self.timeout:
                self.counts.acknowledged = last
                self.counts.unacknowledged = self.counts.published - last
                why = self.client.last_error or ("not connected" if not self.client.connected else "no reply")
                raise PublishError(f"MQTT broker {self.client.settings.address} acknowledged nothing for "
                                   f"{self.timeout:g} s {what} ({last} of {self.counts.published} acknowledged; "
                                   f"{why}); expected a broker that takes QoS {self.qos} messages")
        self.counts.acknowledged = last

    def publish(self, topic: str, payload: dict[str, Any], where: str) -> None:
        if any(c in topic for c in WILDCARDS):
            raise PublishError(f"{where}: topic {topic!r} holds an MQTT wildcard or NUL; expected names without "
                               "'+', '#'")
        self._wait(self.max_in_flight - 1, "while publishing")
        if not self.client.publish(topic, json.dumps(payload), qos=self.qos):
            self.counts.refused += 1
            raise PublishError(f"{where}: publish to {topic!r} refused: {self.client.last_error}")
        self.counts.published += 1
        self.counts.peak_in_flight = max(self.counts.peak_in_flight, self.counts.published - self.counts.acknowledged)

    def finish(self) -> None:
        """Wait until every published message is acknowledged."""
        self._wait(0, "at the end")
        self.counts.unacknowledged = 0


def publish_file(client: Any, path: Path, prefix: str, qos: int, max_in_flight: int = 100,
                 timeout: float = 30.0, counts: PublishCounts | None = None) -> PublishCounts:
    """Every row of ``path`` (a reconciled.csv) to ``prefix``.

    Raises :class:`PublishError` on the first failure; ``counts`` (when given)
    holds what was done up to it.
    """
    pub = Publisher(client, qos=qos, max_in_flight=max_in_flight, timeout=timeout)
    if counts is not None:
        pub.counts = counts
    for line, name, payload in messages(path):
        pub.counts.rows += 1
        pub.publish(topic_for(prefix, name), payload, f"{path}:{line}")
    pub.finish()
    return pub.counts


def connect(settings: Any, timeout: float) -> Any:
    """A started and connected MqttClient with ``settings``; PublishError if the broker cannot be reached."""
    from twin.mqtt import MqttClient, MqttError

    try:
        client = MqttClient(settings, on_message=lambda *_: None)
    except MqttError as exc:
        raise PublishError(str(exc)) from None
    client.start()
    deadline = time.monotonic() + timeout
    while not client.connected:
        st = client.stats()
        if st.connect_failures or time.monotonic() > deadline:
            client.stop()
            why = client.last_error or f"no answer from MQTT broker {settings.address} within {timeout:g} s"
            raise PublishError(f"cannot publish: {why}; expected a reachable MQTT broker (the plant file's "
                               "[broker])")
        time.sleep(0.01)
    return client


def settings_for_backfill(settings: Any) -> Any:
    """The daemon's broker settings with a client id of its own (the daemon may be connected too)."""
    return replace(settings, client_id=(settings.client_id or "twin") + "-backfill", batch_receive=False)
