"""Dependent demand: explode the consensus of sellable items through the bill of material.

Each component's gross requirement in month ``t`` is Σ parent demand in month
``t + lead_time`` × quantity per, level by level (a standard MRP explosion;
common practice in materials requirements planning texts).  Lead time is the
parent's assembly lead time in whole months, so a component is needed that
many months before the parent ships.
"""

from __future__ import annotations

import pandas as pd

from consensus import periods

MAX_LEVELS = 25


def bom_cycle(bom: pd.DataFrame) -> list[str] | None:
    """A parent → component loop if the BOM has one (which would explode forever), else None."""
    children = bom.groupby("parent")["component"].apply(list).to_dict()
    state: dict[str, int] = {}
    for root in children:
        stack = [(root, iter(children.get(root, ())))]
        path = [root]
        state[root] = 1
        while stack:
            node, it = stack[-1]
            nxt = next(it, None)
            if nxt is None:
                state[node] = 2
                stack.pop()
                path.pop()
            elif state.get(nxt) == 1:
                return path[path.index(nxt):] + [nxt]
            elif state.get(nxt) is None:
                state[nxt] = 1
                stack.append((nxt, iter(children.get(nxt, ()))))
                path.append(nxt)
    return None


def explode_bom(demand: pd.DataFrame, bom: pd.DataFrame) -> pd.DataFrame:
    """Component requirements [component, parent, level, period, quantity] from demand [item, period, quantity]."""
    columns = ["component", "parent", "level", "period", "quantity"]
    if demand.empty or bom.empty:
        return pd.DataFrame(columns=columns)
    loop = bom_cycle(bom)
    if loop:
        raise ValueError(f"the bill of material has a loop: {' → '.join(loop)}")
    level_demand = demand.groupby(["item", "period"], as_index=False)["quantity"].sum()
    level_demand["month"] = periods.month_indexes(level_demand["period"])
    links = bom[["parent", "component", "qty_per", "lead_time_months"]]
    found = []
    for level in range(1, MAX_LEVELS + 1):
        joined = level_demand.merge(links, left_on="item", right_on="parent")
        if joined.empty:
            break
        joined["quantity"] = joined["quantity"] * joined["qty_per"]
        joined["month"] = joined["month"] - joined["lead_time_months"].astype(int)
        step = joined.groupby(["component", "parent", "month"], as_index=False)["quantity"].sum()
        step["level"] = level
        found.append(step)
        level_demand = (step.groupby(["component", "month"], as_index=False)["quantity"].sum()
                        .rename(columns={"component": "item"}))
    if not found:
        return pd.DataFrame(columns=columns)
    out = pd.concat(found, ignore_index=True)
    out["period"] = periods.month_names(out["month"].to_numpy())
    return out[columns].sort_values(["level", "component", "parent", "period"], ignore_index=True)


def component_totals(exploded: pd.DataFrame) -> pd.DataFrame:
    """Gross requirement per component and month, summed over parents and levels."""
    if exploded.empty:
        return pd.DataFrame(columns=["component", "period", "quantity"])
    return exploded.groupby(["component", "period"], as_index=False)["quantity"].sum()

