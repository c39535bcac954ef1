"""Operator and auditor calls: node identity, the registry, and link pool levels."""

from __future__ import annotations

from collections.abc import Mapping
from types import TracebackType
from typing import Any, Final, Literal

import httpx

from keystrata_client._errors import ApiError, KeystrataClientError
from keystrata_client._http import (
    build_client,
    check_base_url,
    json_object,
    path_segment,
    wrap_transport,
)
from keystrata_client._tls import TlsIdentity

#: Kinds of registry object a node keeps.
RegistryKind = Literal["nodes", "links", "pairs", "principals"]
REGISTRY_KINDS: Final = frozenset({"nodes", "links", "pairs", "principals"})

# The class has a method named ``list``; this alias keeps annotations unambiguous.
_Items = list[dict[str, Any]]


_segment = path_segment


class OperatorClient:
    """Synchronous client for the operator (and read-only auditor) API of one node.

    Every method returns the decoded JSON object of the answer as a plain ``dict``.

    Args:
        base_url: the node's URL, e.g. ``https://relay.example:8443``.
        identity: the operator's certificate files; used only when ``client`` is None.
        client: an ``httpx.Client`` to send through (the caller keeps ownership and
            closes it; its TLS settings apply). Default: one built from ``identity``
            and closed by :meth:`close`.
        timeout: seconds, for the client built here.

    Every call raises:
        ApiError: the node answered with a non-2xx status (401/403 auth, 404 unknown,
            409 conflict, 400 invalid body, ...).
        TransportError: no answer (connection, TLS, timeout).
        KeystrataClientError: the answer was not a JSON object.
    """

    def __init__(
        self,
        base_url: str,
        identity: TlsIdentity | None = None,
        *,
        client: httpx.Client | None = None,
        timeout: float = 10.0,
    ) -> None:
        self.base_url = check_base_url(base_url)
        self._owns_client = client is None
        self._client = client if client is not None else build_client(identity, timeout)

    def __repr__(self) -> str:
        return f"OperatorClient({self.base_url!r})"

    # -- lifecycle ---------------------------------------------------------------------

    def close(self) -> None:
        """Close the HTTP client if this object created it; return None."""
        if self._owns_client:
            self._client.close()

    def __enter__(self) -> OperatorClient:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()

    # -- plumbing ----------------------------------------------------------------------

    def _call(
        self,
        method: str,
        path: str,
        *,
        body: Mapping[str, Any] | None = None,
        params: Mapping[str, str] | None = None,
    ) -> dict[str, Any]:
        try:
            response = self._client.request(method, self.base_url + path, json=body, params=params)
        except httpx.HTTPError as exc:
            raise wrap_transport(exc) from exc
        return json_object(response)

    @staticmethod
    def _registry_path(kind: str, object_id: str | None = None) -> str:
        if kind not in REGISTRY_KINDS:
            raise ValueError(f"kind must be one of {sorted(REGISTRY_KINDS)}, not {kind!r}")
        path = f"/api/v1/registry/{kind}"
        return path if object_id is None else f"{path}/{_segment(object_id)}"

    # -- node --------------------------------------------------------------------------

    def node_info(self) -> dict[str, Any]:
        """Return ``{"node_id", "role", "version"}`` of the node."""
        return self._call("GET", "/api/v1/node")

    def api_document(self) -> dict[str, Any]:
        """Return the node's OpenAPI document (operator and monitor): its routes and the
        schemas of their bodies, defaults included."""
        return self._call("GET", "/openapi.json")

    def readiness(self) -> dict[str, Any]:
        """Return ``{"status", "checks"}``: each readiness check's ``ok`` or its note.

        A node that is not ready answers 503; its failing checks come back in the same
        shape (``status`` ``"not ready"``) rather than as an :class:`ApiError`.
        """
        try:
            return self._call("GET", "/api/v1/health/ready")
        except ApiError as exc:
            if exc.status != 503 or not exc.details:
                raise
            checks = {str(d.get("check")): str(d.get("problem")) for d in exc.details}
            return {"status": "not ready", "checks": checks}

    # -- registry ----------------------------------------------------------------------

    def create(self, kind: RegistryKind | str, body: Mapping[str, Any]) -> dict[str, Any]:
        """Create a registry object of ``kind`` and return it as stored.

        Raises:
            ValueError: ``kind`` is not nodes, links, pairs or principals.
        """
        return self._call("POST", self._registry_path(kind), body=body)

    def list(self, kind: RegistryKind | str, include_retired: bool = False) -> _Items:
        """Return the registry objects of ``kind`` (the ``items`` of the answer).

        Retired objects are left out unless ``include_retired`` is True.

        Raises:
            ValueError: unknown ``kind``.
            KeystrataClientError: the answer has no ``items`` list.
        """
        params = {"include_retired": "true"} if include_retired else None
        answer = self._call("GET", self._registry_path(kind), params=params)
        items = answer.get("items")
        if not isinstance(items, list):
            raise KeystrataClientError(f"registry list of {kind}: answer has no items list")
        return [item for item in items if isinstance(item, dict)]

    def get(self, kind: RegistryKind | str, object_id: str) -> dict[str, Any]:
        """Return one registry object (retired ones too).

        Raises:
            ValueError: unknown ``kind``.
        """
        return self._call("GET", self._registry_path(kind, object_id))

    def change(
        self, kind: RegistryKind | str, object_id: str, body: Mapping[str, Any]
    ) -> dict[str, Any]:
        """Apply the partial ``body`` to one registry object and return the result.

        Raises:
            ValueError: unknown ``kind``.
        """
        return self._call("PATCH", self._registry_path(kind, object_id), body=body)

    def retire(self, kind: RegistryKind | str, object_id: str) -> dict[str, Any]:
        """Retire one registry object and return it as it now stands.

        Raises:
            ValueError: unknown ``kind``.
        """
        return self._call("DELETE", self._registry_path(kind, object_id))

    # -- link key pools ----------------------------------------------------------------

    def pools(self) -> dict[str, Any]:
        """Return ``{"node_id", "pools": [pool, ...]}``: the level of every link pool."""
        return self._call("GET", "/api/v1/links/pools")

    def pool(self, link_id: str) -> dict[str, Any]:
        """Return one pool: ``link_id``, ``bits_available``, ``bits_used``,
        ``bits_received``, ``blocks_available``, ``rate_bps``, ``window_seconds``,
        ``last_block_at``."""
        return self._call("GET", f"/api/v1/links/{_segment(link_id)}/pool")

    def pairs(self) -> dict[str, Any]:
        """Return ``{"node_id", "role", "pairs": [...]}``: pair key buffers.

        At a relay each pair lists both stations' last reports, key on its way, relay
        rate, target and time until empty; at a station, its ready key per pair by owner
        and key waiting for confirmation.
        """
        return self._call("GET", "/api/v1/pairs")

    def plan(self, day: str | None = None) -> dict[str, Any]:
        """Return the node's key-supply plan for UTC ``day`` (YYYY-MM-DD; default today):
        ``{"node_id", "day", "caution", "links": [...], "pairs": [...]}``. Per link the
        geometry, link budget, QBER, key rate beside the PLOB bound, expected bits per day
        and an ``hourly`` list; per pair daily supply against demand, time until empty and
        the buffer that rides out a cloud spell."""
        return self._call("GET", "/api/v1/plan", params={"day": day} if day else None)

    def deliveries(self) -> dict[str, Any]:
        """Return key delivery accounting at a station: ``{"node_id", "pairs": [...],
        "saes": [...]}`` with keys and bits to masters, to slaves, waiting, expired, and
        refused requests per SAE."""
        return self._call("GET", "/api/v1/deliveries")
