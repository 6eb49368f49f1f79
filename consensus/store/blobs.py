"""Content-addressed bytes: a received file or a packed frame is stored once, under its sha256."""

from __future__ import annotations

import hashlib
import zlib

import pandas as pd
from sqlalchemy import select
from sqlalchemy.dialects.postgresql import insert as pg_insert
from sqlalchemy.dialects.sqlite import insert as sqlite_insert
from sqlmodel import Session

from consensus.errors import StoreError
from consensus.store.columnar import pack_frame, unpack_frame
from consensus.store.models import Blob


def _put(session: Session, sha: str, encoding: str, size: int, content: bytes) -> str:
    table = Blob.__table__
    insert = pg_insert if session.get_bind().dialect.name == "postgresql" else sqlite_insert
    session.execute(insert(table).values(sha256=sha, encoding=encoding, size=size, content=content)
                    .on_conflict_do_nothing(index_elements=["sha256"]))
    return sha


def put_file(session: Session, data: bytes) -> str:
    """Keep a file's bytes (deflated); returns their sha256."""
    sha = hashlib.sha256(data).hexdigest()
    return _put(session, sha, "zlib", len(data), zlib.compress(data, 6))


def put_frame(session: Session, frame: pd.DataFrame) -> str:
    """Keep a frame packed (consensus.store.columnar); returns the sha256 of the packed bytes."""
    packed = pack_frame(frame)
    sha = hashlib.sha256(packed).hexdigest()
    return _put(session, sha, "frame", len(packed), packed)


def _content(session: Session, sha: str) -> tuple[str, bytes]:
    table = Blob.__table__
    row = session.execute(select(table.c.encoding, table.c.content).where(table.c.sha256 == sha)).first()
    if row is None:
        raise StoreError(f"stored content {sha[:12]}… is missing from the store")
    return row.encoding, bytes(row.content)


def get_file(session: Session, sha: str) -> bytes:
    encoding, content = _content(session, sha)
    return zlib.decompress(content) if encoding == "zlib" else content


def get_frame(session: Session, sha: str) -> pd.DataFrame:
    _, content = _content(session, sha)
    return unpack_frame(content)


def get_frames(session: Session, shas: list[str]) -> dict[str, pd.DataFrame]:
    """Several packed frames in one query."""
    if not shas:
        return {}
    table = Blob.__table__
    rows = session.execute(select(table.c.sha256, table.c.content).where(table.c.sha256.in_(sorted(set(shas)))))
    found = {row.sha256: unpack_frame(bytes(row.content)) for row in rows}
    missing = set(shas) - set(found)
    if missing:
        raise StoreError(f"{len(missing)} stored frame(s) are missing from the store")
    return found


def check_blob(encoding: str, sha: str, content: bytes) -> bool:
    """True when the stored content still hashes to its key."""
    data = zlib.decompress(content) if encoding == "zlib" else content
    return hashlib.sha256(data).hexdigest() == sha
