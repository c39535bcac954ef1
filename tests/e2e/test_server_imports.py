"""The serving process: what `keystrata serve` imports, and the start-up schema check
that lets it leave Alembic out.

Structural checks, not timed or measured ones (the relay bench family measures the
resident memory). The import graph is read in a fresh interpreter, as a node starts:
the CLI resolves the ``serve`` command, which imports :mod:`keystrata.server`.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest
from alembic.migration import MigrationContext
from alembic.script import ScriptDirectory

from keystrata.storage import migrate
from keystrata.storage.db import Database

#: Packages a serving node has no use for: the other commands' output (rich, and
#: pygments under it), schema migrations (alembic, mako), uvicorn's --reload
#: (watchfiles), the SDK and the demo, certificate issuing.
LEFT_OUT = (
    "rich",
    "pygments",
    "alembic",
    "mako",
    "watchfiles",
    "keystrata_client",
    "keystrata.demo",
    "keystrata.loopback",
    "keystrata.crypto.pki",
    "keystrata.cli.node_cmd",
    "keystrata.cli.remote_cmd",
)

_SERVE_IMPORTS = """
import json, sys
from keystrata.cli.main import cli
command = cli.commands["serve"]
import keystrata.server
print(json.dumps({
    "command": f"{command.callback.__module__}.{command.callback.__name__}",
    "modules": sorted(name for name, module in sys.modules.items() if module is not None),
}))
"""


def _serving_imports() -> dict[str, object]:
    # This interpreter, a fixed script: what `keystrata serve` loads before it serves.
    out = subprocess.run(
        [sys.executable, "-c", _SERVE_IMPORTS],
        capture_output=True,
        text=True,
        timeout=120,
        check=True,
    )
    found: dict[str, object] = json.loads(out.stdout)
    return found


def test_the_serving_process_leaves_out_what_only_other_commands_use() -> None:
    found = _serving_imports()
    assert found["command"] == "keystrata.cli.serve_cmd.serve"
    modules = found["modules"]
    assert isinstance(modules, list)
    # The check itself must see the graph: the server and its web stack are there.
    assert {"keystrata.server", "uvicorn", "fastapi", "sqlalchemy", "httpx"} <= set(modules)
    present = sorted(
        m for m in modules for name in LEFT_OUT if m == name or m.startswith(name + ".")
    )
    assert not present, f"the serving process imports {present}"


def test_every_command_is_still_found_and_listed() -> None:
    from click.testing import CliRunner

    from keystrata.cli.main import COMMANDS, cli

    result = CliRunner().invoke(cli, ["--help"])
    assert result.exit_code == 0, result.output
    for name in COMMANDS:
        assert name in result.output
        command = cli.commands[name]
        assert command.name == name, (name, command.name)
    assert cli.commands.get("no-such-command") is None


def test_the_scanned_head_is_the_one_alembic_finds(tmp_path: Path) -> None:
    # Outside reference: Alembic's own reading of the revision files.
    engine = Database.from_url(f"sqlite:///{tmp_path / 'node.db'}").engine
    alembic_head = ScriptDirectory.from_config(migrate._config(engine)).get_current_head()
    assert alembic_head is not None
    assert migrate._scanned_head() == alembic_head
    assert migrate.head_revision(engine) == alembic_head


def test_the_scan_defers_to_alembic_for_a_file_it_does_not_read(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    for path in sorted(migrate.VERSIONS.glob("0*.py")):
        (tmp_path / path.name).write_text(path.read_text())
    monkeypatch.setattr(migrate, "VERSIONS", tmp_path)
    assert migrate._scanned_head() is not None
    # A merge revision (a tuple of parents) is not the one-line form: Alembic decides.
    (tmp_path / "9999_merge.py").write_text('revision = "9999"\ndown_revision = ("0001", "0002")\n')
    assert migrate._scanned_head() is None
    (tmp_path / "9999_merge.py").unlink()
    # Two heads (a branch): no single head to return.
    (tmp_path / "9998_branch.py").write_text('revision = "9998"\ndown_revision = "0001"\n')
    assert migrate._scanned_head() is None


def _alembic_current(engine: object) -> str | None:
    with engine.connect() as conn:  # type: ignore[attr-defined]
        return MigrationContext.configure(conn).get_current_revision()


def test_the_current_revision_is_the_one_alembic_reads(tmp_path: Path) -> None:
    # Outside reference: Alembic's MigrationContext on the same database (SQLite).
    engine = Database.from_url(f"sqlite:///{tmp_path / 'node.db'}").engine
    assert migrate.current_revision(engine) is None
    assert _alembic_current(engine) is None
    migrate.upgrade(engine, "0005")
    assert migrate.current_revision(engine) == "0005" == _alembic_current(engine)
    migrate.upgrade(engine)
    assert migrate.current_revision(engine) == migrate.head_revision(engine)
    assert migrate.current_revision(engine) == _alembic_current(engine)


def test_the_current_revision_on_both_backends(db_url: str) -> None:
    # Outside reference: Alembic's MigrationContext, on migrated SQLite and PostgreSQL.
    db = Database.from_url(db_url)
    try:
        assert migrate.current_revision(db.engine) == _alembic_current(db.engine)
        assert migrate.current_revision(db.engine) == migrate.head_revision(db.engine)
    finally:
        db.dispose()
