"""The demo's log lines carry the simulated minute beside the RFC 3339 wall time."""

from __future__ import annotations

import json
import logging

from twin.cli import JsonFormatter, TextFormatter
from twin.commands.demo import SimMinute
from twin.daemon import log_event


def test_demo_log_lines_show_the_simulated_minute() -> None:
    now = [1_000.0 + 30 * 60.0 + 45.0]  # 30.75 simulated minutes after the start
    records: list[logging.LogRecord] = []

    class Keep(logging.Handler):
        def emit(self, record: logging.LogRecord) -> None:
            records.append(record)

    handler = Keep()
    handler.addFilter(SimMinute(lambda: now[0], 1_000.0))
    log = logging.getLogger("twin.daemon")
    log.addHandler(handler)
    old = log.level
    log.setLevel(logging.INFO)
    try:
        log_event(logging.INFO, "alarm_transition", alarm="exhaust_moisture", new="active")
    finally:
        log.removeHandler(handler)
        log.setLevel(old)
    (rec,) = records
    assert TextFormatter().format(rec).endswith("event=alarm_transition alarm=exhaust_moisture new=active sim_minute=30.75")
    doc = json.loads(JsonFormatter().format(rec))
    assert doc["sim_minute"] == 30.75 and doc["alarm"] == "exhaust_moisture"
