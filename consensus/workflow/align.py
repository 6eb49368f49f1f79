"""Bring one cycle's submitted lines to the planning grain (item × location × month), keeping the trail."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from consensus import periods
from consensus.methods import alignment

ALIGNED_COLUMNS = ["source", "cycle", "item", "location", "period", "lag", "quantity"]
TRACE_COLUMNS = ["source", "submission_id", "row", "item", "location", "period", "submitted", "share",
                 "share_basis", "quantity"]


@dataclass(frozen=True)
class AlignedCycle:
    """A cycle's sources at planning grain, and how each submitted row got there."""

    aligned: pd.DataFrame  # ALIGNED_COLUMNS, one row per source × cell
    traces: pd.DataFrame  # TRACE_COLUMNS, one row per submitted row × cell it touched
    warnings: list[str]


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


def align_lines(lines: pd.DataFrame, *, cycle: str, items: pd.DataFrame, locations: pd.DataFrame,
                actuals: pd.DataFrame, mix_window_months: int = 12) -> AlignedCycle:
    """Spread weeks into months, turn value into units, split groups by historical mix.

    ``lines`` are stored forecast lines of one cycle (any grain); ``actuals`` the
    history known at that cycle, from which the mix is taken.
    """
    if lines.empty:
        return AlignedCycle(pd.DataFrame(columns=ALIGNED_COLUMNS), pd.DataFrame(columns=TRACE_COLUMNS), [])
    rows = lines.reset_index(drop=True).copy()
    rows["row_id"] = np.arange(len(rows))
    rows["submitted"] = describe_rows(rows)
    mix = alignment.historical_mix(actuals[actuals["period"] <= cycle], items=items, locations=locations,
                                   cycle=cycle, window_months=mix_window_months)
    weekly = rows["week"].notna()
    monthly = rows.loc[~weekly].assign(week_share=1.0)
    if weekly.any():
        spread = alignment.spread_weeks(rows.loc[weekly].drop(columns=["period"]))
        monthly = pd.concat([monthly, spread], ignore_index=True)
    in_value = monthly["quantity"].isna() & monthly["value"].notna()
    if in_value.any():
        converted = alignment.value_to_units(monthly.loc[in_value], items=items, mix=mix)
        monthly = pd.concat([monthly.loc[~in_value], converted], ignore_index=True)
    horizon = set(periods.horizon_months(cycle, 60))
    monthly = monthly[monthly["period"].isin(horizon)]
    split, warnings = alignment.split_to_grain(
        monthly[["row_id", "item", "family", "location", "region", "period", "quantity", "week_share"]],
        mix=mix, items=items, locations=locations)
    origin = rows.set_index("row_id")[["source", "submission_id", "row", "submitted"]]
    traced = split.join(origin, on="row_id")
    if "week_share" in traced.columns:
        traced["share"] = traced["share"] * traced["week_share"].fillna(1.0)
    traces = traced[TRACE_COLUMNS].reset_index(drop=True)
    aligned = (traced.groupby(["source", "item", "location", "period"], as_index=False, sort=True)["quantity"].sum())
    aligned["cycle"] = cycle
    aligned["lag"] = periods.lags(aligned["cycle"], aligned["period"])
    return AlignedCycle(aligned[ALIGNED_COLUMNS], traces, list(warnings))
