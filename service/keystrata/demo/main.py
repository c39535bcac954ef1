"""`keystrata demo`: build the invented Lowmarch network, run it, show the pools."""

from __future__ import annotations

import asyncio
import signal
import sys
import time
from datetime import UTC, datetime
from pathlib import Path

import click
from rich.console import Console, Group
from rich.live import Live

from keystrata.demo import scenario
from keystrata.demo.audit import audit, ledgers_table, reconciliation_table
from keystrata.demo.provision import operator_identity, provision
from keystrata.demo.verify import check_network
from keystrata.demo.view import (
    ObservedRates,
    Snapshot,
    encryptors_table,
    links_table,
    pairs_table,
)
from keystrata.demo.workdir import (
    DemoNode,
    build_pki,
    init_databases,
    prepare_folder,
    write_configs,
    write_manifest,
)
from keystrata.loopback.pki import PkiFiles
from keystrata.loopback.processes import NodeProcess, free_ports, stop_all
from keystrata_client import OperatorClient, TlsIdentity
from keystrata_client.emulators import LinkEmulator, LinkSpec, LinkStats, PhysicalProfile
from keystrata_client.emulators.encryptors import (
    EncryptorEmulator,
    EncryptorPairSpec,
    PairStats,
)
from keystrata_physics.optics import LinkOptics, Platform, StationSky, from_mapping

# Wide enough for the pool table when the output goes to a file or a pipe.
console = Console(width=None if sys.stdout.isatty() else 140)

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


def _view(
    snap: Snapshot,
    stats: dict[str, LinkStats],
    enc: dict[str, PairStats],
    title: str,
    observed: ObservedRates,
) -> Group:
    return Group(
        encryptors_table(enc),
        links_table(snap, stats, title, observed),
        pairs_table(snap.relay_pairs, snap.station_pairs),
    )


async def _watch(
    emulator: LinkEmulator,
    encryptors: EncryptorEmulator,
    procs: list[NodeProcess],
    nodes: list[DemoNode],
    identity: TlsIdentity,
    duration: float | None,
    live: Live | None,
) -> Snapshot:
    started = time.monotonic()
    last_print = 0.0
    snap = Snapshot(pools={}, elapsed=0.0, dead=[])
    observed = ObservedRates()
    while True:
        elapsed = time.monotonic() - started
        snap = await asyncio.to_thread(_read_nodes, nodes, identity, procs, elapsed)
        observed.add(snap)
        title = _title(emulator.stats, elapsed, duration)
        view = _view(snap, emulator.stats, encryptors.stats, title, observed)
        if live is not None:
            live.update(view)
        elif elapsed - last_print >= 5.0:
            console.print(view)
            last_print = elapsed
        if snap.dead:
            return snap
        if duration is not None and elapsed >= duration:
            return snap
        await asyncio.sleep(1.0)


def _title(stats: dict[str, LinkStats], elapsed: float, duration: float | None) -> str:
    sky = next((s.emulated_at for s in stats.values() if s.emulated_at), None)
    clock = f"sky over Lowmarch {sky:%H:%M}" if sky else "starting"
    left = f", {duration - elapsed:.0f} s left" if duration is not None else ", Ctrl-C stops"
    return f"{scenario.ORGANISATION}: link key pools ({clock}{left})"


def _encryptor_specs(workdir: Path, nodes: list[DemoNode]) -> list[EncryptorPairSpec]:
    """For each station pair, one encryptor pair each way (first SAE of A to first SAE
    of B, second SAE of B to second SAE of A)."""
    url = {n.node_id: n.url for n in nodes}

    def ident(sae: str) -> TlsIdentity:
        return TlsIdentity(
            ca=workdir / "pki/ca.crt",
            cert=workdir / f"pki/{sae}.crt",
            key=workdir / f"pki/{sae}.key",
        )

    specs = []
    for a, b in scenario.PAIRS:
        sa, sb = scenario.station(a), scenario.station(b)
        for master, slave, m_at, s_at in (
            (sa.saes[0], sb.saes[0], a, b),
            (sb.saes[1], sa.saes[1], b, a),
        ):
            specs.append(
                EncryptorPairSpec(
                    name=f"{master} -> {slave}",
                    master_sae_id=master,
                    slave_sae_id=slave,
                    master_url=url[m_at],
                    slave_url=url[s_at],
                    master_identity=ident(master),
                    slave_identity=ident(slave),
                    key_size_bits=256,
                    keys_per_rekey=2,
                    interval_seconds=1.0,
                )
            )
    return specs


async def _run(
    workdir: Path, nodes: list[DemoNode], procs: list[NodeProcess], duration: float | None
) -> tuple[Snapshot, dict[str, LinkStats], dict[str, PairStats]]:
    identity = operator_identity(workdir)
    emulator = LinkEmulator(
        _link_specs(workdir, nodes),
        time_scale=TIME_SCALE,
        start=SKY_START.timestamp(),
        drain_seconds=5.0,
    )
    encryptors = EncryptorEmulator(_encryptor_specs(workdir, nodes))

    def stop() -> None:
        emulator.stop()
        encryptors.stop()

    loop = asyncio.get_running_loop()
    for sig in (signal.SIGINT, signal.SIGTERM):
        loop.add_signal_handler(sig, stop)
    emulating = asyncio.create_task(emulator.run())
    rekeying = asyncio.create_task(encryptors.run())
    live = Live(console=console, refresh_per_second=2) if sys.stdout.isatty() else None
    try:
        if live is not None:
            live.start()
        watching = asyncio.create_task(
            _watch(emulator, encryptors, procs, nodes, identity, duration, live)
        )
        await asyncio.wait({emulating, watching}, return_when=asyncio.FIRST_COMPLETED)
    finally:
        watching.cancel()
        stop()
        link_stats = await emulating
        enc_stats = await rekeying
        if live is not None:
            live.stop()
    # After the emulator drained its queues, both ends of each link must agree.
    snap = await asyncio.to_thread(_read_nodes, nodes, identity, procs, 0.0)
    return snap, link_stats, enc_stats


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
    help="run this long, print a summary and exit (default: until Ctrl-C)",
)
@click.option(
    "--workdir",
    type=click.Path(file_okay=False, path_type=Path),
    default=Path("demo-work"),
    show_default=True,
    help="folder for PKI, configs, databases, logs and demo.json",
)
def demo(duration: float | None, workdir: Path) -> None:
    """Run one relay and three stations on loopback, fed by emulated QKD links."""
    workdir = workdir.resolve()
    try:
        prepare_folder(workdir)
    except ValueError as exc:
        raise click.ClickException(str(exc)) from None
    nodes = _nodes(workdir)
    procs = [
        NodeProcess(
            n.node_id, n.config, n.port, workdir / "logs" / f"{n.node_id}.log", START_TIMEOUT
        )
        for n in nodes
    ]
    with console.status("creating the network CA and certificates") as status:
        pki = build_pki(workdir, nodes)
        status.update("writing node configs and key-encryption keys")
        write_configs(workdir, nodes)
        status.update("initialising node databases")
        init_databases(nodes)
        manifest = write_manifest(workdir, nodes)
        status.update("starting nodes")
        for proc in procs:
            proc.launch()
    try:
        with console.status("waiting for the nodes to answer"):
            _wait_ready(procs, pki)
        with console.status("provisioning links, pairs and principals"):
            sent = provision(workdir, nodes)
        _intro(workdir, nodes, manifest, sent)
        snap, stats, enc = asyncio.run(_run(workdir, nodes, procs, duration))
        with console.status("exporting, verifying and reconciling every ledger as an auditor"):
            audited = audit(workdir, nodes)
    finally:
        stop_all(procs)
    console.print(_view(snap, stats, enc, "final levels (emulator drained)", ObservedRates()))
    console.print(ledgers_table(audited))
    console.print(reconciliation_table(audited))
    with console.status("checking every relay record and segment in the node databases"):
        check = check_network(
            nodes[0].config, {n.node_id: n.config for n in nodes if n.role == "station"}
        )
    problems = [f"node {n} stopped unexpectedly" for n in snap.dead] + _disagreements(snap)
    problems += check.problems + audited.problems
    problems += [
        f"encryptors {name}: {st.mismatches} keys differ between the two ends"
        for name, st in enc.items()
        if st.mismatches
    ]
    if problems:
        for p in problems:
            console.print(f"[red]problem:[/red] {p}")
        sys.exit(1)
    total = sum(s.bits_generated for s in stats.values())
    console.print(
        f"[green]ok:[/green] {total:,} bits of link key reached both ends of {len(stats)} "
        f"QKD links alike; {check.relay_ops} relay operations used no link byte twice; "
        f"{check.segments_ready_both} segments are ready at both stations of their pair, "
        "byte-identical; "
        f"{sum(st.keys_delivered for st in enc.values()):,} keys reached both encryptors of "
        f"{len(enc)} encryptor pairs, all matching; {len(audited.reports)} ledgers verify "
        f"offline (exports in {workdir / 'audit'}) and every pair reconciles."
    )


def _wait_ready(procs: list[NodeProcess], pki: PkiFiles) -> None:
    """Wait until every node answers the operator.

    Raises:
        RuntimeError: a node exited or did not answer in time (its log says why).
    """
    for proc in procs:
        proc.start(pki, client=scenario.OPERATOR)


def _intro(workdir: Path, nodes: list[DemoNode], manifest: Path, sent: int) -> None:
    console.print(f"[bold]{scenario.ORGANISATION}[/bold] demo in {workdir}")
    for n in nodes:
        console.print(f"  {n.role:8} {n.node_id:10} {n.url}")
    console.print(f"  {sent} registry entries provisioned; manifest: {manifest}")
    op = f"pki/{scenario.OPERATOR}"
    console.print(
        f"  try: cd {workdir} && curl --cacert pki/ca.crt --cert {op}.crt "
        f"--key {op}.key {nodes[0].url}/api/v1/links/pools",
        soft_wrap=True,
    )
