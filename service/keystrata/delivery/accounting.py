"""Key delivery accounting: per pair and per SAE, keys and bits delivered, expired,
waiting and refused (now, from the station's records), and per day from the ledger."""

from __future__ import annotations

import json
from collections import defaultdict
from datetime import datetime
from typing import Any

from sqlalchemy import select

from keystrata.context import NodeContext
from keystrata.delivery.key_states import KeyState
from keystrata.ledger.entries import Event
from keystrata.storage.models import KeyAlloc, LedgerEntry


def _counter() -> dict[str, int]:
    return {"keys": 0, "bits": 0}


def deliveries(ctx: NodeContext) -> dict[str, Any]:
    """Counts from this station's own records (allocations and the ledger's refusals).

    Per pair: ``to_masters`` (keys this station handed to its master SAEs), and for keys
    the partner allocated: ``to_slaves`` (fetched here), ``waiting`` and ``expired``.
    Per SAE: the same from its side, plus ``refused`` requests.
    """
    pairs: dict[str, dict[str, dict[str, int]]] = defaultdict(
        lambda: {k: _counter() for k in ("to_masters", "to_slaves", "waiting", "expired")}
    )
    saes: dict[str, dict[str, Any]] = defaultdict(
        lambda: {
            "as_master": _counter(),
            "as_slave": _counter(),
            "expired": _counter(),
            "refused": 0,
        }
    )

    def add(c: dict[str, int], bits: int, n: int = 1) -> None:
        c["keys"] += n
        c["bits"] += n * bits

    with ctx.db.read() as s:
        for row in s.execute(select(KeyAlloc)).scalars():
            p = pairs[row.pair_id]
            if row.owner == ctx.node_id:
                add(p["to_masters"], row.size_bits)
                add(saes[row.master_sae]["as_master"], row.size_bits)
                if row.state == KeyState.EXPIRED:
                    add(p["expired"], row.size_bits)
                    add(saes[row.master_sae]["expired"], row.size_bits)
                continue
            fetched = json.loads(row.fetched_by)
            for sae in fetched:
                add(p["to_slaves"], row.size_bits)
                add(saes[sae]["as_slave"], row.size_bits)
            if row.state == KeyState.WAITING:
                add(p["waiting"], row.size_bits)
            elif row.state == KeyState.EXPIRED:
                add(p["expired"], row.size_bits)
                for sae in set(json.loads(row.slaves)) - set(fetched):
                    add(saes[sae]["expired"], row.size_bits)
        for entry in s.execute(
            select(LedgerEntry.entry).where(LedgerEntry.event == str(Event.KEY_REFUSED))
        ).scalars():
            saes[str(json.loads(entry)["sae"])]["refused"] += 1
    return {
        "node_id": ctx.node_id,
        "pairs": [{"pair_id": k, **v} for k, v in sorted(pairs.items())],
        "saes": [{"sae_id": k, **v} for k, v in sorted(saes.items())],
    }


#: Ledger events the daily accounting reads.
_DAILY_EVENTS = (
    Event.KEY_ALLOCATED,
    Event.KEY_DELIVERED,
    Event.KEY_EXPIRED,
    Event.KEY_REFUSED,
    Event.RELAY_SEGMENT_MADE,
)


def _pair_day() -> dict[str, Any]:
    return {
        "to_masters": _counter(),
        "to_slaves": _counter(),
        "expired": _counter(),
        "relayed": {"segments": 0, "bits": 0, "link_bits": 0},
    }


def _sae_day() -> dict[str, Any]:
    return {"as_master": _counter(), "as_slave": _counter(), "refused": 0}


def per_day(
    ctx: NodeContext, since: datetime | None = None, until: datetime | None = None
) -> dict[str, Any]:
    """Per UTC day, per pair and per SAE, from this node's ledger alone: keys and bits
    handed to masters and fetched by slaves, keys expired, requests refused, and (at a
    relay) segments made and the link key they used (KA, KB and the MAC key)."""
    days: dict[str, dict[str, Any]] = defaultdict(
        lambda: {"pairs": defaultdict(_pair_day), "saes": defaultdict(_sae_day)}
    )
    query = select(LedgerEntry.entry).where(LedgerEntry.event.in_([str(e) for e in _DAILY_EVENTS]))
    if since is not None:
        query = query.where(LedgerEntry.recorded_at >= since)
    if until is not None:
        query = query.where(LedgerEntry.recorded_at < until)
    with ctx.db.read() as s:
        for raw in s.execute(query.order_by(LedgerEntry.idx)).scalars():
            _count(days, json.loads(raw))
    return {
        "node_id": ctx.node_id,
        "days": [
            {
                "day": day,
                "pairs": [{"pair_id": k, **v} for k, v in sorted(d["pairs"].items())],
                "saes": [{"sae_id": k, **v} for k, v in sorted(d["saes"].items())],
            }
            for day, d in sorted(days.items())
        ],
    }


def _count(days: dict[str, dict[str, Any]], e: dict[str, Any]) -> None:
    day = days[str(e["at"])[:10]]
    event, keys = e["event"], len(e.get("key_ids", []))
    if event == Event.KEY_ALLOCATED and "delivered_to" in e:
        bits = keys * int(e["size_bits"])
        _add(day["pairs"][e["pair"]]["to_masters"], keys, bits)
        _add(day["saes"][e["delivered_to"]]["as_master"], keys, bits)
    elif event == Event.KEY_DELIVERED:
        bits = int(e.get("bits", 0))
        _add(day["saes"][e["sae"]]["as_slave"], keys, bits)
        if "pair" in e:
            _add(day["pairs"][e["pair"]]["to_slaves"], keys, bits)
    elif event == Event.KEY_EXPIRED and e.get("side") == "slave":
        _add(day["pairs"][e["pair"]]["expired"], keys, int(e.get("bits", 0)))
    elif event == Event.KEY_REFUSED:
        day["saes"][e["sae"]]["refused"] += 1
    elif event == Event.RELAY_SEGMENT_MADE:
        relayed = day["pairs"][e["pair"]]["relayed"]
        relayed["segments"] += 1
        relayed["bits"] += 8 * int(e["bytes"])
        relayed["link_bits"] += 8 * sum(
            int(r["length"]) for ranges in e["link_bytes"].values() for r in ranges
        )


def _add(counter: dict[str, int], keys: int, bits: int) -> None:
    counter["keys"] += keys
    counter["bits"] += bits
