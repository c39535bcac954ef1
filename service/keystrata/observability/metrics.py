"""Prometheus metric families read from the node's database at scrape time.

Every value comes from the database, so any worker process of a node answers a scrape
with the same numbers. Counters are sums over append-only tables (link blocks, relay
operations, key allocations, the ledger), so they only grow. Labels are identifiers an
operator provisioned (links, pairs, stations, SAEs, peer nodes) and fixed words; never a
key ID, never key material. One scrape runs a handful of aggregate queries, plus one
per link and one per pair.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Iterator
from datetime import UTC, datetime

from prometheus_client.metrics_core import CounterMetricFamily, GaugeMetricFamily, Metric
from prometheus_client.registry import Collector
from sqlalchemy import func, select

from keystrata import __version__
from keystrata.config import Role
from keystrata.context import NodeContext
from keystrata.delivery import accounting
from keystrata.ledger import checkpoints
from keystrata.links import pools
from keystrata.node import registry_watch
from keystrata.relay import buffers
from keystrata.restore import holds
from keystrata.storage.db import durability_risks
from keystrata.storage.models import LedgerHead, OutboxMessage, RelayOp
from keystrata.supply import observed


class Families(Collector):
    """A fixed list of families, as prometheus_client's encoders expect a collector."""

    def __init__(self, families: Iterable[Metric]) -> None:
        self.families = list(families)

    def collect(self) -> Iterator[Metric]:
        return iter(self.families)


def collect(ctx: NodeContext) -> list[Metric]:
    """Every database-derived family of this node.

    Raises:
        Unavailable: the database cannot be reached.
    """
    out = [_build_info(ctx), *_links(ctx)]
    if ctx.role is Role.RELAY:
        out += _relay(ctx)
    else:
        out += _station(ctx)
    out += _outbox(ctx)
    out += _ledger(ctx)
    out += _safety(ctx)
    out += _registry(ctx)
    return out


def _registry(ctx: NodeContext) -> list[Metric]:
    """What the last comparison of shared registry facts with each peer found."""
    differ = GaugeMetricFamily(
        "keystrata_registry_disagreements",
        "Registry facts this node shares with a peer node that the two hold differently "
        "(or only one holds), as the last comparison that got an answer found; absent "
        "until one did. Which facts: the readiness check registry, the ledger.",
        labels=["peer"],
    )
    age = GaugeMetricFamily(
        "keystrata_registry_compared_age_seconds",
        "Time since the last comparison of shared registry facts with a peer node that "
        "got an answer; +Inf until one did.",
        labels=["peer"],
    )
    now = ctx.clock.now()
    for view in registry_watch.views(ctx):
        if view.checked_at is None:
            age.add_metric([view.peer_id], math.inf)
            continue
        differ.add_metric([view.peer_id], len(view.disagreements))
        age.add_metric([view.peer_id], max(0.0, (now - view.checked_at).total_seconds()))
    return [differ, age]


def _safety(ctx: NodeContext) -> list[Metric]:
    """The durability override and the restore check's open findings."""
    override = GaugeMetricFamily(
        "keystrata_durability_override",
        "1 when the node runs on database settings that can lose committed transactions "
        "on power loss, accepted by [database] accept_data_loss_on_power_failure.",
    )
    unsafe = GaugeMetricFamily(
        "keystrata_durability_unsafe_setting",
        "1 per database setting in force that can lose commits on power loss.",
        labels=["setting"],
    )
    risks = durability_risks(ctx.db.engine)
    override.add_metric([], 1 if risks else 0)
    for risk in risks:
        unsafe.add_metric([risk.setting], 1)
    held = GaugeMetricFamily(
        "keystrata_pair_held",
        "1 per open restore-check finding: behind=self (this station lost commits; the "
        "pair serves no key here until an operator releases it) or partner.",
        labels=["pair", "behind", "reason"],
    )
    for hold in holds.open_holds(ctx):
        held.add_metric([hold.pair_id, hold.behind, hold.reason], 1)
    return [override, unsafe, held]


def _build_info(ctx: NodeContext) -> Metric:
    info = GaugeMetricFamily(
        "keystrata_build_info",
        "Always 1; the labels name the software version and this node.",
        labels=["version", "node_id", "role"],
    )
    info.add_metric([__version__, ctx.node_id, ctx.role.value], 1)
    return info


def _links(ctx: NodeContext) -> list[Metric]:
    available = GaugeMetricFamily(
        "keystrata_link_key_available_bits",
        "Link key stored and not yet used, per QKD link ending at this node.",
        labels=["link"],
    )
    received = CounterMetricFamily(
        "keystrata_link_key_received_bits",
        "Link key received from QKD modules, per link.",
        labels=["link"],
    )
    used = CounterMetricFamily(
        "keystrata_link_key_used_bits",
        "Link key consumed (and destroyed), per link.",
        labels=["link"],
    )
    planned = GaugeMetricFamily(
        "keystrata_link_planned_rate_bps",
        "The link model's clear-sky secret key rate for now, per link with a profile.",
        labels=["link"],
    )
    ratio = GaugeMetricFamily(
        "keystrata_link_plan_ratio",
        "Observed link key rate over the link model's rate for now, per link with a "
        "profile and a planned rate above zero.",
        labels=["link"],
    )
    levels = pools.pool_levels(ctx)
    for level in levels:
        available.add_metric([level.link_id], level.bits_available)
        received.add_metric([level.link_id], level.bits_received)
        used.add_metric([level.link_id], level.bits_used)
    for check in observed.plan_checks(ctx, levels):
        if check.planned_bps is not None:
            planned.add_metric([check.link_id], check.planned_bps)
        if check.ratio is not None:
            ratio.add_metric([check.link_id], check.ratio)
    return [available, received, used, planned, ratio]


def _relay(ctx: NodeContext) -> list[Metric]:
    made = CounterMetricFamily(
        "keystrata_relay_segments_made",
        "Relay operations run (segments made), per pair.",
        labels=["pair"],
    )
    made_bits = CounterMetricFamily(
        "keystrata_relay_made_bits", "Pair key made by relay operations, per pair.", labels=["pair"]
    )
    settled = CounterMetricFamily(
        "keystrata_relay_segments_settled",
        "Segments whose outcome the notice station reported, per pair and outcome.",
        labels=["pair", "outcome"],
    )
    in_flight = GaugeMetricFamily(
        "keystrata_relay_in_flight_bits",
        "Pair key made and sent but not yet settled, per pair.",
        labels=["pair"],
    )
    totals: dict[str, dict[str, tuple[int, int]]] = {}
    with ctx.db.read() as s:
        rows = s.execute(
            select(RelayOp.pair_id, RelayOp.state, func.count(), func.sum(RelayOp.length))
            .group_by(RelayOp.pair_id, RelayOp.state)
            .order_by(RelayOp.pair_id, RelayOp.state)
        ).all()
    for pair_id, state, count, length in rows:
        totals.setdefault(pair_id, {})[state] = (int(count), 8 * int(length or 0))
    reported = GaugeMetricFamily(
        "keystrata_pair_reported_ready_bits",
        "Ready pair key at each station, as last reported to this relay.",
        labels=["pair", "station"],
    )
    target = GaugeMetricFamily(
        "keystrata_pair_target_bits",
        "Ready key the scheduler aims to keep at each station of a pair.",
        labels=["pair"],
    )
    for view in buffers.relay_view(ctx):
        totals.setdefault(view.pair_id, {})
        target.add_metric([view.pair_id], view.target_bits)
        for side in view.sides:
            if side["ready_bits"] is not None:
                reported.add_metric([view.pair_id, side["station"]], side["ready_bits"])
    for pair_id, by_state in sorted(totals.items()):
        made.add_metric([pair_id], sum(c for c, _ in by_state.values()))
        made_bits.add_metric([pair_id], sum(b for _, b in by_state.values()))
        for outcome in ("ready", "discarded"):
            settled.add_metric([pair_id, outcome], by_state.get(outcome, (0, 0))[0])
        in_flight.add_metric([pair_id], by_state.get("sent", (0, 0))[1])
    return [made, made_bits, settled, in_flight, reported, target]


def _station(ctx: NodeContext) -> list[Metric]:
    ready = GaugeMetricFamily(
        "keystrata_pair_ready_bits",
        "Confirmed pair key at this station, not yet handed out, per pair.",
        labels=["pair"],
    )
    owned = GaugeMetricFamily(
        "keystrata_pair_owned_ready_bits",
        "The part of the ready key this station serves to its master SAEs, per pair.",
        labels=["pair"],
    )
    pending = GaugeMetricFamily(
        "keystrata_pair_pending_bits",
        "Pair key received but not yet confirmed by the other station, per pair.",
        labels=["pair"],
    )
    for view in buffers.station_view(ctx):
        ready.add_metric([view["pair_id"]], view["ready_bits"])
        owned.add_metric([view["pair_id"]], view["owned_ready_bits"])
        pending.add_metric([view["pair_id"]], view["pending_bits"])
    return [ready, owned, pending, *_deliveries(ctx)]


def _deliveries(ctx: NodeContext) -> list[Metric]:
    keys = CounterMetricFamily(
        "keystrata_delivered_keys",
        "Keys handed out at this station, per pair; to=master (Get key) or to=slave "
        "(Get key with key IDs, once per slave).",
        labels=["pair", "to"],
    )
    bits = CounterMetricFamily(
        "keystrata_delivered_key_bits", "Bits of the keys counted above.", labels=["pair", "to"]
    )
    expired = CounterMetricFamily(
        "keystrata_expired_keys",
        "Keys not collected by every slave within the pair's time-to-live, per pair.",
        labels=["pair"],
    )
    expired_bits = CounterMetricFamily(
        "keystrata_expired_key_bits", "Bits of the keys counted above.", labels=["pair"]
    )
    waiting = GaugeMetricFamily(
        "keystrata_waiting_keys",
        "Keys the other station allocated that wait here for their slaves, per pair.",
        labels=["pair"],
    )
    refused = CounterMetricFamily(
        "keystrata_refused_key_requests",
        "Key delivery requests refused, per requesting SAE.",
        labels=["sae"],
    )
    report = accounting.deliveries(ctx)
    for p in report["pairs"]:
        for to, part in (("master", p["to_masters"]), ("slave", p["to_slaves"])):
            keys.add_metric([p["pair_id"], to], part["keys"])
            bits.add_metric([p["pair_id"], to], part["bits"])
        expired.add_metric([p["pair_id"]], p["expired"]["keys"])
        expired_bits.add_metric([p["pair_id"]], p["expired"]["bits"])
        waiting.add_metric([p["pair_id"]], p["waiting"]["keys"])
    for sae in report["saes"]:
        if sae["refused"]:
            refused.add_metric([sae["sae_id"]], sae["refused"])
    return [keys, bits, expired, expired_bits, waiting, refused]


def _outbox(ctx: NodeContext) -> list[Metric]:
    pending = GaugeMetricFamily(
        "keystrata_outbox_pending_messages",
        "Messages to peer nodes not yet acknowledged, per destination node.",
        labels=["destination"],
    )
    oldest = GaugeMetricFamily(
        "keystrata_outbox_oldest_pending_age_seconds",
        "Age of the oldest unacknowledged message, per destination node.",
        labels=["destination"],
    )
    head = GaugeMetricFamily(
        "keystrata_outbox_head_refusals",
        "Failed attempts at the oldest message to each destination node (refused or no "
        "answer); delivery is in order, so it holds every later message back. Its last "
        "error is in the outbox table.",
        labels=["destination"],
    )
    now = ctx.clock.now()
    heads = select(func.min(OutboxMessage.id)).group_by(OutboxMessage.destination)
    with ctx.db.read() as s:
        rows = s.execute(
            select(OutboxMessage.destination, func.count(), func.min(OutboxMessage.created_at))
            .group_by(OutboxMessage.destination)
            .order_by(OutboxMessage.destination)
        ).all()
        attempts: dict[str, int] = {
            destination: int(n)
            for destination, n in s.execute(
                select(OutboxMessage.destination, OutboxMessage.attempts).where(
                    OutboxMessage.id.in_(heads)
                )
            )
        }
    for destination, count, first in rows:
        pending.add_metric([destination], int(count))
        oldest.add_metric([destination], max(0.0, (now - _utc(first)).total_seconds()))
        head.add_metric([destination], int(attempts.get(destination, 0)))
    return [pending, oldest, head]


def _ledger(ctx: NodeContext) -> list[Metric]:
    entries = CounterMetricFamily(
        "keystrata_ledger_entries", "Entries in this node's audit ledger (its tree size)."
    )
    checkpointed = GaugeMetricFamily(
        "keystrata_ledger_checkpointed_entries",
        "Tree size of the latest signed checkpoint (0: none yet).",
    )
    age = GaugeMetricFamily(
        "keystrata_ledger_last_checkpoint_age_seconds",
        "Time since the latest signed checkpoint; absent until there is one.",
    )
    with ctx.db.read() as s:
        size = s.execute(select(LedgerHead.size).where(LedgerHead.id == 1)).scalar_one()
    entries.add_metric([], int(size))
    latest = checkpoints.latest(ctx)
    checkpointed.add_metric([], latest.tree_size if latest else 0)
    out: list[Metric] = [entries, checkpointed]
    if latest is not None:
        age.add_metric([], max(0.0, (ctx.clock.now() - latest.signed_at).total_seconds()))
        out.append(age)
    return out


def _utc(value: object) -> datetime:
    """Aggregates of timestamps come back as naive text on SQLite; read them as UTC."""
    if isinstance(value, str):
        value = datetime.fromisoformat(value)
    if not isinstance(value, datetime):
        raise TypeError(f"expected a timestamp, got {type(value).__name__}")
    return value if value.tzinfo else value.replace(tzinfo=UTC)
