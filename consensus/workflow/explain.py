"""Why a consensus number is what it is, in words a planner can read out in the meeting."""

from __future__ import annotations

from dataclasses import dataclass

import pandas as pd
from sqlalchemy import select

from consensus.errors import NotFound
from consensus.periods import lag_bucket_labels
from consensus.store import frames
from consensus.store.db import session_scope
from consensus.store.models import AlignmentTrace, CellSource, ConsensusLine, Decision, Item, WeightRecord
from consensus.workflow.publish import latest_run
from consensus.workflow.statistical_source import series_table


@dataclass(frozen=True)
class CellExplanation:
    """Everything stored about one cell of a run, and its plain-words reading."""

    line: dict
    sources: pd.DataFrame
    traces: pd.DataFrame
    weights: pd.DataFrame
    decisions: pd.DataFrame
    text: str


def _cell_rows(session, model, run_id: int, item: str, location: str, period: str) -> pd.DataFrame:
    t = model.__table__
    cols = [c.name for c in t.columns if c.name not in ("id", "run_id")]
    return frames.read_frame(session, select(*[t.c[c] for c in cols]).where(t.c.run_id == run_id)
                             .where(t.c.item == item).where(t.c.location == location).where(t.c.period == period),
                             cols)


def _fmt(x: float) -> str:
    return f"{x:,.0f}" if abs(x) >= 10 or x == 0 else f"{x:,.1f}"


def explain_cell(cycle: str, *, item: str, location: str, period: str, url=None) -> CellExplanation:
    """Gather the audit of one cell and write it as a short explanation."""
    with session_scope(url) as session:
        run = latest_run(session, cycle)
        lines = _cell_rows(session, ConsensusLine, run.id, item, location, period)
        if lines.empty:
            raise NotFound(f"no consensus for item {item} at {location} in {period} in cycle {cycle} (run #{run.id})")
        line = lines.iloc[0].to_dict()
        sources = _cell_rows(session, CellSource, run.id, item, location, period).sort_values("source")
        traces = _cell_rows(session, AlignmentTrace, run.id, item, location, period).sort_values(["source", "row"])
        traces = traces[traces["source"].isin([*sources["source"], "marketing event"])]
        family = session.get(Item, item).family
        w = WeightRecord.__table__
        weights = frames.read_frame(session, select(*[w.c[c] for c in (
            "segment", "lag_bucket", "source", "weight", "psi", "n_cycles", "n_errors", "mad", "mse", "basis", "note")])
            .where(w.c.run_id == run.id).where(w.c.segment.in_([family, item, "all"])),
            ["segment", "lag_bucket", "source", "weight", "psi", "n_cycles", "n_errors", "mad", "mse", "basis", "note"])
        d = Decision.__table__
        decisions = frames.read_frame(session, select(d.c.author, d.c.kind, d.c.amount, d.c.reason, d.c.item,
                                                      d.c.family, d.c.location, d.c.region)
                                      .where(d.c.cycle == cycle).where(d.c.period == period)
                                      .where((d.c.item == item) | (d.c.family == family)),
                                      ["author", "kind", "amount", "reason", "item", "family", "location", "region"])
        spec = run.spec
        series = series_table(session, cycle)
    method = series[(series["item"] == item) & (series["location"] == location)]
    text = _write(cycle, run.id, run.status, spec, line, family, sources, traces, weights, decisions)
    if not method.empty:
        text += "\n" + describe_method(method.iloc[0])
    return CellExplanation(line, sources, traces, weights, decisions, text)


def describe_method(row: pd.Series) -> str:
    """The statistical source's method for one series in words, with its fitted parameters."""
    params = ", ".join(f"{name} {row[key]:.2f}" for name, key in (("α", "alpha"), ("β", "beta"), ("γ", "gamma"),
                                                                  ("φ", "phi")) if key in row and pd.notna(row[key]))
    text = f"Statistical source: {row['method']}" + (f" ({params})" if params else "")
    text += f", demand pattern {row['pattern']}"
    if "holdout_wape" in row and pd.notna(row["holdout_wape"]):
        text += f", holdout WAPE {row['holdout_wape']:.0%}"
    if isinstance(row.get("fallback"), str) and row["fallback"]:
        text += f"; {row['fallback']}"
    return text + "."


def _write(cycle, run_id, status, spec, line, family, sources, traces, weights, decisions) -> str:
    out = [f"Cycle {cycle}, run #{run_id} ({status}): item {line['item']} at {line['location']}, "
           f"{line['period']} (lag {int(line['lag'])})",
           f"Consensus {_fmt(line['consensus'])} units."]
    if pd.notna(line.get("lower_80")):
        out[-1] += (f" 80% band {_fmt(line['lower_80'])}–{_fmt(line['upper_80'])}, 95% band "
                    f"{_fmt(line['lower_95'])}–{_fmt(line['upper_95'])} ({line['band_method']}).")
    wspec = spec.get("weights", {})
    bucket = str(lag_bucket_labels([int(line["lag"])])[0])
    used = weights[(weights["lag_bucket"] == bucket)].set_index("source") if not weights.empty else weights
    out.append(f"Weights: scheme {wspec.get('scheme', '?')} for family {family} at lag bucket {bucket}, from each "
               f"source's errors over the last {wspec.get('window_cycles', '?')} cycles.")
    for s in sources.itertuples(index=False):
        why = ""
        if s.source in getattr(used, "index", []):
            w = used.loc[s.source]
            if pd.notna(w["mse"]):
                why = f"MSE {w['mse']:,.1f} over {int(w['n_cycles'])} cycles"
                if pd.notna(w["psi"]):
                    why += f", shrinkage ψ {w['psi']:.2f}"
            if w["basis"] and w["basis"] != "segment":
                why += f" ({w['note'] or w['basis']})"
        out.append(f"  {s.source:<12} {_fmt(s.value):>10} units  weight {s.weight:6.1%}  "
                   f"adds {_fmt(s.contribution):>9}  {why}")
        if s.bias_correction:
            out.append(f"  {'':<12} bias correction {s.bias_correction:+,.1f} units")
    if line.get("missing_sources"):
        out.append(f"Missing here: {line['missing_sources']}; the weights of the sources present were "
                   f"renormalised to sum to 100%.")
    if len(sources) > 1:
        lo, hi = sources["value"].min(), sources["value"].max()
        flag = "over the review threshold, flagged" if line.get("flagged") else "within the review threshold"
        out.append(f"Sources range {_fmt(lo)}–{_fmt(hi)} units, a spread of {line['spread_ratio']:.0%} of the "
                   f"consensus ({flag}).")
    if not traces.empty:
        out.append("How each submitted number reached this cell:")
        for t in traces.itertuples(index=False):
            where = f"row {int(t.row)}" if pd.notna(t.row) else ""
            out.append(f"  {t.source}: {t.submitted} ({where}) × share {t.share:.2%} = {_fmt(t.quantity)} units"
                       + (f"; {t.share_basis}" if t.share_basis else ""))
    if line.get("reconciliation_adjustment"):
        out.append(f"Reconciliation across the hierarchy moved the combined {_fmt(line['before_reconciliation'])} "
                   f"units by {line['reconciliation_adjustment']:+,.1f}: {line['reconciliation_note']}")
    if pd.notna(line.get("before_override")):
        out.append(f"Changed in the meeting from {_fmt(line['before_override'])} units:")
        for d in decisions.itertuples(index=False):
            out.append(f"  {d.kind} {d.amount:+,.0f} by {d.author}: {d.reason}")
    return "\n".join(out)
