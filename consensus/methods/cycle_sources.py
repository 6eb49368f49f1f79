"""One cycle's sources at planning grain (item × location × month), from the submissions in force.

Each submission is aligned on its own (weeks spread into months, value turned
into units, family and region rows split by the historical mix known at the
cycle: :mod:`consensus.methods.alignment`), then each source's value for each
cell is taken from the newest submission covering that cell
(:mod:`consensus.methods.in_force`).  Marketing's events are applied to the
statistical forecast, whose value before them is kept as
``statistical_base``.  The same functions give the trail of one cell for
``explain``, so the audit is recomputed from the stored inputs, never
reconstructed.
"""

from __future__ import annotations

import warnings as warnings_module
from dataclasses import dataclass

import numpy as np
import pandas as pd

from consensus import periods
from consensus.methods import alignment, events
from consensus.methods.in_force import in_force

ALIGNED_COLUMNS = ["source", "item", "location", "period", "quantity"]
TRACE_COLUMNS = ["source", "seq", "submission_id", "row", "item", "location", "period", "submitted", "share",
                 "share_basis", "quantity"]
#: Quantities are carried to a millionth of a unit: far below any unit a plan is read in, and the
#: same digits whether a number was just computed or read back from the store.
QUANTITY_DECIMALS = 6
STATISTICAL, BASE, NAIVE = "statistical", "statistical_base", "naive"


def rounded(values) -> np.ndarray:
    return np.round(np.asarray(values, dtype=float), QUANTITY_DECIMALS) + 0.0  # + 0.0 turns −0 into 0


@dataclass(frozen=True)
class AlignedSources:
    """A cycle's human sources at planning grain, the cells each submission covers, and warnings."""

    aligned: pd.DataFrame  # ALIGNED_COLUMNS, one row per source × cell (in force)
    warnings: list[str]
    traces: pd.DataFrame | None = None


def describe_rows(lines: pd.DataFrame) -> pd.Series:
    """Each submitted row in words, e.g. 'family DRIP-KITS × region NORTH, 2027-01: 1,200 units'."""
    product = np.where(lines["item"].notna(), "item " + lines["item"].astype(str),
                       "family " + lines["family"].astype(str))
    place = np.where(lines["location"].notna(), " × location " + lines["location"].astype(str),
                     np.where(lines["region"].notna(), " × region " + lines["region"].astype(str), " × all locations"))
    when = np.where(lines["week"].notna(), lines["week"].astype(str), lines["period"].astype(str))
    amount = np.where(lines["quantity"].notna(), lines["quantity"].map("{:,.0f} units".format),
                      lines["value"].map("{:,.2f} in value".format))
    return pd.Series(product + place + ", " + when + ": " + amount, index=lines.index)


def _for_columns(lines: pd.DataFrame) -> pd.DataFrame:
    """The columns alignment reads, and no others (every column is carried through the split to grain)."""
    out = lines[[c for c in ("seq", "source", "submission_id", "row", "item", "family", "location", "region",
                             "period", "week", "quantity", "value") if c in lines]]  # a new frame: lines stay as given
    for column in ("item", "family", "location", "region", "period", "week"):
        if column not in out:
            out[column] = None
    for column in ("quantity", "value"):
        out[column] = pd.to_numeric(out[column], errors="coerce").astype(float) if column in out else np.nan
    return out


def align_submissions(lines: pd.DataFrame, *, cycle: str, items: pd.DataFrame, locations: pd.DataFrame,
                      mix, with_traces: bool = False) -> tuple[pd.DataFrame, list[str], pd.DataFrame | None]:
    """Every submission's rows at planning grain, kept apart by ``seq``: [seq, source, item, location, period, quantity].

    ``lines``: the checked lines of the cycle's submissions with ``seq``,
    ``submission_id`` and ``source``; rows outside the cycle's months (60
    ahead) are left out.  A submission's rows that reach the same cell are
    summed (a file may give a family row and an item row of it).  ``mix``:
    the historical mix (:func:`consensus.methods.alignment.historical_mix`),
    or a function giving it for the levels the rows need; rows given at item
    × location × month in units need none and are taken as they are.
    """
    empty = pd.DataFrame({c: pd.Series(dtype=float if c == "quantity" else object)
                          for c in ["seq", *ALIGNED_COLUMNS]})
    if lines.empty:
        return empty, [], None
    rows = _for_columns(lines).reset_index(drop=True)
    rows["row_id"] = np.arange(len(rows))
    horizon = set(periods.horizon_months(cycle, 60))
    direct = (rows["item"].notna() & rows["location"].notna() & rows["period"].notna() & rows["week"].isna()
              & rows["quantity"].notna()).to_numpy()
    parts, warnings, traced_parts = [], [], []
    keys = ["seq", "source", "item", "location", "period", "quantity"]
    in_grain = direct & rows["period"].isin(horizon).to_numpy()
    at_grain = rows.loc[in_grain] if with_traces else rows.loc[in_grain, keys]
    if len(at_grain):
        parts.append(at_grain[keys])
        if with_traces:
            traced_parts.append(at_grain.assign(share=1.0, share_basis=alignment.GIVEN_AT_PAIR))
    rest = rows.loc[~direct]
    # Only the trace needs each piece's submission, row and share; the sum needs its file and source.
    origin = rows.set_index("row_id")[["seq", "source", "submission_id", "row"] if with_traces else ["seq", "source"]]
    if not with_traces:
        del rows  # a big catalogue's lines are gigabytes: let each copy go as soon as it is read
    mixed_seqs: set = set()
    if len(rest):
        weekly = rest["week"].notna()
        monthly = rest.loc[~weekly].assign(week_share=1.0)
        if weekly.any():
            spread = alignment.spread_weeks(rest.loc[weekly].drop(columns=["period"]))
            monthly = pd.concat([monthly, spread], ignore_index=True)
            del spread
        del rest, weekly
        monthly = monthly[monthly["period"].isin(horizon)]
        in_value = (monthly["quantity"].isna() & monthly["value"].notna()).to_numpy()
        needed = alignment.levels_of(monthly)
        the_mix = mix(needed) if callable(mix) else mix
        if in_value.any():
            converted = alignment.value_to_units(monthly.loc[in_value], items=items, mix=the_mix)
            monthly = pd.concat([monthly.loc[~in_value], converted], ignore_index=True)
        split, split_warnings = alignment.split_to_grain(
            monthly[["row_id", "item", "family", "location", "region", "period", "quantity", "week_share"]],
            mix=the_mix, items=items, locations=locations)
        warnings += split_warnings
        traced = split[["row_id", "item", "location", "period", "quantity", "share", "share_basis", "week_share"]
                       if with_traces else ["row_id", "item", "location", "period", "quantity"]].join(origin, on="row_id")
        del split, monthly
        grouped = traced.groupby(["seq", "source", "item", "location", "period"], as_index=False, sort=False)[
            "quantity"].sum()
        parts.append(grouped)
        mixed_seqs = set(grouped["seq"]) & set(at_grain["seq"])
        if with_traces:
            traced["share"] = traced["share"] * traced["week_share"].fillna(1.0)
            traced_parts.append(traced)
        del traced
    aligned = pd.concat(parts, ignore_index=True) if parts else empty
    if mixed_seqs:  # a file that gives both item rows and group rows of the same cells: its parts add up
        mixed = aligned["seq"].isin(mixed_seqs)
        summed = aligned[mixed].groupby(["seq", "source", "item", "location", "period"], as_index=False,
                                        sort=False)["quantity"].sum()
        aligned = pd.concat([aligned[~mixed], summed], ignore_index=True)
    traces = None
    if with_traces:
        described = describe_rows(rows).rename("submitted")
        traces = pd.concat(traced_parts, ignore_index=True).join(described, on="row_id")[TRACE_COLUMNS]
        traces = traces.reset_index(drop=True)
    return aligned[["seq", *ALIGNED_COLUMNS]], list(warnings), traces


def declared_cells(submissions: pd.DataFrame, *, items: pd.DataFrame, locations: pd.DataFrame) -> pd.DataFrame:
    """[seq, source, item, location, period]: every cell each declared scope covers in the months it carries."""
    from consensus.intake.scope import scope_locations

    parts = []
    item_codes = items["item"].astype(object).to_numpy()
    for sub in submissions.itertuples(index=False):  # one entry per declared file, each vectorised over its cells
        detail = sub.scope_detail if isinstance(sub.scope_detail, dict) else {}
        if not detail.get("declared") or detail.get("place") == "events":
            continue
        places = np.array(scope_locations(detail, locations), dtype=object)
        months = np.array(list(sub.months or []), dtype=object)
        if not len(places) or not len(months):
            continue
        n = len(item_codes) * len(places) * len(months)
        parts.append(pd.DataFrame({
            "seq": np.full(n, sub.seq), "source": np.full(n, sub.source, dtype=object),
            "item": np.repeat(item_codes, len(places) * len(months)),
            "location": np.tile(np.repeat(places, len(months)), len(item_codes)),
            "period": np.tile(months, len(item_codes) * len(places))}))
    if not parts:
        return pd.DataFrame({c: pd.Series(dtype=object) for c in ["seq", "source", "item", "location", "period"]})
    return pd.concat(parts, ignore_index=True)


def sources_in_force(aligned: pd.DataFrame, covered: pd.DataFrame) -> pd.DataFrame:
    """Each source's value per cell from the newest submission covering it: ALIGNED_COLUMNS."""
    kept = in_force(aligned, keys=["source", "item", "location", "period"], covered=covered)
    kept = kept.assign(quantity=rounded(kept["quantity"]))
    return kept[ALIGNED_COLUMNS].sort_values(["source", "item", "location", "period"], kind="mergesort",
                                             ignore_index=True)


def events_in_force(event_lines: pd.DataFrame, submissions: pd.DataFrame) -> pd.DataFrame:
    """Event rows in force: an event is replaced by name by a newer file; a file declared 'all' replaces all."""
    if event_lines.empty:
        return event_lines
    whole = submissions.loc[submissions["scope_detail"].map(
        lambda d: isinstance(d, dict) and d.get("declared") and d.get("place") == "all"), "seq"]
    return in_force(event_lines, keys=["event"], whole=whole)


def apply_events(stat: pd.DataFrame, cycle_events: pd.DataFrame, *, items: pd.DataFrame,
                 locations: pd.DataFrame) -> tuple[pd.DataFrame, list[str]]:
    """[source, item, location, period, quantity] rows of statistical (events applied) and statistical_base.

    Only the cells an event can reach (its items or its families' items, in
    the months of any event) are handed to
    :func:`consensus.methods.events.apply_event_uplifts`; every other cell
    keeps its statistical number.  Returns (frame, warnings); the per-cell
    audit of each uplift is :func:`consensus.methods.events.apply_event_uplifts`'s.
    """
    base = stat.assign(source=BASE)
    if cycle_events.empty or stat.empty:
        return pd.concat([stat.assign(source=STATISTICAL), base], ignore_index=True)[ALIGNED_COLUMNS], []
    named_items = set(cycle_events["item"].dropna()) if "item" in cycle_events else set()
    named_families = set(cycle_events["family"].dropna()) if "family" in cycle_events else set()
    reached = set(items.loc[items["family"].isin(named_families), "item"]) | named_items
    first, last = str(cycle_events["start"].min()), str(cycle_events["end"].max())
    periods_text = stat["period"].astype(str)
    candidate = (stat["item"].isin(reached) & (periods_text >= first) & (periods_text <= last)).to_numpy()
    subset = stat.loc[candidate, ["item", "location", "period", "quantity"]].reset_index(drop=True)
    with warnings_module.catch_warnings(record=True) as caught:
        warnings_module.simplefilter("always")
        adjusted, _ = events.apply_event_uplifts(subset.assign(lag=0), cycle_events, items=items,
                                                 locations=locations, audit=False)
    positions = np.flatnonzero(candidate)
    where = pd.MultiIndex.from_frame(subset[["item", "location", "period"]].astype(object)).get_indexer(
        pd.MultiIndex.from_frame(adjusted[["item", "location", "period"]].astype(object)))
    quantity = stat["quantity"].to_numpy(dtype=float).copy()
    quantity[positions[where]] = rounded(adjusted["quantity"].to_numpy(dtype=float))
    with_events = stat.assign(source=STATISTICAL, quantity=quantity)
    frame = pd.concat([with_events[ALIGNED_COLUMNS], base[ALIGNED_COLUMNS]], ignore_index=True)
    return frame, [str(w.message) for w in caught]
