"""Shared fixtures: a fresh store on SQLite (always) and on PostgreSQL (when CI starts one)."""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import pytest
from sqlmodel import SQLModel

from consensus.store.db import get_engine

DATA = Path(__file__).parent / "data"
PG_URL_VAR = "CONSENSUS_TEST_PG_URL"
PG_BINARY = Path("/usr/lib/postgresql/15/bin/postgres")


def _backends():
    yield pytest.param("sqlite", id="sqlite")
    yield pytest.param("postgres", id="postgres", marks=pytest.mark.postgres)


@pytest.fixture(params=list(_backends()))
def store_url(request, tmp_path) -> str:
    """A URL to an empty store: a SQLite file, or a freshly emptied PostgreSQL database."""
    if request.param == "sqlite":
        get_engine.cache_clear()
        yield f"sqlite:///{tmp_path / 'store.db'}"
        get_engine.cache_clear()
        return
    url = os.environ.get(PG_URL_VAR)
    if not url:
        if PG_BINARY.exists() or shutil.which("postgres"):
            pytest.skip(f"PostgreSQL is installed but {PG_URL_VAR} is not set (.ci/run starts a server and sets it)")
        pytest.skip("no PostgreSQL server binary on this machine")
    engine = get_engine(url)
    SQLModel.metadata.drop_all(engine)
    SQLModel.metadata.create_all(engine)
    yield url
    engine.dispose()


@pytest.fixture
def sqlite_url(tmp_path) -> str:
    get_engine.cache_clear()
    yield f"sqlite:///{tmp_path / 'store.db'}"
    get_engine.cache_clear()


@pytest.fixture
def master_store(store_url) -> str:
    """A store with the small test master data (tests/data/good) and cycle 2026-11 open."""
    from consensus.intake.submission import load_master_file
    from consensus.workflow.cycles import open_cycle

    load_master_file(DATA / "good" / "items.csv", kind="items", url=store_url)
    load_master_file(DATA / "good" / "locations.csv", kind="locations", url=store_url)
    open_cycle("2026-11", horizon=18, url=store_url)
    return store_url
