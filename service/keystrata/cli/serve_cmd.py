"""`keystrata serve`: this process becomes the node's server.

It imports only what serving needs (:mod:`keystrata.server`); the other commands'
modules stay out of it (see :mod:`keystrata.cli.main`).
"""

from __future__ import annotations

from pathlib import Path

import click

from keystrata.cli.common import config_option, handled, settings_from


@click.command("serve")
@config_option
def serve(config_path: Path) -> None:
    """Serve this node's API over HTTPS with required client certificates."""
    with handled():
        settings = settings_from(config_path)
        from keystrata.server import serve as run

        run(settings, str(config_path.resolve()))
