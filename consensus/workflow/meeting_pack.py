"""Gather a cycle's pack inputs from the stored result of the run it shows, then render them.

Everything comes from the run's stored parts and from the records as they
stood when the run read its inputs (its journal position): nothing is
measured again and nothing is written to the store.
"""

from __future__ import annotations

from pathlib import Path


import pandas as pd
from sqlalchemy import select

from consensus.methods.decisions import decision_scope
# The months the run asks of an item × DC before its amplification counts (the part does not store it).
from consensus.methods.plan import RunSpec
from consensus.pack.inputs import FRAME_COLUMNS, PackInputs, empty_frame
from consensus.pack.render import render_pack
from consensus.store import frames
from consensus.store.db import session_scope
from consensus.store.models import CycleRevision, Setting, utcnow
from consensus.vocabulary import describe_change, value_added_order
from consensus.workflow.cycles import get_cycle, submission_status
from consensus.workflow.decisions import load_decisions
from consensus.workflow.inputs import run_parts
from consensus.workflow.publish import latest_run, run_lines

__all__ = ["gather_pack_inputs", "write_pack", "company_name"]


def company_name(session) -> str:
    setting = session.get(Setting, "company")
    return setting.value if setting else "Demand review"


def _previous_published(session, cycle: str, through: int) -> pd.DataFrame:
    """The plan of the latest earlier cycle published by the run's journal position."""
    r = CycleRevision.__table__
    row = session.execute(select(r.c.cycle, r.c.published_run_id).where(r.c.cycle < cycle)
                          .where(r.c.published_seq.is_not(None)).where(r.c.published_seq <= through)
                          .order_by(r.c.cycle.desc(), r.c.revision.desc())).first()
    if row is None:
        return empty_frame("previous")
    from consensus.store.models import ConsensusRun

    return run_lines(session, session.get(ConsensusRun, row.published_run_id))[["item", "location", "period",
                                                                                 "consensus"]]


def _sources_long(cells: pd.DataFrame) -> pd.DataFrame:
    """The combined sources' values per cell, long: [source, item, location, period, quantity]."""
    parts = []
    for column in [c for c in cells.columns if c.startswith("value_")]:
        values = cells[["item", "location", "period", column]].rename(columns={column: "quantity"})
        parts.append(values[values["quantity"].notna()].assign(source=column[len("value_"):]))
    if not parts:
        return empty_frame("sources")
    return pd.concat(parts, ignore_index=True)[["source", "item", "location", "period", "quantity"]]


def _submissions(status: pd.DataFrame, shas: dict[int, str]) -> pd.DataFrame:
    """The files the run used, one row per expected scope they answer for (states as ``consensus status`` gives)."""
    received = status[status["state"].isin(["received", "partly_received"])]
    frame = pd.DataFrame({"source": received["source"], "scope": received["scope"],
                          "filename": received["filename"],
                          "sha256": received["id"].map(lambda i: shas.get(int(i), "")),
                          "submitted_by": received["submitted_by"],
                          "submitted_at": pd.to_datetime(received["submitted_at"]), "status": received["state"],
                          "rows": received["row_count"], "days_late": received["days_late"]})
    return frame.drop_duplicates(["source", "scope", "filename"]).reset_index(drop=True)


def _fva(fva: pd.DataFrame) -> pd.DataFrame:
    """Value added by step, keyed by source, in the order each step builds on the one before."""
    if fva.empty:
        return empty_frame("fva")
    order = value_added_order(fva["step"].tolist())
    return fva.set_index("step").reindex(order).reset_index()[["step", "wape", "n"]]


def _stored_part(parts: dict, name: str) -> pd.DataFrame:
    """A stored run part in the pack's columns for it (pack.inputs.FRAME_COLUMNS), or its empty frame."""
    found = parts.get(name)
    return found.reindex(columns=list(empty_frame(name).columns)) if found is not None and len(found) \
        else empty_frame(name)


def gather_pack_inputs(cycle: str, *, revision: int | None = None, url=None) -> PackInputs:
    """Everything the pack shows for a cycle, read from its run's stored result."""
    with session_scope(url, write=False) as session:
        c = get_cycle(session, cycle)
        run = latest_run(session, cycle, revision=revision)
        seq = run.through_seq
        revision_row = session.get(CycleRevision, (cycle, run.revision))
        shas = {r["id"]: r["sha256"] for r in run.inputs}
        fingerprint = _chain_at(session, seq)
        items = frames.load_items(session, through=seq)
        locations = frames.load_locations(session, through=seq)
        actuals = frames.load_actuals(session, through=seq, period_through=cycle)
        parts = run_parts(session, run)
        consensus = run_lines(session, run)
        decisions = load_decisions(session, cycle, through=seq)
        previous = _previous_published(session, cycle, seq)
        company = company_name(session)
        horizon = c.horizon
    status = submission_status(cycle, url=url, through=seq)
    missing = status.loc[status["state"] == "not_received", ["source", "scope", "days_late"]].reset_index(drop=True)
    flagged = consensus[consensus["flagged"].astype(bool)].merge(items[["item", "family"]], on="item")
    active = decisions[decisions["withdrawn_at"].isna()] if len(decisions) else decisions
    if len(active):
        active = active.assign(scope=decision_scope(active),
                               change=[describe_change(k, a) for k, a in zip(active["kind"], active["amount"])],
                               at=active["at"].astype(str).str.slice(0, 16))
    accuracy = parts.get("accuracy", pd.DataFrame())
    card = accuracy[accuracy["level"].isin(["item", "family_region", "family", "total"])] if len(accuracy) else \
        empty_frame("scorecard")
    history = parts.get("accuracy_history", pd.DataFrame())
    history = history[history["level"] == "item"][["source", "cycle", "wape", "bias_pct"]] if len(history) else \
        empty_frame("scorecard_history")
    fva = _fva(parts.get("fva", pd.DataFrame(columns=["step", "wape", "n"])))
    coverage = parts.get("band_coverage", pd.DataFrame())
    coverage = coverage[coverage["lag_bucket"] == "all"] if len(coverage) else empty_frame("band_coverage")
    amplification, accuracy_patterns = _amplification(parts), _pattern_accuracy(parts)
    spec = RunSpec.from_dict(run.spec)
    known = actuals
    return PackInputs(
        company=company, cycle=cycle, status="published" if run.status == "published" else "draft",
        generated_at=utcnow(), horizon=horizon,
        last_actual_month=known["period"].max() if len(known) else cycle,
        submissions=_submissions(status, shas), missing=missing, items=items[["item", "family", "unit_price"]],
        locations=locations[["location", "region"]], actuals=known, sources=_sources_long(consensus),
        consensus=consensus, previous=previous, weights=parts.get("weights", empty_frame("weights")),
        scorecard=card.drop(columns=[], errors="ignore"), scorecard_history=history,
        disagreement=flagged[["item", "location", "period", "family", "spread", "spread_ratio", "flagged"]],
        fva=fva, decisions=active if len(active) else empty_frame("decisions"),
        components=parts.get("components", empty_frame("components")), band_coverage=coverage,
        level_bands=_stored_part(parts, "level_bands"), series=_stored_part(parts, "series"),
        bias=_stored_part(parts, "bias"),
        weight_scheme=spec.weights.scheme, weight_segment=spec.weights.segment,
        weight_window_cycles=spec.weights.window_cycles, reconciliation_method=spec.reconciliation,
        disagreement_threshold=spec.weights.disagreement_threshold,
        disagreement_min_units=spec.weights.disagreement_min_units,
        due_date=c.due.isoformat() if c.due else None, revision=run.revision,
        reopened_by=revision_row.opened_by if run.revision > 1 else None,
        reopen_reason=revision_row.reason if run.revision > 1 else None,
        published_by=revision_row.published_by if run.status == "published" else None,
        published_at=revision_row.published_at if run.status == "published" else None,
        run_id=run.id, record_fingerprint=fingerprint,
        amplification=amplification, accuracy_patterns=accuracy_patterns,
        amplification_min_months=(int(amplification["min_months"].iloc[0]) if "min_months" in amplification
                                  and len(amplification) else None),
    )


def _amplification(parts: dict[str, pd.DataFrame]) -> pd.DataFrame:
    """The run's order amplification by DC, with every column the pack reads (a run without DCs stores fewer)."""
    frame = parts.get("amplification", pd.DataFrame())
    if frame.empty:
        return empty_frame("amplification")
    return frame.reindex(columns=list(dict.fromkeys([*frame.columns, *FRAME_COLUMNS["amplification"]])))


def _pattern_accuracy(parts: dict[str, pd.DataFrame]) -> pd.DataFrame:
    """The run's accuracy by demand pattern pooled over every lag (its "all" rows)."""
    frame = parts.get("accuracy_patterns", pd.DataFrame())
    if frame.empty:
        return empty_frame("accuracy_patterns")
    return frame[frame["lag_bucket"].astype(str) == "all"].reset_index(drop=True)


def _chain_at(session, seq: int) -> str:
    """The journal's chain value at a position: the fingerprint of every record up to it."""
    from consensus.store.models import JournalEntry

    j = JournalEntry.__table__
    row = session.execute(select(j.c.chain).where(j.c.seq <= seq).order_by(j.c.seq.desc()).limit(1)).first()
    return row.chain if row else ""


def write_pack(cycle: str, *, pdf_path: Path | str, html_path: Path | str | None = None, revision: int | None = None,
               url=None) -> tuple[Path, int]:
    """Gather and render the pack; returns the PDF path and its page count."""
    inputs = gather_pack_inputs(cycle, revision=revision, url=url)
    rendered = render_pack(inputs, pdf_path=Path(pdf_path), html_path=Path(html_path) if html_path else None)
    return Path(pdf_path), int(rendered.n_pages or 0)



