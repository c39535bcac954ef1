"""How the remote commands reach a node: the connection options, the one error handler
for the SDK's errors, and the check that a command runs at a node of the right role.

The options come from the command line or from the environment (``KEYSTRATA_URL``,
``KEYSTRATA_CA``, ``KEYSTRATA_CERT``, ``KEYSTRATA_KEY``; click reads them, as only the
CLI reads the environment), and a missing one is named with both ways to give it.
"""

from __future__ import annotations

import functools
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any, TypeVar

import click

from keystrata.cli import render
from keystrata.cli.common import CommandError
from keystrata.cli.units import exact_option
from keystrata_client import (
    ApiError,
    ConnectionProblem,
    KeystrataClientError,
    OperatorClient,
    TlsIdentity,
)

F = TypeVar("F", bound=Callable[..., Any])

#: (parameter, option, environment variable, help): the options every remote command takes.
CONNECTION = (
    ("url", "--url", "KEYSTRATA_URL", "The node's base URL, https://HOST:PORT."),
    ("ca", "--ca", "KEYSTRATA_CA", "The network CA's certificate (PEM)."),
    ("cert", "--cert", "KEYSTRATA_CERT", "Your client certificate (PEM)."),
    ("key", "--key", "KEYSTRATA_KEY", "Your client certificate's private key (PEM)."),
)
#: Where the README shows how to register a certificate at a node.
REGISTER_HINT = (
    "register its subject as a principal at this node with `keystrata registry create "
    "principals` (README: 'Running a node by hand'; for a monitoring certificate "
    "'Monitoring')"
)


def connection_options(f: F) -> F:
    """Add --url, --ca, --cert, --key (each also from its KEYSTRATA_* variable), --json
    and --exact; the command fails with a usage error naming both ways when one is
    missing."""

    @functools.wraps(f)
    def checked(*args: Any, **kwargs: Any) -> Any:
        for name, option, envvar, _ in CONNECTION:
            if kwargs.get(name) in (None, ""):
                raise click.UsageError(f"{option} is needed: give {option} or set {envvar}")
        return f(*args, **kwargs)

    path = click.Path(dir_okay=False, path_type=Path)
    command: Any = exact_option(checked)
    command = click.option("--json", "as_json", is_flag=True, help="Print JSON for scripts.")(
        command
    )
    for name, option, envvar, text in reversed(CONNECTION):
        command = click.option(
            option,
            name,
            envvar=envvar,
            show_envvar=True,
            type=str if name == "url" else path,
            metavar="URL" if name == "url" else "FILE",
            help=f"{text} Needed: the option or the variable.",
        )(command)
    return command  # type: ignore[no-any-return]


@contextmanager
def client_errors(hints: dict[int, str] | None = None) -> Iterator[None]:
    """Show the SDK's errors as one sentence, a hint and detail lines (exit status 1);
    ``hints`` gives a command's own hint for an HTTP status."""
    try:
        yield
    except ApiError as exc:
        raise CommandError(
            f"the node refused the request (HTTP {exc.status}): {exc.message}",
            (hints or {}).get(exc.status) or _status_hint(exc.status),
            render.details(exc.details, said=exc.message),
        ) from None
    except ConnectionProblem as exc:
        raise CommandError(exc.problem, exc.hint) from None
    except KeystrataClientError as exc:
        raise CommandError(str(exc)) from None
    except ValueError as exc:  # the SDK checks a URL or argument before sending
        raise click.UsageError(str(exc)) from None


def _status_hint(status: int) -> str:
    if status == 401:
        return f"the node does not know your certificate: {REGISTER_HINT}"
    if status == 403:
        return "your principal's role may not do this here (roles: DEVELOPERS.md, 'HTTP API')"
    return ""


def identity(ca: Path, cert: Path, key: Path) -> TlsIdentity:
    return TlsIdentity(ca=ca, cert=cert, key=key)


@contextmanager
def operator(url: str, ca: Path, cert: Path, key: Path) -> Iterator[OperatorClient]:
    """An operator (or auditor) client of the node; SDK errors shown as above."""
    with client_errors(), OperatorClient(url, identity(ca, cert, key)) as client:
        yield client


def require_role(client: OperatorClient, role: str, command: str) -> dict[str, Any]:
    """Return the node's ``/api/v1/node`` answer when its role is ``role``.

    Raises:
        CommandError: the node has another role; the hint names what to run instead.
    """
    node = client.node_info()
    if node.get("role") != role:
        raise CommandError(
            f"`keystrata {command}` is a {role} command, and {node.get('node_id')} is a "
            f"{node.get('role')}",
            f"give the URL of a {role} (the node's role: GET /api/v1/node)"
            + (
                "; at a relay, `keystrata pairs` shows both stations' buffers"
                if role == "station"
                else ""
            ),
        )
    return node
