"""Shared fixtures: a fresh store on SQLite (always) and on PostgreSQL (when CI starts one)."""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import pytest

from consensus.store.db import get_engine

DATA = Path(__file__).parent / "data"
PG_URL_VAR = "CONSENSUS_TEST_PG_URL"
PG_BINARY = Path("/usr/lib/postgresql/15/bin/postgres")


def _backends():
    yield pytest.param("sqlite", id="sqlite")
    # The PostgreSQL twin of every store test runs in the full suite (CI), not in the fast tier.
    yield pytest.param("postgres", id="postgres", marks=[pytest.mark.postgres, pytest.mark.slow])


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
    get_engine.cache_clear()
    reset_postgres(url)
    yield url
    get_engine.cache_clear()


def reset_postgres(url: str) -> None:
    """Empty the test database: drop every table (the next engine creates the schema afresh)."""
    from sqlalchemy import create_engine, text

    engine = create_engine(url)
    with engine.begin() as connection:
        connection.execute(text("DROP SCHEMA public CASCADE"))
        connection.execute(text("CREATE SCHEMA public"))
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
    # the small test store has no order history: the cycle is planned without it, knowingly
    open_cycle("2026-11", horizon=18, url=store_url, allow_missing_history=True)
    return store_url


def readme_commands() -> list[str]:
    """The two Quick start commands of the README, as a user would copy them."""
    text = (Path(__file__).parent.parent / "README.md").read_text(encoding="utf-8")
    section = text.split("## Quick start", 1)[1].split("\n## ", 1)[0]
    blocks = section.split("```sh\n")[1:]
    return [b.split("```", 1)[0].strip() for b in blocks]


@pytest.fixture(scope="session")
def demo_dir(tmp_path_factory) -> Path:
    """A folder where the README's demo command has been run, as a user would run it (package already installed)."""
    import subprocess
    import sys

    first = readme_commands()[0]
    demo_part = first.split("&&")[-1].strip()  # the install part is what this test session already did
    assert demo_part.startswith("consensus demo"), first
    folder = tmp_path_factory.mktemp("readme_demo")
    console = Path(sys.executable).parent / "consensus"
    command = demo_part.replace("consensus", str(console) if console.exists() else "consensus", 1)
    done = subprocess.run(command, shell=True, cwd=folder, capture_output=True, text=True, timeout=1200)
    assert done.returncode == 0, done.stderr[-3000:]
    (folder / "stdout.txt").write_text(done.stdout)
    workdir = folder / demo_part.split("--workdir", 1)[1].split()[0]
    get_engine.cache_clear()
    return workdir


@pytest.fixture(scope="session")
def demo_url(demo_dir) -> str:
    return f"sqlite:///{demo_dir / 'consensus.db'}"
