"""Node configuration files of a loopback network (TOML, as ``load_settings`` reads)."""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path

from keystrata.crypto.kek import write_new_kek
from keystrata.loopback.pki import PkiFiles

#: ``[database]`` lines of nodes that trade power-loss durability for speed (the
#: durability guard refuses NORMAL unless told that the loss is accepted).
FAST_SQLITE = """sqlite_synchronous = "NORMAL"
# Loopback nodes trade power-loss durability for speed; the guard would refuse it otherwise.
accept_data_loss_on_power_failure = true
"""


def peers_section(peers: Mapping[str, str]) -> str:
    """``[[peers]]`` tables for peer node ID -> URL."""
    return "".join(f'\n[[peers]]\nid = "{p}"\nurl = "{url}"\n' for p, url in peers.items())


def node_toml(
    *,
    node_id: str,
    role: str,
    port: int,
    ca: str,
    cert: str,
    key: str,
    db_url: str,
    kek: str,
    server: str = "",
    database: str = "",
    extra: str = "",
    header: str = "",
) -> str:
    """The TOML text of a node listening on 127.0.0.1:``port``; ``server`` and
    ``database`` are lines added to those tables, ``extra`` is appended (more tables)."""
    return f"""{header}
[node]
id = "{node_id}"
role = "{role}"

[server]
host = "127.0.0.1"
port = {port}
{server}
[tls]
ca = "{ca}"
cert = "{cert}"
key = "{key}"

[database]
url = "{db_url}"
{database}
[kek]
file = "{kek}"
{extra}
"""


def write_config(
    folder: Path,
    *,
    node_id: str,
    role: str,
    db_url: str,
    pki: PkiFiles,
    port: int = 8443,
    extra: str = "",
    server_extra: str = "",
    database_extra: str = FAST_SQLITE,
) -> Path:
    """Write ``<node_id>.toml`` and, unless there is one, a fresh KEK ``<node_id>.kek``
    into ``folder``, with absolute paths into ``pki``; return the TOML path."""
    folder.mkdir(parents=True, exist_ok=True)
    kek = folder / f"{node_id}.kek"
    if not kek.exists():
        write_new_kek(kek)
    path = folder / f"{node_id}.toml"
    path.write_text(
        node_toml(
            node_id=node_id,
            role=role,
            port=port,
            ca=str(pki.ca),
            cert=str(pki.cert(node_id)),
            key=str(pki.key(node_id)),
            db_url=db_url,
            kek=str(kek),
            server=server_extra,
            database=database_extra,
            extra=extra,
        )
    )
    return path


def set_workers(config: Path, workers: int) -> None:
    """Make the node of ``config`` run ``workers`` uvicorn worker processes."""
    text = config.read_text()
    config.write_text(text.replace("[server]\n", f"[server]\nworkers = {workers}\n", 1))
