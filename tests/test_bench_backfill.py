"""``twin bench backfill`` end to end on a short span: the JSON it documents, from real runs.

Truth outside the bench: the back-fill's own outputs (the windows it reports are
the rows of the grid) and the kernel's accounting of each child's peak memory.
No timing is asserted (figures are measurements, not tests).
"""

from __future__ import annotations

import argparse
import json

import pytest

from twin.bench import backfill as bench


@pytest.mark.slow
def test_bench_backfill_reports_rates_shares_and_memory_by_span():
    parser = argparse.ArgumentParser()
    bench.add_arguments(parser)
    args = parser.parse_args(["--hours", "0.5", "--workers", "1", "--read-rows", "5000", "--read-repeats", "1",
                              "--live-windows", "3", "--memory-hours", "0.5,1"])
    doc = json.loads(json.dumps(bench.run(args)))  # JSON-able
    one = doc["backfill"]["1"]
    assert one["windows"] == 29 and one["chunks"] == 2  # 30 minutes of 1-minute windows: the first whole one ends at 2 min
    shares = one["time_shares"]
    assert set(shares) >= {"reconciliation", "drift_pass", "backfill_overhead"} and sum(shares.values()) == pytest.approx(1.0, abs=0.02)
    mem = doc["memory"]
    assert [r["hours"] for r in mem["runs"]] == [0.5, 1.0]
    assert all(r["peak_rss_mb"] > 50 for r in mem["runs"]) and mem["growth_mb_per_hour"] is not None
    assert doc["reading"]["rows"] > 0 and doc["live"]["windows"] == 3
