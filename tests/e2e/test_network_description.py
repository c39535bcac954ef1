"""One network description applied to three `keystrata serve` processes with the
`keystrata network` command: built from nothing, applied twice (the second time changes
nothing), one pair changed in the file and applied again (exactly that change, on every
node that holds the pair), and a registry edited behind the description's back (the
nodes' comparison of shared facts raises the disagreement alert on both sides)."""

from __future__ import annotations

import json
import re
import shutil
import time
from collections.abc import Callable, Iterator
from pathlib import Path

import httpx
import pytest
from prometheus_client.parser import text_string_to_metric_families

from helpers import on_a_terminal
from keystrata.loopback.configs import peers_section
from keystrata.loopback.pki import PkiFiles
from keystrata.loopback.processes import NodeProcess, free_ports, prepare_node, run_cli, stop_all
from keystrata_client import OperatorClient, TlsIdentity
from keystrata_client.audit import AuditClient

NODES = {"relay-1": "relay", "station-a": "station", "station-b": "station"}


def _description(urls: dict[str, str], pki: PkiFiles, priority: int | None = None) -> str:
    policy = "" if priority is None else f"\n[pairs.pair-ab.policy]\npriority = {priority}\n"
    return f"""
[network]
name = "Test network"
ca = "{pki.ca}"
cert = "{pki.cert("ops-ada")}"
key = "{pki.key("ops-ada")}"

[optics.standard]
protocol = "decoy-bb84"
clock_hz = 1.0e8
rx_aperture_m = 0.4

[relays.relay-1]
url = "{urls["relay-1"]}"
certificate = "{pki.cert("relay-1")}"
description = "the relay"
platform = {{ latitude_deg = 52.0, longitude_deg = 4.0, altitude_m = 20000.0 }}

[stations.station-a]
url = "{urls["station-a"]}"
certificate = "{pki.cert("station-a")}"
site = {{ latitude_deg = 52.1, longitude_deg = 4.1, height_m = 10.0 }}

[stations.station-a.saes.sae-a1]
[stations.station-a.saes.sae-a2]
description = "second encryptor at A"

[stations.station-b]
url = "{urls["station-b"]}"
certificate = "{pki.cert("station-b")}"
site = {{ latitude_deg = 51.9, longitude_deg = 4.2, height_m = 10.0 }}

[stations.station-b.saes.sae-b1]

[links.link-a]
relay = "relay-1"
station = "station-a"
optics = "standard"
module = {{ id = "mod-link-a" }}

[links.link-b]
relay = "relay-1"
station = "station-b"
optics = {{ extends = "standard", rx_aperture_m = 0.3 }}
module = {{ id = "mod-link-b" }}

[pairs.pair-ab]
relay = "relay-1"
stations = ["station-a", "station-b"]
{policy}
[people.ops-ada]
role = "operator"
certificate = "{pki.cert("ops-ada")}"

[people.aud-ben]
role = "auditor"

[people.mon-cal]
role = "monitor"
"""


@pytest.fixture(scope="module")
def network(
    tmp_path_factory: pytest.TempPathFactory, pki: PkiFiles, sqlite_template: Path
) -> Iterator[dict[str, NodeProcess]]:
    """Three nodes that know nothing but their own entry and their first operator when
    the module starts; its tests run in order on them (the last one stops station-b)."""
    tmp_path = tmp_path_factory.mktemp("network")
    ports = dict(zip(NODES, free_ports(len(NODES)), strict=True))
    urls = {n: f"https://127.0.0.1:{p}" for n, p in ports.items()}
    nodes = {}
    for node_id, role in NODES.items():
        db = tmp_path / f"{node_id}.db"
        shutil.copy(sqlite_template, db)
        peers = {p: u for p, u in urls.items() if p != node_id}
        nodes[node_id] = prepare_node(
            tmp_path / node_id,
            pki,
            node_id,
            role,
            f"sqlite:///{db}",
            port=ports[node_id],
            extra="\n[peer]\nregistry_compare_seconds = 0.5\n" + peers_section(peers),
        )
    try:
        for node in nodes.values():
            node.start(pki)
        yield nodes
    finally:
        stop_all(nodes.values())


def _cli(*args: str, columns: int = 100) -> tuple[int, str]:
    result = run_cli("network", *args, check=False, env={"COLUMNS": str(columns)})
    assert "Traceback" not in result.stderr, result.stderr
    return result.returncode, result.stdout + result.stderr


def _applied(network: dict[str, NodeProcess], pki: PkiFiles, tmp_path: Path) -> Path:
    """The description of ``network`` written to ``tmp_path`` and applied."""
    path = tmp_path / "network.toml"
    path.write_text(_description({n: p.url for n, p in network.items()}, pki))
    assert _cli("apply", str(path))[0] == 0
    return path


def _ops(node: NodeProcess, pki: PkiFiles) -> OperatorClient:
    return OperatorClient(
        node.url, TlsIdentity(ca=pki.ca, cert=pki.cert("ops-ada"), key=pki.key("ops-ada"))
    )


def _held(node: NodeProcess, pki: PkiFiles) -> dict[str, list[dict[str, object]]]:
    with _ops(node, pki) as ops:
        return {
            kind: sorted(ops.list(kind), key=lambda e: json.dumps(e, sort_keys=True))
            for kind in ("nodes", "links", "pairs", "principals")
        }


def _without_times(held: dict[str, list[dict[str, object]]]) -> dict[str, list[dict[str, object]]]:
    return {
        k: [{f: v for f, v in e.items() if f not in ("created_at", "updated_at")} for e in entries]
        for k, entries in held.items()
    }


def test_a_description_builds_the_network_and_applying_again_changes_nothing(
    network: dict[str, NodeProcess], pki: PkiFiles, tmp_path: Path
) -> None:
    urls = {n: p.url for n, p in network.items()}
    path = tmp_path / "network.toml"
    path.write_text(_description(urls, pki))

    code, out = _cli("check", str(path))
    assert code == 3, out  # changes to apply
    assert "create pairs pair-ab" in out

    code, out = _cli("apply", str(path))
    assert code == 0, out
    assert "━" not in out  # piped: no progress bar
    # What each node holds is what it takes part in (the relay no SAEs; each station
    # its own link only, its own SAEs and its partner's).
    relay, a, b = (_held(network[n], pki) for n in NODES)
    assert [p["pair_id"] for p in relay["pairs"]] == ["pair-ab"]
    assert {k["link_id"] for k in relay["links"]} == {"link-a", "link-b"}
    assert {k["link_id"] for k in a["links"]} == {"link-a"}
    assert not [p for p in relay["principals"] if p["role"] == "sae"]
    assert {p["principal_id"] for p in b["principals"] if p["role"] == "sae"} == {
        "sae-a1",
        "sae-a2",
        "sae-b1",
    }
    peers_of_a = {p["principal_id"]: p for p in a["principals"] if p["role"] == "peer"}
    assert set(peers_of_a) == {"peer-relay-1", "peer-station-b"}
    assert peers_of_a["peer-relay-1"]["cert_sha256"] == pki.pin("relay-1")
    assert next(n for n in a["nodes"] if n["node_id"] == "relay-1")["physical"] == {
        "latitude_deg": 52.0,
        "longitude_deg": 4.0,
        "altitude_m": 20000.0,
    }
    optics_b = next(k for k in b["links"] if k["link_id"] == "link-b")["optics"]
    assert optics_b == {"protocol": "decoy-bb84", "clock_hz": 1.0e8, "rx_aperture_m": 0.3}

    before = {n: _without_times(_held(p, pki)) for n, p in network.items()}
    code, out = _cli("apply", str(path))
    assert code == 0, out
    assert out.count("nothing to do") == 3, out
    code, out = _cli("check", str(path))
    assert code == 0, out
    after = {n: _without_times(_held(p, pki)) for n, p in network.items()}
    assert after == before

    # One pair changes in the file: exactly that change, on every node holding the pair.
    path.write_text(_description(urls, pki, priority=250))
    code, out = _cli("check", "--json", str(path))
    assert code == 3, out
    planned = json.loads(out[: out.rindex("]") + 1])
    assert {
        s["node_id"]: [(a["verb"], a["kind"], a["entry_id"], a["fields"]) for a in s["actions"]]
        for s in planned
    } == {n: [("change", "pairs", "pair-ab", ["policy.priority"])] for n in NODES}
    # Applied from a terminal this time: a progress bar while it works (none when piped).
    shown = on_a_terminal(["network", "apply", str(path)])
    assert re.search(r"(relay-1|station-a|station-b): change pairs pair-ab", shown), shown
    assert "━" in shown
    changed = {n: _without_times(_held(p, pki)) for n, p in network.items()}
    for n in NODES:
        pair = changed[n]["pairs"][0]
        assert pair["policy"]["priority"] == 250  # type: ignore[index]
        expected = json.loads(json.dumps(before[n]))
        expected["pairs"][0]["policy"]["priority"] = 250
        assert changed[n] == expected


def _disagreements(node: NodeProcess, pki: PkiFiles) -> dict[str, float]:
    """keystrata_registry_disagreements by peer, from a real scrape (prometheus_client's
    parser reads it)."""
    identity = TlsIdentity(ca=pki.ca, cert=pki.cert("mon-cal"), key=pki.key("mon-cal"))
    with httpx.Client(verify=identity.ssl_context()) as client:
        text = client.get(node.url + "/api/v1/metrics").raise_for_status().text
    return {
        sample.labels["peer"]: sample.value
        for family in text_string_to_metric_families(text)
        if family.name == "keystrata_registry_disagreements"
        for sample in family.samples
    }


def _until(what: str, check: Callable[[], bool], timeout: float = 30.0) -> None:
    deadline = time.monotonic() + timeout
    while not check():
        assert time.monotonic() < deadline, f"no {what} within {timeout} s"
        time.sleep(0.25)


def test_a_registry_edited_behind_the_descriptions_back_raises_the_alert_on_both_sides(
    network: dict[str, NodeProcess], pki: PkiFiles, tmp_path: Path
) -> None:
    path = _applied(network, pki, tmp_path)
    relay, a = network["relay-1"], network["station-a"]
    _until("agreement", lambda: _disagreements(relay, pki) == {"station-a": 0, "station-b": 0})

    # An operator raises the pair's priority at the relay alone, by hand.
    with _ops(relay, pki) as ops:
        ops.change("pairs", "pair-ab", {"policy": {"priority": 999}})
    _until("alert at the relay", lambda: _disagreements(relay, pki).get("station-a", 0) > 0)
    _until("alert at station-a", lambda: _disagreements(a, pki).get("relay-1", 0) > 0)
    assert _disagreements(relay, pki) == {"station-a": 1, "station-b": 1}
    assert _disagreements(a, pki) == {"relay-1": 1, "station-b": 0}  # A and B still agree
    code, out = _cli("status", str(path))
    assert "registry" in out and "pair-ab" in out, out
    with _ops(a, pki) as ops:
        note = ops.readiness()["checks"]["registry"]
    assert "relay-1" in note and "pair-ab" in note and "priority" in note
    assert "999" not in note  # names, never values
    aud = TlsIdentity(ca=pki.ca, cert=pki.cert("aud-ben"), key=pki.key("aud-ben"))
    for node in (relay, a):
        with AuditClient(node.url, aud) as auditor:
            found = list(auditor.search(event=["registry.peer_disagrees"]))
        assert found, node.node_id
        assert "999" not in json.dumps(found)

    # The description knows better: check shows exactly the way back; apply clears it.
    code, out = _cli("check", str(path))
    assert code == 3 and "change pairs pair-ab: policy.priority" in out, out
    assert out.count("change pairs") == 1, out
    assert _cli("apply", str(path))[0] == 0
    _until(
        "agreement again", lambda: _disagreements(relay, pki) == {"station-a": 0, "station-b": 0}
    )
    _until("agreement at A", lambda: _disagreements(a, pki).get("relay-1") == 0)
    with AuditClient(a.url, aud) as auditor:
        assert list(auditor.search(event=["registry.peer_agrees"]))


def test_status_asks_every_node(
    network: dict[str, NodeProcess], pki: PkiFiles, tmp_path: Path
) -> None:
    path = _applied(network, pki, tmp_path)
    code, out = _cli("status", str(path), columns=80)
    assert code == 0, out
    for name in ("relay-1", "station-a", "station-b", "link-a", "link-b", "pair-ab"):
        assert name in out
    # An 80-column terminal: nothing cut, nothing wider.
    assert "…" not in out and "..." not in out, out
    assert max(len(line) for line in out.splitlines()) <= 80, out
    code, out = _cli("status", "--json", str(path))
    assert code == 0, out
    answer = json.loads(out)
    assert [n["up"] for n in answer["nodes"]] == [True, True, True]
    assert [r["link_id"] for r in answer["links"]] == ["link-a", "link-b"]
    network["station-b"].stop()
    code, out = _cli("status", str(path))
    assert code == 1, out
    assert "station-b" in out
