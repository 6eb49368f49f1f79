"""Publishing a cycle's plan, exporting it, and handing supply planning its component demand.

Publishing freezes the cycle's revision: from then on it takes no
submissions, decisions or runs until it is reopened.  Exports and component
demand read the stored result of the run they name; they compute nothing.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd
from sqlalchemy import select, update

from consensus.errors import CycleStateError, NotFound
from consensus.methods.intervals import band_columns
from consensus.methods.plan import RunSpec
from consensus.outputs import write_csv
from consensus.store import journal
from consensus.store.db import session_scope
from consensus.store.models import ConsensusRun, Cycle, CycleRevision, Decision, Submission, utcnow
from consensus.workflow.cycles import get_cycle
from consensus.workflow.inputs import run_parts

EXPORT_KEYS = ["item", "location", "period", "lag", "consensus"]


def latest_run(session, cycle: str, *, revision: int | None = None) -> ConsensusRun:
    """The published run of a cycle's revision (newest revision by default), else its newest draft."""
    c = get_cycle(session, cycle)
    wanted = c.revision if revision is None else revision
    if not 1 <= wanted <= c.revision:
        raise NotFound(f"cycle {cycle} has revisions 1 to {c.revision}, not {wanted}")
    cr = ConsensusRun.__table__
    row = session.execute(select(cr.c.id).where(cr.c.cycle == cycle).where(cr.c.revision == wanted)
                          .where(cr.c.status.in_(["published", "draft"]))
                          .order_by((cr.c.status == "published").desc(), cr.c.id.desc())).first()
    if row is None and revision is None and wanted > 1:  # a reopened revision not yet run: show the published one
        return latest_run(session, cycle, revision=wanted - 1)
    if row is None:
        raise NotFound(f"cycle {cycle} has no consensus yet; compute it with 'consensus run --cycle {cycle}'")
    return session.get(ConsensusRun, row.id)


def run_lines(session, run: ConsensusRun) -> pd.DataFrame:
    """The run's cells, with lag, sorted by item, location and month."""
    from consensus.periods import lags

    cells = run_parts(session, run, ["cells"])["cells"]
    cells.insert(3, "lag", lags(pd.Series(run.cycle, index=cells.index), cells["period"]))
    return cells


def publish_cycle(cycle: str, *, by: str = "", url=None) -> ConsensusRun:
    """Make the newest draft the plan of record of the cycle's revision, and freeze the revision."""
    with session_scope(url) as session:
        c = get_cycle(session, cycle)
        if c.status == "published":
            raise CycleStateError(f"cycle {cycle} revision {c.revision} is already published; reopen it with "
                                  f"'consensus cycle reopen {cycle} --reason \"...\" --by \"...\"' to change it")
        cr = ConsensusRun.__table__
        row = session.execute(select(cr.c.id).where(cr.c.cycle == cycle).where(cr.c.revision == c.revision)
                              .where(cr.c.status == "draft").order_by(cr.c.id.desc())).first()
        if row is None:
            raise NotFound(f"cycle {cycle} revision {c.revision} has no run to publish; run "
                           f"'consensus run --cycle {cycle}' first")
        run = session.get(ConsensusRun, row.id)
        stale = _changed_since(session, cycle, run.through_seq)
        if stale:
            raise CycleStateError(f"cycle {cycle}: {stale} since run #{run.id} was made; run "
                                  f"'consensus run --cycle {cycle}' again, then publish")
        session.execute(update(cr).where(cr.c.id == run.id).values(status="published"))
        revision = session.get(CycleRevision, (cycle, c.revision))
        revision.published_at, revision.published_by, revision.published_run_id = utcnow(), by.strip(), run.id
        session.add(revision)
        session.flush()
        revision.published_seq = journal.record(session, "publish", revision, cycle=cycle).seq
        c.status = "published"
        session.add_all([revision, c])
        session.flush()
        session.refresh(run)
        return run


def _changed_since(session, cycle: str, through: int) -> str:
    """What reached the cycle after a run read its inputs (a file for it, orders, master data, a decision)."""
    from consensus.store.models import SubmissionCycle

    sub, link, d = Submission.__table__, SubmissionCycle.__table__, Decision.__table__
    files = session.execute(select(sub.c.id, sub.c.kind).where(sub.c.seq > through).where(sub.c.status == "accepted")
                            .where(sub.c.kind.in_(["actuals", "items", "locations", "bom"]) |
                                   sub.c.id.in_(select(link.c.submission_id).where(link.c.cycle == cycle)))).all()
    decisions = session.execute(select(d.c.id).where(d.c.cycle == cycle).where(
        (d.c.seq > through) | (d.c.withdrawn_seq > through))).all()
    said = []
    if files:
        said.append(f"{len(files)} file(s) arrived")
    if decisions:
        said.append(f"{len(decisions)} decision(s) were recorded or withdrawn")
    return " and ".join(said)


def export_consensus(cycle: str, out: Path | str, *, revision: int | None = None, url=None) -> tuple[Path, str, int]:
    """Write the cycle's consensus with its bands to CSV; returns (path, status, rows)."""
    with session_scope(url, write=False) as session:
        run = latest_run(session, cycle, revision=revision)
        lines = run_lines(session, run)
    bands = band_columns(RunSpec.from_dict(run.spec).band_levels)
    lines.insert(0, "cycle", cycle)
    lines["revision"] = run.revision
    lines["status"] = run.status
    lines["run_id"] = run.id
    columns = ["cycle", "revision", *EXPORT_KEYS, *bands, "band_method", "status", "run_id"]
    path = write_csv(lines[columns], Path(out), float_format="%.3f")
    return path, run.status, len(lines)


def component_demand(cycle: str, *, revision: int | None = None, url=None) -> pd.DataFrame:
    """Component gross requirements per month, as the run computed them from its BOM."""
    with session_scope(url, write=False) as session:
        run = latest_run(session, cycle, revision=revision)
        return run_parts(session, run, ["components"])["components"]


def export_components(cycle: str, out: Path | str, *, revision: int | None = None, url=None) -> tuple[Path, int]:
    """Write component gross requirements per month to CSV for supply planning."""
    totals = component_demand(cycle, revision=revision, url=url)
    path = write_csv(totals, Path(out), float_format="%.3f")
    return path, len(totals)


__all__ = ["latest_run", "run_lines", "publish_cycle", "export_consensus", "component_demand", "export_components",
           "Cycle"]
