"""A consensus run: read the inputs in force, compute the plan, store the result.  Nothing else.

The run reads its inputs at one journal position (:mod:`consensus.workflow.inputs`),
computes with no transaction open (:func:`consensus.methods.plan.compute_plan`),
then stores the result in one short write: the run record with its settings,
the position it read and the digest of its inputs, and each result frame as a
packed part.  A submission made while the run computes waits only for that
short write; the run says it was made from the inputs before it.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import dataclass

import pandas as pd
from sqlalchemy import select, update

from consensus.errors import CycleStateError
from consensus.methods.plan import METHOD_VERSION, PlanResult, RunSpec, compute_plan
from consensus.store import blobs, journal
from consensus.store.cache import StoreCache
from consensus.store.db import session_scope
from consensus.store.models import Blob, ConsensusRun, Cycle, Submission, utcnow
from consensus.workflow.inputs import LoadedInputs, load_plan_inputs

__all__ = ["RunSpec", "RunSummary", "run_cycle", "compute_cycle", "default_jobs"]


def default_jobs() -> int:
    """The machine's cores (the processes a run spreads its statistical fits over by default)."""
    return max(1, len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1))


@dataclass
class RunSummary:
    run_id: int
    cycle: str
    revision: int
    cells: int
    sources: list[str]
    total: float
    flagged: int
    warnings: list[str]
    through_seq: int
    newer_inputs: int = 0

    def line(self) -> str:
        from consensus.vocabulary import source_label

        text = (f"cycle {self.cycle}: run #{self.run_id}, {self.cells:,} cells from "
                f"{', '.join(source_label(s) for s in self.sources)}; total {self.total:,.0f} units; "
                f"{self.flagged:,} cells where the sources disagree")
        if self.newer_inputs:
            text += (f"; {self.newer_inputs} file(s) arrived while it computed and are not in it: run again to "
                     "include them")
        return text


def compute_cycle(cycle_name: str, *, url=None, spec: RunSpec | None = None, jobs: int | None = None,
                  through: int | None = None, use_cache: bool = True, require_open: bool = True,
                  progress: Callable[[str], None] | None = None) -> tuple[LoadedInputs, PlanResult, StoreCache]:
    """Read a cycle's inputs (as of ``through``) and compute its plan, storing nothing."""
    spec = spec or RunSpec()
    loaded = load_plan_inputs(cycle_name, url=url, spec=spec, through=through, require_open=require_open)
    cache = StoreCache(url, enabled=use_cache)
    result = compute_plan(loaded.inputs, spec, cache=cache, jobs=jobs or default_jobs(), progress=progress)
    if loaded.notes:
        result.notes["warnings"] = [*loaded.notes, *result.notes["warnings"]]
    return loaded, result, cache


def run_cycle(cycle_name: str, *, url=None, spec: RunSpec | None = None, jobs: int | None = None, by: str = "",
              progress: Callable[[str], None] | None = None) -> RunSummary:
    """Compute and store the consensus of one cycle as its new draft run."""
    spec = spec or RunSpec()
    loaded, result, cache = compute_cycle(cycle_name, url=url, spec=spec, jobs=jobs, progress=progress)
    if progress:
        progress("store the result")
    with session_scope(url) as session:
        cycle = session.get(Cycle, cycle_name)
        if cycle.status == "published" or cycle.revision != loaded.revision:
            raise CycleStateError(f"cycle {cycle_name} was published or reopened while the run computed; "
                                  "nothing was stored")
        run = store_result(session, cycle, loaded, result, spec, by=by)
        cache.write(session)
        newer = _newer_inputs(session, loaded.through_seq)
        return RunSummary(run.id, cycle_name, cycle.revision, result.summary["cells"], result.summary["sources"],
                          result.summary["total"], result.summary["flagged"], result.notes["warnings"],
                          loaded.through_seq, newer)


def _newer_inputs(session, through: int) -> int:
    t = Submission.__table__
    return len(session.execute(select(t.c.id).where(t.c.seq > through).where(t.c.status == "accepted")).all())


def store_result(session, cycle: Cycle, loaded: LoadedInputs, result: PlanResult, spec: RunSpec, *,
                 by: str = "") -> ConsensusRun:
    """Record a run: earlier drafts of the revision are superseded (their parts let go), the result packed."""
    cr = ConsensusRun.__table__
    drafts = session.execute(select(cr.c.id, cr.c.parts).where(cr.c.cycle == cycle.name)
                             .where(cr.c.revision == cycle.revision).where(cr.c.status == "draft")).all()
    session.execute(update(cr).where(cr.c.id.in_([d.id for d in drafts])).values(status="superseded"))
    parts = {name: blobs.put_frame(session, frame) for name, frame in result.parts.items()}
    inputs = _inputs_read(session, loaded.submission_ids)
    run = ConsensusRun(cycle=cycle.name, revision=cycle.revision, created_at=utcnow(), created_by=by,
                       spec=spec.to_dict(), through_seq=loaded.through_seq,
                       inputs_digest=loaded.inputs.fingerprint(spec), method_version=METHOD_VERSION, inputs=inputs,
                       summary=result.summary, notes=result.notes, parts=parts)
    session.add(run)
    session.flush()
    journal.record(session, "run", run, cycle=cycle.name)
    _let_go(session, {sha for d in drafts for sha in (d.parts or {}).values()} - set(parts.values()))
    return run


def _inputs_read(session, ids: list[int]) -> list[dict]:
    t = Submission.__table__
    if not ids:
        return []
    rows = session.execute(select(t.c.id, t.c.source, t.c.filename, t.c.sha256).where(t.c.id.in_(ids))
                           .order_by(t.c.id))
    return [{"id": r.id, "source": r.source, "filename": r.filename, "sha256": r.sha256} for r in rows]


def _let_go(session, shas: set[str]) -> None:
    """Delete result parts of superseded drafts that nothing else refers to (a draft is never published)."""
    if not shas:
        return
    cr, sub = ConsensusRun.__table__, Submission.__table__
    kept = {sha for (parts,) in session.execute(select(cr.c.parts).where(cr.c.status != "superseded"))
            for sha in (parts or {}).values()}
    kept |= {r[0] for r in session.execute(select(sub.c.lines_sha256).where(sub.c.lines_sha256.in_(list(shas))))}
    kept |= {r[0] for r in session.execute(select(sub.c.sha256).where(sub.c.sha256.in_(list(shas))))}
    gone = sorted(shas - kept)
    if gone:
        session.execute(Blob.__table__.delete().where(Blob.__table__.c.sha256.in_(gone)))


def sources_in_force(cycle_name: str, *, url=None, through: int | None = None,
                     spec: RunSpec | None = None) -> pd.DataFrame:
    """The cycle's sources at planning grain from the submissions in force now (or at ``through``)."""
    from consensus.methods.plan import current_sources

    spec = spec or RunSpec()
    loaded = load_plan_inputs(cycle_name, url=url, spec=spec, through=through, require_open=False)
    return current_sources(loaded.inputs, spec)
