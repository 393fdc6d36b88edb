"""``twin bench ingest``: sustained MQTT ingest rate with zero loss, against ``mosquitto_sub``.

A private Mosquitto is started on a free port of 127.0.0.1 with its queues
sized for the run (the broker's default per-client queue of 1 000 QoS 1
messages drops silently as soon as a subscriber lags that far behind). The
subscribers read the same stream of N small JSON messages spread over T
topics at QoS 1:

* the twin ingest path in each configuration of :data:`CONFIGURATIONS`:
  :class:`twin.mqtt.MqttClient` → decode → SI conversion →
  :class:`twin.ingest.TagStore` (``batched``, the default: block reads,
  batched PUBACKs and the decode fast path; ``paho``: paho's own per-packet
  receive path, for comparison);
* ``mosquitto_sub -q 1`` (the C client, as a yardstick).

The load comes from P publisher processes, each a
:class:`twin.bench.ingest_publisher.BulkPublisher` (pre-encoded QoS 1
packets, a bounded in-flight window, every PUBACK checked), so the
publishers are not what is measured.

Modes: ``backlog`` (default) registers a persistent session for every
subscriber, publishes the whole stream into them, then lets each subscriber
drain its copy alone, one after the other: the subscriber's own speed, no
publisher limit, the same stream for all. ``live`` runs one pass per
configuration with the twin and ``mosquitto_sub`` reading while the
publishers send. Rates are N divided by the time from the subscriber's start
(backlog) or the publishers' start (live) to its N-th message; CPU seconds
are reported beside them because the machine may be shared. ``--repeat``
repeats everything on a fresh broker; each configuration reports its runs,
the best and the median.

Cycle latency (window close → published result), under ``"cycle"``: a
:class:`twin.daemon.Daemon` on the plant file closes ``--cycles`` windows of
simulated readings fed through a fresh broker (see
:mod:`twin.bench.ingest_cycle`). :data:`CYCLE_HOOK`, when set to a callable
``hook(store, topic_map, args) -> dict``, replaces that half.
"""

from __future__ import annotations

import argparse
import multiprocessing as mp
import os
import resource
import shutil
import socket
import statistics
import subprocess
import tempfile
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from twin.bench.ingest_publisher import BulkPublisher
from twin.ingest import Ingestor, PayloadFormat, TagBinding, TagStore, TopicMap
from twin.mqtt import MqttClient, MqttSettings

# Set by the daemon work: hook(store, topic_map, args) -> dict of cycle-latency figures.
CYCLE_HOOK: Callable[[TagStore, TopicMap, argparse.Namespace], dict[str, Any]] | None = None

GOAL_MESSAGES_PER_SECOND = 20_000.0

# name -> MqttSettings overrides; the first is the default the daemon uses.
CONFIGURATIONS: dict[str, dict[str, Any]] = {
    "batched": {"batch_receive": True},
    "paho": {"batch_receive": False},
}
DEFAULT_CONFIGURATION = "batched"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--messages", type=int, default=200_000, help="messages to send (N)")
    parser.add_argument("--topics", type=int, default=100, help="distinct topics (one tag each)")
    parser.add_argument(
        "--qos",
        type=int,
        default=1,
        choices=(0, 1),
        help="subscription QoS (messages are always published at QoS 1)",
    )
    parser.add_argument("--protocol", choices=("3.1.1", "5"), default="3.1.1")
    parser.add_argument(
        "--broker-queue",
        type=int,
        default=None,
        help="broker max_queued_messages per client (default: N, so a subscriber may lag "
        "by the whole run without loss)",
    )
    parser.add_argument(
        "--inflight", type=int, default=1000, help="each publisher's in-flight QoS 1 window"
    )
    parser.add_argument(
        "--publishers",
        type=int,
        default=2,
        help="publisher processes (each owns every P-th message)",
    )
    parser.add_argument(
        "--configs",
        default=",".join(CONFIGURATIONS),
        help=f"twin configurations to measure, comma-separated, from {sorted(CONFIGURATIONS)}",
    )
    parser.add_argument("--repeat", type=int, default=1, help="runs, each on a fresh broker")
    parser.add_argument(
        "--mode",
        choices=("backlog", "live"),
        default="backlog",
        help="backlog: publish everything into persistent sessions first, then time each "
        "subscriber draining it alone (subscriber speed, no publisher limit); live: the twin "
        "and mosquitto_sub read while the publishers send (one pass per configuration)",
    )
    parser.add_argument("--timeout", type=float, default=300.0, help="give up after [s]")
    parser.add_argument(
        "--no-mosquitto-sub", action="store_true", help="skip the mosquitto_sub comparison"
    )
    parser.add_argument(
        "--cycles",
        type=int,
        default=3,
        help="cycle-latency half: windows closed by a daemon on the plant file (0 = skip)",
    )
    parser.add_argument(
        "--config",
        default=None,
        help="plant file for the cycle-latency half (default: configs/demo-u1.toml)",
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
    port: int, index: int, count: int, n: int, n_topics: int, window: int, go: Any, out: Any
) -> None:
    """Publisher ``index`` of ``count``: sends messages k = index, index + count, ... < n."""
    try:
        now = time.time()
        messages = [(_topic(k, n_topics), _payload(k, now)) for k in range(index, n, count)]
        pub = BulkPublisher("127.0.0.1", port, f"bench-pub{index}", window=window)
    except Exception as exc:
        out.put({"error": f"publisher {index}: {exc}"})
        return
    out.put({"ready": True})
    go.wait()
    try:
        res = pub.publish_all(messages)
        pub.close()
    except Exception as exc:
        out.put({"error": f"publisher {index}: {exc}"})
        return
    out.put({**res, "acknowledged": len(messages)})


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


def _sub_cmd(port: int, qos: int, client_id: str, protocol: str, *extra: str) -> list[str]:
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
        client_id,
        "-V",
        "5" if protocol == "5" else "311",
        *extra,
    ]


def _children_cpu() -> float:
    ru = resource.getrusage(resource.RUSAGE_CHILDREN)
    return ru.ru_utime + ru.ru_stime


def _run_sub(cmd: list[str], t0: float | None, timeout: float) -> dict[str, Any]:
    """Run ``mosquitto_sub`` to completion; rate from ``t0`` (default: its start)."""
    c0 = _children_cpu()
    t_start = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL)
    try:
        proc.wait(timeout=timeout)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()
        return {"complete": False}
    seconds = time.perf_counter() - (t_start if t0 is None else t0)
    return {
        "complete": proc.returncode == 0,
        "seconds": seconds,
        "cpu_seconds": _children_cpu() - c0,
    }


class _Bench:
    """One broker, its topic map and the helpers shared by both modes."""

    def __init__(self, args: argparse.Namespace, port: int, log: Path, broker: Any) -> None:
        self.args, self.port, self.log, self.broker = args, port, log, broker
        self.n, self.n_topics, self.qos = int(args.messages), int(args.topics), int(args.qos)
        self.bindings = [
            TagBinding(
                f"tag{k:03d}",
                _topic(k, self.n_topics),
                PayloadFormat("json", "/v", "/ts"),
                scale=1e5,
            )
            for k in range(self.n_topics)
        ]
        self.topic_map = TopicMap(self.bindings)
        self.store = TagStore([b.tag for b in self.bindings], capacity=4096)

    def settings(self, config: str, client_id: str, persistent: bool) -> MqttSettings:
        return MqttSettings(
            port=self.port,
            protocol=self.args.protocol,
            qos=self.qos,
            client_id=client_id,
            max_inflight=1000,
            clean_session=not persistent,
            **CONFIGURATIONS[config],
        )

    def register(self, settings: MqttSettings) -> None:
        """Connect, subscribe and leave: the broker now queues for the session."""
        client = MqttClient(settings, lambda *a: None)
        client.subscribe({"bench/#": self.qos})
        client.start()
        try:
            _wait_log(self.log, settings.client_id, self.broker, 30)
        finally:
            client.stop()

    def publish(self) -> tuple[float, Callable[[], list[dict[str, Any]]]]:
        """Start the publishers, release them together; (start time, results)."""
        ctx = mp.get_context("spawn")
        go, out = ctx.Event(), ctx.Queue()
        n_pub = max(1, int(self.args.publishers))
        pubs = [
            ctx.Process(
                target=_publisher,
                args=(self.port, i, n_pub, self.n, self.n_topics, self.args.inflight, go, out),
            )
            for i in range(n_pub)
        ]
        for pub in pubs:
            pub.start()
        try:
            for _ in pubs:
                ready = out.get(timeout=120)
                if "error" in ready:
                    raise RuntimeError(ready["error"])
        except BaseException:
            for pub in pubs:
                pub.kill()
            raise
        t0 = time.perf_counter()
        go.set()

        def results() -> list[dict[str, Any]]:
            try:
                res = [out.get(timeout=self.args.timeout) for _ in pubs]
            finally:
                for pub in pubs:
                    pub.join(timeout=30)
                    if pub.is_alive():
                        pub.kill()
            errors = [r["error"] for r in res if "error" in r]
            if errors:
                raise RuntimeError("; ".join(errors))
            return res

        return t0, results

    def twin(
        self,
        settings: MqttSettings,
        t0: list[float] | None = None,
        ready: threading.Event | None = None,
    ) -> dict[str, Any]:
        """Receive the stream through the twin path.

        The rate counts from ``t0[0]`` when given (filled in by the caller
        before the stream can end: the publishers' start), else from the
        client's start; ``ready`` is set once the subscription is in force.
        """
        store = TagStore(self.store.tags, capacity=self.store.capacity)
        ingest = Ingestor(self.topic_map, store)
        counting = _Counting(ingest, self.n)
        client = MqttClient(settings, counting)
        client.subscribe({"bench/#": self.qos})
        c0 = time.process_time()
        t_start = time.perf_counter()
        client.start()
        try:
            if ready is not None:
                _wait_log(self.log, settings.client_id, self.broker, 30)
                ready.set()
            done = counting.done.wait(timeout=self.args.timeout)
            cpu = time.process_time() - c0
            time.sleep(0.2)  # let any duplicate or surplus delivery show up in the count
        finally:
            client.stop()
        self.store = store
        seconds = counting.t_done - (t0[0] if t0 else t_start) if done else None
        return {
            "twin_received": ingest.messages,
            "twin_lost": max(0, self.n - ingest.messages),
            "twin_samples_stored": ingest.samples,
            "twin_rejections": ingest.rejects.total,
            "twin_seconds": seconds,
            "twin_messages_per_second": self.n / seconds if seconds else None,
            "twin_cpu_seconds": cpu,
            "twin_callback_errors": client.stats().callback_errors,
        }


def _merge_sub(run: dict[str, Any], sub: dict[str, Any] | None, n: int) -> dict[str, Any]:
    if sub is not None:
        s = sub.get("seconds") if sub.get("complete") else None
        run["mosquitto_sub_complete"] = bool(sub.get("complete"))
        run["mosquitto_sub_seconds"] = s
        run["mosquitto_sub_messages_per_second"] = n / s if s else None
        run["mosquitto_sub_cpu_seconds"] = sub.get("cpu_seconds")
        if s and run["twin_seconds"]:
            run["twin_to_mosquitto_sub_ratio"] = s / run["twin_seconds"]
    return run


def _one_run(
    b: _Bench, configs: list[str], use_sub: bool
) -> tuple[dict[str, dict[str, Any]], list[dict[str, Any]]]:
    """One run on broker ``b``: {config: figures}, publisher results."""
    n, a = b.n, b.args
    out: dict[str, dict[str, Any]] = {}
    pub_results: list[dict[str, Any]] = []
    if a.mode == "backlog":
        for cfg in configs:
            b.register(b.settings(cfg, f"bench-{cfg}", persistent=True))
        sub_id = "bench-sub"
        if use_sub:
            _run_sub(_sub_cmd(b.port, b.qos, sub_id, a.protocol, "-c", "-E"), None, 30)
        _, results = b.publish()
        pub_results = results()
        sub = None
        if use_sub:
            sub = _run_sub(
                _sub_cmd(b.port, b.qos, sub_id, a.protocol, "-c", "-C", str(n)), None, a.timeout
            )
        for cfg in configs:
            out[cfg] = _merge_sub(b.twin(b.settings(cfg, f"bench-{cfg}", persistent=True)), sub, n)
        return out, pub_results
    for k, cfg in enumerate(configs):  # live: one pass per configuration
        sub_id = f"bench-sub{k}"
        sub_proc = None
        if use_sub:
            sub_proc = subprocess.Popen(
                _sub_cmd(b.port, b.qos, sub_id, a.protocol, "-C", str(n)), stdout=subprocess.DEVNULL
            )
            _wait_log(b.log, sub_id, b.broker, 30)
        ready = threading.Event()
        box: dict[str, Any] = {}
        t0_box: list[float] = []
        c0 = _children_cpu()
        settings = b.settings(cfg, f"bench-{cfg}{k}", persistent=False)
        th = threading.Thread(
            target=lambda s=settings, bx=box, t=t0_box, r=ready: bx.update(b.twin(s, t, r))
        )
        th.start()
        if not ready.wait(60):
            raise RuntimeError("the twin subscriber did not subscribe")
        t0, results = b.publish()
        t0_box.append(t0)
        sub = None
        if sub_proc is not None:
            try:
                sub_proc.wait(timeout=a.timeout)
                sub = {
                    "complete": sub_proc.returncode == 0,
                    "seconds": time.perf_counter() - t0,
                    "cpu_seconds": _children_cpu() - c0,
                }
            except subprocess.TimeoutExpired:
                sub_proc.kill()
                sub_proc.wait()
                sub = {"complete": False}
        th.join()
        pub_results = results()
        out[cfg] = _merge_sub(box, sub, n)
    return out, pub_results


def _summary(runs: list[dict[str, Any]], n: int) -> dict[str, Any]:
    rates = [r["twin_messages_per_second"] or 0.0 for r in runs]
    subs = [r.get("mosquitto_sub_messages_per_second") or 0.0 for r in runs]
    ratios = [
        r["twin_to_mosquitto_sub_ratio"] for r in runs if r.get("twin_to_mosquitto_sub_ratio")
    ]
    lost = sum(r["twin_lost"] for r in runs)
    cpu = [r["twin_cpu_seconds"] for r in runs if r["twin_cpu_seconds"]]
    median = statistics.median(rates)
    return {
        "twin_messages_per_second_best": max(rates),
        "twin_messages_per_second_median": median,
        "twin_messages_per_cpu_second_best": n / min(cpu) if cpu else None,
        "mosquitto_sub_messages_per_second_best": max(subs) or None,
        "twin_to_mosquitto_sub_ratio_median": statistics.median(ratios) if ratios else None,
        "lost": lost,
        "meets_goal": median >= GOAL_MESSAGES_PER_SECOND and lost == 0,
        "runs": runs,
    }


def run(args: argparse.Namespace) -> dict[str, Any]:
    n = int(args.messages)
    configs = [c.strip() for c in str(args.configs).split(",") if c.strip()]
    unknown = sorted(set(configs) - set(CONFIGURATIONS))
    if unknown or not configs:
        raise SystemExit(
            f"twin bench ingest: unknown configurations {unknown or configs!r}; "
            f"choose from {sorted(CONFIGURATIONS)}"
        )
    if args.mode == "backlog" and args.qos == 0:
        raise SystemExit(
            "twin bench ingest: backlog mode needs qos 1 (the broker queues only QoS 1/2)"
        )
    use_sub = not args.no_mosquitto_sub and shutil.which("mosquitto_sub") is not None
    queue = n if args.broker_queue is None else int(args.broker_queue)
    figures: dict[str, Any] = {
        "mode": args.mode,
        "messages": n,
        "topics": int(args.topics),
        "qos": int(args.qos),
        "protocol": args.protocol,
        "broker_max_queued_messages": queue,
        "publisher_inflight": args.inflight,
        "publishers": max(1, int(args.publishers)),
        "repeat": max(1, int(args.repeat)),
        "goal_messages_per_second": GOAL_MESSAGES_PER_SECOND,
        "default_configuration": DEFAULT_CONFIGURATION,
    }
    per_config: dict[str, list[dict[str, Any]]] = {c: [] for c in configs}
    pub_rates: list[float] = []
    unacked = 0
    bench: _Bench | None = None
    for _ in range(max(1, int(args.repeat))):
        with tempfile.TemporaryDirectory(prefix="twin-bench-") as tmp:
            broker, port, log = _start_broker(Path(tmp), queue)
            try:
                bench = _Bench(args, port, log, broker)
                runs, pubs = _one_run(bench, configs, use_sub)
            finally:
                broker.kill()
                broker.wait()
        for c, r in runs.items():
            per_config[c].append(r)
        pub_rates.append(n / max(p["publish_seconds"] for p in pubs))
        unacked += n - sum(p["acknowledged"] for p in pubs)
    assert bench is not None
    figures["configurations"] = {c: _summary(rs, n) for c, rs in per_config.items()}
    figures["publisher_messages_per_second"] = max(pub_rates)
    figures["publisher_unacknowledged"] = unacked
    # top-level figures: the first configuration measured, its best run
    main = configs[0]
    best = max(per_config[main], key=lambda r: r["twin_messages_per_second"] or 0.0)
    figures["reported_configuration"] = main
    figures.update(best)
    figures["meets_goal"] = figures["configurations"][main]["meets_goal"]
    figures["decode_store_messages_per_second"] = _decode_store_rate(
        bench.topic_map, TagStore(bench.store.tags), min(n, 100_000), int(args.topics)
    )
    figures["cycle"] = _cycle_figures(bench, args, queue)
    return figures


def _cycle_figures(bench: _Bench, args: argparse.Namespace, queue: int) -> dict[str, Any] | None:
    """The cycle-latency half: the hook if one is set, else a daemon on a fresh broker."""
    if CYCLE_HOOK is not None:
        return CYCLE_HOOK(bench.store, bench.topic_map, args)
    if int(args.cycles) <= 0:
        return None
    from twin.bench import DEFAULT_CONFIG
    from twin.bench.ingest_cycle import cycle_latency

    with tempfile.TemporaryDirectory(prefix="twin-bench-") as tmp:
        broker, port, _ = _start_broker(Path(tmp), max(queue, 10_000))
        try:
            return cycle_latency(
                port, int(args.cycles), args.config or DEFAULT_CONFIG, float(args.timeout)
            )
        finally:
            broker.kill()
            broker.wait()
