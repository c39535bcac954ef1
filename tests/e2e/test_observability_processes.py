"""Metrics and history of a real node: `keystrata serve` with two uvicorn workers on
PostgreSQL, over mutual TLS; every scrape shows the same database-derived values, and the
dashboard's history is sampled by one worker at a time."""

from __future__ import annotations

import itertools
from pathlib import Path

from prometheus_client.exposition import CONTENT_TYPE_PLAIN_0_0_4

from keystrata import __version__
from scrapes import METRICS, READY, Scrape


def test_two_workers_answer_the_same_database_metrics(tmp_path: Path, pki, pg_factory) -> None:
    """`keystrata serve` with two uvicorn workers on PostgreSQL, over mutual TLS: every
    scrape, whichever worker answers it, shows the same database-derived values; the
    latency histogram is the answering worker's own."""
    import ssl

    import httpx

    from keystrata.loopback.processes import prepare_node

    node = prepare_node(tmp_path, pki, "station-a", "station", pg_factory())
    node.config.write_text(
        node.config.read_text().replace("[server]\n", "[server]\nworkers = 2\n", 1)
    )
    node.start(pki)
    tls = ssl.create_default_context(cafile=str(pki.ca))
    tls.load_cert_chain(str(pki.cert("ops-ada")), str(pki.key("ops-ada")))
    try:
        seen = []
        for _ in range(12):  # a new connection each time: the kernel picks the worker
            r = httpx.get(node.url + METRICS, verify=tls, timeout=10)
            assert r.status_code == 200, r.text
            assert r.headers["content-type"] == CONTENT_TYPE_PLAIN_0_0_4
            m = Scrape(r.text)
            seen.append(
                {
                    name: sorted(
                        (s.name, sorted(s.labels.items()), s.value) for s in family.samples
                    )
                    for name, family in m.families.items()
                    if "http_request" not in name and "checkpoint" not in name
                }
            )
            routes = {
                s.labels["route"]
                for s in m.families["keystrata_http_request_duration_seconds"].samples
            }
            assert routes <= {"/api/v1/node", METRICS}, routes
        assert all(s == seen[0] for s in seen)
        assert seen[0]["keystrata_build_info"][0][1] == sorted(
            {"version": __version__, "node_id": "station-a", "role": "station"}.items()
        )
        r = httpx.get(node.url + READY, verify=tls, timeout=10)
        assert r.status_code == 200 and r.json()["status"] == "ready"
    finally:
        node.stop()
    pids = {
        line.split("[")[1].split("]")[0]
        for line in node.log.read_text().splitlines()
        if "Started server process" in line
    }
    assert len(pids) == 2, "the node did not run two worker processes"


def test_two_workers_sample_the_dashboard_history_once_per_interval(
    tmp_path: Path, pki, pg_factory
) -> None:
    """The dashboard's history with two uvicorn workers on one PostgreSQL database: one
    sampler at a time (the ``dashboard-history`` lease), so samples are an interval
    apart, never two at once, and each sample holds each series of each link once."""
    import time

    from sqlalchemy import create_engine, text

    from keystrata.loopback.processes import prepare_node
    from keystrata_client import OperatorClient

    db_url = pg_factory()
    node = prepare_node(
        tmp_path,
        pki,
        "station-a",
        "station",
        db_url,
        server_extra="workers = 2\n",
        extra="\n[dashboard]\nsample_seconds = 1\n",
    )
    node.start(pki)
    try:
        with OperatorClient(node.url, pki.identity("ops-ada")) as ops:
            ops.create("nodes", {"node_id": "relay-1", "role": "relay"})
            ops.create(
                "links", {"link_id": "link-a", "relay_id": "relay-1", "station_id": "station-a"}
            )
        time.sleep(6)
    finally:
        node.stop()
    engine = create_engine(db_url)
    try:
        with engine.connect() as conn:
            rows = conn.execute(
                text(
                    "SELECT at, series, subject, count(*) FROM history_sample "
                    "GROUP BY at, series, subject ORDER BY at"
                )
            ).all()
    finally:
        engine.dispose()
    assert {r.subject for r in rows} == {"link-a"}
    assert all(r.count == 1 for r in rows), rows
    times = sorted({r.at for r in rows})
    assert len(times) >= 3, times  # about one a second for some seconds
    gaps = [(b - a).total_seconds() for a, b in itertools.pairwise(times)]
    assert min(gaps) >= 0.5, gaps  # never two samplers at once (half an interval apart)
