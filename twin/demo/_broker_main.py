"""Child-process entry point of the embedded demo broker (amqtt enters here only).

Run as ``python -m twin.demo._broker_main HOST PORT``. Starts an amqtt broker
(MQTT 3.1.1, anonymous, no $SYS or packet-logging plugins) bound to HOST:PORT
(PORT 0 = any free port), prints ``READY <port>`` on stdout once listening and
serves until SIGTERM/SIGINT or until stdin closes (the parent died).
On a start failure it prints ``FAILED <reason>`` and exits with status 1.

amqtt logs a traceback per message when a subscriber lags behind; its loggers
are silenced below CRITICAL so a demo terminal stays readable.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import signal
import sys
import threading


def _quiet_loggers() -> None:
    for name in ("amqtt", "transitions", "asyncio"):
        logging.getLogger(name).setLevel(logging.CRITICAL)
        logging.getLogger(name).propagate = False


async def _serve(host: str, port: int) -> int:
    from amqtt.broker import Broker

    config = {
        "listeners": {"default": {"type": "tcp", "bind": f"{host}:{port}"}},
        "plugins": {"amqtt.plugins.authentication.AnonymousAuthPlugin": {"allow_anonymous": True}},
    }
    broker = Broker(config)
    try:
        await broker.start()
    except Exception as exc:
        print(f"FAILED {type(exc).__name__}: {exc}", flush=True)
        return 1
    server = broker._servers["default"].instance
    bound = server.sockets[0].getsockname()[1]
    print(f"READY {bound}", flush=True)

    stop = asyncio.Event()
    loop = asyncio.get_running_loop()
    for sig in (signal.SIGTERM, signal.SIGINT):
        loop.add_signal_handler(sig, stop.set)

    def watch_stdin() -> None:  # parent gone → stdin reaches EOF
        with contextlib.suppress(OSError, ValueError):
            sys.stdin.buffer.read()
        loop.call_soon_threadsafe(stop.set)

    threading.Thread(target=watch_stdin, daemon=True).start()
    await stop.wait()
    try:
        await asyncio.wait_for(broker.shutdown(), timeout=5.0)
    except (TimeoutError, Exception):  # shutting down anyway
        return 0
    return 0


def main(argv: list[str] | None = None) -> int:
    args = sys.argv[1:] if argv is None else argv
    if len(args) != 2:
        print("FAILED usage: python -m twin.demo._broker_main HOST PORT", flush=True)
        return 2
    _quiet_loggers()
    logging.basicConfig(level=logging.CRITICAL)
    return asyncio.run(_serve(args[0], int(args[1])))


if __name__ == "__main__":
    sys.exit(main())
