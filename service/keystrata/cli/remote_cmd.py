"""Commands that talk to a running node through the SDK, as an operator or auditor."""

from __future__ import annotations

import json
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any, TypeVar

import click
from rich.live import Live
from rich.table import Table

from keystrata.cli.common import console, print_json, print_table
from keystrata_client import ApiError, KeystrataClientError, OperatorClient, TlsIdentity

F = TypeVar("F", bound=Callable[..., Any])

KINDS = ("nodes", "links", "pairs", "principals")
_COLUMNS = {
    "nodes": ("node_id", "role", "url", "description", "retired_at"),
    "links": ("link_id", "relay_id", "station_id", "description", "retired_at"),
    "pairs": ("pair_id", "relay_id", "stations", "policy", "retired_at"),
    "principals": (
        "principal_id",
        "role",
        "cert_subject",
        "station_id",
        "link_id",
        "node_id",
        "retired_at",
    ),
}


def connection_options(f: F) -> F:
    """--url, --ca, --cert, --key (also from KEYSTRATA_URL, _CA, _CERT, _KEY)."""
    path = click.Path(exists=True, dir_okay=False, path_type=Path)
    for name, envvar, kind, text in reversed(
        (
            ("--url", "KEYSTRATA_URL", str, "node base URL, https://host:port"),
            ("--ca", "KEYSTRATA_CA", path, "network CA certificate (PEM)"),
            ("--cert", "KEYSTRATA_CERT", path, "your client certificate (PEM)"),
            ("--key", "KEYSTRATA_KEY", path, "your client private key (PEM)"),
        )
    ):
        f = click.option(name, envvar=envvar, required=True, type=kind, help=text)(f)
    return click.option("--json", "as_json", is_flag=True, help="print JSON for scripts")(f)


@contextmanager
def operator(url: str, ca: Path, cert: Path, key: Path) -> Iterator[OperatorClient]:
    with client_errors(), OperatorClient(url, TlsIdentity(ca=ca, cert=cert, key=key)) as client:
        yield client


@contextmanager
def client_errors() -> Iterator[None]:
    """Show the SDK's errors (an API answer, or no answer at all) as a one-line message."""
    try:
        yield
    except ApiError as exc:
        detail = "".join(f"\n  - {d}" for d in exc.details[:20])
        raise click.ClickException(f"{exc.status}: {exc.message}{detail}") from None
    except KeystrataClientError as exc:
        raise click.ClickException(str(exc)) from None


def _parse_sets(pairs: tuple[str, ...]) -> dict[str, Any]:
    """Turn ``a=1 b.c=x`` into {"a": 1, "b": {"c": "x"}}; values are JSON when they parse."""
    out: dict[str, Any] = {}
    for item in pairs:
        name, sep, raw = item.partition("=")
        if not sep or not name:
            raise click.BadParameter(f"{item!r}: use FIELD=VALUE", param_hint="--set")
        try:
            value = json.loads(raw)
        except ValueError:
            value = raw
        target = out
        *parents, leaf = name.split(".")
        for p in parents:
            target = target.setdefault(p, {})
        target[leaf] = value
    return out


def _body(sets: tuple[str, ...], body_json: str | None) -> dict[str, Any]:
    body = json.loads(body_json) if body_json else {}
    if not isinstance(body, dict):
        raise click.BadParameter("must be a JSON object", param_hint="--body")
    return body | _parse_sets(sets)


@click.group("registry")
def registry() -> None:
    """Provision nodes, QKD links, station pairs and principals on a node."""


kind_arg = click.argument("kind", type=click.Choice(KINDS))
set_opt = click.option(
    "--set",
    "sets",
    multiple=True,
    metavar="FIELD=VALUE",
    help='a field; VALUE is JSON when it parses (5, null, ["a","b"])',
)
body_opt = click.option("--body", "body_json", help="the whole body as a JSON object")


@registry.command("list")
@kind_arg
@click.option("--all", "include_retired", is_flag=True, help="include retired entries")
@connection_options
def list_cmd(
    kind: str, include_retired: bool, url: str, ca: Path, cert: Path, key: Path, as_json: bool
) -> None:
    """List the entries of KIND."""
    with operator(url, ca, cert, key) as client:
        items = client.list(kind, include_retired=include_retired)
    if as_json:
        print_json(items)
    else:
        print_table(items, _COLUMNS[kind], title=f"{kind} at {url}")


@registry.command("show")
@kind_arg
@click.argument("entry_id")
@connection_options
def show_cmd(
    kind: str, entry_id: str, url: str, ca: Path, cert: Path, key: Path, as_json: bool
) -> None:
    """Show one entry."""
    with operator(url, ca, cert, key) as client:
        print_json(client.get(kind, entry_id))


@registry.command("create")
@kind_arg
@set_opt
@body_opt
@connection_options
def create_cmd(
    kind: str,
    sets: tuple[str, ...],
    body_json: str | None,
    url: str,
    ca: Path,
    cert: Path,
    key: Path,
    as_json: bool,
) -> None:
    """Create an entry, e.g. `create nodes --set node_id=station-a --set role=station`."""
    with operator(url, ca, cert, key) as client:
        print_json(client.create(kind, _body(sets, body_json)))


@registry.command("change")
@kind_arg
@click.argument("entry_id")
@set_opt
@body_opt
@connection_options
def change_cmd(
    kind: str,
    entry_id: str,
    sets: tuple[str, ...],
    body_json: str | None,
    url: str,
    ca: Path,
    cert: Path,
    key: Path,
    as_json: bool,
) -> None:
    """Change fields of an entry, e.g. `change pairs P1 --set policy.priority=5`."""
    with operator(url, ca, cert, key) as client:
        print_json(client.change(kind, entry_id, _body(sets, body_json)))


@registry.command("retire")
@kind_arg
@click.argument("entry_id")
@connection_options
def retire_cmd(
    kind: str, entry_id: str, url: str, ca: Path, cert: Path, key: Path, as_json: bool
) -> None:
    """Retire an entry (it stays in the registry for the record)."""
    with operator(url, ca, cert, key) as client:
        print_json(client.retire(kind, entry_id))


def _show(
    fetch: Callable[[], dict[str, Any]],
    table: Callable[[dict[str, Any]], Table],
    *,
    watch: float | None,
    as_json: bool,
) -> None:
    """Print one answer as JSON or a table, or refresh the table every ``watch`` seconds
    until interrupted."""
    if as_json:
        print_json(fetch())
    elif watch is None:
        console.print(table(fetch()))
    else:
        with Live(table(fetch()), console=console) as live:
            while True:
                time.sleep(watch)
                live.update(table(fetch()))


def pools_table(answer: dict[str, Any]) -> Table:
    table = Table(title=f"link key pools at {answer['node_id']}")
    for col in (
        "link",
        "peer",
        "available (bit)",
        "used (bit)",
        "rate (bit/s)",
        "plan (bit/s)",
        "of plan",
        "last block",
    ):
        table.add_column(col, justify="right" if "bit" in col or col == "of plan" else "left")
    for p in answer["pools"]:
        planned, ratio = p.get("planned_rate_bps"), p.get("plan_ratio")
        table.add_row(
            p["link_id"],
            p["peer_node_id"],
            f"{p['bits_available']:,}",
            f"{p['bits_used']:,}",
            f"{p['rate_bps']:,.0f}",
            "-" if planned is None else f"{planned:,.0f}",
            "-" if ratio is None else f"{100 * ratio:.0f} %",
            p["last_block_at"] or "-",
        )
    return table


@click.command("pools")
@click.option(
    "--watch",
    type=float,
    default=None,
    metavar="SECONDS",
    help="refresh every SECONDS until interrupted",
)
@connection_options
def pools(watch: float | None, url: str, ca: Path, cert: Path, key: Path, as_json: bool) -> None:
    """Show the link key pool of every QKD link ending at the node."""
    with operator(url, ca, cert, key) as client:
        _show(client.pools, pools_table, watch=watch, as_json=as_json)


def pairs_table(answer: dict[str, Any]) -> Table:
    """The pair buffers a node reports, as a table (relay and station views differ)."""
    table = Table(title=f"pair key at {answer['node_id']} ({answer['role']})")
    if answer["role"] == "relay":
        cols = (
            "pair",
            "station",
            "ready (bit)",
            "owned (bit)",
            "pending (bit)",
            "on its way (bit)",
            "relay rate (bit/s)",
            "target (bit)",
            "until empty",
        )
        for col in cols:
            table.add_column(col, justify="left" if col in ("pair", "station") else "right")
        for p in answer["pairs"]:
            for i, side in enumerate(p["sides"]):
                first = i == 0
                empty = p["time_until_empty_s"]
                table.add_row(
                    p["pair_id"] if first else "",
                    side["station"],
                    _num(side["ready_bits"]),
                    _num(side["owned_ready_bits"]),
                    _num(side["pending_bits"]),
                    _num(p["in_flight_bits"]) if first else "",
                    f"{p['relay_rate_bps']:,.0f}" if first else "",
                    _num(p["target_bits"]) if first else "",
                    ("-" if empty is None else f"{empty:,.0f} s") if first else "",
                )
    else:
        for col in (
            "pair",
            "partner",
            "ready (bit)",
            "owned here (bit)",
            "owned by partner (bit)",
            "pending (bit)",
        ):
            table.add_column(col, justify="left" if col in ("pair", "partner") else "right")
        for p in answer["pairs"]:
            table.add_row(
                p["pair_id"],
                p["partner"],
                _num(p["ready_bits"]),
                _num(p["owned_ready_bits"]),
                _num(p["partner_owned_ready_bits"]),
                _num(p["pending_bits"]),
            )
    return table


def _num(value: int | None) -> str:
    return "-" if value is None else f"{value:,}"


@click.command("pairs")
@click.option(
    "--watch",
    type=float,
    default=None,
    metavar="SECONDS",
    help="refresh every SECONDS until interrupted",
)
@connection_options
def pairs(watch: float | None, url: str, ca: Path, cert: Path, key: Path, as_json: bool) -> None:
    """Show pair key buffers: at a relay both stations' buffers, relay rate and target;
    at a station its ready key per pair by owner."""
    with operator(url, ca, cert, key) as client:
        _show(client.pairs, pairs_table, watch=watch, as_json=as_json)


@click.command("deliveries")
@connection_options
def deliveries(url: str, ca: Path, cert: Path, key: Path, as_json: bool) -> None:
    """Show key delivery accounting at a station, per pair and per SAE."""
    with operator(url, ca, cert, key) as client:
        answer = client.deliveries()
    if as_json:
        print_json(answer)
        return

    def cell(c: dict[str, int]) -> str:
        return f"{c['keys']:,} ({c['bits']:,} bit)"

    pairs = Table(title=f"key delivery at {answer['node_id']}: pairs")
    for col in ("pair", "to masters", "to slaves", "waiting", "expired"):
        pairs.add_column(col, justify="left" if col == "pair" else "right")
    for p in answer["pairs"]:
        pairs.add_row(
            p["pair_id"],
            cell(p["to_masters"]),
            cell(p["to_slaves"]),
            cell(p["waiting"]),
            cell(p["expired"]),
        )
    console.print(pairs)
    saes = Table(title="SAEs")
    for col in ("SAE", "as master", "as slave", "expired", "refused"):
        saes.add_column(col, justify="left" if col == "SAE" else "right")
    for s in answer["saes"]:
        saes.add_row(
            s["sae_id"],
            cell(s["as_master"]),
            cell(s["as_slave"]),
            cell(s["expired"]),
            f"{s['refused']:,}",
        )
    console.print(saes)
