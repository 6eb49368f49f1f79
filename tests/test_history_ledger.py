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
    # pandas sums with compensation, the ledger in plain row order: the same to rounding, counts exactly
    pd.testing.assert_frame_equal(mine, reference, check_exact=False, rtol=1e-12, check_dtype=False)
    assert (mine["n"].to_numpy() == reference["n"].to_numpy()).all() and mine["n"].dtype.kind == "i"


def test_a_groups_sum_is_its_own_rows_added_in_order_so_a_leading_cycle_code_changes_no_digit():
    """Sequential left-to-right addition (a reduce over +, the plain float sum) is the reference, group by group;
    and summing several cycles at once with their code leading the key gives each cycle its own digits."""
    from functools import reduce
    from operator import add

    from consensus.methods.history import _sums_by

    rng = np.random.default_rng(11)
    n = 3000
    cycle = np.repeat(np.arange(3), n)
    source = rng.integers(0, 4, 3 * n)
    x = np.round(rng.gamma(1.0, 80.0, 3 * n), 2) * 1.37  # magnitudes where addition order shows in the digits
    together = _sums_by({"k": cycle, "source": source}, pd.DataFrame({"x": x}))
    for k in range(3):
        rows = slice(k * n, (k + 1) * n)
        alone = _sums_by({"source": source[rows]}, pd.DataFrame({"x": x[rows]}))
        mine = together[together["k"] == k]
        assert mine["x"].tolist() == alone["x"].tolist()
        for s in range(4):
            values = x[rows][source[rows] == s].tolist()
            assert alone.loc[alone["source"] == s, "x"].item() == reduce(add, values)


def test_cycles_scored_together_or_in_any_row_order_give_the_digits_of_cycles_scored_one_by_one():
    """The ledger's batched pass (small catalogues) against its own one-cycle pass: every summary frame equal.

    The reference for the figures themselves is the first tests' plain pandas sums; this one checks that the
    batching is invisible, so a store's plan does not depend on its size class."""
    rng = np.random.default_rng(3)

    def cycle(name, months):
        rows = []
        for source in ("sales", "statistical", "statistical_base", "dc"):
            for item, location in (("A", "L1"), ("B", "L2"), ("N", "L1")):
                for month in months:
                    rows.append((source, item, location, month, float(rng.gamma(2.0, 5.0))))  # unrounded
        return pd.DataFrame(rows, columns=["source", "item", "location", "period", "quantity"])

    batch = [("2025-12", cycle("2025-12", MONTHS[:3])), ("2026-01", cycle("2026-01", MONTHS[1:])),
             ("2026-02", cycle("2026-02", MONTHS[2:]))]
    book = build_series_book(ACTUALS, items=ITEMS, locations=LOCATIONS, cycle="2026-04")
    sources = ("sales", "statistical", "statistical_base", "dc")
    together = HistoryLedger(book=book, cycle="2026-04", segment="family", sources=sources, keep_cells=True)
    together.add_cycles([(name, frame, None) for name, frame in batch])
    apart = HistoryLedger(book=book, cycle="2026-04", segment="family", sources=sources, keep_cells=True)
    for name, frame in batch:
        apart.add_cycle(name, frame)
    chunked = HistoryLedger(book=book, cycle="2026-04", segment="family", sources=sources, keep_cells=True)
    chunked.add_cycles([(name, frame, None) for name, frame in batch[:2]])  # passes of two cycles and one
    chunked.add_cycles([(name, frame, None) for name, frame in batch[2:]])
    for ledger in (together, chunked):  # running sums: added cycle by cycle, as one-by-one merges add them
        assert np.array_equal(ledger._cell_acc, apart._cell_acc)
    shuffled = HistoryLedger(book=book, cycle="2026-04", segment="family", sources=sources, keep_cells=True)
    shuffled.add_cycles([(name, frame.sample(frac=1.0, random_state=5), None) for name, frame in batch])
    mine, reference = together.summary().frames(), apart.summary().frames()
    assert mine.keys() == reference.keys()
    for name in mine:
        pd.testing.assert_frame_equal(mine[name], reference[name], check_exact=True, obj=name)
        pd.testing.assert_frame_equal(chunked.summary().frames()[name], reference[name], check_exact=True, obj=name)
    # rows in another order (fits gathered in other groups, say): the same digits where the figures are sums
    for name in ("cell_sums", "pattern_sums", "node_errors", "history", "fva", "cell_signals", "cell_errors"):
        pd.testing.assert_frame_equal(shuffled.summary().frames()[name], reference[name], check_exact=True, obj=name)
    assert len(mine["node_errors"]) and len(mine["uplift"]) and len(mine["dc_forecasts"])
