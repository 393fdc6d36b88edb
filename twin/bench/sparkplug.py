"""``twin bench sparkplug``: cost of the Sparkplug B ingest path, in process (no broker).

One edge node with one device declares ``--metrics`` metrics (NBIRTH, DBIRTH with
aliases), all bound to sensors; then ``--messages`` pre-encoded DDATA messages,
each with ``--per-message`` metrics by alias and per-metric timestamps, go
through :class:`twin.ingest.Ingestor` → :class:`twin.ingest.sparkplug.SparkplugSession`
→ :class:`twin.ingest.TagStore`, exactly as the daemon's MQTT thread calls it.
For comparison the same samples go through the JSON ``batch`` path (one message
carrying the same tags by name). Reported: messages and samples per second
(best of ``--repeat``), the protobuf decode alone per message, and which protobuf
backend ran (``upb`` is the C extension). The machine may be shared: CPU
seconds and the 1-minute load average are beside the rates.
"""

from __future__ import annotations

import argparse
import json
import os
import time


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--messages", type=int, default=20000, help="DDATA messages per run (default 20000)")
    parser.add_argument("--metrics", type=int, default=50, help="metrics declared by the device (default 50)")
    parser.add_argument("--per-message", type=int, default=10, help="metrics per DDATA message (default 10)")
    parser.add_argument("--repeat", type=int, default=3, help="repeats; the best is kept (default 3)")


def run(args: argparse.Namespace) -> dict:
    from twin.ingest import Ingestor, PayloadFormat, TagBinding, TagStore, TopicMap
    from twin.ingest.sparkplug import SparkplugSession
    from twin.sparkplug import PROTOBUF_BACKEND, decode_payload, encode_payload

    n, k, per = int(args.messages), int(args.metrics), int(args.per_message)
    if not (n > 0 and 0 < per <= k):
        raise SystemExit("twin bench sparkplug: expected --messages > 0 and 0 < --per-message <= --metrics")
    t0_ms = 1_700_000_000_000
    data_topic = "spBv1.0/bench/DDATA/edge1/dev1"
    tags = [f"T{i:03d}" for i in range(k)]
    sp_bindings = [TagBinding(t, data_topic, PayloadFormat("sparkplug", metric=f"Folder/M{i}"))
                   for i, t in enumerate(tags)]
    births = [("spBv1.0/bench/NBIRTH/edge1", encode_payload(
        [{"name": "bdSeq", "timestamp": t0_ms, "datatype": "Int64", "value": 0}], timestamp_ms=t0_ms, seq=0)),
              ("spBv1.0/bench/DBIRTH/edge1/dev1", encode_payload(
                  [{"name": f"Folder/M{i}", "alias": i, "timestamp": t0_ms, "datatype": "Double", "value": 0.0}
                   for i in range(k)], timestamp_ms=t0_ms, seq=1))]
    messages = []
    batches = []
    for j in range(n):
        ms = t0_ms + 10 * j
        idx = [(j * per + q) % k for q in range(per)]
        messages.append(encode_payload([{"alias": i, "timestamp": ms, "datatype": "Double", "value": 1.0 + j}
                                        for i in idx], timestamp_ms=ms, seq=(2 + j) % 256))
        batches.append(json.dumps({"ts": ms / 1e3, "values": {tags[i]: 1.0 + j for i in idx}}).encode())

    def sparkplug_pass() -> float:
        store = TagStore(tags, capacity=4096)
        ingest = Ingestor(TopicMap([]), store, sparkplug=SparkplugSession(sp_bindings))
        for topic, payload in births:
            ingest(topic, payload, t0_ms / 1e3)
        start = time.perf_counter()
        for j, payload in enumerate(messages):
            ingest(data_topic, payload, t0_ms / 1e3 + 0.01 * j)
        elapsed = time.perf_counter() - start
        assert ingest.samples == n * per + k and ingest.rejects.total == 0, (ingest.samples, ingest.rejects.counts())
        return elapsed

    def json_pass() -> float:
        fmt = PayloadFormat("batch")
        store = TagStore(tags, capacity=4096)
        ingest = Ingestor(TopicMap([TagBinding(t, "bench/batch", fmt) for t in tags]), store)
        start = time.perf_counter()
        for j, payload in enumerate(batches):
            ingest("bench/batch", payload, t0_ms / 1e3 + 0.01 * j)
        elapsed = time.perf_counter() - start
        assert ingest.samples == n * per and ingest.rejects.total == 0
        return elapsed

    def decode_pass() -> float:
        start = time.perf_counter()
        for payload in messages:
            decode_payload(payload)
        return time.perf_counter() - start

    cpu0 = time.process_time()
    sp = min(sparkplug_pass() for _ in range(args.repeat))
    js = min(json_pass() for _ in range(args.repeat))
    dec = min(decode_pass() for _ in range(args.repeat))
    return {
        "benchmark": "sparkplug",
        "messages": n, "metrics_declared": k, "metrics_per_message": per, "repeat": args.repeat,
        "protobuf_backend": PROTOBUF_BACKEND,
        "sparkplug_messages_per_second": n / sp, "sparkplug_samples_per_second": n * per / sp,
        "sparkplug_us_per_message": sp / n * 1e6,
        "decode_only_us_per_message": dec / n * 1e6,
        "json_batch_messages_per_second": n / js, "json_batch_us_per_message": js / n * 1e6,
        "sparkplug_over_json_batch_time_ratio": sp / js,
        "cpu_seconds": time.process_time() - cpu0,
        "load_average_1min": os.getloadavg()[0],
    }
