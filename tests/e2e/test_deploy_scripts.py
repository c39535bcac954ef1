"""The deploy scripts, run for real: make_secrets.py (the files compose mounts, SCRAM
verifiers checked against RFC 7677 and scramp), postgres-init.sh against the test
PostgreSQL, and healthcheck.py over mutual TLS against relay-vela started from its
compose config. The static checks of the same files are in test_deploy_files.py.
"""

from __future__ import annotations

import base64
import hashlib
import hmac
import os
import secrets
import shutil
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import psycopg
import pytest
import scramp  # type: ignore[import-untyped]
from sqlalchemy.engine import make_url

from conftest import PG_URL
from deploykit import (
    COMPOSE,
    DEPLOY,
    SECRETS_DIR,
    SERVICES,
    init_roles,
    make_secrets,
    node_settings,
    run_line,
)
from keystrata.crypto.pki import PkiDir
from keystrata.loopback.processes import KEYSTRATA, free_port, run_cli

#: The health check's role: health, readiness and metrics only.
MONITOR_ROLE = "monitor"


def _make_secrets(out: Path) -> subprocess.CompletedProcess[str]:
    script = DEPLOY / "compose" / "make_secrets.py"
    return run_line(f"{sys.executable} {script} --out {out} --monitor-role {MONITOR_ROLE}")


@pytest.fixture(scope="module")
def lab_secrets(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The folder make_secrets.py writes, made once with the real keystrata CLI."""
    out = tmp_path_factory.mktemp("compose") / "secrets"
    done = _make_secrets(out)
    assert done.returncode == 0, done.stderr
    return out


def test_make_secrets_writes_every_file_compose_mounts(lab_secrets: Path) -> None:
    for sec in COMPOSE["secrets"].values():
        path = lab_secrets / sec["file"].removeprefix(SECRETS_DIR)
        assert path.stat().st_mode & 0o777 == 0o600, path  # owner-only, as the node demands
    for svc in SERVICES.values():
        for vol in svc.get("volumes", []):
            if vol["source"].startswith(SECRETS_DIR):
                assert (lab_secrets / vol["source"].removeprefix(SECRETS_DIR)).is_file()
    again = _make_secrets(lab_secrets)
    assert again.returncode == 1 and "refusing" in again.stderr  # never overwrites a KEK


def test_scram_verifier_matches_rfc_7677_and_scramp() -> None:
    # RFC 7677 section 3: user "user", password "pencil", this salt, 4096 iterations.
    salt = base64.b64decode("W22ZaJ0SNY7soEsUEjb6gQ==")
    verifier = make_secrets.scram_sha256_verifier("pencil", salt, 4096)
    head, keys = verifier.rsplit("$", 1)
    stored_b64, server_b64 = keys.split(":")
    assert head == "SCRAM-SHA-256$4096:" + base64.b64encode(salt).decode()
    stored, server = base64.b64decode(stored_b64), base64.b64decode(server_b64)
    nonce = "rOprNGfwEbeRWgbNEkqO%hvYDpWUa2RaTCAfuxFIlj)hNlF$k0"
    auth = (
        f"n=user,r=rOprNGfwEbeRWgbNEkqO,r={nonce},s=W22ZaJ0SNY7soEsUEjb6gQ==,i=4096,"
        f"c=biws,r={nonce}"
    ).encode()
    # The server's proof "v=" of the RFC's exchange comes from ServerKey ...
    assert base64.b64encode(hmac.new(server, auth, hashlib.sha256).digest()) == (
        b"6rriTRBi23WpRR/wtup+mMhUZUn/dB5nLTJRsjl95G4="
    )
    # ... and the client's proof "p=" checks against StoredKey (RFC 5802 section 3).
    proof = base64.b64decode("dHzbZapWIk4jUhN+Ute9ytag9zjfMHgsqmmiz7AndVQ=")
    signature = hmac.new(stored, auth, hashlib.sha256).digest()
    assert (
        hashlib.sha256(bytes(a ^ b for a, b in zip(proof, signature, strict=True))).digest()
        == stored
    )
    # scramp (the SCRAM library of pg8000) as a second reference, any salt.
    _, ref_stored, ref_server, _ = scramp.ScramMechanism("SCRAM-SHA-256").make_auth_info(
        "correct horse", iteration_count=4096, salt=b"0123456789abcdef"
    )
    mine = make_secrets.scram_sha256_verifier("correct horse", b"0123456789abcdef")
    assert mine.endswith(
        f"${base64.b64encode(ref_stored).decode()}:{base64.b64encode(ref_server).decode()}"
    )


# ---------------------------------------------------------------- PostgreSQL init script


@pytest.fixture
def pg_admin() -> Iterator[psycopg.Connection[Any]]:
    try:
        conn = psycopg.connect(
            PG_URL.replace("postgresql+psycopg://", "postgresql://"),
            autocommit=True,
            connect_timeout=3,
        )
    except psycopg.OperationalError as exc:
        if os.environ.get("CI"):
            pytest.fail(f"CI requires PostgreSQL at {PG_URL}: {exc}")
        pytest.skip(f"no PostgreSQL at {PG_URL}")
    with conn:
        yield conn


def _drop_node_databases(admin: psycopg.Connection[Any], roles: list[str]) -> None:
    for role in roles:
        admin.execute(f'DROP DATABASE IF EXISTS "keystrata_{role}" WITH (FORCE)')
        admin.execute(f'DROP ROLE IF EXISTS "{role}"')


def test_init_script_creates_one_private_database_per_node(
    tmp_path: Path, pg_admin: psycopg.Connection[Any]
) -> None:
    if shutil.which("psql") is None:
        pytest.skip("psql is not installed")
    roles, server = init_roles(), make_url(PG_URL)
    passwords = {r: secrets.token_urlsafe(24) for r in roles}
    verifiers = {
        r: make_secrets.scram_sha256_verifier(p, os.urandom(16)) for r, p in passwords.items()
    }
    roles_file = tmp_path / "node-roles"
    roles_file.write_text("".join(f"{r} {v}\n" for r, v in verifiers.items()))
    env = {
        **os.environ,
        "PGHOST": server.host or "127.0.0.1",
        "PGPORT": str(server.port or 5432),
        "POSTGRES_USER": server.username or "postgres",
        "POSTGRES_DB": server.database or "",
        "KEYSTRATA_ROLES_FILE": str(roles_file),
    }
    _drop_node_databases(pg_admin, roles)
    try:
        done = run_line(f"bash {DEPLOY / 'compose' / 'postgres-init.sh'}", env)
        assert done.returncode == 0, done.stderr
        stored = dict(
            pg_admin.execute(
                "SELECT rolname, rolpassword FROM pg_authid WHERE rolname = ANY(%s)"
                " AND NOT rolsuper AND NOT rolcreatedb AND NOT rolcreaterole",
                (roles,),
            ).fetchall()
        )
        # PostgreSQL keeps a well-formed SCRAM secret as given; anything else it would
        # have hashed as a password, with a new salt (PostgreSQL docs, CREATE ROLE).
        assert stored == verifiers
        for own, other in zip(roles, roles[1:] + roles[:1], strict=True):
            kw = f"host={env['PGHOST']} port={env['PGPORT']} user={own} connect_timeout=3"
            kw += f" password={passwords[own]} dbname=keystrata_"
            with psycopg.connect(kw + own) as conn:
                assert conn.execute("SELECT current_user").fetchone() == (own,)
            with pytest.raises(psycopg.OperationalError, match="permission denied"):
                psycopg.connect(kw + other).close()
        # A node's compose URL, pointed at this server, can create its schema.
        role = make_secrets.NODES["karsvik"]
        url = make_url(node_settings("karsvik").database.url).set(
            host=env["PGHOST"], port=int(env["PGPORT"]), password=passwords[role]
        )
        env = {"KEYSTRATA_DATABASE__URL": url.render_as_string(hide_password=False)}
        run_cli(*f"db upgrade --config {DEPLOY / 'compose' / 'karsvik.toml'}".split(), env=env)
    finally:
        _drop_node_databases(pg_admin, roles)


# ---------------------------------------------------------------- health check


def _health(url: str, ca: Path, pki: Path, who: str) -> tuple[int, str]:
    """Run the health check as compose does (its own Python process) as ``who``."""
    script, cert, key = DEPLOY / "healthcheck.py", pki / f"{who}.crt", pki / f"{who}.key"
    done = run_line(f"{sys.executable} {script} --url {url} --ca {ca} --cert {cert} --key {key}")
    return done.returncode, done.stdout.strip()


def test_health_check_over_mutual_tls(
    tmp_path: Path, lab_secrets: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """relay-vela from its compose config and the lab secrets (paths, port and database
    moved to this machine through KEYSTRATA_* overrides), then the compose health check."""
    pki, port = lab_secrets / "pki", free_port()
    overrides = f"""SERVER__HOST=127.0.0.1 SERVER__PORT={port} TLS__CA={pki}/ca.crt
        TLS__CERT={pki}/relay-vela.crt TLS__KEY={pki}/relay-vela.key
        KEK__FILE={lab_secrets}/kek/relay-vela.kek DATABASE__URL=sqlite:///{tmp_path}/node.db"""
    for item in overrides.split():
        monkeypatch.setenv("KEYSTRATA_" + item.split("=")[0], item.split("=", 1)[1])
    config = DEPLOY / "compose" / "relay-vela.toml"
    ops, monitor, ca = make_secrets.OPERATOR, make_secrets.MONITOR, pki / "ca.crt"
    run_cli(
        *f"node init --config {config} --operator-subject {ops} --operator-id {ops}".split(),
        *("--operator-cert", str(pki / f"{ops}.crt")),
    )
    base = f"https://localhost:{port}"  # a name in the node certificate's SAN
    path = "/api/v1/health/ready"
    with open(tmp_path / "node.log", "wb") as log:
        proc = subprocess.Popen(
            [*KEYSTRATA, "serve", "--config", str(config)], stdout=log, stderr=subprocess.STDOUT
        )
    try:
        deadline = time.monotonic() + 30
        while _health(base + "/api/v1/node", ca, pki, ops)[0]:
            assert proc.poll() is None and time.monotonic() < deadline, (
                tmp_path / "node.log"
            ).read_text()
            time.sleep(0.2)
        # Not registered yet: the node answers 401, which is not healthy.
        assert _health(base + path, ca, pki, monitor) == (1, "unhealthy: HTTP 401")
        # What deploy/README.md tells the operator to run once per node.
        fields = f"principal_id={monitor} role={MONITOR_ROLE} cert_subject={monitor}"
        run_cli(
            *["registry", "create", "principals"],
            *(arg for f in fields.split() for arg in ("--set", f)),
            *f"--url {base} --ca {ca} --cert {pki}/{ops}.crt --key {pki}/{ops}.key".split(),
        )
        assert _health(base + path, ca, pki, monitor) == (0, "healthy: HTTP 200")
        # A CA that did not issue the node's certificate: the check fails closed.
        PkiDir(tmp_path / "other").init("Another CA")
        status, said = _health(base + path, tmp_path / "other" / "ca.crt", pki, monitor)
        assert status == 1 and "CERTIFICATE_VERIFY_FAILED" in said
    finally:
        proc.terminate()
        try:
            proc.wait(15)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(5)
