"""Key delivery accounting at a station: per pair and per SAE, keys and bits delivered,
expired, waiting and refused."""

from __future__ import annotations

import json
from collections import defaultdict
from typing import Any

from sqlalchemy import select

from keystrata.domain.ledger import Event
from keystrata.services.context import NodeContext
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
                if row.state == "expired":
                    add(p["expired"], row.size_bits)
                    add(saes[row.master_sae]["expired"], row.size_bits)
                continue
            fetched = json.loads(row.fetched_by)
            for sae in fetched:
                add(p["to_slaves"], row.size_bits)
                add(saes[sae]["as_slave"], row.size_bits)
            if row.state == "waiting":
                add(p["waiting"], row.size_bits)
            elif row.state == "expired":
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
