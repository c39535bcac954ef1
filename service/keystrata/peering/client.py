"""HTTPS client a node uses to reach its peers, with its own certificate (mutual TLS).

Each peer gets a connection pool of its own whose TLS context expects that peer: the
certificate must chain to the network CA, match the URL's host, carry the node marker
and name the ``[[peers]]`` entry's node ID (:func:`keystrata.crypto.tls.peer_context`).
A peer that fails the check is :class:`PeerUnavailable`; nothing is sent to it.
"""

from __future__ import annotations

import json
import logging
from collections.abc import Sequence
from typing import Any

import httpx
from pydantic import ValidationError

from keystrata.config import Settings
from keystrata.crypto.tls import PeerIdentityError, peer_context
from keystrata.errors import PeerUnavailable
from keystrata.peering.messages import MessageResult

log = logging.getLogger("keystrata.peer_client")


def _identity_error(exc: BaseException) -> PeerIdentityError | None:
    """The identity refusal under an httpx error (httpx and httpcore each wrap it)."""
    seen: BaseException | None = exc
    for _ in range(8):
        if seen is None or isinstance(seen, PeerIdentityError):
            return seen
        seen = seen.__cause__ or seen.__context__
    return None


class PeerClient:
    """Talks to the peers listed in the node's ``[[peers]]`` settings."""

    def __init__(self, settings: Settings, *, transport: httpx.BaseTransport | None = None):
        self.urls = {p.id: p.url.rstrip("/") for p in settings.peers}
        self._clients = {
            node_id: httpx.Client(
                verify=peer_context(settings.tls, node_id),
                timeout=settings.outbox.timeout_seconds,
                transport=transport,
            )
            for node_id in self.urls
        }

    def close(self) -> None:
        for client in self._clients.values():
            client.close()

    def _url(self, node_id: str, path: str) -> str:
        base = self.urls.get(node_id)
        if base is None:
            raise PeerUnavailable(f"no [[peers]] entry for node {node_id}")
        return base + path

    def _send(self, method: str, node_id: str, path: str, **kw: Any) -> httpx.Response:
        """One request to a peer. Raises PeerUnavailable (also for a wrong identity)."""
        url = self._url(node_id, path)
        try:
            return self._clients[node_id].request(method, url, **kw)
        except httpx.HTTPError as exc:
            wrong = _identity_error(exc)
            if wrong is not None:
                # Not the node this entry names: a wrong URL, or someone else answering.
                log.warning(
                    "peer %s at %s refused: %s; nothing sent", node_id, self.urls[node_id], wrong
                )
                raise PeerUnavailable(f"{node_id}: not the node of that [[peers]] entry") from exc
            raise PeerUnavailable(f"{node_id}: {type(exc).__name__}") from exc

    def post_messages(
        self, node_id: str, bodies: Sequence[dict[str, Any] | bytes]
    ) -> list[MessageResult]:
        """POST several messages for one peer in one request, in order; return the result
        of each message the peer attempted, in order. The peer stops at the first message
        it does not apply, so the list may be shorter than ``bodies``.

        A refusal of the whole request (400, 401, 403, 413, 503...) counts as the first
        message's result; an answer that is not a list of results is a 502 result.

        Raises:
            PeerUnavailable: the peer did not answer.
        """
        r = self._send(
            "POST",
            node_id,
            "/api/v1/peer/messages/batch",
            content=_batch(bodies),
            headers={"content-type": "application/json"},
        )
        try:
            answer = r.json()
        except ValueError:
            answer = {}
        if not isinstance(answer, dict):
            answer = {}
        if r.status_code != 200:
            return [MessageResult(status=r.status_code, message=str(answer.get("message", "")))]
        results = answer.get("results")
        if not isinstance(results, list):
            return [MessageResult(status=502, message="batch answer without results")]
        out: list[MessageResult] = []
        for raw in results[: len(bodies)]:
            try:
                result = MessageResult.model_validate(raw)
            except ValidationError:
                out.append(MessageResult(status=502, message="malformed result in batch answer"))
                break
            out.append(result)
            if result.status != 200:
                break
        return out

    def pair_buffer(self, node_id: str, pair_id: str) -> dict[str, Any] | None:
        """A station's buffer report for a pair, or None when it cannot be had now."""
        try:
            r = self._send("GET", node_id, f"/api/v1/peer/pairs/{pair_id}/buffer")
        except PeerUnavailable:
            return None
        if r.status_code != 200:
            return None
        answer = r.json()
        return answer if isinstance(answer, dict) else None

    def pending_allocations(self, node_id: str) -> list[dict[str, Any]] | None:
        """Key allocation messages ``node_id`` still holds for this node: [] if none, or
        if ``node_id`` is not in ``[[peers]]`` (then only its outbox brings them); None
        when the peer cannot be reached or does not answer 200 now."""
        if node_id not in self.urls:
            return []
        try:
            r = self._send("GET", node_id, "/api/v1/peer/allocations")
            messages = r.json().get("messages", []) if r.status_code == 200 else None
        except (PeerUnavailable, ValueError, AttributeError):
            return None
        if not isinstance(messages, list):
            return None
        return [m for m in messages if isinstance(m, dict)]

    def pair_progress(
        self, node_id: str, pair_id: str, after: str | None, timeout: float
    ) -> dict[str, Any] | None:
        """One page of a partner station's consumption points for a pair (restore
        detection), or None when it cannot be asked or does not answer 200 now."""
        if node_id not in self.urls:
            return None
        params = {} if after is None else {"after": after}
        try:
            r = self._send(
                "GET",
                node_id,
                f"/api/v1/peer/pairs/{pair_id}/progress",
                params=params,
                timeout=timeout,
            )
            answer = r.json() if r.status_code == 200 else None
        except (PeerUnavailable, ValueError):
            return None
        return answer if isinstance(answer, dict) else None

    def registry_shared(self, node_id: str) -> dict[str, Any]:
        """The registry facts ``node_id`` shares with this node, as it answered them
        (a JSON object, not yet parsed: :class:`keystrata.peering.answers.SharedRegistry`).

        Raises:
            PeerUnavailable: no ``[[peers]]`` entry, no answer, a status other than 200,
                or an answer that is not a JSON object; the message is in our own words.
        """
        r = self._send("GET", node_id, "/api/v1/peer/registry/shared")
        if r.status_code != 200:
            raise PeerUnavailable(f"{node_id}: answered {r.status_code}")
        try:
            answer = r.json()
        except ValueError:
            answer = None
        if not isinstance(answer, dict):
            raise PeerUnavailable(f"{node_id}: the answer is not a JSON object")
        return answer


def _batch(bodies: Sequence[dict[str, Any] | bytes]) -> bytes:
    """The request body ``{"messages": [...]}``. A body given as bytes is JSON as the
    outbox stored it and goes in as it is: a ciphertext's megabyte of base64 is neither
    parsed nor written again."""
    parts = [b if isinstance(b, bytes) else json.dumps(b).encode() for b in bodies]
    return b'{"messages":[' + b",".join(parts) + b"]}"
