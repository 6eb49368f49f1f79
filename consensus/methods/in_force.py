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


def _key_codes(frames: list[pd.DataFrame], keys: list[str]) -> list[np.ndarray]:
    """One integer per distinct key, shared across ``frames`` (each key column factorised once over all)."""
    lengths = [len(f) for f in frames]
    combined = np.zeros(sum(lengths), dtype=np.int64)
    for column in keys:
        values = np.concatenate([f[column].to_numpy(dtype=object) for f in frames]) if frames else np.array([])
        codes, uniques = pd.factorize(values, use_na_sentinel=False)
        combined = combined * (len(uniques) + 1) + codes
        if len(uniques) and combined.max(initial=0) > 2 ** 62:  # keep the product of sizes in range
            combined = pd.factorize(combined)[0].astype(np.int64)
    return np.split(combined, np.cumsum(lengths)[:-1])


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
    orders = rows[order].to_numpy()
    if (covered is None or covered.empty) and (whole is None or not len(whole)) and (orders == orders[0]).all():
        return rows.reset_index(drop=True)  # one submission: every row is in force
    frames = [rows]
    if covered is not None and len(covered):
        frames.append(covered)
    codes = _key_codes(frames, list(keys))
    all_codes = np.concatenate(codes)
    all_order = np.concatenate([f[order].to_numpy(dtype=np.int64) for f in frames])
    key_of, dense = pd.factorize(all_codes)
    newest = pd.Series(all_order).groupby(key_of, sort=False).max().reindex(range(len(dense))).to_numpy()
    row_key = key_of[: len(rows)]
    keep = rows[order].to_numpy(dtype=np.int64) == newest[row_key]
    if whole is not None and len(whole):
        keep &= rows[order].to_numpy(dtype=np.int64) >= np.max(np.asarray(whole, dtype=np.int64))
    return rows[keep].reset_index(drop=True)


def winner_per_key(rows: pd.DataFrame, *, keys: list[str], covered: pd.DataFrame | None = None,
                   order: str = ORDER) -> pd.DataFrame:
    """[*keys, order] of the submission in force for each key (for status: who answers for what)."""
    frames = [rows[[order, *keys]]]
    if covered is not None and len(covered):
        frames.append(covered[[order, *keys]])
    return newest_covering(pd.concat(frames, ignore_index=True), keys=list(keys), order=order)
