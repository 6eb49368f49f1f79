"""Check a published plan: the records are as written, and the stored inputs still give the same numbers.

Three checks, each stopping at the first difference it finds:

1. **The journal.**  Every entry's digest is recomputed from the record it
   names and chained again from the first entry; a record changed, added or
   removed outside the tool breaks the chain at that entry.  Every record
   must also sit at the journal position it names (the position decides
   which file is in force, and whether a decision applies).
2. **The stored content.**  Every file, checked-lines frame and result part
   the run refers to still hashes to its sha256.
3. **The numbers.**  The run is computed again from its stored inputs, at the
   journal position it read and with its own settings, with no cache, and
   every part is compared with the stored one to the last digit.

:func:`check_store` checks the whole store instead of one plan, without
recomputing anything: the journal chain, that every record has its journal
entry at the position the record names, that the states of cycles and runs
agree with what the journal says was published, that every stored file,
frame and result part is there and hashes to its key, and, for SQLite, the
database file itself (``PRAGMA integrity_check`` and ``foreign_key_check``,
SQLite's own consistency checks).  It is what to run after a crash, a full
disk or a copy of the store.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from sqlalchemy import select, text
from sqlalchemy.exc import DBAPIError

from consensus.errors import NotFound
from consensus.methods.plan import METHOD_VERSION, RunSpec
from consensus.store import journal
from consensus.store.blobs import check_blob
from consensus.store.db import _shown, get_engine, resolve_url, session_scope
from consensus.store.models import Blob, ConsensusRun, Cycle, CycleRevision, Decision, JournalEntry, Submission
from consensus.workflow.inputs import run_parts
from consensus.workflow.publish import latest_run


@dataclass
class VerifyReport:
    cycle: str
    run_id: int
    revision: int
    status: str
    entries: int = 0
    blobs: int = 0
    parts: int = 0
    problems: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.problems

    def lines(self) -> list[str]:
        head = f"cycle {self.cycle} revision {self.revision}, run #{self.run_id} ({self.status})"
        if self.ok:
            return [f"{head}: exact match — {self.parts} result parts recomputed from the stored inputs agree to the "
                    f"last digit; {self.entries} journal entries and {self.blobs} stored files and frames intact"]
        return [f"{head}: does NOT match", *[f"  - {p}" for p in self.problems]]


def _record_for(session, entry: JournalEntry):
    kind, ref = entry.kind, entry.ref_id
    if kind in ("submission",):
        return session.get(Submission, int(ref))
    if kind in ("decision", "withdrawal"):
        return session.get(Decision, int(ref))
    if kind == "run":
        return session.get(ConsensusRun, int(ref))
    if kind in ("cycle", "due"):
        return session.get(Cycle, ref.split(":")[0])
    if kind in ("reopen", "publish"):
        cycle, revision = ref.split(":")
        return session.get(CycleRevision, (cycle, int(revision)))
    return None


def check_journal(session) -> tuple[int, str | None]:
    """(entries checked, the first problem or None)."""
    table = JournalEntry.__table__
    previous = journal.GENESIS
    count = 0
    for entry in session.execute(select(JournalEntry).order_by(table.c.seq)).scalars():
        count += 1
        record = _record_for(session, entry)
        if record is None:
            return count, f"journal entry {entry.seq} ({entry.kind} {entry.ref_id}) names a record that is gone"
        digest_kind = "cycle" if entry.kind == "due" else entry.kind
        if journal.digest_record(digest_kind, record) != entry.digest:
            return count, (f"the {entry.kind} record {entry.ref_id} (journal entry {entry.seq}) was changed after it "
                           "was written")
        if journal.chain_of(previous, entry.digest) != entry.chain:
            return count, f"the journal chain breaks at entry {entry.seq}: an entry before it was removed or altered"
        previous = entry.chain
    return count, None


def check_blobs(session, shas: set[str]) -> tuple[int, str | None]:
    table = Blob.__table__
    rows = session.execute(select(table.c.sha256, table.c.encoding, table.c.content)
                           .where(table.c.sha256.in_(sorted(shas)))).all()
    found = {r.sha256 for r in rows}
    missing = sorted(shas - found)
    if missing:
        return len(rows), f"stored content {missing[0][:12]}… is missing"
    for r in rows:
        if not check_blob(r.encoding, r.sha256, bytes(r.content)):
            return len(rows), f"stored content {r.sha256[:12]}… no longer matches its hash"
    return len(rows), None


def _first_difference(name: str, stored: pd.DataFrame, again: pd.DataFrame) -> str | None:
    if list(stored.columns) != list(again.columns):
        return f"part {name}: columns differ ({list(stored.columns)} against {list(again.columns)})"
    if len(stored) != len(again):
        return f"part {name}: {len(stored):,} rows stored, {len(again):,} recomputed"
    for column in stored.columns:
        a, b = stored[column].to_numpy(), again[column].to_numpy()
        if a.dtype.kind in "fc" or b.dtype.kind in "fc":
            a, b = a.astype(float), b.astype(float)
            same = (a == b) | (np.isnan(a) & np.isnan(b))
        else:
            same = pd.Series(a, dtype=object).fillna("\0").to_numpy() == pd.Series(b, dtype=object).fillna(
                "\0").to_numpy()
        if not same.all():
            row = int(np.flatnonzero(~same)[0])
            keys = ", ".join(str(stored[k].iloc[row]) for k in ("item", "location", "period", "source", "segment",
                                                               "lag_bucket") if k in stored.columns)
            return (f"part {name}, row {row + 1} ({keys}), column {column}: stored {a[row]!r}, recomputed {b[row]!r}")
    return None


def verify_cycle(cycle: str, *, revision: int | None = None, url=None) -> VerifyReport:
    """Verify the published run of a cycle's revision (the newest revision by default)."""
    from consensus.workflow.run import compute_cycle

    with session_scope(url, write=False) as session:
        run = latest_run(session, cycle, revision=revision)
        if run.status != "published":
            raise NotFound(f"cycle {cycle} revision {run.revision} is not published; verify checks a published plan")
        report = VerifyReport(cycle, run.id, run.revision, run.status)
        report.entries, problem = check_journal(session)
        if problem:
            report.problems.append(problem)
        _, problems = check_positions(session)  # a position decides which file is in force
        report.problems += problems[:1]
        sub = Submission.__table__
        shas = set((run.parts or {}).values())
        for row in session.execute(select(sub.c.sha256, sub.c.lines_sha256).where(sub.c.seq <= run.through_seq)):
            shas.add(row.sha256)
            if row.lines_sha256:
                shas.add(row.lines_sha256)
        report.blobs, problem = check_blobs(session, shas)
        if problem:
            report.problems.append(problem)
            return report
        stored = run_parts(session, run)
    if run.method_version != METHOD_VERSION:
        report.problems.append(f"run #{run.id} was made by method version {run.method_version}; this release "
                               f"computes with {METHOD_VERSION}, so its numbers cannot be recomputed here")
        return report
    _, result, _ = compute_cycle(cycle, url=url, spec=RunSpec.from_dict(run.spec), through=run.through_seq,
                                 use_cache=False, require_open=False, jobs=1)
    names = sorted(set(stored) | set(result.parts))
    for name in names:
        if name not in stored or name not in result.parts:
            report.problems.append(f"part {name} is {'not stored' if name not in stored else 'not recomputed'}")
            break
        difference = _first_difference(name, stored[name], result.parts[name])
        if difference:
            report.problems.append(difference)
            break
        report.parts += 1
    return report


# --------------------------------------------------------------------------- the whole store


@dataclass
class StoreCheck:
    """What :func:`check_store` found: counts of what it checked and every problem, in plain words."""

    store: str
    backend: str
    entries: int = 0
    records: int = 0
    blobs: int = 0
    database: str = ""
    problems: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.problems

    def lines(self) -> list[str]:
        checked = (f"{self.entries:,} journal entries chained from the first, {self.records:,} records at the position "
                   f"of their entry, {self.blobs:,} stored files and frames matching their hashes"
                   + (f"; {self.database}" if self.database else ""))
        if self.ok:
            return [f"store {self.store}: intact — {checked}"]
        return [f"store {self.store}: {len(self.problems)} problem(s) found", *[f"  - {p}" for p in self.problems],
                f"checked: {checked}"]


#: How many stored files and frames are read at a time while their hashes are checked.
_BLOB_BATCH = 200


def _entries(session) -> dict[tuple[str, str], int]:
    table = JournalEntry.__table__
    return {(r.kind, r.ref_id): int(r.seq) for r in session.execute(select(table.c.kind, table.c.ref_id, table.c.seq))}


def check_positions(session) -> tuple[int, list[str]]:
    """(records checked, problems): every record has its journal entry, at the position the record names.

    The journal's digests cover what a record says, not the positions written
    beside it (``Submission.seq`` decides which file is in force, a decision's
    ``seq`` whether a run applies it), so a position changed outside the tool
    is found here; so is a record added without its entry.
    """
    entries = _entries(session)
    problems: list[str] = []
    count = 0

    def expect(kind: str, ref: str, seq, what: str) -> None:
        nonlocal count
        count += 1
        at = entries.get((kind, ref))
        if at is None:
            problems.append(f"{what} has no journal entry: it was added outside the tool")
        elif seq is not None and int(seq) != at:
            problems.append(f"{what} names journal position {int(seq)}, but its entry is at {at}: its position "
                            "was changed outside the tool")

    s, d, c, r, cr = (Submission.__table__, Decision.__table__, Cycle.__table__, CycleRevision.__table__,
                      ConsensusRun.__table__)
    for row in session.execute(select(s.c.id, s.c.seq)):
        if row.seq is None:
            count += 1
            problems.append(f"submission #{row.id} has no journal position: it was added outside the tool")
        else:
            expect("submission", str(row.id), row.seq, f"submission #{row.id}")
    for row in session.execute(select(d.c.id, d.c.seq, d.c.withdrawn_at, d.c.withdrawn_seq)):
        expect("decision", str(row.id), row.seq, f"decision #{row.id}")
        if row.withdrawn_at is not None or row.withdrawn_seq is not None:
            expect("withdrawal", str(row.id), row.withdrawn_seq, f"the withdrawal of decision #{row.id}")
    for row in session.execute(select(c.c.name, c.c.opened_seq)):
        expect("cycle", row.name, row.opened_seq, f"cycle {row.name}")
    for row in session.execute(select(r.c.cycle, r.c.revision, r.c.published_at, r.c.published_seq)):
        ref = f"{row.cycle}:{row.revision}"
        if row.revision > 1:
            expect("reopen", ref, None, f"revision {row.revision} of cycle {row.cycle}")
        if row.published_at is not None or row.published_seq is not None:
            expect("publish", ref, row.published_seq, f"the publication of cycle {row.cycle} revision {row.revision}")
    for row in session.execute(select(cr.c.id)):
        expect("run", str(row.id), None, f"run #{row.id}")
    return count, problems


def check_states(session) -> list[str]:
    """Cycles and runs say what the journal's publications say: a published revision, its one published run."""
    problems: list[str] = []
    r, cr = CycleRevision.__table__, ConsensusRun.__table__
    revisions: dict[str, dict[int, object]] = {}
    for row in session.execute(select(r.c.cycle, r.c.revision, r.c.published_seq, r.c.published_run_id)):
        revisions.setdefault(row.cycle, {})[int(row.revision)] = row
    published_runs = {int(row.published_run_id) for rows in revisions.values() for row in rows.values()
                      if row.published_seq is not None and row.published_run_id is not None}
    for cycle in session.execute(select(Cycle)).scalars():
        mine = revisions.get(cycle.name, {})
        newest = max(mine) if mine else None
        if newest != cycle.revision:
            problems.append(f"cycle {cycle.name} says revision {cycle.revision}, but its newest revision is {newest}")
            continue
        frozen = mine[newest].published_seq is not None
        if (cycle.status == "published") != frozen:
            problems.append(f"cycle {cycle.name} says {cycle.status}, but revision {newest} was "
                            f"{'published' if frozen else 'never published'}")
    for row in session.execute(select(cr.c.id, cr.c.cycle, cr.c.status)):
        if (row.status == "published") != (int(row.id) in published_runs):
            problems.append(f"run #{row.id} of cycle {row.cycle} says {row.status}, but it "
                            f"{'is' if int(row.id) in published_runs else 'is not'} the run a publication names")
    return problems


def check_all_blobs(session) -> tuple[int, list[str]]:
    """(stored files and frames checked, problems): each hashes to its key, and every one referred to is there."""
    table = Blob.__table__
    problems: list[str] = []
    keys = sorted(k for (k,) in session.execute(select(table.c.sha256)))
    for start in range(0, len(keys), _BLOB_BATCH):  # a batch at a time: a store's blobs need not fit in memory
        batch = keys[start:start + _BLOB_BATCH]
        for row in session.execute(select(table.c.sha256, table.c.encoding, table.c.content)
                                   .where(table.c.sha256.in_(batch))):
            try:
                intact = check_blob(row.encoding, row.sha256, bytes(row.content))
            except Exception:  # noqa: BLE001 - content that cannot even be inflated is damaged content
                intact = False
            if not intact:
                problems.append(f"stored content {row.sha256[:12]}… no longer matches its hash")
    known = set(keys)
    s, cr = Submission.__table__, ConsensusRun.__table__
    for row in session.execute(select(s.c.id, s.c.sha256, s.c.lines_sha256)):
        for sha, what in ((row.sha256, "bytes"), (row.lines_sha256, "checked lines")):
            if sha and sha not in known:
                problems.append(f"the {what} of submission #{row.id} ({sha[:12]}…) are missing from the store")
    for row in session.execute(select(cr.c.id, cr.c.parts).where(cr.c.status != "superseded")):
        gone = sorted(name for name, sha in (row.parts or {}).items() if sha not in known)
        if gone:
            problems.append(f"run #{row.id} lacks its stored part(s) {', '.join(gone)}")
    return len(keys), problems


def check_database(session) -> tuple[str, list[str]]:
    """SQLite's own checks of the database file (integrity_check, foreign_key_check); nothing to add for PostgreSQL."""
    if session.get_bind().dialect.name != "sqlite":
        return "", []
    found = [str(r[0]) for r in session.execute(text("PRAGMA integrity_check"))]
    problems = [] if found == ["ok"] else [f"SQLite integrity_check: {line}" for line in found[:10]]
    orphans = session.execute(text("PRAGMA foreign_key_check")).all()
    problems += [f"SQLite foreign_key_check: a row of {row[0]} refers to a missing row of {row[2]}"
                 for row in orphans[:10]]
    return ("SQLite integrity_check and foreign_key_check ok" if not problems else ""), problems


def check_store(*, url=None) -> StoreCheck:
    """Check the whole store: journal chain and positions, states, every stored file and frame, the database file."""
    resolved = resolve_url(url)
    engine = get_engine(resolved)
    report = StoreCheck(store=_shown(resolved), backend=engine.dialect.name)
    try:
        with session_scope(engine, write=False) as session:
            report.database, problems = check_database(session)
            report.problems += problems
            report.entries, problem = check_journal(session)
            if problem:
                report.problems.append(problem)
            report.records, problems = check_positions(session)
            report.problems += problems
            report.problems += check_states(session)
            report.blobs, problems = check_all_blobs(session)
            report.problems += problems
    except DBAPIError as error:  # a database file damaged past reading
        reason = str(error.orig).strip().splitlines()[0] if error.orig else str(error)
        report.problems.append(f"the database cannot be read to the end: {reason}")
    return report
