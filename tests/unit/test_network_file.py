"""The network description: reading and checking the file (every error names the
file, the place and the problem), what each node should hold, and what applying it
would change (pure comparison with a node's registry lists)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest

from keystrata.loopback.pki import PkiFiles
from keystrata_client.network import changes, description, desired
from keystrata_client.network.description import DescriptionError

HEAD = """
[relays.r1]
cert_subject = "r1"
cert_sha256 = "{pin}"
[stations.s1]
cert_subject = "s1"
cert_sha256 = "{pin}"
[stations.s2]
cert_subject = "s2"
cert_sha256 = "{pin}"
[stations.s1.saes.e1]
[stations.s2.saes.e2]
[links.k1]
relay = "r1"
station = "s1"
[links.k2]
relay = "r1"
station = "s2"
[pairs.p12]
relay = "r1"
stations = ["s1", "s2"]
"""
PIN = "ab" * 32


def _load(tmp_path: Path, text: str) -> description.Network:
    path = tmp_path / "net.toml"
    path.write_text(HEAD.format(pin=PIN) + text)
    return description.load(path)


def _fails(tmp_path: Path, text: str, *words: str) -> str:
    with pytest.raises(DescriptionError) as caught:
        _load(tmp_path, text)
    message = str(caught.value)
    assert message.startswith("net.toml: "), message
    for w in words:
        assert w in message, message
    return message


def test_a_small_network_reads(tmp_path: Path) -> None:
    net = _load(tmp_path, '[people.ops]\nrole = "operator"\ncert_sha256 = "' + PIN + '"\n')
    assert sorted(net.nodes) == ["r1", "s1", "s2"]
    assert net.links["k1"].module_id == "qkd-k1"  # the default module principal
    assert net.pairs["p12"].stations == ("s1", "s2")
    assert net.saes["e2"].station == "s2"


@pytest.mark.parametrize(
    ("text", "words"),
    [
        ('[links.k3]\nrelay = "s1"\nstation = "s2"\n', ("links.k3.relay", "not a relay")),
        ('[pairs.p13]\nrelay = "r1"\nstations = ["s1", "s3"]\n', ("pairs.p13.stations.1",)),
        ('[pairs.p11]\nrelay = "r1"\nstations = ["s1", "s1"]\n', ("two different stations",)),
        ('[pairs.again]\nrelay = "r1"\nstations = ["s2", "s1"]\n', ("p12 already joins",)),
        ("[links.k1.colour]\n", ("links.k1.colour", "unknown member")),
        ("[surprise]\n", ("surprise", "unknown member")),
        ('[people.x]\nrole = "boss"\n', ("people.x.role", "operator, auditor or monitor")),
        ('[people.x]\nrole = "operator"\n', ("people.x", "cert_sha256")),
        ('[people.x]\nrole = "auditor"\ncert_subject = "e1"\n', ("also that of saes.e1",)),
        ('[people.x]\nrole = "auditor"\ncert_sha256 = "XYZ"\n', ("people.x.cert_sha256",)),
        ('[links.k3]\nrelay = "r1"\nstation = "s1"\noptics = "nope"\n', ("[optics.nope]",)),
        (
            '[links.k3]\nrelay = "r1"\nstation = "s1"\noptics = { extends = "nope" }\n',
            ("links.k3.optics.extends",),
        ),
        (
            '[links.k3]\nrelay = "r1"\nstation = "s1"\noptics = { protocol = "decoy-bb84", '
            "clock_hz = -5.0 }\n",
            ("links.k3.optics", "clock_hz"),
        ),
        ("[relays.r2]\ncert_sha256 = 5\n", ("relays.r2.cert_sha256", "string")),
        ('[relays.r2]\nurl = "http://x"\ncert_sha256 = "' + PIN + '"\n', ("https://",)),
    ],
)
def test_every_error_names_its_place(tmp_path: Path, text: str, words: tuple[str, ...]) -> None:
    _fails(tmp_path, text, *words)


def test_not_toml_and_missing_files_are_clear(tmp_path: Path) -> None:
    bad = tmp_path / "bad.toml"
    bad.write_text("[relays\n")
    with pytest.raises(DescriptionError, match=r"bad\.toml: not valid TOML"):
        description.load(bad)
    with pytest.raises(DescriptionError, match="cannot read it"):
        description.load(tmp_path / "absent.toml")
    with pytest.raises(DescriptionError, match=r"relays\.r2\.certificate"):
        _load(tmp_path, '[relays.r2]\ncertificate = "no-such.crt"\n')


def test_a_certificate_file_gives_subject_and_pin(tmp_path: Path, pki: PkiFiles) -> None:
    net = _load(
        tmp_path, f'[people.ops-ada]\nrole = "operator"\ncertificate = "{pki.cert("ops-ada")}"\n'
    )
    cert = net.people["ops-ada"].certificate
    # The pin is the SHA-256 of the DER certificate, as the nodes compute it.
    assert (cert.subject, cert.sha256) == ("ops-ada", pki.pin("ops-ada"))


def test_each_node_holds_what_it_takes_part_in(tmp_path: Path) -> None:
    net = _load(
        tmp_path,
        '[stations.s3]\ncert_sha256 = "' + PIN + '"\n[links.k3]\nrelay = "r1"\nstation = "s3"\n'
        '[people.aud]\nrole = "auditor"\n',
    )
    held = {n: {(e.kind, e.entry_id) for e in desired.entries_for(net, n)} for n in net.nodes}
    assert ("pairs", "p12") in held["s1"] and ("pairs", "p12") in held["r1"]
    assert ("nodes", "s3") in held["r1"] and ("nodes", "s3") not in held["s1"]
    assert ("links", "k2") not in held["s1"]
    assert ("principals", "e2") in held["s1"]  # the partner's SAE: named as slave
    assert not any(k == "principals" and i.startswith("e") for k, i in held["r1"])
    assert ("principals", "peer-s3") in held["r1"] and ("principals", "peer-s3") not in held["s1"]
    assert all(("principals", "aud") in h for h in held.values())
    # References come before what refers to them, on every node.
    for n in net.nodes:
        kinds = [e.kind for e in desired.entries_for(net, n)]
        assert kinds == sorted(kinds, key=desired.KIND_ORDER.index)
    assert desired.apply_order(net)[-1] == "r1"


def _current(net: description.Network, node: str) -> dict[str, list[dict[str, Any]]]:
    """What a node holds after a clean apply, as the registry API lists it."""
    out: dict[str, list[dict[str, Any]]] = {k: [] for k in desired.KIND_ORDER}
    for e in desired.entries_for(net, node):
        row = dict(e.body) | {"retired_at": None}
        if e.kind == "pairs":
            row["policy"] = {"priority": 100, "key_ttl_seconds": 3600} | row["policy"]
        if e.kind == "principals":
            row = {"cert_sha256": None, "station_id": None, "link_id": None, "node_id": None} | row
        out[e.kind].append(row)
    return out


DEFAULTS = {"priority": 100, "key_ttl_seconds": 3600}


def test_in_line_means_no_action_and_a_policy_change_is_one_field(tmp_path: Path) -> None:
    net = _load(tmp_path, "")
    current = _current(net, "s1")
    same = changes.compare("s1", desired.entries_for(net, "s1"), current, policy_defaults=DEFAULTS)
    assert same.empty and not same.unlisted and same.unchanged == sum(map(len, current.values()))
    # Someone raised the priority by hand: leaving it out of the file means the default.
    current["pairs"][0]["policy"]["priority"] = 300
    back = changes.compare("s1", desired.entries_for(net, "s1"), current, policy_defaults=DEFAULTS)
    assert [(a.verb, a.kind, a.entry_id, a.body, a.fields) for a in back.actions] == [
        ("change", "pairs", "p12", {"policy": {"priority": 100}}, ("policy.priority",))
    ]


def test_fixed_fields_and_retired_ids_are_conflicts_not_calls(tmp_path: Path) -> None:
    net = _load(tmp_path, "")
    current = _current(net, "r1")
    current["links"][0]["station_id"] = "s9"
    current["pairs"][0]["retired_at"] = "2026-12-01T00:00:00+00:00"
    found = changes.compare("r1", desired.entries_for(net, "r1"), current, policy_defaults=DEFAULTS)
    assert not found.actions
    assert sorted((c.kind, c.entry_id) for c in found.conflicts) == [
        ("links", "k1"),
        ("pairs", "p12"),
    ]
    assert "station_id" in found.conflicts[0].problem


def test_unlisted_entries_are_kept_unless_asked_and_never_the_node_or_the_caller(
    tmp_path: Path,
) -> None:
    net = _load(tmp_path, "")
    current = _current(net, "s1")
    current["principals"].append({"principal_id": "old-sae", "role": "sae", "retired_at": None})
    current["principals"].append({"principal_id": "me", "role": "operator", "retired_at": None})
    kept = changes.compare("s1", desired.entries_for(net, "s1"), current)
    assert ("principals", "old-sae") in kept.unlisted and not kept.actions
    pruned = changes.compare(
        "s1",
        desired.entries_for(net, "s1"),
        current,
        retire_unlisted=True,
        keep=[("principals", "me")],
    )
    assert [(a.verb, a.entry_id) for a in pruned.actions] == [("retire", "old-sae")]
