"""The relay scheduler in a real relay process with two uvicorn workers on PostgreSQL:
the scheduler lease lets one worker act."""

from __future__ import annotations

import json
import time
from pathlib import Path

from sqlalchemy import select

from keystrata.storage.models import LedgerEntry


def test_two_workers_on_postgresql_one_scheduler_acts(tmp_path: Path, pki, pg_factory) -> None:
    db_factory = pg_factory
    url = db_factory()
    from keystrata.loopback.network import feed_links, start_network
    from keystrata.loopback.processes import stop_all

    extra = "\n[relay]\nsegment_bytes = 2048\nmin_segment_bytes = 512\ncycle_seconds = 0.1\n"
    network = start_network(
        tmp_path,
        pki,
        {"relay-1": url, "station-a": db_factory(), "station-b": db_factory()},
        extra=extra,
        relay_workers=2,
    )
    nodes = list(network.values())
    relay = network["relay-1"]
    try:
        feed_links(network, pki, 30)
        deadline = time.monotonic() + 40
        actors: set[str] = set()
        while time.monotonic() < deadline:
            actors = _segment_actors(url)
            if len(actors) >= 1 and _count_made(url) >= 10:
                break
            time.sleep(0.1)
        assert _count_made(url) >= 10, "the scheduler made too few segments"
        assert len(actors) == 1, actors
        pids = {
            line.split("[")[1].split("]")[0]
            for line in relay.log.read_text().splitlines()
            if "Started server process" in line
        }
        assert len(pids) == 2, "the relay did not run two worker processes"
    finally:
        stop_all(nodes)


def _made(url: str) -> list[dict[str, object]]:
    from keystrata.storage.db import Database

    db = Database.from_url(url)
    try:
        with db.read() as s:
            return [
                json.loads(e)
                for e in s.execute(
                    select(LedgerEntry.entry).where(LedgerEntry.event == "relay.segment_made")
                ).scalars()
            ]
    finally:
        db.dispose()


def _segment_actors(url: str) -> set[str]:
    return {str(e["actor"]) for e in _made(url)}


def _count_made(url: str) -> int:
    return len(_made(url))
