"""`keystrata demo`: build the invented Lowmarch network, run it, show the pools."""

from __future__ import annotations

import asyncio
import contextlib
import os
import signal
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

import click
from rich.console import Console
from rich.live import Live

from keystrata.demo import scenario
from keystrata.demo.audit import audit, ledgers_table, reconciliation_table
from keystrata.demo.provision import operator_identity, provision
from keystrata.demo.stopping import StopNow, Stopper
from keystrata.demo.verify import check_network
from keystrata.demo.view import ObservedRates, Snapshot, screen
from keystrata.demo.workdir import (
    ENCRYPTORS,
    DemoNode,
    build_pki,
    init_databases,
    prepare_folder,
    write_configs,
    write_encryptor_config,
    write_manifest,
)
from keystrata.loopback.pki import PkiFiles
from keystrata.loopback.processes import NodeProcess, free_ports, stop_all
from keystrata_client import OperatorClient, TlsIdentity
from keystrata_client.emulators import LinkEmulator, LinkSpec, LinkStats, PhysicalProfile
from keystrata_client.emulators.encryptor_cli import build_emulator
from keystrata_client.emulators.encryptor_config import load_encryptor_config
from keystrata_client.emulators.encryptors import EncryptorEmulator, PairStats
from keystrata_physics.optics import LinkOptics, Platform, StationSky, from_mapping

# A terminal gives its own size, and so does COLUMNS; a file or a pipe gets every column.
console = Console(width=None if sys.stdout.isatty() or "COLUMNS" in os.environ else 140)
#: What the live screen says about stopping, and what the summary reports after it.
STOP_HINT = "Ctrl-C stops, audits and exits"

#: Seconds each node gets to answer after it was started.
START_TIMEOUT = 30.0
#: Emulated sky: one day every two minutes, starting at dusk.
TIME_SCALE = 720.0
SKY_START = datetime(2026, 6, 21, 17, 0, tzinfo=UTC)


def _nodes(workdir: Path) -> list[DemoNode]:
    ids = [(scenario.RELAY, "relay")] + [(s.node_id, "station") for s in scenario.STATIONS]
    ports = free_ports(len(ids))
    return [
        DemoNode(node_id=n, role=r, port=p, config=workdir / n / "node.toml")
        for (n, r), p in zip(ids, ports, strict=True)
    ]


def _link_specs(workdir: Path, nodes: list[DemoNode]) -> list[LinkSpec]:
    url = {n.node_id: n.url for n in nodes}
    specs = []
    for i, st in enumerate(scenario.STATIONS):
        ident = TlsIdentity(
            ca=workdir / "pki/ca.crt",
            cert=workdir / f"pki/{st.module}.crt",
            key=workdir / f"pki/{st.module}.key",
        )
        specs.append(
            LinkSpec(
                link_id=st.link_id,
                relay_url=url[scenario.RELAY],
                station_url=url[st.node_id],
                relay_identity=ident,
                station_identity=ident,
                seed=11 + i,
                block_bytes=4096,
                model=PhysicalProfile(
                    optics=from_mapping(LinkOptics, st.optics),
                    platform=from_mapping(Platform, scenario.PLATFORM),
                    station=from_mapping(StationSky, st.physical),
                ),
            )
        )
    return specs


def _read_nodes(
    nodes: list[DemoNode], identity: TlsIdentity, procs: list[NodeProcess], elapsed: float
) -> Snapshot:
    """Pool levels and pair buffers, as an operator reads them from each node."""
    snap = Snapshot(pools={}, elapsed=elapsed, dead=[p.node_id for p in procs if not p.running])
    for node in nodes:
        try:
            with OperatorClient(node.url, identity, timeout=3.0) as client:
                for pool in client.pools()["pools"]:
                    snap.pools[(node.node_id, pool["link_id"])] = pool
                pairs = client.pairs()["pairs"]
        except Exception:  # noqa: S112 - a node that does not answer shows as "-"
            continue
        if node.role == "relay":
            snap.relay_pairs = pairs
        else:
            snap.station_pairs[node.node_id] = pairs
    return snap


def _headline(
    stats: dict[str, LinkStats], elapsed: float, duration: float | None, stopping: bool
) -> str:
    if stopping:
        return (
            f"{scenario.ORGANISATION}: stopping; the emulators drain, then every ledger "
            "is audited (Ctrl-C again stops at once)"
        )
    sky = next((s.emulated_at for s in stats.values() if s.emulated_at), None)
    clock = f"sky over Lowmarch {sky:%H:%M}" if sky else "starting"
    left = f"; {duration - elapsed:.0f} s left" if duration is not None else ""
    return f"{scenario.ORGANISATION}: {clock}{left}; {STOP_HINT}"


@dataclass
class Run:
    """How the run went: the final levels, the emulators' counts, how it ended."""

    snap: Snapshot
    links: dict[str, LinkStats]
    encryptors: dict[str, PairStats]
    elapsed: float
    #: The signal that stopped the load, or None when ``--duration`` ended it (or a
    #: node stopped: ``snap.dead``).
    stopped_by: int | None


async def _watch(
    emulator: LinkEmulator,
    encryptors: EncryptorEmulator,
    procs: list[NodeProcess],
    nodes: list[DemoNode],
    duration: float | None,
    live: Live | None,
    identity: TlsIdentity,
    stopping: asyncio.Event,
    stop: Callable[[], None],
) -> None:
    """Show the screen every second (every five without a terminal) until cancelled;
    stop the load when ``duration`` is over or a node stopped."""
    started = time.monotonic()
    last_print = -5.0
    observed = ObservedRates()

    def show(snap: Snapshot, elapsed: float, *, now: bool = False) -> None:
        nonlocal last_print
        headline = _headline(emulator.stats, elapsed, duration, stopping.is_set())
        view = screen(headline, snap, emulator.stats, encryptors.stats, observed)
        if live is not None:
            live.update(view, refresh=now)
        elif now or elapsed - last_print >= 5.0:  # without a terminal: every 5 s
            console.print(view)
            last_print = elapsed

    while True:
        elapsed = time.monotonic() - started
        snap = await asyncio.to_thread(_read_nodes, nodes, identity, procs, elapsed)
        observed.add(snap)
        show(snap, elapsed)
        if snap.dead or (duration is not None and elapsed >= duration):
            stop()
        if stopping.is_set():
            await asyncio.sleep(1.0)
            continue
        with contextlib.suppress(TimeoutError):
            await asyncio.wait_for(stopping.wait(), 1.0)
        if stopping.is_set():  # say at once that the demo is stopping
            show(snap, time.monotonic() - started, now=True)


async def _run(
    workdir: Path,
    nodes: list[DemoNode],
    procs: list[NodeProcess],
    duration: float | None,
    stopper: Stopper,
) -> Run:
    """Run the link and encryptor emulators under the live screen until ``duration``
    is over, a node stops or a signal comes; then let both drain and read the levels."""
    identity = operator_identity(workdir)
    emulator = LinkEmulator(
        _link_specs(workdir, nodes),
        time_scale=TIME_SCALE,
        start=SKY_START.timestamp(),
        drain_seconds=5.0,
    )
    # The demo's encryptors run from the file it wrote for people to reuse.
    encryptors = build_emulator(load_encryptor_config(workdir / ENCRYPTORS))
    stopping = asyncio.Event()

    def stop() -> None:
        stopper.load_stopped()
        stopping.set()
        emulator.stop()
        encryptors.stop()

    started = time.monotonic()
    stopper.load_started(asyncio.get_running_loop(), stop)
    emulating = asyncio.create_task(emulator.run())
    rekeying = asyncio.create_task(encryptors.run())
    live = Live(console=console, refresh_per_second=2) if sys.stdout.isatty() else None
    watching: asyncio.Task[None] | None = None
    try:
        if live is not None:
            live.start()
        watching = asyncio.create_task(
            _watch(emulator, encryptors, procs, nodes, duration, live, identity, stopping, stop)
        )
        # Both emulators run until stop() and drain after it; the screen stays live.
        link_stats, enc_stats = await asyncio.gather(emulating, rekeying)
        elapsed = time.monotonic() - started
    finally:
        stop()
        if watching is not None:
            watching.cancel()
        if live is not None:
            live.stop()
    # After the emulator drained its queues, both ends of each link must agree.
    snap = await asyncio.to_thread(_read_nodes, nodes, identity, procs, elapsed)
    return Run(snap, link_stats, enc_stats, elapsed, stopper.stopped_by)


def _disagreements(snap: Snapshot) -> list[str]:
    out = []
    for st in scenario.STATIONS:
        relay = snap.pools.get((scenario.RELAY, st.link_id), {}).get("bits_received")
        station = snap.pools.get((st.node_id, st.link_id), {}).get("bits_received")
        if relay is None or station is None or relay != station:
            out.append(f"{st.link_id}: relay holds {relay} bits, station {station}")
    return out


@click.command("demo")
@click.option(
    "--duration",
    type=click.FloatRange(min=1),
    default=None,
    metavar="SECONDS",
    help="run this long, then audit, print a summary and exit (default: until Ctrl-C, "
    "which does the same)",
)
@click.option(
    "--workdir",
    type=click.Path(file_okay=False, path_type=Path),
    default=Path("demo-work"),
    show_default=True,
    help="folder for PKI, configs, databases, logs, demo.json and encryptors.toml",
)
def demo(duration: float | None, workdir: Path) -> None:
    """Run one relay and three stations on loopback, fed by emulated QKD links and
    used by emulated encryptors.

    The first Ctrl-C (or SIGTERM) stops the load; the demo then drains the emulators,
    audits every ledger, prints its summary and stops the nodes, as at the end of
    --duration. A second Ctrl-C stops it at once (exit status 128 + the signal's
    number)."""
    workdir = workdir.resolve()
    try:
        prepare_folder(workdir)
    except ValueError as exc:
        raise click.ClickException(str(exc)) from None
    stopper = Stopper()
    stopper.install()
    try:
        _demo(workdir, duration, stopper)
    except StopNow as stop:
        console.print(
            f"[yellow]stopped at once[/yellow] ({_signal_name(stop.signum)}): the nodes "
            f"are stopped; no summary. Their logs are in {workdir / 'logs'}."
        )
        sys.exit(128 + stop.signum)


def _demo(workdir: Path, duration: float | None, stopper: Stopper) -> None:
    nodes = _nodes(workdir)
    procs = [
        NodeProcess(
            n.node_id, n.config, n.port, workdir / "logs" / f"{n.node_id}.log", START_TIMEOUT
        )
        for n in nodes
    ]
    try:
        with console.status("creating the network CA and certificates") as status:
            pki = build_pki(workdir, nodes)
            status.update("writing node configs and key-encryption keys")
            write_configs(workdir, nodes)
            status.update("initialising node databases")
            init_databases(nodes)
            manifest = write_manifest(workdir, nodes)
            encryptors = write_encryptor_config(workdir, nodes)
            status.update("starting nodes")
            for proc in procs:
                proc.launch()
        with console.status("waiting for the nodes to answer"):
            _wait_ready(procs, pki)
        with console.status("provisioning links, pairs and principals"):
            sent = provision(workdir, nodes)
        _intro(workdir, nodes, manifest, encryptors, sent)
        run = asyncio.run(_run(workdir, nodes, procs, duration, stopper))
        with console.status("exporting, verifying and reconciling every ledger as an auditor"):
            audited = audit(workdir, nodes)
    finally:
        with stopper.ignoring(), console.status("stopping the nodes"):
            stop_all(procs)
    console.print(
        screen(
            "final levels (emulators drained)", run.snap, run.links, run.encryptors, ObservedRates()
        )
    )
    console.print(ledgers_table(audited))
    console.print(reconciliation_table(audited))
    with console.status("checking every relay record and segment in the node databases"):
        check = check_network(
            nodes[0].config, {n.node_id: n.config for n in nodes if n.role == "station"}
        )
    console.print(_ending(run, workdir))
    problems = [f"node {n} stopped unexpectedly" for n in run.snap.dead]
    problems += _disagreements(run.snap) + check.problems + audited.problems
    problems += [
        f"encryptors {name}: {st.mismatches} keys differ between the two ends"
        for name, st in run.encryptors.items()
        if st.mismatches
    ]
    if problems:
        for p in problems:
            console.print(f"[red]problem:[/red] {p}")
        sys.exit(1)
    total = sum(s.bits_generated for s in run.links.values())
    console.print(
        f"[green]ok:[/green] {total:,} bits of link key reached both ends of "
        f"{len(run.links)} QKD links alike; {check.relay_ops} relay operations used no link "
        f"byte twice; {check.segments_ready_both} segments are ready at both stations of "
        "their pair, byte-identical; "
        f"{sum(st.keys_delivered for st in run.encryptors.values()):,} keys reached both "
        f"encryptors of {len(run.encryptors)} encryptor pairs, all matching; "
        f"{len(audited.reports)} ledgers verify offline (exports in {workdir / 'audit'}) "
        "and every pair reconciles."
    )


def _signal_name(signum: int) -> str:
    return "Ctrl-C" if signum == signal.SIGINT else signal.Signals(signum).name


def _ending(run: Run, workdir: Path) -> str:
    """How the run ended, in one sentence: what was stopped, drained and audited."""
    how = (
        f"ran {run.elapsed:.0f} s"
        if run.stopped_by is None
        else f"stopped by {_signal_name(run.stopped_by)} after {run.elapsed:.0f} s"
    )
    return (
        f"{how}: the emulators drained, every ledger was exported to {workdir / 'audit'} "
        "and checked, and the nodes are stopped (logs, databases and configs stay in "
        f"{workdir})."
    )


def _wait_ready(procs: list[NodeProcess], pki: PkiFiles) -> None:
    """Wait until every node answers the operator.

    Raises:
        RuntimeError: a node exited or did not answer in time (its log says why).
    """
    for proc in procs:
        proc.start(pki, client=scenario.OPERATOR)


def _intro(
    workdir: Path, nodes: list[DemoNode], manifest: Path, encryptors: Path, sent: int
) -> None:
    console.print(f"[bold]{scenario.ORGANISATION}[/bold] demo in {workdir}")
    for n in nodes:
        console.print(f"  {n.role:8} {n.node_id:10} {n.url}")
    console.print(f"  {sent} registry entries provisioned; manifest: {manifest}")
    console.print(
        f"  encryptor pairs: {encryptors}; more of them, from another shell:\n"
        f"    keystrata-encryptors --config {encryptors} --rekeys 20",
        soft_wrap=True,
    )
    op = f"pki/{scenario.OPERATOR}"
    console.print(
        f"  try: cd {workdir} && curl --cacert pki/ca.crt --cert {op}.crt "
        f"--key {op}.key {nodes[0].url}/api/v1/links/pools",
        soft_wrap=True,
    )
