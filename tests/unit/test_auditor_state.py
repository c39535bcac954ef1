"""The auditor's state folder, attacked from the side of whoever hands the auditor an export.

The auditor runs the real commands (``keystrata-ledger-check``, ``keystrata audit
reconcile``) with a state folder in tmp_path (``KEYSTRATA_AUDIT_STATE``; never the real
home folder). Exports are built here by an independent writer sharing no code with the
verifier: entries are RFC 8785 canonical JSON from the ``rfc8785`` package, chained by
``prev`` = Base64 of SHA-256(0x00 || previous entry) written with ``hashlib``; roots come
from ``pymerkle`` (PyPI; RFC 9162 section 2.1 hashing); signatures are Ed25519 (RFC 8032)
from ``cryptography``.

Signed text of a checkpoint, as DEVELOPERS.md documents it: the body of a C2SP tlog
checkpoint (origin, tree size, Base64 root, one per line; from memory) with one extension
line ``keystrata/v2 signed-at <RFC 3339 UTC time>`` (ours). Times are RFC 3339 (section
5.6) in UTC with ``Z``.

Attacks (each failed on the code before the state folder: the first three were reported
"VERIFIED", the time checks did not exist):

* an export re-signed with another Ed25519 key;
* a truncated export shipped with the node's genuine older checkpoint, after a newer one
  was seen;
* a forked log of the same size (and a larger one), signed with the node's own key, as if
  the node itself forked;
* checkpoint times that go backwards as tree sizes grow, inside one export and against
  the last checkpoint seen; a time in the future.
"""

from __future__ import annotations

import base64
import hashlib
import json
import os
import stat
from collections.abc import Sequence
from datetime import UTC, datetime, timedelta
from functools import cache
from pathlib import Path
from typing import Any

import pymerkle  # type: ignore[import-untyped]
import pytest
import rfc8785
from click.testing import CliRunner, Result
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from cryptography.hazmat.primitives.serialization import Encoding, PublicFormat

from keystrata.cli.audit_cmd import audit as audit_group
from keystrata_client.audit.cli import main as ledger_check

STATION_A, STATION_B = "karsvik", "tollmere"
PAIR = "pair-karsvik-tollmere"
NOW = datetime.now(UTC).replace(microsecond=0)


def b64(raw: bytes) -> str:
    return base64.b64encode(raw).decode()  # RFC 4648 section 4


def rfc3339(at: datetime) -> str:
    return at.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")  # RFC 3339 section 5.6


@cache
def key_of(name: str) -> Ed25519PrivateKey:
    return Ed25519PrivateKey.generate()


def raw_public(key: Ed25519PrivateKey) -> bytes:
    return key.public_key().public_bytes(Encoding.Raw, PublicFormat.Raw)


# ---------------------------------------------------------------- independent writer


def entries_of(origin: str, n: int, tag: str = "") -> list[bytes]:
    """n v2 ledger entries of ``origin``: at A, key allocations (even indexes) and ready
    segments; at B, the same keys received and delivered, so two exports reconcile."""
    out: list[bytes] = []
    prev: str | None = None
    for i in range(n):
        key_id = f"00000000-0000-4000-8000-{i // 2:012d}"
        body: dict[str, Any] = {
            "v": 2,
            "index": i,
            "node": origin,
            "at": rfc3339(NOW - timedelta(hours=3) + timedelta(seconds=i)),
            "prev": prev,
            "pair": PAIR,
            "note": "station log" + tag,
        }
        if origin != STATION_B and i % 2 == 0:
            body.update(
                event="key.allocated",
                master="enc-karsvik-1",
                key_ids=[key_id],
                slaves=["enc-tollmere-1"],
                size_bits=256,
                delivered_to="enc-karsvik-1",
            )
        elif origin != STATION_B:
            body.update(event="segment.ready", bytes=4096)
        elif i % 2 == 0:
            body.update(event="key.allocated", key_ids=[key_id])
        else:
            body.update(event="key.delivered", sae="enc-tollmere-1", master="enc-karsvik-1",
                        key_ids=[key_id])  # fmt: skip
        raw = rfc8785.dumps(body)
        out.append(raw)
        prev = b64(hashlib.sha256(b"\x00" + raw).digest())  # RFC 9162 section 2.1.1
    return out


def signed(
    origin: str,
    entries: Sequence[bytes],
    size: int,
    at: datetime | None,
    key: Ed25519PrivateKey | None = None,
) -> dict[str, Any]:
    """A checkpoint of the first ``size`` entries: pymerkle's root, the documented text."""
    key = key or key_of(origin)
    root = b64(pymerkle.InmemoryTree.init_from_entries(list(entries[:size])).get_root(size))
    text = f"{origin}\n{size}\n{root}\n"
    if at is not None:
        text += f"keystrata/v2 signed-at {rfc3339(at)}\n"
    return {
        "origin": origin,
        "tree_size": size,
        "root_hash": root,
        "signed_text": text,
        "signature": b64(key.sign(text.encode())),
        "public_key": b64(raw_public(key)),
    }


def write_export(
    folder: Path,
    origin: str,
    entries: Sequence[bytes],
    sizes: Sequence[int],
    times: Sequence[datetime | None],
    key: Ed25519PrivateKey | None = None,
) -> Path:
    """An export whose last checkpoint signs the entries given; earlier ones in history."""
    cps = [signed(origin, entries, m, t, key) for m, t in zip(sizes, times, strict=True)]
    folder.mkdir(parents=True)
    (folder / "entries.jsonl").write_text(
        "".join(
            json.dumps({"index": i, "entry_b64": b64(raw), "entry": json.loads(raw)}) + "\n"
            for i, raw in enumerate(entries)
        )
    )
    (folder / "checkpoints.jsonl").write_text("".join(json.dumps(c) + "\n" for c in cps[:-1]))
    (folder / "checkpoint.json").write_text(json.dumps(cps[-1], indent=2))
    return folder


def hours_ago(h: float) -> datetime:
    return NOW - timedelta(hours=h)


# ---------------------------------------------------------------- the auditor's side


@pytest.fixture(autouse=True)
def state(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """The auditor's state folder, by the environment variable the commands read."""
    folder = tmp_path / "auditor-state"
    monkeypatch.setenv("KEYSTRATA_AUDIT_STATE", str(folder))
    monkeypatch.setenv("XDG_STATE_HOME", str(tmp_path / "xdg-state"))  # never the real one
    return folder


def check(folder: Path, *args: str) -> Result:
    return CliRunner().invoke(ledger_check, [str(folder), *args])


def reconcile(a: Path, b: Path, *args: str) -> Result:
    return CliRunner().invoke(audit_group, ["reconcile", str(a), str(b), *args])


def ok(result: Result) -> str:
    assert result.exit_code == 0, result.output
    return result.output


def refused(result: Result, *words: str) -> str:
    assert result.exit_code == 1, result.output
    for word in words:
        assert word in result.output, result.output
    return result.output


# ---------------------------------------------------------------- attacks


def test_export_resigned_with_another_key_is_refused(tmp_path: Path, state: Path) -> None:
    entries = entries_of(STATION_A, 12)
    genuine = write_export(
        tmp_path / "genuine", STATION_A, entries[:10], [4, 10], [hours_ago(2), hours_ago(1)]
    )
    first = ok(check(genuine))
    node_key = b64(raw_public(key_of(STATION_A)))
    assert "pinned" in first and node_key in first  # printed for an out-of-band comparison
    # The attacker serves the same ledger, two entries longer, re-signed with its own key.
    forger = key_of("forger")
    forged = write_export(
        tmp_path / "forged", STATION_A, entries, [4, 12], [hours_ago(2), hours_ago(0.5)], forger
    )
    refused(check(forged), "another key than the pinned key", "--trust-new-key")
    refused(check(forged, "--json"))
    # The auditor who knows the key really changed says so: re-pinned, and said.
    moved = ok(check(forged, "--trust-new-key"))
    assert "re-pinned" in moved and b64(raw_public(forger)) in moved
    # From then on the old key is the stranger.
    later = write_export(
        tmp_path / "later", STATION_A, entries, [12], [hours_ago(0.25)], key_of(STATION_A)
    )
    refused(check(later), "pinned key")
    # An explicit --public-key sets the pin again.
    ok(check(later, "--public-key", node_key))
    refused(check(forged), "pinned key")


def test_reconcile_refuses_an_export_resigned_with_another_key(tmp_path: Path) -> None:
    a = write_export(tmp_path / "a1", STATION_A, entries_of(STATION_A, 6), [6], [hours_ago(1)])
    b_entries = entries_of(STATION_B, 6)
    b = write_export(tmp_path / "b1", STATION_B, b_entries, [6], [hours_ago(1)])
    ok(reconcile(a, b))  # both pinned on first use
    forged = write_export(
        tmp_path / "b2", STATION_B, b_entries, [6], [hours_ago(0.5)], key_of("forger")
    )
    result = reconcile(a, forged)
    assert result.exit_code != 0 and "pinned key" in result.output, result.output
    ok(reconcile(a, forged, "--trust-new-key"))


def test_truncated_export_with_its_older_checkpoint_is_refused(tmp_path: Path, state: Path) -> None:
    entries = entries_of(STATION_A, 20)
    times = [hours_ago(3), hours_ago(2), hours_ago(1)]
    full = write_export(tmp_path / "full", STATION_A, entries, [5, 12, 20], times)
    ok(check(full))
    seen = {p.name: p.read_bytes() for p in state.iterdir() if p.is_file()}
    # Entries 12..19 are hidden: the node's own genuine checkpoint of 12 entries comes along.
    short = write_export(tmp_path / "short", STATION_A, entries[:12], [5, 12], times[:2])
    refused(check(short), "truncated", "20 entries")
    b = write_export(tmp_path / "b", STATION_B, entries_of(STATION_B, 4), [4], [hours_ago(1)])
    refused(reconcile(short, b), "truncated")
    # A refused export changes nothing in the state.
    assert {p.name: p.read_bytes() for p in state.iterdir() if p.is_file()} == seen
    ok(check(full))  # the longer ledger still verifies


def test_forked_log_signed_by_the_node_itself_is_refused(tmp_path: Path) -> None:
    entries = entries_of(STATION_A, 20)
    ok(check(write_export(tmp_path / "seen", STATION_A, entries, [20], [hours_ago(2)])))
    # The node signs another history of the same size with its own key.
    other = entries_of(STATION_A, 20, tag=" (rewritten)")
    fork = write_export(tmp_path / "fork", STATION_A, other, [20], [hours_ago(1)])
    refused(check(fork), "forked", "same size")
    # ... or a longer one whose first 20 entries are not the ones seen.
    longer = entries_of(STATION_A, 26, tag=" (rewritten)")
    grown = write_export(tmp_path / "grown", STATION_A, longer, [26], [hours_ago(0.5)])
    refused(check(grown), "forked", "first 20 entries")
    # The honest continuation is consistent with what was seen (RFC 9162 section 2.1.4).
    honest = entries_of(STATION_A, 26)
    out = ok(check(write_export(tmp_path / "on", STATION_A, honest, [26], [hours_ago(0.5)])))
    assert "consistent with the last checkpoint seen" in out


def test_checkpoint_times_going_backwards_are_refused(tmp_path: Path) -> None:
    entries = entries_of(STATION_A, 30)
    good = write_export(
        tmp_path / "good", STATION_A, entries[:10], [5, 10], [hours_ago(3), hours_ago(2)]
    )
    assert f"signed at      {rfc3339(hours_ago(2))}" in ok(
        check(good, "--state", str(tmp_path / "s1"))
    )
    # Inside one export: the checkpoint of 10 entries signed before the one of 5.
    back = write_export(
        tmp_path / "back", STATION_A, entries[:10], [5, 10], [hours_ago(2), hours_ago(3)]
    )
    refused(check(back, "--state", str(tmp_path / "s2")), "backwards")
    # Against the last checkpoint seen: 20 entries at 1 h ago, then 30 entries at 2 h ago.
    ok(check(write_export(tmp_path / "t20", STATION_A, entries[:20], [20], [hours_ago(1)])))
    older = write_export(tmp_path / "t30", STATION_A, entries, [30], [hours_ago(2)])
    refused(check(older), "backwards", "last checkpoint seen")
    # A checkpoint signed in the future (beyond the allowed clock skew) is refused ...
    ahead = write_export(tmp_path / "ahead", STATION_A, entries, [30], [NOW + timedelta(hours=1)])
    refused(check(ahead), "future")
    # ... one within a minute of now is not.
    soon = write_export(tmp_path / "soon", STATION_A, entries, [30], [NOW + timedelta(seconds=60)])
    ok(check(soon))


def test_untimed_checkpoint_after_timed_ones_is_refused(tmp_path: Path) -> None:
    # Old checkpoints (no time line) still verify as "no time"; a newer one without a time
    # after timed ones means the format went back, which the node never does.
    entries = entries_of(STATION_A, 12)
    old = write_export(tmp_path / "old", STATION_A, entries[:8], [4, 8], [None, None])
    out = ok(check(old, "--state", str(tmp_path / "s-old")))
    assert "no signing time" in out
    mixed = write_export(
        tmp_path / "mixed", STATION_A, entries, [4, 8, 12], [None, hours_ago(1), None]
    )
    refused(check(mixed, "--state", str(tmp_path / "s-mixed")), "without a signing time")
    upgraded = write_export(
        tmp_path / "up", STATION_A, entries, [4, 8, 12], [None, None, hours_ago(1)]
    )
    ok(check(upgraded, "--state", str(tmp_path / "s-up")))


# ---------------------------------------------------------------- the state folder itself


def test_state_folder_is_private_and_written_atomically(tmp_path: Path, state: Path) -> None:
    entries = entries_of(STATION_A, 8)
    ok(check(write_export(tmp_path / "e1", STATION_A, entries, [8], [hours_ago(1)])))
    assert stat.S_IMODE(state.stat().st_mode) == 0o700
    files = sorted(p.name for p in state.iterdir() if not p.name.startswith("."))
    assert files == [f"{STATION_A}.json"]
    saved = state / f"{STATION_A}.json"
    assert stat.S_IMODE(saved.stat().st_mode) == 0o600
    record = json.loads(saved.read_text())
    assert record["public_key"] == b64(raw_public(key_of(STATION_A)))
    assert record["checkpoint"]["tree_size"] == 8
    assert record["checkpoint"]["signed_at"] == rfc3339(hours_ago(1))
    assert not [p for p in state.iterdir() if p.name.endswith(".tmp")]
    # A state folder others can write to is made private again.
    os.chmod(state, 0o777)  # noqa: S103 (the state folder is made too open on purpose)
    ok(check(write_export(tmp_path / "e2", STATION_A, entries, [8], [hours_ago(1)])))
    assert stat.S_IMODE(state.stat().st_mode) == 0o700
    # A damaged state file is not silently replaced by a new pin: the command cannot run.
    saved.write_text("{not json")
    damaged = check(tmp_path / "e2")
    assert damaged.exit_code == 2 and str(saved) in damaged.output, damaged.output
    assert saved.read_text() == "{not json"


def test_an_origin_that_is_no_node_id_is_refused(tmp_path: Path, state: Path) -> None:
    # The origin names the state file: an export must not choose where the auditor writes.
    entries = entries_of(STATION_A, 3)
    folder = write_export(tmp_path / "evil", "../../escape", entries, [3], [hours_ago(1)])
    refused(check(folder), "origin")
    assert not (tmp_path / "escape.json").exists()
    assert not state.exists() or not any(state.glob("*.json"))


def test_state_option_and_earlier_checkpoints(tmp_path: Path) -> None:
    entries = entries_of(STATION_A, 16)
    mine = tmp_path / "elsewhere"
    folder = write_export(tmp_path / "x", STATION_A, entries, [16], [hours_ago(1)])
    kept = tmp_path / "kept.json"
    kept.write_text(json.dumps(signed(STATION_A, entries, 9, hours_ago(2))))
    ok(check(folder, "--state", str(mine), "--earlier", str(kept)))
    assert (mine / f"{STATION_A}.json").is_file()
    ahead = tmp_path / "ahead.json"
    ahead.write_text(json.dumps(signed(STATION_A, entries, 9, hours_ago(0.5))))
    refused(check(folder, "--state", str(mine), "--earlier", str(ahead)), "backwards")
