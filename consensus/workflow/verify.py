"""Check a published plan: the records are as written, and the stored inputs still give the same numbers.

Three checks, each stopping at the first difference it finds:

1. **The journal.**  Every entry's digest is recomputed from the record it
   names and chained again from the first entry; a record changed, added or
   removed outside the tool breaks the chain at that entry.
2. **The stored content.**  Every file, checked-lines frame and result part
   the run refers to still hashes to its sha256.
3. **The numbers.**  The run is computed again from its stored inputs, at the
   journal position it read and with its own settings, with no cache, and
   every part is compared with the stored one to the last digit.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from sqlalchemy import select

from consensus.errors import NotFound
from consensus.methods.plan import METHOD_VERSION, RunSpec
from consensus.store import journal
from consensus.store.blobs import check_blob
from consensus.store.db import session_scope
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
