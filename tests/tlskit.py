"""TLS handshakes in memory, for tests that check certificates and server contexts
without a socket: two ``ssl`` contexts talk through memory BIOs."""

from __future__ import annotations

import ssl
from pathlib import Path

# A TLS 1.3 handshake takes three flights; the rest is margin.
_MAX_ROUNDS = 10


def client_context(ca: Path, cert: Path, key: Path) -> ssl.SSLContext:
    """Return a TLS client context that trusts ``ca`` and presents ``cert`` with ``key``."""
    context = ssl.SSLContext(ssl.PROTOCOL_TLS_CLIENT)
    context.load_verify_locations(ca)
    context.load_cert_chain(cert, key)
    return context


def handshake(
    client: ssl.SSLContext, server: ssl.SSLContext, server_hostname: str
) -> ssl.SSLObject:
    """Run a TLS handshake between ``client`` and ``server``; return the server's end.

    An IP literal as ``server_hostname`` is checked against the server certificate but
    never sent as a server name (RFC 6066 section 3), so the server sees no SNI.

    Raises:
        ssl.SSLError: either side refused the other (the server's verdict on the client
            certificate included).
        AssertionError: the handshake did not finish.
    """
    c_in, c_out, s_in, s_out = (ssl.MemoryBIO() for _ in range(4))
    client_end = client.wrap_bio(c_in, c_out, server_hostname=server_hostname)
    server_end = server.wrap_bio(s_in, s_out, server_side=True)
    pending = [client_end, server_end]
    for _ in range(_MAX_ROUNDS):
        for end in list(pending):
            try:
                end.do_handshake()
                pending.remove(end)
            except ssl.SSLWantReadError:
                pass
        s_in.write(c_out.read())
        c_in.write(s_out.read())
        if not pending:
            break
    assert not pending, "the TLS handshake did not finish"
    # TLS 1.3: the server judges the client's certificate after the client finished;
    # one byte of data through shows the server's verdict.
    client_end.write(b"x")
    s_in.write(c_out.read())
    server_end.read(1)
    return server_end
