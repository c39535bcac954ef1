"""Write the secrets folder that deploy/compose.yaml mounts: a lab PKI, one
key-encryption key (KEK) per node, and the PostgreSQL credentials.

Run it once, with the Python that has keystrata installed (it uses the same
functions as `keystrata pki` and `keystrata kek new`), before the first
``docker compose up``::

    python deploy/compose/make_secrets.py --out deploy/compose/secrets --chown

It never overwrites: an existing, non-empty ``--out`` folder is refused, so a KEK can
not be replaced by accident (a database sealed under it would be lost). What it
writes (every secret file mode 0600, folders 0700)::

    pki/ca.crt, pki/ca.key            the lab CA; take ca.key offline afterwards
    pki/<node>.crt, pki/<node>.key    node certificates, SAN: service name, localhost,
                                      127.0.0.1 (peers and the health check use the
                                      service name, people on the host localhost)
    pki/ops-ida-varga.crt, .key       the first operator
    pki/monitor-lowmarch.crt, .key    the health check's client certificate
    kek/<node>.kek                    each node's KEK (as `keystrata kek new` makes it)
    postgres/<node>.pgpass            libpq password file of the node
    postgres/node-roles               "ROLE VERIFIER" lines for postgres-init.sh
    postgres/superuser.password       the PostgreSQL superuser's password

PostgreSQL receives only SCRAM-SHA-256 verifiers (RFC 5802 section 3, RFC 7677),
never the nodes' passwords. With ``--chown`` (run as root) the node files go to UID
10001, the image's keystrata user, and the PostgreSQL files to UID 999, the postgres
image's user: compose bind-mounts secret files with their host owner and mode, and
both the node (for its KEK) and libpq (for a password file) refuse files that others
can read.

This is for a lab. In production the CA is an offline root with an issuing CA and
the KEKs come from your key custody procedure (deploy/OPERATIONS.md).
"""

from __future__ import annotations

import argparse
import base64
import hashlib
import hmac
import os
import secrets
import sys
from pathlib import Path

from keystrata.crypto.kek import write_new_kek
from keystrata.crypto.pki import ROLES, PkiDir
from keystrata.errors import KeystrataError

#: Node ID -> its PostgreSQL role (and database keystrata_<role>), as in postgres-init.sh.
NODES = {
    "relay-vela": "relay_vela",
    "karsvik": "karsvik",
    "tollmere": "tollmere",
    "brenhaven": "brenhaven",
}
OPERATOR = "ops-ida-varga"
MONITOR = "monitor-lowmarch"
CA_NAME = "Lowmarch Quantum Grid Lab CA"
PG_HOST, PG_PORT = "postgres", 5432
NODE_UID, POSTGRES_UID = 10001, 999
#: PostgreSQL's default (scram_iterations) and the least RFC 7677 section 4 asks for.
SCRAM_ITERATIONS = 4096
SCRAM_SALT_BYTES = 16  # PostgreSQL's SCRAM_DEFAULT_SALT_LEN


def scram_sha256_verifier(password: str, salt: bytes, iterations: int = SCRAM_ITERATIONS) -> str:
    """Return PostgreSQL's stored form of a SCRAM-SHA-256 secret for ``password``.

    RFC 5802 section 3: SaltedPassword = Hi(password, salt, i) (PBKDF2 with HMAC),
    ClientKey = HMAC(SaltedPassword, "Client Key"), StoredKey = H(ClientKey),
    ServerKey = HMAC(SaltedPassword, "Server Key"); PostgreSQL writes
    ``SCRAM-SHA-256$<i>:<salt>$<StoredKey>:<ServerKey>`` in Base64. The passwords made
    here are ASCII, which SASLprep (RFC 4013) leaves as they are.
    """
    salted = hashlib.pbkdf2_hmac("sha256", password.encode(), salt, iterations)
    client_key = hmac.new(salted, b"Client Key", hashlib.sha256).digest()
    stored_key = hashlib.sha256(client_key).digest()
    server_key = hmac.new(salted, b"Server Key", hashlib.sha256).digest()

    def b64(b: bytes) -> str:
        return base64.b64encode(b).decode()

    return f"SCRAM-SHA-256${iterations}:{b64(salt)}${b64(stored_key)}:{b64(server_key)}"


def _write_secret(path: Path, text: str) -> None:
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    with os.fdopen(fd, "w") as fh:
        fh.write(text)


def make(out: Path, monitor_role: str) -> None:
    """Write every file listed in the module docstring under ``out``."""
    pki, kek, pg = out / "pki", out / "kek", out / "postgres"
    for folder in (out, pki, kek, pg):
        folder.mkdir(mode=0o700, exist_ok=True)
    ca = PkiDir(pki)
    ca.init(CA_NAME)
    for node in NODES:
        ca.issue_node(node, [node, "localhost", "127.0.0.1"])
        write_new_kek(kek / f"{node}.kek")
    ca.issue_client(OPERATOR, "operator")
    ca.issue_client(MONITOR, monitor_role)
    roles = []
    for node, role in NODES.items():
        password = secrets.token_urlsafe(32)  # [A-Za-z0-9_-]: nothing to escape in .pgpass
        verifier = scram_sha256_verifier(password, secrets.token_bytes(SCRAM_SALT_BYTES))
        roles.append(f"{role} {verifier}\n")
        _write_secret(
            pg / f"{node}.pgpass", f"{PG_HOST}:{PG_PORT}:keystrata_{role}:{role}:{password}\n"
        )
    _write_secret(pg / "node-roles", "".join(roles))
    _write_secret(pg / "superuser.password", secrets.token_urlsafe(32) + "\n")


def chown(out: Path, node_uid: int, postgres_uid: int) -> None:
    """Give the node files to ``node_uid`` and the PostgreSQL files to ``postgres_uid``.

    The CA key stays with the caller; certificates are world-readable anyway.
    """
    for node in NODES:
        for path in (
            out / "pki" / f"{node}.key",
            out / "kek" / f"{node}.kek",
            out / "postgres" / f"{node}.pgpass",
        ):
            os.chown(path, node_uid, node_uid)
    os.chown(out / "pki" / f"{MONITOR}.key", node_uid, node_uid)
    for name in ("node-roles", "superuser.password"):
        os.chown(out / "postgres" / name, postgres_uid, postgres_uid)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--out", type=Path, default=Path(__file__).parent / "secrets")
    parser.add_argument(
        "--monitor-role",
        default="monitor",
        choices=ROLES,
        help="role in the health check certificate (monitor: health and metrics only)",
    )
    parser.add_argument(
        "--chown", action="store_true", help="hand the files to the container users (needs root)"
    )
    parser.add_argument("--node-uid", type=int, default=NODE_UID)
    parser.add_argument("--postgres-uid", type=int, default=POSTGRES_UID)
    args = parser.parse_args(argv)
    out: Path = args.out
    if out.exists() and any(out.iterdir()):
        print(f"{out} is not empty; refusing to overwrite keys and KEKs", file=sys.stderr)
        return 1
    old = os.umask(0o077)
    try:
        make(out, args.monitor_role)
    except KeystrataError as exc:
        print(f"error: {exc.message}", file=sys.stderr)
        return 1
    finally:
        os.umask(old)
    if args.chown:
        chown(out, args.node_uid, args.postgres_uid)
    else:
        print(
            f"files are owned by UID {os.geteuid()}; the containers run as UID "
            f"{args.node_uid} (nodes) and {args.postgres_uid} (postgres): run with "
            "--chown as root, or chown them yourself",
            file=sys.stderr,
        )
    print(f"wrote {out}; move {out / 'pki' / 'ca.key'} offline once you are done issuing")
    return 0


if __name__ == "__main__":
    sys.exit(main())
