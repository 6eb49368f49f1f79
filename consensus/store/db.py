"""The one place that knows the database URL, the engine, the schema version and how writers take turns.

The URL comes from ``--db``, else the ``CONSENSUS_DB`` environment variable,
else a SQLite file ``consensus.db`` in the current folder.  PostgreSQL needs
only a different URL (``postgresql+psycopg://user@host:port/db``).

Writers take turns: every write transaction first takes the store's write
lock (PostgreSQL: a transaction-scoped advisory lock; SQLite: ``BEGIN
IMMEDIATE``, with WAL so readers never wait and a busy timeout so a writer
waits for the one before it instead of failing).  Writes are short: a long
run reads its inputs, computes with no transaction open, then writes its
result in one short transaction, so a submit during a run waits seconds, not
minutes.

The schema is versioned with Alembic (migrations in
``consensus/store/migrations``).  A new store is created at the newest
revision; an older one is refused with the command that upgrades it; a store
from a newer release, or from before versioned stores, is refused with a
plain message.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from contextlib import contextmanager
from functools import lru_cache
from pathlib import Path

from sqlalchemy import event, inspect, text
from sqlalchemy.engine import Engine, make_url
from sqlalchemy.exc import ArgumentError, DatabaseError, NoSuchModuleError, OperationalError, ProgrammingError
from sqlalchemy.pool import StaticPool
from sqlmodel import Session, create_engine

from consensus.errors import StoreError

ENV_VAR = "CONSENSUS_DB"
DEFAULT_URL = "sqlite:///consensus.db"
#: The Alembic revision this release writes (tests check it is the migrations' head).
SCHEMA_REVISION = "0001"
#: How long a writer waits for the one before it (seconds).
BUSY_TIMEOUT_S = 120
_ADVISORY_LOCK = 727_001  # one lock for every write of a consensus store


def resolve_url(url: str | None = None) -> str:
    """The database URL in force: explicit, then ``$CONSENSUS_DB``, then the SQLite default."""
    return url or os.environ.get(ENV_VAR) or DEFAULT_URL


def _sqlite_file(url) -> Path | None:
    database = url.database
    if not database or database == ":memory:":
        return None
    return Path(database)


def _configure_sqlite(engine: Engine, *, memory: bool) -> None:
    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_connection, _record):  # pragma: no cover - driver hook
        dbapi_connection.isolation_level = None  # SQLAlchemy's begin event below issues BEGIN itself
        cursor = dbapi_connection.cursor()
        cursor.execute("PRAGMA foreign_keys=ON")
        cursor.execute(f"PRAGMA busy_timeout={BUSY_TIMEOUT_S * 1000}")
        if not memory:
            cursor.execute("PRAGMA journal_mode=WAL")
            cursor.execute("PRAGMA synchronous=NORMAL")
        cursor.close()

    @event.listens_for(engine, "begin")
    def _on_begin(connection):  # pragma: no cover - driver hook
        write = connection.get_execution_options().get("consensus_write", True)
        connection.exec_driver_sql("BEGIN IMMEDIATE" if write else "BEGIN")


def _make_engine(resolved: str) -> Engine:
    try:
        url = make_url(resolved)
    except ArgumentError:
        raise StoreError(f"the database URL {resolved!r} is not a URL; use sqlite:///FILE or "
                         "postgresql+psycopg://USER@HOST:PORT/DATABASE") from None
    backend = url.get_backend_name()
    if backend not in ("sqlite", "postgresql"):
        raise StoreError(f"the database URL scheme {url.drivername!r} is not supported; use sqlite:///FILE or "
                         "postgresql+psycopg://USER@HOST:PORT/DATABASE")
    try:
        if backend == "sqlite":
            file = _sqlite_file(url)
            if file is not None and not file.parent.exists():
                raise StoreError(f"the folder {file.parent} of the store {file} does not exist; create it first")
            if file is not None and file.is_dir():
                raise StoreError(f"the store {file} is a folder; name a file, e.g. sqlite:///{file}/consensus.db")
            kwargs: dict = {"connect_args": {"check_same_thread": False, "timeout": BUSY_TIMEOUT_S}}
            if file is None:
                kwargs["poolclass"] = StaticPool  # one shared in-memory database
            engine = create_engine(url, **kwargs)
            _configure_sqlite(engine, memory=file is None)
        else:
            engine = create_engine(url, pool_pre_ping=True, connect_args={"connect_timeout": 10})
    except NoSuchModuleError:
        raise StoreError(f"no database driver for {url.drivername!r}; for PostgreSQL install the 'postgres' "
                         "extra (pip install 'consensus[postgres]') and use postgresql+psycopg://") from None
    except ModuleNotFoundError as error:
        raise StoreError(f"no database driver for {url.drivername!r} ({error.name} is not installed); for "
                         "PostgreSQL install the 'postgres' extra") from None
    return engine


def _schema_state(engine: Engine) -> str | None:
    """The store's Alembic revision; "" for an empty database; None for tables without a version."""
    names = set(inspect(engine).get_table_names())
    if "alembic_version" in names:
        with engine.connect() as connection:
            row = connection.execute(text("SELECT version_num FROM alembic_version")).first()
        return row[0] if row else ""
    return None if names & {"submission", "cycle"} else ""


def _check_schema(engine: Engine, shown: str) -> None:
    from consensus.store import migrations

    state = _schema_state(engine)
    if state == "":
        migrations.upgrade(engine)
        return
    if state is None:
        raise StoreError(f"the store {shown} was made by consensus 0.1, before stores carried a schema version; "
                         "load its files into a new store (this release cannot upgrade it)")
    if state == SCHEMA_REVISION:
        return
    if state in migrations.known_revisions():
        raise StoreError(f"the store {shown} has an older schema ({state}); upgrade it with "
                         f"'consensus --db {shown} store upgrade'")
    raise StoreError(f"the store {shown} has schema {state}, made by a newer release of consensus; "
                     "upgrade consensus to use it")


def _shown(resolved: str) -> str:
    try:
        return make_url(resolved).render_as_string(hide_password=True)
    except ArgumentError:
        return resolved


@lru_cache(maxsize=8)
def get_engine(url: str | None = None, *, check_schema: bool = True) -> Engine:
    """An engine for the URL, with the schema created on first use and checked after that."""
    resolved = resolve_url(url)
    engine = _make_engine(resolved)
    try:
        if check_schema:
            _check_schema(engine, _shown(resolved))
        else:
            with engine.connect():
                pass
    except OperationalError as error:
        engine.dispose()
        reason = str(error.orig).strip().splitlines()[0] if error.orig else str(error)
        raise StoreError(f"cannot open the store {_shown(resolved)}: {reason}") from None
    except ProgrammingError as error:
        engine.dispose()
        raise StoreError(f"the store {_shown(resolved)} cannot be read: {str(error.orig).strip()}") from None
    except DatabaseError as error:  # e.g. SQLite's "file is not a database": --db names some other file
        engine.dispose()
        guess = "; is it a consensus store?" if engine.dialect.name == "sqlite" else ""
        reason = str(error.orig).strip().splitlines()[0] if error.orig else str(error)
        raise StoreError(f"the store {_shown(resolved)} cannot be read: {reason}{guess}") from None
    return engine


def upgrade_store(url: str | None = None) -> tuple[str, str]:
    """Apply the migrations a store lacks; returns (revision before, revision after)."""
    from consensus.store import migrations

    resolved = resolve_url(url)
    engine = _make_engine(resolved)
    try:
        state = _schema_state(engine)
        if state is None:
            raise StoreError(f"the store {_shown(resolved)} was made by consensus 0.1, before stores carried a "
                             "schema version; it cannot be upgraded: load its files into a new store")
        if state and state not in migrations.known_revisions():
            raise StoreError(f"the store {_shown(resolved)} has schema {state}, made by a newer release of "
                             "consensus; upgrade consensus to use it")
        migrations.upgrade(engine)
        return state or "(empty)", migrations.current_revision(engine) or ""
    except DatabaseError as error:  # OperationalError (unreachable, locked) and a file that is no database
        reason = str(error.orig).strip().splitlines()[0] if error.orig else str(error)
        raise StoreError(f"cannot open the store {_shown(resolved)}: {reason}") from None
    finally:
        engine.dispose()
        get_engine.cache_clear()


def is_postgres(engine_or_session) -> bool:
    bind = engine_or_session.get_bind() if isinstance(engine_or_session, Session) else engine_or_session
    return bind.dialect.name == "postgresql"


@contextmanager
def session_scope(url_or_engine: str | Engine | None = None, *, write: bool = True) -> Iterator[Session]:
    """A session whose work is one transaction: committed on success, rolled back on error.

    A write session holds the store's write lock from its first statement to
    its commit (see the module docstring); a read session never blocks a writer.
    """
    engine = url_or_engine if isinstance(url_or_engine, Engine) else get_engine(url_or_engine)
    bind = engine.execution_options(consensus_write=write)
    with Session(bind, expire_on_commit=False) as session:
        try:
            if write and engine.dialect.name == "postgresql":
                session.execute(text("SELECT pg_advisory_xact_lock(:key)"), {"key": _ADVISORY_LOCK})
            elif engine.dialect.name == "sqlite":
                session.execute(text("SELECT 1"))  # begin now: a writer takes its turn here, not mid-way
            yield session
            session.commit()
        except OperationalError as error:
            session.rollback()
            if "locked" in str(error.orig).lower() or "busy" in str(error.orig).lower():
                raise StoreError(f"the store is busy: another write did not finish within {BUSY_TIMEOUT_S} s; "
                                 "try again") from None
            raise
        except BaseException:
            session.rollback()
            raise
