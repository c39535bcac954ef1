"""The auditor's client for a node's ledger, and the export an offline verifier reads.

An export is a folder of three files, written by :func:`write_export`:

``checkpoint.json``
    The node's latest signed checkpoint: ``origin``, ``tree_size``, ``root_hash``
    (Base64), ``signed_text``, ``signature`` (Base64 Ed25519), ``public_key`` (Base64,
    raw 32 bytes). Written last, so a folder that has it is complete.
``entries.jsonl``
    One line per ledger entry, index 0 first: ``{"index", "entry_b64", "entry"}`` as the
    node served them (``entry_b64`` is what the tree hashes; ``entry`` the node's
    decoding, null when the stored bytes are not JSON). Normally exactly ``tree_size``
    lines; a node that lost entries serves fewer, and the verifier names the gap.
``checkpoints.jsonl``
    The node's earlier checkpoints up to the latest, smallest tree first, same six keys.
"""

from __future__ import annotations

import json
import os
import tempfile
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from types import TracebackType
from typing import IO, Any, Final

import httpx

from keystrata_client._errors import KeystrataClientError
from keystrata_client._http import build_client, check_base_url, json_object, wrap_transport
from keystrata_client._tls import TlsIdentity
from keystrata_client.audit._checkpoint import BadCheckpoint, Checkpoint, b64_value

__all__ = [
    "CHECKPOINT_FILE",
    "ENTRIES_FILE",
    "HISTORY_FILE",
    "AuditClient",
    "BadCheckpoint",
    "Checkpoint",
    "ExportSummary",
    "b64_value",
    "write_export",
]

#: The most entries or checkpoints a node returns in one answer.
PAGE: Final = 1000
#: The keys of a checkpoint in an export (``signed_at`` is not signed, so it is left out).
CHECKPOINT_KEYS: Final = (
    "origin",
    "tree_size",
    "root_hash",
    "signed_text",
    "signature",
    "public_key",
)
ENTRIES_FILE: Final = "entries.jsonl"
CHECKPOINT_FILE: Final = "checkpoint.json"
HISTORY_FILE: Final = "checkpoints.jsonl"


class AuditClient:
    """Synchronous client for the auditor routes (``/api/v1/audit``) of one node.

    Args:
        base_url: the node's URL, e.g. ``https://relay-vela.example:8443``.
        identity: the auditor's certificate files; used only when ``client`` is None.
        client: an ``httpx.Client`` to send through (the caller keeps and closes it).
        timeout: seconds, for the client built here.

    Every call raises:
        ApiError: the node answered with a non-2xx status (401/403: not an auditor,
            404: no checkpoint signed yet, 400: bad index or size).
        TransportError: no answer (connection, TLS, timeout).
        KeystrataClientError: the answer is not the JSON the route documents.
    """

    def __init__(
        self,
        base_url: str,
        identity: TlsIdentity | None = None,
        *,
        client: httpx.Client | None = None,
        timeout: float = 30.0,
    ) -> None:
        self.base_url = check_base_url(base_url)
        self._owns_client = client is None
        self._client = client if client is not None else build_client(identity, timeout)

    def __repr__(self) -> str:
        return f"AuditClient({self.base_url!r})"

    def close(self) -> None:
        """Close the HTTP client if this object created it; return None."""
        if self._owns_client:
            self._client.close()

    def __enter__(self) -> AuditClient:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()

    def _get(self, path: str, params: Mapping[str, Any] | None = None) -> dict[str, Any]:
        query = {
            k: v if isinstance(v, list) else str(v)
            for k, v in (params or {}).items()
            if v is not None and v != []
        }
        try:
            response = self._client.get(f"{self.base_url}/api/v1/audit{path}", params=query)
        except httpx.HTTPError as exc:
            raise wrap_transport(exc) from exc
        return json_object(response)

    def latest_checkpoint(self) -> dict[str, Any]:
        """Return the latest signed checkpoint: ``origin``, ``tree_size``, ``root_hash``,
        ``signed_text``, ``signature``, ``public_key``, ``signed_at``."""
        return _checkpoint(self._get("/checkpoints/latest"), "checkpoints/latest")

    def checkpoints(self, limit: int = 100, before: int | None = None) -> list[dict[str, Any]]:
        """Return up to ``limit`` (1..1000) checkpoints, largest tree first, each with a
        tree size below ``before`` when given."""
        params = {"limit": limit} if before is None else {"limit": limit, "before": before}
        found = self._get("/checkpoints", params).get("checkpoints")
        if not isinstance(found, list):
            raise KeystrataClientError("checkpoints: answer has no checkpoints list")
        return [_checkpoint(c, "checkpoints") for c in found]

    def entries(self, start: int = 0, end: int | None = None) -> Iterator[dict[str, Any]]:
        """Yield the entries ``start <= index < end`` as ``{"index", "entry_b64",
        "entry"}``, asking for at most 1000 per request.

        Without ``end`` it pages on until the node returns an empty page. An index the
        node does not hold is skipped, as the node skips it.

        Raises:
            KeystrataClientError: an entry is malformed, outside the requested range, or
                out of order.
        """
        last = start - 1
        while end is None or start < end:
            stop = start + PAGE if end is None else min(end, start + PAGE)
            found = self._get("/entries", {"start": start, "end": stop}).get("entries")
            if not isinstance(found, list):
                raise KeystrataClientError("entries: answer has no entries list")
            if end is None and not found:
                return
            for item in found:
                index = item.get("index") if isinstance(item, dict) else None
                if (
                    not isinstance(item, dict)
                    or type(index) is not int
                    or not isinstance(item.get("entry_b64"), str)
                ):
                    raise KeystrataClientError("entries: malformed entry in the answer")
                if not (last < index < stop):
                    raise KeystrataClientError(
                        f"entries: index {index} is out of order or outside [{start}, {stop})"
                    )
                last = index
                yield {"index": index, "entry_b64": item["entry_b64"], "entry": item.get("entry")}
            start = stop

    def inclusion_proof(self, index: int, tree_size: int | None = None) -> dict[str, Any]:
        """Return ``{"index", "tree_size", "audit_path": [Base64]}``: the RFC 9162 audit
        path of one entry in the tree of ``tree_size`` entries (default: the current)."""
        params = {"index": index} if tree_size is None else {"index": index, "tree_size": tree_size}
        return self._get("/proofs/inclusion", params)

    def consistency_proof(self, first: int, second: int | None = None) -> dict[str, Any]:
        """Return ``{"first", "second", "proof": [Base64]}``: the RFC 9162 consistency
        proof between the trees of ``first`` and ``second`` entries (default: current)."""
        params = {"first": first} if second is None else {"first": first, "second": second}
        return self._get("/proofs/consistency", params)

    def search(
        self,
        *,
        since: str | None = None,
        until: str | None = None,
        event: Sequence[str] = (),
        pair: str | None = None,
        sae: str | None = None,
        node: str | None = None,
        segment: str | None = None,
        key_id: str | None = None,
        limit: int | None = None,
    ) -> Iterator[dict[str, Any]]:
        """Yield the entries matching every given filter, oldest first, paging on until
        the node has no more (or ``limit`` entries were yielded). Times are RFC 3339
        with an offset; several ``event`` names match any of them."""
        params: dict[str, Any] = {
            "since": since, "until": until, "event": list(event), "pair": pair, "sae": sae,
            "node": node, "segment": segment, "key_id": key_id,
        }  # fmt: skip
        left = limit
        while left is None or left > 0:
            page = min(PAGE, left) if left is not None else PAGE
            answer = self._get("/search", {**params, "limit": page})
            found = answer.get("entries")
            if not isinstance(found, list):
                raise KeystrataClientError("search: answer has no entries list")
            yield from found[:left]
            if left is not None:
                left -= len(found)
            if answer.get("next_after") is None:
                return
            params["after"] = answer["next_after"]

    def accounting(self, since: str | None = None, until: str | None = None) -> dict[str, Any]:
        """Per day, pair and SAE: keys and bits to masters and slaves, expired, refused,
        and at a relay the link key used by relaying (``{"node_id", "days": [...]}``)."""
        return self._get("/accounting", {"since": since, "until": until})


def _checkpoint(answer: Any, where: str) -> dict[str, Any]:
    if not isinstance(answer, dict) or any(k not in answer for k in CHECKPOINT_KEYS):
        raise KeystrataClientError(f"{where}: answer is not a checkpoint")
    if type(answer["tree_size"]) is not int:
        raise KeystrataClientError(f"{where}: tree_size is not an integer")
    return answer


@dataclass(frozen=True, slots=True)
class ExportSummary:
    """What :func:`write_export` wrote: the folder, the checkpoint's tree size, the
    number of entry lines (tree_size unless the node lacks entries) and of checkpoints."""

    out_dir: Path
    tree_size: int
    entries: int
    checkpoints: int


def write_export(
    client: AuditClient,
    out_dir: str | os.PathLike[str],
    *,
    overwrite: bool = False,
    progress: Callable[[int, int], None] | None = None,
) -> ExportSummary:
    """Export a node's ledger into ``out_dir`` for :func:`verify_export`.

    The latest checkpoint is fetched first and the entries ``[0, tree_size)`` after it,
    so entries the node appends meanwhile stay out of the export. Each file is written
    to a temporary name and renamed into place, ``checkpoint.json`` last.
    ``progress(entries written, tree size)`` is called after every page of entries.

    Returns:
        An :class:`ExportSummary`.

    Raises:
        FileExistsError: ``out_dir`` holds files and ``overwrite`` is False.
        NotADirectoryError: ``out_dir`` is a file.
        ApiError, TransportError, KeystrataClientError: as :class:`AuditClient`.
    """
    folder = Path(out_dir)
    if folder.exists() and not folder.is_dir():
        raise NotADirectoryError(f"{folder}: not a directory")
    if folder.is_dir() and any(folder.iterdir()) and not overwrite:
        raise FileExistsError(f"{folder}: not empty (pass overwrite to replace an export)")
    folder.mkdir(parents=True, exist_ok=True)

    latest = client.latest_checkpoint()
    size: int = latest["tree_size"]
    with _atomic(folder / ENTRIES_FILE) as out:
        written = 0
        if progress is not None:
            progress(0, size)
        for item in client.entries(0, size):
            out.write(_line(item))
            written += 1
            if progress is not None and (written % PAGE == 0 or written == size):
                progress(written, size)

    history: list[dict[str, Any]] = []
    before = size + 1
    while True:
        page = client.checkpoints(limit=PAGE, before=before)
        for cp in page:
            if cp["tree_size"] >= before:
                raise KeystrataClientError("checkpoints: page is not below the requested size")
            before = cp["tree_size"]
            history.append(cp)
        if len(page) < PAGE:
            break
    with _atomic(folder / HISTORY_FILE) as out:
        for cp in reversed(history):
            out.write(_line({k: cp[k] for k in CHECKPOINT_KEYS}))
    with _atomic(folder / CHECKPOINT_FILE) as out:
        out.write(json.dumps({k: latest[k] for k in CHECKPOINT_KEYS}, indent=2) + "\n")
    return ExportSummary(folder, size, written, len(history))


def _line(value: Mapping[str, Any]) -> str:
    return json.dumps(value, ensure_ascii=False, separators=(",", ":")) + "\n"


@contextmanager
def _atomic(path: Path) -> Iterator[IO[str]]:
    """Write ``path`` through a temporary file in its folder, renamed over it on success."""
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="\n") as out:
            yield out
            out.flush()
            os.fsync(out.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    dir_fd = os.open(path.parent, os.O_RDONLY)
    try:
        os.fsync(dir_fd)  # the rename itself survives a crash
    finally:
        os.close(dir_fd)
