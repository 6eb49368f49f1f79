"""The history ledger's group totals: what a source forecast for a group is scored against the group's orders.

The reference is a plain pandas sum of the same table (a group's forecast is
the sum of its members' forecasts: common practice, the bottom-up total).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from consensus.methods.accuracy import forecast_errors
from consensus.methods.history import HistoryLedger, build_series_book

ITEMS = pd.DataFrame({"item": ["A", "B", "N"], "family": ["F1", "F1", "F1"]})
LOCATIONS = pd.DataFrame({"location": ["L1", "L2"], "region": ["R1", "R1"]})
MONTHS = ["2026-01", "2026-02", "2026-03", "2026-04"]
ACTUALS = pd.DataFrame({"item": ["A", "A", "A", "A", "B", "B"], "location": ["L1"] * 4 + ["L2"] * 2,
                        "period": MONTHS + ["2026-01", "2026-03"], "quantity": [10.0, 12.0, 9.0, 11.0, 5.0, 7.0]})
# cycle 2026-01 forecast months 2–4; N is a launch at L1 that never sold.
FORECASTS = pd.DataFrame({
    "source": "sales", "item": ["A"] * 3 + ["B"] * 3 + ["N"] * 3, "location": ["L1"] * 3 + ["L2"] * 3 + ["L1"] * 3,
    "period": MONTHS[1:] * 3, "quantity": [11.0, 11.0, 11.0, 6.0, 6.0, 6.0, 4.0, 4.0, 4.0]})


def _ledger(actuals=ACTUALS, forecasts=FORECASTS, unknown_at=()) -> pd.DataFrame:
    book = build_series_book(actuals, items=ITEMS, locations=LOCATIONS, cycle="2026-04", unknown_at=unknown_at)
    ledger = HistoryLedger(book=book, cycle="2026-04", segment="family", sources=("sales",))
    ledger.add_cycle("2026-01", forecasts)
    return ledger.summary()


def test_a_launch_that_never_sold_counts_at_zero_in_its_groups_but_not_on_its_own():
    summary = _ledger()
    family = summary.node_errors[summary.node_errors["level"] == "family"].sort_values("period")
    # the reference: every forecast of the family summed, against every order of the family (0 where none)
    orders = ACTUALS[ACTUALS["period"].isin(MONTHS[1:])].groupby("period")["quantity"].sum()
    expected = FORECASTS.groupby("period")["quantity"].sum()
    np.testing.assert_allclose(family["forecast"].to_numpy(), expected.to_numpy())
    np.testing.assert_allclose(family["actual"].to_numpy(), orders.reindex(expected.index, fill_value=0).to_numpy())
    assert family["forecast"].sum() == pytest.approx(3 * (11 + 6 + 4))
    # on its own, N is not scored (the zero-demand rule of forecast_errors): cells agree with that reference
    reference = forecast_errors(FORECASTS.assign(cycle="2026-01"), ACTUALS)
    assert set(reference["item"]) == {"A", "B"}
    assert summary.cell_sums["n"].sum() == len(reference)
    assert summary.cell_sums["sum_abs"].sum() == pytest.approx(reference["error"].abs().sum())


def test_a_launch_is_not_scored_where_its_location_orders_are_unknown():
    """L1's April orders are not in: the launch at L1 is left out of April's totals, like the cells of L1."""
    summary = _ledger(unknown_at=[("L1", "2026-04")])
    location = summary.node_errors[(summary.node_errors["level"] == "location")
                                   & (summary.node_errors["node_location"] == "L1")]
    assert sorted(location["period"]) == ["2026-02", "2026-03"]
    np.testing.assert_allclose(location.sort_values("period")["forecast"], [15.0, 15.0])


def test_a_whole_new_family_gets_its_own_group():
    items = pd.concat([ITEMS, pd.DataFrame({"item": ["Z"], "family": ["F9"]})], ignore_index=True)
    book = build_series_book(ACTUALS, items=items, locations=LOCATIONS, cycle="2026-04")
    ledger = HistoryLedger(book=book, cycle="2026-04", segment="family", sources=("sales",))
    ledger.add_cycle("2026-01", pd.DataFrame({"source": "sales", "item": "Z", "location": "L2",
                                              "period": MONTHS[1:], "quantity": 3.0}))
    nodes = ledger.summary().node_errors
    new = nodes[(nodes["level"] == "family") & (nodes["node_item"] == "F9")]
    assert len(new) == 3 and (new["forecast"] == 3.0).all() and (new["actual"] == 0.0).all()


def test_the_process_memo_lets_the_least_recently_used_go_beyond_its_limit():
    """LRU eviction by bytes (common practice for a bounded cache)."""
    from consensus.store.cache import ProcessMemo

    memo = ProcessMemo(limit_bytes=10)
    memo.put("a", b"1234")
    memo.put("b", b"5678")
    assert memo.get("a") == b"1234"  # a is now the most recently used
    memo.put("c", b"90ab")  # 12 bytes > 10: b goes
    assert memo.get("b") is None and memo.get("a") == b"1234" and memo.get("c") == b"90ab"
    assert memo.size == 8
    memo.put("big", b"x" * 11)  # larger than the whole memo: not kept, nothing else lost
    assert memo.get("big") is None and memo.size == 8


def test_sums_by_folded_keys_equal_a_grouping_on_several_columns():
    """The folded-key sums against pandas' own multi-column groupby (the reference), order and values."""
    from consensus.methods.history import _sums_by

    rng = np.random.default_rng(7)
    keys = {"a": rng.integers(-2, 3, 500), "b": rng.integers(0, 7, 500), "c": rng.integers(10, 14, 500)}
    values = pd.DataFrame({"x": rng.normal(size=500), "n": np.ones(500, dtype=int)})
    mine = _sums_by(keys, values)
    reference = values.assign(**keys).groupby(["a", "b", "c"], sort=True)[["x", "n"]].sum().reset_index()
    pd.testing.assert_frame_equal(mine, reference, check_exact=True, check_dtype=False)
