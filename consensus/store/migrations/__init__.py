"""Schema migrations of the store (Alembic), applied from code: no alembic.ini needed.

``consensus store upgrade`` calls :func:`upgrade`; :func:`consensus.store.db.get_engine`
creates a new store at the newest revision.  A new migration is a file in
``versions/`` (``alembic revision`` with ``script_location`` set to this folder,
then edit), and :data:`consensus.store.db.SCHEMA_REVISION` names the new head.
"""

from __future__ import annotations

from pathlib import Path

from sqlalchemy.engine import Engine

HERE = Path(__file__).parent


def config(connection=None):
    from alembic.config import Config

    cfg = Config()
    cfg.set_main_option("script_location", str(HERE))
    if connection is not None:
        cfg.attributes["connection"] = connection
    return cfg


def known_revisions() -> set[str]:
    from alembic.script import ScriptDirectory

    return {script.revision for script in ScriptDirectory.from_config(config()).walk_revisions()}


def head_revision() -> str:
    from alembic.script import ScriptDirectory

    return ScriptDirectory.from_config(config()).get_current_head()


def upgrade(engine: Engine, revision: str = "head") -> None:
    """Bring the store's schema to ``revision`` (the newest by default), in one transaction.

    On PostgreSQL the transaction first takes the store's write lock, so when
    several processes open a new store at once one creates the schema and the
    others, waiting, find it made (without the lock all of them tried to create
    the tables and all but one failed).  SQLite's ``BEGIN IMMEDIATE`` does the same.
    """
    from alembic import command
    from sqlalchemy import text

    from consensus.store.db import _ADVISORY_LOCK

    with engine.begin() as connection:
        if connection.dialect.name == "postgresql":
            connection.execute(text("SELECT pg_advisory_xact_lock(:key)"), {"key": _ADVISORY_LOCK})
        command.upgrade(config(connection), revision)


def current_revision(engine: Engine) -> str | None:
    from alembic.runtime.migration import MigrationContext

    with engine.connect() as connection:
        return MigrationContext.configure(connection).get_current_revision()
