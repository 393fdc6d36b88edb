"""``twin backfill CONFIG HISTORY... --out DIR``: the live pipeline over historian exports."""

from __future__ import annotations

import argparse
import logging
import math
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

from twin.commands.simulate import parse_time


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("config", help="plant configuration file (TOML)")
    parser.add_argument("history", nargs="+", help="historian exports: CSV (long timestamp,tag,value[,quality] "
                        "or wide timestamp,<TAG>,...), optionally .gz, or Parquet")
    parser.add_argument("--out", required=True, help="output directory (resumed when it holds the same back-fill)")
    parser.add_argument("--from", dest="t_from", default=None, help="start, RFC 3339 or epoch s (default: first sample)")
    parser.add_argument("--to", dest="t_to", default=None, help="end, RFC 3339 or epoch s (default: last sample)")
    parser.add_argument("--format", default="csv,openmetrics",
                        help="comma-separated outputs: csv, parquet, openmetrics (default csv,openmetrics)")
    parser.add_argument("--workers", type=int, default=0, help="worker processes (default: the core count)")
    parser.add_argument("--scheduler", default=None, metavar="ADDRESS",
                        help="run the chunks on a Dask distributed scheduler (tcp://HOST:PORT; twin[cluster]); "
                             "the output directory must be on a file system the workers share")
    parser.add_argument("--tsdb", default=None, metavar="DIR",
                        help="build Prometheus TSDB blocks from the OpenMetrics output into DIR with promtool")
    parser.add_argument("--chunk", type=float, default=None,
                        help="chunk length [h] (default 1440 windows: a day at 1-minute windows, 4 h at 10 s)")
    parser.add_argument("--warmup", type=float, default=None,
                        help="warm-up overlap before each chunk [min] (default 60 windows, 4 %% of a default chunk)")
    parser.add_argument("--cycle", type=float, default=None, help="window grid step [s] (default: the config's cycle)")
    parser.add_argument("--window", type=float, default=None, help="window length [s] (default: the config's window)")
    parser.add_argument("--timestamps", default="auto", choices=("auto", "rfc3339", "local", "epoch_s", "epoch_ms"),
                        help="timestamp kind (default auto: detected and stated)")
    parser.add_argument("--timezone", default=None, help="IANA zone of local timestamps without an offset")
    parser.add_argument("--good-quality", default=None,
                        help="comma-separated quality values taken as good (default good,192,0xc0,ok; empty is good)")
    parser.add_argument("--publish", action="store_true",
                        help="republish the reconciled.csv rows on MQTT (broker from the plant file's [broker]; "
                             "topics <prefix>/kpi|tag|expected|deviation/<name>, window timestamp in the payload)")
    parser.add_argument("--publish-prefix", default=None, metavar="TOPIC",
                        help="topic prefix of --publish (default <republish_prefix>/backfill, i.e. "
                             "twin/<unit id>/backfill)")
    parser.add_argument("--publish-in-flight", type=int, default=100, metavar="N",
                        help="messages published but not yet acknowledged, at most (default 100)")
    parser.add_argument("--publish-timeout", type=float, default=30.0, metavar="S",
                        help="longest wait for the broker to connect or acknowledge [s] (default 30)")
    parser.add_argument("--log-level", default="INFO", choices=("DEBUG", "INFO", "WARNING", "ERROR"))


def _say(text: str) -> None:
    print(text, file=sys.stderr, flush=True)


def run(args: argparse.Namespace) -> int:
    logging.basicConfig(level=getattr(logging, args.log_level), stream=sys.stderr,
                        format="%(asctime)s %(levelname)s %(name)s %(message)s")
    from twin.backfill import FORMATS, BackfillError, BackfillOptions, backfill
    from twin.config import ConfigError, load_config
    from twin.history import HistoryError

    formats = tuple(f.strip() for f in args.format.split(",") if f.strip())
    bad = [f for f in formats if f not in FORMATS]
    if bad or not formats:
        _say(f"twin backfill: --format {args.format!r}; expected some of {','.join(FORMATS)}")
        return 2
    if args.tsdb and "openmetrics" not in formats:
        _say("twin backfill: --tsdb needs the openmetrics output; expected --format ...,openmetrics")
        return 2
    if args.publish and "csv" not in formats:
        _say("twin backfill: --publish sends the rows of reconciled.csv; expected --format csv,...")
        return 2
    if args.publish and (args.publish_in_flight < 1 or not args.publish_timeout > 0):
        _say("twin backfill: --publish-in-flight and --publish-timeout must be positive")
        return 2
    if args.workers < 0 or (args.chunk is not None and not args.chunk > 0) or (args.warmup is not None
                                                                               and not args.warmup >= 0):
        _say("twin backfill: --workers, --chunk and --warmup must be positive (warm-up may be 0)")
        return 2
    try:
        t_from = parse_time(args.t_from, "--from") if args.t_from else None
        t_to = parse_time(args.t_to, "--to") if args.t_to else None
        config = load_config(args.config)
    except FileNotFoundError:
        _say(f"twin backfill: {args.config}: no such file")
        return 2
    except ValueError as exc:
        if isinstance(exc, ConfigError):
            _say(str(exc))
            return 1
        _say(f"twin backfill: {exc}")
        return 2
    publish_settings = None
    if args.publish:
        from twin.commands._publish import settings_for_backfill
        from twin.daemon import mqtt_settings_from_config
        from twin.mqtt import MqttError

        try:
            publish_settings = settings_for_backfill(mqtt_settings_from_config(config, os.environ))
        except (MqttError, ValueError, OSError) as exc:
            _say(f"twin backfill: --publish: {exc}")
            return 2
    opts = BackfillOptions(
        t_from=t_from, t_to=t_to, formats=formats, workers=args.workers, scheduler=args.scheduler,
        chunk_seconds=None if args.chunk is None else args.chunk * 3600.0,
        warmup_seconds=None if args.warmup is None else args.warmup * 60.0, cycle=args.cycle, window=args.window,
        timestamps=args.timestamps, timezone=args.timezone,
        good_quality=tuple(q.strip() for q in args.good_quality.split(",")) if args.good_quality is not None else (),
    )
    _say("CAUTION: back-filled alarms are advisory history; twin never trips, interlocks or operates equipment. "
         "Limits are common practice; defer to plant procedures, manufacturers' limits and licensed engineers.")
    try:
        summary = backfill(args.config, args.history, args.out, opts, config=config, echo=_say)
    except FileNotFoundError as exc:
        _say(f"twin backfill: {exc}: no such file")
        return 2
    except (BackfillError, HistoryError) as exc:
        _say(f"twin backfill: {exc}")
        return 1
    _say(summary.line())
    out = Path(args.out)
    _say(f"outputs in {out}: " + ", ".join(n for n in ("reconciled.csv", "reconciled.parquet", "events.csv", "openmetrics/")
                                           if (out / n.rstrip('/')).exists()))
    if args.tsdb:
        rc = _tsdb(out / "openmetrics", Path(args.tsdb), summary.t_first)
        if rc:
            return rc
    if publish_settings is not None:
        prefix = args.publish_prefix or f"{config.broker.republish_prefix or f'twin/{config.unit.id}'}/backfill"
        return _publish(publish_settings, out / "reconciled.csv", prefix.rstrip("/"), args)
    return 0


def _publish(settings: Any, path: Path, prefix: str, args: argparse.Namespace) -> int:
    from twin.commands._publish import PublishCounts, PublishError, connect, publish_file

    counts = PublishCounts()
    try:
        client = connect(settings, args.publish_timeout)
    except PublishError as exc:
        _say(f"twin backfill: --publish: {exc}")
        return 1
    try:
        publish_file(client, path, prefix, qos=max(1, settings.qos), max_in_flight=args.publish_in_flight,
                     timeout=args.publish_timeout, counts=counts)
    except PublishError as exc:
        _say(f"twin backfill: --publish: {exc}")
        _say(counts.line(prefix))
        return 1
    finally:
        client.stop()
    _say(counts.line(prefix))
    return 0


def _tsdb(om_dir: Path, tsdb: Path, t_first: float) -> int:
    promtool = shutil.which("promtool")
    if promtool is None:
        _say("twin backfill: --tsdb needs promtool on PATH (Prometheus 2.24 or later); expected it installed")
        return 1
    tsdb.mkdir(parents=True, exist_ok=True)
    files = sorted(om_dir.glob("*.om"))
    for f in files:
        p = subprocess.run([promtool, "tsdb", "create-blocks-from", "openmetrics", str(f), str(tsdb)],
                           capture_output=True, text=True)
        if p.returncode != 0:
            last = (p.stderr or p.stdout).strip().splitlines()[-1:] or ["no output"]
            _say(f"twin backfill: promtool failed on {f} (exit {p.returncode}): {last[0]}")
            return 1
    days = max(1, math.ceil((time.time() - t_first) / 86400.0) + 1) if math.isfinite(t_first) else 400
    _say(f"TSDB blocks from {len(files)} file(s) in {tsdb}. Start Prometheus on them with a retention that covers "
         f"the back-filled span, or it deletes the old blocks at start:\n"
         f"  prometheus --storage.tsdb.path={tsdb} --storage.tsdb.retention.time={days}d "
         f"--config.file=deploy/prometheus/prometheus.yml\n"
         f"(or copy the block directories into the data directory of a running Prometheus with that retention)")
    return 0
