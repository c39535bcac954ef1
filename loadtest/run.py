"""``python -m loadtest``: build the network, fill it with pair key, run the SAE clients,
check what they got, report latencies and throughput, write a JSON summary.

Exit status: 0 when every check passed, 1 on any violation, 2 when the run could not be
set up (no PostgreSQL, a node did not start).
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import platform
import shutil
import sys
import tempfile
import time
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from keystrata.loopback.pki import PkiFiles
from keystrata.loopback.processes import NodeProcess, stop_all
from loadtest import network
from loadtest.clients import Tally, Worker, percentiles, run_clients

DEFAULT_PG = os.environ.get(
    "KEYSTRATA_TEST_PG_URL", "postgresql+psycopg://postgres@127.0.0.1:5432/postgres"
)
KEY_BITS = 256


def parse(argv: list[str] | None) -> argparse.Namespace:
    p = argparse.ArgumentParser(prog="python -m loadtest", description=__doc__)
    p.add_argument("--clients", type=int, default=64, help="concurrent SAE clients (64)")
    p.add_argument("--keys", type=int, default=20_000, help="keys to deliver at least (20000)")
    p.add_argument("--max-seconds", type=float, default=600, help="time bound of the load (600)")
    p.add_argument("--saes", type=int, default=8, help="master SAEs at A, as many slaves at B")
    p.add_argument("--number", type=int, default=1, help="keys per Get key request (1)")
    p.add_argument("--quick", action="store_true", help="8 clients, 150 keys, 60 s")
    p.add_argument("--pg-url", default=DEFAULT_PG, help="PostgreSQL server (admin database)")
    p.add_argument("--out", type=Path, default=Path("build/loadtest/summary.json"))
    p.add_argument("--workdir", type=Path, help="keep PKI, configs and logs here")
    args = p.parse_args(argv)
    if args.quick:
        args.clients, args.keys, args.max_seconds = 8, 150, 60.0
    if args.clients < 1 or args.keys < 1 or args.saes < 1 or args.number < 1:
        p.error("--clients, --keys, --saes and --number must be positive")
    return args


def _saes(count: int) -> tuple[list[str], list[str]]:
    masters = [f"sae-a{i:02d}" for i in range(1, count + 1)]
    slaves = [f"sae-b{i:02d}" for i in range(1, count + 1)]
    return masters, slaves


def _prepare(
    args: argparse.Namespace, folder: Path, dbs: network.Databases
) -> tuple[dict[str, NodeProcess], PkiFiles, dict[str, Any]]:
    masters, slaves = _saes(args.saes)
    clients = {network.OPERATOR: "operator", "mod-link-a": "qkd-module", "mod-link-b": "qkd-module"}
    clients |= dict.fromkeys(masters + slaves, "sae")
    pki = network.make_pki(folder / "pki", clients)
    urls = dbs.create(list(network.NODES))
    needed_bits = args.keys * KEY_BITS
    # Both stations keep a copy of every segment; the scheduler shares ownership between
    # them, so about half of the ready key is A's to hand out: aim for 2.5 times the need.
    buffer_bits = min(2**53, int(needed_bits * 2.5) + 8 * 1024 * 1024)
    policy = {
        "buffer_min_bits": 0,
        "buffer_target_bits": buffer_bits,
        "buffer_max_bits": buffer_bits,
    }
    saes = dict.fromkeys(masters, "station-a") | dict.fromkeys(slaves, "station-b")
    nodes = network.start(folder, pki, urls, saes, policy)
    started = time.perf_counter()
    fed = network.feed_links(nodes, pki, buffer_bits // 8 + 64 * 1024)
    want = args.keys + args.clients * args.number  # what the clients may ask for at most
    ready = 0
    deadline = time.monotonic() + 180
    while time.monotonic() < deadline:
        ready = network.ready_keys(nodes["station-a"], pki, masters[0], slaves[0])
        if ready >= want:
            break
        time.sleep(0.5)
    fill = {
        "link_bytes_fed_per_link": fed,
        "ready_keys_at_a": ready,
        "seconds": round(time.perf_counter() - started, 1),
    }
    if ready < want:
        raise RuntimeError(f"only {ready} keys of {want} became ready at station A in 180 s")
    return nodes, pki, fill


def _workers(
    args: argparse.Namespace, nodes: dict[str, NodeProcess], pki: PkiFiles
) -> list[Worker]:
    masters, slaves = _saes(args.saes)
    return [
        Worker(
            master=masters[i % args.saes],
            slave=slaves[i % args.saes],
            url_a=nodes["station-a"].url,
            url_b=nodes["station-b"].url,
            identity_a=pki.identity(masters[i % args.saes]),
            identity_b=pki.identity(slaves[i % args.saes]),
            number=args.number,
            size=KEY_BITS,
        )
        for i in range(args.clients)
    ]


def check(tally: Tally, target: int, accounting: dict[str, dict[str, int]]) -> list[str]:
    """Every violation of the run, as sentences (empty: the run passed)."""
    out = [f"{n} x {kind}" for kind, n in sorted(tally.errors.items())]
    if tally.delivered < target:
        out.append(f"only {tally.delivered} keys delivered of {target} in the time bound")
    missing = set(tally.master) - set(tally.slave)
    if missing:
        out.append(f"{len(missing)} keys handed to masters never reached their slave")
    shared = sum(n - 1 for n in tally.digests.values() if n > 1)
    if shared:
        out.append(f"{shared} keys share their bytes with another key")
    if not accounting:
        return [*out, "the stations' delivery accounting could not be read"]
    a, b = accounting["station-a"], accounting["station-b"]
    if a["to_masters"] != len(tally.master):
        out.append(
            f"station A counts {a['to_masters']} keys to masters, clients {len(tally.master)}"
        )
    if b["to_slaves"] != len(tally.slave):
        out.append(f"station B counts {b['to_slaves']} keys to slaves, clients {len(tally.slave)}")
    return out


def report(summary: dict[str, Any]) -> str:
    lines = [
        f"keys delivered     {summary['keys_delivered']} in {summary['load_seconds']} s "
        f"({summary['keys_per_second']} keys/s, {summary['requests_per_second']} requests/s)",
        f"{'call':<10} {'count':>7} {'p50 ms':>8} {'p90 ms':>8} {'p99 ms':>8} {'max ms':>8}",
    ]
    for call in ("enc_keys", "dec_keys"):
        s = summary["latency"][call]
        lines.append(
            f"{call:<10} {s['count']:>7} {s.get('p50_ms', '-'):>8} {s.get('p90_ms', '-'):>8} "
            f"{s.get('p99_ms', '-'):>8} {s.get('max_ms', '-'):>8}"
        )
    lines.append(f"documented 503    {summary['documented_503'] or 'none'}")
    lines.append(f"violations        {len(summary['violations'])}")
    lines += [f"  - {v}" for v in summary["violations"]]
    lines.append("PASS" if summary["ok"] else "FAIL")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    args = parse(argv)
    folder = args.workdir or Path(tempfile.mkdtemp(prefix="keystrata-load-"))
    folder.mkdir(parents=True, exist_ok=True)
    dbs = network.Databases(args.pg_url)
    nodes: dict[str, NodeProcess] = {}
    began = datetime.now(UTC)
    passed = False
    try:
        try:
            nodes, pki, fill = _prepare(args, folder, dbs)
        except Exception as exc:  # reported, then exit status 2
            print(f"setup failed: {exc} (files in {folder})", file=sys.stderr)
            return 2
        print(f"pair key ready: {fill}", flush=True)
        tally = Tally()
        seconds = asyncio.run(
            run_clients(_workers(args, nodes, pki), tally, args.keys, args.max_seconds)
        )
        accounting: dict[str, dict[str, int]] = {}
        try:
            accounting = {n: network.delivery_counts(nodes[n], pki) for n in network.LINKS}
        except Exception as exc:  # reported as a violation; the summary is still written
            print(f"server accounting failed: {exc}", file=sys.stderr)
        violations = check(tally, args.keys, accounting)
        requests = len(tally.enc_ms) + len(tally.dec_ms)
        summary: dict[str, Any] = {
            "started_at": began.isoformat(),
            "machine": {
                "cpus": os.cpu_count(),
                "python": platform.python_version(),
                "platform": platform.platform(),
            },
            "settings": {
                "clients": args.clients,
                "target_keys": args.keys,
                "key_bits": KEY_BITS,
                "keys_per_request": args.number,
                "master_saes": args.saes,
                "max_seconds": args.max_seconds,
                "station_workers": network.STATION_WORKERS,
                "database": "postgresql",
            },
            "fill": fill,
            "keys_delivered": tally.delivered,
            "load_seconds": round(seconds, 2),
            "keys_per_second": round(tally.delivered / seconds, 1),
            "requests_per_second": round(requests / seconds, 1),
            "latency": {
                "enc_keys": percentiles(tally.enc_ms),
                "dec_keys": percentiles(tally.dec_ms),
            },
            "documented_503": dict(tally.documented_503),
            "server_accounting": accounting,
            "violations": violations,
            "violation_examples": tally.violations[:10],
            "ok": not violations,
        }
        args.out.parent.mkdir(parents=True, exist_ok=True)
        args.out.write_text(json.dumps(summary, indent=2) + "\n")
        print(report(summary))
        print(f"summary: {args.out}")
        passed = bool(summary["ok"])
        return 0 if passed else 1
    finally:
        stop_all(nodes.values())
        dbs.drop()
        if args.workdir is None and passed:
            shutil.rmtree(folder, ignore_errors=True)
        elif not passed:
            print(f"node logs kept in {folder}", file=sys.stderr)
