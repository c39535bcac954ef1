"""`keystrata audit`: what an auditor does with a node's ledger, over mutual TLS with the
auditor's certificate (export, search, accounting), and offline (reconcile)."""

from __future__ import annotations

import csv
import io
import sys
from pathlib import Path
from typing import Any

import click

from keystrata.cli.common import console, print_json, print_table
from keystrata.cli.remote_cmd import client_errors, connection_options
from keystrata_client import TlsIdentity
from keystrata_client.audit import AuditClient, write_export
from keystrata_client.audit.cli import checked, read_public_key, state_options
from keystrata_client.audit.reconcile import read_entries, reconcile

_TIME = "RFC 3339 time with offset, e.g. 2026-12-01T00:00:00Z"


@click.group("audit")
def audit() -> None:
    """Export, search and reconcile ledgers (role auditor)."""


def _client(url: str, ca: Path, cert: Path, key: Path) -> AuditClient:
    return AuditClient(url, TlsIdentity(ca=ca, cert=cert, key=key))


@audit.command("export")
@click.option(
    "--out",
    required=True,
    type=click.Path(file_okay=False, path_type=Path),
    help="folder to write entries.jsonl, checkpoint.json and checkpoints.jsonl",
)
@click.option("--overwrite", is_flag=True, help="replace an earlier export in that folder")
@click.option(
    "--public-key",
    metavar="B64_OR_FILE",
    help="the node's Ed25519 ledger key, obtained out of band (Base64, or a file); "
    "pins it in the state folder",
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
) -> None:
    """Export the ledger up to the node's latest signed checkpoint, then verify the copy
    against the state folder (the node's pinned key, the last checkpoint seen of it).

    Check it again anywhere, later, with `keystrata-ledger-check OUT`."""
    pinned = None if public_key is None else read_public_key(public_key)
    with client_errors(), _client(url, ca, cert, key) as client:
        try:
            summary = write_export(client, out, overwrite=overwrite)
        except (FileExistsError, ValueError) as exc:
            raise click.ClickException(str(exc)) from None
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
        )
        for finding in report.findings:
            console.print(f"  - {finding}", highlight=False, soft_wrap=True)
        for note in report.notes:
            if "pinned" in note or "last checkpoint seen" in note:  # key and continuity
                console.print(f"  {note}", highlight=False, soft_wrap=True)
    if not report.ok:
        sys.exit(1)


@audit.command("search")
@click.option("--since", help=f"entries recorded at or after this {_TIME}")
@click.option("--until", help=f"entries recorded before this {_TIME}")
@click.option("--event", "events", multiple=True, help="event name (repeat for any of several)")
@click.option("--pair", help="entries naming this pair")
@click.option("--sae", help="entries naming this SAE")
@click.option("--node", help="entries naming this node")
@click.option("--segment", help="entries naming this segment (relay operation)")
@click.option("--key-id", help="entries naming this key ID")
@click.option("--limit", type=click.IntRange(1), default=100, show_default=True)
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
) -> None:
    """Find ledger entries; every given filter must hold."""
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
@click.option("--since", help=f"from this {_TIME}")
@click.option("--until", help=f"up to this {_TIME}")
@click.option("--csv", "as_csv", is_flag=True, help="one CSV row per day and pair or SAE")
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
        print_table(rows, list(rows[0]) if rows else ["day"], title=f"accounting at {url}")


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
@click.option("--pair", help="only this pair (default: every pair of the two stations)")
@click.option(
    "--format",
    "fmt",
    type=click.Choice(["table", "json", "csv"]),
    default="table",
    show_default=True,
)
@state_options
def reconcile_cmd(
    first: Path, second: Path, pair: str | None, fmt: str, state: Path | None, trust_new_key: bool
) -> None:
    """Reconcile two stations' exports key ID by key ID (offline).

    Both exports are verified first, each against the state folder (its node's pinned
    key and the last checkpoint seen of it). Exit status 1 when a key ID was served
    twice, is known on one side only, or the two sides disagree."""
    for folder in (first, second):
        report = checked(folder, state, trust_new_key=trust_new_key)
        if not report.ok:
            raise click.ClickException(
                f"{folder} does not verify (first bad entry {report.first_bad}): "
                + "; ".join(report.findings[:3])
            )
    try:
        result = reconcile(read_entries(first), read_entries(second), pair=pair)
    except ValueError as exc:
        raise click.ClickException(str(exc)) from None
    if fmt == "json":
        print_json(result.to_json())
    elif fmt == "csv":
        click.echo(result.to_csv(), nl=False)
    else:
        click.echo(result.to_table())
    if not result.ok:
        sys.exit(1)
