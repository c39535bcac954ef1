"""A peer node stand-in for outbox tests: an HTTPS server on loopback with the test PKI
(mutual TLS, the certificate of a node), answering the peer batch route the way a
station answers link ranges: only the next message in line is applied; one ahead of it
is refused "not yet" (409), exactly what a station does when messages overtake each
other. It records what arrived, so tests can check order, batching and timing.

Messages are ``{"kind": "test.seq", "seq": n}`` with ``n`` counting from 0 per
destination; ``refuse_once`` names sequence numbers answered 409 the first time they
come, like a message that arrives before what it depends on.
"""

from __future__ import annotations

import json
import ssl
import threading
import time
from dataclasses import dataclass, field
from datetime import UTC, datetime
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any

from keystrata.loopback.configs import peers_section
from keystrata.loopback.pki import PkiFiles
from keystrata.peering import outbox
from keystrata.storage.db import Database


@dataclass
class Record:
    applied: list[int] = field(default_factory=list)
    applied_at: list[float] = field(default_factory=list)
    out_of_order: int = 0  # refused because an earlier message had not come yet
    duplicates: int = 0  # already applied, sent again
    refused: set[int] = field(default_factory=set)  # answered 409 from refuse_once
    requests: int = 0
    batch_requests: int = 0
    client_subjects: set[str] = field(default_factory=set)


class PeerStub:
    def __init__(
        self,
        pki: PkiFiles,
        node_id: str,
        *,
        refuse_once: set[int] | None = None,
    ) -> None:
        self.record = Record()
        self.refuse_once = set(refuse_once or ())
        self._lock = threading.Lock()
        stub = self

        class Handler(BaseHTTPRequestHandler):
            protocol_version = "HTTP/1.1"

            def log_message(self, *args: Any) -> None:
                pass

            def do_POST(self) -> None:
                length = int(self.headers.get("content-length", "0"))
                body = json.loads(self.rfile.read(length))
                cert = self.connection.getpeercert()  # type: ignore[attr-defined]
                subject = dict(x[0] for x in cert["subject"])["commonName"]
                if self.path == "/api/v1/peer/messages/batch":
                    status, answer = 200, {"results": stub._apply(body["messages"], subject)}
                else:
                    status, answer = 404, {"message": "no such route"}
                data = json.dumps(answer).encode()
                self.send_response(status)
                self.send_header("content-type", "application/json")
                self.send_header("content-length", str(len(data)))
                self.end_headers()
                self.wfile.write(data)

        ctx = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH, cafile=str(pki.ca))
        ctx.verify_mode = ssl.CERT_REQUIRED
        ctx.load_cert_chain(str(pki.cert(node_id)), str(pki.key(node_id)))
        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.server.daemon_threads = True
        self.server.socket = ctx.wrap_socket(self.server.socket, server_side=True)
        self.url = f"https://127.0.0.1:{self.server.server_address[1]}"
        self._thread = threading.Thread(target=self.server.serve_forever, daemon=True)
        self._thread.start()

    def _apply(self, messages: list[dict[str, Any]], subject: str) -> list[dict[str, Any]]:
        """Apply in order, stopping at the first message not applied (as a node does)."""
        out: list[dict[str, Any]] = []
        with self._lock:
            r = self.record
            r.requests += 1
            r.batch_requests += len(messages) > 1
            r.client_subjects.add(subject)
            for m in messages:
                seq = int(m["seq"])
                expected = len(r.applied)
                if seq < expected:
                    r.duplicates += 1
                    out.append({"status": 200, "segment_id": None, "outcome": "already"})
                    continue
                if seq > expected:
                    r.out_of_order += 1
                    out.append({"status": 409, "message": "not yet: an earlier message"})
                    break
                if seq in self.refuse_once and seq not in r.refused:
                    r.refused.add(seq)
                    out.append({"status": 409, "message": "not yet: refused once"})
                    break
                r.applied.append(seq)
                r.applied_at.append(time.monotonic())
                out.append({"status": 200, "segment_id": None, "outcome": "applied"})
        return out

    def count(self) -> int:
        with self._lock:
            return len(self.record.applied)

    def close(self) -> None:
        self.server.shutdown()
        self.server.server_close()


def peers_of(stubs: dict[str, PeerStub]) -> str:
    """``[[peers]]`` tables naming each stub (node ID -> stub) as that peer."""
    return peers_section({p: s.url for p, s in stubs.items()})


def enqueue_seqs(db: Database, destination: str, seqs: range) -> None:
    """Enqueue ``test.seq`` messages numbered ``seqs`` for ``destination`` (what a stub
    applies in order)."""
    with db.write() as s:
        for q in seqs:
            outbox.enqueue(
                s,
                destination=destination,
                kind="test.seq",
                segment_id=None,
                body={"seq": q},
                now=datetime.now(UTC),
            )
