"""Reconcile the ledgers of two stations, key ID by key ID, over the pairs they share.

For every key ID a station allocated (handed to a master SAE) in a pair of the two
stations, the other station's ledger must show it received and then delivered to each
slave once, or that it expired there (and the owner heard so). Anything else is flagged:

``served_twice``   the same key ID handed to a master twice, allocated by both
                   stations, or delivered twice to the same slave
``one_sided``      seen at one station only: handed to a master but never received at
                   the slave's station although later keys were, or received or
                   delivered at the slave's station with no allocation before the cut-off
``mismatch``       both sides know it but disagree (a slave that the allocation did not
                   name, or another master)
``unsettled``      expired at one side, not recorded at the other although expiries
                   as late or later were

Not flagged: ``delivered``, ``expired`` (at both), ``waiting`` (for its slaves),
``in_flight`` (on its way between the stations when the exports were taken) and
``after_cutoff`` (allocated after the as-of time: not compared).

Which pairs: those whose registry entry (``registry.created`` in either ledger) names
the two stations, or that the slave's station recorded as allocated by the other; keys
of a pair of only one of the two stations are left out and the pair is listed as not
compared.

The as-of time: by default the earlier of the two exports' times (each export's signed
checkpoint time, else its last entry's). Keys allocated after it are ``after_cutoff``.
A key allocated before it that the slave's station has not recorded is ``in_flight``
when that station recorded no key the owner allocated later (the owner's outbox sends
to a station in order, so a later key received means this one was sent before it);
``one_sided`` otherwise. Expiries reported back to the owner are judged
the same way.

Works on entries as exported (``entries.jsonl``); no access to any node is needed.
"""

from __future__ import annotations

import csv
import io
import json
from collections import Counter, defaultdict
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import asdict, dataclass, field, fields
from pathlib import Path
from typing import Any

from keystrata_client.audit._checkpoint import TIME_LINE_MARKER

FLAGS = ("served_twice", "one_sided", "mismatch", "unsettled")
#: Outcomes that are not failures: settled, still open, or outside the comparison.
UNFLAGGED = ("delivered", "expired", "waiting", "in_flight", "after_cutoff")
STATES = (*UNFLAGGED, *FLAGS)
#: Column headers of the table (words, not field names).
HEADERS = {
    "delivered": "delivered",
    "expired": "expired",
    "waiting": "waiting",
    "in_flight": "in flight",
    "after_cutoff": "later",
}


@dataclass
class KeyRecord:
    """What the two ledgers say about one key ID."""

    key_id: str
    pair: str = ""
    owner: str = ""
    master: str = ""
    slaves: list[str] = field(default_factory=list)
    size_bits: int = 0
    allocated_at: str = ""
    handed_to_master: int = 0
    received_by: list[str] = field(default_factory=list)
    received_from: str = ""
    received_at: str = ""
    delivered_to: list[str] = field(default_factory=list)
    delivered_masters: list[str] = field(default_factory=list)
    expired_at: list[str] = field(default_factory=list)
    expired_times: dict[str, str] = field(default_factory=dict)
    status: str = ""
    reason: str = ""


@dataclass
class Reconciliation:
    """Per key ID records, per pair counts of each status, the as-of time and the pairs
    left out (pair -> the one station whose ledger names it)."""

    stations: tuple[str, str]
    keys: list[KeyRecord]
    as_of: str = ""
    not_compared: dict[str, str] = field(default_factory=dict)

    def counts(self) -> dict[str, dict[str, int]]:
        out: dict[str, dict[str, int]] = defaultdict(lambda: dict.fromkeys(STATES, 0))
        for k in self.keys:
            out[k.pair][k.status] += 1
        return dict(sorted(out.items()))

    @property
    def flagged(self) -> list[KeyRecord]:
        return [k for k in self.keys if k.status in FLAGS]

    @property
    def ok(self) -> bool:
        return not self.flagged

    def to_json(self) -> dict[str, Any]:
        return {
            "stations": list(self.stations),
            "as_of": self.as_of,
            "ok": self.ok,
            "pairs": self.counts(),
            "not_compared": self.not_compared,
            "keys": [asdict(k) for k in self.keys],
        }

    def to_csv(self) -> str:
        out = io.StringIO()
        names = [f.name for f in fields(KeyRecord)]
        writer = csv.DictWriter(out, fieldnames=names, lineterminator="\n")
        writer.writeheader()
        for k in self.keys:
            writer.writerow({n: _cell(v) for n, v in asdict(k).items()})
        return out.getvalue()

    def to_table(self) -> str:
        """A few lines for people: counts per pair, what was left out, flagged keys."""
        a, b = self.stations
        lines = [f"reconciliation of {a} and {b}, as of {self.as_of or '(no time)'}", ""]
        counts = self.counts()
        width = max([4, *(len(p) for p in counts)])
        heads = [*HEADERS.values(), "flagged"]
        lines.append(f"{'pair':<{width}}" + "".join(f"  {h:>9}" for h in heads))
        for pair, n in counts.items():
            cells = [*(n[s] for s in HEADERS), sum(n[s] for s in FLAGS)]
            lines.append(f"{pair:<{width}}" + "".join(f"  {c:>9,}" for c in cells))
        if not counts:
            lines.append("(no keys allocated between these stations)")
        lines.append("")
        lines.append("later: allocated after the as-of time, not compared")
        lines += [
            f"not compared: {pair} (a pair of {station} only)"
            for pair, station in sorted(self.not_compared.items())
        ]
        if self.flagged:
            lines.append(f"{len(self.flagged)} flagged key IDs:")
            lines += [f"  {k.key_id}  {k.status}: {k.reason}" for k in self.flagged]
        else:
            lines.append("no key served twice, one-sided, mismatched or unsettled")
        return "\n".join(lines)


def _cell(v: Any) -> Any:
    if isinstance(v, list):
        return ";".join(v)
    if isinstance(v, dict):
        return ";".join(f"{k}={x}" for k, x in sorted(v.items()))
    return v


@dataclass(frozen=True)
class Export:
    """An export folder's decoded entries and the time it covers (RFC 3339)."""

    folder: Path
    entries: list[dict[str, Any]]
    time: str


def read_entries(
    export_dir: Path, progress: Callable[[int], None] | None = None
) -> list[dict[str, Any]]:
    """The decoded entries of an export folder (``entries.jsonl``), in order;
    ``progress(bytes read)`` is called as the file is read.

    Raises:
        ValueError: a line is not an exported entry (verify the export first).
    """
    entries = []
    with (export_dir / "entries.jsonl").open(encoding="utf-8") as f:
        for n, line in enumerate(f):
            entry = json.loads(line).get("entry")
            if not isinstance(entry, dict):
                raise ValueError(f"{export_dir}: line {n} holds no decodable entry")
            entries.append(entry)
            if progress is not None:
                progress(len(line.encode()))
    return entries


def read_export(export_dir: Path, progress: Callable[[int], None] | None = None) -> Export:
    """The entries of an export and its time: the signing time of its checkpoint, else
    the time of its last entry (empty when it has neither).

    Raises:
        ValueError: as :func:`read_entries`.
    """
    entries = read_entries(export_dir, progress)
    return Export(export_dir, entries, export_time(export_dir) or _last_time(entries))


def export_time(export_dir: Path) -> str:
    """The signing time in ``checkpoint.json``'s signed text, or "" when it has none."""
    try:
        text = json.loads((export_dir / "checkpoint.json").read_text("utf-8"))["signed_text"]
    except (OSError, ValueError, KeyError, TypeError):
        return ""
    for line in str(text).splitlines():
        if line.startswith(TIME_LINE_MARKER + " "):
            return line.removeprefix(TIME_LINE_MARKER + " ").strip()
    return ""


def _last_time(entries: Sequence[Mapping[str, Any]]) -> str:
    return max((str(e["at"]) for e in entries if e.get("at")), default="")


def reconcile(
    first: Sequence[Mapping[str, Any]],
    second: Sequence[Mapping[str, Any]],
    pair: str | None = None,
    *,
    as_of: str | None = None,
    first_time: str | None = None,
    second_time: str | None = None,
) -> Reconciliation:
    """Compare two stations' ledgers (decoded entries, each list from one node) over
    the pairs they share (or ``pair`` only), as of ``as_of`` (default: the earlier of
    ``first_time`` and ``second_time``, each defaulting to its ledger's last entry).

    Times are RFC 3339 in UTC with ``Z``, as the ledger writes them.

    Raises:
        ValueError: both lists come from the same node, or a list mixes nodes.
    """
    a, b = _node(first), _node(second)
    if a == b:
        raise ValueError(f"both ledgers are from {a}: give the two stations of a pair")
    times = [t or _last_time(e) for t, e in ((first_time, first), (second_time, second))]
    cutoff = _utc(as_of) if as_of else min((t for t in times if t), default="")
    stations = _pair_stations({a: first, b: second})
    shared = {p for p, s in stations.items() if s == {a, b}}
    if pair is not None:
        shared = {pair}
    keys: dict[str, KeyRecord] = {}
    for station, entries in ((a, first), (b, second)):
        for e in entries:
            if e.get("pair") in shared:
                _read(keys, station, e)
    judge = _Judge(list(keys.values()), (a, b), cutoff)
    for k in keys.values():
        k.status, k.reason = judge(k)
    records = sorted(keys.values(), key=lambda k: (k.pair, k.allocated_at, k.key_id))
    left_out = {
        p: " and ".join(sorted(s & {a, b}))
        for p, s in stations.items()
        if p not in shared and s & {a, b} and len(s & {a, b}) == 1
    }
    return Reconciliation((a, b), records, cutoff, left_out)


def _utc(text: str) -> str:
    """An RFC 3339 time as the ledger writes it (UTC, ``Z``, six fraction digits), so
    times compare as text. Raises ValueError for anything else."""
    from datetime import UTC, datetime

    try:
        at = datetime.fromisoformat(text.replace("Z", "+00:00").replace("z", "+00:00"))
    except ValueError:
        raise ValueError(f"{text!r} is not an RFC 3339 time, e.g. 2026-12-01T10:00:00Z") from None
    if at.tzinfo is None:
        raise ValueError(f"{text!r} has no offset: write it as 2026-12-01T10:00:00Z")
    return at.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def _node(entries: Iterable[Mapping[str, Any]]) -> str:
    nodes = {str(e.get("node")) for e in entries}
    if len(nodes) != 1:
        raise ValueError(f"a ledger must come from one node, found {sorted(nodes)}")
    return nodes.pop()


def _pair_stations(ledgers: Mapping[str, Sequence[Mapping[str, Any]]]) -> dict[str, set[str]]:
    """Pair -> its two stations: from registry entries, else from allocations received
    (``owner`` and the receiving node), else the nodes whose ledgers hold key events of
    the pair (a pair only one of the two ledgers knows gets that station alone)."""
    registered: dict[str, set[str]] = {}
    received: dict[str, set[str]] = {}
    seen: dict[str, set[str]] = defaultdict(set)
    for node, entries in ledgers.items():
        for e in entries:
            value, pair = e.get("value"), e.get("pair")
            if e.get("kind") == "pairs" and isinstance(value, dict):
                named = value.get("stations")
                if isinstance(named, list) and len(named) == 2:
                    registered[str(e.get("id"))] = {str(s) for s in named}
            elif str(e.get("event", "")).startswith("key.") and pair:
                seen[str(pair)].add(node)
                if e.get("event") == "key.allocated" and e.get("owner"):
                    received[str(pair)] = {node, str(e["owner"])}
    return {**seen, **received, **registered}


def _read(keys: dict[str, KeyRecord], station: str, e: Mapping[str, Any]) -> None:
    event = e.get("event")
    if event not in ("key.allocated", "key.delivered", "key.expired"):
        return
    at = str(e.get("at", ""))
    for key_id in e.get("key_ids", []):
        k = keys.setdefault(key_id, KeyRecord(key_id))
        if e.get("pair") and not k.pair:
            k.pair = str(e["pair"])
        if event == "key.allocated" and "delivered_to" in e:
            k.handed_to_master += 1
            if k.owner and k.owner != station:
                k.reason = "allocated by both stations"
            k.owner, k.master = station, str(e["master"])
            k.slaves, k.size_bits = list(e["slaves"]), int(e["size_bits"])
            k.allocated_at = at
        elif event == "key.allocated":
            k.received_by.append(station)
            k.received_from, k.received_at = str(e.get("owner", "")), at
        elif event == "key.delivered":
            k.delivered_to.append(str(e["sae"]))
            k.delivered_masters.append(str(e["master"]))
        else:
            k.expired_at.append(station)
            k.expired_times.setdefault(station, at)


class _Judge:
    """Decides each key's status from the records of both ledgers and the cut-off."""

    def __init__(self, records: list[KeyRecord], stations: tuple[str, str], cutoff: str):
        self.stations = stations
        self.cutoff = cutoff
        # Per (owner, partner): the latest allocation time the partner has recorded;
        # per (partner, owner): the latest partner expiry the owner has recorded.
        self.received: dict[tuple[str, str], str] = {}
        self.expiry_heard: dict[tuple[str, str], str] = {}
        for k in records:
            partner = self._partner(k)
            if not partner:
                continue
            if partner in k.received_by:
                self._latest(self.received, (k.owner, partner), k.allocated_at)
            if {k.owner, partner} <= set(k.expired_at):
                self._latest(self.expiry_heard, (partner, k.owner), k.expired_times[partner])

    @staticmethod
    def _latest(table: dict[tuple[str, str], str], where: tuple[str, str], at: str) -> None:
        table[where] = max(table.get(where, ""), at)

    def _partner(self, k: KeyRecord) -> str:
        a, b = self.stations
        return {a: b, b: a}.get(k.owner, "")

    def _later(self, at: str) -> bool:
        return bool(self.cutoff) and at > self.cutoff

    def __call__(self, k: KeyRecord) -> tuple[str, str]:
        partner = self._partner(k)
        twice = [s for s, n in Counter(k.delivered_to).items() if n > 1]
        if k.handed_to_master > 1 or k.reason:
            return "served_twice", k.reason or f"handed to a master {k.handed_to_master} times"
        if twice:
            return "served_twice", f"delivered twice to {', '.join(sorted(twice))}"
        if not k.owner:
            if self._later(k.received_at):
                return "after_cutoff", ""
            return "one_sided", "delivered or received with no allocation at the other station"
        if self._later(k.allocated_at):
            return "after_cutoff", ""
        if partner not in k.received_by:
            if k.allocated_at > self.received.get((k.owner, partner), ""):
                return "in_flight", f"allocated at {k.owner}, not yet recorded at {partner}"
            return (
                "one_sided",
                f"handed to {k.master} at {k.owner}, never received at {partner} (later keys were)",
            )
        strangers = sorted(set(k.delivered_to) - set(k.slaves))
        if strangers or any(m != k.master for m in k.delivered_masters):
            return "mismatch", "delivered to an SAE the allocation did not name, or another master"
        if set(k.delivered_to) >= set(k.slaves):
            return "delivered", ""
        if k.expired_at:
            return self._expiry(k, partner)
        return "waiting", ""

    def _expiry(self, k: KeyRecord, partner: str) -> tuple[str, str]:
        if {k.owner, partner} <= set(k.expired_at):
            return "expired", ""
        at = k.expired_times.get(partner, "")
        heard = self.expiry_heard.get((partner, k.owner), "")
        if at and not self._later(at) and heard and at <= heard:
            return "unsettled", f"expired at {partner} only (later expiries reached {k.owner})"
        if at:
            return "in_flight", f"expired at {partner}, not yet recorded at {k.owner}"
        if self._later(k.expired_times.get(k.owner, "")):
            return "in_flight", f"expired at {k.owner}, not yet recorded at {partner}"
        return "unsettled", f"expired at {', '.join(k.expired_at)} only"
