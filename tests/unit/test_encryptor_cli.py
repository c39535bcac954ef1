"""`keystrata-encryptors`: its TOML file, its table and its exit codes.

The exit code on a mismatch needs a key manager that hands the two ends different keys,
which keystrata never does; a small HTTP server on loopback plays that part here (it
speaks the paths and objects of ETSI GS QKD 014 V1.1.1 clause 5 and 6, from memory).
The command against real keystrata nodes is in test_delivery_e2e.py.
"""

from __future__ import annotations

import base64
import hashlib
import json
import subprocess
import sys
import threading
import uuid
from collections.abc import Iterator
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

import pytest

from keystrata_client.emulators.config import ConfigError
from keystrata_client.emulators.encryptor_cli import table
from keystrata_client.emulators.encryptor_config import parse_encryptor_config
from keystrata_client.emulators.encryptors import PairStats

ENCRYPTORS = Path(sys.executable).parent / "keystrata-encryptors"


class _Station(BaseHTTPRequestHandler):
    """enc_keys: new key IDs, key = SHA-256(ID); dec_keys: the same, or (when the
    server is ``lying``) SHA-256(ID + "x"). Every key sent is recorded."""

    def do_POST(self) -> None:
        body = json.loads(self.rfile.read(int(self.headers["Content-Length"])))
        server: _Server = self.server  # type: ignore[assignment]
        if self.path.endswith("/enc_keys"):
            ids = [str(uuid.uuid4()) for _ in range(body.get("number", 1))]
            salt = b""
        else:
            ids = [k["key_ID"] for k in body["key_IDs"]]
            salt = b"x" if server.lying else b""
        keys = []
        for key_id in ids:
            text = base64.b64encode(hashlib.sha256(key_id.encode() + salt).digest()).decode()
            server.sent.append(text)
            keys.append({"key_ID": key_id, "key": text})
        answer = json.dumps({"keys": keys}).encode()
        self.send_response(200)
        self.send_header("Content-Type", "application/json")
        self.send_header("Content-Length", str(len(answer)))
        self.end_headers()
        self.wfile.write(answer)

    def log_message(self, format: str, *args: object) -> None:
        pass


class _Server(ThreadingHTTPServer):
    lying = False
    sent: list[str]


@pytest.fixture
def station() -> Iterator[_Server]:
    server = _Server(("127.0.0.1", 0), _Station)
    server.sent = []
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    yield server
    server.shutdown()
    server.server_close()


def _config(tmp_path: Path, url: str) -> Path:
    path = tmp_path / "encryptors.toml"
    path.write_text(f"""
[emulator]
summary_seconds = 0.2
[defaults]
key_size_bits = 256
keys_per_rekey = 3
interval_seconds = 0.05
[[pair]]
name = "karsvik -> tollmere"
master_sae_id = "enc-karsvik-1"
master_url = "{url}"
slave_sae_id = "enc-tollmere-1"
slave_url = "{url}"
""")
    return path


def _run(config: Path, *args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [str(ENCRYPTORS), "--config", str(config), *args],
        capture_output=True,
        text=True,
        timeout=60,
    )


@pytest.mark.parametrize(("lying", "code"), [(False, 0), (True, 3)])
def test_exit_code_tells_whether_keys_matched(station, tmp_path, lying, code) -> None:
    station.lying = lying
    url = f"http://127.0.0.1:{station.server_address[1]}"
    run = _run(_config(tmp_path, url), "--rekeys", "3", "--json")
    assert run.returncode == code, run.stderr
    (final,) = [json.loads(x) for x in run.stdout.splitlines() if '"final": true' in x]
    assert final["keys_delivered"] == 9 and final["rekeys_attempted"] == 3  # 3 rekeys x 3
    assert (final["matches"], final["mismatches"]) == ((0, 9) if lying else (9, 0))
    if lying:
        assert "9 key(s) differed" in run.stderr
    # Only digests are compared: no key the server sent appears in anything printed.
    assert station.sent and not any(k in run.stdout + run.stderr for k in station.sent)


def test_bad_config_exits_1_naming_the_key(tmp_path) -> None:
    path = tmp_path / "bad.toml"
    path.write_text('[[pair]]\nmaster_sae_id = "a"\nmaster_url = "https://x"\n')
    run = _run(path)
    assert run.returncode == 1
    assert "pair[0]: missing key(s) slave_sae_id, slave_url" in run.stderr


PAIR = {
    "master_sae_id": "enc-karsvik-1",
    "master_url": "http://127.0.0.1:1",
    "slave_sae_id": "enc-tollmere-1",
    "slave_url": "http://127.0.0.1:2",
}


@pytest.mark.parametrize(
    ("data", "message"),
    [
        ({"pair": [{**PAIR, "key_sise_bits": 256}]}, "pair[0]: unknown key(s) key_sise_bits"),
        ({"pair": [{**PAIR, "key_size_bits": 100}]}, "multiple of 8"),
        ({"pair": [{**PAIR, "keys_per_rekey": "2"}]}, "keys_per_rekey: expected int"),
        ({"pair": [{**PAIR, "keys_per_rekey": True}]}, "keys_per_rekey: expected int"),
        ({"pair": [{**PAIR, "master_url": "https://x"}]}, "the master end needs ca"),
        ({"pair": [{**PAIR, "slave_url": "ftp://x"}]}, "slave_url: must start with https://"),
        ({"pair": [PAIR, PAIR]}, "appears twice"),
        ({"pair": []}, "no [[pair]] table"),
        ({"defaults": {"master_sae_id": "x"}, "pair": [PAIR]}, "must be set per pair"),
        ({"emulator": {"summary_seconds": 0}, "pair": [PAIR]}, "must be positive"),
        ({"emulator": {"speed": 1}, "pair": [PAIR]}, "emulator: unknown key speed"),
        ({"pairs": [PAIR]}, "unknown table(s) pairs"),
    ],
)
def test_config_errors(data, message) -> None:
    with pytest.raises(ConfigError) as caught:
        parse_encryptor_config(data, Path("/srv"))
    assert message in str(caught.value)


def test_config_resolves_paths_and_defaults() -> None:
    pair = {**PAIR, "master_url": "https://127.0.0.1:8441"}
    pair |= {"master_cert": "pki/m.crt", "master_key": "/abs/m.key"}
    config = parse_encryptor_config(
        {"defaults": {"ca": "pki/ca.crt"}, "pair": [pair]}, Path("/srv")
    )
    (spec,) = config.pairs
    assert spec.name == "enc-karsvik-1 -> enc-tollmere-1"
    assert spec.master_identity is not None and spec.slave_identity is None
    assert spec.master_identity.ca == Path("/srv/pki/ca.crt")
    assert spec.master_identity.key == Path("/abs/m.key")
    assert (spec.key_size_bits, spec.keys_per_rekey, spec.interval_seconds) == (256, 1, 1.0)


def test_table_shows_counts_and_failures_by_kind() -> None:
    stats = PairStats("karsvik -> tollmere", rekeys_attempted=12, keys_delivered=20)
    stats.matches, stats.mismatches, stats.times_waited_for_key, stats.keys_lost = 19, 1, 2, 2
    stats.bits_delivered = 5120
    stats.errors = {"enc_keys:401": 1, "dec_keys:transport": 1}
    header, rule, row = table({stats.name: stats}).splitlines()
    assert header.startswith("encryptors") and "mismatch" in header and "failures" in header
    # A running total is named as a count, not as a state.
    assert "times waited for key" in header and "keys lost" in header
    assert set(rule) <= {"-", " "}
    assert row.split()[3:11] == ["12", "20", "5.12", "kbit", "19", "1", "2", "2"]
    assert row.endswith("dec_keys:transport=1 enc_keys:401=1")


def test_the_demo_and_the_emulator_name_the_counts_alike() -> None:
    """The demo's encryptor columns are the emulator's headers (one set of names)."""
    from keystrata.demo.view import ENCRYPTOR_COLUMNS
    from keystrata_client.emulators.encryptors import COLUMNS

    demo = [c.header for c in ENCRYPTOR_COLUMNS]
    assert demo and set(demo) <= set(COLUMNS.values()), set(demo) - set(COLUMNS.values())
