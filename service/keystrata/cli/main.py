"""Entry point of the ``keystrata`` command.

Each command's module is imported when that command runs (or when ``--help`` lists the
commands), not before: ``keystrata serve`` is the process that serves a node, and it
should not keep the other commands' imports (rich, the SDK, the demo) resident.
"""

from __future__ import annotations

import importlib
from collections.abc import Iterator, Mapping, MutableMapping

import click

from keystrata import __version__

#: Each command's name -> "module:attribute" of its click command.
COMMANDS = {
    "node": "keystrata.cli.node_cmd:node",
    "serve": "keystrata.cli.serve_cmd:serve",
    "db": "keystrata.cli.node_cmd:db",
    "kek": "keystrata.cli.node_cmd:kek",
    "pki": "keystrata.cli.pki_cmd:pki",
    "registry": "keystrata.cli.remote_cmd:registry",
    "pools": "keystrata.cli.screens_cmd:pools",
    "pairs": "keystrata.cli.screens_cmd:pairs",
    "deliveries": "keystrata.cli.screens_cmd:deliveries",
    "plan": "keystrata.cli.plan_cmd:plan",
    "network": "keystrata.cli.network_cmd:network",
    "keys": "keystrata.cli.keys_cmd:keys",
    "audit": "keystrata.cli.audit_cmd:audit",
    "demo": "keystrata.demo.main:demo",
}

#: One line per command in ``keystrata --help`` (no module is imported to show them).
SUMMARIES = {
    "node": "Initialise this node's database and secrets; pin principals",
    "serve": "Serve this node's API over HTTPS with client certificates",
    "db": "Upgrade the database schema, or show its revision",
    "kek": "Write key-encryption key files; re-seal under a new one",
    "pki": "Create the network CA; issue and revoke certificates",
    "registry": "List, show, create, change and retire a node's registry entries",
    "pools": "Link key pools of the QKD links at a node",
    "pairs": "Pair key buffers (at a relay: both stations, rate, target)",
    "deliveries": "Keys delivered, waiting, expired and refused at a station",
    "plan": "The key-supply plan of the link model: tables, JSON, plots",
    "network": "Check, apply and watch the whole network's description file",
    "keys": "ETSI GS QKD 014 calls as an SAE: status, get, get-by-id",
    "audit": "Export, search and account ledgers; reconcile two stations",
    "demo": "A loopback network (a relay, three stations) fed by emulators",
}


class LazyCommands(MutableMapping[str, click.Command]):
    """A group's commands by name (click reads ``Group.commands`` as a mapping), each
    imported from its module the first time it is looked up."""

    def __init__(self, where: Mapping[str, str]) -> None:
        self._where = dict(where)
        self._loaded: dict[str, click.Command] = {}

    def __getitem__(self, name: str) -> click.Command:
        if name not in self._loaded:
            module, attribute = self._where[name].split(":")
            command = getattr(importlib.import_module(module), attribute)
            assert isinstance(command, click.Command), self._where[name]
            self._loaded[name] = command
        return self._loaded[name]

    def __setitem__(self, name: str, command: click.Command) -> None:
        self._where[name] = ""
        self._loaded[name] = command

    def __delitem__(self, name: str) -> None:
        del self._where[name]
        self._loaded.pop(name, None)

    def __contains__(self, name: object) -> bool:
        return name in self._where

    def __iter__(self) -> Iterator[str]:
        return iter(self._where)

    def __len__(self) -> int:
        return len(self._where)


class _Commands(click.Group):
    """The top-level group: its help lists every command with its line of SUMMARIES."""

    def list_commands(self, ctx: click.Context) -> list[str]:
        return list(self.commands)  # in the order of COMMANDS: local, remote, audit, demo

    def format_commands(self, ctx: click.Context, formatter: click.HelpFormatter) -> None:
        rows = []
        for name in self.list_commands(ctx):
            summary = SUMMARIES.get(name)
            if summary is None:  # a command added without a line here
                summary = self.commands[name].get_short_help_str(limit=60)
            rows.append((name, summary))
        with formatter.section("Commands"):
            formatter.write_dl(rows)


@click.group(cls=_Commands, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="keystrata")
def cli() -> None:
    """keystrata: key manager for QKD networks with an airborne trusted relay.

    Remote commands (registry, pools, pairs, deliveries, plan, keys, audit) take
    --url, --ca, --cert and --key, or KEYSTRATA_URL, KEYSTRATA_CA, KEYSTRATA_CERT and
    KEYSTRATA_KEY; local ones (node, serve, db, kek) --config or KEYSTRATA_CONFIG.
    `keystrata COMMAND --help` tells more.
    """


cli.commands = LazyCommands(COMMANDS)


def main() -> None:
    cli()
