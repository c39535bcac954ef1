"""`keystrata network`: one description file for the whole network.

``check`` shows, node by node, what applying the file would change; ``apply`` makes
those changes through every node's registry API; ``status`` asks every node and prints
the whole network. The file's format is in the README ("One network description").
"""

from __future__ import annotations

import sys
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import asdict
from pathlib import Path
from typing import Any

import click

from keystrata.cli import progress
from keystrata.cli.common import console, print_json
from keystrata.cli.units import exact_option
from keystrata_client import KeystrataClientError, TlsIdentity
from keystrata_client.network import apply as applying
from keystrata_client.network import description, status
from keystrata_client.network.changes import NodeChanges

_FILE = click.Path(dir_okay=False, path_type=Path)
_PEM = click.Path(exists=True, dir_okay=False, path_type=Path)


def _identity(
    net: description.Network, ca: Path | None, cert: Path | None, key: Path | None
) -> TlsIdentity:
    ca, cert, key = ca or net.access.ca, cert or net.access.cert, key or net.access.key
    missing = [n for n, v in (("--ca", ca), ("--cert", cert), ("--key", key)) if v is None]
    if missing:
        raise click.UsageError(
            f"no {', '.join(missing)}: give them (or KEYSTRATA_CA, KEYSTRATA_CERT, "
            "KEYSTRATA_KEY), or name ca, cert and key in the file's [network] table"
        )
    assert ca is not None and cert is not None and key is not None
    return TlsIdentity(ca=ca, cert=cert, key=key)


def _options(f: Any) -> Any:
    for name, envvar, text in reversed(
        (
            (
                "--ca",
                "KEYSTRATA_CA",
                "The network CA certificate (PEM); default: the file's [network] ca.",
            ),
            (
                "--cert",
                "KEYSTRATA_CERT",
                "Your operator certificate (PEM); default: the file's [network] cert.",
            ),
            (
                "--key",
                "KEYSTRATA_KEY",
                "Your private key (PEM); default: the file's [network] key.",
            ),
        )
    ):
        f = click.option(name, envvar=envvar, show_envvar=True, type=_PEM, help=text)(f)
    return click.argument("path", metavar="FILE", type=_FILE)(f)


@contextmanager
def _errors() -> Iterator[None]:
    try:
        yield
    except KeystrataClientError as exc:
        raise click.ClickException(str(exc)) from None


@click.group()
def network() -> None:
    """Describe the whole network in one file: check it, apply it, see its status."""


def _print_changes(surveys: list[applying.NodeSurvey]) -> int:
    """Print each node's pending changes; return how many there are."""
    total = 0
    for s in surveys:
        if s.changes is None:
            console.print(
                f"[bold]{s.node_id}[/bold]: [red]not asked[/red]: {s.error}", highlight=False
            )
            continue
        c: NodeChanges = s.changes
        head = f"[bold]{s.node_id}[/bold]: "
        if c.empty:
            console.print(head + f"in line ({c.unchanged} entries)", highlight=False)
        else:
            console.print(
                head + f"{len(c.actions)} to change, {c.unchanged} in line", highlight=False
            )
        for a in c.actions:
            console.print(f"  {a.describe()}", highlight=False)
        for x in c.conflicts:
            console.print(f"  [yellow]cannot apply[/yellow] {x.describe()}", highlight=False)
        for kind, entry_id in c.unlisted:
            console.print(
                f"  [dim]not in the description: {kind} {entry_id} (kept; "
                "--retire-unlisted retires it)[/dim]",
                highlight=False,
            )
        total += len(c.actions)
    return total


def _survey_json(surveys: list[applying.NodeSurvey]) -> list[dict[str, Any]]:
    out = []
    for s in surveys:
        c = s.changes
        out.append(
            {
                "node_id": s.node_id,
                "error": s.error,
                "actions": [asdict(a) for a in c.actions] if c else [],
                "conflicts": [asdict(x) for x in c.conflicts] if c else [],
                "unlisted": [{"kind": k, "id": i} for k, i in c.unlisted] if c else [],
                "unchanged": c.unchanged if c else 0,
            }
        )
    return out


@network.command()
@_options
@click.option(
    "--retire-unlisted", is_flag=True, help="Also retire active entries the file does not list."
)
@click.option("--json", "as_json", is_flag=True, help="Print JSON for scripts.")
def check(
    path: Path,
    ca: Path | None,
    cert: Path | None,
    key: Path | None,
    retire_unlisted: bool,
    as_json: bool,
) -> None:
    """Show, node by node, what applying FILE would change (nothing is changed).

    Exits 0 when every node is in line with the file, 3 when there are changes to
    apply, 1 when a node could not be asked or an entry cannot be brought in line.
    """
    with _errors():
        net = description.load(path)
        surveys = applying.survey(
            net, _identity(net, ca, cert, key), retire_unlisted=retire_unlisted
        )
    if as_json:
        print_json(_survey_json(surveys))
    pending = (
        _print_changes(surveys)
        if not as_json
        else sum(len(s.changes.actions) for s in surveys if s.changes)
    )
    if any(s.error or (s.changes and s.changes.conflicts) for s in surveys):
        sys.exit(1)
    if pending:
        sys.exit(3)


@network.command("apply")
@_options
@click.option(
    "--retire-unlisted", is_flag=True, help="Also retire active entries the file does not list."
)
def apply_cmd(
    path: Path, ca: Path | None, cert: Path | None, key: Path | None, retire_unlisted: bool
) -> None:
    """Apply FILE to every node: create and change what differs, node by node.

    Stations go first, then relays (retirements the other way round); each change is
    one registry call the node checks and writes to its ledger. Applying twice changes
    nothing the second time. Exits 1 if a node could not be asked or a change failed.
    """
    with _errors():
        net = description.load(path)
        identity = _identity(net, ca, cert, key)
        surveys = applying.survey(net, identity, retire_unlisted=retire_unlisted)
        total = sum(len(s.changes.actions) for s in surveys if s.changes)
        outcomes = _apply_with_progress(net, surveys, identity, total)
    failed = False
    for s, o in zip(surveys, outcomes, strict=True):
        if s.changes is None:
            console.print(
                f"[bold]{s.node_id}[/bold]: [red]not asked[/red]: {s.error}", highlight=False
            )
            failed = True
            continue
        verbs = {v: sum(1 for a in o.done if a.verb == v) for v in ("create", "change", "retire")}
        said = ", ".join(
            f"{n} {v}d" if v != "change" else f"{n} changed" for v, n in verbs.items() if n
        )
        console.print(
            f"[bold]{s.node_id}[/bold]: {said or 'nothing to do'}"
            f" ({s.changes.unchanged} already in line)",
            highlight=False,
        )
        for action, error in o.failed:
            console.print(f"  [red]failed[/red] {action.describe()}: {error}", highlight=False)
            failed = True
        for x in s.changes.conflicts:
            console.print(f"  [yellow]cannot apply[/yellow] {x.describe()}", highlight=False)
            failed = True
    if failed:
        sys.exit(1)


def _apply_with_progress(
    net: description.Network,
    surveys: list[applying.NodeSurvey],
    identity: TlsIdentity,
    total: int,
) -> list[applying.NodeOutcome]:
    with progress.bar("applying", total) as bar:

        def step(node_id: str, action: Any, error: str | None) -> None:
            bar.describe(f"{node_id}: {action.describe()}"[:60])
            bar.advance(1)

        return applying.apply(net, surveys, identity, progress=step)


@network.command("status")
@_options
@click.option("--json", "as_json", is_flag=True, help="Print JSON for scripts (exact bits).")
@exact_option
def status_cmd(
    path: Path, ca: Path | None, cert: Path | None, key: Path | None, as_json: bool, exact: bool
) -> None:
    """Ask every node of FILE and print the whole network: nodes, links, pairs, alerts.

    Alerts are the nodes' readiness notes that are not plainly ok (a link below plan,
    a pair held, a registry disagreement with a peer...). Exits 1 when a node does not
    answer or is not the node the file names.
    """
    with _errors():
        net = description.load(path)
        statuses = status.gather(net, _identity(net, ca, cert, key))
    links = status.links(net, statuses)
    pairs = status.pairs(net, statuses)
    if as_json:
        print_json(
            {
                "network": net.name,
                "nodes": [
                    {
                        "node_id": s.node_id,
                        "role": s.role,
                        "url": s.url,
                        "up": s.up,
                        "error": s.error,
                        "version": s.version,
                        "checks": s.checks,
                    }
                    for s in statuses
                ],
                "links": [asdict(r) for r in links],
                "pairs": [asdict(r) for r in pairs],
                "alerts": [{"node_id": s.node_id, "alert": a} for s in statuses for a in s.alerts],
            }
        )
    else:
        from keystrata.cli.network_view import render

        render(console, net.name, statuses, links, pairs, exact=exact)
    if any(not s.up or s.error for s in statuses):
        sys.exit(1)
