"""The review meeting's decisions: overrides with a reason and an author, applied on top of the computed consensus.

A decision names a scope (an item or a family, at a location, a region or all
locations) and a month.  Set, delta and percent changes apply to the scope's
total and spread to its cells by the consensus mix of that month, so a family
override keeps the items' proportions (a cell with no consensus in an all-zero
scope gets an equal share).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from sqlalchemy import select

from consensus import periods
from consensus.errors import ConsensusError
from consensus.store import frames
from consensus.store.db import session_scope
from consensus.store.models import Decision
from consensus.workflow.cycles import get_cycle

KINDS = ("set", "delta", "pct")


def record_decision(cycle: str, *, period: str, amount: float, reason: str, author: str, kind: str = "set",
                    item: str | None = None, family: str | None = None, location: str | None = None,
                    region: str | None = None, url=None) -> Decision:
    """Store one decision after checking that its scope exists and it has a reason."""
    if kind not in KINDS:
        raise ConsensusError(f"kind must be one of {', '.join(KINDS)}, not {kind!r}")
    if not reason.strip() or not author.strip():
        raise ConsensusError("a decision needs a reason and an author")
    if (item is None) == (family is None):
        raise ConsensusError("name exactly one of --item or --family")
    if location is not None and region is not None:
        raise ConsensusError("name at most one of --location or --region")
    if kind == "set" and amount < 0:
        raise ConsensusError("a set decision cannot make demand negative")
    with session_scope(url) as session:
        c = get_cycle(session, cycle)
        if period not in periods.horizon_months(c.name, c.horizon):
            raise ConsensusError(f"period {period} is outside cycle {cycle}'s horizon")
        items, locations = frames.load_items(session), frames.load_locations(session)
        for value, column, frame in ((item, "item", items), (family, "family", items),
                                     (location, "location", locations), (region, "region", locations)):
            if value is not None and value not in set(frame[column]):
                raise ConsensusError(f"unknown {column} {value!r}")
        decision = Decision(cycle=cycle, period=period, amount=float(amount), reason=reason.strip(),
                            author=author.strip(), kind=kind, item=item, family=family, location=location,
                            region=region)
        session.add(decision)
        session.flush()
        return decision


def load_decisions(session, cycle: str) -> pd.DataFrame:
    columns = ["id", "at", "author", "item", "family", "location", "region", "period", "kind", "amount", "reason"]
    d = Decision.__table__
    return frames.read_frame(session, select(*[d.c[c] for c in columns]).where(d.c.cycle == cycle).order_by(d.c.id),
                             columns)


def decision_scope(decisions: pd.DataFrame) -> pd.Series:
    """Each decision's scope in words, e.g. 'family SPRINKLERS × region SOUTH'."""
    product = np.where(decisions["item"].notna(), "item " + decisions["item"].astype(str),
                       "family " + decisions["family"].astype(str))
    place = np.where(decisions["location"].notna(), " × " + decisions["location"].astype(str),
                     np.where(decisions["region"].notna(), " × region " + decisions["region"].astype(str), ""))
    return pd.Series(product + place, index=decisions.index)


def apply_decisions(session, cycle: str, table: pd.DataFrame, *, items: pd.DataFrame,
                    locations: pd.DataFrame) -> tuple[pd.DataFrame, list[dict]]:
    """Apply the cycle's decisions in the order they were made; keep the computed number as ``before_override``."""
    found = load_decisions(session, cycle)
    table = table.copy()
    table["before_override"] = np.nan
    if found.empty:
        return table, []
    cells = table.merge(items[["item", "family"]], on="item").merge(locations[["location", "region"]], on="location")
    applied = []
    for d in found.itertuples(index=False):  # a handful of decisions, each vectorised over its cells
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
        shift = np.where(before > 0, 0.0, after - before)  # a band around zero moves with the new number
        for lo, hi in (("lower_80", "upper_80"), ("lower_95", "upper_95")):
            if lo in cells.columns:  # the band moves with the number it surrounds
                cells.loc[idx, lo] = np.maximum(cells.loc[idx, lo].to_numpy(dtype=float) * ratio + shift, 0.0)
                cells.loc[idx, hi] = cells.loc[idx, hi].to_numpy(dtype=float) * ratio + shift
        applied.append({"id": int(d.id), "cells": int(mask.sum()), "before": float(total), "after": float(target)})
    return cells.drop(columns=["family", "region"]), applied
