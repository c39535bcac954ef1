"""The ceiling of key delivery: a bare endpoint in the same framework (FastAPI) and the
same server (uvicorn, run with exactly the options of ``keystrata.server.serve``: the
client-certificate protocol class, ``CERT_OPTIONAL`` against the network CA, the same
log level and worker count) that answers Get key and Get key with key IDs with a key
container of the standard's shape from ``os.urandom``: no database, no ledger, no
identity lookup. What the real endpoints reach as a share of it is what the service's
own work costs.

Run as ``python -m bench.ceilings --port P --workers N --cert C --key K --ca CA``.
"""

# No `from __future__ import annotations`: FastAPI reads the body model classes here.

import argparse
import base64
import os
import ssl
import uuid
from typing import Any

import uvicorn
from fastapi import FastAPI

from keystrata.api.tls import ClientCertHttpToolsProtocol
from keystrata.delivery.schemas import KeyContainer, KeyIds, KeyRequest


def _container(count: int, size_bits: int) -> dict[str, Any]:
    return {
        "keys": [
            {
                "key_ID": str(uuid.uuid4()),
                "key": base64.b64encode(os.urandom(size_bits // 8)).decode(),
            }
            for _ in range(count)
        ]
    }


def create_app() -> FastAPI:
    """The bare key-delivery app: same paths, request and answer models as the node's."""
    app = FastAPI(openapi_url=None, docs_url=None, redoc_url=None)

    @app.post("/api/v1/keys/{slave_SAE_ID}/enc_keys", response_model=KeyContainer)
    async def get_key(slave_SAE_ID: str, body: KeyRequest) -> dict[str, Any]:
        return _container(body.number or 1, body.size or 256)

    @app.post("/api/v1/keys/{master_SAE_ID}/dec_keys", response_model=KeyContainer)
    async def get_key_with_ids(master_SAE_ID: str, body: KeyIds) -> dict[str, Any]:
        return {
            "keys": [
                {"key_ID": k.key_ID, "key": base64.b64encode(os.urandom(32)).decode()}
                for k in body.key_IDs
            ]
        }

    return app


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(prog="python -m bench.ceilings")
    parser.add_argument("--port", type=int, required=True)
    parser.add_argument("--workers", type=int, default=1)
    parser.add_argument("--cert", required=True)
    parser.add_argument("--key", required=True)
    parser.add_argument("--ca", required=True)
    args = parser.parse_args(argv)
    # The same call as keystrata.server.serve, less the node.
    uvicorn.run(
        "bench.ceilings:create_app",
        factory=True,
        host="127.0.0.1",
        port=args.port,
        workers=args.workers,
        http=ClientCertHttpToolsProtocol,
        ssl_certfile=args.cert,
        ssl_keyfile=args.key,
        ssl_ca_certs=args.ca,
        ssl_cert_reqs=ssl.CERT_OPTIONAL,
        log_level="info",
        proxy_headers=False,
        server_header=False,
        timeout_graceful_shutdown=2,
    )


if __name__ == "__main__":
    main()
