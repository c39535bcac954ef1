"""``python -m bench`` (``make bench``): keystrata's figures beside their ceilings.

Families (``--only`` takes a comma-separated list of these names):

* ``etsi-sqlite``, ``etsi-postgresql`` (``etsi`` for both): ETSI GS QKD 014 Get key
  (enc_keys, 1 key of 256 bits) and Get key with key IDs (dec_keys) over mutual TLS
  from 16 concurrent clients; one uvicorn worker per node on SQLite, two on PostgreSQL.
  Ceiling: the bare endpoint of bench/ceilings.py, same server options and workers.
  Requests per second, p50 and p99 latency. ``etsi-postgresql-1``: the same with one
  worker on PostgreSQL, so the run shows what the second worker adds.
* ``ingest``: link key ingest in the binary form, 4 KiB and 64 KiB blocks, Mbit/s.
  Ceiling: the same bytes sealed (AES-256-GCM, the node's Keyring) and inserted in the
  same SQLite file, one transaction per batch, no web layer.
* ``relay``: ready pair key per second at both stations, relay and stations on
  loopback; and the relay node's peak resident memory meanwhile.
* ``demand``: a demand trace played in one process on SQLite (bench/demand.py): share of
  Get key answered 503 for lack of key, wait for key and pair key held in buffers, for
  the adaptive target and for the smallest fixed target that meets the same 503 goal.
* ``ledger-sqlite``, ``ledger-postgresql`` (``ledger`` for both): appends per second
  (one per transaction) and inclusion / consistency proof times, p50 and p99, on a
  ledger of a million entries (100,000 with ``--quick``).

Everything runs on 127.0.0.1 and cleans up after itself (temporary folder, processes,
PostgreSQL databases ``ksbench_<pid>_*``).
"""

from __future__ import annotations

import argparse
import shlex
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from bench import common, demand, etsi, ingest, ledger, loadgen, profiling, relay, report
from bench.common import REPO, Figure, Workspace, postgres_available, workspace


@dataclass(frozen=True)
class Plan:
    """How long and how much: the full run or the short smoke run."""

    warmup: float
    duration: float
    ingest_sizes: tuple[tuple[int, int], ...]
    relay_bytes: int
    relay_seconds: float
    ledger_size: int
    proof_samples: int
    append_seconds: float
    catch_up: float  # seconds station-b may take to apply allocations before dec_keys


FULL = Plan(
    warmup=2.0,
    duration=10.0,
    ingest_sizes=((4096, 256), (65536, 16)),
    relay_bytes=24 << 20,
    relay_seconds=60.0,
    ledger_size=1_000_000,
    proof_samples=1000,
    append_seconds=5.0,
    catch_up=60.0,
)
QUICK = Plan(
    warmup=0.5,
    duration=2.0,
    ingest_sizes=((4096, 256),),
    relay_bytes=4 << 20,
    relay_seconds=20.0,
    ledger_size=100_000,
    proof_samples=200,
    append_seconds=1.0,
    catch_up=10.0,
)

Runner = Callable[[Workspace, Plan], list[Figure]]
#: Where short and partial runs write their figures (build/ is not committed).
QUICK_OUT = REPO / "build" / "bench" / "results.json"


def _ingest(ws: Workspace, plan: Plan) -> list[Figure]:
    out: list[Figure] = []
    for block_bytes, per_request in plan.ingest_sizes:
        out += ingest.measure(
            ws, block_bytes, per_request, warmup=plan.warmup, duration=plan.duration
        )
    return out


FAMILIES: dict[str, tuple[bool, Runner]] = {
    # name: (needs PostgreSQL, runner)
    "etsi-sqlite": (
        False,
        lambda ws, p: etsi.measure(
            ws, "sqlite", 1, warmup=p.warmup, duration=p.duration, catch_up=p.catch_up
        ),
    ),
    "etsi-postgresql": (
        True,
        lambda ws, p: etsi.measure(
            ws, "postgresql", 2, warmup=p.warmup, duration=p.duration, catch_up=p.catch_up
        ),
    ),
    "etsi-postgresql-1": (
        True,
        lambda ws, p: etsi.measure(
            ws, "postgresql", 1, warmup=p.warmup, duration=p.duration, catch_up=p.catch_up
        ),
    ),
    "ingest": (False, _ingest),
    "relay": (
        False,
        lambda ws, p: relay.measure(ws, "sqlite", p.relay_bytes, max_seconds=p.relay_seconds),
    ),
    "demand": (False, lambda ws, p: demand.measure(ws, quick=p is QUICK)),
    "ledger-sqlite": (
        False,
        lambda ws, p: ledger.measure(
            ws, "sqlite", p.ledger_size, p.proof_samples, p.append_seconds
        ),
    ),
    "ledger-postgresql": (
        True,
        lambda ws, p: ledger.measure(
            ws, "postgresql", p.ledger_size, p.proof_samples, p.append_seconds
        ),
    ),
}
GROUPS = {
    "etsi": ["etsi-sqlite", "etsi-postgresql", "etsi-postgresql-1"],
    "ledger": ["ledger-sqlite", "ledger-postgresql"],
}


def _selected(only: str | None) -> list[str]:
    if not only:
        return list(FAMILIES)
    names: list[str] = []
    for part in only.split(","):
        part = part.strip()
        expanded = GROUPS.get(part, [part])
        for name in expanded:
            if name not in FAMILIES:
                known = ", ".join([*FAMILIES, *GROUPS])
                raise SystemExit(f"unknown benchmark {part!r}; choose from {known}")
            if name not in names:
                names.append(name)
    return names


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m bench", description=__doc__.split("\n")[0])
    parser.add_argument("--only", help="comma-separated families (default: all)")
    parser.add_argument("--quick", action="store_true", help="short smoke run (2-3 minutes)")
    parser.add_argument(
        "--out",
        type=Path,
        default=None,
        help="results file (default: bench/results.json for a full run of all families, "
        "build/bench/results.json for --quick or --only, so a short run never replaces "
        "the recorded figures)",
    )
    parser.add_argument(
        "--docs",
        type=Path,
        default=None,
        help="write this Markdown page (default: docs/benchmarks.md for a full run of all "
        "families; none for --quick or --only)",
    )
    parser.add_argument(
        "--client", choices=loadgen.ENGINES, default="raw", help="HTTP engine of the load generator"
    )
    parser.add_argument(
        "--profile",
        type=Path,
        default=None,
        metavar="DIR",
        help="record py-spy profiles of the measured processes into DIR (needs py-spy)",
    )
    parser.add_argument(
        "--sqlite-synchronous",
        choices=("FULL", "NORMAL"),
        default="FULL",
        help="SQLite durability of every node and ceiling (default FULL, as in production)",
    )
    args = parser.parse_args(argv)
    profiling.DIR = args.profile
    common.SQLITE_SYNCHRONOUS = args.sqlite_synchronous
    names = _selected(args.only)
    plan = QUICK if args.quick else FULL
    loadgen.DEFAULT_ENGINE = args.client
    full = not args.quick and not args.only
    docs = args.docs
    if docs is None and full:
        docs = REPO / "docs" / "benchmarks.md"
    out = args.out or (REPO / "bench" / "results.json" if full else QUICK_OUT)
    pg = postgres_available()
    host = report.machine()
    host["SQLite synchronous (nodes and ceilings)"] = common.SQLITE_SYNCHRONOUS
    host["load generator"] = f"{args.client} client, one process, uvloop"
    started, t0 = report.now(), time.monotonic()
    figures: list[Figure] = []
    failed: list[str] = []
    with workspace() as ws:
        for name in names:
            needs_pg, runner = FAMILIES[name]
            if needs_pg and not pg:
                print(f"-- {name}: skipped, no PostgreSQL at 127.0.0.1:5432", flush=True)
                continue
            print(f"-- {name} ...", flush=True)
            t = time.monotonic()
            try:
                got = runner(ws, plan)
            except Exception as exc:
                failed.append(name)
                print(f"-- {name}: FAILED: {type(exc).__name__}: {exc}", flush=True)
                continue
            figures += got
            print(f"-- {name}: {time.monotonic() - t:.0f} s", flush=True)
            for fig in got:
                print(f"   {fig.name}: {fig.value:.2f} {fig.unit}", flush=True)
    seconds = time.monotonic() - t0
    report.write_json(out, figures)
    print()
    print(report.table(figures))
    print()
    for line in report.target_lines(report.targets(figures)):
        print(line)
    if docs is not None:
        command = "python -m bench " + shlex.join(argv if argv is not None else sys.argv[1:])
        report.write_markdown(
            docs, figures, host, command=command.strip(), started=started, seconds=seconds
        )
        print(f"\nwrote {out} and {docs} ({seconds / 60:.1f} min)")
    else:
        print(f"\nwrote {out} ({seconds / 60:.1f} min)")
    if failed:
        print(f"failed: {', '.join(failed)}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
