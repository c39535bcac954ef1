"""Request latency by route template: an ASGI middleware and the histogram it feeds.

The histogram lives in this worker process's memory (one registry per app), so with
several workers each scrape shows the requests of the worker that answered it. Labels
are the route template (``/api/v1/keys/{slave_SAE_ID}/enc_keys``, never the raw path,
which can hold key IDs), the method (known methods only) and the status code.
"""

from __future__ import annotations

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
            await send(message)

        try:
            await self.app(scope, receive, timed_send)
        finally:
            # The router writes the matched route into this same scope.
            route = getattr(scope.get("route"), "path", None)
            self.metrics.observe(
                str(scope.get("method", "")),
                route if isinstance(route, str) else UNMATCHED,
                status,
                time.perf_counter() - start,
            )
