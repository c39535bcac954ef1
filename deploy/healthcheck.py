"""Health check of a keystrata node for container runtimes: one HTTPS GET over mutual TLS.

Every route of a node needs a client certificate of a known principal, so a plain
``curl`` or TCP probe cannot tell a ready node from one that refuses everything. This
script verifies the node's certificate against the network CA and its host name (as
peers do), presents a client certificate, and exits 0 when the answer is HTTP 200,
1 otherwise (Docker and compose read only the exit status and keep the one line it
prints). It prints the status code or the connection error, never the response body.

Standard library only, so it runs with the image's Python without importing keystrata::

    python healthcheck.py --url https://relay-vela:8443/api/v1/health/ready \\
        --ca /etc/keystrata/pki/ca.crt --cert /etc/keystrata/pki/monitor.crt \\
        --key /run/secrets/monitor.key
"""

from __future__ import annotations

import argparse
import http.client
import ssl
import sys
import urllib.parse


def check(url: str, ca: str, cert: str, key: str, timeout: float) -> tuple[bool, str]:
    """GET ``url`` with the client certificate ``cert``/``key``.

    Returns:
        (True, "HTTP 200") when the node answered 200; otherwise False and the status
        code or the reason the request failed.
    """
    parts = urllib.parse.urlsplit(url)
    if parts.scheme != "https" or not parts.hostname:
        return False, "the URL must be https://host:port/path"
    try:
        ctx = ssl.create_default_context(cafile=ca)  # chain and host name are checked
        ctx.load_cert_chain(cert, key)
    except (OSError, ssl.SSLError) as exc:
        return False, f"cannot load the TLS files: {exc}"
    target = parts.path or "/"
    if parts.query:
        target += "?" + parts.query
    conn = http.client.HTTPSConnection(
        parts.hostname, parts.port or 443, context=ctx, timeout=timeout
    )
    try:
        conn.request("GET", target, headers={"Accept": "application/json"})
        response = conn.getresponse()
        response.read(64 * 1024)
    except (OSError, http.client.HTTPException) as exc:  # ssl.SSLError is an OSError
        return False, f"{type(exc).__name__}: {exc}"
    finally:
        conn.close()
    return response.status == 200, f"HTTP {response.status}"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Mutual-TLS health check of a keystrata node.")
    parser.add_argument(
        "--url", required=True, help="e.g. https://karsvik:8443/api/v1/health/ready"
    )
    parser.add_argument("--ca", required=True, help="network CA certificate (PEM)")
    parser.add_argument("--cert", required=True, help="client certificate (PEM)")
    parser.add_argument("--key", required=True, help="client private key (PEM)")
    parser.add_argument("--timeout", type=float, default=5.0, help="seconds (default 5)")
    args = parser.parse_args(argv)
    healthy, reason = check(args.url, args.ca, args.cert, args.key, args.timeout)
    print(("healthy: " if healthy else "unhealthy: ") + reason)
    return 0 if healthy else 1


if __name__ == "__main__":
    sys.exit(main())
