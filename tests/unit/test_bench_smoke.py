"""The benchmark harness (``make bench``) stays importable and correct: its report writer
and one cheap figure, the ledger proof timing, through the same code path as the full
run (a 10,000-entry ledger built in bulk, then proofs and appends). Speed is not
checked here; shape, arithmetic and the bulk-built ledger's correctness are."""

from __future__ import annotations

import hashlib
import json
import math
import sys
from collections.abc import Iterator
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[2]
if str(REPO) not in sys.path:
    sys.path.insert(0, str(REPO))

from bench import demand, report  # noqa: E402 - needs the repository root on the path
from bench import ledger as bench_ledger  # noqa: E402
from bench.common import Figure, Workspace, percentile  # noqa: E402

from keystrata.ledger import chain, merkle  # noqa: E402
from keystrata.ledger.entries import Event, encode_entry  # noqa: E402
from keystrata.storage.models import LedgerEntry  # noqa: E402


def mth(leaves: list[bytes]) -> bytes:
    """RFC 9162 section 2.1.1 Merkle Tree Hash over leaf hashes, from the definition."""
    if len(leaves) == 1:
        return leaves[0]
    k = 1
    while k * 2 < len(leaves):
        k *= 2
    return hashlib.sha256(b"\x01" + mth(leaves[:k]) + mth(leaves[k:])).digest()


@pytest.fixture
def ws() -> Iterator[Workspace]:
    space = Workspace()
    yield space
    space.close()


def test_bulk_built_ledger_is_the_ledger_appends_would_write(tmp_path: Path) -> None:
    db = bench_ledger.open_database(f"sqlite:///{tmp_path}/ledger.db")
    try:
        bench_ledger.build(db, 1000)
        with db.read() as s:
            entries = [e.entry for e in s.query(LedgerEntry).order_by(LedgerEntry.idx)]
            size, root = chain.StoredTree(s).head()
    finally:
        db.dispose()
    assert size == len(entries) == 1000
    # Every entry is byte for byte what the service's encoder makes, chained by `prev`.
    prev = None
    for index, entry in enumerate(entries):
        fields = json.loads(entry)
        expected = encode_entry(
            index=index,
            event=Event.KEY_DELIVERED,
            node_id=bench_ledger.NODE,
            at=bench_ledger.AT,
            fields={k: fields[k] for k in ("sae", "master", "key_ids")},
            prev=prev,
        )
        assert entry == expected
        prev = merkle.leaf_hash(entry)
    # The stored tree head is RFC 9162's Merkle Tree Hash of those entries.
    assert root == mth([merkle.leaf_hash(e) for e in entries])


def test_ledger_figures_through_the_bench_code_path(ws: Workspace) -> None:
    figures = bench_ledger.measure(ws, "sqlite", 10_000, samples=20, seconds=0.2)
    names = [f.name for f in figures]
    assert names == [
        "ledger append, 1 per transaction (SQLite)",
        "ledger inclusion proof p50 (10,000 entries, SQLite)",
        "ledger inclusion proof p99 (10,000 entries, SQLite)",
        "ledger consistency proof p50 (10,000 entries, SQLite)",
        "ledger consistency proof p99 (10,000 entries, SQLite)",
    ]
    assert [f.unit for f in figures] == ["appends/s", "ms", "ms", "ms", "ms"]
    for fig in figures:
        assert fig.value > 0 and math.isfinite(fig.value)
        assert fig.ceiling is None and fig.ratio is None
    assert figures[1].value <= figures[2].value  # p50 <= p99 of the same samples
    assert figures[3].value <= figures[4].value


def test_results_json_and_table(tmp_path: Path) -> None:
    figures = [
        Figure(
            "Get key (enc_keys 1x256 bit, 16 clients, 1 worker, SQLite)",
            300.0,
            "requests/s",
            1200.0,
        ),
        Figure("Get key (enc_keys 1x256 bit, 16 clients, 1 worker, SQLite) p99", 40.0, "ms", 8.0),
        Figure("link key ingest (binary, 4 KiB blocks x 256, SQLite)", 250.0, "Mbit/s", 400.0),
        Figure("ledger inclusion proof p99 (1,000,000 entries, SQLite)", 6.0, "ms"),
    ]
    out = tmp_path / "results.json"
    report.write_json(out, figures)
    records = json.loads(out.read_text())
    assert isinstance(records, list) and len(records) == len(figures)
    for record, fig in zip(records, figures, strict=True):
        assert set(record) == {"name", "value", "unit", "ceiling", "ratio"}
        assert record["name"] == fig.name and record["value"] == fig.value
        if record["ceiling"] is None:
            assert record["ratio"] is None
        else:
            assert record["ratio"] == pytest.approx(record["value"] / record["ceiling"])
    text = report.table(figures)
    assert all(f.name in text for f in figures)
    verdicts = {t.text.split(":")[0]: t.met for t in report.targets(figures)}
    # 300/1200 = 25% of the ceiling: below the 30%, whatever the latency.
    assert verdicts[figures[0].name] is False
    # 62.5% of the ceiling and 250 Mbit/s: both parts of the ingest target hold.
    assert verdicts[figures[2].name] is True
    assert verdicts[figures[3].name] is False  # 6 ms at a million entries
    page = tmp_path / "benchmarks.md"
    report.write_markdown(
        page, figures, report.machine(), command="python -m bench", started=report.now(), seconds=1
    )
    body = page.read_text()
    assert "| figure | value | unit | ceiling | ratio |" in body
    assert "## Machine" in body and "SQLite" in body


def test_percentile_is_nearest_rank() -> None:
    # Nearest-rank definition (common practice): the smallest value with at least q% of
    # the values at or below it.
    values = [float(v) for v in range(100, 0, -1)]
    assert percentile(values, 50) == 50.0
    assert percentile(values, 99) == 99.0
    assert percentile(values, 100) == 100.0
    assert percentile([7.0], 99) == 7.0
    assert math.isnan(percentile([], 50))


def test_the_demand_trace_plays_through(tmp_path: Path) -> None:
    """A few cycles of the demand trace (every phase one or two cycles) run the service's
    Get key, reports, scheduler and confirmations in one process; every request is
    counted, served or refused, and the buffer is sampled once per cycle."""
    ws = Workspace()
    try:
        played = demand.run(ws, demand.fixed_policy(200_000), scale=0.02)
    finally:
        ws.close()
    cycles = sum(max(1, round(p.minutes * 0.02 * 60 / demand.STEP)) for p in demand.TRACE)
    assert len(played.held) == cycles
    assert played.requests > 0
    assert 0.0 <= played.refused_share <= 1.0
    assert max(played.held) > 0
