"""Entry point of the ``keystrata`` command."""

from __future__ import annotations

import click

from keystrata import __version__
from keystrata.cli.audit_cmd import audit
from keystrata.cli.keys_cmd import keys
from keystrata.cli.node_cmd import db, kek, node, serve
from keystrata.cli.pki_cmd import pki
from keystrata.cli.remote_cmd import deliveries, pairs, pools, registry
from keystrata.demo.main import demo


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="keystrata")
def cli() -> None:
    """keystrata: key manager for QKD networks with an airborne trusted relay."""


for command in (node, serve, db, kek, pki, registry, pools, pairs, deliveries, keys, audit, demo):
    cli.add_command(command)


def main() -> None:
    cli()
