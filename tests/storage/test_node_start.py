"""Start-up checks and key-encryption-key custody: wrong KEK, unsafe file, rotation."""

from __future__ import annotations

import os
import uuid
from datetime import UTC, datetime
from pathlib import Path

import pytest
from sqlalchemy import select

from keystrata.config import load_settings
from keystrata.crypto.hazmat import Keyring, kek_id, random_bytes
from keystrata.crypto.kek import read_kek, write_new_kek
from keystrata.errors import StartupRefused
from keystrata.links import ingest
from keystrata.links.blocks import BlockIn
from keystrata.node import kek_rotation
from keystrata.node.lifecycle import open_node
from keystrata.storage.db import Database
from keystrata.storage.models import LedgerEntry, LinkBlock, NodeMeta
from keystrata.storage.sealed import block_context


def _fill(station, n: int = 5) -> dict[str, bytes]:
    keys = {str(uuid.uuid4()): random_bytes(48) for _ in range(n)}
    blocks = [BlockIn(b, k, 0.01, 1e-9, datetime.now(UTC)) for b, k in keys.items()]
    ingest.ingest(station.ctx, "link-a", blocks, actor="t", actor_link="link-a")
    return keys


def test_wrong_kek_is_refused(station, tmp_path: Path) -> None:
    other = tmp_path / "other.kek"
    write_new_kek(other)
    settings = load_settings(station.config_path, env={"KEYSTRATA_KEK__FILE": str(other)})
    with pytest.raises(StartupRefused, match="does not match this database"):
        open_node(settings, station.ctx.db)


@pytest.mark.parametrize("mode", [0o640, 0o604, 0o644])
def test_kek_file_readable_by_others_is_refused(tmp_path: Path, mode: int) -> None:
    path = tmp_path / "k.kek"
    write_new_kek(path)
    assert os.stat(path).st_mode & 0o777 == 0o600
    os.chmod(path, mode)
    with pytest.raises(StartupRefused, match="chmod 600"):
        read_kek(path)


def test_kek_file_content_is_checked(tmp_path: Path) -> None:
    path = tmp_path / "k.kek"
    fd = os.open(path, os.O_WRONLY | os.O_CREAT, 0o600)
    os.write(fd, b"c2hvcnQ=\n")  # Base64 of 5 bytes
    os.close(fd)
    with pytest.raises(StartupRefused, match="exactly 32 bytes"):
        read_kek(path)
    with pytest.raises(StartupRefused, match="does not exist"):
        read_kek(tmp_path / "missing.kek")


def test_kek_file_is_never_overwritten(tmp_path: Path) -> None:
    path = tmp_path / "k.kek"
    write_new_kek(path)
    with pytest.raises(FileExistsError):
        write_new_kek(path)


def test_node_of_another_id_is_refused(station) -> None:
    settings = load_settings(station.config_path, env={"KEYSTRATA_NODE__ID": "station-b"})
    with pytest.raises(StartupRefused, match="does not belong to node"):
        open_node(settings, station.ctx.db)


def test_rotation_reseals_every_row_and_resumes(station, tmp_path: Path) -> None:
    keys = _fill(station, 7)
    ctx = station.ctx
    old = read_kek(ctx.settings.kek.file)
    new_path = tmp_path / "new.kek"
    write_new_kek(new_path)
    new = read_kek(new_path)

    # Interrupt the first run after its first batch: the progress callback raises.
    class Stop(Exception):
        pass

    def stop(_: int) -> None:
        raise Stop

    with pytest.raises(Stop):
        kek_rotation.rotate(ctx.db, ctx.node_id, old, new, batch=3, progress=stop)
    with ctx.db.read() as s:
        ids = [Keyring.sealed_kek_id(v) for v in s.execute(select(LinkBlock.sealed)).scalars()]
    assert ids.count(kek_id(new)) == 3 and ids.count(kek_id(old)) == 4
    # A node cannot start half way through.
    with pytest.raises(StartupRefused, match="rotation is unfinished"):
        open_node(ctx.settings, ctx.db)

    report = kek_rotation.rotate(ctx.db, ctx.node_id, old, new, batch=3)
    assert (report.resealed_blocks, report.already_done) == (4, 3)
    assert report.resealed_meta == 3

    # The old KEK no longer opens the database; the new one does and every block reads back.
    with pytest.raises(StartupRefused, match="does not match"):
        open_node(ctx.settings, ctx.db)
    new_settings = load_settings(station.config_path, env={"KEYSTRATA_KEK__FILE": str(new_path)})
    reopened = open_node(new_settings, Database(ctx.db.engine))
    with ctx.db.read() as s:
        for row in s.execute(select(LinkBlock)).scalars():
            opened = reopened.keyring.open(
                row.sealed, block_context(row.link_id, row.block_id, row.used)
            )
            assert opened == keys[row.block_id]
        assert s.get(NodeMeta, "kek_rotation_target") is None
        events = list(s.execute(select(LedgerEntry.event).order_by(LedgerEntry.idx)).scalars())
    assert events[-1] == "kek.rotated" and "kek.rotation_started" in events


def test_rotation_with_a_wrong_old_kek_changes_nothing(station, tmp_path: Path) -> None:
    _fill(station, 2)
    ctx = station.ctx
    with pytest.raises(StartupRefused):
        kek_rotation.rotate(ctx.db, ctx.node_id, random_bytes(32), random_bytes(32))
    with ctx.db.read() as s:
        assert s.get(NodeMeta, "kek_rotation_target") is None
    open_node(ctx.settings, ctx.db)  # still starts with its own KEK
