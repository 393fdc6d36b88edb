"""The live daemon's Prometheus endpoint: collectors read at scrape time, HTTP(S), extra routes."""

from __future__ import annotations

import ssl
import threading
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass
from typing import Any

from prometheus_client import (
    CollectorRegistry,
    Histogram,
    generate_latest,
    make_wsgi_app,
    start_http_server,
)
from prometheus_client.core import Metric

from twin.metrics.families import _finite, build_families
from twin.metrics.health import LIVE_FAMILIES, HealthCollector, HealthProvider
from twin.result import CycleResult

Provider = Callable[[], CycleResult | None]
CYCLE_BUCKETS = (0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0, 60.0)


@dataclass(frozen=True)
class MetricsTls:
    """TLS for the metrics endpoint (PEM files).

    ``client_ca_file`` set: scrapers must present a client certificate signed by it.
    """

    cert_file: str
    key_file: str
    client_ca_file: str | None = None


class CycleCollector:
    """Custom collector: the latest result's metric families, read at scrape time.

    Parameters
    ----------
    provider : callable
        Returns the latest :class:`~twin.result.CycleResult`, or None before
        the first cycle. Called once per scrape, from the HTTP thread.
    """

    def __init__(self, provider: Provider, exclude: frozenset[str] = frozenset()) -> None:
        if not callable(provider):
            raise TypeError(f"provider must be callable, got {type(provider).__name__}")
        self._provider = provider
        self._exclude = exclude

    def describe(self) -> list[Metric]:
        # Nothing up front: the families depend on the plant; no scrape at registration.
        return []

    def collect(self) -> Iterator[Metric]:
        for fam in build_families(self._provider()):
            if fam.name not in self._exclude:
                yield fam


class MetricsServer:
    """The Prometheus endpoint of the live daemon.

    Parameters
    ----------
    provider : callable
        Latest result or None (see :class:`CycleCollector`).
    address : str
        Address to bind; 127.0.0.1 by default (expose deliberately).
    port : int
        TCP port; 0 picks a free one (read :attr:`port` after :meth:`start`).
    registry : CollectorRegistry, optional
        Registry to use; a fresh private one by default (never the global one).
    routes : mapping of str to callable, optional
        Extra GET paths beside ``/metrics``, e.g. ``{"/diagram.svg": f}``: ``f()``
        returns ``(body, content type)``, or None for "not available yet" (503).
    health : callable, optional
        Returns the live :class:`Health`; its families replace the per-window
        copies of the input counters (:data:`LIVE_FAMILIES`).
    tls : MetricsTls, optional
        Serve HTTPS (and require client certificates when it names a client CA).
    """

    def __init__(
        self,
        provider: Provider,
        address: str = "127.0.0.1",
        port: int = 9108,
        registry: CollectorRegistry | None = None,
        routes: Mapping[str, Route] | None = None,
        health: HealthProvider | None = None,
        tls: MetricsTls | None = None,
    ) -> None:
        if not 0 <= int(port) <= 65535:
            raise ValueError(f"port must be in 0..65535, got {port!r}")
        self.address = address
        self.port = int(port)
        self.tls = tls
        self.registry = registry if registry is not None else CollectorRegistry(auto_describe=True)
        self.collector = CycleCollector(provider, LIVE_FAMILIES if health is not None else frozenset())
        self.registry.register(self.collector)
        if health is not None:
            self.registry.register(HealthCollector(health))
        self.cycle_duration = Histogram(
            "twin_cycle_duration_seconds",
            "Wall time of one monitoring cycle (window close to result published)",
            buckets=CYCLE_BUCKETS,
            registry=self.registry,
        )
        self._server: Any = None
        self._thread: threading.Thread | None = None
        self.routes: dict[str, Route] = dict(routes or {})

    def start(self) -> None:
        """Serve ``/metrics`` (and the extra routes) on ``address:port`` in a daemon thread."""
        if self._server is not None:
            raise RuntimeError(f"metrics server already running on {self.address}:{self.port}")
        kwargs: dict[str, Any] = {}
        if self.tls is not None:
            kwargs = {"certfile": self.tls.cert_file, "keyfile": self.tls.key_file,
                      "client_cafile": self.tls.client_ca_file,
                      "client_auth_required": self.tls.client_ca_file is not None}
        try:
            if self.routes:
                self._server, self._thread = _serve_with_routes(self.address, self.port, self.registry,
                                                                self.routes, self.tls)
            else:
                self._server, self._thread = start_http_server(self.port, addr=self.address,
                                                               registry=self.registry, **kwargs)
        except (OSError, ssl.SSLError) as exc:
            why = str(exc) if isinstance(exc, ssl.SSLError) or not exc.strerror else exc.strerror
            raise OSError(f"metrics endpoint {self.address}:{self.port}: {why}") from exc
        self.port = int(self._server.server_address[1])

    @property
    def scheme(self) -> str:
        """``https`` when served over TLS, else ``http``."""
        return "https" if self.tls is not None else "http"

    def stop(self) -> None:
        """Shut the HTTP server down and wait for its thread; a no-op when not running."""
        server, thread, self._server, self._thread = self._server, self._thread, None, None
        if server is None:
            return
        server.shutdown()
        server.server_close()
        if thread is not None:
            thread.join(timeout=5)

    @property
    def running(self) -> bool:
        return self._server is not None

    def observe_cycle(self, seconds: float) -> None:
        """Record one cycle's duration [s] in ``twin_cycle_duration_seconds``."""
        if not _finite(seconds) or seconds < 0:
            raise ValueError(f"cycle duration must be a finite number of seconds >= 0, got {seconds!r}")
        self.cycle_duration.observe(seconds)

    def __enter__(self) -> MetricsServer:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()


Route = Callable[[], tuple[bytes, str] | None]


def _serve_with_routes(address: str, port: int, registry: CollectorRegistry,
                       routes: Mapping[str, Route], tls: MetricsTls | None = None) -> tuple[Any, threading.Thread]:
    """prometheus_client's WSGI exposition with extra GET routes in front of it (optionally over TLS)."""
    from wsgiref.simple_server import make_server

    from prometheus_client.exposition import (
        ThreadingWSGIServer,
        _get_best_family,
        _get_ssl_ctx,
        _SilentHandler,
    )

    metrics_app = make_wsgi_app(registry)

    def app(environ: dict[str, Any], start_response: Callable[..., Any]) -> Any:
        route = routes.get(environ.get("PATH_INFO", ""))
        if route is None:
            return metrics_app(environ, start_response)
        try:
            got = route()
        except Exception as exc:  # a broken extra route must not take /metrics down
            start_response("500 Internal Server Error", [("Content-Type", "text/plain; charset=utf-8")])
            return [f"{environ.get('PATH_INFO')}: {type(exc).__name__}: {exc}\n".encode()]
        if got is None:
            start_response("503 Service Unavailable", [("Content-Type", "text/plain; charset=utf-8")])
            return [b"not available yet: no reconciled window\n"]
        body, ctype = got
        start_response("200 OK", [("Content-Type", ctype), ("Content-Length", str(len(body)))])
        return [body]

    class _Server(ThreadingWSGIServer):
        pass

    _Server.address_family, addr = _get_best_family(address, port)
    httpd = make_server(addr, port, app, _Server, handler_class=_SilentHandler)
    if tls is not None:  # as prometheus_client's own start_http_server does
        ctx = _get_ssl_ctx(tls.cert_file, tls.key_file, ssl.PROTOCOL_TLS_SERVER, tls.client_ca_file, None,
                           tls.client_ca_file is not None)
        httpd.socket = ctx.wrap_socket(httpd.socket, server_side=True)
    thread = threading.Thread(target=httpd.serve_forever, daemon=True)
    thread.start()
    return httpd, thread


def exposition(registry: CollectorRegistry) -> bytes:
    """Prometheus text exposition (format 0.0.4) of ``registry``."""
    return generate_latest(registry)
