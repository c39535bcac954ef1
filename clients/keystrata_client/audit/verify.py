"""Offline verification of a ledger export (see :mod:`keystrata_client.audit.export`).

No network: everything is checked from the files, the node's public key (which an
auditor should pin, having obtained it out of band) and checkpoints saved earlier.

1. Entries, in order, stopping at the first bad one and naming it: each line is a JSON
   object whose ``index`` is its position; ``entry_b64`` is canonical Base64 (RFC 4648);
   the bytes are UTF-8 JSON in RFC 8785 canonical form and equal the ``entry`` field;
   the entry's own ``index`` is its position (catches removed and reordered entries);
   a v2 entry's ``prev`` is the RFC 9162 leaf hash of the entry before it (a hash chain
   beside the tree, which names the altered entry; v1 entries have no ``prev``).
2. The checkpoint: ``signed_text`` says ``origin``, ``tree_size`` and ``root_hash``;
   the Ed25519 signature (RFC 8032) verifies under its key, which equals the pinned key;
   the RFC 9162 root of the entries equals ``root_hash`` and there are ``tree_size``.
3. Every checkpoint in ``checkpoints.jsonl`` and every earlier one the auditor kept:
   same origin and key, a good signature, a root equal to the root of the first
   ``tree_size`` entries, and an RFC 9162 consistency proof to the latest checkpoint,
   computed from the entries and checked by the RFC's algorithm.
4. The last checkpoint the auditor saw of this node (``last_seen``, kept in the state
   folder by :mod:`keystrata_client.audit.state`): the export must extend it. A smaller
   tree is a truncated (or rolled back) log, the same size with another root or a prefix
   with another root is a fork; otherwise an RFC 9162 consistency proof from it to the
   latest is computed from the entries and checked.
5. Signing times (format version 2 checkpoints, see :mod:`._checkpoint`): well formed,
   not in the future beyond a small skew, never going backwards as tree sizes grow.
6. Optionally an RFC 9162 inclusion proof for one entry.

Messages name entries by index and event only: never whole entries.
"""

from __future__ import annotations

import base64
import json
import os
from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from cryptography.exceptions import InvalidSignature
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey

from keystrata_client.audit._checkpoint import stamp, time_findings
from keystrata_client.audit._entries import _same, _Scan, _scan
from keystrata_client.audit._tree import (
    ProofError,
    verify_consistency,
    verify_inclusion,
)
from keystrata_client.audit.export import (
    CHECKPOINT_FILE,
    ENTRIES_FILE,
    HISTORY_FILE,
    BadCheckpoint,
    Checkpoint,
)

#: How messages name the checkpoint kept in the auditor's state folder.
LAST_SEEN = "the last checkpoint seen"


@dataclass
class Report:
    """The outcome of :func:`verify_export`.

    Attributes:
        ok: True when every check passed (``findings`` is empty).
        origin, tree_size, root: the checkpoint's fields (root in Base64), None when
            the checkpoint could not be read.
        public_key: the key the checkpoint names (Base64), for comparing out of band.
        signed_at: the checkpoint's signing time (RFC 3339), None for a version 1
            checkpoint, which carries none.
        pinning: how the key was trusted, when a state folder was used
            (:mod:`keystrata_client.audit.state`): ``first-use``, ``pinned``, ``given``
            or ``re-pinned``; None without a state folder.
        entries: entry lines that passed every entry check.
        events: how many of those entries hold each event.
        first_bad: the index of the first bad (altered, missing, misplaced) entry, when
            the checks can name one; otherwise None.
        findings: what is wrong, one sentence each.
        notes: what was checked, and what could not be.
    """

    ok: bool = False
    origin: str | None = None
    tree_size: int | None = None
    root: str | None = None
    public_key: str | None = None
    signed_at: str | None = None
    pinning: str | None = None
    entries: int = 0
    events: dict[str, int] = field(default_factory=dict)
    first_bad: int | None = None
    findings: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    def to_json(self) -> dict[str, Any]:
        """Return the report as a JSON-ready dict."""
        return asdict(self)


def verify_signature(public_key: bytes, signature: bytes, message: bytes) -> None:
    """Check an Ed25519 signature (RFC 8032); return None when it holds.

    Raises:
        InvalidSignature: it does not verify, or the key is not a valid public key.
    """
    try:
        key = Ed25519PublicKey.from_public_bytes(public_key)
    except ValueError as exc:
        raise InvalidSignature("not an Ed25519 public key") from exc
    key.verify(signature, message)


def _unsigned(cp: Checkpoint, key: bytes, pinned: bool) -> str | None:
    """Return what is wrong with the signature of ``cp`` under ``key``, or None."""
    if not _same(cp.key, key):
        which = "the pinned key" if pinned else "the latest checkpoint's key"
        return f"{cp.where}: signed with another key than {which}"
    try:
        verify_signature(cp.key, cp.signature, cp.text.encode())
    except InvalidSignature:
        return f"{cp.where}: the Ed25519 signature does not verify"
    return None


def _others(folder: Path, earlier: Sequence[Mapping[str, Any]]) -> list[tuple[str, Any]]:
    """The checkpoints of checkpoints.jsonl, then the earlier ones, as (where, value)."""
    found: list[tuple[str, Any]] = []
    if (folder / HISTORY_FILE).is_file():
        with (folder / HISTORY_FILE).open("rb") as lines:
            for n, line in enumerate(lines, 1):
                try:
                    value = json.loads(line)
                except ValueError:
                    value = None
                found.append((f"{HISTORY_FILE} line {n}", value))
    return found + [(f"earlier checkpoint {n}", cp) for n, cp in enumerate(earlier, 1)]


class _Verifier:
    """One run of :func:`verify_export`: the report, the entries' tree, the checkpoint."""

    def __init__(self, report: Report, scan: _Scan, latest: Checkpoint, pinned: bytes | None):
        self.report, self.scan, self.latest = report, scan, latest
        self.table, self.size = scan.table, latest.tree_size
        self.key, self.pinned = pinned or latest.key, pinned is not None
        self.entries_ok = scan.bad is None  # every entry checked, and tree_size of them
        self.root_ok = False
        self.timed: list[Checkpoint] = [latest]  # signed alike: their times are compared

    def checkpoint(self) -> None:
        """The latest checkpoint's signature, and its root over the entries."""
        report, table, size = self.report, self.table, self.size
        wrong = _unsigned(self.latest, self.key, self.pinned)
        report.findings += [wrong] if wrong else []
        if not wrong:
            report.notes.append(
                "signature verified under the pinned key"
                if self.pinned
                else f"signature verified under the key in the export, which was NOT pinned: "
                f"compare {report.public_key} with the node's key obtained out of band"
            )
        if self.entries_ok and table.size != size:
            self.entries_ok = False
            report.first_bad = first = min(size, table.size)
            what = "missing" if table.size < size else "not signed"
            report.findings.append(
                f"entry {first}: {what}: {CHECKPOINT_FILE} signs {size} entries but the "
                f"export holds {table.size}"
            )
        self.root_ok = self.entries_ok and _same(table.root(size), self.latest.root)
        if self.entries_ok and not self.root_ok:
            chained = self.scan.chained_from is not None and self.scan.chained_from <= 1
            if size == 1 or chained:  # every entry but the last is vouched for by the chain
                report.first_bad = size - 1
                report.findings.append(
                    f"entry {size - 1} ({self.scan.event(size - 1)}): the root of the "
                    "entries differs from the signed root: the last entry or the checkpoint differs"
                )
            else:
                report.findings.append(
                    "the root of the entries differs from the signed root: an entry without a "
                    "hash chain, or the checkpoint, differs"
                )

    def history(self, others: list[tuple[str, Any]]) -> None:
        """Earlier checkpoints: signed alike, and prefixes of the entries and the latest."""
        report, table, n = self.report, self.table, self.size
        problems: list[str] = []
        matched, mismatched, proofs = 0, n + 1, 0  # largest good prefix, smallest bad one
        for where, value in others:
            try:
                cp = Checkpoint.read(value, where)
            except BadCheckpoint as exc:
                problems.append(str(exc))
                continue
            m = cp.tree_size
            wrong = _unsigned(cp, self.key, self.pinned)
            if wrong:
                pass
            elif cp.origin != self.latest.origin:
                wrong = f"{where}: another origin than the latest checkpoint's"
            elif m > n:
                wrong = f"{where}: signs {m} entries, more than the latest (rolled back)"
            elif self.entries_ok and not _same(table.root(m), cp.root):
                wrong = f"{where}: signs other entries than the first {m} of the export"
                mismatched = min(mismatched, m)
            if not wrong:
                self.timed.append(cp)
            if wrong or not self.entries_ok:
                problems += [wrong] if wrong else []
                continue
            matched = max(matched, m)
            if self.root_ok and m > 0:
                try:  # PROOF(m, D[n]) of RFC 9162 section 2.1.4.1 from the entries, checked
                    proof = table.consistency_proof(m, n)
                    verify_consistency(m, n, cp.root, self.latest.root, proof)
                    proofs += 1
                except ProofError as exc:
                    problems.append(f"{where}: {exc}")
        report.findings += problems[:5]
        if len(problems) > 5:
            report.findings.append(f"... and {len(problems) - 5} more earlier checkpoints")
        if proofs:
            report.notes.append(
                f"{proofs} earlier checkpoints are consistent with the latest (RFC 9162 "
                "consistency proofs computed from the entries and verified)"
            )
        if self.root_ok or not self.entries_ok or report.first_bad is not None:
            return
        if 0 < matched < mismatched:  # signed prefixes place what differs
            until = f" and before entry {mismatched}" if mismatched <= n else ""
            report.notes.append(
                f"the first {matched} entries match a signed checkpoint: what differs lies "
                f"at or after entry {matched}{until}"
            )
        if mismatched == matched + 1:
            report.first_bad = matched
            report.findings.insert(
                0,
                f"entry {matched} ({self.scan.event(matched)}): altered: the checkpoint of "
                f"{matched} entries matches the export, the one of {mismatched} does not",
            )

    def seen(self, value: Mapping[str, Any]) -> None:
        """The last checkpoint the auditor saw of this node: the export must extend it."""
        report, n, where = self.report, self.size, LAST_SEEN
        try:
            cp = Checkpoint.read(value, where)
            verify_signature(cp.key, cp.signature, cp.text.encode())
        except (BadCheckpoint, InvalidSignature):  # signed with the key pinned back then
            report.findings.append(f"{where}: malformed or not signed: the state is damaged")
            return
        if cp.origin != self.latest.origin:
            report.findings.append(f"{where}: another origin than the export's")
            return
        self.timed.append(cp)
        m = cp.tree_size
        when = f" (signed at {stamp(cp.signed_at)})" if cp.signed_at else ""
        if m > n:
            report.findings.append(
                f"truncated or rolled back: {CHECKPOINT_FILE} signs {n} entries, but {where} "
                f"signs {m} entries{when}"
            )
        elif m == n and not _same(cp.root, self.latest.root):
            report.findings.append(
                f"forked: {CHECKPOINT_FILE} signs {n} entries with another root than {where}, "
                f"of the same size{when}"
            )
        elif m < n and self.entries_ok and not _same(self.table.root(m), cp.root):
            report.findings.append(
                f"forked: the first {m} entries of the export are not those {where} signs{when}"
            )
        elif self.root_ok and m == n:
            report.notes.append(f"the same tree as {where}")
        elif self.root_ok:
            try:  # PROOF(m, D[n]) of RFC 9162 section 2.1.4.1 from the entries, checked
                proof = self.table.consistency_proof(m, n) if m else []
                if m:
                    verify_consistency(m, n, cp.root, self.latest.root, proof)
            except ProofError as exc:
                report.findings.append(f"{where}: {exc}")
                return
            report.notes.append(
                f"consistent with the last checkpoint seen, of {m} entries{when} (RFC 9162 "
                f"consistency proof to {n} entries computed from the entries and verified)"
            )

    def times(self, now: datetime) -> None:
        """Signing times: well formed (read), not ahead of ``now``, never going back."""
        self.report.findings += time_findings(self.timed, now)
        if self.latest.signed_at is None:
            self.report.notes.append(f"{CHECKPOINT_FILE} has no signing time (format version 1)")

    def inclusion(self, index: int) -> None:
        """An RFC 9162 audit path for entry ``index``, computed and checked."""
        if not self.root_ok:
            self.report.notes.append(f"inclusion of entry {index} not checked: entries differ")
            return
        path = self.table.inclusion_path(index, self.size)
        try:
            verify_inclusion(self.table.leaf(index), index, self.size, path, self.latest.root)
        except ProofError as exc:
            self.report.findings.append(f"entry {index}: {exc}")
            return
        self.report.notes.append(
            f"entry {index} ({self.scan.event(index)}) is in the signed tree of {self.size} "
            f"entries (RFC 9162 audit path of {len(path)} hashes)"
        )


# ---------------------------------------------------------------------- the whole export


def verify_export(
    directory: str | os.PathLike[str],
    *,
    public_key: bytes | None = None,
    earlier: Sequence[Mapping[str, Any]] = (),
    check_index: int | None = None,
    last_seen: Mapping[str, Any] | None = None,
    now: datetime | None = None,
) -> Report:
    """Verify a ledger export offline; see the module's docstring for the checks.

    Args:
        directory: a folder written by :func:`write_export`.
        public_key: the node's raw 32-byte Ed25519 public key, obtained out of band; the
            checkpoints must be signed with it. Without it, the key in the export is
            trusted and the report says so.
        earlier: checkpoints kept from previous exports (dicts with the six keys of
            checkpoint.json); each must be signed alike and be a prefix of this export.
        check_index: an entry whose RFC 9162 inclusion proof is checked as well.
        last_seen: the last checkpoint seen of this node (the six keys of
            checkpoint.json), signed under the key it names; the export must extend it.
        now: the time signing times are compared with (default: this computer's clock).

    Returns:
        A :class:`Report`; ``ok`` is True only when every check passed.

    Raises:
        FileNotFoundError: entries.jsonl or checkpoint.json is missing.
        ValueError: ``public_key`` is not 32 bytes, or ``check_index`` is negative or not
            below the checkpoint's tree size.
    """
    folder = Path(directory)
    if check_index is not None and check_index < 0:
        raise ValueError("check_index: must not be negative")
    if public_key is not None and len(public_key) != 32:
        raise ValueError("public_key: an Ed25519 public key has 32 bytes")
    for name in (ENTRIES_FILE, CHECKPOINT_FILE):
        if not (folder / name).is_file():
            raise FileNotFoundError(f"{folder / name}: missing (not a ledger export?)")
    report = Report()
    scan = _scan(folder / ENTRIES_FILE)
    report.entries = scan.table.size if scan.bad is None else scan.bad.index
    report.events = dict(sorted(Counter(scan.event_of[: report.entries]).items()))
    if scan.bad is not None:
        report.first_bad = scan.bad.index
        report.findings.append(scan.bad.finding())
    elif scan.chained_from is not None:
        last = scan.table.size - 1
        report.notes.append(f"hash chain (prev) holds from entry {scan.chained_from} to {last}")
    if scan.unchained:
        report.notes.append(
            f"{scan.unchained} v1 entries carry no prev hash: the chain cannot name an "
            "altered one among them (the Merkle root still covers them)"
        )
    try:
        latest = Checkpoint.read(
            json.loads((folder / CHECKPOINT_FILE).read_bytes()), CHECKPOINT_FILE
        )
    except ValueError as exc:  # BadCheckpoint, or not JSON
        report.findings.append(
            str(exc) if isinstance(exc, BadCheckpoint) else f"{CHECKPOINT_FILE}: not JSON"
        )
        report.ok = False
        return report
    if check_index is not None and check_index >= latest.tree_size:
        raise ValueError(f"check_index: the checkpoint signs {latest.tree_size} entries")
    report.origin, report.tree_size = latest.origin, latest.tree_size
    report.root = base64.b64encode(latest.root).decode()
    report.public_key = base64.b64encode(latest.key).decode()
    report.signed_at = None if latest.signed_at is None else stamp(latest.signed_at)
    run = _Verifier(report, scan, latest, public_key)
    run.checkpoint()
    run.history(_others(folder, earlier))
    if last_seen is not None:
        run.seen(last_seen)
    run.times(now or datetime.now(UTC))
    if check_index is not None:
        run.inclusion(check_index)
    report.ok = not report.findings
    return report
