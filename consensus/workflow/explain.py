"""Why a consensus number is what it is, in words a planner can read out in the meeting.

Everything comes from the stored run: the cell, its sources' values, the
weights and the statistical method.  The trail of each submitted row to the
cell is recomputed from the stored inputs the run read, with the run's own
alignment, so it is exactly the trail that made the number.
"""

from __future__ import annotations

from dataclasses import dataclass

import pandas as pd

from consensus.errors import NotFound
from consensus.methods.bias import correct_sources
from consensus.methods.combine import combine_sources
from consensus.methods.decisions import decision_scope
from consensus.methods.weights import assign_segments
from consensus.methods.plan import RunSpec, trace_cell
from consensus.periods import lag_bucket_labels, lags
from consensus.store import frames
from consensus.store.db import session_scope
from consensus.vocabulary import describe_change, source_label
from consensus.workflow.decisions import load_decisions
from consensus.workflow.inputs import load_plan_inputs, run_parts
from consensus.workflow.publish import latest_run


@dataclass(frozen=True)
class CellExplanation:
    """Everything stored about one cell of a run, and its plain-words reading."""

    line: dict
    sources: pd.DataFrame
    traces: pd.DataFrame
    weights: pd.DataFrame
    decisions: pd.DataFrame
    text: str


def _fmt(x: float) -> str:
    return f"{x:,.0f}" if abs(x) >= 10 or x == 0 else f"{x:,.1f}"


def explain_cell(cycle: str, *, item: str, location: str, period: str, revision: int | None = None,
                 url=None) -> CellExplanation:
    """Gather the audit of one cell and write it as a short explanation."""
    with session_scope(url, write=False) as session:
        run = latest_run(session, cycle, revision=revision)
        parts = run_parts(session, run, ["cells", "weights", "series", "bias"])
        items = frames.load_items(session, through=run.through_seq)
        locations = frames.load_locations(session, through=run.through_seq)
        decisions = load_decisions(session, cycle, through=run.through_seq)
    cells = parts["cells"]
    found = cells[(cells["item"] == item) & (cells["location"] == location) & (cells["period"] == period)]
    if found.empty:
        raise NotFound(f"no consensus for item {item} at {location} in {period} in cycle {cycle} (run #{run.id})")
    line = found.iloc[0].to_dict()
    line["lag"] = int(lags(pd.Series([cycle]), pd.Series([period]))[0])
    spec = RunSpec.from_dict(run.spec)
    values = [(c[len("value_"):], line[c]) for c in cells.columns if c.startswith("value_") and pd.notna(line[c])]
    rows = pd.DataFrame({"source": [s for s, _ in values], "item": item, "location": location, "period": period,
                         "lag": line["lag"], "quantity": [v for _, v in values]})
    weights = parts["weights"]
    corrections = _corrections(parts.get("bias"), rows, spec, items, locations)
    if len(corrections):
        rows = correct_sources(rows, parts["bias"], segment_of=assign_segments(
            rows, segment=spec.weights.segment, items=items, locations=locations)).drop(columns="bias_factor")
    sources = combine_sources(rows, weights, items=items, locations=locations, spec=spec.weights).contributions \
        if len(rows) else pd.DataFrame(columns=["source", "value", "weight", "contribution", "bias_correction",
                                                "weight_basis", "note"])
    loaded = load_plan_inputs(cycle, url=url, spec=spec, through=run.through_seq, require_open=False)
    traces = trace_cell(loaded.inputs, spec, item=item, location=location, period=period)
    family = items.loc[items["item"] == item, "family"].iloc[0] if (items["item"] == item).any() else ""
    mine = decisions[(decisions["period"] == period) & ((decisions["item"] == item) | (decisions["family"] == family))]
    series = parts["series"]
    method = series[(series["item"] == item) & (series["location"] == location)] if len(series) else series
    text = _write(cycle, run, spec, line, family, sources, traces, weights, mine, corrections)
    if len(method):
        text += "\n" + describe_method(method.iloc[0])
    return CellExplanation(line, sources, traces, weights, mine, text)


def _parameter(value: float) -> str:
    """A smoothing parameter to two decimals, or to its first digit when smaller (α 0.0001 is not α 0.00)."""
    value = float(value)
    return f"{value:.2f}" if value == 0 or abs(value) >= 0.01 else f"{value:.1g}"


def describe_method(row: pd.Series) -> str:
    """The statistical source's method for one series in words, with its fitted parameters."""
    from consensus.vocabulary import method_label

    params = ", ".join(f"{name} {_parameter(row[key])}" for name, key in (("α", "alpha"), ("β", "beta"),
                                                                          ("γ", "gamma"), ("φ", "phi"))
                       if key in row and pd.notna(row[key]))
    text = f"Statistical source: {method_label(row['method'])}" + (f" ({params})" if params else "")
    text += f", demand pattern {row['pattern']}"
    if "holdout_wape" in row and pd.notna(row["holdout_wape"]):
        text += f", holdout WAPE {row['holdout_wape']:.0%}"
    if isinstance(row.get("fallback"), str) and row["fallback"]:
        text += f"; {row['fallback']}"
    return text + "."


def _corrections(bias: pd.DataFrame | None, rows: pd.DataFrame, spec: RunSpec, items, locations) -> pd.DataFrame:
    """The stored bias corrections that apply to this cell's sources: [source, factor, note]."""
    if bias is None or bias.empty or rows.empty:
        return pd.DataFrame(columns=["source", "factor", "note"])
    keyed = rows.assign(segment=assign_segments(rows, segment=spec.weights.segment, items=items,
                                                locations=locations),
                        lag_bucket=lag_bucket_labels(rows["lag"].to_numpy()))
    found = keyed.merge(bias, on=["segment", "lag_bucket", "source"], how="inner")
    return found.loc[found["persistent"].astype(bool), ["source", "factor", "note"]].reset_index(drop=True)


def _write(cycle, run, spec: RunSpec, line, family, sources, traces, weights, decisions, corrections=None) -> str:
    out = [f"Cycle {cycle}, revision {run.revision}, run #{run.id} ({run.status}): item {line['item']} at "
           f"{line['location']}, {line['period']} (lag {int(line['lag'])})",
           f"Consensus {_fmt(line['consensus'])} units."]
    if pd.notna(line.get("lower_80")):
        out[-1] += (f" 80% band {_fmt(line['lower_80'])}–{_fmt(line['upper_80'])}, 95% band "
                    f"{_fmt(line['lower_95'])}–{_fmt(line['upper_95'])} ({line['band_method']}).")
    bucket = str(lag_bucket_labels([int(line["lag"])])[0])
    segment = {"family": family, "item": line["item"], "all": "all"}.get(spec.weights.segment, family)
    used = weights[(weights["lag_bucket"] == bucket) & (weights["segment"] == segment)].set_index("source")
    out.append(f"Weights for {spec.weights.segment} {segment} at lag bucket {bucket}, from each source's errors over "
               f"the last {spec.weights.window_cycles} cycles:")
    for s in sources.itertuples(index=False):
        why = ""
        if s.source in used.index:
            w = used.loc[s.source]
            if pd.notna(w["mse"]):
                why = f"MSE {w['mse']:,.1f} over {int(w['n_cycles'])} cycles"
                if pd.notna(w["psi"]):
                    why += f", shrinkage ψ {w['psi']:.2f}"
            if w["basis"] and w["basis"] != "segment":
                why += f" ({w['note'] or w['basis']})"
        out.append(f"  {source_label(s.source):<22} {_fmt(s.value):>10} units  weight {s.weight:6.1%}  "
                   f"adds {_fmt(s.contribution):>9}  {why}")
        if s.bias_correction:
            out.append(f"  {'':<22} bias correction {s.bias_correction:+,.1f} units")
    if corrections is not None and len(corrections):
        out.append("Persistent bias corrected before weighing (tracking signal of the source's family totals):")
        for c in corrections.itertuples(index=False):
            out.append(f"  {source_label(c.source)}: {c.note}")
    if line.get("missing_sources"):
        missing = ", ".join(source_label(m.strip()) for m in str(line["missing_sources"]).split(","))
        out.append(f"Missing here: {missing}; the weights of the sources present were renormalised to sum to 100%.")
    if len(sources) > 1:
        lo, hi = sources["value"].min(), sources["value"].max()
        flag = "over the review threshold, flagged" if line.get("flagged") else "within the review threshold"
        out.append(f"Sources range {_fmt(lo)}–{_fmt(hi)} units, a spread of {line['spread_ratio']:.0%} of the "
                   f"consensus ({flag}).")
    if not traces.empty:
        out.append("How each submitted number reached this cell:")
        for t in traces.itertuples(index=False):
            where = f"#{int(t.submission_id)} row {int(t.row)}" if pd.notna(t.row) else f"#{int(t.submission_id)}"
            state = "" if t.in_force else " — replaced by a newer file here, not used"
            out.append(f"  {source_label(t.source)}: {t.submitted} ({where}) × share {t.share:.2%} = "
                       f"{_fmt(t.quantity)} units" + (f"; {t.share_basis}" if t.share_basis else "") + state)
    if line.get("reconciliation_adjustment"):
        out.append(f"Reconciliation across the hierarchy moved the combined {_fmt(line['combined'])} units by "
                   f"{line['reconciliation_adjustment']:+,.1f} so that it agrees with the family, region and total "
                   f"plans ({spec.reconciliation}).")
    if pd.notna(line.get("before_override")):
        out.append(f"Changed in the meeting from {_fmt(line['before_override'])} to {_fmt(line['consensus'])} units:")
        scopes = decision_scope(decisions) if not decisions.empty else pd.Series(dtype=object)
        for d, scope in zip(decisions.itertuples(index=False), scopes):
            state = f" (withdrawn by {d.withdrawn_by}: {d.withdrawn_reason})" if pd.notna(d.withdrawn_at) else ""
            out.append(f"  #{int(d.id)} {scope}, {d.period}: {describe_change(d.kind, d.amount)} by {d.author}: "
                       f"{d.reason}{state}")
        if not decisions.empty and (decisions["item"].isna() | decisions["location"].isna()).any():
            out.append("  A decision on several cells sets or moves their total, spread over the cells by their "
                       "shares of the month’s plan.")
    return "\n".join(out)
