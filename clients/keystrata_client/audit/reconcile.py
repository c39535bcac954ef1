"""Reconcile the ledgers of the two stations of a pair, key ID by key ID.

For every key ID a station allocated (handed to a master SAE), the other station's
ledger must show it received and then delivered to each slave once, or that it expired
there (and the owner heard so). Anything else is flagged:

``served_twice``   the same key ID handed to a master twice, allocated by both
                   stations, or delivered twice to the same slave
``one_sided``      seen at one station only (handed to a master but never received at
                   the slave's station, or delivered to a slave with no allocation)
``mismatch``       both sides know it but disagree (master, pair, or a slave that the
                   allocation did not name)
``unsettled``      expired at one side, not yet recorded at the other

Keys still waiting for their slaves are listed as ``waiting`` and are not flagged.
Works on entries as exported (``entries.jsonl``); no access to any node is needed.
"""

from __future__ import annotations

import csv
import io
import json
from collections import Counter, defaultdict
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import asdict, dataclass, field, fields
from pathlib import Path
from typing import Any

FLAGS = ("served_twice", "one_sided", "mismatch", "unsettled")
STATES = ("delivered", "expired", "waiting", *FLAGS)


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
    delivered_to: list[str] = field(default_factory=list)
    delivered_masters: list[str] = field(default_factory=list)
    expired_at: list[str] = field(default_factory=list)
    status: str = ""
    reason: str = ""


@dataclass
class Reconciliation:
    """Per key ID records and per pair counts of each status."""

    stations: tuple[str, str]
    keys: list[KeyRecord]

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
            "ok": self.ok,
            "pairs": self.counts(),
            "keys": [asdict(k) for k in self.keys],
        }

    def to_csv(self) -> str:
        out = io.StringIO()
        names = [f.name for f in fields(KeyRecord)]
        writer = csv.DictWriter(out, fieldnames=names, lineterminator="\n")
        writer.writeheader()
        for k in self.keys:
            row = asdict(k)
            writer.writerow({n: ";".join(v) if isinstance(v, list) else v for n, v in row.items()})
        return out.getvalue()

    def to_table(self) -> str:
        a, b = self.stations
        lines = [f"reconciliation of {a} and {b}", ""]
        header = f"{'pair':<24}" + "".join(f"{s:>14}" for s in STATES)
        lines.append(header)
        for pair, counts in self.counts().items():
            lines.append(f"{pair:<24}" + "".join(f"{counts[s]:>14}" for s in STATES))
        if not self.keys:
            lines.append("(no keys allocated between these stations)")
        lines.append("")
        if self.flagged:
            lines.append(f"{len(self.flagged)} flagged key IDs:")
            lines += [f"  {k.key_id}  {k.status}: {k.reason}" for k in self.flagged]
        else:
            lines.append("no key served twice, none one-sided")
        return "\n".join(lines)


def read_entries(export_dir: Path) -> list[dict[str, Any]]:
    """The decoded entries of an export folder (``entries.jsonl``), in order.

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
    return entries


def reconcile(
    first: Sequence[Mapping[str, Any]],
    second: Sequence[Mapping[str, Any]],
    pair: str | None = None,
) -> Reconciliation:
    """Compare two stations' ledgers (decoded entries, each list from one node).

    Raises:
        ValueError: both lists come from the same node, or a list mixes nodes.
    """
    a, b = _node(first), _node(second)
    if a == b:
        raise ValueError(f"both ledgers are from {a}: give the two stations of a pair")
    keys: dict[str, KeyRecord] = {}
    for station, entries in ((a, first), (b, second)):
        for e in entries:
            _read(keys, station, e)
    records = [k for k in keys.values() if pair is None or k.pair == pair]
    for k in records:
        k.status, k.reason = _judge(k, a, b)
    records.sort(key=lambda k: (k.pair, k.allocated_at, k.key_id))
    return Reconciliation((a, b), records)


def _node(entries: Iterable[Mapping[str, Any]]) -> str:
    nodes = {str(e.get("node")) for e in entries}
    if len(nodes) != 1:
        raise ValueError(f"a ledger must come from one node, found {sorted(nodes)}")
    return nodes.pop()


def _read(keys: dict[str, KeyRecord], station: str, e: Mapping[str, Any]) -> None:
    event = e.get("event")
    if event not in ("key.allocated", "key.delivered", "key.expired"):
        return
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
            k.allocated_at = str(e["at"])
        elif event == "key.allocated":
            k.received_by.append(station)
        elif event == "key.delivered":
            k.delivered_to.append(str(e["sae"]))
            k.delivered_masters.append(str(e["master"]))
        else:
            k.expired_at.append(station)


def _judge(k: KeyRecord, a: str, b: str) -> tuple[str, str]:
    partner = {a: b, b: a}.get(k.owner, "")
    twice = [s for s, n in Counter(k.delivered_to).items() if n > 1]
    if k.handed_to_master > 1 or k.reason:
        return "served_twice", k.reason or f"handed to a master {k.handed_to_master} times"
    if twice:
        return "served_twice", f"delivered twice to {', '.join(sorted(twice))}"
    if not k.owner:
        return "one_sided", "delivered or received with no allocation at the other station"
    if partner not in k.received_by:
        return "one_sided", f"handed to {k.master} at {k.owner}, never received at {partner}"
    strangers = sorted(set(k.delivered_to) - set(k.slaves))
    if strangers or any(m != k.master for m in k.delivered_masters):
        return "mismatch", "delivered to an SAE the allocation did not name, or another master"
    if set(k.delivered_to) >= set(k.slaves):
        return "delivered", ""
    if k.expired_at:
        if {k.owner, partner} <= set(k.expired_at):
            return "expired", ""
        return "unsettled", f"expired at {', '.join(k.expired_at)} only"
    return "waiting", ""
