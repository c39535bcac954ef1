"""`keystrata demo`: build the invented Lowmarch network, run it, show the pools."""

from __future__ import annotations

import asyncio
import os
import signal
import sys
from pathlib import Path

import click
from rich.console import Console

from keystrata.demo import scenario
from keystrata.demo.audit import audit, ledgers_table, reconciliation_table
from keystrata.demo.provision import provision
from keystrata.demo.run import Run
from keystrata.demo.run import run as live_run
from keystrata.demo.stopping import StopNow, Stopper
from keystrata.demo.verify import check_network
from keystrata.demo.view import ObservedRates, Snapshot, screen
from keystrata.demo.workdir import (
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

# A terminal gives its own size, and so does COLUMNS; a file or a pipe gets every column.
console = Console(width=None if sys.stdout.isatty() or "COLUMNS" in os.environ else 140)

#: Seconds each node gets to answer after it was started.
START_TIMEOUT = 30.0


def _nodes(workdir: Path) -> list[DemoNode]:
    ids = [(scenario.RELAY, "relay")] + [(s.node_id, "station") for s in scenario.STATIONS]
    ports = free_ports(len(ids))
    return [
        DemoNode(node_id=n, role=r, port=p, config=workdir / n / "node.toml")
        for (n, r), p in zip(ids, ports, strict=True)
    ]


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
    help="Folder for the PKI, configs, databases, logs, network.toml, demo.json and "
    "encryptors.toml.",
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
        run = asyncio.run(live_run(console, workdir, nodes, procs, duration, stopper))
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
