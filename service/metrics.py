"""Request metrics, index gauges and the per-request middleware behind logs and ``/metrics``.

:class:`ServiceMetrics` owns one app's :class:`prometheus_client.CollectorRegistry`
(not the library's global one: each app, and each test, counts on its own).
:class:`RequestObserver` is a pure ASGI middleware, so streamed bodies pass
through untouched; it sits outside :class:`~service.limits.RequestLimits`, so
the 413/414/422 answers given there are counted and carry the request id too.

Label values come from fixed sets, so neither a client nor the corpus can grow
the number of series, and no document id reaches a label: ``route`` is the
matched route's template (``/documents/{document_id}``), or ``unmatched``;
``method`` one of the usual HTTP methods or ``other``; ``mode`` the ranking a
search asked for (``dense|lexical|hybrid``), ``none`` elsewhere.
"""

from __future__ import annotations

import json
import logging
import re
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from prometheus_client import CollectorRegistry, Counter, Histogram, generate_latest
from prometheus_client.core import GaugeMetricFamily, InfoMetricFamily, Metric
from prometheus_client.registry import Collector
from starlette.requests import Request

try:
    from fastapi.routing import iter_route_contexts as _iter_route_contexts
except ImportError:  # older FastAPI: included routes are in app.routes already
    _iter_route_contexts = None

from sounding.indexer import __version__
from sounding.indexer.query import MODES as _MODES
from sounding.indexer.selection import SearchFilter
from sounding.indexer.store import IndexReader, read_last_run

from .limits import ASGIApp, Message, Receive, Scope, Send
from .logs import ACCESS_LOGGER, REQUEST_ID_HEADER, accept_request_id, request_id_var

# The classic Prometheus text exposition format, 0.0.4, which every scraper reads
# (https://prometheus.io/docs/instrumenting/exposition_formats/).
CONTENT_TYPE = "text/plain; version=0.0.4; charset=utf-8"
MODES = frozenset(_MODES)
NO_MODE = "none"
UNMATCHED = "unmatched"
METHODS = frozenset({"GET", "HEAD", "POST", "PUT", "PATCH", "DELETE", "OPTIONS"})
# prometheus_client's default buckets (seconds): 5 ms to 10 s, which spans a
# lexical query on a small index up to a dense one queued behind others.
BUCKETS = (0.005, 0.01, 0.025, 0.05, 0.075, 0.1, 0.25, 0.5, 0.75, 1.0, 2.5, 5.0, 7.5, 10.0)
# Same words as service.app.INTERNAL_ERROR (not imported: app imports this module).
INTERNAL_ERROR = "internal error; see the service log"

access_log = logging.getLogger(ACCESS_LOGGER)


def record_mode(request: Request, mode: object) -> None:
    """Say which ranking mode this request asked for, for the ``mode`` label.

    Call it from a route once the body is valid; any other value than
    ``dense``, ``lexical`` or ``hybrid`` is counted as ``none``.
    """
    request.state.mode = getattr(mode, "value", mode)


def _mode_of(scope: Scope) -> str:
    state = scope.get("state")
    mode = state.get("mode") if isinstance(state, dict) else None
    return mode if isinstance(mode, str) and mode in MODES else NO_MODE


def route_template(scope: Scope) -> str:
    """The template of the route ``scope`` matches (``/documents/{document_id}``), or
    ``unmatched``. A path whose route exists for other methods (a 405) gets that route.

    Matched here, not taken from routing, because RequestLimits may answer
    before any route is chosen, and routing rewrites the scope as it goes.
    """
    path = scope.get("path", "")
    root = scope.get("root_path", "")
    if root and path.startswith(root):
        path = path[len(root) :]
    method = scope.get("method")
    partial = None
    for regex, template, methods in _templates(scope.get("app")):
        if regex.match(path):
            if not methods or method in methods:
                return template
            partial = partial or template
    return partial or UNMATCHED


def _templates(app: Any) -> Iterator[tuple[re.Pattern[str], str, set[str] | None]]:
    """Each route's path regex, template and methods, routers included in the app flattened."""
    routes = getattr(getattr(app, "router", None), "routes", ())
    # FastAPI >= 0.13x keeps included routers as one entry each and walks them with
    # iter_route_contexts; older versions copied their routes into app.routes.
    for route in _iter_route_contexts(routes) if _iter_route_contexts else routes:
        regex = getattr(route, "path_regex", None)
        template = getattr(route, "path_format", None)
        if regex is not None and template:
            yield regex, template, getattr(route, "methods", None)


class _IndexCollector(Collector):
    """Index size and last-run gauges, read when scraped from what the caller passes."""

    def __init__(self, index_dir: Path) -> None:
        self.index_dir = Path(index_dir)
        self.reader: IndexReader | None = None  # set by ServiceMetrics.render, per scrape
        self.where: SearchFilter | None = None  # what the scraping key may read

    def describe(self) -> list[Metric]:
        return []  # values exist only at scrape time; nothing to check at registration

    def collect(self) -> Iterator[Metric]:
        reader = self.reader
        loaded = GaugeMetricFamily(
            "sounding_index_loaded", "1 when an index generation is loaded and served, else 0."
        )
        loaded.add_metric([], 1.0 if reader is not None else 0.0)
        yield loaded
        if reader is not None:
            # Only what the scraping key may read: a total would count restricted pages.
            docs, chunks = (
                reader.counts() if self.where is None else reader.visible_counts(self.where)
            )
            for name, doc, value in (
                ("sounding_index_documents", "Documents in the served generation.", docs),
                ("sounding_index_chunks", "Chunks (passages) in the served generation.", chunks),
                (
                    "sounding_index_generation",
                    "Number of the served index generation.",
                    reader.generation,
                ),
                (
                    "sounding_index_updated_timestamp_seconds",
                    "Unix time the served generation was published.",
                    reader.manifest.updated_at,
                ),
            ):
                family = GaugeMetricFamily(name, doc)
                family.add_metric([], float(value))
                yield family
        yield from self._last_run()

    def _last_run(self) -> Iterator[Metric]:
        # Only the result and times: the run's detail may name files, so it stays out.
        run = read_last_run(self.index_dir)
        if run is None:
            return
        finished, result = run.get("finished_at"), run.get("result")
        if isinstance(finished, int | float):
            family = GaugeMetricFamily(
                "sounding_last_index_run_timestamp_seconds",
                "Unix time the last indexing run finished (ok or failed).",
            )
            family.add_metric([], float(finished))
            yield family
        if result in ("ok", "failed"):
            family = GaugeMetricFamily(
                "sounding_last_index_run_success",
                "1 when the last indexing run succeeded, 0 when it failed.",
            )
            family.add_metric([], 1.0 if result == "ok" else 0.0)
            yield family
        seconds = run.get("seconds")
        if isinstance(seconds, int | float):
            family = GaugeMetricFamily(
                "sounding_last_index_run_duration_seconds",
                "How long the last indexing run took; present when it succeeded.",
            )
            family.add_metric([], float(seconds))
            yield family


class ServiceMetrics:
    """One app's metrics: request counts and latencies, and the index gauges."""

    def __init__(self, index_dir: Path) -> None:
        self.registry = CollectorRegistry()
        self.requests = Counter(
            "sounding_http_requests",
            "HTTP requests answered, by route template, method, ranking mode and status code.",
            ("route", "method", "mode", "status"),
            registry=self.registry,
        )
        self.latency = Histogram(
            "sounding_http_request_duration_seconds",
            "Time from a request's arrival to the end of its answer, by route template, "
            "method and ranking mode.",
            ("route", "method", "mode"),
            buckets=BUCKETS,
            registry=self.registry,
        )
        build = InfoMetricFamily("sounding_build", "Version of sounding serving.")
        build.add_metric([], {"version": __version__})
        self.registry.register(_Static([build]))
        self._index = _IndexCollector(index_dir)
        self.registry.register(self._index)
        self._lock = threading.Lock()

    def observe(self, route: str, method: str, mode: str, status: int, seconds: float) -> None:
        method = method if method in METHODS else "other"
        mode = mode if mode in MODES else NO_MODE
        code = str(status) if 100 <= status <= 599 else "other"
        self.requests.labels(route, method, mode, code).inc()
        self.latency.labels(route, method, mode).observe(seconds)

    def render(self, reader: IndexReader | None, where: SearchFilter | None = None) -> bytes:
        """The text exposition, with index gauges read from ``reader`` (None: no index) now;
        the document and chunk counts are of what ``where`` admits (None: all)."""
        with self._lock:  # one scrape at a time sees its own reader
            self._index.reader, self._index.where = reader, where
            try:
                return generate_latest(self.registry)
            finally:
                self._index.reader, self._index.where = None, None


class _Static(Collector):
    def __init__(self, metrics: list[Metric]) -> None:
        self.metrics = metrics

    def collect(self) -> Iterator[Metric]:
        yield from self.metrics


class RequestObserver:
    """Give each HTTP request an id, count and time it, and write its access line.

    The id is the client's ``X-Request-ID`` when well formed
    (:func:`service.logs.accept_request_id`), else a new one; it is echoed in
    the response's ``X-Request-ID`` and set in :data:`service.logs.request_id_var`
    for every log record made while answering.

    An exception no handler took is answered here with the app's plain 500
    (and the id), so the client can quote the id; it is re-raised for the
    app's catch-all handler, which logs the traceback, still under the id.
    """

    def __init__(self, app: ASGIApp, metrics: ServiceMetrics) -> None:
        self.app = app
        self.metrics = metrics

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = time.perf_counter()
        incoming = None
        for name, value in scope.get("headers", ()):
            if name.lower() == REQUEST_ID_HEADER.encode():
                incoming = value.decode("latin-1")
                break
        request_id = accept_request_id(incoming)
        # Matched now, before routing rewrites the scope; and also for answers
        # RequestLimits gives before any route runs.
        route = route_template(scope)
        method = scope.get("method", "GET")
        status = 500
        response_started = False

        async def send_with_id(message: Message) -> None:
            nonlocal status, response_started
            if message["type"] == "http.response.start":
                response_started = True
                status = int(message["status"])
                headers = [
                    (k, v)
                    for k, v in message.get("headers", ())
                    if k.lower() != REQUEST_ID_HEADER.encode()
                ]
                headers.append((REQUEST_ID_HEADER.encode(), request_id.encode("ascii")))
                message = {**message, "headers": headers}
            await send(message)

        # Not reset on the way out: the app's 500 handler runs outside this
        # middleware and should log under the same id; uvicorn runs each request in
        # its own task, so the value does not outlive the request.
        request_id_var.set(request_id)
        try:
            await self.app(scope, receive, send_with_id)
        except Exception:
            if not response_started:
                await _internal_error(send_with_id)
            raise
        finally:
            seconds = time.perf_counter() - started
            mode = _mode_of(scope)
            self.metrics.observe(route, method, mode, status, seconds)
            # Route template and status only: never the path or query string (see
            # service/logs.py: queries can be personal data, ids can name pages).
            access_log.info(
                "%s %s %s",
                method,
                route,
                status,
                extra={
                    "method": method,
                    "route": route,
                    "mode": mode,
                    "status": status,
                    "duration_ms": round(seconds * 1000, 3),
                    "request_id": request_id,
                },
            )


async def _internal_error(send: Send) -> None:
    payload = json.dumps({"detail": INTERNAL_ERROR}).encode("utf-8")
    headers: list[tuple[bytes, bytes]] = [
        (b"content-type", b"application/json"),
        (b"content-length", str(len(payload)).encode("ascii")),
    ]
    start: dict[str, Any] = {"type": "http.response.start", "status": 500, "headers": headers}
    await send(start)
    await send({"type": "http.response.body", "body": payload})
