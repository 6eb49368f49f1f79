"""Opening cycles and seeing who has submitted what."""

from __future__ import annotations

import pandas as pd
from sqlalchemy import select

from consensus import periods
from consensus.errors import ConsensusError, NotFound
from consensus.store import frames
from consensus.store.db import session_scope
from consensus.store.models import Cycle, Submission, SubmissionCycle


def open_cycle(name: str, *, horizon: int = 18, url=None) -> Cycle:
    """Open a planning cycle (idempotent when the horizon agrees)."""
    if not periods.is_month(name):
        raise ConsensusError(f"cycle must be a month in YYYY-MM form, not {name!r}")
    if not 1 <= horizon <= 60:
        raise ConsensusError(f"horizon must be between 1 and 60 months, not {horizon}")
    with session_scope(url) as session:
        cycle = session.get(Cycle, name)
        if cycle is not None:
            if cycle.horizon != horizon:
                raise ConsensusError(f"cycle {name} is already open with a horizon of {cycle.horizon} months")
            return cycle
        cycle = Cycle(name=name, horizon=horizon)
        session.add(cycle)
        return cycle


def get_cycle(session, name: str) -> Cycle:
    cycle = session.get(Cycle, name)
    if cycle is None:
        raise NotFound(f"cycle {name} is not open; open it with 'consensus cycle open {name}'")
    return cycle


def list_cycles(*, url=None) -> pd.DataFrame:
    """Every cycle with its horizon and status."""
    with session_scope(url) as session:
        return frames.table_frame(session, Cycle, ["name", "horizon", "status", "opened_at", "published_at"]) \
            .sort_values("name", ignore_index=True)


def expected_scopes(locations: pd.DataFrame) -> pd.DataFrame:
    """Who is expected each cycle: sales per region, each DC for its location, marketing once.

    Common practice in a monthly review: sales leads answer for their region,
    distribution centers for their own location, marketing for the whole plan.
    """
    rows = [("sales", f"region {r}") for r in sorted(locations["region"].unique())]
    rows += [("dc", f"location {loc}") for loc in sorted(locations["location"].unique())]
    rows += [("marketing", "all")]
    return pd.DataFrame(rows, columns=["source", "scope"])


def submission_status(cycle: str, *, url=None) -> pd.DataFrame:
    """For each expected source and scope: submitted (when, by whom, rows) or missing; plus rejected files.

    A submission whose scope is 'all' covers every scope of its source.
    """
    with session_scope(url) as session:
        get_cycle(session, cycle)
        locations = frames.load_locations(session)
        sc, sub = SubmissionCycle.__table__, Submission.__table__
        received = frames.read_frame(session, select(
            sc.c.source, sc.c.scope, sc.c.status, sub.c.id, sub.c.filename, sub.c.submitted_by,
            sub.c.submitted_at, sub.c.row_count, sub.c.grain,
        ).join(sub, sub.c.id == sc.c.submission_id).where(sc.c.cycle == cycle),
            ["source", "scope", "status", "id", "filename", "submitted_by", "submitted_at", "row_count", "grain"])
        rejected = frames.read_frame(session, select(
            sub.c.source, sub.c.scope, sub.c.status, sub.c.id, sub.c.filename, sub.c.submitted_by,
            sub.c.submitted_at, sub.c.row_count, sub.c.grain, sub.c.reasons,
        ).where(sub.c.status == "rejected").where((sub.c.cycle == cycle) | (sub.c.cycle.is_(None)))
            .where(sub.c.kind.in_(["forecast", "events", "unknown"])),
            ["source", "scope", "status", "id", "filename", "submitted_by", "submitted_at", "row_count", "grain",
             "reasons"])
    expected = expected_scopes(locations)
    in_force = received[received["status"] == "accepted"]
    whole = in_force[in_force["scope"] == "all"][["source"]].drop_duplicates().assign(covers_all=True)
    table = expected.merge(in_force, on=["source", "scope"], how="left").merge(whole, on="source", how="left")
    table["state"] = "missing"
    table.loc[table["id"].notna(), "state"] = "submitted"
    covered = table["id"].isna() & table["covers_all"].eq(True)
    table.loc[covered, "state"] = "covered by an all-scope file"
    extra = in_force[~in_force.set_index(["source", "scope"]).index.isin(expected.set_index(["source", "scope"]).index)]
    table = pd.concat([table.drop(columns="covers_all"), extra.assign(state="submitted")], ignore_index=True)
    superseded = received[received["status"] == "superseded"].assign(state="superseded")
    rejected = rejected.assign(state="rejected")
    return pd.concat([table, superseded, rejected], ignore_index=True)
