"""Demand trace: the relay's adaptive buffer target against a fixed-target baseline.

One relay and two stations run in one process on SQLite (``keystrata.loopback.
inprocess``): the service's own Get key, buffer reports, scheduler, relay operations and
confirmations, with a clock stepped one scheduler cycle at a time. Link key arrives at a
steady rate on both links except for a cloud spell; the encryptors' demand follows a
trace: both sides, then one side triples (the morning step), then the demand moves to
the other side, then stops. Keys a request could not get (503, not enough key) are asked
for again at the next cycle, so the trace also measures how long an encryptor waits.

Modes:

* ``adaptive``: the pair's target follows measured consumption (``horizon_seconds`` of
  it, within the policy's bounds; the policy default before anything was consumed).
* ``fixed``: the target is a constant (``buffer_min_bits = buffer_target_bits =
  buffer_max_bits``). The baseline is the smallest constant of a doubling sweep that
  meets the same goal of at most 0.1 % of requests answered 503 for lack of key (or the
  largest tried).

Figures: per mode the share of Get key requests answered 503 for lack of key, the mean
and p99 wait for key (seconds), and the pair key held in buffers (bits, time average of
the larger of the two stations' ready key); and the adaptive buffer as a ratio of the
baseline's.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta

from bench.common import Figure, Workspace
from keystrata.delivery import enc_keys
from keystrata.delivery.schemas import KeyRequest
from keystrata.errors import NotEnoughKey
from keystrata.loopback import inprocess
from keystrata.registry.principals import Caller
from keystrata.registry.specs import PrincipalRole
from keystrata.relay import buffers, scheduler

#: Seconds per step: one scheduler cycle, one report, one round of requests.
STEP = 10
KEY_BITS = 256
KEYS_PER_REQUEST = 16
#: The 503 goal both modes are held to.
GOAL = 0.001
#: Link key per link per step: 12 KiB, about 9.8 kbit/s, twice the trace's peak demand.
SUPPLY_BYTES = 3 * 4096
#: Seconds of measured consumption the adaptive target holds: two settings.
HORIZONS = (60.0, 300.0)
WINDOW = 60  # [ingest] rate_window_seconds at the stations
DEFAULT_TARGET = 64_000


@dataclass(frozen=True)
class Phase:
    minutes: float
    bps_a: float  # demand of station-a's masters (Get key at station-a)
    bps_b: float
    supply: bool = True  # False: a cloud spell, no link key on either link


#: The trace: 80 minutes (20 with ``--quick``: every phase a quarter as long).
TRACE = (
    Phase(10, 0, 0),
    Phase(15, 1000, 1000),
    Phase(10, 3000, 1000),
    Phase(5, 3000, 1000, supply=False),
    Phase(15, 0, 3000),
    Phase(15, 0, 0),
    Phase(10, 1000, 0),
)


@dataclass
class Outcome:
    requests: int = 0
    refused: int = 0
    waits: list[float] = field(default_factory=list)
    held: list[int] = field(default_factory=list)

    @property
    def refused_share(self) -> float:
        return self.refused / self.requests if self.requests else 0.0

    @property
    def mean_held(self) -> float:
        return sum(self.held) / len(self.held) if self.held else 0.0

    def wait(self, q: float) -> float:
        if not self.waits:
            return 0.0
        ordered = sorted(self.waits)
        return ordered[min(len(ordered) - 1, math.ceil(q * len(ordered)) - 1)]


class _Clock:
    def __init__(self) -> None:
        self.at = datetime.now(UTC)

    def now(self) -> datetime:
        return self.at


SAE = {"station-a": ("sae-a1", "sae-b1"), "station-b": ("sae-b1", "sae-a1")}


def _build(
    ws: Workspace, clock: _Clock, policy: dict[str, int], horizon: float
) -> inprocess.InProcessNetwork:
    return inprocess.build(
        ws.folder("demand"),
        ws.pki,
        clock=clock,
        policy=policy,
        extra={
            "relay-1": f"[relay]\nhorizon_seconds = {horizon}\n"
            "segment_bytes = 8192\nmin_segment_bytes = 1024\n"
            f"[ingest]\nrate_window_seconds = {WINDOW}\n",
            "station-a": f"[ingest]\nrate_window_seconds = {WINDOW}\n",
            "station-b": f"[ingest]\nrate_window_seconds = {WINDOW}\n",
        },
    )


def run(ws: Workspace, policy: dict[str, int], scale: float, horizon: float = 300.0) -> Outcome:
    """Play the trace once under ``policy`` (``horizon``: the relay's horizon_seconds)."""
    clock = _Clock()
    # The nodes trade durability for speed on purpose; their start-up warning says so
    # once per node and run, which here is noise.
    node_log = logging.getLogger("keystrata.node")
    level = node_log.level
    node_log.setLevel(logging.ERROR)
    try:
        net = _build(ws, clock, policy, horizon)
    finally:
        node_log.setLevel(level)
    out = Outcome()
    owed = {"station-a": 0.0, "station-b": 0.0}  # keys due and not yet served
    queue: dict[str, list[float]] = {"station-a": [], "station-b": []}  # due times
    try:
        t = 0.0
        for phase in TRACE:
            for _ in range(max(1, round(phase.minutes * scale * 60 / STEP))):
                if phase.supply:
                    for station in ("station-a", "station-b"):
                        net.feed(station, SUPPLY_BYTES)
                net.report_buffers()
                scheduler.schedule_once(net.relay, None)
                net.carry()
                for station, bps in (("station-a", phase.bps_a), ("station-b", phase.bps_b)):
                    owed[station] += bps * STEP / KEY_BITS
                    due = int(owed[station])
                    owed[station] -= due
                    queue[station] += [t] * due
                    _serve(net, station, queue[station], t, out)
                net.carry()
                net.report_buffers()
                out.held.append(_held(net))
                t += STEP
                clock.at += timedelta(seconds=STEP)
        # Keys still owed at the end have waited until then at least.
        out.waits += [t - due for station in queue for due in queue[station]]
    finally:
        net.close()
    return out


def _serve(
    net: inprocess.InProcessNetwork, station: str, queue: list[float], t: float, out: Outcome
) -> None:
    master, slave = SAE[station]
    caller = Caller(principal_id=master, role=PrincipalRole.SAE, station_id=station)
    while queue:
        number = min(KEYS_PER_REQUEST, len(queue))
        out.requests += 1
        try:
            enc_keys.get_keys(
                net.nodes[station], caller, slave, KeyRequest(number=number, size=KEY_BITS)
            )
        except NotEnoughKey:
            out.refused += 1
            return  # the encryptor asks again at the next cycle
        out.waits += [t - due for due in queue[:number]]
        del queue[:number]


def _held(net: inprocess.InProcessNetwork) -> int:
    (view,) = buffers.relay_view(net.relay)
    return max(int(side["ready_bits"] or 0) for side in view.sides)


def fixed_policy(bits: int) -> dict[str, int]:
    return {"buffer_min_bits": bits, "buffer_target_bits": bits, "buffer_max_bits": bits}


def measure(ws: Workspace, *, quick: bool) -> list[Figure]:
    scale = 0.25 if quick else 0.5
    note = f"trace {sum(p.minutes for p in TRACE) * scale:.0f} min in {STEP} s cycles"
    adaptive = {
        h: run(
            ws,
            {"buffer_min_bits": 0, "buffer_target_bits": DEFAULT_TARGET, "buffer_max_bits": 10**8},
            scale,
            horizon=h,
        )
        for h in HORIZONS
    }
    sweep = [25_000 * 2**i for i in range(8)]
    baseline_bits, baseline = sweep[-1], Outcome()
    for bits in sweep:
        baseline = run(ws, fixed_policy(bits), scale)
        baseline_bits = bits
        if baseline.refused_share <= GOAL:
            break
    figures: list[Figure] = []
    for h, outcome in adaptive.items():
        figures += _figures(f"adaptive target (horizon {h:.0f} s)", outcome, note)
    figures += _figures(f"fixed target {baseline_bits:,} bits", baseline, note)
    for h, outcome in adaptive.items():
        figures.append(
            Figure(
                f"demand trace: buffer held, adaptive (horizon {h:.0f} s) / fixed baseline",
                outcome.mean_held,
                "bits",
                ceiling=baseline.mean_held,
                note=f"baseline: the smallest fixed target of {_sweep_text(sweep)} bits "
                f"with <= {GOAL:.1%} of requests 503; adaptive 503s "
                f"{100 * outcome.refused_share:.2f} %",
            )
        )
    return figures


def _sweep_text(sweep: Sequence[int]) -> str:
    return ", ".join(f"{b:,}" for b in sweep)


def _figures(mode: str, o: Outcome, note: str) -> list[Figure]:
    name = f"demand trace, {mode}"
    return [
        Figure(
            f"{name}: Get key answered 503 for lack of key",
            100 * o.refused_share,
            "%",
            note=f"{o.refused} of {o.requests} requests; {note}",
        ),
        Figure(f"{name}: mean wait for key", sum(o.waits) / max(1, len(o.waits)), "s"),
        Figure(f"{name}: p99 wait for key", o.wait(0.99), "s"),
        Figure(f"{name}: pair key held in buffers (time average)", o.mean_held, "bits"),
    ]
