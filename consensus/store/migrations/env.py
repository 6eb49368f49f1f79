"""Alembic environment: migrations run on the connection consensus hands over (see __init__.py)."""

from alembic import context
from sqlmodel import SQLModel

from consensus.store import models  # noqa: F401  (registers the tables for autogenerate)

connection = context.config.attributes.get("connection")
if connection is None:  # pragma: no cover - alembic's own command line, for writing new migrations
    from consensus.store.db import resolve_url
    from sqlalchemy import create_engine

    connection = create_engine(resolve_url()).connect()

context.configure(connection=connection, target_metadata=SQLModel.metadata, render_as_batch=True,
                  compare_type=True)
with context.begin_transaction():
    context.run_migrations()
