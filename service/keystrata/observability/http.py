"""Request latency by route template: an ASGI middleware and the histogram it feeds; and
the access log by route template.

The histogram lives in this worker process's memory (one registry per app), so with
several workers each scrape shows the requests of the worker that answered it. Labels
are the route template (``/api/v1/keys/{slave_SAE_ID}/enc_keys``, never the raw path,
which can hold key IDs), the method (known methods only) and the status code.

uvicorn's access log prints the raw path and query of every request, where a client may
have put a key (by mistake or on purpose). :class:`AccessLogByRoute` is a filter for the
``uvicorn.access`` logger that replaces that path with the route template the middleware
saw when the response started (``unmatched`` when no route matched), so the access log
keeps method, template, status and client address only.
"""

from __future__ import annotations

import contextvars
import logging
import time
from collections.abc import Awaitable, Callable, Iterator, MutableMapping
from typing import Any

from prometheus_client import CollectorRegistry, Histogram
from prometheus_client.metrics_core import Metric

Scope = MutableMapping[str, Any]
Message = MutableMapping[str, Any]
Receive = Callable[[], Awaitable[Message]]
Send = Callable[[Message], Awaitable[None]]
App = Callable[[Scope, Receive, Send], Awaitable[None]]

#: Label value for requests that matched no route (404s for unknown paths).
UNMATCHED = "unmatched"
#: Any other method is counted as "other", so callers cannot mint label values.
METHODS = frozenset({"GET", "HEAD", "POST", "PUT", "PATCH", "DELETE", "OPTIONS"})
#: Seconds; from 1 ms (a cached read) to 30 s (a large ingest or a slow database).
#: The route template of the response being sent, for the access log filter: set by the
#: middleware just before ``http.response.start`` goes down to the server, which logs
#: the access line from within that same call.
_RESPONDING_ROUTE: contextvars.ContextVar[str] = contextvars.ContextVar(
    "keystrata_responding_route", default=UNMATCHED
)
BUCKETS = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0)


class RequestMetrics:
    """The latency histogram of one app in one process."""

    def __init__(self) -> None:
        self.registry = CollectorRegistry(auto_describe=False)
        self.duration = Histogram(
            "keystrata_http_request_duration_seconds",
            "Time from request start to the end of the response, per route template, "
            "method and status code; counted by the worker process that answered.",
            labelnames=["method", "route", "status"],
            buckets=BUCKETS,
            registry=self.registry,
        )

    def observe(self, method: str, route: str, status: int, seconds: float) -> None:
        method = method if method in METHODS else "other"
        self.duration.labels(method, route, str(status)).observe(seconds)

    def collect(self) -> Iterator[Metric]:
        """The families, without the ``_created`` series prometheus_client adds: a
        per-process start time is noise next to counts that reset with the process."""
        for metric in self.registry.collect():
            metric.samples = [s for s in metric.samples if not s.name.endswith("_created")]
            yield metric


class RequestTimer:
    """ASGI middleware: time every HTTP request and record it under its route template."""

    def __init__(self, app: App, *, metrics: RequestMetrics) -> None:
        self.app = app
        self.metrics = metrics

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        start = time.perf_counter()
        status = 500  # unless a response starts: an exception escaped every handler

        async def timed_send(message: Message) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = int(message["status"])
                _RESPONDING_ROUTE.set(_route_of(scope))
            await send(message)

        try:
            await self.app(scope, receive, timed_send)
        finally:
            self.metrics.observe(
                str(scope.get("method", "")), _route_of(scope), status, time.perf_counter() - start
            )


def _route_of(scope: Scope) -> str:
    # The router writes the matched route into this same scope.
    route = getattr(scope.get("route"), "path", None)
    return route if isinstance(route, str) else UNMATCHED


class AccessLogByRoute(logging.Filter):
    """Filter for ``uvicorn.access``: the path (and query) of each access line becomes
    the route template of the response. uvicorn logs ``'%s - "%s %s HTTP/%s" %d'`` with
    (client address, method, path with query, HTTP version, status); a record of any
    other shape has its arguments dropped, so no path passes through unreplaced."""

    def filter(self, record: logging.LogRecord) -> bool:
        args = record.args
        if isinstance(args, tuple) and len(args) == 5:
            method = args[1] if args[1] in METHODS else "other"
            record.args = (args[0], method, _RESPONDING_ROUTE.get(), args[3], args[4])
        elif args:
            record.msg, record.args = "access line of an unknown shape (not shown)", ()
        return True


def install_access_log_filter(logger_name: str = "uvicorn.access") -> None:
    """Add :class:`AccessLogByRoute` to the access logger (once per process)."""
    logger = logging.getLogger(logger_name)
    if not any(isinstance(f, AccessLogByRoute) for f in logger.filters):
        logger.addFilter(AccessLogByRoute())
