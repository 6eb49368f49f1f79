"""The one place that knows the database URL, the engine and table creation.

The URL comes from ``--db``, else the ``CONSENSUS_DB`` environment variable,
else a SQLite file ``consensus.db`` in the current folder.  PostgreSQL needs
only a different URL (``postgresql+psycopg://user@host:port/db``).
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from contextlib import contextmanager
from functools import lru_cache

from sqlalchemy import event
from sqlalchemy.engine import Engine
from sqlalchemy.pool import StaticPool
from sqlmodel import Session, SQLModel, create_engine

ENV_VAR = "CONSENSUS_DB"
DEFAULT_URL = "sqlite:///consensus.db"


def resolve_url(url: str | None = None) -> str:
    """The database URL in force: explicit, then ``$CONSENSUS_DB``, then the SQLite default."""
    return url or os.environ.get(ENV_VAR) or DEFAULT_URL


def _enable_sqlite_foreign_keys(engine: Engine) -> None:
    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_connection, _record):  # pragma: no cover - driver hook
        cursor = dbapi_connection.cursor()
        cursor.execute("PRAGMA foreign_keys=ON")
        cursor.close()


@lru_cache(maxsize=8)
def get_engine(url: str | None = None) -> Engine:
    """An engine for the URL, with the schema created on first use."""
    from consensus.store import models  # noqa: F401  (registers the tables)

    resolved = resolve_url(url)
    if resolved.startswith("sqlite"):
        kwargs: dict = {"connect_args": {"check_same_thread": False}}
        if resolved in ("sqlite://", "sqlite:///:memory:"):
            kwargs["poolclass"] = StaticPool  # one shared in-memory database
        engine = create_engine(resolved, **kwargs)
        _enable_sqlite_foreign_keys(engine)
    else:
        engine = create_engine(resolved, pool_pre_ping=True)
    SQLModel.metadata.create_all(engine)
    return engine


@contextmanager
def session_scope(url_or_engine: str | Engine | None = None) -> Iterator[Session]:
    """A session whose work is one transaction: committed on success, rolled back on error."""
    engine = url_or_engine if isinstance(url_or_engine, Engine) else get_engine(url_or_engine)
    with Session(engine, expire_on_commit=False) as session:
        try:
            yield session
            session.commit()
        except BaseException:
            session.rollback()
            raise
