"""Marketing events as uplifts on the statistical forecast, and their value added.

Marketing knows about promotions, launches and campaigns that order history
cannot; what it does not know better than the history is the base level.
So an event is applied to the statistical forecast of the cells and months
it covers instead of competing with it as a separate forecast:

    adjusted = max(0, base + Σ_events uplift),
    uplift = base · uplift_pct / 100              (a percentage event), or
    uplift = units · base / Σ_scope base          (a units event),

where Σ_scope runs over the event's cells in that month, so units given
for a family or region are split by the statistical forecast's own mix
(equally when that mix is all zero).  Units are per month of the event.
Overlapping events add.  Whether this helps is then measured like any
source, by forecast value added: the accuracy of the statistical forecast
with the uplifts against without them on the cells they touched (Gilliland,
"forecast value added" analysis).
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd

from consensus.errors import InvalidSpec
from consensus.methods.accuracy import month_indexes_factorized
from consensus.periods import is_month

_PRODUCT_KEYS = ("item", "family")
_PLACE_KEYS = ("location", "region", None)


def _column_or_missing(frame: pd.DataFrame, name: str) -> pd.Series:
    if name in frame.columns:
        values = frame[name].astype(object)
        return values.where(values.notna() & (values.astype(str).str.strip() != ""), None)
    return pd.Series([None] * len(frame), index=frame.index, dtype=object)


def _normalise_events(events: pd.DataFrame) -> pd.DataFrame:
    """Checked events with one scope column pair and one uplift kind per row."""
    ev = pd.DataFrame(index=events.index)
    ev["event"] = events["event"].astype(object)
    for name in ("item", "family", "location", "region"):
        ev[name] = _column_or_missing(events, name)
    ev["note"] = _column_or_missing(events, "note").fillna("")
    pct = pd.to_numeric(events["uplift_pct"], errors="coerce") if "uplift_pct" in events else pd.Series(np.nan, index=events.index)
    units = pd.to_numeric(events["units"], errors="coerce") if "units" in events else pd.Series(np.nan, index=events.index)
    ev["uplift_pct"], ev["units"] = pct.astype(float), units.astype(float)
    problems = []
    product_given = ev["item"].notna().astype(int) + ev["family"].notna().astype(int)
    place_given = ev["location"].notna().astype(int) + ev["region"].notna().astype(int)
    kind_given = ev["uplift_pct"].notna().astype(int) + ev["units"].notna().astype(int)
    for label, bad in (
        ("needs exactly one of item or family", product_given != 1),
        ("may name a location or a region, not both", place_given > 1),
        ("needs exactly one of uplift_pct or units", kind_given != 1),
    ):
        if bad.any():
            problems.append(f"event(s) {sorted(map(str, ev.loc[bad, 'event']))} {label}")
    for edge in ("start", "end"):
        bad = ~events[edge].astype(str).map(is_month)
        if bad.any():
            problems.append(f"event(s) {sorted(map(str, ev.loc[bad, 'event']))} have a {edge} that is not YYYY-MM")
    if problems:
        raise InvalidSpec("; ".join(problems))
    ev["start_m"] = month_indexes_factorized(events["start"])
    ev["end_m"] = month_indexes_factorized(events["end"])
    backwards = ev["end_m"] < ev["start_m"]
    if backwards.any():
        raise InvalidSpec(f"event(s) {sorted(map(str, ev.loc[backwards, 'event']))} end before they start")
    ev["_eid"] = np.arange(len(ev))
    return ev.reset_index(drop=True)


def _match_events_to_cells(ev: pd.DataFrame, stat: pd.DataFrame) -> pd.DataFrame:
    """Every (event, cell, month) pair an event covers; one merge per scope kind."""
    pieces = []
    for product in _PRODUCT_KEYS:
        for place in _PLACE_KEYS:
            others = [k for k in ("location", "region") if k != place]
            chosen = ev[ev[product].notna()]
            chosen = chosen[chosen[place].notna()] if place else chosen
            if place:
                chosen = chosen[chosen[others[0]].isna()]
            else:
                chosen = chosen[chosen["location"].isna() & chosen["region"].isna()]
            if chosen.empty:
                continue
            keys = [product] + ([place] if place else [])
            slim = chosen[keys + ["_eid", "event", "start_m", "end_m", "uplift_pct", "units", "note"]]
            slim = slim.astype({k: object for k in keys})
            matched = slim.merge(stat, on=keys, how="inner")
            matched = matched[(matched["_m"] >= matched["start_m"]) & (matched["_m"] <= matched["end_m"])]
            matched = matched.assign(scope=product + " " + matched[product].astype(str)
                                     + ((" / " + place + " " + matched[place].astype(str)) if place else ""))
            pieces.append(matched)
    if not pieces:
        return pd.DataFrame(columns=["_eid", "event", "item", "location", "period", "lag", "base", "uplift_pct",
                                     "units", "note", "scope"])
    return pd.concat(pieces, ignore_index=True)


def apply_event_uplifts(
    stat: pd.DataFrame,
    events: pd.DataFrame,
    *,
    items: pd.DataFrame,
    locations: pd.DataFrame,
    audit: bool = True,
) -> tuple[pd.DataFrame, pd.DataFrame | None]:
    """The statistical forecast with marketing's event uplifts applied, and the audit.

    stat: [item, location, period, lag, quantity]; events: [event, item or
    family, location or region (optional), start, end, uplift_pct or units,
    note].  Formulas: module docstring.  An event that matches no cell of
    ``stat`` is warned about (a likely misspelt item or a month outside the
    horizon) and changes nothing.

    Returns (adjusted [item, location, period, lag, quantity],
    audit [event, item, location, period, base, uplift_units, note]);
    ``audit=False`` skips writing the audit's notes (None in its place), for
    a caller that only needs the numbers, such as a past cycle being scored.
    """
    base = stat[["item", "location", "period", "lag", "quantity"]].astype(
        {"item": object, "location": object, "period": object})
    base = base.sort_values(["item", "location", "period"], kind="mergesort").reset_index(drop=True)
    audit_columns = ["event", "item", "location", "period", "base", "uplift_units", "note"]
    if events is None or events.empty:
        return base, pd.DataFrame({c: pd.Series(dtype=object) for c in audit_columns})
    ev = _normalise_events(events)
    cells = base.assign(
        family=base["item"].map(items.drop_duplicates("item").set_index("item")["family"]).astype(object),
        region=base["location"].map(locations.drop_duplicates("location").set_index("location")["region"]).astype(object),
        _m=month_indexes_factorized(base["period"]),
        base=base["quantity"].astype(float),
    ).drop(columns=["quantity"])
    matched = _match_events_to_cells(ev, cells)
    unmatched = sorted(set(ev["event"].astype(str)) - set(matched["event"].astype(str)))
    if unmatched:
        warnings.warn(f"event(s) {unmatched} match no cell of the statistical forecast: check the item, family, "
                      "location or region names and that the months fall inside the horizon", stacklevel=2)
    if matched.empty:
        return base, pd.DataFrame({c: pd.Series(dtype=object) for c in audit_columns})

    scope_total = matched.groupby(["_eid", "period"])["base"].transform("sum")
    scope_count = matched.groupby(["_eid", "period"])["base"].transform("size")
    share = np.where(scope_total > 0, matched["base"] / scope_total.where(scope_total > 0, 1.0), 1.0 / scope_count)
    is_units = matched["units"].notna()
    uplift = np.where(is_units, matched["units"].fillna(0.0) * share,
                      matched["base"] * matched["uplift_pct"].fillna(0.0) / 100.0)
    matched = matched.assign(uplift_units=uplift)
    uplift_by_cell = matched.groupby(["item", "location", "period"], sort=True)["uplift_units"].sum()
    adjusted = base.merge(uplift_by_cell.reset_index(), on=["item", "location", "period"], how="left")
    adjusted["quantity"] = np.maximum(0.0, adjusted["quantity"] + adjusted["uplift_units"].fillna(0.0))
    adjusted = adjusted[["item", "location", "period", "lag", "quantity"]]
    if not audit:
        return adjusted, None
    how = np.where(
        is_units,
        matched["units"].map(lambda u: f"{u:g}") + " units for " + matched["scope"]
        + " split by statistical mix (share " + pd.Series(share, index=matched.index).map(lambda s: f"{s:.3f}") + ")",
        matched["uplift_pct"].map(lambda p: f"{p:+g}") + " % of the statistical forecast for " + matched["scope"],
    )
    matched["note"] = np.where(matched["note"].astype(str) != "", matched["note"].astype(str) + ": " + how, how)
    table = matched.sort_values(["item", "location", "period", "_eid"], kind="mergesort")[audit_columns]
    return adjusted, table.reset_index(drop=True)


def uplift_value_added(errors_with: pd.DataFrame, errors_without: pd.DataFrame) -> pd.DataFrame:
    """Did marketing's uplifts make the statistical forecast better? Per lag bucket and overall.

    Both frames are error tables (``forecast_errors``) of the statistical
    forecast, with and without the uplifts, for the same cycles.  Only the
    affected cells count: those whose forecast the uplifts changed.  Gains
    are without − with, so positive means the uplifts helped (forecast value
    added): mad_gain in units, wape_gain in percentage points.

    Returns [lag_bucket, n_cells, mad_without, mad_with, mad_gain,
    wape_without, wape_with, wape_gain, value_added]; lag_bucket "all" is the
    overall row.
    """
    keys = ["cycle", "item", "location", "period"]
    paired = errors_without[keys + ["lag_bucket", "forecast", "actual"]].merge(
        errors_with[keys + ["forecast"]], on=keys, how="inner", suffixes=("_without", "_with"))
    affected = paired[~np.isclose(paired["forecast_with"], paired["forecast_without"], rtol=0, atol=1e-9)]
    affected = affected.assign(
        abs_without=(affected["actual"] - affected["forecast_without"]).abs(),
        abs_with=(affected["actual"] - affected["forecast_with"]).abs(),
    )
    overall = affected.assign(lag_bucket="all")
    both = pd.concat([affected, overall], ignore_index=True)
    grouped = both.groupby("lag_bucket", sort=True)
    out = pd.DataFrame({
        "n_cells": grouped.size(),
        "mad_without": grouped["abs_without"].mean(),
        "mad_with": grouped["abs_with"].mean(),
        "sum_without": grouped["abs_without"].sum(),
        "sum_with": grouped["abs_with"].sum(),
        "sum_actual": grouped["actual"].sum(),
    })
    out["mad_gain"] = out["mad_without"] - out["mad_with"]
    with np.errstate(divide="ignore", invalid="ignore"):
        out["wape_without"] = np.where(out["sum_actual"] != 0, 100 * out["sum_without"] / out["sum_actual"], np.nan)
        out["wape_with"] = np.where(out["sum_actual"] != 0, 100 * out["sum_with"] / out["sum_actual"], np.nan)
    out["wape_gain"] = out["wape_without"] - out["wape_with"]
    out["value_added"] = out["mad_gain"] > 0
    return out.reset_index()[["lag_bucket", "n_cells", "mad_without", "mad_with", "mad_gain", "wape_without",
                              "wape_with", "wape_gain", "value_added"]]
