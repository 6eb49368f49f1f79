"""What a run depends on, read from the store at one journal position: the one place that decides it.

:func:`load_plan_inputs` reads, as of the store's newest journal position (or
a given one, to recompute a published run): the master data and order
history in force, every accepted file of each cycle of the window, the
earlier cycles' published plans and the current cycle's decisions not
withdrawn.  The computation (:func:`consensus.methods.plan.compute_plan`)
works out from those which file is in force for each cell.
"""

from __future__ import annotations

from dataclasses import dataclass

import pandas as pd
from sqlalchemy import select

from consensus import periods
from consensus.errors import CycleStateError
from consensus.methods.decisions import DECISION_COLUMNS
from consensus.methods.plan import CycleInputs, PlanInputs, RunSpec
from consensus.store import blobs, frames, journal
from consensus.store.db import session_scope
from consensus.store.models import ConsensusRun, Cycle, CycleRevision, Decision
from consensus.workflow.cycles import (get_cycle, missing_history_error, missing_history_months,
                                      missing_location_months)

PUBLISHED_CELL_COLUMNS = ["item", "location", "period", "consensus", "lower_80", "upper_80", "lower_95", "upper_95"]


@dataclass(frozen=True)
class LoadedInputs:
    """The inputs of a run and where they were read."""

    inputs: PlanInputs
    through_seq: int
    revision: int
    submission_ids: list[int]
    notes: tuple[str, ...] = ()  # what the loader left out, for the run to say


def line_loader(url):
    """A function giving checked lines by their sha256, each call in a read transaction of its own."""
    def load(shas: list[str]) -> dict[str, pd.DataFrame]:
        with session_scope(url, write=False) as session:
            return blobs.get_frames(session, list(shas))
    return load


def run_parts(session, run: ConsensusRun, names: list[str] | None = None) -> dict[str, pd.DataFrame]:
    """Frames of a run's stored result."""
    wanted = {k: v for k, v in (run.parts or {}).items() if names is None or k in names}
    found = blobs.get_frames(session, list(wanted.values()))
    return {name: found[sha] for name, sha in wanted.items()}


def published_plan(session, cycle: str, through: int) -> tuple[pd.DataFrame | None, int | None]:
    """The cells of a cycle's latest revision published by journal position ``through``."""
    r = CycleRevision.__table__
    row = session.execute(select(r.c.published_run_id).where(r.c.cycle == cycle)
                          .where(r.c.published_seq.is_not(None)).where(r.c.published_seq <= through)
                          .order_by(r.c.revision.desc())).first()
    if row is None or row.published_run_id is None:
        return None, None
    run = session.get(ConsensusRun, row.published_run_id)
    cells = run_parts(session, run, ["cells"])["cells"]
    columns = [c for c in PUBLISHED_CELL_COLUMNS if c in cells.columns]
    return cells[columns], run.id


def decisions_in_force(session, cycle: str, through: int) -> pd.DataFrame:
    """The cycle's decisions recorded by ``through`` and not withdrawn by then, in the order they were made."""
    d = Decision.__table__
    frame = frames.read_frame(session, select(*[d.c[c] for c in DECISION_COLUMNS], d.c.seq, d.c.withdrawn_seq)
                              .where(d.c.cycle == cycle).where(d.c.seq <= through).order_by(d.c.id),
                              [*DECISION_COLUMNS, "seq", "withdrawn_seq"])
    withdrawn = frame["withdrawn_seq"].notna() & (pd.to_numeric(frame["withdrawn_seq"]) <= through)
    kept = frame[~withdrawn].drop(columns=["seq", "withdrawn_seq"]).reset_index(drop=True)
    kept["amount"] = pd.to_numeric(kept["amount"]).astype(float)
    return kept


def load_plan_inputs(cycle_name: str, *, url=None, spec: RunSpec, through: int | None = None,
                     require_open: bool = True) -> LoadedInputs:
    """Everything a run of ``cycle_name`` depends on, as of journal position ``through`` (default: now)."""
    with session_scope(url, write=False) as session:
        cycle = get_cycle(session, cycle_name)
        if require_open and cycle.status == "published":
            from consensus.intake.submission import frozen_message

            raise CycleStateError(frozen_message(cycle))
        seq = journal.last_seq(session) if through is None else through
        items = frames.load_items(session, through=seq)
        locations = frames.load_locations(session, through=seq)
        bom = frames.load_bom(session, through=seq)
        actuals = frames.load_actuals(session, through=seq)
        missing = missing_history_months(actuals, cycle.name)
        partial = missing_location_months(actuals, cycle.name)
        if (missing or partial) and not cycle.allow_missing_history:
            raise missing_history_error(cycle.name, missing, empty=actuals.empty, locations=partial)
        actuals, notes = planned_history(actuals, items, locations, cycle.name)
        window = [periods.shift_month(cycle.name, -k) for k in range(spec.weights.window_cycles, 0, -1)]
        c = Cycle.__table__
        open_past = {row.name: row.horizon for row in session.execute(
            select(c.c.name, c.c.horizon).where(c.c.name.in_(window)).where(c.c.opened_seq <= seq))}
        subs = frames.submissions(session, kinds=["forecast", "events"], cycles=[*open_past, cycle.name],
                                  through=seq)
        links = _cycle_links(session, subs["id"].tolist())
        past = []
        for name in window:
            if name not in open_past:
                continue
            published, run_id = published_plan(session, name, seq)
            past.append(CycleInputs(name=name, horizon=int(open_past[name]),
                                    submissions=_of_cycle(subs, links, name), published=published,
                                    published_run=run_id))
        current = CycleInputs(name=cycle.name, horizon=int(cycle.horizon),
                              submissions=_of_cycle(subs, links, cycle.name))
        decisions = decisions_in_force(session, cycle.name, seq)
        revision = int(cycle.revision)
    inputs = PlanInputs(cycle=current, past=tuple(past), items=items, locations=locations, bom=bom,
                        actuals=actuals, decisions=decisions, lines=line_loader(url), unknown_months=tuple(missing),
                        unknown_at=tuple(partial))
    return LoadedInputs(inputs=inputs, through_seq=seq, revision=revision,
                        submission_ids=sorted(int(i) for i in subs["id"]), notes=notes)


def planned_history(actuals: pd.DataFrame, items: pd.DataFrame, locations: pd.DataFrame,
                    cycle: str) -> tuple[pd.DataFrame, tuple[str, ...]]:
    """The order history of items and locations in the master in force, and a note naming what was left out.

    An item or location that left the master (``consensus master --replace``)
    is no longer planned: its orders stay stored, but no statistical forecast
    is made from them and no accuracy is measured on them.
    """
    gone_item = ~actuals["item"].isin(set(items["item"]))
    gone_location = ~actuals["location"].isin(set(locations["location"]))
    notes = []
    for mask, column, word in ((gone_item, "item", "item"), (gone_location, "location", "location")):
        names = sorted(actuals.loc[mask, column].astype(str).unique())
        if names:
            shown = ", ".join(names[:5]) + (f" and {len(names) - 5} more" if len(names) > 5 else "")
            notes.append(f"cycle {cycle}: {len(names)} {word}{'s' if len(names) != 1 else ''} with order history "
                         f"{'are' if len(names) != 1 else 'is'} no longer in the {word}s master and not planned "
                         f"({shown})")
    if not notes:
        return actuals, ()
    return actuals[~(gone_item | gone_location)].reset_index(drop=True), tuple(notes)


def _cycle_links(session, ids: list[int]) -> pd.DataFrame:
    from consensus.store.models import SubmissionCycle

    link = SubmissionCycle.__table__
    if not ids:
        return pd.DataFrame(columns=["submission_id", "cycle"])
    return frames.read_frame(session, select(link.c.submission_id, link.c.cycle)
                             .where(link.c.submission_id.in_(ids)), ["submission_id", "cycle"])


def _of_cycle(subs: pd.DataFrame, links: pd.DataFrame, cycle: str) -> pd.DataFrame:
    mine = set(links.loc[links["cycle"] == cycle, "submission_id"].astype(int))
    return subs[subs["id"].astype(int).isin(mine)].reset_index(drop=True)
