"""Load generator: one process, asyncio (uvloop when installed), HTTP/1.1 keep-alive over
mutual TLS, a fixed number of concurrent clients, each with its own connection.

Two engines speak HTTP: ``httpx.AsyncClient`` and a minimal HTTP/1.1 client on asyncio
streams (request line, headers, ``Content-Length`` body; RFC 9112). On this 2-core
machine httpx's connection pool costs so much CPU per request that the load generator,
not the server, set the pace of the bare endpoint (about half a core for 50 requests/s
under load); the minimal client does the same exchange for a small share of that, so it
is the default, and ``--client httpx`` runs the other for comparison.

Every client sends its next request as soon as the previous answer arrived. A warm-up
(connections and TLS handshakes made, server caches filled) is run and thrown away;
then requests are counted for a fixed duration, or until the request source runs dry
(a fixed count, as for Get key with key IDs, which can use each key ID once). The
client's own CPU time is recorded: near one full core means the load generator, not
the server, set the pace.
"""

from __future__ import annotations

import asyncio
import contextlib
import ssl
import time
from collections.abc import Awaitable, Callable
from dataclasses import dataclass, field
from typing import Any
from urllib.parse import urlsplit

import httpx

from bench.common import percentile

#: (path, body) of the next request, or None when there is nothing left to ask.
NextRequest = Callable[[], "tuple[str, bytes] | None"]
#: Called with the path and the answer of each successful request (e.g. to keep key IDs).
OnAnswer = Callable[[str, bytes], None]
#: One POST on a client's connection: (path, body) -> (status, answer body).
Post = Callable[[str, bytes], Awaitable["tuple[int, bytes]"]]
ENGINES = ("raw", "httpx")
#: Seconds a request may take before it counts as an error (so a run always ends).
TIMEOUT = 30.0
#: The engine :func:`run` uses unless told otherwise (``python -m bench --client``).
DEFAULT_ENGINE = "raw"


@dataclass
class LoadResult:
    requests: int  # successful, started and answered inside the measured window
    errors: int
    seconds: float
    client_cpu: float  # share of one core the load generator used while measuring
    latencies_ms: list[float] = field(repr=False)
    first_error: str = ""

    @property
    def rps(self) -> float:
        return self.requests / self.seconds if self.seconds > 0 else 0.0

    @property
    def p50(self) -> float:
        return percentile(self.latencies_ms, 50)

    @property
    def p99(self) -> float:
        return percentile(self.latencies_ms, 99)


class RawConnection:
    """One keep-alive HTTP/1.1 connection over TLS (RFC 9112): POST with a JSON body,
    read the status line, headers and a ``Content-Length`` body."""

    def __init__(self, base_url: str, tls: ssl.SSLContext, content_type: str) -> None:
        url = urlsplit(base_url)
        self.content_type = content_type
        self.host, self.port = url.hostname or "127.0.0.1", url.port or 443
        self.tls = tls
        self.streams: tuple[asyncio.StreamReader, asyncio.StreamWriter] | None = None

    async def post(self, path: str, body: bytes) -> tuple[int, bytes]:
        if self.streams is None:
            self.streams = await asyncio.open_connection(self.host, self.port, ssl=self.tls)
        reader, writer = self.streams
        writer.write(
            f"POST {path} HTTP/1.1\r\nHost: {self.host}:{self.port}\r\n"
            f"Content-Type: {self.content_type}\r\nContent-Length: {len(body)}\r\n\r\n".encode()
            + body
        )
        try:
            head = await reader.readuntil(b"\r\n\r\n")
            lines = head.decode("latin-1").split("\r\n")
            status = int(lines[0].split(" ", 2)[1])
            length, close = 0, False
            for line in lines[1:]:
                name, _, value = line.partition(":")
                name = name.strip().lower()
                if name == "content-length":
                    length = int(value)
                elif name == "connection" and value.strip().lower() == "close":
                    close = True
            answer = await reader.readexactly(length)
        except BaseException:
            await self.close()
            raise
        if close:
            await self.close()
        return status, answer

    async def close(self) -> None:
        if self.streams is not None:
            writer = self.streams[1]
            self.streams = None
            writer.close()
            with contextlib.suppress(OSError, ssl.SSLError):
                await writer.wait_closed()


async def _run(
    base_url: str,
    tls: ssl.SSLContext,
    next_request: NextRequest,
    on_answer: OnAnswer | None,
    clients: int,
    warmup: float,
    duration: float,
    engine: str,
    content_type: str,
) -> LoadResult:
    latencies: list[float] = []
    errors: list[str] = []
    completed = 0  # successful requests started and answered inside the window
    last_done = 0.0
    cpu: list[float] = []
    start = time.perf_counter()
    measure_from = start + warmup
    end = measure_from + duration

    async def one(post: Post) -> None:
        nonlocal last_done, completed
        while True:
            now = time.perf_counter()
            if now >= end:
                return
            if now >= measure_from and not cpu:
                cpu.append(time.process_time())
            req = next_request()
            if req is None:
                return
            path, body = req
            t = time.perf_counter()
            try:
                status, answer = await asyncio.wait_for(post(path, body), TIMEOUT)
                ok, why = status == 200, f"{status} {answer[:200]!r}"
            except (
                OSError,
                ssl.SSLError,
                asyncio.IncompleteReadError,
                TimeoutError,
                httpx.HTTPError,
            ) as exc:
                ok, why, answer = False, type(exc).__name__, b""
            done = time.perf_counter()
            if ok and on_answer is not None:
                on_answer(path, answer)
            if t >= measure_from:
                # Latency counts for every request started in the window; throughput
                # only for those also answered inside it.
                if ok:
                    latencies.append((done - t) * 1000)
                    if done <= end:
                        completed += 1
                        last_done = max(last_done, done)
                else:
                    errors.append(why)

    if engine == "httpx":
        limits = httpx.Limits(max_connections=clients, max_keepalive_connections=clients)
        headers = {"Content-Type": content_type}
        async with httpx.AsyncClient(
            base_url=base_url, verify=tls, limits=limits, timeout=30.0, http2=False
        ) as client:

            async def post(path: str, body: bytes) -> tuple[int, bytes]:
                r = await client.post(path, content=body, headers=headers)
                return r.status_code, r.content

            await asyncio.gather(*(one(post) for _ in range(clients)))
    else:
        connections = [RawConnection(base_url, tls, content_type) for _ in range(clients)]
        try:
            await asyncio.gather(*(one(c.post) for c in connections))
        finally:
            for c in connections:
                await c.close()
    stop = min(end, last_done) if last_done else end
    seconds = max(stop - measure_from, 1e-9)
    used = time.process_time() - cpu[0] if cpu else 0.0
    return LoadResult(
        requests=completed,
        errors=len(errors),
        seconds=seconds,
        client_cpu=used / seconds,
        latencies_ms=latencies,
        first_error=errors[0] if errors else "",
    )


def run(
    base_url: str,
    tls: ssl.SSLContext,
    next_request: NextRequest,
    *,
    on_answer: OnAnswer | None = None,
    clients: int = 16,
    warmup: float = 2.0,
    duration: float = 10.0,
    engine: str | None = None,
    content_type: str = "application/json",
) -> LoadResult:
    """Drive ``base_url`` with ``clients`` concurrent keep-alive connections; return the
    measured window's counts and latencies (only 200 answers count as requests)."""
    engine = engine or DEFAULT_ENGINE
    if engine not in ENGINES:
        raise ValueError(f"engine must be one of {ENGINES}")
    coro = _run(
        base_url, tls, next_request, on_answer, clients, warmup, duration, engine, content_type
    )
    runner: Any = asyncio.run
    try:
        import uvloop

        runner = uvloop.run
    except ImportError:  # pragma: no cover - uvicorn[standard] brings it
        pass
    result: LoadResult = runner(coro)
    return result
