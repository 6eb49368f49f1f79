"""The review meeting's decisions applied on top of the computed consensus (pure: frames in, frames out).

A decision names a scope (an item or a family, at a location, a region or all
locations) and a month.  Set, delta and percent changes apply to the scope's
total and spread to its cells by the consensus mix of that month, so a family
override keeps the items' proportions (a cell with no consensus in an all-zero
scope gets an equal share).  Decisions apply in the order they were made.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

KINDS = ("set", "delta", "pct")
DECISION_COLUMNS = ["id", "at", "author", "item", "family", "location", "region", "period", "kind", "amount", "reason"]


def apply_decisions(table: pd.DataFrame, decisions: pd.DataFrame, *, items: pd.DataFrame, locations: pd.DataFrame,
                    band_columns: list[str]) -> tuple[pd.DataFrame, list[dict]]:
    """The table with every decision applied; the computed number kept as ``before_override``.

    ``band_columns`` (lower_80, upper_80, …) move with the number they
    surround: scaled by after/before, or shifted where the number was 0.
    Returns (table, one dict per decision: id, cells, before, after).
    """
    table = table.copy()
    table["before_override"] = np.nan
    if decisions.empty:
        return table, []
    cells = table.merge(items[["item", "family"]], on="item", how="left").merge(
        locations[["location", "region"]], on="location", how="left")
    applied = []
    for d in decisions.sort_values("id", kind="mergesort").itertuples(index=False):  # a handful, each vectorised
        mask = (cells["period"] == d.period).to_numpy().copy()
        for column in ("item", "family", "location", "region"):
            value = getattr(d, column)
            if value is not None and not pd.isna(value):
                mask &= (cells[column] == value).to_numpy()
        if not mask.any():
            applied.append({"id": int(d.id), "cells": 0, "note": "no consensus cells in scope"})
            continue
        before = cells.loc[mask, "consensus"].to_numpy(dtype=float)
        total = before.sum()
        target = {"set": d.amount, "delta": total + d.amount, "pct": total * (1 + d.amount / 100.0)}[d.kind]
        target = max(target, 0.0)
        shares = before / total if total > 0 else np.full(len(before), 1.0 / len(before))
        after = target * shares
        first_touch = cells.loc[mask, "before_override"].isna().to_numpy()
        idx = cells.index[mask]
        cells.loc[idx[first_touch], "before_override"] = before[first_touch]
        cells.loc[idx, "consensus"] = after
        ratio = np.divide(after, before, out=np.ones_like(after), where=before > 0)
        shift = np.where(before > 0, 0.0, after - before)
        for lo, hi in zip(band_columns[0::2], band_columns[1::2]):
            if lo in cells.columns:
                cells.loc[idx, lo] = np.maximum(cells.loc[idx, lo].to_numpy(dtype=float) * ratio + shift, 0.0)
                cells.loc[idx, hi] = cells.loc[idx, hi].to_numpy(dtype=float) * ratio + shift
        applied.append({"id": int(d.id), "cells": int(mask.sum()), "before": float(total), "after": float(target)})
    return cells.drop(columns=["family", "region"]), applied


def decision_scope(decisions: pd.DataFrame) -> pd.Series:
    """Each decision's scope in words, e.g. 'family SPRINKLERS × region SOUTH'."""
    product = np.where(decisions["item"].notna(), "item " + decisions["item"].astype(str),
                       "family " + decisions["family"].astype(str))
    place = np.where(decisions["location"].notna(), " × " + decisions["location"].astype(str),
                     np.where(decisions["region"].notna(), " × region " + decisions["region"].astype(str), ""))
    return pd.Series(product + place, index=decisions.index)
