"""Turn a cycle's :class:`PackInputs` into the context the pack templates render.

All aggregation is done here, once, with pandas: family × month frames are built by
one groupby over the whole cycle and then split into per-family pages, so the
cost of a pack grows with its rows, not with rows × families.  The templates only
lay out what this module hands them (plus the number formatting filters below).
"""

from __future__ import annotations

import functools
import math
from typing import Any

import numpy as np
import pandas as pd
from markupsafe import Markup

from consensus import vocabulary
from consensus.errors import InvalidSpec
from consensus.methods.demand_pattern import ADI_CUTOFF, CV2_CUTOFF
from consensus.methods.weights import WeightSpec
from consensus.pack import charts
from consensus.pack.inputs import PackInputs
from consensus.pack.textgrid import GridColumn, lay_out_text_grid
from consensus.periods import (
    DEFAULT_LAG_BUCKETS,
    horizon_months,
    lag_bucket_labels,
    month_index,
    month_indexes,
    month_names,
    month_range,
    shift_month,
)

UNCERTAINTY_CAUTION = (
    "Every forecast in this pack will be wrong by some amount. The shaded 80% and 95% bands show how much: "
    "judging by past errors at the same lag, actual demand should land inside the 80% band about four months "
    "in five. Plan stock and capacity for the band, not only for the single line."
)
TS_LIMIT_DEFAULT = 4.0
_MINUS = "\u2212"
_UP, _DOWN = "▲", "▼"
FALLBACK_MARK = "†"
#: Advance of every glyph of DejaVu Sans Mono in em (1233 of 2048 font units), and the text width of an
#: A4 page with the pack's 14 mm side margins (182 mm) in points.
MONO_ADVANCE_EM = 1233 / 2048
TEXT_WIDTH_PT = 182 / 25.4 * 72
#: Months of actuals that weight each location's holdout WAPE in an item's figure (the holdout's length).
HOLDOUT_WEIGHT_MONTHS = 12
#: Past cycles with actuals before the methods page prints figures measured on them: the fewest cycles
#: the weights themselves accept before falling back (methods.weights.WeightSpec.min_cycles).
MIN_HISTORY_CYCLES = WeightSpec().min_cycles


# --------------------------------------------------------------------------- number formatting


def format_quantity(value: Any) -> str:
    """A quantity as the pack prints it: whole units with thousands separators, "–" when unknown."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)) or pd.isna(value):
        return "–"
    text = f"{round(float(value)):,.0f}"
    return text.replace("-", _MINUS)


def format_change(value: Any, *, digits: int = 0, suffix: str = "") -> str:
    """A signed change with a direction symbol ("▲ +1,234", "▼ −56"), so sign never rests on colour."""
    if value is None or pd.isna(value) or not math.isfinite(float(value)):
        return "–"
    value = float(value)
    rounded = round(value, digits)
    if rounded == 0:
        return f"0{suffix}"
    body = f"{abs(rounded):,.{digits}f}{suffix}"
    return f"{_UP} +{body}" if rounded > 0 else f"{_DOWN} {_MINUS}{body}"


def format_percent(value: Any, *, digits: int = 1, signed: bool = False) -> str:
    """A percentage already in percent units ("12.3%"); signed adds ▲/▼ and +/−."""
    if value is None or pd.isna(value) or not math.isfinite(float(value)):
        return "–"
    if signed:
        return format_change(value, digits=digits, suffix="%")
    return f"{float(value):,.{digits}f}%".replace("-", _MINUS)


def format_money(value: Any) -> str:
    """A money amount, whole currency units with thousands separators."""
    return format_quantity(value)


def format_share(value: Any) -> str:
    """A fraction (0–1) as a whole percentage ("34%")."""
    if value is None or pd.isna(value):
        return "–"
    return f"{100 * float(value):.0f}%"


# --------------------------------------------------------------------------- helpers


def _ratio_pct(numerator: pd.Series, denominator: pd.Series) -> pd.Series:
    """100·(numerator/denominator − 1) where the denominator is positive, else NaN."""
    den = denominator.where(denominator > 0)
    return 100 * (numerator / den - 1)


def _records(frame: pd.DataFrame) -> list[dict]:
    """Frame rows as plain dicts with NaN turned into None, for the templates."""
    if frame.empty:
        return []
    clean = frame.astype(object).where(frame.notna(), None)
    return clean.to_dict("records")


def _with_master(frame: pd.DataFrame, items: pd.DataFrame) -> pd.DataFrame:
    """Attach family and unit price; items unknown to the master go to family "(unassigned)"."""
    out = frame.merge(items[["item", "family", "unit_price"]], on="item", how="left")
    out["family"] = out["family"].fillna("(unassigned)")
    out["unit_price"] = pd.to_numeric(out["unit_price"], errors="coerce").fillna(0.0)
    return out


def _as_numeric(frame: pd.DataFrame, columns) -> pd.DataFrame:
    return frame.assign(**{c: pd.to_numeric(frame[c], errors="coerce") for c in columns})


def _scope_mask(scope: str, cells: pd.DataFrame) -> pd.Series:
    """Cells covered by a submission scope: "all", or a region, location, family or item.

    The store words a scope with its kind ("region NORTH", "location DC-N1");
    a bare code is looked for among regions, locations, families and items.
    """
    scope = str(scope).strip()
    if scope.lower() in ("all", "*", ""):
        return pd.Series(True, index=cells.index)
    kind, _, code = scope.partition(" ")
    if kind in ("region", "location", "family", "item") and code:
        return cells[kind].astype(str) == code
    return (
        (cells["region"] == scope) | (cells["location"] == scope)
        | (cells["family"] == scope) | (cells["item"] == scope)
    )


def _tone(change_in_error: Any) -> str:
    """"better" when an error measure fell, "worse" when it rose, "" when flat or unknown (lower is better)."""
    try:
        value = round(float(change_in_error), 1)
    except (TypeError, ValueError):
        return ""
    if not math.isfinite(value) or value == 0:
        return ""
    return "better" if value < 0 else "worse"


def _labels(keys: pd.Series) -> pd.Series:
    """Source keys as the registry's labels (one lookup per distinct key)."""
    keys = keys.astype(str)
    return keys.map({k: vocabulary.source_label(k) for k in keys.unique()})


# --------------------------------------------------------------------------- the context


def build_pack_context(
    inputs: PackInputs,
    *,
    summary_windows: tuple[int, ...] = (3, 6, 12),
    summary_family_rows: int = 12,
    top_changes: int = 5,
    top_decisions: int = 8,
    exception_rows: int = 15,
    change_threshold_pct: float = 25.0,
    band_ratio_threshold: float = 0.8,
    band_months: int = 3,
    ts_limit: float = TS_LIMIT_DEFAULT,
    history_months_shown: int = 24,
    component_rows: int = 40,
    with_charts: bool = True,
) -> dict[str, Any]:
    """Everything the templates show, aggregated once from ``inputs``.

    Money at stake for an exception is quantity × unit price: the spread between
    sources for disagreement, the change for a moved plan, half the 80% band
    width for a wide band, |bias %| × the source's plan value for a biased source,
    and the next ``band_months`` of plan value in scope for a missing input.
    Family bands are the run's own family bands (``inputs.level_bands``), read
    off the family plans' past errors, not a sum of item bands.
    """
    if any(int(w) < 1 for w in summary_windows):
        raise InvalidSpec(f"summary windows must be positive month counts, got {summary_windows!r}")
    if ts_limit <= 0 or band_ratio_threshold <= 0 or change_threshold_pct <= 0:
        raise InvalidSpec("ts_limit, band_ratio_threshold and change_threshold_pct must be positive")

    plan_months = horizon_months(inputs.cycle, int(inputs.horizon))
    items = inputs.items.copy()
    items["unit_price"] = pd.to_numeric(items["unit_price"], errors="coerce").fillna(0.0)
    locations = inputs.locations

    cons = _with_master(
        _as_numeric(inputs.consensus, ["consensus", "lower_80", "upper_80", "lower_95", "upper_95", "lag"]), items
    )
    cons = cons.merge(locations, on="location", how="left")
    cons["value"] = cons["consensus"] * cons["unit_price"]
    previous = _with_master(_as_numeric(inputs.previous, ["consensus"]), items)
    actuals = _with_master(_as_numeric(inputs.actuals, ["quantity"]), items)
    sources = _with_master(_as_numeric(inputs.sources, ["quantity"]), items)
    source_names = vocabulary.ordered(sources["source"].unique()) if not sources.empty else []

    # One family × month table for the whole cycle: consensus, last cycle, last year (bands: the run's own).
    fam_plan = cons.groupby(["family", "period"], as_index=False)[
        ["consensus", "value"]
    ].sum()
    fam_prev = previous.groupby(["family", "period"], as_index=False)["consensus"].sum().rename(
        columns={"consensus": "previous"}
    )
    fam_act = actuals.groupby(["family", "period"], as_index=False)["quantity"].sum().rename(
        columns={"quantity": "actual"}
    )
    fam_plan = fam_plan.merge(fam_prev, on=["family", "period"], how="left")
    last_year = fam_act.assign(
        period=month_names(month_indexes(fam_act["period"]) + 12) if not fam_act.empty else fam_act["period"]
    ).rename(columns={"actual": "last_year"})
    fam_plan = fam_plan.merge(last_year, on=["family", "period"], how="left")

    family_value = fam_plan.groupby("family")["value"].sum().sort_values(ascending=False)
    family_order = list(family_value.index)

    summary = _summary_tables(fam_plan, plan_months, summary_windows, family_order, summary_family_rows,
                              total_bands=_total_bands(inputs.level_bands, cons))
    total_12 = next((w for w in summary["windows"] if w["months"] == 12), None)
    changes_top, changes_flagged = _changes_vs_last_cycle(
        cons, previous, sources, inputs, top_changes, change_threshold_pct, source_names
    )
    amplification = _amplification(inputs, cons, plan_months[:band_months], with_charts=with_charts)
    thresholds = {
        "disagreement_threshold": inputs.disagreement_threshold, "disagreement_min_units": inputs.disagreement_min_units,
        "ts_limit": ts_limit, "change_threshold_pct": change_threshold_pct,
        "band_ratio_threshold": band_ratio_threshold, "band_months": band_months,
        "quantity_unit": inputs.quantity_unit, "due_date": _due_date(inputs),
        "amplification_multiple": amplification["multiple"],
        "amplification_moving_average_months": amplification["moving_average_months"],
    }
    exceptions = _exceptions(
        inputs, cons, sources, items, changes_flagged, exception_rows=exception_rows, thresholds=thresholds,
        plan_months=plan_months, amplification=amplification,
    )
    families = _family_pages(
        inputs, fam_plan, fam_act, sources, cons, family_order, source_names, plan_months,
        history_months_shown=history_months_shown, with_charts=with_charts,
        series_by_item=summarise_series(inputs.series, items, actuals, inputs.last_actual_month),
        series_fallbacks=_fallback_series(inputs.series, items),
    )
    scorecard = _scorecard(inputs, ts_limit=ts_limit, source_names=source_names, with_charts=with_charts)
    fva = _value_added(inputs.fva, with_charts=with_charts)

    plan_state = vocabulary.label(vocabulary.PLAN_STATES, inputs.status)
    meta = {
        "company": inputs.company,
        "cycle": inputs.cycle,
        "status": inputs.status,
        "status_label": plan_state.upper(),
        "is_draft": inputs.status == "draft",
        "generated_at": _format_when(inputs.generated_at),
        "horizon": int(inputs.horizon),
        "last_actual_month": inputs.last_actual_month,
        "first_plan_month": plan_months[0],
        "last_plan_month": plan_months[-1],
        "quantity_unit": inputs.quantity_unit,
        "currency": inputs.currency,
        "revision": int(inputs.revision),
        "reopened_by": inputs.reopened_by,
        "reopen_reason": inputs.reopen_reason,
        "published_by": inputs.published_by,
        "published_at": _format_when(inputs.published_at) if inputs.published_at is not None else None,
        "run_id": inputs.run_id,
        "record_fingerprint": (inputs.record_fingerprint or "")[:16],
        "n_families": len(family_order),
        "n_items": int(items["item"].nunique()),
        "n_locations": int(locations["location"].nunique()),
        "n_cells": int(cons[["item", "location"]].drop_duplicates().shape[0]) if not cons.empty else 0,
        "sources": source_names,
        "due_date": thresholds["due_date"],
        "state_heading": vocabulary.STATE_HEADING,
    }
    band_coverage = _band_coverage(inputs.band_coverage)
    return {
        "meta": meta,
        "caution_text": UNCERTAINTY_CAUTION,
        "top_decisions": int(top_decisions),
        "submissions": _submission_rows(inputs.submissions),
        "missing": exceptions["missing"],
        "summary": summary,
        "headline_total_12": total_12["total"]["consensus"] if total_12 else None,
        "top_changes": changes_top,
        "exceptions": exceptions,
        "families": families,
        "family_legend": charts.legend_entries(source_names, with_previous=not inputs.previous.empty),
        "scorecard": scorecard,
        "patterns": _pattern_accuracy(inputs, source_names=source_names),
        "fva": fva,
        "amplification": amplification,
        "decisions": _decision_rows(inputs.decisions),
        "components": _components(inputs.components, plan_months, component_rows),
        "band_coverage": band_coverage,
        "by_family_grid": _by_family_grid(summary, family_order),
        "pattern_note": {"adi": ADI_CUTOFF, "cv2": CV2_CUTOFF, "shown": not inputs.series.empty,
                         "weight_months": HOLDOUT_WEIGHT_MONTHS},
        "methods": _methods_page(inputs, scorecard=scorecard, band_coverage=band_coverage,
                                 thresholds=thresholds),
    }


def _due_date(inputs: PackInputs) -> str | None:
    """The cycle's due date for submissions as "YYYY-MM-DD", when the store records one.

    Without one the pack promises no lateness check.
    """
    due = inputs.due_date
    if due is None or (not isinstance(due, str) and pd.isna(due)):
        return None
    return pd.Timestamp(due).strftime("%Y-%m-%d")


def _days_late(frame: pd.DataFrame) -> pd.Series:
    """Days late per row from an optional ``days_late`` column (NaN where unknown or absent)."""
    if "days_late" not in frame.columns:
        return pd.Series(np.nan, index=frame.index)
    return pd.to_numeric(frame["days_late"], errors="coerce")


def _submission_rows(submissions: pd.DataFrame) -> list[dict]:
    """The cover's inputs table: each file in force with its source and state in the registry's words.

    A row is late when its status says so or its optional ``days_late`` is
    above zero (the store's due dates); the state then says how late.
    """
    if submissions.empty:
        return []
    frame = submissions.copy()
    frame["_order"] = frame["source"].map(lambda k: vocabulary.source(k).order)
    frame = frame.sort_values(["_order", "source", "scope"], kind="stable")
    days = _days_late(frame)
    status = frame["status"].astype(str).str.lower()
    frame["is_late"] = days.gt(0)
    frame["state"] = [vocabulary.describe_submission_state(st, days_late=d) for st, d in zip(status, days)]
    frame["source_label"] = _labels(frame["source"])
    frame["scope_label"] = frame["scope"].map(vocabulary.describe_scope)
    frame["submitted_at"] = frame["submitted_at"].map(_format_when)
    frame["sha_short"] = frame["sha256"].astype(str).str.slice(0, 12)
    return _records(frame.drop(columns="_order"))


def _worded_decisions(decisions: pd.DataFrame) -> pd.DataFrame:
    """Decisions with their change in the vocabulary's words and the item or family code they touch.

    A decision that carries ``kind`` and ``amount`` (as the store's do) is
    worded by :func:`consensus.vocabulary.describe_change` ("set to 240");
    otherwise its ``change`` text is kept.  ``scope_code`` is the scope without
    its kind word or location part ("item TM-HUB-4 × DC-N1" → "TM-HUB-4").
    """
    frame = decisions.copy()
    if frame.empty:
        return frame.assign(scope_code=pd.Series(dtype=object))
    if {"kind", "amount"} <= set(frame.columns):
        amounts = pd.to_numeric(frame["amount"], errors="coerce")
        worded = [vocabulary.describe_change(k, a) if pd.notna(a) else None for k, a in zip(frame["kind"], amounts)]
        frame["change"] = [w if w is not None else c for w, c in zip(worded, frame["change"])]
    scope = frame["scope"].astype(str)
    frame["scope_code"] = scope.str.replace(r"^(item|family) ", "", regex=True).str.split(" × ").str[0]
    return frame


def _decision_rows(decisions: pd.DataFrame) -> list[dict]:
    """The decisions log, oldest first, each change worded by the vocabulary where it can be."""
    if decisions.empty:
        return []
    frame = _worded_decisions(decisions.sort_values("at", kind="stable"))
    frame["at"] = frame["at"].map(_format_when)
    return _records(frame)


def _format_when(value: Any) -> str:
    if value is None or (not isinstance(value, str) and pd.isna(value)):
        return "–"
    stamp = pd.Timestamp(value)
    return stamp.strftime("%Y-%m-%d %H:%M")


# --------------------------------------------------------------------------- executive summary


def _total_bands(level_bands: pd.DataFrame, cons: pd.DataFrame) -> pd.DataFrame:
    """The run's 80% band of each month's total as fractions of that month's plan: [period, low, high]."""
    stored = _as_numeric(level_bands, ["lower_80", "upper_80"])
    stored = stored[stored["level"] == "total"]
    plan = cons.groupby("period")["consensus"].sum()
    point = stored["period"].map(plan).to_numpy(dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        low = np.where(point > 0, stored["lower_80"].to_numpy(dtype=float) / point - 1, np.nan)
        high = np.where(point > 0, stored["upper_80"].to_numpy(dtype=float) / point - 1, np.nan)
    return pd.DataFrame({"period": stored["period"].to_numpy(), "low": low, "high": high}).dropna()


def _summary_tables(
    fam_plan: pd.DataFrame, plan_months: list[str], windows, family_order: list[str], max_rows: int,
    *, total_bands: pd.DataFrame | None = None,
) -> dict[str, Any]:
    """Consensus for the next N months by family, against last cycle and the same months last year.

    Changes are measured on the months both figures cover, so a last plan that
    stops short does not read as a fall.  Each window carries the total's 80% band
    month by month (the mean of its months' bands, as % of plan), so the headline
    figures are read with their error; no band is made up for the window's sum,
    whose months' errors are not independent.
    """
    month_pos = {m: i for i, m in enumerate(plan_months)}
    frame = fam_plan.assign(position=fam_plan["period"].map(month_pos))
    frame = frame[frame["position"].notna()]
    has_prev = frame["previous"].notna()
    has_ly = frame["last_year"].notna()
    frame = frame.assign(
        cons_vs_prev=frame["consensus"].where(has_prev, 0.0),
        prev=frame["previous"].fillna(0.0),
        cons_vs_ly=frame["consensus"].where(has_ly, 0.0),
        ly=frame["last_year"].fillna(0.0),
        n_prev=has_prev.astype(int),
        n_ly=has_ly.astype(int),
    )
    sums_cols = ["consensus", "value", "cons_vs_prev", "prev", "cons_vs_ly", "ly", "n_prev", "n_ly"]
    shown = family_order[:max_rows]
    rest = family_order[max_rows:]
    out_windows, by_family = [], {}
    for months in windows:
        months = int(months)
        if months > len(plan_months):
            continue
        in_window = frame[frame["position"] < months]
        per_family = in_window.groupby("family")[sums_cols].sum().reindex(family_order).fillna(0.0)
        per_family["vs_prev_pct"] = _ratio_pct(per_family["cons_vs_prev"], per_family["prev"])
        per_family["vs_ly_pct"] = _ratio_pct(per_family["cons_vs_ly"], per_family["ly"])
        total = per_family[sums_cols].sum()
        total_row = {
            "consensus": float(total["consensus"]),
            "value": float(total["value"]),
            "previous": float(total["prev"]) if total["n_prev"] else None,
            "last_year": float(total["ly"]) if total["n_ly"] else None,
            "vs_prev_pct": float(100 * (total["cons_vs_prev"] / total["prev"] - 1)) if total["prev"] > 0 else None,
            "vs_ly_pct": float(100 * (total["cons_vs_ly"] / total["ly"] - 1)) if total["ly"] > 0 else None,
        }
        other = per_family.loc[rest, sums_cols].sum() if rest else None
        months_band = (total_bands[total_bands["period"].isin(plan_months[:months])]
                       if total_bands is not None else pd.DataFrame())
        out_windows.append(
            {
                "months": months,
                "label": f"Next {months} months",
                "first": plan_months[0],
                "last": plan_months[months - 1],
                "total": total_row,
                "band_80": None if months_band.empty else {
                    "low_pct": float(100 * months_band["low"].mean()),
                    "high_pct": float(100 * months_band["high"].mean()),
                    "months": int(len(months_band)),
                },
                "partial_previous": bool(total["n_prev"] < months * max(len(family_order), 1)),
                "other": None if other is None else {
                    "consensus": float(other["consensus"]),
                    "vs_prev_pct": float(100 * (other["cons_vs_prev"] / other["prev"] - 1)) if other["prev"] > 0 else None,
                    "vs_ly_pct": float(100 * (other["cons_vs_ly"] / other["ly"] - 1)) if other["ly"] > 0 else None,
                },
            }
        )
        by_family[months] = per_family
    # One row per family holding every window's figures, for the by-family tables.
    rows = []
    for family in family_order:
        row = {"family": family, "windows": []}
        for window in out_windows:
            pf = by_family[window["months"]].loc[family]
            row["windows"].append(
                {
                    "consensus": float(pf["consensus"]),
                    "previous": float(pf["prev"]) if pf["n_prev"] else None,
                    "vs_prev_pct": None if pd.isna(pf["vs_prev_pct"]) else float(pf["vs_prev_pct"]),
                    "last_year": float(pf["ly"]) if pf["n_ly"] else None,
                    "vs_ly_pct": None if pd.isna(pf["vs_ly_pct"]) else float(pf["vs_ly_pct"]),
                }
            )
        rows.append(row)
    return {
        "windows": out_windows,
        "rows_shown": rows[: len(shown)],
        "rows_all": rows,
        "n_other": len(rest),
    }


# --------------------------------------------------------------------------- changes against last cycle


def _weights_by_family_source(weights: pd.DataFrame, families, source_names) -> pd.DataFrame:
    """Mean weight of each source per family over lag buckets; families without rows use segment "all"."""
    w = _as_numeric(weights, ["weight"])
    mean_w = w.groupby(["segment", "source"], as_index=False)["weight"].mean()
    grid = pd.MultiIndex.from_product([list(families), list(source_names)], names=["family", "source"]).to_frame(
        index=False
    )
    own = grid.merge(mean_w.rename(columns={"segment": "family"}), on=["family", "source"], how="left")
    overall = mean_w[mean_w["segment"].astype(str).str.lower() == "all"][["source", "weight"]]
    own = own.merge(overall.rename(columns={"weight": "weight_all"}), on="source", how="left")
    own["weight"] = own["weight"].fillna(own["weight_all"]).fillna(1.0 / max(len(source_names), 1))
    return own[["family", "source", "weight"]]


def _changes_vs_last_cycle(
    cons, previous, sources, inputs, top_n, threshold_pct, source_names
) -> tuple[list[dict], pd.DataFrame]:
    """Items whose plan moved most (in money) since the last published cycle, and what moved them.

    A change is explained by each source's pull Δ_s = w_s · (source_s − last plan),
    summed over the months both plans cover: with weights adding to one the
    consensus move is Σ_s Δ_s before overrides, so the largest |Δ_s| of the same
    sign names the source that moved the number.
    """
    empty = pd.DataFrame(columns=["item", "family", "now", "before", "change", "change_pct", "at_stake"])
    if cons.empty or previous.empty:
        return [], empty
    common = cons[["item", "location", "period", "consensus", "family", "unit_price"]].merge(
        previous[["item", "location", "period", "consensus"]].rename(columns={"consensus": "before"}),
        on=["item", "location", "period"],
    )
    if common.empty:
        return [], empty
    by_item = common.groupby(["item", "family"], as_index=False).agg(
        now=("consensus", "sum"), before=("before", "sum"), unit_price=("unit_price", "first"),
        first=("period", "min"), last=("period", "max"),
    )
    by_item["change"] = by_item["now"] - by_item["before"]
    by_item["change_pct"] = _ratio_pct(by_item["now"], by_item["before"])
    by_item["at_stake"] = by_item["change"].abs() * by_item["unit_price"]
    flagged = by_item[by_item["change_pct"].abs() > threshold_pct].sort_values("at_stake", ascending=False)

    top = by_item.nlargest(top_n, "at_stake")
    if top.empty:
        return [], flagged
    keys = common[common["item"].isin(top["item"])][["item", "location", "period", "before"]]
    src = sources[sources["item"].isin(top["item"])][["source", "item", "location", "period", "quantity"]]
    src = src.merge(keys, on=["item", "location", "period"])
    pull = src.groupby(["item", "source"], as_index=False).agg(quantity=("quantity", "sum"), before=("before", "sum"))
    pull = pull.merge(top[["item", "family"]], on="item")
    pull = pull.merge(_weights_by_family_source(inputs.weights, top["family"].unique(), source_names),
                      on=["family", "source"], how="left")
    pull["pull"] = pull["weight"].fillna(0) * (pull["quantity"] - pull["before"])
    pull = pull.merge(top[["item", "change"]], on="item")
    same_sign = np.sign(pull["pull"]) == np.sign(pull["change"])
    pull["rank_key"] = pull["pull"].abs().where(same_sign, -1.0)
    drivers = pull.sort_values("rank_key", ascending=False).drop_duplicates("item")
    drivers = drivers.set_index("item")[["source", "pull", "quantity", "before", "rank_key"]]

    decisions = _worded_decisions(inputs.decisions)
    out = []
    for row in top.itertuples(index=False):
        driver = drivers.loc[row.item] if row.item in drivers.index else None
        if driver is not None and driver["rank_key"] >= 0:
            why = (
                f"{vocabulary.source_label(driver['source'])} moved "
                f"{format_change(driver['quantity'] - driver['before'])} vs last plan; "
                f"weighted pull {format_change(driver['pull'])}"
            )
        else:
            why = "no source explains the move; see the decisions log"
        overrides = decisions[(decisions["scope_code"] == row.item) | (decisions["scope_code"] == row.family)]
        out.append(
            {
                "item": row.item, "family": row.family, "months": f"{row.first} – {row.last}",
                "before": row.before, "now": row.now, "change": row.change,
                "change_pct": None if pd.isna(row.change_pct) else row.change_pct,
                "at_stake": row.at_stake, "why": why,
                "override": "; ".join(
                    overrides["scope_code"].astype(str) + " " + overrides["change"].astype(str)
                    + " for " + overrides["period"].astype(str)
                ) if not overrides.empty else "",
            }
        )
    return out, flagged


# --------------------------------------------------------------------------- exceptions


def _exceptions(inputs, cons, sources, items, changes_flagged, *, exception_rows, thresholds, plan_months,
                amplification) -> dict[str, Any]:
    """The exceptions of the cycle, each table ranked by money at stake, plus one ranked list of questions.

    Each kind has one name, a count in a stated unit and its rule with the
    thresholds as numbers, all from :data:`consensus.vocabulary.EXCEPTION_KINDS`.
    ``amplification`` is the order-amplification page's context, whose
    out-of-line DCs are raised here.
    """
    ts_limit = thresholds["ts_limit"]
    band_months = thresholds["band_months"]
    ranked_parts = []

    def ask(kind: str, scope: pd.Series) -> pd.Series:
        template = vocabulary.exception_kind(kind).question
        return scope.astype(str).map(lambda where: template.format(scope=where))

    # Sources disagree: cells flagged by the disagreement measure.
    dis = inputs.disagreement
    if not dis.empty and "flagged" in dis:
        dis = dis[dis["flagged"].astype(bool)]
    dis = _as_numeric(dis, ["spread", "spread_ratio"]).merge(items[["item", "unit_price"]], on="item", how="left")
    dis["at_stake"] = dis["spread"] * dis["unit_price"].fillna(0)
    dis_cells = dis.nlargest(exception_rows, "at_stake")
    if not dis_cells.empty:
        # Name the lowest and highest source for the cells shown (a handful of rows).
        span = sources.merge(dis_cells[["item", "location", "period"]], on=["item", "location", "period"])
        lo = span.loc[span.groupby(["item", "location", "period"])["quantity"].idxmin()]
        hi = span.loc[span.groupby(["item", "location", "period"])["quantity"].idxmax()]
        keys = ["item", "location", "period"]
        dis_cells = dis_cells.merge(
            lo[keys + ["source", "quantity"]].rename(columns={"source": "low_source", "quantity": "low"}),
            on=keys, how="left",
        ).merge(
            hi[keys + ["source", "quantity"]].rename(columns={"source": "high_source", "quantity": "high"}),
            on=keys, how="left",
        )
        for side in ("low_source", "high_source"):
            dis_cells[side] = dis_cells[side].map(lambda k: vocabulary.source_label(k) if pd.notna(k) else None)
    dis_family = (
        dis.groupby("family", as_index=False).agg(cells=("item", "size"), at_stake=("at_stake", "sum"))
        .sort_values("at_stake", ascending=False)
        if not dis.empty else pd.DataFrame(columns=["family", "cells", "at_stake"])
    )
    n_dis_items = int(dis["item"].nunique()) if not dis.empty else 0
    if not dis.empty:
        dis_item = dis.groupby(["item", "family"], as_index=False).agg(
            cells=("period", "size"), at_stake=("at_stake", "sum"), spread=("spread", "sum")
        )
        ranked_parts.append(pd.DataFrame({
            "kind": "disagreement", "scope": dis_item["item"] + " (" + dis_item["family"].astype(str) + ")",
            "detail": dis_item["cells"].astype(str) + " cells (location × month); sources span "
                      + dis_item["spread"].map(format_quantity) + " " + inputs.quantity_unit,
            "question": ask("disagreement", dis_item["item"]),
            "at_stake": dis_item["at_stake"],
        }))

    # Biased sources: tracking signal beyond the limit.
    # Only sources the consensus weighs can be corrected or down-weighted; the consensus's own lean and the
    # yardsticks' show on the scorecard.
    score = _as_numeric(inputs.scorecard, ["tracking_signal", "bias_pct", "wape"])
    weighed = score["source"].astype(str).map(lambda k: vocabulary.source(k).combined).astype(bool)
    biased = score[(score["tracking_signal"].abs() > ts_limit) & weighed].copy()
    plan_value = (
        sources.assign(value=sources["quantity"] * sources["unit_price"]).groupby("source")["value"].sum()
        if not sources.empty else pd.Series(dtype=float)
    )
    biased["at_stake"] = biased["source"].map(plan_value).fillna(0) * biased["bias_pct"].abs() / 100
    level_rank = {t.key: i for i, t in enumerate(vocabulary.LEVELS)}
    biased["_level"] = biased["level"].map(level_rank).fillna(len(level_rank))
    biased = biased.sort_values(["at_stake", "source", "_level"], ascending=[False, True, True])
    biased["source_label"] = _labels(biased["source"])
    biased["level_label"] = biased["level"].map(lambda k: vocabulary.label(vocabulary.LEVELS, k))
    biased_rows = _worst_per_source_level(biased)
    if not biased.empty:
        worst = biased.loc[biased.groupby("source")["tracking_signal"].apply(lambda s: s.abs().idxmax())]
        ranked_parts.append(pd.DataFrame({
            "kind": "tracking", "scope": worst["source_label"],
            "detail": "tracking signal " + worst["tracking_signal"].map(lambda v: f"{v:+.1f}".replace("-", _MINUS))
                      + " at " + worst["level_label"] + " level, lag " + worst["lag_bucket"].astype(str)
                      + "; bias " + worst["bias_pct"].map(lambda v: format_percent(v, signed=True)),
            "question": ask("tracking", worst["source_label"]),
            # The most the source's lean puts at stake at any level and lag, as the table's top row shows.
            "at_stake": worst["source"].map(biased.groupby("source")["at_stake"].max()).to_numpy(),
        }))

    # Missing and late submissions: the plan value their scope carries in the next months.
    near = cons[cons["period"].isin(plan_months[:band_months])]
    missing = inputs.missing.copy()
    if not missing.empty:
        missing["at_stake"] = [
            float(near.loc[_scope_mask(scope, near), "value"].sum()) for scope in missing["scope"]
        ]  # one boolean mask per missing submission: a handful of rows, each vectorised
        missing["source_label"] = _labels(missing["source"])
        missing["scope_label"] = missing["scope"].map(vocabulary.describe_scope)
        missing["state"] = [vocabulary.describe_submission_state("not_received", days_late=d) for d in _days_late(missing)]
        who = missing["source_label"] + " for " + missing["scope_label"]
        ranked_parts.append(pd.DataFrame({
            "kind": "missing", "scope": who,
            "detail": f"not received; plan value in scope, next {band_months} months",
            "question": ask("missing", who),
            "at_stake": missing["at_stake"],
        }))
    late = pd.DataFrame([r for r in _submission_rows(inputs.submissions) if r["is_late"]])

    # Large changes against last cycle (already ranked by money).
    if not changes_flagged.empty:
        ranked_parts.append(pd.DataFrame({
            "kind": "change", "scope": changes_flagged["item"] + " (" + changes_flagged["family"].astype(str) + ")",
            "detail": changes_flagged["change_pct"].map(lambda v: format_percent(v, signed=True))
                      + " vs last cycle (" + changes_flagged["change"].map(format_change) + ")",
            "question": ask("change", changes_flagged["item"]),
            "at_stake": changes_flagged["at_stake"],
        }))

    # Unusually wide bands in the near months, item level.
    band = near.assign(width=near["upper_80"] - near["lower_80"])
    band_item = band.groupby(["item", "family"], as_index=False).agg(
        width=("width", "sum"), consensus=("consensus", "sum"), unit_price=("unit_price", "first")
    )
    band_item["ratio"] = band_item["width"] / band_item["consensus"].where(band_item["consensus"] > 0)
    band_item["at_stake"] = band_item["width"] / 2 * band_item["unit_price"]
    wide = band_item[band_item["ratio"] > thresholds["band_ratio_threshold"]].sort_values("at_stake", ascending=False)
    if not wide.empty:
        ranked_parts.append(pd.DataFrame({
            "kind": "band", "scope": wide["item"] + " (" + wide["family"].astype(str) + ")",
            "detail": "80% band spans " + wide["ratio"].map(format_share) + f" of the plan, next {band_months} months",
            "question": ask("band", wide["item"]),
            "at_stake": wide["at_stake"],
        }))

    # DCs whose implied orders vary beyond their limit: the plan value passing through the DC in the near months.
    amplified = [r for r in amplification["rows"] if r["flagged"]]
    if amplified:
        frame = pd.DataFrame(amplified)
        ranked_parts.append(pd.DataFrame({
            "kind": "amplification", "scope": frame["location"],
            "detail": "orders vary " + frame["ratio"].map(lambda v: f"{v:.2f}") + " times as much as demand, limit "
                      + frame["limit"].map(lambda v: f"{v:.2f}")
                      + f"; plan value through the DC, next {band_months} months",
            "question": ask("amplification", frame["location"]),
            "at_stake": frame["at_stake"],
        }))

    ranked = (
        pd.concat(ranked_parts, ignore_index=True).sort_values("at_stake", ascending=False, kind="stable")
        if ranked_parts else pd.DataFrame(columns=["kind", "scope", "detail", "question", "at_stake"])
    )
    ranked["kind_label"] = ranked["kind"].map(lambda k: vocabulary.exception_kind(k).label)
    counts = ranked.groupby("kind")["at_stake"].agg(["size", "sum"]) if not ranked.empty else None
    summary = []
    for kind in vocabulary.EXCEPTION_KINDS:
        n = int(counts.loc[kind.key, "size"]) if counts is not None and kind.key in counts.index else 0
        summary.append({
            "kind": kind.key, "label": kind.label, "count": n, "count_text": vocabulary.describe_count(n, kind.key),
            "rule": vocabulary.describe_exception_rule(kind.key, **thresholds),
            "at_stake": float(counts.loc[kind.key, "sum"]) if n else 0.0,
        })
    return {
        "summary": summary,
        "kinds": {k["kind"]: k for k in summary},
        "ranked": _records(ranked.head(30)),
        "disagreement_cells": _records(dis_cells),
        "disagreement_total": int(len(dis)),
        "disagreement_items": n_dis_items,
        "disagreement_families": _records(dis_family.head(exception_rows)),
        "disagreement_families_total": int(len(dis_family)),
        "biased": _records(biased_rows.head(exception_rows)),
        "biased_total": int(len(biased_rows)),
        "biased_measurements": int(len(biased)),
        "biased_sources": int(biased["source"].nunique()) if not biased.empty else 0,
        "missing": _records(missing),
        "late": _records(late),
        "changes": _records(changes_flagged.head(exception_rows)),
        "changes_total": int(len(changes_flagged)),
        "wide_bands": _records(wide.head(exception_rows)),
        "wide_bands_total": int(len(wide)),
        "amplified": sorted(amplified, key=lambda r: -r["at_stake"])[:exception_rows],
        "amplified_total": len(amplified),
        "ts_limit": ts_limit,
        "ts_limit_text": vocabulary.format_number(ts_limit),
        "change_threshold_pct": thresholds["change_threshold_pct"],
        "band_ratio_threshold": thresholds["band_ratio_threshold"],
        "band_months": band_months,
        "has_due_date": thresholds["due_date"] is not None,
    }


def _worst_per_source_level(biased: pd.DataFrame) -> pd.DataFrame:
    """One row per source and level beyond the tracking limit: its worst lag, and every lag beyond.

    Rows keep the order of ``biased`` (money at stake first); ``lags`` lists the
    lag buckets beyond the limit in the order of the lag buckets.
    """
    if biased.empty:
        return biased.assign(lags=pd.Series(dtype=object))
    order = {b: i for i, (b, _, _) in enumerate(DEFAULT_LAG_BUCKETS)}
    by_lag = biased.assign(_b=biased["lag_bucket"].map(order).fillna(99)).sort_values(["_b", "lag_bucket"])
    lags = by_lag.groupby(["source", "level"])["lag_bucket"].agg(lambda b: ", ".join(b.astype(str)))
    worst = biased.loc[biased.groupby(["source", "level"])["tracking_signal"].apply(lambda t: t.abs().idxmax())]
    worst = worst.join(lags.rename("lags"), on=["source", "level"])
    return worst.sort_values(["at_stake", "source", "_level"], ascending=[False, True, True]).drop(columns="_level")


# --------------------------------------------------------------------------- per-family pages


def _family_pages(
    inputs, fam_plan, fam_act, sources, cons, family_order, source_names, plan_months, *,
    history_months_shown, with_charts, series_by_item, series_fallbacks,
) -> list[dict]:
    """One page per family, all built from family × month frames grouped once."""
    last_actual = month_index(inputs.last_actual_month)
    first_shown = month_names([last_actual - history_months_shown + 1])[0]
    hist_months = month_range(first_shown, inputs.last_actual_month)

    fam_src = sources.groupby(["family", "period", "source"], as_index=False)["quantity"].sum()
    src_wide = fam_src.pivot_table(index=["family", "period"], columns="source", values="quantity", aggfunc="sum")
    src_wide = src_wide.reindex(columns=source_names).add_prefix("src_").reset_index()

    # Share of the family's item × location cells each source covers (a missing DC leaves a gap).
    cells = cons[["family", "item", "location"]].drop_duplicates()
    n_cells = cells.groupby("family").size()
    covered = (
        sources[["family", "source", "item", "location"]].drop_duplicates().groupby(["family", "source"]).size()
        .unstack("source").reindex(columns=source_names)
        if not sources.empty else pd.DataFrame(columns=source_names)
    )
    coverage = covered.div(n_cells, axis=0).reindex(family_order)

    plan = fam_plan.merge(src_wide, on=["family", "period"], how="left")
    stored = _as_numeric(inputs.level_bands, ["lower_80", "upper_80", "lower_95", "upper_95"])
    stored = stored[stored["level"] == "family"].rename(columns={"node": "family"})
    plan = plan.merge(stored[["family", "period", "lower_80", "upper_80", "lower_95", "upper_95"]],
                      on=["family", "period"], how="left")
    plan = plan[plan["period"].isin(plan_months)]
    hist = fam_act[fam_act["period"].isin(hist_months)]

    weights = _as_numeric(inputs.weights, ["weight", "psi", "n_cycles"])
    weights_wide = weights.pivot_table(index=["segment", "source"], columns="lag_bucket", values="weight",
                                       aggfunc="first")
    bucket_labels = [label for label, _, _ in DEFAULT_LAG_BUCKETS if label in weights_wide.columns]
    bucket_labels += [b for b in weights_wide.columns if b not in bucket_labels]
    # Per segment and lag: the fewest cycles of any source (what ψ grows with), ψ and where the history came from.
    per_lag = weights.groupby(["segment", "lag_bucket"]).agg(
        n_cycles=("n_cycles", "min"), psi=("psi", "first"), basis=("basis", "first"),
    )
    segments = set(weights["segment"].astype(str))
    fallback_segment = next((s for s in segments if s.lower() == "all"), None)

    dis_counts = (
        inputs.disagreement.groupby("family").size() if not inputs.disagreement.empty else pd.Series(dtype=int)
    )
    n_items = cons.groupby("family")["item"].nunique()
    src_cols = [f"src_{s}" for s in source_names]
    plan_cols = ["consensus", "lower_80", "upper_80", "lower_95", "upper_95", "previous", *src_cols]
    # Family × month × measure cubes: one reindex for all families, then each page is a slice.
    plan_cube = (
        plan.set_index(["family", "period"])[plan_cols]
        .reindex(pd.MultiIndex.from_product([family_order, plan_months]))
        .to_numpy(dtype=float).reshape(len(family_order), len(plan_months), len(plan_cols))
    )
    hist_cube = (
        hist.set_index(["family", "period"])["actual"]
        .reindex(pd.MultiIndex.from_product([family_order, hist_months]))
        .to_numpy(dtype=float).reshape(len(family_order), len(hist_months))
    )
    col = {name: i for i, name in enumerate(plan_cols)}
    weight_values = weights_wide.reindex(columns=bucket_labels).astype(float)
    weight_lookup = dict(zip(weights_wide.index, weight_values.where(weight_values.notna(), None)
                             .astype(object).to_numpy().tolist()))
    lag_lookup = _weights_per_lag(per_lag, bucket_labels)
    bias_lookup = _bias_corrections(inputs.bias, bucket_labels)
    month_grid = _month_grid(plan_cube, plan_cols, plan_months, source_names)
    lines_per_family = len(plan_months)
    series_lines, series_columns, series_items = _series_grid(series_by_item)
    fallback_notes = _fallback_notes(series_fallbacks)
    pattern_mix = _pattern_mix(inputs.series, inputs.items)
    source_labels = [vocabulary.source_label(s) for s in source_names]
    painter = (
        charts.FamilyChartPainter(history_months=hist_months, plan_months=plan_months, source_names=source_names,
                                  quantity_unit=inputs.quantity_unit)
        if with_charts else None
    )

    pages = []
    for number, family in enumerate(family_order, start=1):
        p = plan_cube[number - 1]
        actual = hist_cube[number - 1]
        segment = family if family in segments else fallback_segment
        weight_rows = [
            {"source": source, "label": vocabulary.source_label(source), "by_bucket": weight_lookup[(segment, source)]}
            for source in source_names if (segment, source) in weight_lookup
        ]
        cover = coverage.loc[family] if family in coverage.index else pd.Series(dtype=float)
        partly_covered = {s for s in source_names if pd.notna(cover.get(s)) and float(cover.get(s)) < 0.999}
        cells = np.where(np.isfinite(p), p, np.nan).tolist()
        n_src = len(src_cols)
        table_rows = [
            {
                "period": period, "consensus": row[0], "lower_80": row[1], "upper_80": row[2],
                "lower_95": row[3], "upper_95": row[4],
                "previous": None if row[5] != row[5] else row[5],  # NaN is the only value unequal to itself
                "sources": [None if v != v else v for v in row[6:6 + n_src]],
            }
            for period, row in zip(plan_months, cells)
        ]
        chart = None
        if painter is not None:
            chart = charts.DeferredChart(functools.partial(
                painter.draw, actual=actual, consensus=p[:, col["consensus"]],
                lower_80=p[:, col["lower_80"]], upper_80=p[:, col["upper_80"]],
                lower_95=p[:, col["lower_95"]], upper_95=p[:, col["upper_95"]],
                sources={s: p[:, col[f"src_{s}"]] for s in source_names}, previous=p[:, col["previous"]],
                salt=f"fam{number}",
            ))
        pages.append({
            "number": number,
            "anchor": f"family-{number}",
            "name": family,
            "n_items": int(n_items.get(family, 0)),
            "n_disagreements": int(dis_counts.get(family, 0)),
            "total_consensus": float(np.nansum(p[:, col["consensus"]])),
            "chart": chart,
            "rows": table_rows,
            "source_names": source_names,
            "source_labels": source_labels,
            "coverage": [None if pd.isna(cover.get(s)) else float(cover.get(s)) for s in source_names],
            "bucket_labels": bucket_labels,
            "weights": weight_rows,
            "weights_per_lag": lag_lookup.get(segment, []),
            "weights_are_own": segment == family,
            "bias_corrections": [{"label": vocabulary.source_label(source), "factors": bias_lookup[(segment, source)]}
                                 for source in source_names if (segment, source) in bias_lookup],
            "grid": {
                "columns": [
                    {**c, "label": c["label"] + "*"} if c.get("source") in partly_covered else c
                    for c in month_grid.columns
                ],
                "lines": month_grid.lines[(number - 1) * lines_per_family: number * lines_per_family],
                "font_pt": grid_font_pt(month_grid.width),
            },
            "series_grid": {
                "columns": series_columns, "lines": series_lines.get(family, []),
                "font_pt": grid_font_pt(sum(c["width"] for c in series_columns), preferred_pt=6.9),
            },
            "series_items": series_items.get(family, []),
            "pattern_mix": pattern_mix.get(family),
            "fallback_notes": fallback_notes.get(family, {"lines": [], "n_hidden": 0}),
        })
    return pages


def _bias_corrections(bias: pd.DataFrame, bucket_labels: list[str]) -> dict[tuple, list]:
    """Per (segment, source) the run's persistent-bias factor in each lag bucket (None where none applies)."""
    if bias is None or bias.empty:
        return {}
    frame = _as_numeric(bias, ["factor"])
    frame = frame[frame["persistent"].astype(bool) & frame["factor"].notna() & (frame["factor"] - 1).abs().gt(5e-4)]
    wide = frame.pivot_table(index=["segment", "source"], columns="lag_bucket", values="factor", aggfunc="first")
    wide = wide.reindex(columns=bucket_labels)
    return {key: [None if pd.isna(v) else float(v) for v in row] for key, row in zip(wide.index, wide.to_numpy())}


def _weights_per_lag(per_lag: pd.DataFrame, bucket_labels: list[str]) -> dict[str, list[dict]]:
    """Per segment, the rows under its weights table: cycles of history, ψ and the history used, by lag.

    Cycles are the fewest of any source at that lag, since ψ = n/(n + κ)
    grows with them; rows whose values are all unknown are left out, and so
    is the history row when every lag used its own.  Each row is formatted
    for all segments at once.
    """
    if per_lag.empty:
        return {}
    table = per_lag.unstack("lag_bucket")
    cycles = table["n_cycles"].reindex(columns=bucket_labels)
    psi = table["psi"].reindex(columns=bucket_labels)
    basis = table["basis"].reindex(columns=bucket_labels)
    basis_names = {b: vocabulary.label(vocabulary.WEIGHT_BASES, b) for b in pd.unique(basis.to_numpy().ravel())
                   if isinstance(b, str)}
    texts = {
        "Past cycles measured": cycles.apply(lambda c: c.map(lambda v: "–" if pd.isna(v) else f"{int(v)}")),
        "Weight on measured accuracy (ψ)": psi.apply(lambda c: c.map(format_share)),
        # "History used" only matters where some lag did not have its own: say so only then.
        "History used": basis.apply(lambda c: c.map(lambda v: basis_names.get(v, "–"))),
    }
    shown = {
        "Past cycles measured": cycles.notna().any(axis=1),
        "Weight on measured accuracy (ψ)": psi.notna().any(axis=1),
        "History used": (basis.notna() & basis.ne("segment")).any(axis=1),
    }
    cells = {name: dict(zip(frame.index, frame.to_numpy().tolist())) for name, frame in texts.items()}
    out = {}
    for segment in table.index:
        out[str(segment)] = [{"label": name, "cells": cells[name][segment]} for name in texts
                             if shown[name][segment]]
    return out


def _quantity_text(values) -> pd.Series:
    return pd.Series(values).map(format_quantity)


def _month_grid(plan_cube: np.ndarray, plan_cols: list[str], plan_months: list[str], source_names: list[str]):
    """The family pages' month tables as fixed-width lines, one column width for every family.

    Same columns as the screen table: month, consensus, 80% and 95% bands
    (low – high), last cycle, the change against it, and each source.
    """
    n_families = plan_cube.shape[0]
    flat = pd.DataFrame(plan_cube.reshape(-1, plan_cube.shape[2]), columns=plan_cols)

    def band(low: str, high: str) -> pd.Series:
        lo, hi = _quantity_text(flat[low]), _quantity_text(flat[high])
        return lo.str.rjust(int(lo.str.len().max() or 0)) + "–" + hi.str.rjust(int(hi.str.len().max() or 0))

    values = pd.DataFrame({
        "month": np.tile(np.asarray(plan_months, dtype=object), n_families),
        "consensus": _quantity_text(flat["consensus"]),
        "band80": band("lower_80", "upper_80"),
        "band95": band("lower_95", "upper_95"),
        "previous": _quantity_text(flat["previous"]),
        "change": (flat["consensus"] - flat["previous"]).map(format_change),
        **{f"src_{s}": _quantity_text(flat[f"src_{s}"]) for s in source_names},
    })
    columns = [
        GridColumn("Month", "left"), GridColumn("Consensus", css_class="strong", min_width=9),
        GridColumn("80% band", min_width=8), GridColumn("95% band", min_width=8),
        GridColumn("Last cycle", min_width=8), GridColumn("Δ vs last", min_width=8),
        # A source's header may wrap onto two lines, so its longest word sets the least width.
        *(GridColumn(vocabulary.source_label(s), css_class="src",
                     min_width=max(6, *(len(w) + 1 for w in vocabulary.source_label(s).split())))
          for s in source_names),
    ]
    grid = lay_out_text_grid(values, columns)
    # Remember which header cells are sources, so each page can star a source that covers part of it.
    named = [dict(c) for c in grid.columns]
    labelled = [c for c in named if c["label"] is not None]
    source_of = dict(zip((f"src_{s}" for s in source_names), source_names))
    for column, key in zip(labelled, values.columns):
        column["source"] = source_of.get(key)
    return type(grid)(columns=tuple(named), lines=grid.lines, width=grid.width)


def summarise_series(
    series: pd.DataFrame, items: pd.DataFrame, actuals: pd.DataFrame, last_actual_month: str
) -> pd.DataFrame:
    """One row per item of the statistical forecast: its usual pattern and method, holdout WAPE, fallbacks.

    The pattern and the method are the most common across the item's
    locations (ties go to the name first in alphabetical order), with how many
    locations share them.  The item's holdout WAPE is the locations' WAPEs
    weighted by their actual demand over the last ``HOLDOUT_WEIGHT_MONTHS``
    months, Σ_l A_l·WAPE_l / Σ_l A_l: since WAPE_l = Σ|e| / A_l over the
    holdout, this is the WAPE of the item's summed absolute errors when the
    recent actuals stand in for the holdout's (a plain mean where no location
    has recent demand).  Returns [item, family, n_locations, pattern,
    pattern_count, method, method_count, holdout_wape, n_fallback].
    """
    out_columns = ["item", "family", "n_locations", "pattern", "pattern_count", "method", "method_count",
                   "holdout_wape", "n_fallback"]
    if series.empty:
        return pd.DataFrame(columns=out_columns)
    frame = series[["item", "location", "pattern", "method", "holdout_wape", "fallback"]].copy()
    frame["item"] = frame["item"].astype(str)
    frame["holdout_wape"] = pd.to_numeric(frame["holdout_wape"], errors="coerce")
    frame["pattern"] = frame["pattern"].fillna("").astype(str)
    frame["method"] = frame["method"].fillna("").astype(str)
    frame["has_fallback"] = frame["fallback"].fillna("").astype(str).str.strip().ne("")

    first_weighted = month_index(last_actual_month) - HOLDOUT_WEIGHT_MONTHS + 1
    recent = actuals[month_indexes(actuals["period"]) >= first_weighted] if not actuals.empty else actuals
    volume = recent.groupby(["item", "location"], as_index=False)["quantity"].sum() if not recent.empty else (
        pd.DataFrame(columns=["item", "location", "quantity"]))
    frame = frame.merge(volume.astype({"item": str}), on=["item", "location"], how="left")
    scored = frame["holdout_wape"].notna()
    weight = frame["quantity"].fillna(0.0).clip(lower=0.0).where(scored, 0.0)
    frame = frame.assign(weighted=weight * frame["holdout_wape"].fillna(0.0), weight=weight)

    def most_common(column: str) -> pd.DataFrame:
        counts = frame.groupby(["item", column]).size().rename(f"{column}_count").reset_index()
        counts = counts.sort_values(["item", f"{column}_count", column], ascending=[True, False, True])
        return counts.drop_duplicates("item").set_index("item")

    by_item = frame.groupby("item").agg(
        n_locations=("location", "size"), weighted=("weighted", "sum"), weight=("weight", "sum"),
        plain=("holdout_wape", "mean"), n_fallback=("has_fallback", "sum"),
    )
    by_item["holdout_wape"] = (by_item["weighted"] / by_item["weight"].where(by_item["weight"] > 0)).fillna(
        by_item["plain"])
    out = by_item.join(most_common("pattern")).join(most_common("method")).reset_index()
    out = out.merge(items[["item", "family"]].astype({"item": str}), on="item", how="left")
    out["family"] = out["family"].fillna("(unassigned)")
    return out[out_columns].sort_values(["family", "item"], kind="stable").reset_index(drop=True)


def _fallback_series(series: pd.DataFrame, items: pd.DataFrame) -> pd.DataFrame:
    """The series on a fallback, with their family: [family, item, location, fallback]."""
    if series.empty:
        return pd.DataFrame(columns=["family", "item", "location", "fallback"])
    text = series["fallback"].fillna("").astype(str).str.strip()
    rows = series.loc[text.ne(""), ["item", "location"]].astype(str).assign(fallback=text[text.ne("")])
    rows = rows.merge(items[["item", "family"]].astype({"item": str}), on="item", how="left")
    rows["family"] = rows["family"].fillna("(unassigned)")
    return rows[["family", "item", "location", "fallback"]].sort_values(["family", "item", "location"])


def _series_grid(by_item: pd.DataFrame):
    """Per family, the items' method table as fixed-width lines, two items side by side.

    Each item shows the method most of its locations use, at how many of its
    locations ("3 of 4"), and its holdout WAPE; method names come from
    :data:`consensus.vocabulary.STATISTICAL_METHODS`.  Items run down the left
    half first, then the right half, so the table reads in item order like two
    newspaper columns.
    """
    if by_item.empty:
        return {}, [], {}
    names = {m: vocabulary.label(vocabulary.STATISTICAL_METHODS, m) for m in by_item["method"].unique()}
    method = by_item["method"].map(names) + np.where(by_item["n_fallback"] > 0, FALLBACK_MARK, "")
    used_at = by_item["method_count"].astype(int).astype(str) + " of " + by_item["n_locations"].astype(int).astype(str)
    wape = (100 * by_item["holdout_wape"]).map(format_percent)
    values = pd.DataFrame({"item": by_item["item"], "method": method, "used_at": used_at, "wape": wape})
    half = lay_out_text_grid(values, [
        GridColumn("Item", "left"), GridColumn("Method", "left", min_width=12),
        GridColumn("Used at (locations)", "left", min_width=7), GridColumn("Holdout WAPE", min_width=7),
    ])
    half_lines = pd.Series(half.lines, index=by_item.index).str.ljust(half.width)
    position = by_item.groupby("family").cumcount()
    size = by_item.groupby("family")["item"].transform("size")
    rows_left = (size + 1) // 2
    is_right = position >= rows_left
    frame = pd.DataFrame({
        "family": by_item["family"], "line": np.where(is_right, position - rows_left, position),
        "side": np.where(is_right, "right", "left"), "text": half_lines,
    })
    wide = frame.pivot_table(index=["family", "line"], columns="side", values="text", aggfunc="first")
    wide = wide.reindex(columns=["left", "right"]).fillna("")
    spacer = " " * 4
    joined = (wide["left"] + np.where(wide["right"].str.len() > 0, spacer, "") + wide["right"]).str.rstrip()
    lines = {family: list(group) for family, group in joined.groupby(level="family")}
    columns = [*half.columns, {"label": None, "width": len(spacer), "align": "left", "css_class": ""}, *half.columns]
    records = by_item.assign(method_text=method, used_at_text=used_at, wape_text=wape)
    items_by_family = {
        family: group[["item", "method_text", "used_at_text", "wape_text", "n_fallback"]].to_dict("records")
        for family, group in records.groupby("family")
    }
    return lines, columns, items_by_family


def _pattern_mix(series: pd.DataFrame, items: pd.DataFrame) -> dict[str, str]:
    """Per family, how its item × location histories are classed: "20 smooth, 10 erratic (of 30 series)".

    Patterns in the registry's order (:data:`consensus.vocabulary.DEMAND_PATTERNS`), most common
    first among equals; one groupby for every family.
    """
    if series.empty:
        return {}
    frame = series[["item", "pattern"]].astype(str).merge(items[["item", "family"]].astype(str), on="item", how="left")
    frame["family"] = frame["family"].fillna("(unassigned)")
    counts = frame.groupby(["family", "pattern"]).size().rename("n").reset_index()
    rank = {t.key: i for i, t in enumerate(vocabulary.DEMAND_PATTERNS)}
    counts["_rank"] = counts["pattern"].map(rank).fillna(len(rank))
    counts = counts.sort_values(["family", "_rank", "pattern"])
    counts["text"] = counts["n"].astype(str) + " " + counts["pattern"].map(
        lambda p: vocabulary.label(vocabulary.DEMAND_PATTERNS, p))
    totals = counts.groupby("family")["n"].sum()
    return {
        family: ", ".join(group["text"]) + f" (of {int(totals[family])} series)"
        for family, group in counts.groupby("family")
    }


def _fallback_notes(fallbacks: pd.DataFrame, *, max_notes: int = 2) -> dict[str, dict]:
    """Per family, the first few series on a fallback with the reason, and how many more there are.

    The reason is the fallback text up to its first ";" (what made the series
    fall back; the rest says how it was forecast), so a family page keeps room.
    """
    if fallbacks.empty:
        return {}
    reason = fallbacks["fallback"].str.split(";", n=1).str[0].str.strip()
    text = fallbacks["item"] + " at " + fallbacks["location"] + " (" + reason + ")"
    notes = {}
    for family, group in text.groupby(fallbacks["family"], sort=False):
        notes[family] = {"lines": list(group.iloc[:max_notes]), "n_hidden": max(len(group) - max_notes, 0)}
    return notes


def _by_family_grid(summary: dict[str, Any], family_order: list[str]):
    """The "Consensus by family" table as fixed-width lines (page numbers are added by the template)."""
    rows = summary["rows_all"]
    if not rows:
        return None
    data = {"family": [r["family"] for r in rows]}
    columns = [GridColumn("Family", "left", min_width=6)]
    for position, window in enumerate(summary["windows"]):
        cells = [r["windows"][position] for r in rows]
        data[f"c{position}"] = [format_quantity(c["consensus"]) for c in cells]
        data[f"p{position}"] = [format_percent(c["vs_prev_pct"], signed=True) for c in cells]
        data[f"y{position}"] = [format_percent(c["vs_ly_pct"], signed=True) for c in cells]
        columns += [GridColumn("Consensus", min_width=9, css_class="group-start"),
                    GridColumn("vs last cycle", min_width=9), GridColumn("vs last year", min_width=9)]
    grid = lay_out_text_grid(pd.DataFrame(data), columns)
    groups = [("", 1), *((w["label"], 3) for w in summary["windows"]), ("", 1)]  # last: the page column
    return {"columns": list(grid.columns), "lines": list(grid.lines), "width": grid.width,
            "font_pt": grid_font_pt(grid.width + 6), "groups": groups}


def grid_font_pt(width_chars: int, *, preferred_pt: float = 7.1, line_pt: float = TEXT_WIDTH_PT) -> float:
    """Largest font size up to ``preferred_pt`` at which a line of ``width_chars`` monospaced characters fits.

    A character of DejaVu Sans Mono advances 1233/2048 em (its hmtx table), so
    a line is ``width_chars × 0.602 × size`` points wide.
    """
    if width_chars <= 0:
        return preferred_pt
    return round(min(preferred_pt, line_pt / (width_chars * MONO_ADVANCE_EM)) - 0.05, 1)


# --------------------------------------------------------------------------- scorecard, FVA, components


def _scorecard(inputs, *, ts_limit, source_names, with_charts) -> dict[str, Any]:
    """Accuracy by source and lag bucket at total level, WAPE by level, its recent history, and weights earned.

    Every table says the level it is measured at, since errors shrink as
    items are added up: WAPE at item × location is several times that of
    the total.
    """
    score = _as_numeric(inputs.scorecard, ["n", "mad", "mape", "wape", "bias", "bias_pct", "tracking_signal"])
    order = {b: i for i, (b, _, _) in enumerate(DEFAULT_LAG_BUCKETS)}
    names = vocabulary.ordered(list(source_names) + list(score["source"].astype(str).unique()))
    src_rank = {s: i for i, s in enumerate(names)}
    total = score[score["level"] == "total"].copy()
    total = total.assign(
        _s=total["source"].map(src_rank), _b=total["lag_bucket"].map(order).fillna(99),
        out_of_limits=total["tracking_signal"].abs() > ts_limit,
    ).sort_values(["_s", "_b"])
    total["source_label"] = _labels(total["source"])
    weights = _as_numeric(inputs.weights, ["weight"])
    overall = weights[weights["segment"].astype(str).str.lower() == "all"]
    if overall.empty:
        overall = weights
    earned = overall.groupby(["source", "lag_bucket"], as_index=False)["weight"].mean()
    total = total.merge(earned, on=["source", "lag_bucket"], how="left")

    # WAPE at each level, n-weighted over lag buckets, in the registry's level order.
    levels = score.assign(wn=score["wape"] * score["n"]).groupby(["source", "level"]).agg(wn=("wn", "sum"),
                                                                                          n=("n", "sum"))
    levels = (levels["wn"] / levels["n"].where(levels["n"] > 0)).unstack("level")
    level_keys = [t.key for t in vocabulary.LEVELS if t.key in levels.columns]
    level_keys += sorted(c for c in levels.columns if c not in level_keys)
    level_rows = [
        {"source": s, "label": vocabulary.source_label(s),
         "values": [None if pd.isna(levels.loc[s, c]) else float(levels.loc[s, c]) for c in level_keys]}
        for s in names if s in levels.index
    ]

    hist = _as_numeric(inputs.scorecard_history, ["wape", "bias_pct"])
    cycles = sorted(hist["cycle"].astype(str).unique(), key=month_index) if not hist.empty else []
    wide = hist.pivot_table(index="cycle", columns="source", values="wape", aggfunc="mean").reindex(cycles)
    bias_wide = hist.pivot_table(index="cycle", columns="source", values="bias_pct", aggfunc="mean").reindex(cycles)
    history_rows = []
    for s in names:
        if s not in wide.columns:
            continue
        series = wide[s].to_numpy(dtype=float)
        latest = series[-1] if len(series) else np.nan
        before = series[-4] if len(series) >= 4 else (series[0] if len(series) else np.nan)
        change = latest - before if len(series) >= 2 else None
        history_rows.append({
            "source": s, "label": vocabulary.source_label(s), "latest": latest, "change_3": change,
            "tone": _tone(change), "mean": float(np.nanmean(series)) if np.isfinite(series).any() else None,
            "bias_latest": float(bias_wide[s].iloc[-1]) if s in bias_wide.columns and len(cycles) else None,
        })
    chart = None
    if with_charts and cycles:
        chart = Markup(charts.draw_accuracy_history(
            cycles=cycles, wape_by_source={s: wide[s].to_numpy(dtype=float) for s in names if s in wide.columns},
            salt="scorecard",
        ))
    return {
        "rows": _records(total.drop(columns=["_s", "_b"])),
        "level_columns": [vocabulary.label(vocabulary.LEVELS, c) for c in level_keys],
        "level_keys": level_keys,
        "level_rows": level_rows,
        "history_rows": history_rows,
        "history_first": cycles[0] if cycles else None,
        "history_last": cycles[-1] if cycles else None,
        "history_cycles": cycles,
        "history_level": vocabulary.label(vocabulary.LEVELS, inputs.scorecard_history_level),
        "total_level": vocabulary.label(vocabulary.LEVELS, "total"),
        "chart": chart,
        "ts_limit": ts_limit,
    }


def _value_added(fva: pd.DataFrame, *, with_charts: bool) -> dict[str, Any]:
    """Forecast value added: each step's WAPE and its change against the step it should improve on.

    Steps are source keys, listed in the order of the forecasting process
    (:func:`consensus.vocabulary.value_added_order`); each is compared with
    its baseline in the registry (the statistical forecast for what people
    send, seasonal naive for the statistical forecast before events …), the
    comparison of Gilliland's forecast value added, and with the first step.
    Change = WAPE(step) − WAPE(baseline) in points: negative adds value.
    """
    frame = _as_numeric(fva, ["wape", "n"]).reset_index(drop=True)
    if frame.empty:
        return {"rows": [], "chart": None, "first_label": None}
    frame["step"] = frame["step"].astype(str)
    frame = frame.drop_duplicates("step").set_index("step").loc[vocabulary.value_added_order(frame["step"])]
    present = list(frame.index)
    first = present[0]
    rows = []
    for step in present:
        baseline = vocabulary.value_added_baseline(step, present[:present.index(step)])
        change = frame.loc[step, "wape"] - frame.loc[baseline, "wape"] if baseline is not None else np.nan
        vs_first = frame.loc[step, "wape"] - frame.loc[first, "wape"] if step != first else np.nan
        rows.append({
            "step": step, "label": vocabulary.source_label(step), "wape": float(frame.loc[step, "wape"]),
            "n": frame.loc[step, "n"], "baseline": baseline,
            "baseline_label": vocabulary.source_label(baseline) if baseline is not None else None,
            "change": None if pd.isna(change) else float(change), "tone": _tone(change),
            "vs_first": None if pd.isna(vs_first) else float(vs_first), "tone_first": _tone(vs_first),
        })
    chart = None
    if with_charts:
        chart = Markup(charts.draw_value_added_steps(
            steps=[r["label"] for r in rows], wape=np.array([r["wape"] for r in rows], dtype=float),
            change=np.array([np.nan if r["change"] is None else r["change"] for r in rows], dtype=float),
            tones=[r["tone"] or "neutral" for r in rows], salt="fva",
        ))
    return {"rows": rows, "chart": chart, "first_label": vocabulary.source_label(first)}


def _components(components: pd.DataFrame, plan_months: list[str], max_rows: int) -> dict[str, Any]:
    """Dependent demand per component: the first six plan months, the rest of the horizon, and the total."""
    frame = _as_numeric(components, ["quantity"])
    frame = frame[frame["period"].isin(plan_months)]
    head = plan_months[:6]
    tail_label = f"{plan_months[6]} – {plan_months[-1]}" if len(plan_months) > 6 else None
    if frame.empty:
        return {"months": head, "tail_label": tail_label, "rows": [], "n_total": 0, "n_hidden": 0,
                "total": None}
    wide = frame.pivot_table(index="component", columns="period", values="quantity", aggfunc="sum").reindex(
        columns=plan_months
    )
    table = pd.DataFrame(index=wide.index)
    table["total"] = wide.sum(axis=1, min_count=1)
    table = table.sort_values("total", ascending=False)
    wide = wide.loc[table.index]
    shown = wide.head(max_rows)
    rows = [
        {
            "component": component,
            "months": [None if pd.isna(v) else float(v) for v in shown.loc[component, head]],
            "tail": float(shown.loc[component, plan_months[6:]].sum()) if tail_label else None,
            "total": float(table.loc[component, "total"]),
        }
        for component in shown.index
    ]
    return {
        "months": head, "tail_label": tail_label, "rows": rows, "n_total": int(len(table)),
        "n_hidden": int(max(len(table) - max_rows, 0)), "total": float(table["total"].sum()),
        "hidden_total": float(table["total"].iloc[max_rows:].sum()),
    }


def _band_coverage(frame: pd.DataFrame) -> list[dict]:
    """How often past bands held the actual demand, by level and band, with levels in the registry's words.

    A row whose level is not a level key is taken as measured at item ×
    location, the grain the bands are stored at (the store's rows carried the
    band's name there).
    """
    out = _as_numeric(frame, ["nominal", "coverage", "winkler"])
    if out.empty:
        return []
    known = {t.key for t in vocabulary.LEVELS}
    level = out["level"].astype(str).where(out["level"].astype(str).isin(known), "item")
    out = out.assign(level=level, level_label=level.map(lambda k: vocabulary.label(vocabulary.LEVELS, k)))
    rank = {t.key: i for i, t in enumerate(vocabulary.LEVELS)}
    out = out.assign(_rank=out["level"].map(rank)).sort_values(["_rank", "nominal"], kind="stable")
    return _records(out.drop(columns="_rank"))


# --------------------------------------------------------------------------- accuracy by demand pattern


def _pattern_accuracy(inputs: PackInputs, *, source_names) -> dict[str, Any]:
    """WAPE, MASE and bias by demand pattern for each source scored, regular patterns apart from slow ones.

    Rows are the stored pooled figures (every lag together); patterns are
    grouped by :data:`consensus.vocabulary.PATTERN_GROUP_OF` and listed in the
    registry's order, sources in display order.  MASE (Hyndman & Koehler 2006)
    is mean absolute error ÷ the seasonal naive's in-sample mean absolute
    error, so below 1 beats that yardstick whatever the volume; for each
    pattern the source with the lowest MASE is named.
    """
    frame = inputs.accuracy_patterns
    if "lag_bucket" in frame.columns:
        frame = frame[frame["lag_bucket"].astype(str) == "all"]
    frame = _as_numeric(frame, ["n", "wape", "mase", "bias_pct"])
    measures = {key: vocabulary.label(vocabulary.MEASURES, key) for key in ("n", "wape", "mase", "bias_pct")}
    words = {"measures": measures, "reference": vocabulary.term(vocabulary.MEASURES, "mase").reference,
             "yardstick_label": vocabulary.source_label("naive")}
    if frame.empty:
        return {"groups": [], **words}
    frame = frame.assign(pattern=frame["pattern"].astype(str), source=frame["source"].astype(str))
    pattern_rank = {t.key: i for i, t in enumerate(vocabulary.DEMAND_PATTERNS)}
    patterns = sorted(frame["pattern"].unique(), key=lambda k: (pattern_rank.get(k, len(pattern_rank)), k))
    sources = vocabulary.ordered(list(source_names) + list(frame["source"].unique()))
    sources = [s for s in sources if s in set(frame["source"])]
    n_series = inputs.series["pattern"].astype(str).value_counts() if not inputs.series.empty else pd.Series(dtype=int)
    cells = frame.drop_duplicates(["pattern", "source"]).set_index(["pattern", "source"])
    groups = []
    for group in vocabulary.PATTERN_GROUPS:
        members = [p for p in patterns if vocabulary.PATTERN_GROUP_OF.get(p, "other") == group.key]
        if not members:
            continue
        columns = []
        for pattern in members:
            scored = cells.loc[pattern]
            best = scored["mase"].dropna()
            columns.append({
                "pattern": pattern, "label": vocabulary.label(vocabulary.DEMAND_PATTERNS, pattern),
                "n_series": int(n_series.get(pattern, 0)) or None,
                "best_label": vocabulary.source_label(best.idxmin()) if len(best) else None,
                "best_mase": float(best.min()) if len(best) else None,
            })
        rows = []
        for source in sources:
            values = []
            for pattern in members:
                if (pattern, source) in cells.index:
                    row = cells.loc[(pattern, source)]
                    mase = None if pd.isna(row["mase"]) else float(row["mase"])
                    values.append({"n": row["n"], "wape": row["wape"], "bias_pct": row["bias_pct"], "mase": mase,
                                   "tone": "" if mase is None or round(mase, 2) == 1 else
                                   ("better" if mase < 1 else "worse")})
                else:
                    values.append(None)
            if any(v is not None for v in values):
                rows.append({"source": source, "label": vocabulary.source_label(source), "values": values})
        groups.append({"key": group.key, "label": group.label, "description": group.description,
                       "columns": columns, "rows": rows})
    return {"groups": groups, **words}


# --------------------------------------------------------------------------- order amplification


#: DCs drawn in the order-amplification chart at most (the most out of line first); the table lists all.
AMPLIFICATION_CHART_ROWS = 30


def _amplification_state(n_series, ratio, bound, flagged) -> str:
    """Where a DC stands, as :func:`consensus.methods.amplification._explain` words it (registry keys)."""
    if not n_series:
        return "not_measured"
    if ratio is None or not math.isfinite(ratio):
        return "no_ratio"
    if flagged:
        return "out_of_line"
    return "below_bound" if ratio < bound else "within_limit"


def _amplification(inputs: PackInputs, cons: pd.DataFrame, near_months: list[str], *, with_charts: bool) -> dict:
    """The order-amplification page: each DC's variance ratio against its bound and limit, and what is at stake.

    Ratio Var(orders)/Var(demand) (Lee, Padmanabhan & Whang 1997) and bound
    1 + 2L/p + 2L²/p² (Chen, Drezner, Ryan & Simchi-Levi 2000) are the run's
    (:mod:`consensus.methods.amplification`); the pack only lays them out.  The
    money at stake of an out-of-line DC is the plan value through it over
    ``near_months``, the orders its swing lands on.  The limit's multiple of
    the bound and the moving average are read back from the rows (limit ÷
    bound, p), and fall back to the measure's defaults when no DC is measured.
    """
    from consensus.methods.amplification import DEFAULT_FLAG_MULTIPLE, DEFAULT_MOVING_AVERAGE_MONTHS

    frame = _as_numeric(inputs.amplification, ["n_series", "n_months", "ratio", "moving_average_months",
                                               "lead_time_months", "bound", "limit"])
    labels = {"ratio": vocabulary.label(vocabulary.MEASURES, "variance_ratio"),
              "bound": vocabulary.label(vocabulary.MEASURES, "amplification_bound"),
              "limit": vocabulary.label(vocabulary.MEASURES, "amplification_limit")}
    references = {"ratio": vocabulary.term(vocabulary.MEASURES, "variance_ratio").reference,
                  "bound": vocabulary.term(vocabulary.MEASURES, "amplification_bound").reference}
    multiples = (frame["limit"] / frame["bound"].where(frame["bound"] > 0)).dropna().round(4).unique()
    windows = frame["moving_average_months"].dropna().unique()
    multiple = float(multiples[0]) if len(multiples) == 1 else (None if len(multiples) else DEFAULT_FLAG_MULTIPLE)
    moving = int(windows[0]) if len(windows) == 1 else (None if len(windows) else DEFAULT_MOVING_AVERAGE_MONTHS)
    out = {"rows": [], "notes": [], "labels": labels, "references": references, "multiple": multiple,
           "multiple_text": vocabulary.format_number(multiple, digits=2) if multiple is not None else None,
           "moving_average_months": moving, "bounds": [], "chart": None, "min_months": inputs.amplification_min_months,
           "n_flagged": 0, "n_not_measured": 0, "n_shown_in_chart": 0, "state_counts": [], "nearest": None,
           "state_words": {t.key: t.label for t in vocabulary.AMPLIFICATION_STATES}}
    if frame.empty:
        return out
    near = cons[cons["period"].isin(near_months)]
    through = near.groupby("location")["value"].sum() if not near.empty else pd.Series(dtype=float)
    regions = inputs.locations.drop_duplicates("location").set_index("location")["region"]
    flagged = frame["flagged"].fillna(False).astype(bool).to_numpy()
    table = frame.assign(flagged=flagged, location=frame["location"].astype(str))
    table["state"] = [_amplification_state(n, r if pd.notna(r) else None, b, f) for n, r, b, f in
                      zip(table["n_series"].fillna(0), table["ratio"], table["bound"], table["flagged"])]
    table["state_label"] = table["state"].map(lambda k: vocabulary.label(vocabulary.AMPLIFICATION_STATES, k))
    table["region"] = table["location"].map(regions)
    table["at_stake"] = table["location"].map(through).fillna(0.0).where(table["flagged"], 0.0)
    # Out of line first, then by how near the limit; unmeasured DCs last, in code order.
    table["_share"] = (table["ratio"] / table["limit"]).fillna(-1.0)
    table = table.sort_values(["_share", "location"], ascending=[False, True], kind="stable")
    out["rows"] = _records(table.drop(columns=["_share"]))
    # The run's own sentence for each out-of-line DC; the other states are defined once under the table.
    out["notes"] = [r["explanation"] for r in out["rows"] if r["state"] == "out_of_line"]
    out["n_flagged"] = int(table["flagged"].sum())
    out["n_not_measured"] = int((table["state"] == "not_measured").sum())
    counts = table["state"].value_counts()
    out["state_counts"] = [{"n": int(counts[t.key]), "label": t.label} for t in vocabulary.AMPLIFICATION_STATES
                           if t.key in counts.index]
    within = table[table["state"].isin(["within_limit", "below_bound"])]
    out["nearest"] = _records(within.head(1).drop(columns=["_share"]))[0] if len(within) else None
    pairs = table[["lead_time_months", "bound"]].dropna().drop_duplicates().sort_values("lead_time_months")
    out["bounds"] = [{"lead_time_months": int(l), "bound": float(b)} for l, b in pairs.itertuples(index=False)]
    if with_charts:
        shown = table.head(AMPLIFICATION_CHART_ROWS)
        out["n_shown_in_chart"] = int(len(shown))
        out["chart"] = Markup(charts.draw_amplification(
            locations=shown["location"].tolist(), ratio=shown["ratio"].to_numpy(float),
            bound=shown["bound"].to_numpy(float), limit=shown["limit"].to_numpy(float),
            flagged=shown["flagged"].to_numpy(bool), missing_texts=shown["state_label"].tolist(),
            labels={**labels, "out_of_line": vocabulary.label(vocabulary.AMPLIFICATION_STATES, "out_of_line")},
            salt="amplification",
        ))
    return out


# --------------------------------------------------------------------------- methods page


def _methods_page(inputs, *, scorecard, band_coverage, thresholds) -> dict[str, Any]:
    """The methods page's names, published sources and figures measured on this store's own past cycles.

    Figures appear once at least :data:`MIN_HISTORY_CYCLES` past cycles have
    been scored against actual demand; before that the page says so.  Nothing
    is taken from the run's notes: the words come from
    :mod:`consensus.vocabulary` and the numbers from ``inputs``.
    """
    cycles = scorecard["history_cycles"]
    enough = len(cycles) >= MIN_HISTORY_CYCLES
    history = {"n_cycles": len(cycles), "first": cycles[0] if cycles else None,
               "last": cycles[-1] if cycles else None, "enough": enough, "min_cycles": MIN_HISTORY_CYCLES}

    # Consensus against the best single combined source and seasonal naive, at every level scored.
    by_source = {r["source"]: r["values"] for r in scorecard["level_rows"]}
    combined = [s for s in by_source if s != "consensus" and vocabulary.source(s).combined]
    accuracy = []
    for position, level_key in enumerate(scorecard["level_keys"]):
        own = by_source.get("consensus", [None] * (position + 1))[position]
        scored = [(by_source[s][position], s) for s in combined if by_source[s][position] is not None]
        best_value, best_source = min(scored) if scored else (None, None)
        naive = by_source.get("naive", [None] * (position + 1))[position]
        accuracy.append({
            "level": vocabulary.label(vocabulary.LEVELS, level_key), "consensus": own,
            "best_label": vocabulary.source_label(best_source) if best_source else None, "best": best_value,
            "naive": naive,
        })

    weights = _as_numeric(inputs.weights, ["weight", "psi", "n_cycles"])
    mean_weights = (
        weights.groupby("source")["weight"].mean().reindex(vocabulary.ordered(weights["source"].unique()))
        if not weights.empty else pd.Series(dtype=float)
    )
    scheme = vocabulary.term(vocabulary.WEIGHT_SCHEMES, inputs.weight_scheme) if inputs.weight_scheme else None
    weights_block = {
        "scheme": scheme,
        "segment": (vocabulary.label(vocabulary.WEIGHT_SEGMENTS, inputs.weight_segment)
                    if inputs.weight_segment else None),
        "window_cycles": inputs.weight_window_cycles,
        "mean": [{"label": vocabulary.source_label(s), "weight": float(w)} for s, w in mean_weights.items()
                 if pd.notna(w)],
        "psi_range": (_share_range(weights["psi"]) if "psi" in weights and weights["psi"].notna().any() else None),
        "n_bases": (weights["basis"].astype(str).map(lambda b: vocabulary.label(vocabulary.WEIGHT_BASES, b))
                    .value_counts().to_dict() if not weights.empty else {}),
    }

    reconciliation = (vocabulary.term(vocabulary.RECONCILIATION_METHODS, inputs.reconciliation_method)
                      if inputs.reconciliation_method else None)

    series = inputs.series
    methods_used = []
    if not series.empty:
        frame = series.assign(holdout_wape=pd.to_numeric(series["holdout_wape"], errors="coerce"))
        used = frame.groupby("method").agg(n=("item", "size"), median=("holdout_wape", "median"))
        rank = {t.key: i for i, t in enumerate(vocabulary.STATISTICAL_METHODS)}
        for method in sorted(used.index, key=lambda m: (-used.loc[m, "n"], rank.get(m, 99), m)):
            entry = vocabulary.term(vocabulary.STATISTICAL_METHODS, method)
            median = used.loc[method, "median"]
            methods_used.append({"label": entry.label, "description": entry.description,
                                 "reference": entry.reference, "n": int(used.loc[method, "n"]),
                                 "median_wape": None if pd.isna(median) else 100 * float(median)})

    return {
        "history": history,
        "accuracy": accuracy if enough else [],
        "weights": weights_block,
        "reconciliation": reconciliation,
        "statistical_methods": methods_used,
        "pattern_reference": vocabulary.PATTERN_REFERENCE,
        "band_methods": list(vocabulary.BAND_METHODS),
        "band_coverage": band_coverage if enough else [],
        "thresholds": {
            "disagreement": vocabulary.describe_exception_rule("disagreement", **thresholds),
            "change": vocabulary.describe_exception_rule("change", **thresholds),
            "band": vocabulary.describe_exception_rule("band", **thresholds),
            "amplification": vocabulary.describe_exception_rule("amplification", **thresholds),
        },
        "terms": [vocabulary.term(vocabulary.MEASURES, k)
                  for k in ("wape", "mape", "mad", "bias", "tracking_signal", "mase", "variance_ratio")],
    }


def _share_range(values: pd.Series) -> str:
    """A column of fractions as one share or a range of shares: "92%" or "86%–92%"."""
    values = pd.to_numeric(values, errors="coerce").dropna()
    low, high = format_share(values.min()), format_share(values.max())
    return low if low == high else f"{low}–{high}"
