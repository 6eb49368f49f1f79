"""Gather a cycle's pack inputs from the store in a few whole-cycle queries, then render them."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
from sqlalchemy import select

from consensus import periods
from consensus.methods import accuracy
from consensus.methods.bom import component_totals, explode_bom
from consensus.pack.inputs import PackInputs, empty_frame
from consensus.pack.render import render_pack
from consensus.store import frames
from consensus.store.db import session_scope
from consensus.store.models import (
    CellSource,
    ConsensusLine,
    ConsensusRun,
    Cycle,
    Setting,
    Submission,
    SubmissionCycle,
    WeightRecord,
    utcnow,
)
from consensus.workflow.cycles import get_cycle, submission_status
from consensus.workflow.decisions import decision_scope, load_decisions
from consensus.workflow.publish import latest_run, run_lines
from consensus.workflow.run import RunSpec, measure_history
from consensus.workflow.statistical_source import series_table

FVA_ORDER = ["naive", "statistical_base", "statistical", "dc", "sales", "marketing", "consensus"]
FVA_LABELS = {"naive": "seasonal naive", "statistical_base": "statistical (before events)",
              "statistical": "statistical + marketing events", "dc": "distribution centers", "sales": "sales",
              "marketing": "marketing (quantities)", "consensus": "consensus"}


def company_name(session) -> str:
    setting = session.get(Setting, "company")
    return setting.value if setting else "Demand review"


def _submissions(session, cycle: str) -> pd.DataFrame:
    sc, sub = SubmissionCycle.__table__, Submission.__table__
    frame = frames.read_frame(session, select(sub.c.source, sc.c.scope, sub.c.filename, sub.c.sha256,
                                              sub.c.submitted_by, sub.c.submitted_at, sc.c.status,
                                              sub.c.row_count.label("rows"))
                              .join(sub, sub.c.id == sc.c.submission_id)
                              .where(sc.c.cycle == cycle).where(sc.c.status == "accepted")
                              .where(sc.c.source != "naive"),
                              list(empty_frame("submissions").columns))
    frame["submitted_at"] = frame["submitted_at"].astype(str).str.slice(0, 16)
    return frame.sort_values(["source", "scope"], ignore_index=True)


def _previous_published(session, cycle: str) -> pd.DataFrame:
    c = Cycle.__table__
    row = session.execute(select(c.c.name, c.c.published_run_id).where(c.c.name < cycle)
                          .where(c.c.status == "published").order_by(c.c.name.desc())).first()
    if row is None or row.published_run_id is None:
        return empty_frame("previous")
    return run_lines(session, row.published_run_id)[["item", "location", "period", "consensus"]]


def _band_coverage(session, cycle: str, actuals: pd.DataFrame) -> pd.DataFrame:
    """How often the bands stored by earlier cycles' runs held the demand that came (and the Winkler score)."""
    from consensus.methods.intervals import winkler_score

    cr, cl = ConsensusRun.__table__, ConsensusLine.__table__
    lines = frames.read_frame(session, select(cl.c.item, cl.c.location, cl.c.period, cl.c.lower_80, cl.c.upper_80,
                                              cl.c.lower_95, cl.c.upper_95)
                              .join(cr, cr.c.id == cl.c.run_id).where(cr.c.status == "published")
                              .where(cr.c.cycle < cycle).where(cl.c.period <= cycle),
                              ["item", "location", "period", "lower_80", "upper_80", "lower_95", "upper_95"])
    if lines.empty:
        return empty_frame("band_coverage")
    scored = lines.merge(actuals, on=["item", "location", "period"], how="inner").dropna()
    rows = []
    for nominal in (80, 95):
        lo, hi, y = (scored[f"lower_{nominal}"].to_numpy(float), scored[f"upper_{nominal}"].to_numpy(float),
                     scored["quantity"].to_numpy(float))
        rows.append({"level": f"{nominal}%", "nominal": nominal / 100, "coverage": float(np.mean((y >= lo) & (y <= hi))),
                     "winkler": float(np.mean(winkler_score(lo, hi, y, level=nominal / 100))), "n": len(y)})
    return pd.DataFrame(rows)


def _fva(errors: pd.DataFrame) -> pd.DataFrame:
    """Forecast value added: WAPE of each step on the cells every step forecast (common cells, so steps compare)."""
    if errors.empty:
        return empty_frame("fva")
    keys = ["cycle", "item", "location", "period"]
    present = [s for s in FVA_ORDER if s in set(errors["source"])]
    reference = errors[errors["source"] == ("consensus" if "consensus" in present else present[0])][keys]
    rows = []
    for step in present:
        e = errors[errors["source"] == step].merge(reference, on=keys)
        if e.empty:
            continue
        rows.append({"step": FVA_LABELS[step], "wape": accuracy.wape(e["actual"].to_numpy(), e["forecast"].to_numpy()),
                     "n": len(e)})
    return pd.DataFrame(rows, columns=["step", "wape", "n"])


def _scorecards(errors, *, items, locations) -> tuple[pd.DataFrame, pd.DataFrame]:
    shown = errors[errors["source"].isin(["sales", "dc", "marketing", "statistical", "consensus", "naive"])]
    if shown.empty:
        return empty_frame("scorecard"), empty_frame("scorecard_history")
    card = pd.concat([accuracy.pooled_accuracy(shown, level=level, items=items, locations=locations).assign(level=level)
                      for level in ("item", "family_region", "family", "total")], ignore_index=True)
    history = (shown.assign(abs_error=shown["error"].abs())
               .groupby(["source", "cycle"], as_index=False)
               .agg(abs_error=("abs_error", "sum"), signed=("error", "sum"), actual=("actual", "sum")))
    positive = history["actual"].where(history["actual"] > 0)
    history["wape"] = 100 * history["abs_error"] / positive
    history["bias_pct"] = 100 * history["signed"] / positive
    return card, history[["source", "cycle", "wape", "bias_pct"]]


def gather_pack_inputs(cycle: str, *, url=None) -> PackInputs:
    """Everything the pack shows for a cycle, read once from the store."""
    spec = RunSpec()
    with session_scope(url) as session:
        c = get_cycle(session, cycle)
        run = latest_run(session, cycle)
        items, locations = frames.load_items(session), frames.load_locations(session)
        actuals = frames.load_actuals(session)
        consensus = run_lines(session, run.id)
        cs = CellSource.__table__
        sources = frames.read_frame(session, select(cs.c.source, cs.c.item, cs.c.location, cs.c.period,
                                                    cs.c.value.label("quantity")).where(cs.c.run_id == run.id),
                                    ["source", "item", "location", "period", "quantity"])
        w = WeightRecord.__table__
        weights = frames.read_frame(session, select(*[w.c[k] for k in empty_frame("weights").columns])
                                    .where(w.c.run_id == run.id), list(empty_frame("weights").columns))
        _, errors = measure_history(session, c, spec=spec, items=items, locations=locations,
                                    actuals=actuals[actuals["period"] <= cycle])
        decisions = load_decisions(session, cycle)
        previous = _previous_published(session, cycle)
        submissions = _submissions(session, cycle)
        coverage = _band_coverage(session, cycle, actuals)
        company = company_name(session)
        bom = frames.load_bom(session)
        series = series_table(session, cycle)
    status = submission_status(cycle, url=url)
    missing = status.loc[status["state"] == "missing", ["source", "scope"]].reset_index(drop=True)
    known = actuals[actuals["period"] <= cycle]
    card, history = _scorecards(errors, items=items, locations=locations)
    flagged = consensus[consensus["flagged"].astype(bool)].merge(items[["item", "family"]], on="item")
    if not decisions.empty:
        decisions = decisions.assign(scope=decision_scope(decisions),
                                     change=decisions["kind"] + " " + decisions["amount"].map("{:+,.0f}".format),
                                     at=decisions["at"].astype(str).str.slice(0, 16))
    components = component_totals(explode_bom(consensus.rename(columns={"consensus": "quantity"})[
        ["item", "period", "quantity"]], bom))
    wspec = run.spec.get("weights", {})
    notes = {
        "weights": (f"Scheme {wspec.get('scheme')}, per {wspec.get('segment')} and lag bucket, from the last "
                    f"{wspec.get('window_cycles')} cycles of each source's errors. The default weighs each source by "
                    "the inverse of its mean squared error (Bates & Granger, 1969) and shrinks those weights toward "
                    "equal ones, w = ψ·ŵ + (1 − ψ)/N, with ψ = n/(n + κ) growing with the cycles of history n: "
                    "estimated weights are noisy, and the forecast-combination literature finds equal weights hard "
                    "to beat (the 'forecast combination puzzle'; Stock & Watson, 2004). Where a family has too "
                    "little history the weights of all families pooled are used, and failing that equal weights; "
                    "a source missing from a cell has its weight shared among those present."),
        "errors": ("Error e = actual − forecast, so a negative bias or tracking signal means a source forecast too "
                   "high. MAPE leaves out months with zero actual demand (counted in the scorecard as n_zero_actual)."),
        "bands": "Bands come from the empirical distribution of past errors at the same lag, scaled to the "
                 "forecast; with short history, from MAD with the normal approximation (σ ≈ 1.25 × MAD).",
        "reconciliation": " ".join(filter(None, [run.notes.get("reconciliation", {}).get("text", ""),
                                                 run.notes.get("reconciliation", {}).get("why_default", "")]))
                          or "The plan is made at item × location × month and every total is the sum of its cells.",
    }
    return PackInputs(
        company=company, cycle=cycle, status="published" if run.status == "published" else "draft",
        generated_at=utcnow(), horizon=c.horizon, last_actual_month=known["period"].max() if not known.empty else cycle,
        submissions=submissions, missing=missing, items=items[["item", "family", "unit_price"]],
        locations=locations[["location", "region"]], actuals=known, sources=sources,
        consensus=consensus, previous=previous, weights=weights, scorecard=card, scorecard_history=history,
        disagreement=flagged[["item", "location", "period", "family", "spread", "spread_ratio", "flagged"]],
        fva=_fva(errors), decisions=decisions if not decisions.empty else empty_frame("decisions"),
        components=components, method_notes=notes, band_coverage=coverage,
        series=series.reindex(columns=list(empty_frame("series").columns)) if not series.empty
        else empty_frame("series"),
    )


def write_pack(cycle: str, *, pdf_path: Path | str, html_path: Path | str | None = None, url=None) -> tuple[Path, int]:
    """Gather and render the pack; returns the PDF path and its page count."""
    inputs = gather_pack_inputs(cycle, url=url)
    rendered = render_pack(inputs, pdf_path=Path(pdf_path), html_path=Path(html_path) if html_path else None)
    return Path(pdf_path), int(rendered.n_pages or 0)
