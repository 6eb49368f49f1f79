"""Publishing a cycle's plan, exporting it, and handing supply planning its component demand."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
from sqlalchemy import select, update

from consensus.errors import CycleStateError, NotFound
from consensus.methods.bom import component_totals, explode_bom
from consensus.store import frames
from consensus.store.db import session_scope
from consensus.store.models import ConsensusLine, ConsensusRun, utcnow
from consensus.workflow.cycles import get_cycle

EXPORT_COLUMNS = ["item", "location", "period", "lag", "consensus", "lower_80", "upper_80", "lower_95", "upper_95",
                  "band_method"]


def latest_run(session, cycle: str) -> ConsensusRun:
    """The published run of a cycle, else its newest draft."""
    cr = ConsensusRun.__table__
    row = session.execute(select(cr.c.id).where(cr.c.cycle == cycle).where(cr.c.status.in_(["published", "draft"]))
                          .order_by((cr.c.status == "published").desc(), cr.c.id.desc())).first()
    if row is None:
        raise NotFound(f"cycle {cycle} has no consensus yet; compute it with 'consensus run --cycle {cycle}'")
    return session.get(ConsensusRun, row.id)


def run_lines(session, run_id: int) -> pd.DataFrame:
    cl = ConsensusLine.__table__
    columns = EXPORT_COLUMNS + ["n_sources", "missing_sources", "spread", "spread_ratio", "flagged",
                                "before_reconciliation", "reconciliation_adjustment", "reconciliation_note",
                                "before_override"]
    frame = frames.read_frame(session, select(*[cl.c[c] for c in columns]).where(cl.c.run_id == run_id), columns)
    return frame.sort_values(["item", "location", "period"], ignore_index=True)


def publish_cycle(cycle: str, *, url=None) -> ConsensusRun:
    """Make the newest draft the cycle's published plan (once; re-run and publish again is refused)."""
    with session_scope(url) as session:
        c = get_cycle(session, cycle)
        if c.status == "published":
            raise CycleStateError(f"cycle {cycle} is already published (run #{c.published_run_id})")
        run = latest_run(session, cycle)
        cr = ConsensusRun.__table__
        session.execute(update(cr).where(cr.c.id == run.id).values(status="published"))
        c.status, c.published_at, c.published_run_id = "published", utcnow(), run.id
        session.add(c)
        session.flush()
        session.refresh(run)
        return run


def export_consensus(cycle: str, out: Path | str, *, url=None) -> tuple[Path, str, int]:
    """Write the cycle's consensus with its bands to CSV; returns (path, status, rows)."""
    out = Path(out)
    with session_scope(url) as session:
        get_cycle(session, cycle)
        run = latest_run(session, cycle)
        lines = run_lines(session, run.id)
    lines.insert(0, "cycle", cycle)
    lines["status"] = run.status
    lines["run_id"] = run.id
    out.parent.mkdir(parents=True, exist_ok=True)
    lines[["cycle", *EXPORT_COLUMNS, "status", "run_id"]].to_csv(out, index=False, float_format="%.3f")
    return out, run.status, len(lines)


def component_demand(cycle: str, *, url=None) -> pd.DataFrame:
    """Dependent demand of every component from the cycle's consensus (summed over locations)."""
    with session_scope(url) as session:
        run = latest_run(session, cycle)
        lines = run_lines(session, run.id)
        bom = frames.load_bom(session)
    demand = lines.rename(columns={"consensus": "quantity"})[["item", "period", "quantity"]]
    return explode_bom(demand, bom)


def export_components(cycle: str, out: Path | str, *, url=None) -> tuple[Path, int]:
    """Write component gross requirements per month to CSV for supply planning."""
    out = Path(out)
    exploded = component_demand(cycle, url=url)
    totals = component_totals(exploded)
    out.parent.mkdir(parents=True, exist_ok=True)
    totals.to_csv(out, index=False, float_format="%.3f")
    return out, len(totals)
