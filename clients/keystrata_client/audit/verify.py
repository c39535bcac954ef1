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
4. Optionally an RFC 9162 inclusion proof for one entry.

Messages name entries by index and event only: never whole entries.
"""

from __future__ import annotations

import base64
import hmac
import json
import os
import sys
from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, NoReturn

import rfc8785
from cryptography.exceptions import InvalidSignature
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey

from keystrata_client.audit._tree import (
    HASH_SIZE,
    LeafTable,
    ProofError,
    leaf_hash,
    verify_consistency,
    verify_inclusion,
)
from keystrata_client.audit.export import (
    CHECKPOINT_FILE,
    ENTRIES_FILE,
    HISTORY_FILE,
    BadCheckpoint,
    Checkpoint,
    b64_value,
)

#: Entry formats this verifier knows: v1 (no chain) and v2 (``prev``).
KNOWN_VERSIONS = (1, 2)


@dataclass
class Report:
    """The outcome of :func:`verify_export`.

    Attributes:
        ok: True when every check passed (``findings`` is empty).
        origin, tree_size, root: the checkpoint's fields (root in Base64), None when
            the checkpoint could not be read.
        public_key: the key the checkpoint names (Base64), for comparing out of band.
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
    entries: int = 0
    events: dict[str, int] = field(default_factory=dict)
    first_bad: int | None = None
    findings: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    def to_json(self) -> dict[str, Any]:
        """Return the report as a JSON-ready dict."""
        return asdict(self)


class _Bad(Exception):
    def __init__(self, index: int, reason: str, event: str | None = None) -> None:
        self.index, self.reason, self.event = index, reason, event
        super().__init__(f"entry {index}: {reason}")

    def finding(self) -> str:
        about = f" ({self.event})" if self.event else ""
        return f"entry {self.index}{about}: {self.reason}"


def _no_constant(name: str) -> NoReturn:
    raise ValueError(f"{name} is not JSON")


def _same_json(a: Any, b: Any) -> bool:
    """Equal JSON values, types included (unlike ``==``, which takes true for 1 and 1.0
    for 1); ``json.dumps`` writes each type its own way and is fast."""
    try:
        return json.dumps(a, sort_keys=True) == json.dumps(b, sort_keys=True)
    except (TypeError, ValueError):
        return False


def _canonical(value: Any) -> bytes | None:
    try:
        return rfc8785.dumps(value)
    except (rfc8785.CanonicalizationError, TypeError, ValueError):
        return None


@dataclass
class _Scan:
    table: LeafTable = field(default_factory=LeafTable)
    event_of: list[str] = field(default_factory=list)  # by index (interned names)
    unchained: int = 0  # v1 entries
    chained_from: int | None = None  # the first v2 entry
    bad: _Bad | None = None

    def event(self, index: int) -> str | None:
        return self.event_of[index] if 0 <= index < len(self.event_of) else None


def _entry(pos: int, line: bytes, scan: _Scan) -> tuple[bytes, str, bytes | None]:
    """Check one line of entries.jsonl; return the entry's bytes, its event and the hash
    it records of its predecessor (v2 only, else None)."""
    try:
        record = json.loads(line, parse_constant=_no_constant)
    except ValueError:
        raise _Bad(pos, "its line in entries.jsonl is not JSON") from None
    at = record.get("index") if isinstance(record, dict) else None
    if type(at) is not int:
        raise _Bad(pos, "its line in entries.jsonl has no integer index")
    if at != pos:
        raise _Bad(pos, f"missing or moved: the export holds entry {at} in its place")
    raw = b64_value(record.get("entry_b64"))
    if raw is None:
        raise _Bad(pos, "entry_b64 is not canonical Base64")
    try:
        entry = json.loads(raw.decode("utf-8"), parse_constant=_no_constant)
    except ValueError:  # UnicodeDecodeError is a ValueError too
        raise _Bad(pos, "the stored bytes are not valid JSON (altered)") from None
    if not isinstance(entry, dict):
        raise _Bad(pos, "the stored bytes are not a JSON object (altered)")
    event = _label(entry.get("event"))
    if _canonical(entry) != raw:
        raise _Bad(pos, "the stored bytes are not RFC 8785 canonical JSON (altered)", event)
    if not _same_json(record.get("entry"), entry):
        raise _Bad(pos, "the export's decoded entry differs from the stored bytes", event)
    own = entry.get("index")
    if type(own) is not int or own != pos:
        said = f"entry {own}" if type(own) is int else "no index"
        raise _Bad(pos, f"the entry says {said} (entries removed or reordered)", event)
    version = entry.get("v")
    if type(version) is not int or version not in KNOWN_VERSIONS:
        raise _Bad(pos, "its format version is unknown to this verifier", event)
    if version == 1:
        if scan.chained_from is not None:
            raise _Bad(pos, "a v1 entry after v2 entries (formats never go back)", event)
        scan.unchained += 1
        return raw, event, None
    if scan.chained_from is None:
        scan.chained_from = pos
    prev = entry.get("prev", "absent")
    if pos == 0:
        if prev is not None:
            raise _Bad(pos, "the first entry's prev must be null", event)
        return raw, event, None
    recorded = b64_value(prev, HASH_SIZE)
    if recorded is None:
        raise _Bad(pos, "prev is not the Base64 of a SHA-256 hash", event)
    return raw, event, recorded


def _label(event: Any) -> str:
    """The event name for messages and counts; anything odd is not echoed."""
    if isinstance(event, str) and 0 < len(event) <= 64 and event.isascii() and event.isprintable():
        return event
    return "(no event name)"


def _scan(path: Path) -> _Scan:
    """Check every entry in order; stop at the first bad one (``scan.bad``).

    The chain names an altered entry: if entry j's prev does not match entry j - 1,
    either entry j - 1 changed (then entry j + 1's prev still matches entry j) or entry
    j's prev did (then entry j + 1's does not match entry j either).
    """
    scan = _Scan()
    broken: int | None = None  # entry whose prev does not match the entry before it

    def at(index: int, reason: str) -> _Bad:
        return _Bad(index, reason, scan.event(index))

    def unresolved(j: int) -> _Bad:
        return at(j - 1, f"entry {j} recorded another hash of it: altered (or entry {j}'s prev)")

    with path.open("rb") as lines:
        for pos, line in enumerate(lines):
            try:
                raw, event, recorded = _entry(pos, line.rstrip(b"\r\n"), scan)
            except _Bad as bad:
                scan.bad = unresolved(broken) if broken is not None else bad
                return scan
            scan.event_of.append(sys.intern(event))
            linked = None if recorded is None else _same(recorded, scan.table.leaf(pos - 1))
            if broken is not None:
                if linked:
                    scan.bad = at(
                        broken - 1, f"altered: entry {broken} recorded another hash of it (prev)"
                    )
                else:
                    scan.bad = at(
                        broken,
                        f"altered: its prev does not match entry {broken - 1}, and entry "
                        f"{pos} recorded another hash of it",
                    )
                return scan
            if linked is False:
                broken = pos
            scan.table.append(leaf_hash(raw))
    if broken is not None:
        scan.bad = unresolved(broken)
    return scan


# ---------------------------------------------------------------------- checkpoints


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


def _same(a: bytes, b: bytes) -> bool:
    return hmac.compare_digest(a, b)


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
    run = _Verifier(report, scan, latest, public_key)
    run.checkpoint()
    run.history(_others(folder, earlier))
    if check_index is not None:
        run.inclusion(check_index)
    report.ok = not report.findings
    return report
