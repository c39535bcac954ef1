"""After a demo run: check the network's key from the nodes' own databases.

* every relay record: no byte of any link block used by two relay operations, and each
  block's consumption point equals the bytes the records took from it (invariant 1);
* every segment ready at a station is held by its partner station with the same bytes
  (compared by SHA-256 digest, never printed), and no segment is ready on one side
  while discarded on the other (invariant 3).
"""

from __future__ import annotations

import hashlib
import hmac
import json
from collections import defaultdict
from dataclasses import dataclass, field
from pathlib import Path

from sqlalchemy import select

from keystrata.config import load_settings
from keystrata.node.lifecycle import open_node
from keystrata.storage.db import Database
from keystrata.storage.models import LinkBlock, PairSegment, RelayOp
from keystrata.storage.sealed import segment_context


@dataclass
class NetworkCheck:
    relay_ops: int = 0
    segments_ready_both: int = 0
    problems: list[str] = field(default_factory=list)


def _relay_records(config: Path, check: NetworkCheck) -> None:
    settings = load_settings(config, env={})
    db = Database.from_url(settings.database.url)
    try:
        with db.read() as s:
            taken: dict[tuple[str, str], list[tuple[int, int]]] = defaultdict(list)
            for op in s.execute(select(RelayOp)).scalars():
                check.relay_ops += 1
                for link, ranges in json.loads(op.ranges).items():
                    for r in ranges:
                        taken[(link, r["block"])].append((r["offset"], r["length"]))
            used = {(b.link_id, b.block_id): b.used for b in s.execute(select(LinkBlock)).scalars()}
    finally:
        db.dispose()
    for (link, block), spans in taken.items():
        spans.sort()
        end = 0
        for offset, length in spans:
            if offset != end:  # a gap or an overlap: bytes skipped or used twice
                check.problems.append(
                    f"relay: block {block} of {link} taken out of order "
                    f"at byte {offset} (expected {end})"
                )
            end = offset + length
        if used.get((link, block)) != end:
            check.problems.append(
                f"relay: block {block} of {link} consumed to "
                f"{used.get((link, block))}, records say {end}"
            )


def _station_segments(config: Path) -> dict[str, tuple[str, str, int, bytes | None]]:
    """segment -> (pair, state, bytes used, its remaining key or None). The key stays in
    this process's memory only long enough to be compared."""
    settings = load_settings(config, env={})
    db = Database.from_url(settings.database.url)
    try:
        ctx = open_node(settings, db)
        out = {}
        with db.read() as s:
            for row in s.execute(select(PairSegment)).scalars():
                key = None
                if row.sealed is not None:
                    key = ctx.keyring.open(row.sealed, segment_context(row, row.used))
                out[row.segment_id] = (row.pair_id, row.state, row.used, key)
        return out
    finally:
        db.dispose()


def _same_tail(used_x: int, key_x: bytes | None, used_y: int, key_y: bytes | None) -> bool:
    """Both stations hold the same bytes from the later of their consumption points on
    (keys the owner allocated may not have reached the other station yet)."""
    end_x = used_x + len(key_x or b"")
    end_y = used_y + len(key_y or b"")
    if end_x != end_y:
        return False  # segments of different length
    start = max(used_x, used_y)
    tail_x = (key_x or b"")[start - used_x :]
    tail_y = (key_y or b"")[start - used_y :]
    return hmac.compare_digest(hashlib.sha256(tail_x).digest(), hashlib.sha256(tail_y).digest())


def check_network(relay_config: Path, station_configs: dict[str, Path]) -> NetworkCheck:
    """Run every check with the nodes stopped; problems are listed, never key bytes."""
    check = NetworkCheck()
    _relay_records(relay_config, check)
    seen = {name: _station_segments(path) for name, path in station_configs.items()}
    names = sorted(seen)
    for i, x in enumerate(names):
        for y in names[i + 1 :]:
            for seg in seen[x].keys() & seen[y].keys():
                (pair, sx, ux, kx), (_, sy, uy, ky) = seen[x][seg], seen[y][seg]
                if {sx, sy} == {"ready", "discarded"}:
                    check.problems.append(
                        f"segment {seg} of {pair}: ready at one station, discarded at the other"
                    )
                live = "discarded" not in (sx, sy)
                if live and not _same_tail(ux, kx, uy, ky):
                    check.problems.append(f"segment {seg} of {pair}: the stations' key differ")
                if sx == sy == "ready":
                    check.segments_ready_both += 1
    for name in names:
        for seg, (pair, state, _, _) in seen[name].items():
            partners = [n for n in names if n != name and seg in seen[n]]
            if state == "ready" and not partners:
                check.problems.append(f"segment {seg} of {pair} is ready at {name} only")
    return check
