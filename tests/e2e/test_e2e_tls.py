"""End to end over real mutual TLS on loopback: a `keystrata serve` process, the SDK,
httpx and curl (a general-purpose client from the OS packages)."""

from __future__ import annotations

import json
import os
import shutil
import ssl
import subprocess
import uuid
from collections.abc import Iterator
from datetime import UTC, datetime

import httpx
import pytest

from conftest import database_for
from keystrata.api.identity import NO_CERTIFICATE
from keystrata.loopback.pki import PkiFiles
from keystrata.loopback.processes import NodeProcess, prepare_node
from keystrata_client import (
    ApiError,
    LinkBlock,
    ModuleClient,
    OperatorClient,
    TlsIdentity,
)


def identity(pki: PkiFiles, name: str) -> TlsIdentity:
    return TlsIdentity(ca=pki.ca, cert=pki.cert(name), key=pki.key(name))


@pytest.fixture(scope="module", params=["sqlite", "postgresql"])
def station_process(
    request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory, pki: PkiFiles
) -> Iterator[NodeProcess]:
    """One station process per backend for the whole module (starting one takes seconds).
    The tests share it: each uses what it adds alone (its blocks, its pair, its nodes)."""
    folder = tmp_path_factory.mktemp(f"tls-{request.param}")
    with database_for(request, request.param, folder) as url:
        yield from _station(folder, pki, url)


def _station(folder, pki: PkiFiles, db_url: str) -> Iterator[NodeProcess]:
    node = prepare_node(folder, pki, "station-a", "station", db_url).start(pki)
    try:
        with OperatorClient(node.url, identity(pki, "ops-ada")) as ops:
            ops.create("nodes", {"node_id": "relay-1", "role": "relay"})
            ops.create(
                "links", {"link_id": "link-a", "relay_id": "relay-1", "station_id": "station-a"}
            )
            ops.create(
                "principals",
                {
                    "principal_id": "mod-link-a",
                    "role": "qkd-module",
                    "cert_subject": "mod-link-a",
                    "link_id": "link-a",
                },
            )
        yield node
    finally:
        node.stop()


def _handshake_refused(url: str, pki: PkiFiles, cert: tuple[str, str] | None) -> bool:
    ctx = ssl.create_default_context(cafile=str(pki.ca))
    if cert:
        ctx.load_cert_chain(*cert)
    try:
        r = httpx.get(url + "/api/v1/node", verify=ctx, timeout=5)
    except (httpx.ConnectError, httpx.ReadError, httpx.RemoteProtocolError):
        # With TLS 1.3 the server's refusal arrives after the client's handshake ends,
        # so httpx sees a dropped connection rather than a handshake error.
        return True
    raise AssertionError(f"expected the handshake to fail, got {r.status_code}")


def test_client_without_certificate_is_told_what_it_lacks(station_process, pki) -> None:
    """The handshake completes without a client certificate, so every route answers 401
    with a JSON body saying which certificate is needed (api/identity.NO_CERTIFICATE);
    nothing is served."""
    ctx = ssl.create_default_context(cafile=str(pki.ca))
    with httpx.Client(verify=ctx, timeout=10) as client:
        for method, path in (
            ("GET", "/api/v1/node"),
            ("GET", "/api/v1/registry/links"),
            ("POST", "/api/v1/keys/sae-b1/enc_keys"),
            ("GET", "/api/v1/metrics"),
            ("GET", "/docs"),
        ):
            r = client.request(method, station_process.url + path)
            assert r.status_code == 401, (path, r.text)
            assert r.headers["content-type"].startswith("application/json")
            assert r.json() == {"message": NO_CERTIFICATE}, path


@pytest.mark.skipif(shutil.which("curl") is None, reason="curl is not installed")
def test_curl_without_a_certificate_gets_the_hint(station_process, pki) -> None:
    """curl without --cert used to see "Empty reply from server" (the handshake was
    refused); now it gets the answer and exits 0 (no --fail)."""
    out = subprocess.run(
        [
            "curl",
            "-sS",
            "--cacert",
            str(pki.ca),
            "-w",
            "\n%{http_code}",
            station_process.url + "/api/v1/registry/links",
        ],
        capture_output=True,
        text=True,
        timeout=30,
        check=True,
    )
    body, status = out.stdout.rsplit("\n", 1)
    assert status == "401"
    assert json.loads(body) == {"message": NO_CERTIFICATE}
    assert "client certificate" in body and "network's CA" in body


def test_certificate_from_another_ca_is_refused(station_process, pki) -> None:
    # A certificate presented must verify: one of another CA still ends the handshake.
    foreign = (str(pki.foreign_dir / "ops-ada.crt"), str(pki.foreign_dir / "ops-ada.key"))
    assert _handshake_refused(station_process.url, pki, foreign)


@pytest.mark.skipif(shutil.which("curl") is None, reason="curl is not installed")
def test_curl_with_a_certificate_of_another_ca_fails_the_handshake(station_process, pki) -> None:
    out = subprocess.run(
        [
            "curl",
            "-sS",
            "--cacert",
            str(pki.ca),
            "--cert",
            str(pki.foreign_dir / "ops-ada.crt"),
            "--key",
            str(pki.foreign_dir / "ops-ada.key"),
            station_process.url + "/api/v1/node",
        ],
        capture_output=True,
        text=True,
        timeout=30,
        check=False,
    )
    assert out.returncode != 0 and out.stdout == "", (out.returncode, out.stdout)


def test_unregistered_certificate_gets_401(station_process, pki) -> None:
    with (
        OperatorClient(station_process.url, identity(pki, "stranger")) as who,
        pytest.raises(ApiError) as caught,
    ):
        who.node_info()
    assert caught.value.status == 401
    assert caught.value.message == "unauthorized"  # no hint: one answer for every reason


def test_module_pushes_binary_blocks_and_operator_sees_the_pool(station_process, pki) -> None:
    blocks = [
        LinkBlock(
            block_id=str(uuid.uuid4()),
            key=os.urandom(2048),
            qber=0.02,
            epsilon=1e-10,
            produced_at=datetime.now(UTC),
        )
        for _ in range(8)
    ]
    with ModuleClient(station_process.url, identity(pki, "mod-link-a")) as mod:
        first = mod.push_blocks("link-a", blocks)
        again = mod.push_blocks("link-a", blocks, binary=False)
    assert (first.accepted, first.accepted_bits) == (8, 8 * 2048 * 8)
    assert (again.accepted, again.duplicates) == (0, 8)
    with OperatorClient(station_process.url, identity(pki, "ops-ada")) as ops:
        pool = ops.pool("link-a")
    assert pool["bits_available"] == 8 * 2048 * 8


def _s_client(url: str, pki: PkiFiles, *args: str) -> subprocess.CompletedProcess[str]:
    """openssl s_client (an outside TLS client) with the operator's certificate, so the
    protocol version or cipher suite is the only thing that can be refused."""
    port = url.rsplit(":", 1)[1]
    cert = ["-cert", str(pki.cert("ops-ada")), "-key", str(pki.key("ops-ada"))]
    return subprocess.run(
        [
            "openssl",
            "s_client",
            "-connect",
            f"127.0.0.1:{port}",
            "-CAfile",
            str(pki.ca),
            *cert,
            *args,
        ],
        input="",
        capture_output=True,
        text=True,
        timeout=30,
        check=False,
    )


# The TLS layer is the same whatever the database: SQLite only.
@pytest.mark.parametrize("station_process", ["sqlite"], indirect=True)
@pytest.mark.skipif(shutil.which("openssl") is None, reason="openssl is not installed")
def test_tls_policy_refuses_old_protocols_and_non_aead_suites(station_process, pki) -> None:
    url = station_process.url
    # Control: TLS 1.2 with ECDHE-ECDSA and AES-GCM (RFC 5289) completes.
    good = _s_client(url, pki, "-tls1_2", "-cipher", "ECDHE-ECDSA-AES128-GCM-SHA256")
    assert good.returncode == 0, good.stdout + good.stderr
    assert "ECDHE-ECDSA-AES128-GCM-SHA256" in good.stdout
    chacha = _s_client(url, pki, "-tls1_2", "-cipher", "ECDHE-ECDSA-CHACHA20-POLY1305")
    assert chacha.returncode == 0, chacha.stdout + chacha.stderr
    # TLS 1.2 with CBC suites (RFC 5289's SHA-2 CBC suites and RFC 4492's SHA-1 ones):
    # refused, though OpenSSL's defaults (and uvicorn's) would take them.
    for cbc in ("ECDHE-ECDSA-AES128-SHA256", "ECDHE-ECDSA-AES256-SHA"):
        refused = _s_client(url, pki, "-tls1_2", "-cipher", cbc)
        assert refused.returncode != 0, cbc
        assert "Cipher is (NONE)" in refused.stdout, cbc
    # TLS 1.1 (RFC 8996 deprecates it): refused even by a client willing to offer it
    # (security level 0 lifts OpenSSL 3's own client-side ban).
    old = _s_client(url, pki, "-tls1_1", "-cipher", "DEFAULT:@SECLEVEL=0")
    assert old.returncode != 0
    assert "Cipher is (NONE)" in old.stdout  # s_client's summary: nothing was agreed


@pytest.mark.skipif(shutil.which("curl") is None, reason="curl is not installed")
def test_curl_with_the_operator_certificate(station_process, pki) -> None:
    out = subprocess.run(
        [
            "curl",
            "-sS",
            "--cacert",
            str(pki.ca),
            "--cert",
            str(pki.cert("ops-ada")),
            "--key",
            str(pki.key("ops-ada")),
            station_process.url + "/api/v1/registry/links",
        ],
        capture_output=True,
        text=True,
        timeout=30,
        check=True,
    )
    assert [x["link_id"] for x in json.loads(out.stdout)["items"]] == ["link-a"]


# The commands talk HTTP to the node; which database it uses adds nothing here (the API
# tests cover both), and each command is a process of its own: SQLite only.
@pytest.mark.parametrize("station_process", ["sqlite"], indirect=True)
def test_operator_cli_against_a_running_node(station_process, pki) -> None:
    from keystrata.loopback.processes import run_cli

    env = {
        "KEYSTRATA_URL": station_process.url,
        "KEYSTRATA_CA": str(pki.ca),
        "KEYSTRATA_CERT": str(pki.cert("ops-ada")),
        "KEYSTRATA_KEY": str(pki.key("ops-ada")),
    }
    out = run_cli(
        "registry",
        "create",
        "nodes",
        "--set",
        "node_id=station-b",
        "--set",
        "role=station",
        "--json",
        env=env,
    )
    assert json.loads(out.stdout)["node_id"] == "station-b"
    listed = json.loads(run_cli("registry", "list", "nodes", "--json", env=env).stdout)
    assert {n["node_id"] for n in listed} == {"relay-1", "station-a", "station-b"}
    run_cli(
        "registry",
        "create",
        "pairs",
        "--set",
        "pair_id=p1",
        "--set",
        "relay_id=relay-1",
        "--set",
        'stations=["station-a","station-b"]',
        "--set",
        "policy.priority=5",
        env=env,
    )
    pairs = json.loads(run_cli("pairs", "--json", env=env).stdout)
    assert pairs["role"] == "station"
    assert pairs["pairs"] == [
        {
            "pair_id": "p1",
            "partner": "station-b",
            "ready_bits": 0,
            "owned_ready_bits": 0,
            "partner_owned_ready_bits": 0,
            "pending_bits": 0,
        }
    ]
    table = run_cli("pairs", env=env).stdout
    assert "p1" in table and "station-b" in table
    accounting = json.loads(run_cli("deliveries", "--json", env=env).stdout)
    assert accounting["node_id"] == "station-a" and accounting["pairs"] == []
    assert "key delivery at station-a" in run_cli("deliveries", env=env).stdout
    refused = run_cli("registry", "create", "pairs", "--set", "pair_id=p2", env=env, check=False)
    assert refused.returncode == 1 and "400" in refused.stderr
