"""The store's history, in write order, with a hash chain that shows edits made outside the tool.

Every record the tool writes (a submission, a decision or its withdrawal, a
cycle opened, reopened or published, a run) gets one journal entry in the same
transaction: ``digest`` = sha256 of the record's canonical JSON, ``chain`` =
sha256(previous chain + digest).  The journal position (``seq``) is also the
order in which submissions supersede each other.  Appends happen under the
store's write lock (:func:`consensus.store.db.session_scope`), so positions
follow commit order.
"""

from __future__ import annotations

import hashlib
import json
from datetime import date, datetime

from sqlalchemy import func, select
from sqlmodel import Session, SQLModel

from consensus.store.models import JournalEntry, utcnow

GENESIS = "0" * 64


def canonical(record: dict) -> str:
    """A record as canonical JSON: sorted keys, datetimes as ISO text, no whitespace."""
    def plain(value):
        if isinstance(value, datetime):
            return value.replace(tzinfo=None).isoformat(timespec="seconds")
        if isinstance(value, date):
            return value.isoformat()
        return value
    return json.dumps({k: plain(v) for k, v in record.items()}, sort_keys=True, separators=(",", ":"),
                      default=str, ensure_ascii=False)


def chain_of(previous: str, digest: str) -> str:
    return hashlib.sha256((previous + digest).encode("ascii")).hexdigest()


def last_seq(session: Session) -> int:
    """The newest journal position (0 for an empty store)."""
    return int(session.execute(select(func.max(JournalEntry.__table__.c.seq))).scalar() or 0)


def append(session: Session, *, kind: str, ref_id, cycle: str | None, digest: str) -> JournalEntry:
    """Add one entry after the newest, chained to it (call inside a write session)."""
    table = JournalEntry.__table__
    row = session.execute(select(table.c.seq, table.c.chain).order_by(table.c.seq.desc()).limit(1)).first()
    previous = row.chain if row else GENESIS
    entry = JournalEntry(kind=kind, ref_id=str(ref_id), cycle=cycle, digest=digest, chain=chain_of(previous, digest),
                         at=utcnow())
    session.add(entry)
    session.flush()
    return entry


#: For each kind of record, the fields its digest covers: what cannot change once written.
#: Later changes to a record (a withdrawal, a publication) are journal entries of their own.
DIGEST_FIELDS: dict[str, tuple[str, ...]] = {
    "submission": ("id", "kind", "source", "cycle", "revision", "scope", "scope_detail", "replace", "filename",
                   "sha256", "lines_sha256", "submitted_by", "submitted_at", "status", "reinstates", "late",
                   "reasons", "row_count", "grain", "file_format", "months"),
    "decision": ("id", "cycle", "revision", "at", "author", "item", "family", "location", "region", "period", "kind",
                 "amount", "reason"),
    "withdrawal": ("id", "withdrawn_at", "withdrawn_by", "withdrawn_reason"),
    "cycle": ("name", "horizon", "opened_at", "opened_by"),
    "reopen": ("cycle", "revision", "opened_at", "opened_by", "reason"),
    "publish": ("cycle", "revision", "published_at", "published_by", "published_run_id"),
    "run": ("id", "cycle", "revision", "created_at", "created_by", "spec", "through_seq", "inputs_digest",
            "method_version", "parts"),
}


def digest_record(kind: str, row: SQLModel, extra: dict | None = None) -> str:
    """The digest of a record as its kind's journal entry covers it (``extra``: e.g. a run's part hashes)."""
    record = {name: getattr(row, name) for name in DIGEST_FIELDS[kind]}
    if extra:
        record.update(extra)
    return hashlib.sha256(canonical(record).encode("utf-8")).hexdigest()


def ref_of(kind: str, row: SQLModel) -> str:
    if kind in ("reopen", "publish"):
        return f"{row.cycle}:{row.revision}"
    if kind == "cycle":
        return row.name
    return str(row.id)


def record(session: Session, kind: str, row: SQLModel, *, cycle: str | None, extra: dict | None = None
           ) -> JournalEntry:
    """Journal a record just written (flushed) in this transaction; returns its entry."""
    return append(session, kind=kind, ref_id=ref_of(kind, row), cycle=cycle, digest=digest_record(kind, row, extra))
