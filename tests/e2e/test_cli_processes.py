"""The `keystrata` command against real node processes (a station and a relay, `keystrata
serve` on SQLite, mutual TLS on loopback): every TLS, URL and certificate mistake is one
sentence and a hint on stderr, exit status 1, never a traceback; registry lists and
error details are text, never Python reprs, and --json is JSON; `deliveries` at a relay
says it is a station command; long work shows a progress bar on a terminal only."""

from __future__ import annotations

import json
import re
import shutil
from collections.abc import Iterator
from pathlib import Path

import pytest

from helpers import on_a_terminal
from keystrata.loopback.configs import write_config
from keystrata.loopback.pki import PkiFiles
from keystrata.loopback.processes import (
    NodeProcess,
    free_port,
    prepare_node,
    run_cli,
)


@pytest.fixture(scope="module")
def nodes(
    tmp_path_factory: pytest.TempPathFactory, pki: PkiFiles, sqlite_template: Path
) -> Iterator[dict[str, NodeProcess]]:
    base = tmp_path_factory.mktemp("cli")
    started: dict[str, NodeProcess] = {}
    try:
        for node_id, role in (("station-a", "station"), ("relay-1", "relay")):
            db = base / f"{node_id}.db"
            shutil.copy(sqlite_template, db)
            node = prepare_node(base / node_id, pki, node_id, role, f"sqlite:///{db}")
            started[node_id] = node.start(pki)
        yield started
    finally:
        for node in started.values():
            node.stop()


def _env(pki: PkiFiles, url: str, name: str = "ops-ada", **files: Path) -> dict[str, str]:
    return {
        "KEYSTRATA_URL": url,
        "KEYSTRATA_CA": str(files.get("ca", pki.ca)),
        "KEYSTRATA_CERT": str(files.get("cert", pki.cert(name))),
        "KEYSTRATA_KEY": str(files.get("key", pki.key(name))),
    }


def _fails(env: dict[str, str], *args: str) -> tuple[str, str]:
    """Run a failing command; return its error sentence and hint (one line each)."""
    result = run_cli(*(args or ("pools",)), env=env, check=False)
    assert result.returncode == 1, result.stdout + result.stderr
    assert "Traceback" not in result.stderr and result.stdout == ""
    lines = result.stderr.splitlines()
    assert lines[0].startswith("error: ") and lines[-1].startswith("hint: "), result.stderr
    return lines[0].removeprefix("error: "), lines[-1].removeprefix("hint: ")


def test_tls_url_and_certificate_mistakes_are_one_sentence_and_a_hint(
    nodes, pki: PkiFiles, tmp_path: Path
) -> None:
    station = nodes["station-a"]
    url = station.url
    port = url.rsplit(":", 1)[1]
    good = _env(pki, url)
    assert "link key pools at station-a" in run_cli("pools", env=good).stdout

    # A key that belongs to another certificate (was a Python traceback).
    problem, hint = _fails(_env(pki, url, key=pki.key("aud-ben")))
    assert problem == (
        f"the client key {pki.key('aud-ben')} does not belong to the certificate "
        f"{pki.cert('ops-ada')}"
    )
    assert "NAME.key beside NAME.crt" in hint
    # Plain HTTP to a node that speaks HTTPS only (was "Server disconnected ...").
    problem, hint = _fails(_env(pki, f"http://127.0.0.1:{port}"))
    assert "speak HTTPS only" in problem and hint == f"use https://127.0.0.1:{port}"
    # A URL with a path (was "404: Not Found").
    problem, hint = _fails(_env(pki, f"{url}/api/v1/links"))
    assert (
        problem == f"{url}/api/v1/links is not a node's base URL: it has the path '/api/v1/links'"
    )
    assert hint == f"give the base URL only, {url}"
    # Missing and unreadable files.
    missing = tmp_path / "nowhere.crt"
    problem, hint = _fails(_env(pki, url, cert=missing))
    assert problem == f"the client certificate file {missing} does not exist"
    assert "NAME.crt" in hint
    junk = tmp_path / "junk.pem"
    junk.write_text("not a certificate\n")
    problem, hint = _fails(_env(pki, url, ca=junk))
    assert problem == f"the CA certificate file {junk} holds no usable PEM certificate"
    problem, _ = _fails(_env(pki, url, cert=junk))
    assert problem.startswith(f"the client certificate {junk} or its key")
    # A server certificate another CA issued.
    foreign = pki.foreign_dir / "ca.crt"
    problem, hint = _fails(_env(pki, url, ca=foreign))
    assert problem.startswith(f"the server at {url} presented a certificate the CA file")
    assert "pki show" in hint
    # A client certificate of another CA: the node closes the connection.
    problem, hint = _fails(
        _env(pki, url, cert=foreign.parent / "ops-ada.crt", key=foreign.parent / "ops-ada.key")
    )
    assert problem.startswith(f"the node at {url} closed the connection without an answer")
    assert "issued by its network's CA" in hint
    # Nothing listening.
    nobody = f"https://127.0.0.1:{free_port()}"
    problem, hint = _fails(_env(pki, nobody))
    assert problem == f"nothing accepts connections at {nobody} (connection refused)"
    # A certificate of our CA that no principal names: the hint says how to register it.
    problem, hint = _fails(_env(pki, url, name="stranger"))
    assert problem == "the node refused the request (HTTP 401): unauthorized"
    assert "keystrata registry create principals" in hint and "'Monitoring'" in hint


def test_registry_lists_and_errors_are_text_and_json_is_json(nodes, pki: PkiFiles) -> None:
    env = _env(pki, nodes["station-a"].url)
    for node_id in ("relay-1", "station-b"):
        role = "relay" if node_id.startswith("relay") else "station"
        run_cli("registry", "create", "nodes", "--set", f"node_id={node_id}", "--set",
                f"role={role}", env=env)  # fmt: skip
    created = run_cli(
        "registry", "create", "pairs", "--set", "pair_id=p1", "--set", "relay_id=relay-1",
        "--set", 'stations=["station-a","station-b"]', "--set", "policy.priority=5",
        "--set", 'policy.masters=["sae-a1","sae-a2"]', env=env,
    ).stdout  # fmt: skip
    assert created.splitlines()[0] == "created pair p1"
    assert re.search(r"^policy\.buffer_target_bits +1\.05 Mbit$", created, re.M), created
    listed = run_cli("registry", "list", "pairs", env=env).stdout
    assert "station-a, station-b" in listed and "sae-a1, sae-a2" in listed
    assert "priority: 5" in listed
    for repr_mark in ("['", "{'", "None", '["', '{"'):
        assert repr_mark not in listed and repr_mark not in created
    exact = run_cli("registry", "show", "pairs", "p1", "--exact", env=env).stdout
    assert re.search(r"^policy\.buffer_target_bits +1,048,576 bit$", exact, re.M), exact
    as_json = json.loads(run_cli("registry", "list", "pairs", "--json", env=env).stdout)
    assert as_json[0]["stations"] == ["station-a", "station-b"]
    assert as_json[0]["policy"]["buffer_target_bits"] == 1_048_576

    bad = run_cli(
        "registry", "create", "nodes", "--set", "node_id=relay-2", "--set", "role=relay",
        "--set", "colour=red", "--set", "description=5", env=env, check=False,
    )  # fmt: skip
    assert bad.returncode == 1 and "Traceback" not in bad.stderr
    assert bad.stderr.startswith("error: the node refused the request (HTTP 400): invalid")
    assert "body.colour: " in bad.stderr and "{'" not in bad.stderr
    not_json = run_cli("registry", "create", "nodes", "--body", "{nope", env=env, check=False)
    assert not_json.returncode == 2 and "--body" in not_json.stderr
    assert "Traceback" not in not_json.stderr


def test_deliveries_is_a_station_command(nodes, pki: PkiFiles) -> None:
    at_relay = run_cli("deliveries", env=_env(pki, nodes["relay-1"].url), check=False)
    assert at_relay.returncode == 1 and at_relay.stdout == ""
    assert at_relay.stderr.splitlines() == [
        "error: `keystrata deliveries` is a station command, and relay-1 is a relay",
        "hint: give the URL of a station (the node's role: GET /api/v1/node); at a relay, "
        "`keystrata pairs` shows both stations' buffers",
    ]
    at_station = run_cli("deliveries", env=_env(pki, nodes["station-a"].url))
    assert "key delivery at station-a" in at_station.stdout


def test_pools_and_pairs_fit_80_columns_in_words(nodes, pki: PkiFiles) -> None:
    env = _env(pki, nodes["relay-1"].url) | {"COLUMNS": "80"}
    pools = run_cli("pools", env=env).stdout
    pairs = run_cli("pairs", env=env).stdout
    for out in (pools, pairs):
        assert all(len(line) <= 80 for line in out.splitlines()), out
        assert "…" not in out and "_bits" not in out and "_bps" not in out
    for header in ("available", "used", "rate", "plan", "of plan", "last block"):
        assert header in pools


def test_a_missing_option_names_its_variable(pki: PkiFiles) -> None:
    env = {"KEYSTRATA_URL": "", "KEYSTRATA_CA": "", "KEYSTRATA_CERT": "", "KEYSTRATA_KEY": ""}
    result = run_cli("pools", env=env, check=False)
    assert result.returncode == 2
    assert "--url is needed: give --url or set KEYSTRATA_URL" in result.stderr
    help_text = run_cli("pools", "--help", env={"COLUMNS": "100"}).stdout
    assert "[env var: KEYSTRATA_URL]" in help_text and "required" not in help_text


def test_long_work_shows_a_progress_bar_on_a_terminal_only(pki: PkiFiles, tmp_path: Path) -> None:
    configs = [
        write_config(tmp_path / name, node_id="station-a", role="station", pki=pki,
                     db_url=f"sqlite:///{tmp_path / name}.db")
        for name in ("piped", "terminal")
    ]  # fmt: skip
    piped = run_cli("db", "upgrade", "--config", str(configs[0]))
    assert "migrating the schema" not in piped.stdout + piped.stderr
    assert re.fullmatch(r"schema at revision \w+ \(\d+ migrations applied\)\n", piped.stdout)
    shown = on_a_terminal(["db", "upgrade", "--config", str(configs[1])])
    assert "migrating the schema" in shown and "migrations applied" in shown
    # KEK rotation of that node (initialised, stopped), on the terminal.
    run_cli("node", "init", "--config", str(configs[1]))
    new_kek = tmp_path / "next.kek"
    run_cli("kek", "new", "--out", str(new_kek))
    shown = on_a_terminal(["kek", "rotate", "--config", str(configs[1]), "--new-kek", str(new_kek)])
    assert "re-sealing rows" in shown and "re-sealed" in shown
