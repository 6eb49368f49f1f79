"""Which submission is in force: the one rule, for every kind of input.

Each value a source gives for a cell comes from exactly one submission: the
newest one whose scope covers that cell.  "Newest" is the order in which the
store accepted the submissions (``seq``, the journal position); "covers"
depends on the kind:

* a forecast file covers the planning cells (item × location × month) its rows
  reach, and, when its scope was declared ("region NORTH", "location DC-N1"
  or "all"), every cell of that scope in the months it carries — so a
  corrected file for one location replaces that location's part of an earlier
  two-location file and nothing else, and a row a declared file leaves out is
  no longer forecast by that source;
* a master-data or order-history file covers the keys it carries (items,
  locations, BOM lines, item × location × month of orders); a master file
  loaded with ``replace`` covers every key, so what it leaves out is removed;
* an events file covers the events it names (an event is replaced by name),
  or every event when its scope is declared "all".

Resubmitting an older version makes it the newest, so it is in force again.
Nothing is added up across submissions: a cell has one value per source.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from consensus.errors import InvalidSpec

ORDER = "seq"


def newest_covering(covered: pd.DataFrame, *, keys: list[str], order: str = ORDER) -> pd.DataFrame:
    """For each key, the highest ``order`` among the entries covering it: [*keys, order]."""
    missing = [c for c in (*keys, order) if c not in covered.columns]
    if missing:
        raise InvalidSpec(f"coverage lacks columns {missing}")
    if covered.empty:
        return pd.DataFrame({c: pd.Series(dtype=covered[c].dtype) for c in (*keys, order)})
    return covered.groupby(list(keys), sort=True, observed=True)[order].max().reset_index()


def in_force(rows: pd.DataFrame, *, keys: list[str], covered: pd.DataFrame | None = None,
             whole: pd.Series | None = None, order: str = ORDER) -> pd.DataFrame:
    """The rows in force: each key's rows from the newest submission covering it.

    rows: every row of every candidate submission, with ``order`` and ``keys``
    (a key may carry several rows within one submission; all are kept).
    covered: extra [order, *keys] a submission covers without a row (declared
    scopes); a key whose newest coverer has no row for it is dropped.
    whole: the ``order`` of submissions that cover every key (a master file
    loaded with replace); a key is dropped unless a row of it is at least as
    new as the newest of them.
    Returns the kept rows in their original order.
    """
    if rows.empty:
        return rows
    frames = [rows[[order, *keys]]]
    if covered is not None and len(covered):
        frames.append(covered[[order, *keys]])
    winners = newest_covering(pd.concat(frames, ignore_index=True), keys=list(keys), order=order)
    if whole is not None and len(whole):
        winners = winners[winners[order] >= np.max(np.asarray(whole))]
    marked = rows.reset_index().merge(winners, on=[*keys, order], how="inner", sort=False)
    return marked.sort_values("index", kind="mergesort").drop(columns="index").reset_index(drop=True)


def winner_per_key(rows: pd.DataFrame, *, keys: list[str], covered: pd.DataFrame | None = None,
                   order: str = ORDER) -> pd.DataFrame:
    """[*keys, order] of the submission in force for each key (for status: who answers for what)."""
    frames = [rows[[order, *keys]]]
    if covered is not None and len(covered):
        frames.append(covered[[order, *keys]])
    return newest_covering(pd.concat(frames, ignore_index=True), keys=list(keys), order=order)
