"""Revocation: the CRL `keystrata pki revoke` writes (RFC 5280 section 5, checked with the
openssl command as an outside verifier), the node's reading of it, and the server TLS
context that swaps in a new CRL at the next handshake, also when the client sends no
server name."""

from __future__ import annotations

import ssl
import subprocess
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
from click.testing import CliRunner
from cryptography import x509

from keystrata.cli.pki_cmd import pki as pki_group
from keystrata.config import TlsSection
from keystrata.crypto import revocation, tls
from keystrata.crypto.pki import PkiDir
from keystrata.errors import InvalidInput
from tlskit import client_context, handshake

OPENSSL = "/usr/bin/openssl"
NOW = datetime(2026, 12, 1, 12, 0, 0, tzinfo=UTC)


@pytest.fixture
def folder(tmp_path: Path) -> PkiDir:
    pki = PkiDir(tmp_path / "pki")
    pki.init("Test Network CA")
    pki.issue_node("relay-1", ["127.0.0.1", "localhost"])
    for name in ("ops-ada", "ops-eve", "sae-a1"):
        pki.issue_client(name, "operator" if name.startswith("ops") else "sae")
    return pki


def _crl(folder: PkiDir) -> x509.CertificateRevocationList:
    return x509.load_pem_x509_crl((folder.path / "crl.pem").read_bytes())


def _serial(folder: PkiDir, name: str) -> int:
    return x509.load_pem_x509_certificate((folder.path / f"{name}.crt").read_bytes()).serial_number


def _openssl(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([OPENSSL, *args], capture_output=True, text=True, check=False)


def test_revoke_writes_a_crl_that_grows(folder: PkiDir) -> None:
    first = revocation.revoke(
        folder, cert=(folder.path / "ops-eve.crt").read_bytes(), reason="keyCompromise", now=NOW
    )
    assert (first.number, first.revoked, first.added) == (1, 1, True)
    crl = _crl(folder)
    # RFC 5280 5.1.2.4 / 5.1.2.5: this update and next update.
    assert crl.last_update_utc == NOW and crl.next_update_utc == NOW + timedelta(days=7)
    # RFC 5280 5.2.3: cRLNumber; 5.2.1: authorityKeyIdentifier (MUST).
    assert crl.extensions.get_extension_for_class(x509.CRLNumber).value.crl_number == 1
    crl.extensions.get_extension_for_class(x509.AuthorityKeyIdentifier)
    entry = crl.get_revoked_certificate_by_serial_number(_serial(folder, "ops-eve"))
    assert entry is not None and entry.revocation_date_utc == NOW
    # RFC 5280 5.3.1: reasonCode.
    reason = entry.extensions.get_extension_for_class(x509.CRLReason).value.reason
    assert reason is x509.ReasonFlags.key_compromise

    later = NOW + timedelta(hours=1)
    second = revocation.revoke(folder, serial=_serial(folder, "sae-a1"), now=later)
    assert (second.number, second.revoked) == (2, 2)
    crl = _crl(folder)
    assert crl.extensions.get_extension_for_class(x509.CRLNumber).value.crl_number == 2
    unspecified = crl.get_revoked_certificate_by_serial_number(_serial(folder, "sae-a1"))
    assert unspecified is not None
    # RFC 5280 5.3.1: "unspecified" SHOULD NOT be used, so the extension is left out.
    with pytest.raises(x509.ExtensionNotFound):
        unspecified.extensions.get_extension_for_class(x509.CRLReason)
    # The earlier entry is kept as it was.
    kept = crl.get_revoked_certificate_by_serial_number(_serial(folder, "ops-eve"))
    assert kept is not None and kept.revocation_date_utc == NOW

    again = revocation.revoke(folder, serial=_serial(folder, "sae-a1"), now=later)
    assert (again.number, again.revoked, again.added) == (3, 2, False)
    refreshed = revocation.refresh(folder, next_update_days=2, now=later)
    assert (refreshed.number, refreshed.revoked) == (4, 2)
    assert _crl(folder).next_update_utc == later + timedelta(days=2)


def test_openssl_verifies_the_crl_and_refuses_the_revoked_certificate(folder: PkiDir) -> None:
    revocation.revoke(folder, cert=(folder.path / "ops-eve.crt").read_bytes())
    ca, crl = str(folder.ca_cert_path), str(folder.path / "crl.pem")
    # openssl crl checks the signature with the issuer's key ("verify OK" on stderr).
    checked = _openssl("crl", "-in", crl, "-CAfile", ca, "-noout")
    assert checked.returncode == 0 and "verify OK" in checked.stdout + checked.stderr
    base = ["verify", "-crl_check", "-CAfile", ca, "-CRLfile", crl]
    revoked = _openssl(*base, str(folder.path / "ops-eve.crt"))
    assert revoked.returncode != 0 and "certificate revoked" in revoked.stdout + revoked.stderr
    fine = _openssl(*base, str(folder.path / "ops-ada.crt"))
    assert fine.returncode == 0, fine.stdout + fine.stderr


def test_revoke_refuses_what_is_not_ours(folder: PkiDir, tmp_path: Path) -> None:
    other = PkiDir(tmp_path / "other")
    other.init("Other CA")
    other.issue_client("ops-ada", "operator")
    with pytest.raises(InvalidInput, match="not issued by this CA"):
        revocation.revoke(folder, cert=(other.path / "ops-ada.crt").read_bytes())
    with pytest.raises(InvalidInput, match="CA's own"):
        revocation.revoke(folder, serial=folder.load_ca().certificate.serial_number)
    with pytest.raises(InvalidInput, match="reason"):
        revocation.revoke(folder, serial=5, reason="bored")
    with pytest.raises(InvalidInput):
        revocation.revoke(folder)
    assert not (folder.path / "crl.pem").exists()
    # A crl.pem signed by another CA is not built upon.
    revocation.revoke(other, serial=7)
    (folder.path / "crl.pem").write_bytes((other.path / "crl.pem").read_bytes())
    with pytest.raises(InvalidInput, match="not signed by this CA"):
        revocation.revoke(folder, serial=8)


def test_cli_revoke_and_refresh(folder: PkiDir) -> None:
    runner = CliRunner()
    args = ["revoke", "--dir", str(folder.path), "--cert", str(folder.path / "ops-eve.crt")]
    result = runner.invoke(pki_group, args)
    assert result.exit_code == 0, result.output
    assert "CRL number 1, 1 revoked" in result.output
    serial = f"{_serial(folder, 'sae-a1'):x}"
    result = runner.invoke(pki_group, ["revoke", "--dir", str(folder.path), "--serial", serial])
    assert result.exit_code == 0 and "CRL number 2, 2 revoked" in result.output
    result = runner.invoke(pki_group, ["revoke", "--dir", str(folder.path), "--serial", "xyz"])
    assert result.exit_code == 2
    result = runner.invoke(pki_group, ["crl", "--dir", str(folder.path)])
    assert result.exit_code == 0 and "CRL number 3, 2 revoked" in result.output


def test_watch_follows_the_file_and_keeps_the_last_good_crl(folder: PkiDir) -> None:
    crl_file = folder.path / "crl.pem"
    revocation.refresh(folder)
    watch = revocation.CrlWatch(crl_file, folder.ca_cert_path)
    eve = x509.load_pem_x509_certificate((folder.path / "ops-eve.crt").read_bytes())
    assert not watch.revoked(eve)
    revocation.revoke(folder, cert=(folder.path / "ops-eve.crt").read_bytes())
    assert watch.revoked(eve)
    crl_file.write_bytes(b"garbage")  # a broken copy leaves the last good CRL in force
    assert watch.revoked(eve)
    with pytest.raises(InvalidInput):
        revocation.CrlWatch(folder.path / "missing.pem", folder.ca_cert_path).revoked(eve)


def _tls_section(folder: PkiDir, crl: Path | None) -> TlsSection:
    p = folder.path
    return TlsSection(ca=p / "ca.crt", cert=p / "relay-1.crt", key=p / "relay-1.key", crl=crl)


def _client_accepted(server: ssl.SSLContext, folder: PkiDir, name: str) -> bool:
    """Return True if ``server`` accepts client ``name`` in a handshake without SNI."""
    client = client_context(
        folder.ca_cert_path, folder.path / f"{name}.crt", folder.path / f"{name}.key"
    )
    try:
        handshake(client, server, "127.0.0.1")
    except ssl.SSLError:
        return False
    return True


def test_server_context_checks_the_crl_and_swaps_in_a_new_one(folder: PkiDir) -> None:
    crl_file = folder.path / "crl.pem"
    revocation.revoke(folder, cert=(folder.path / "ops-eve.crt").read_bytes())
    server = tls.server_context(_tls_section(folder, crl_file))
    swapper = server.sni_callback
    assert isinstance(swapper, tls._Swapper)
    assert _client_accepted(server, folder, "ops-ada")
    assert not _client_accepted(server, folder, "ops-eve")
    assert swapper.swaps == 0
    revocation.revoke(folder, cert=(folder.path / "ops-ada.crt").read_bytes())
    # The callback ran although the client sent no server name, and swapped the context.
    assert not _client_accepted(server, folder, "ops-ada")
    assert swapper.swaps == 1
    assert _client_accepted(server, folder, "sae-a1")


def test_server_context_without_crl_accepts_and_has_the_policy(folder: PkiDir) -> None:
    server = tls.server_context(_tls_section(folder, None))
    assert server.sni_callback is None
    assert server.minimum_version is ssl.TLSVersion.TLSv1_2
    tls12 = {c["name"] for c in server.get_ciphers() if c["protocol"] == "TLSv1.2"}
    assert tls12 and all(("GCM" in n or "CHACHA20" in n) and n.startswith("ECDHE") for n in tls12)
    assert _client_accepted(server, folder, "ops-eve")
