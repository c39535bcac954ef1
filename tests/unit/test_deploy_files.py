"""The deploy files agree with the service and with each other.

compose.yaml is read with PyYAML and checked against the node configs it mounts (each
must validate with ``load_settings``), the PostgreSQL init script and the Dockerfile;
the systemd units are read with configparser, their commands parsed by the real click
commands and verified with ``systemd-analyze`` where it works. The deploy scripts run
for real in test_deploy_scripts.py. All checks are common practice for these files
unless a line names a source.
"""

from __future__ import annotations

import configparser
import json
import os
import re
import shlex
import shutil
import sys
from pathlib import Path
from urllib.parse import urlsplit

import click
import pytest
from sqlalchemy.engine import make_url

from deploykit import (
    COMPOSE,
    DEPLOY,
    NODES,
    SECRETS_DIR,
    SERVICES,
    binds,
    init_roles,
    make_secrets,
    node_settings,
    run_line,
    secret_paths,
)
from keystrata.cli.main import cli
from keystrata.config import ServerSection, load_settings
from keystrata_client.emulators.links import main as links_cli

# ---------------------------------------------------------------- compose.yaml


def test_compose_has_the_network_and_postgres() -> None:
    assert set(NODES) | {"postgres"} <= set(SERVICES)


@pytest.mark.parametrize("node", NODES)
def test_node_service_is_locked_down(node: str) -> None:
    svc = SERVICES[node]
    uid = str(svc["user"]).split(":")[0]
    assert uid not in ("", "0", "root")
    assert svc["read_only"] is True
    assert any(str(t).startswith("/tmp:") for t in svc["tmpfs"])  # noqa: S108 - in the container
    assert svc["cap_drop"] == ["ALL"]
    assert "command" not in svc and "entrypoint" not in svc  # the image's defaults
    assert svc["depends_on"]["postgres"]["condition"] == "service_healthy"
    assert all(v["type"] != "bind" or v["read_only"] is True for v in svc["volumes"])


@pytest.mark.parametrize("node", NODES)
def test_node_config_matches_its_service(node: str) -> None:
    settings = node_settings(node)
    svc = SERVICES[node]
    assert (settings.node.id, settings.node.role) == (node, NODES[node])
    assert svc["ports"] and all(p["target"] == settings.server.port for p in svc["ports"])
    assert all(p["host_ip"] == "127.0.0.1" for p in svc["ports"])
    mounted = {**binds(svc), **secret_paths(svc)}
    for path in (settings.tls.ca, settings.tls.cert):
        assert binds(svc)[str(path)]["source"].startswith(SECRETS_DIR + "pki/")
    for path in (settings.tls.key, settings.kek.file):  # private: secrets, not binds
        assert str(path) in secret_paths(svc)
    assert svc["environment"]["PGPASSFILE"] in secret_paths(svc)
    # The health check asks this node, on its port, with files that are mounted.
    argv = svc["healthcheck"]["test"]
    assert argv[:3] == ["CMD", "python", "/usr/local/lib/keystrata/healthcheck.py"]
    opts = dict(zip(argv[3::2], argv[4::2], strict=True))
    url = urlsplit(opts["--url"])
    assert (url.scheme, url.hostname, url.port) == ("https", node, settings.server.port)
    assert url.path == "/api/v1/health/ready"
    assert {opts["--ca"], opts["--cert"], opts["--key"]} <= set(mounted)


@pytest.mark.parametrize("node", NODES)
def test_peers_are_services_on_their_ports(node: str) -> None:
    settings = node_settings(node)
    for peer in settings.peers:
        url = urlsplit(peer.url)
        assert url.hostname == peer.id and peer.id in NODES
        assert url.port == node_settings(peer.id).server.port
    want = set(NODES) - {node} if node == "relay-vela" else {"relay-vela"}
    assert want <= {p.id for p in settings.peers}


def test_each_node_has_its_own_database_from_the_init_script() -> None:
    created = {f"keystrata_{role}": role for role in init_roles()}
    databases = []
    for node in NODES:
        url = make_url(node_settings(node).database.url)
        assert (url.get_backend_name(), url.host, url.port) == ("postgresql", "postgres", 5432)
        assert url.password is None  # from the PGPASSFILE secret, never in the config
        assert url.database in created and url.username == created[url.database]
        assert make_secrets.NODES[node] == url.username
        databases.append(url.database)
    assert sorted(databases) == sorted(created)
    assert os.access(DEPLOY / "compose" / "postgres-init.sh", os.X_OK)
    target = binds(SERVICES["postgres"])["/docker-entrypoint-initdb.d/10-keystrata.sh"]
    assert target["source"] == "./compose/postgres-init.sh"


def test_postgres_service() -> None:
    pg = SERVICES["postgres"]
    assert str(pg["user"]).split(":")[0] not in ("0", "root") and pg["read_only"] is True
    assert "pg_isready" in pg["healthcheck"]["test"]
    assert "ports" not in pg  # reachable on the compose network only
    assert pg["environment"]["POSTGRES_PASSWORD_FILE"] in secret_paths(pg)
    assert pg["environment"]["KEYSTRATA_ROLES_FILE"] in secret_paths(pg)


def test_volumes_and_secrets_are_declared() -> None:
    for svc in SERVICES.values():
        for vol in svc.get("volumes", []):
            if vol["type"] == "volume":
                assert vol["source"] in COMPOSE["volumes"]
            else:
                assert vol["type"] == "bind"
                source = vol["source"]
                assert source.startswith(SECRETS_DIR) or (DEPLOY / source).is_file(), source
        for sec in svc.get("secrets", []):
            assert sec["source"] in COMPOSE["secrets"]
    for sec in COMPOSE["secrets"].values():
        assert sec["file"].startswith(SECRETS_DIR)
    assert "compose/secrets/" in (DEPLOY / ".gitignore").read_text().split()


# ---------------------------------------------------------------- Dockerfile


def _instructions(path: Path) -> list[tuple[str, str]]:
    text = re.sub(r"\\\n", " ", path.read_text())
    lines = [ln.strip() for ln in text.splitlines()]
    return [
        (ln.split()[0].upper(), ln.partition(" ")[2].strip())
        for ln in lines
        if ln and not ln.startswith("#")
    ]


def _parse_command(command: click.Command, argv: list[str]) -> click.Context:
    """Resolve ``argv`` through click groups and parse the options of the command it
    names; unknown commands or options and missing required ones raise."""
    name = command.name or ""
    args = list(argv)
    while isinstance(command, click.Group):
        name = args.pop(0)
        sub = command.commands.get(name)
        assert sub is not None, f"no command {name!r}"
        command = sub
    return command.make_context(name, args)


def test_dockerfile() -> None:
    steps = _instructions(DEPLOY / "Dockerfile")
    args = dict(v.split("=", 1) for k, v in steps if k == "ARG" and "=" in v)
    assert args["PYTHON_IMAGE"] == "python:3.11-slim"
    last_from = max(i for i, (k, _) in enumerate(steps) if k == "FROM")
    final = steps[last_from:]
    users = [v for k, v in final if k == "USER"]
    assert users and users[-1].split(":")[0] not in ("0", "root")
    assert not [v for k, v in steps if k == "ADD"]
    for k, v in steps:
        if k == "COPY":
            assert not re.search(r"secret|\.key\b|\.kek\b|pki|\.env\b", v), v
    assert ("COPY", "deploy/healthcheck.py /usr/local/lib/keystrata/healthcheck.py") in final
    assert any(k == "ENV" and "PYTHONDONTWRITEBYTECODE=1" in v.split() for k, v in final)
    entry = [json.loads(v) for k, v in final if k == "ENTRYPOINT"]
    cmd = [json.loads(v) for k, v in final if k == "CMD"]
    assert entry == [["keystrata"]]
    assert cmd == [["serve", "--config", "/etc/keystrata/node.toml"]]
    ctx = _parse_command(cli, cmd[0])
    assert ctx.params["config_path"] == Path("/etc/keystrata/node.toml")  # what compose mounts
    exposed = {int(p) for k, v in final if k == "EXPOSE" for p in v.split()}
    assert ServerSection().port in exposed
    assert {node_settings(n).server.port for n in NODES} <= exposed
    ignore = (DEPLOY / "Dockerfile.dockerignore").read_text().split()
    assert ignore[ignore.index("**") :] and {"**/*.key", "**/*.kek"} <= set(ignore)
    assert not [p for p in ignore if p.startswith("!") and "compose" in p]


# ---------------------------------------------------------------- systemd units


def _unit(path: Path) -> configparser.ConfigParser:
    parser = configparser.ConfigParser(strict=False, interpolation=None, delimiters=("=",))
    parser.optionxform = str  # type: ignore[assignment,method-assign]  # keys keep their case
    parser.read_string(path.read_text())
    return parser


def _exec_argv(value: str, instance: str) -> list[str]:
    return shlex.split(value.replace("%i", instance))


def test_node_unit() -> None:
    unit = _unit(DEPLOY / "systemd" / "keystrata@.service")["Service"]
    assert unit["User"] == "keystrata"
    assert (unit["NoNewPrivileges"], unit["ProtectSystem"]) == ("yes", "strict")
    assert (unit["ProtectHome"], unit["PrivateTmp"]) == ("yes", "yes")
    assert unit["CapabilityBoundingSet"] == "" and unit["MemoryMax"] == "256M"
    assert set(unit["RestrictAddressFamilies"].split()) <= {"AF_INET", "AF_INET6", "AF_UNIX"}
    assert unit["Restart"] == "on-failure"
    pre, start = (
        _exec_argv(unit["ExecStartPre"], "relay-vela"),
        _exec_argv(unit["ExecStart"], "relay-vela"),
    )
    assert pre[0] == start[0] == "/opt/keystrata/bin/keystrata"
    assert pre[1:3] == ["db", "upgrade"] and start[1] == "serve"
    for argv in (pre, start):
        ctx = _parse_command(cli, argv[1:])
        assert ctx.params["config_path"] == Path("/etc/keystrata/relay-vela.toml")
    # The example relay config, installed as that file, keeps its SQLite database in
    # the only writable folder.
    assert unit["ReadWritePaths"] == "/var/lib/keystrata/%i"
    assert unit["StateDirectory"] == "keystrata/%i"
    db = make_url(load_settings(DEPLOY / "examples" / "relay.toml", env={}).database.url)
    assert Path(db.database or "").parent == Path("/var/lib/keystrata/relay-vela")


def test_links_unit_and_kek_credential_drop_in() -> None:
    unit = _unit(DEPLOY / "systemd" / "keystrata-links@.service")["Service"]
    assert unit["User"] == "keystrata"
    assert (unit["NoNewPrivileges"], unit["ProtectSystem"]) == ("yes", "strict")
    argv = _exec_argv(unit["ExecStart"], "lowmarch")
    assert argv[0] == "/opt/keystrata/bin/keystrata-links"
    assert _parse_command(links_cli, argv[1:]).params["config_path"] == Path(
        "/etc/keystrata/links/lowmarch.toml"
    )
    drop_in = DEPLOY / "systemd" / "keystrata@.service.d" / "kek-credential.conf.example"
    service = _unit(drop_in)["Service"]
    assert service["LoadCredential"] == "kek:/etc/keystrata/kek/%i.kek"
    name, _, value = service["Environment"].partition("=")
    path = value.replace("%d", "/run/credentials/keystrata@relay-vela.service")
    settings = load_settings(DEPLOY / "examples" / "relay.toml", env={name: path})
    assert settings.kek.file == Path("/run/credentials/keystrata@relay-vela.service/kek")


def test_units_pass_systemd_analyze_verify(tmp_path: Path) -> None:
    if shutil.which("systemd-analyze") is None:
        pytest.skip("systemd-analyze is not installed")
    # verify checks that ExecStart programs exist: point them at this virtualenv.
    bindir = str(Path(sys.executable).parent) + "/"
    for unit in ("keystrata@.service", "keystrata-links@.service"):
        text = (DEPLOY / "systemd" / unit).read_text()
        (tmp_path / unit).write_text(text.replace("/opt/keystrata/bin/", bindir))
    (tmp_path / "keystrata@.service.d").mkdir()
    shutil.copy(
        DEPLOY / "systemd" / "keystrata@.service.d" / "kek-credential.conf.example",
        tmp_path / "keystrata@.service.d" / "kek-credential.conf",
    )
    env = {**os.environ, "SYSTEMD_UNIT_PATH": f"{tmp_path}:"}
    probe = run_line("systemd-analyze verify multi-user.target", env)
    if probe.returncode != 0:
        pytest.skip(f"systemd-analyze verify does not work here: {probe.stderr.strip()}")
    done = run_line(
        "systemd-analyze verify keystrata@relay-vela.service keystrata-links@lab.service", env
    )
    complaints = [ln for ln in done.stderr.splitlines() if "keystrata" in ln]
    assert done.returncode == 0 and not complaints, done.stderr
