"""``twin bench ingest``: sustained MQTT ingest rate with zero loss, against ``mosquitto_sub``.

A private Mosquitto is started on a free port of 127.0.0.1 with its queues
sized for the run (the broker's default per-client queue of 1 000 QoS 1
messages drops silently as soon as a subscriber lags that far behind). Two
subscribers read the same stream of N small JSON messages spread over T
topics at QoS 1:

* the twin ingest path: :class:`twin.mqtt.MqttClient` → decode → SI
  conversion → :class:`twin.ingest.TagStore`;
* ``mosquitto_sub -C N -q 1`` (the C client, as a yardstick).

A separate publisher process (also :class:`twin.mqtt.MqttClient`) sends the
messages with a bounded in-flight window and checks every return code (a full
queue is retried, never ignored). The figures: messages/s for each subscriber
from the publisher's start to its own last message, their ratio, the
publisher's own rate, loss counts, and the decode+store rate with no network.

Cycle latency (window close → published result) needs the daemon: set
:data:`CYCLE_HOOK` to a callable ``hook(store, topic_map, args) -> dict`` and
its figures are merged into the output under ``"cycle"``.
"""

from __future__ import annotations

import argparse
import multiprocessing as mp
import os
import shutil
import socket
import subprocess
import tempfile
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from twin.ingest import Ingestor, PayloadFormat, TagBinding, TagStore, TopicMap
from twin.mqtt import MqttClient, MqttSettings

# Set by the daemon work: hook(store, topic_map, args) -> dict of cycle-latency figures.
CYCLE_HOOK: Callable[[TagStore, TopicMap, argparse.Namespace], dict[str, Any]] | None = None

GOAL_MESSAGES_PER_SECOND = 20_000.0


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--messages", type=int, default=200_000, help="messages to send (N)")
    parser.add_argument("--topics", type=int, default=100, help="distinct topics (one tag each)")
    parser.add_argument("--qos", type=int, default=1, choices=(0, 1, 2))
    parser.add_argument(
        "--broker-queue",
        type=int,
        default=None,
        help="broker max_queued_messages per client (default: N, so a subscriber may lag "
        "by the whole run without loss)",
    )
    parser.add_argument(
        "--inflight", type=int, default=1000, help="publisher's in-flight QoS 1 window"
    )
    parser.add_argument(
        "--publishers",
        type=int,
        default=2,
        help="publisher processes (each owns every P-th topic); one Python client tops out "
        "well below the subscriber on small machines",
    )
    parser.add_argument(
        "--mode",
        choices=("backlog", "live"),
        default="backlog",
        help="backlog: publish everything into persistent sessions first, then time each "
        "subscriber draining it alone (subscriber speed, no publisher limit); live: both "
        "subscribers read while the publishers send (bounded by the publishers)",
    )
    parser.add_argument("--timeout", type=float, default=300.0, help="give up after [s]")
    parser.add_argument(
        "--no-mosquitto-sub", action="store_true", help="skip the mosquitto_sub comparison"
    )


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _payload(k: int, t: float) -> bytes:
    return b'{"v":%.3f,"ts":%.3f}' % (100.0 + (k % 97) * 0.01, t)


def _topic(k: int, n_topics: int) -> str:
    return f"bench/u1/tag{k % n_topics:03d}"


def _publisher(
    port: int,
    index: int,
    count: int,
    n: int,
    n_topics: int,
    qos: int,
    inflight: int,
    go: Any,
    out: Any,
) -> None:
    """Publisher ``index`` of ``count``: sends messages k = index, index + count, ... < n.

    Bounded window (``inflight`` sent unacknowledged, twice that queued); every
    return code is checked and a full queue is retried after a short pause.
    """
    settings = MqttSettings(
        port=port,
        qos=qos,
        max_inflight=inflight,
        max_queued=2 * inflight,
        client_id=f"bench-pub{index}",
    )
    client = MqttClient(settings, lambda *a: None)
    client.start()
    if not client.wait_connected(30):
        out.put({"error": client.last_error or "publisher could not connect"})
        return
    topics = [_topic(k, n_topics) for k in range(n_topics)]
    out.put({"ready": True})
    go.wait()
    t0 = time.perf_counter()
    retries = 0
    now = time.time()
    for k in range(index, n, count):
        payload = _payload(k, now)
        topic = topics[k % n_topics]
        while not client.publish(topic, payload, qos=qos):
            retries += 1
            time.sleep(0.001)
    t_sent = time.perf_counter()
    while client.stats().pending > 0 and time.perf_counter() - t_sent < 60:
        time.sleep(0.001)
    t_acked = time.perf_counter()
    stats = client.stats()
    client.stop()
    out.put(
        {
            "publish_seconds": t_sent - t0,
            "acked_seconds": t_acked - t0,
            "queue_full_retries": retries,
            "unacknowledged": stats.pending,
        }
    )


def _wait_log(log: Path, needle: str, proc: subprocess.Popen[bytes] | None, timeout: float) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if log.exists() and needle in log.read_text(errors="replace"):
            return
        if proc is not None and proc.poll() is not None:
            break
        time.sleep(0.01)
    raise RuntimeError(f"timed out waiting for {needle!r} in the broker log {log}")


def _decode_store_rate(topic_map: TopicMap, store: TagStore, n: int, n_topics: int) -> float:
    """Decode + convert + store with no network [messages/s]."""
    ingest = Ingestor(topic_map, store)
    now = time.time()
    msgs = [(_topic(k, n_topics), _payload(k, now)) for k in range(n)]
    t0 = time.perf_counter()
    for topic, payload in msgs:
        ingest(topic, payload, now)
    return n / (time.perf_counter() - t0)


def _start_broker(d: Path, queue: int) -> tuple[subprocess.Popen[bytes], int, Path]:
    mosquitto = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
    if not os.access(mosquitto, os.X_OK):
        raise SystemExit("twin bench ingest: mosquitto is not installed")
    port = _free_port()
    log = d / "mosquitto.log"
    conf = d / "mosquitto.conf"
    lines = [
        f"listener {port} 127.0.0.1",
        "allow_anonymous true",
        "persistence false",
        # Sized on purpose: a subscriber may fall the whole run behind without loss.
        f"max_queued_messages {queue}",
        "max_queued_bytes 0",
        # QoS 1 messages in flight to each subscriber (the default 20 throttles a fast link).
        "max_inflight_messages 1000",
        "set_tcp_nodelay true",
        "log_type error",
        "log_type warning",
        "log_type subscribe",
        f"log_dest file {log}",
    ]
    if os.geteuid() == 0:
        lines.append("user root")
    conf.write_text("\n".join(lines) + "\n")
    broker = subprocess.Popen([mosquitto, "-c", str(conf)], stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 10
    while True:
        try:
            socket.create_connection(("127.0.0.1", port), timeout=0.2).close()
            return broker, port, log
        except OSError:
            if broker.poll() is not None or time.monotonic() > deadline:
                broker.kill()
                raise RuntimeError("the benchmark broker did not start") from None
            time.sleep(0.02)


class _Counting:
    """The twin ingest path plus a timestamp when the N-th message arrives."""

    def __init__(self, ingest: Ingestor, n: int) -> None:
        self.ingest, self.n = ingest, n
        self.done = threading.Event()
        self.t_done = 0.0

    def __call__(self, topic: str, payload: bytes, now: float) -> None:
        self.ingest(topic, payload, now)
        if self.ingest.messages == self.n:
            self.t_done = time.perf_counter()
            self.done.set()


def _sub_cmd(port: int, qos: int, *extra: str) -> list[str]:
    return [
        "mosquitto_sub",
        "-h",
        "127.0.0.1",
        "-p",
        str(port),
        "-q",
        str(qos),
        "-t",
        "bench/#",
        "-i",
        "bench-sub",
        *extra,
    ]


def _publish_all(
    port: int, args: argparse.Namespace, n: int, n_topics: int, qos: int, procs: list[Any]
) -> tuple[float, Callable[[], list[dict[str, Any]]]]:
    """Start the publisher processes, release them together; (start time, results)."""
    ctx = mp.get_context("spawn")
    go, out = ctx.Event(), ctx.Queue()
    n_pub = max(1, int(args.publishers))
    pubs = [
        ctx.Process(
            target=_publisher, args=(port, i, n_pub, n, n_topics, qos, args.inflight, go, out)
        )
        for i in range(n_pub)
    ]
    for pub in pubs:
        pub.start()
        procs.append(pub)
    for _ in pubs:
        ready = out.get(timeout=60)
        if "error" in ready:
            raise RuntimeError(f"publisher: {ready['error']}")
    t0 = time.perf_counter()
    go.set()

    def results() -> list[dict[str, Any]]:
        res = [out.get(timeout=args.timeout) for _ in pubs]
        for pub in pubs:
            pub.join(timeout=30)
        return res

    return t0, results


def run(args: argparse.Namespace) -> dict[str, Any]:
    n, n_topics, qos = int(args.messages), int(args.topics), int(args.qos)
    use_sub = not args.no_mosquitto_sub and shutil.which("mosquitto_sub") is not None
    queue = n if args.broker_queue is None else int(args.broker_queue)
    backlog = args.mode == "backlog"
    if backlog and qos == 0:
        raise SystemExit(
            "twin bench ingest: backlog mode needs qos 1 or 2 (the broker queues only those)"
        )
    bindings = [
        TagBinding(
            f"tag{k:03d}", _topic(k, n_topics), PayloadFormat("json", "/v", "/ts"), scale=1e5
        )
        for k in range(n_topics)
    ]
    topic_map = TopicMap(bindings)
    store = TagStore([b.tag for b in bindings], capacity=4096)
    ingest = Ingestor(topic_map, store)
    counting = _Counting(ingest, n)
    figures: dict[str, Any] = {
        "mode": args.mode,
        "messages": n,
        "topics": n_topics,
        "qos": qos,
        "broker_max_queued_messages": queue,
        "publisher_inflight": args.inflight,
        "publishers": max(1, int(args.publishers)),
        "goal_messages_per_second": GOAL_MESSAGES_PER_SECOND,
    }
    with tempfile.TemporaryDirectory(prefix="twin-bench-") as tmp:
        broker, port, log = _start_broker(Path(tmp), queue)
        twin_settings = MqttSettings(
            port=port,
            qos=qos,
            client_id="bench-twin",
            max_inflight=1000,
            clean_session=not backlog,
        )
        procs: list[Any] = []
        clients: list[MqttClient] = []
        try:
            twin_sub = MqttClient(twin_settings, counting)
            clients.append(twin_sub)
            twin_sub.subscribe({"bench/#": qos})
            twin_sub.start()
            _wait_log(log, "bench-twin", broker, 30)
            sub = None
            if use_sub:
                extra = ("-c", "-E") if backlog else ("-C", str(n))
                sub = subprocess.Popen(_sub_cmd(port, qos, *extra), stdout=subprocess.DEVNULL)
                procs.append(sub)
                _wait_log(log, "bench-sub", broker, 30)
                if backlog:
                    sub.wait(timeout=30)  # -E: registered the persistent session and left
            if backlog:
                twin_sub.stop()  # the broker now queues for both sessions
                clients.remove(twin_sub)
            t0, results = _publish_all(port, args, n, n_topics, qos, procs)
            sub_seconds = twin_seconds = None
            if backlog:
                pub_results = results()
                t_sent = time.perf_counter()
                if sub is not None:  # each subscriber drains the backlog alone, one after the other
                    t1 = time.perf_counter()
                    sub = subprocess.Popen(
                        _sub_cmd(port, qos, "-c", "-C", str(n)), stdout=subprocess.DEVNULL
                    )
                    procs.append(sub)
                    try:
                        sub.wait(timeout=args.timeout)
                        sub_seconds = time.perf_counter() - t1
                    except subprocess.TimeoutExpired:
                        sub.kill()
                t1 = time.perf_counter()
                twin_sub = MqttClient(twin_settings, counting)
                clients.append(twin_sub)
                twin_sub.start()
                if counting.done.wait(timeout=args.timeout):
                    twin_seconds = counting.t_done - t1
                figures["publish_seconds"] = t_sent - t0
            else:
                if sub is not None:
                    try:
                        sub.wait(timeout=args.timeout)
                        sub_seconds = time.perf_counter() - t0
                    except subprocess.TimeoutExpired:
                        sub.kill()
                if counting.done.wait(timeout=args.timeout):
                    twin_seconds = counting.t_done - t0
                pub_results = results()
            time.sleep(0.2)  # let any duplicate or surplus delivery show up in the count
            figures.update(
                {
                    "publisher_messages_per_second": n
                    / max(r["publish_seconds"] for r in pub_results),
                    "publisher_queue_full_retries": sum(
                        r["queue_full_retries"] for r in pub_results
                    ),
                    "publisher_unacknowledged": sum(r["unacknowledged"] for r in pub_results),
                    "twin_received": ingest.messages,
                    "twin_lost": n - ingest.messages,
                    "twin_samples_stored": ingest.samples,
                    "twin_rejections": ingest.rejects.total,
                    "twin_seconds": twin_seconds,
                    "twin_messages_per_second": n / twin_seconds if twin_seconds else None,
                    "mosquitto_sub_seconds": sub_seconds,
                    "mosquitto_sub_messages_per_second": n / sub_seconds if sub_seconds else None,
                    "mosquitto_sub_complete": (sub_seconds is not None) if use_sub else None,
                }
            )
            if twin_seconds and sub_seconds:
                figures["twin_to_mosquitto_sub_ratio"] = sub_seconds / twin_seconds
            if twin_seconds:
                figures["meets_goal"] = n / twin_seconds >= GOAL_MESSAGES_PER_SECOND and (
                    ingest.messages == n
                )
        finally:
            for c in clients:
                c.stop()
            for p in procs:
                if isinstance(p, subprocess.Popen):
                    if p.poll() is None:
                        p.kill()
                        p.wait()
                elif p.is_alive():
                    p.kill()
                    p.join()
            broker.kill()
            broker.wait()
    figures["decode_store_messages_per_second"] = _decode_store_rate(
        topic_map, TagStore(store.tags), min(n, 100_000), n_topics
    )
    figures["cycle"] = CYCLE_HOOK(store, topic_map, args) if CYCLE_HOOK is not None else None
    return figures
