"""Fixtures the end-to-end tests share."""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from pathlib import Path

import pytest

from keystrata.loopback.pki import PkiFiles
from keystrata.loopback.processes import NodeProcess, prepare_node


@pytest.fixture
def sqlite_station(tmp_path: Path, pki: PkiFiles, sqlite_template: Path) -> Iterator[NodeProcess]:
    """A `keystrata serve` process of station-a on a fresh SQLite database (only its own
    node in the registry), stopped after the test."""
    db = tmp_path / "station.db"
    shutil.copy(sqlite_template, db)
    node = prepare_node(tmp_path, pki, "station-a", "station", f"sqlite:///{db}").start(pki)
    try:
        yield node
    finally:
        node.stop()
