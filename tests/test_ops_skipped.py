"""Windows the daemon falls behind on are counted, logged and exported, never skipped silently."""

from __future__ import annotations

import logging
import re
import threading
from datetime import UTC, datetime

import pytest

from tests.test_daemon_e2e import T0, demo_config, shared_reconciler
from twin.daemon import Daemon, DaemonOptions


class JumpingClock:
    """A clock that jumps ``step`` seconds at every reading: the loop always finds itself late."""

    def __init__(self, t: float, step: float) -> None:
        self.t, self.step = float(t), float(step)

    def now(self) -> float:
        self.t += self.step
        return self.t

    def sleep(self, seconds: float, stop: threading.Event) -> None:
        stop.wait(0.001)


def test_fallen_behind_windows_are_counted_and_logged(caplog: pytest.LogCaptureFixture) -> None:
    reconciler = shared_reconciler()
    reconciler.reset()
    config = demo_config()
    daemon = Daemon(config, clock=JumpingClock(T0, 13.0), reconciler=reconciler,
                    options=DaemonOptions(metrics=False, republish=False, grace_seconds=0.0))
    closed: list[float] = []
    with caplog.at_level(logging.WARNING, logger="twin.daemon"):
        daemon.run(duration=400.0, on_result=lambda r: closed.append(r.window_end))
    cycle = daemon.cycle_seconds
    lines = [r.getMessage() for r in caplog.records if r.getMessage().startswith("event=windows_skipped ")]
    logged = sum(int(re.search(r" count=(\d+)", ln).group(1)) for ln in lines)
    assert daemon.windows_skipped > 0 and logged == daemon.windows_skipped
    # closed and logged-as-skipped windows tile the time run through: none lost without a trace
    skipped = []
    for ln in lines:
        first = datetime.strptime(re.search(r" window_end=(\S+)", ln).group(1), "%Y-%m-%dT%H:%M:%S.%fZ")
        t = first.replace(tzinfo=UTC).timestamp()
        skipped += [t + k * cycle for k in range(int(re.search(r" count=(\d+)", ln).group(1)))]
    ends = sorted(closed + skipped)
    assert len(set(ends)) == len(ends)  # no window both closed and skipped
    assert ends == [ends[0] + k * cycle for k in range(len(ends))]
    assert daemon.health().windows_skipped == daemon.windows_skipped
