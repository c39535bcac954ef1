"""The demo's live run: the link emulator (the Lowmarch sky on the link model) and the
encryptor emulator under the live screen, until ``--duration`` is over, a node stops or
a signal comes; then both drain (``stopping.py`` says how signals stop it)."""

from __future__ import annotations

import asyncio
import contextlib
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

from rich.console import Console
from rich.live import Live

from keystrata.demo import scenario
from keystrata.demo.provision import operator_identity
from keystrata.demo.stopping import Stopper
from keystrata.demo.view import ObservedRates, Snapshot, screen
from keystrata.demo.workdir import ENCRYPTORS, DemoNode
from keystrata.loopback.processes import NodeProcess
from keystrata_client import OperatorClient, TlsIdentity
from keystrata_client.emulators import LinkEmulator, LinkSpec, LinkStats, PhysicalProfile
from keystrata_client.emulators.encryptor_cli import build_emulator
from keystrata_client.emulators.encryptor_config import load_encryptor_config
from keystrata_client.emulators.encryptors import EncryptorEmulator, PairStats
from keystrata_physics.optics import LinkOptics, Platform, StationSky, from_mapping

#: What the live screen says about stopping; the summary reports what it did.
STOP_HINT = "Ctrl-C stops, audits and exits"
#: Emulated sky: one day every two minutes, starting at dusk.
TIME_SCALE = 720.0
SKY_START = datetime(2026, 6, 21, 17, 0, tzinfo=UTC)


def link_specs(workdir: Path, nodes: list[DemoNode]) -> list[LinkSpec]:
    """The link emulator's spec of every demo link: the link model of its optics, the
    platform and the station's sky, and the QKD module certificate of the link."""
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


def read_nodes(
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
    console: Console,
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

    announced = False  # the stopping headline has been shown

    def show(snap: Snapshot, elapsed: float) -> None:
        nonlocal last_print, announced
        # The first screen after the stop is drawn at once, whenever the stop came.
        now = stopping.is_set() and not announced
        announced = announced or now
        headline = _headline(emulator.stats, elapsed, duration, stopping.is_set())
        view = screen(headline, snap, emulator.stats, encryptors.stats, observed)
        if live is not None:
            live.update(view, refresh=now)
        elif now or elapsed - last_print >= 5.0:  # without a terminal: every 5 s
            console.print(view)
            last_print = elapsed

    while True:
        elapsed = time.monotonic() - started
        snap = await asyncio.to_thread(read_nodes, nodes, identity, procs, elapsed)
        observed.add(snap)
        show(snap, elapsed)
        if snap.dead or (duration is not None and elapsed >= duration):
            stop()
        if stopping.is_set():
            await asyncio.sleep(1.0)
            continue
        with contextlib.suppress(TimeoutError):
            await asyncio.wait_for(stopping.wait(), 1.0)
        if stopping.is_set():
            show(snap, time.monotonic() - started)


async def run(
    console: Console,
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
        link_specs(workdir, nodes),
        time_scale=TIME_SCALE,
        start=SKY_START.timestamp(),
        drain_seconds=5.0,
    )
    # The demo's encryptors run from the file it wrote for people to reuse.
    encryptors = build_emulator(load_encryptor_config(workdir / ENCRYPTORS))
    stopping = asyncio.Event()

    started = time.monotonic()
    stopped_at: list[float] = []

    def stop() -> None:
        if not stopped_at:
            stopped_at.append(time.monotonic())
        stopper.load_stopped()
        stopping.set()
        emulator.stop()
        encryptors.stop()

    stopper.load_started(asyncio.get_running_loop(), stop)
    emulating = asyncio.create_task(emulator.run())
    rekeying = asyncio.create_task(encryptors.run())
    live = Live(console=console, refresh_per_second=2) if sys.stdout.isatty() else None
    watching: asyncio.Task[None] | None = None
    try:
        if live is not None:
            live.start()
        watching = asyncio.create_task(
            _watch(
                console,
                emulator,
                encryptors,
                procs,
                nodes,
                duration,
                live,
                identity,
                stopping,
                stop,
            )
        )
        # Both emulators run until stop() and drain after it; the screen stays live.
        link_stats, enc_stats = await asyncio.gather(emulating, rekeying)
        elapsed = (stopped_at or [time.monotonic()])[0] - started  # load, not the drain
    finally:
        stop()
        if watching is not None:
            watching.cancel()
        if live is not None:
            live.stop()
    # After the emulator drained its queues, both ends of each link must agree.
    snap = await asyncio.to_thread(read_nodes, nodes, identity, procs, elapsed)
    return Run(snap, link_stats, enc_stats, elapsed, stopper.stopped_by)
