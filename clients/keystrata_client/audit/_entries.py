"""Entry checks of the offline verifier: each line of ``entries.jsonl`` in order, the
canonical bytes, the entry's own index and the v2 hash chain (``prev``). The first bad
entry is raised as :class:`_Bad`, naming it by index and event only."""

from __future__ import annotations

import hmac
import json
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, NoReturn

import rfc8785

from keystrata_client.audit._tree import HASH_SIZE, LeafTable, leaf_hash
from keystrata_client.audit.export import b64_value

#: Entry formats this verifier knows: v1 (no chain) and v2 (``prev``).
KNOWN_VERSIONS = (1, 2)


class _Bad(Exception):
    def __init__(self, index: int, reason: str, event: str | None = None) -> None:
        self.index, self.reason, self.event = index, reason, event
        super().__init__(f"entry {index}: {reason}")

    def finding(self) -> str:
        about = f" ({self.event})" if self.event else ""
        return f"entry {self.index}{about}: {self.reason}"


def _no_constant(name: str) -> NoReturn:
    raise ValueError(f"{name} is not JSON")


#: The integers a double holds exactly, to the last one (RFC 8785 section 3.2.2.3).
_SAFE_INTEGER = 2**53 - 1


def _number(text: str) -> int | float:
    """A JSON integer as RFC 8785 reads it: an IEEE 754 double. Within the safe range
    an int serialises the same; beyond it only the double does (a node writes 2^68 as
    ``295147905179352830000``, which must read back as that double, not as an int)."""
    value = int(text)
    return value if -_SAFE_INTEGER <= value <= _SAFE_INTEGER else float(text)


def _json(text: str | bytes) -> Any:
    return json.loads(text, parse_constant=_no_constant, parse_int=_number)


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
        record = _json(line)
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
        entry = _json(raw.decode("utf-8"))
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


def _same(a: bytes, b: bytes) -> bool:
    return hmac.compare_digest(a, b)
