"""`keystrata registry`: provision a node's registry through the SDK, as an operator
(``list`` and ``show`` also as an auditor).

The screens of a running node (`pools`, `pairs`, `deliveries`) are in
:mod:`keystrata.cli.screens_cmd`; how commands reach a node in
:mod:`keystrata.cli.connection` (re-exported here for the commands that import it).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import click

from keystrata.cli import render
from keystrata.cli.common import print_json, print_table
from keystrata.cli.connection import client_errors, connection_options, operator
from keystrata.cli.units import Units

__all__ = ["client_errors", "connection_options", "operator", "registry"]

KINDS = ("nodes", "links", "pairs", "principals")
#: Per kind: (field, column header) of the table ``registry list`` prints.
_COLUMNS = {
    "nodes": (("node_id", "node"), ("role", "role"), ("url", "URL"),
              ("description", "description"), ("retired_at", "retired")),
    "links": (("link_id", "link"), ("relay_id", "relay"), ("station_id", "station"),
              ("description", "description"), ("retired_at", "retired")),
    "pairs": (("pair_id", "pair"), ("relay_id", "relay"), ("stations", "stations"),
              ("policy", "policy"), ("retired_at", "retired")),
    "principals": (("principal_id", "principal"), ("role", "role"),
                   ("cert_subject", "certificate subject"), ("station_id", "station"),
                   ("link_id", "link"), ("node_id", "node"), ("retired_at", "retired")),
}  # fmt: skip


def _parse_sets(pairs: tuple[str, ...]) -> dict[str, Any]:
    """Turn ``a=1 b.c=x`` into {"a": 1, "b": {"c": "x"}}; values are JSON when they parse."""
    out: dict[str, Any] = {}
    for item in pairs:
        name, sep, raw = item.partition("=")
        if not sep or not name:
            raise click.BadParameter(f"'{item}': use FIELD=VALUE", param_hint="--set")
        try:
            value = json.loads(raw)
        except ValueError:
            value = raw
        target = out
        *parents, leaf = name.split(".")
        for p in parents:
            target = target.setdefault(p, {})
            if not isinstance(target, dict):
                raise click.BadParameter(
                    f"'{item}': {p} is set to a value already", param_hint="--set"
                )
        target[leaf] = value
    return out


def _body(sets: tuple[str, ...], body_json: str | None) -> dict[str, Any]:
    try:
        body = json.loads(body_json) if body_json else {}
    except ValueError:
        raise click.BadParameter("is not JSON", param_hint="--body") from None
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
    help="Set a field (repeatable; a.b=... sets a member of an object); VALUE is JSON when "
    'it parses: 5, null, ["a","b"].',
)
body_opt = click.option("--body", "body_json", help="The whole body as a JSON object.")


def _show_entry(entry: dict[str, Any], as_json: bool, exact: bool, said: str = "") -> None:
    if as_json:
        print_json(entry)
        return
    if said:
        click.echo(said)
    for line in render.entry_lines(entry, Units(exact)):
        click.echo(line)


def _said(verb: str, kind: str, entry: dict[str, Any]) -> str:
    name = next((str(v) for k, v in entry.items() if k.endswith("_id")), "")
    return f"{verb} {kind.rstrip('s')} {name}".rstrip()


@registry.command("list")
@kind_arg
@click.option("--all", "include_retired", is_flag=True, help="Include retired entries.")
@connection_options
def list_cmd(
    kind: str,
    include_retired: bool,
    url: str,
    ca: Path,
    cert: Path,
    key: Path,
    as_json: bool,
    exact: bool,
) -> None:
    """List the entries of KIND (nodes, links, pairs or principals)."""
    with operator(url, ca, cert, key) as client:
        items = client.list(kind, include_retired=include_retired)
    if as_json:
        print_json(items)
        return
    units = Units(exact)
    columns = _COLUMNS[kind]
    rows = [{head: render.value(item.get(f), units, f) for f, head in columns} for item in items]
    print_table(rows, [head for _, head in columns], title=f"{kind} at {url}")


@registry.command("show")
@kind_arg
@click.argument("entry_id")
@connection_options
def show_cmd(
    kind: str,
    entry_id: str,
    url: str,
    ca: Path,
    cert: Path,
    key: Path,
    as_json: bool,
    exact: bool,
) -> None:
    """Show one entry of KIND, retired or not, field by field."""
    with operator(url, ca, cert, key) as client:
        _show_entry(client.get(kind, entry_id), as_json, exact)


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
    exact: bool,
) -> None:
    """Create an entry of KIND from --set fields or a --body.

    Example: `keystrata registry create nodes --set node_id=station-a --set role=station`.
    """
    with operator(url, ca, cert, key) as client:
        entry = client.create(kind, _body(sets, body_json))
    _show_entry(entry, as_json, exact, _said("created", kind, entry))


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
    exact: bool,
) -> None:
    """Change fields of an entry; fields not given keep their value.

    Example: `keystrata registry change pairs P1 --set policy.priority=5`.
    """
    with operator(url, ca, cert, key) as client:
        entry = client.change(kind, entry_id, _body(sets, body_json))
    _show_entry(entry, as_json, exact, _said("changed", kind, entry))


@registry.command("retire")
@kind_arg
@click.argument("entry_id")
@connection_options
def retire_cmd(
    kind: str,
    entry_id: str,
    url: str,
    ca: Path,
    cert: Path,
    key: Path,
    as_json: bool,
    exact: bool,
) -> None:
    """Retire an entry (it stays in the registry for the record)."""
    with operator(url, ca, cert, key) as client:
        entry = client.retire(kind, entry_id)
    _show_entry(entry, as_json, exact, _said("retired", kind, entry))
