"""A cache for the run kept in the store: parts of a computation filed under the digest of what they read.

Reading happens while the run computes, each lookup in a read transaction of
its own; new entries are held until the run writes its result and are written
in that same transaction, so a run that fails leaves no half-written entry.
Each (kind, cycle) keeps only its newest entry: the cache stays the size of
one window of cycles.

A part put with ``durable=False`` (cheap to remake) is not written to the
store: it is kept in this process's memory (:class:`ProcessMemo`), where a
later run in the same process (the demo, a test session, a script calling
the library) finds it.  Keys are digests of everything a part read, so a part
found there is the part the computation would make, whichever store asked.
"""

from __future__ import annotations

from collections import OrderedDict

from sqlalchemy import delete, select
from sqlmodel import Session

from consensus.store.db import session_scope
from consensus.store.models import CacheEntry, utcnow


class ProcessMemo:
    """Packed parts by key, the least recently used let go beyond ``limit_bytes``."""

    def __init__(self, limit_bytes: int):
        self.limit_bytes = limit_bytes
        self.entries: OrderedDict[str, bytes] = OrderedDict()
        self.size = 0

    def get(self, key: str) -> bytes | None:
        content = self.entries.get(key)
        if content is not None:
            self.entries.move_to_end(key)
        return content

    def clear(self) -> None:
        self.entries.clear()
        self.size = 0

    def put(self, key: str, content: bytes) -> None:
        if len(content) > self.limit_bytes:
            return
        if key in self.entries:
            self.size -= len(self.entries.pop(key))
        self.entries[key] = content
        self.size += len(content)
        while self.size > self.limit_bytes:
            _, dropped = self.entries.popitem(last=False)
            self.size -= len(dropped)


#: The parts this process keeps in memory (256 MB at most).
MEMO = ProcessMemo(256 * 2**20)


class StoreCache:
    """The store's :class:`consensus.store.models.CacheEntry` table as a :class:`consensus.methods.plan.Cache`."""

    def __init__(self, url, *, enabled: bool = True):
        self.url = url
        self.enabled = enabled
        self.pending: dict[str, tuple[str, str, bytes]] = {}
        self.hits = 0
        self.misses = 0

    def get(self, key: str) -> bytes | None:
        """The packed frames kept under ``key`` (consensus.store.columnar.pack_frames), or None."""
        if not self.enabled:
            return None
        if key in self.pending:
            self.hits += 1
            return self.pending[key][2]
        kept = MEMO.get(key)
        if kept is not None:
            self.hits += 1
            return kept
        with session_scope(self.url, write=False) as session:
            table = CacheEntry.__table__
            row = session.execute(select(table.c.content).where(table.c.key == key)).first()
        if row is None:
            self.misses += 1
            return None
        self.hits += 1
        return bytes(row.content)

    def put(self, key: str, *, kind: str, cycle: str, content: bytes, durable: bool = True) -> None:
        if not self.enabled:
            return
        if durable:
            self.pending[key] = (kind, cycle, content)
        else:
            MEMO.put(key, content)

    def write(self, session: Session) -> int:
        """Write the new entries (in the caller's write transaction), each replacing its (kind, cycle)'s older one."""
        table = CacheEntry.__table__
        for key, (kind, cycle, content) in self.pending.items():
            session.execute(delete(table).where(table.c.kind == kind).where(table.c.cycle == cycle))
            session.execute(delete(table).where(table.c.key == key))
            session.add(CacheEntry(key=key, kind=kind, cycle=cycle, content=content, created_at=utcnow()))
        written = len(self.pending)
        self.pending = {}
        return written
