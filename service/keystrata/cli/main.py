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


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="keystrata")
def cli() -> None:
    """keystrata: key manager for QKD networks with an airborne trusted relay."""


cli.commands = LazyCommands(COMMANDS)


def main() -> None:
    cli()
