"""Create the demo's work folder: PKI, key-encryption keys, node configs and databases,
the manifest ``demo.json`` that people and scripts use to reach the running demo, and
``encryptors.toml``, the encryptor emulator's configuration for the demo's pairs."""

from __future__ import annotations

import json
import shutil
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from keystrata.config import load_settings
from keystrata.crypto.kek import write_new_kek
from keystrata.demo import scenario
from keystrata.loopback.configs import node_toml, peers_section
from keystrata.loopback.pki import PkiFiles, cert_pin, make_pki
from keystrata.node.lifecycle import initialise, load_keyring
from keystrata.storage.db import Database

#: Demo nodes sign a ledger checkpoint every second when there is something new.
CHECKPOINT_SECONDS = 1.0

MANIFEST = "demo.json"
#: The encryptor pairs of the demo, in the format of ``keystrata-encryptors --config``.
ENCRYPTORS = "encryptors.toml"


@dataclass(frozen=True)
class DemoNode:
    node_id: str
    role: str
    port: int
    config: Path

    @property
    def url(self) -> str:
        return f"https://127.0.0.1:{self.port}"


def prepare_folder(workdir: Path) -> None:
    """Empty ``workdir`` if it holds an earlier demo; refuse a folder holding anything else.

    Raises:
        click-free ValueError: the folder has files that no demo wrote.
    """
    if workdir.exists() and any(workdir.iterdir()):
        if not (workdir / MANIFEST).exists() and not (workdir / "pki").exists():
            raise ValueError(
                f"{workdir} is not empty and holds no earlier demo; choose another --workdir"
            )
        shutil.rmtree(workdir)
    workdir.mkdir(parents=True, exist_ok=True)


def build_pki(workdir: Path, nodes: list[DemoNode]) -> PkiFiles:
    """Make the demo's CA, a certificate per node, and one per person, QKD module and SAE
    of the scenario, in ``workdir/pki``."""
    clients = {scenario.OPERATOR: "operator", scenario.AUDITOR: "auditor"}
    for st in scenario.STATIONS:
        clients[st.module] = "qkd-module"
        clients |= dict.fromkeys(st.saes, "sae")
    return make_pki(workdir / "pki", scenario.CA_NAME, [n.node_id for n in nodes], clients)


#: Seconds between comparisons of shared registry facts with each peer.
REGISTRY_COMPARE_SECONDS = 10


def _peers(node_id: str, nodes: list[DemoNode]) -> list[DemoNode]:
    if node_id == scenario.RELAY:
        return [n for n in nodes if n.node_id != node_id]
    wanted = {scenario.RELAY, *scenario.partners(node_id)}
    return [n for n in nodes if n.node_id in wanted]


def write_configs(workdir: Path, nodes: list[DemoNode]) -> None:
    """Write each node's ``node.toml`` and KEK; paths in it are relative to its folder."""
    for node in nodes:
        folder = node.config.parent
        folder.mkdir(parents=True, exist_ok=True)
        write_new_kek(folder / "kek.b64")
        peers = peers_section({p.node_id: p.url for p in _peers(node.node_id, nodes)})
        node.config.write_text(
            node_toml(
                header=f"# {scenario.ORGANISATION}: node {node.node_id} (demo)",
                node_id=node.node_id,
                role=node.role,
                port=node.port,
                ca="../pki/ca.crt",
                cert=f"../pki/{node.node_id}.crt",
                key=f"../pki/{node.node_id}.key",
                db_url=f"sqlite:///{node.node_id}.db",
                kek="kek.b64",
                extra=(
                    f"\n[ledger]\ncheckpoint_seconds = {CHECKPOINT_SECONDS}\n"
                    # Registries are compared with the peers' often enough to be seen
                    # within a short run (the default is a minute).
                    f"\n[peer]\nregistry_compare_seconds = {REGISTRY_COMPARE_SECONDS}\n{peers}"
                ),
            )
        )


def init_databases(nodes: list[DemoNode]) -> None:
    """Migrate each node's database, create its secrets, and add the first operator."""
    from keystrata.node.lifecycle import open_node
    from keystrata.registry import provisioning
    from keystrata.registry.specs import Kind, PrincipalRole, PrincipalSpec

    for node in nodes:
        settings = load_settings(node.config, env={})
        db = Database.from_url(settings.database.url)
        try:
            initialise(settings, db, load_keyring(settings))
            provisioning.create(
                open_node(settings, db),
                Kind.PRINCIPALS,
                PrincipalSpec(
                    principal_id=scenario.OPERATOR,
                    role=PrincipalRole.OPERATOR,
                    cert_subject=scenario.OPERATOR,
                    cert_sha256=cert_pin(settings.tls.cert.parent, scenario.OPERATOR),
                    description="Ida Varga, network operator",
                ),
                actor="local-admin",
            )
        finally:
            db.dispose()


def write_manifest(workdir: Path, nodes: list[DemoNode]) -> Path:
    """Write ``demo.json``; every path in it is relative to ``workdir``."""
    principals: list[dict[str, Any]] = [
        {"id": scenario.OPERATOR, "role": "operator"},
        {"id": scenario.AUDITOR, "role": "auditor"},
    ]
    for st in scenario.STATIONS:
        principals.append({"id": st.module, "role": "qkd-module", "link": st.link_id})
        principals += [{"id": sae, "role": "sae", "station": st.node_id} for sae in st.saes]
    for p in principals:
        p["cert"] = f"pki/{p['id']}.crt"
        p["key"] = f"pki/{p['id']}.key"
    manifest = {
        "scenario": scenario.ORGANISATION,
        "ca": "pki/ca.crt",
        "encryptors": ENCRYPTORS,
        "nodes": [
            {
                "id": n.node_id,
                "role": n.role,
                "url": n.url,
                "config": str(n.config.relative_to(workdir)),
            }
            for n in nodes
        ],
        "principals": principals,
        "links": [
            {"id": st.link_id, "relay": scenario.RELAY, "station": st.node_id}
            for st in scenario.STATIONS
        ],
        "pairs": [
            {"id": scenario.pair_id(a, b), "stations": sorted([a, b])} for a, b in scenario.PAIRS
        ],
    }
    path = workdir / MANIFEST
    path.write_text(json.dumps(manifest, indent=2) + "\n")
    return path


def encryptor_pairs() -> list[tuple[str, str, str, str]]:
    """(master SAE, its station, slave SAE, its station) of every demo encryptor pair:
    for each station pair, one each way (first SAE of A to first SAE of B, second SAE
    of B to second SAE of A)."""
    out = []
    for a, b in scenario.PAIRS:
        sa, sb = scenario.station(a), scenario.station(b)
        out += [(sa.saes[0], a, sb.saes[0], b), (sb.saes[1], b, sa.saes[1], a)]
    return out


def write_encryptor_config(workdir: Path, nodes: list[DemoNode]) -> Path:
    """Write ``encryptors.toml`` naming this run's URLs and the SAEs' certificates
    (paths relative to ``workdir``); the demo's own encryptors run from it too."""
    url = {n.node_id: n.url for n in nodes}
    lines = [
        f"# {scenario.ORGANISATION}: the demo's encryptor pairs, written by `keystrata demo`.",
        "# The URLs name this run's ports: valid while this demo runs. Against it:",
        f"#   keystrata-encryptors --config {workdir / ENCRYPTORS} --rekeys 20",
        "# Format: keystrata_client/emulators/encryptor_config.py; paths are relative",
        "# to this file's folder.",
        "",
        "[emulator]",
        "summary_seconds = 5.0",
        "drain_seconds = 5.0",
        "",
        "[defaults]",
        'ca = "pki/ca.crt"',
        "key_size_bits = 256",
        "keys_per_rekey = 2",
        "interval_seconds = 1.0",
    ]
    for master, m_at, slave, s_at in encryptor_pairs():
        lines += [
            "",
            "[[pair]]",
            f"name = {json.dumps(f'{master} -> {slave}')}",
            f"master_sae_id = {json.dumps(master)}",
            f"master_url = {json.dumps(url[m_at])}",
            f'master_cert = "pki/{master}.crt"',
            f'master_key = "pki/{master}.key"',
            f"slave_sae_id = {json.dumps(slave)}",
            f"slave_url = {json.dumps(url[s_at])}",
            f'slave_cert = "pki/{slave}.crt"',
            f'slave_key = "pki/{slave}.key"',
        ]
    path = workdir / ENCRYPTORS
    path.write_text("\n".join(lines) + "\n")
    return path
