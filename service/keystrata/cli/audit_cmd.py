"""`keystrata audit`: what an auditor does with a node's ledger, over mutual TLS with the
auditor's certificate (export, search, accounting), and offline (reconcile)."""

from __future__ import annotations

import csv
import io
import sys
from pathlib import Path
from typing import Any

import click

from keystrata.cli import progress
from keystrata.cli.common import CommandError, console, print_json, print_table
from keystrata.cli.connection import client_errors, connection_options
from keystrata.cli.units import Units
from keystrata.ledger.entries import Event
from keystrata_client import TlsIdentity
from keystrata_client.audit import AuditClient, write_export
from keystrata_client.audit.cli import checked, read_public_key, state_options
from keystrata_client.audit.reconcile import read_export, reconcile

_TIME = "RFC 3339 time with an offset (2026-12-01T00:00:00Z)"
#: Every event name the ledger records, from the ledger's own list.
EVENT_NAMES = ", ".join(e.value for e in Event)


@click.group("audit")
def audit() -> None:
    """Export, search and reconcile ledgers (role auditor; reconcile runs offline)."""


def _client(url: str, ca: Path, cert: Path, key: Path) -> AuditClient:
    return AuditClient(url, TlsIdentity(ca=ca, cert=cert, key=key))


@audit.command("export")
@click.option(
    "--out",
    required=True,
    type=click.Path(file_okay=False, path_type=Path),
    help="Folder to write entries.jsonl, checkpoint.json and checkpoints.jsonl into.",
)
@click.option("--overwrite", is_flag=True, help="Replace an earlier export in that folder.")
@click.option(
    "--public-key",
    metavar="B64_OR_FILE",
    help="The node's Ed25519 ledger key, obtained out of band (Base64, or a file); "
    "pins it in the state folder.",
)
@state_options
@connection_options
def export_cmd(
    out: Path,
    overwrite: bool,
    public_key: str | None,
    state: Path | None,
    trust_new_key: bool,
    url: str,
    ca: Path,
    cert: Path,
    key: Path,
    as_json: bool,
    exact: bool,
) -> None:
    """Export the ledger up to the node's latest signed checkpoint, then verify the copy
    against the state folder (the node's pinned key, the last checkpoint seen of it).

    Check it again anywhere, later, with `keystrata-ledger-check OUT`."""
    pinned = None if public_key is None else read_public_key(public_key)
    with (
        client_errors(),
        _client(url, ca, cert, key) as client,
        progress.bar(f"exporting {url}") as bar,
    ):
        try:
            summary = write_export(client, out, overwrite=overwrite, progress=bar.update)
        except (FileExistsError, NotADirectoryError) as exc:
            raise CommandError(str(exc), "give an empty folder, or --overwrite") from None
    report = checked(out, state, public_key=pinned, trust_new_key=trust_new_key)
    if as_json:
        print_json(
            {"export": str(out), "summary": vars(summary), "verified": report.ok,
             "public_key": report.public_key, "pinning": report.pinning,
             "findings": report.findings}
        )  # fmt: skip
    else:
        console.print(
            f"{report.tree_size} entries of {report.origin} written to {out}; "
            f"root {report.root}; signed at {report.signed_at or '(no time)'}; "
            f"verified offline: {'yes' if report.ok else 'NO'}",
            highlight=False,
            soft_wrap=True,
            markup=False,
        )
        for finding in report.findings:
            console.print(f"  - {finding}", highlight=False, soft_wrap=True, markup=False)
        for note in report.notes:
            if "pinned" in note or "last checkpoint seen" in note:  # key and continuity
                console.print(f"  {note}", highlight=False, soft_wrap=True, markup=False)
    if not report.ok:
        sys.exit(1)


@audit.command("search")
@click.option("--since", metavar="TIME", help=f"Entries recorded at or after TIME, an {_TIME}.")
@click.option("--until", metavar="TIME", help=f"Entries recorded before TIME, an {_TIME}.")
@click.option(
    "--event",
    "events",
    multiple=True,
    type=click.Choice([e.value for e in Event]),
    metavar="EVENT",
    help=f"Entries of this event (repeat for any of several): {EVENT_NAMES}.",
)
@click.option("--pair", help="Entries naming this pair.")
@click.option("--sae", help="Entries naming this SAE.")
@click.option("--node", help="Entries naming this node.")
@click.option("--segment", help="Entries naming this segment (relay operation).")
@click.option("--key-id", help="Entries naming this key ID.")
@click.option(
    "--limit", type=click.IntRange(1), default=100, show_default=True, help="The most entries."
)
@connection_options
def search_cmd(
    since: str | None,
    until: str | None,
    events: tuple[str, ...],
    pair: str | None,
    sae: str | None,
    node: str | None,
    segment: str | None,
    key_id: str | None,
    limit: int,
    url: str,
    ca: Path,
    cert: Path,
    key: Path,
    as_json: bool,
    exact: bool,
) -> None:
    """Find ledger entries, oldest first; every filter given must hold."""
    with client_errors(), _client(url, ca, cert, key) as client:
        found = list(
            client.search(
                since=since,
                until=until,
                event=events,
                pair=pair,
                sae=sae,
                node=node,
                segment=segment,
                key_id=key_id,
                limit=limit,
            )
        )
    if as_json:
        print_json(found)
        return
    rows = [
        {
            "index": e["index"],
            "at": (e["entry"] or {}).get("at", "?"),
            "event": (e["entry"] or {}).get("event", "(undecodable)"),
            "names": _names(e["entry"] or {}),
        }
        for e in found
    ]
    print_table(rows, ("index", "at", "event", "names"), title=f"{len(rows)} entries at {url}")


def _names(entry: dict[str, Any]) -> str:
    shown = ("pair", "sae", "master", "slaves", "segment", "owner", "key_ids", "reason")
    parts = []
    for name in shown:
        value = entry.get(name)
        if isinstance(value, list):
            value = ",".join(map(str, value[:3])) + ("…" if len(value) > 3 else "")
        if value not in (None, "", []):
            parts.append(f"{name}={value}")
    return " ".join(parts)


@audit.command("accounting")
@click.option("--since", metavar="TIME", help=f"From TIME, an {_TIME}.")
@click.option("--until", metavar="TIME", help=f"Up to TIME, an {_TIME}.")
@click.option(
    "--csv", "as_csv", is_flag=True, help="One CSV row per day and pair or SAE (exact figures)."
)
@connection_options
def accounting_cmd(
    since: str | None,
    until: str | None,
    as_csv: bool,
    url: str,
    ca: Path,
    cert: Path,
    key: Path,
    as_json: bool,
    exact: bool,
) -> None:
    """Keys and bits per day, pair and SAE: to masters, to slaves, expired, refused,
    and (at the relay) link key used by relaying."""
    with client_errors(), _client(url, ca, cert, key) as client:
        answer = client.accounting(since=since, until=until)
    if as_json:
        print_json(answer)
        return
    rows = accounting_rows(answer)
    if as_csv:
        click.echo(_csv(rows), nl=False)
    else:
        console.print(accounting_table(answer, url, Units(exact)))


def accounting_table(answer: dict[str, Any], url: str, units: Units) -> Any:
    """The per-day answer for people: a table of pairs and one of SAEs, a line per UTC
    day above its rows, each figure as keys over bits."""
    from rich import box
    from rich.console import Group
    from rich.table import Table

    def table(title: str, columns: tuple[str, ...]) -> Table:
        made = Table(title=title, box=box.SIMPLE_HEAD, pad_edge=False)
        for i, col in enumerate(columns):
            made.add_column(col, justify="right" if i else "left", no_wrap=True)
        return made

    def keys(c: dict[str, int]) -> str:
        return f"{c['keys']:,} {'key' if c['keys'] == 1 else 'keys'}\n{units.bits(c['bits'])}"

    pairs = table(
        f"accounting at {url}: pairs",
        ("day, pair", "to masters", "to slaves", "expired", "relayed (link)"),
    )
    saes = table("SAEs", ("day, SAE", "as master", "as slave", "refused requests"))
    for day in answer["days"]:
        pairs.add_row(f"[bold]{day['day']}[/bold]")
        saes.add_row(f"[bold]{day['day']}[/bold]")
        for p in day["pairs"]:
            relayed = p["relayed"]
            pairs.add_row(
                f"  {p['pair_id']}", keys(p["to_masters"]), keys(p["to_slaves"]),
                keys(p["expired"]),
                f"{units.bits(relayed['bits'])}\n({units.bits(relayed['link_bits'])})",
            )  # fmt: skip
        for sae in day["saes"]:
            saes.add_row(
                f"  {sae['sae_id']}", keys(sae["as_master"]), keys(sae["as_slave"]),
                units.count(sae["refused"]),
            )  # fmt: skip
    return Group(pairs, saes)


def accounting_rows(answer: dict[str, Any]) -> list[dict[str, Any]]:
    """Flatten the per-day answer: one row per (day, pair) and per (day, SAE)."""
    rows: list[dict[str, Any]] = []
    for day in answer["days"]:
        for p in day["pairs"]:
            rows.append(
                {
                    "day": day["day"],
                    "pair": p["pair_id"],
                    "sae": "",
                    "keys_to_masters": p["to_masters"]["keys"],
                    "bits_to_masters": p["to_masters"]["bits"],
                    "keys_to_slaves": p["to_slaves"]["keys"],
                    "bits_to_slaves": p["to_slaves"]["bits"],
                    "keys_expired": p["expired"]["keys"],
                    "refused": "",
                    "relayed_bits": p["relayed"]["bits"],
                    "link_bits_used": p["relayed"]["link_bits"],
                }
            )
        for sae in day["saes"]:
            rows.append(
                {
                    "day": day["day"],
                    "pair": "",
                    "sae": sae["sae_id"],
                    "keys_to_masters": sae["as_master"]["keys"],
                    "bits_to_masters": sae["as_master"]["bits"],
                    "keys_to_slaves": sae["as_slave"]["keys"],
                    "bits_to_slaves": sae["as_slave"]["bits"],
                    "keys_expired": "",
                    "refused": sae["refused"],
                    "relayed_bits": "",
                    "link_bits_used": "",
                }
            )
    return rows


def _csv(rows: list[dict[str, Any]]) -> str:
    out = io.StringIO()
    if rows:
        writer = csv.DictWriter(out, fieldnames=list(rows[0]), lineterminator="\n")
        writer.writeheader()
        writer.writerows(rows)
    return out.getvalue()


@audit.command("reconcile")
@click.argument("first", type=click.Path(exists=True, file_okay=False, path_type=Path))
@click.argument("second", type=click.Path(exists=True, file_okay=False, path_type=Path))
@click.option("--pair", help="Only this pair [default: every pair the two stations share].")
@click.option(
    "--as-of",
    "as_of",
    metavar="TIME",
    help=f"Compare keys allocated up to TIME, an {_TIME} [default: the earlier of the "
    "two exports' checkpoint times].",
)
@click.option(
    "--format",
    "fmt",
    type=click.Choice(["table", "json", "csv"]),
    default="table",
    show_default=True,
    help="A summary per pair, or every key ID as JSON or CSV.",
)
@state_options
def reconcile_cmd(
    first: Path,
    second: Path,
    pair: str | None,
    as_of: str | None,
    fmt: str,
    state: Path | None,
    trust_new_key: bool,
) -> None:
    """Reconcile two stations' exports key ID by key ID, offline, over the pairs the
    two stations share.

    Both exports are verified first, each against the state folder (its node's pinned
    key and the last checkpoint seen of it). Keys allocated after the as-of time are
    counted as later, keys on their way between the stations when the exports were
    taken as in flight; neither is a failure. Exit status 1 when a key ID was served
    twice, is known on one side only, or the two sides disagree."""
    for folder in (first, second):
        report = checked(folder, state, trust_new_key=trust_new_key)
        if not report.ok:
            raise CommandError(
                f"{folder} does not verify (first bad entry {report.first_bad}): "
                + "; ".join(report.findings[:3]),
                f"check it with `keystrata-ledger-check {folder}`",
            )
    exports = []
    size = sum((f / "entries.jsonl").stat().st_size for f in (first, second))
    try:
        with progress.bar("reading the exports", size, unit="bytes") as bar:
            exports = [read_export(f, bar.advance) for f in (first, second)]
        a, b = exports
        result = reconcile(
            a.entries, b.entries, pair=pair, as_of=as_of, first_time=a.time, second_time=b.time
        )
    except ValueError as exc:
        raise CommandError(str(exc)) from None
    if fmt == "json":
        print_json(result.to_json())
    elif fmt == "csv":
        click.echo(result.to_csv(), nl=False)
    else:
        click.echo(result.to_table())
    if not result.ok:
        sys.exit(1)
