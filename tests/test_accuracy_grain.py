"""Accuracy at family × region, the grain sales submit at."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.metrics import mean_absolute_error, mean_squared_error

from consensus.methods import accuracy as acc

ITEMS = pd.DataFrame({"item": ["A1", "A2", "B1"], "family": ["FA", "FA", "FB"], "unit_price": 1.0})
LOCATIONS = pd.DataFrame({"location": ["L1", "L2", "L3"], "region": ["R1", "R1", "R2"]})


def _errors(forecast: dict, actual: dict, source: str = "sales", cycle: str = "2026-01") -> pd.DataFrame:
    rows = [(source, cycle, i, l, p, forecast[(i, l, p)]) for (i, l, p) in forecast]
    fc = pd.DataFrame(rows, columns=["source", "cycle", "item", "location", "period", "quantity"])
    act = pd.DataFrame([(i, l, p, q) for (i, l, p), q in actual.items()],
                       columns=["item", "location", "period", "quantity"])
    return acc.forecast_errors(fc, act)


def test_family_region_sums_cells_before_scoring():
    # Hand example: family FA in region R1 has two items at two locations; the source's
    # family × region total is right in 2026-02 although every cell is wrong.
    actual = {("A1", "L1", "2026-02"): 10, ("A2", "L1", "2026-02"): 20, ("A1", "L2", "2026-02"): 5,
              ("A2", "L2", "2026-02"): 5, ("B1", "L3", "2026-02"): 8,
              ("A1", "L1", "2026-03"): 10, ("A2", "L1", "2026-03"): 10, ("A1", "L2", "2026-03"): 0,
              ("A2", "L2", "2026-03"): 0, ("B1", "L3", "2026-03"): 8}
    forecast = {("A1", "L1", "2026-02"): 20, ("A2", "L1", "2026-02"): 10, ("A1", "L2", "2026-02"): 0,
                ("A2", "L2", "2026-02"): 10, ("B1", "L3", "2026-02"): 6,
                ("A1", "L1", "2026-03"): 15, ("A2", "L1", "2026-03"): 15, ("A1", "L2", "2026-03"): 0,
                ("A2", "L2", "2026-03"): 0, ("B1", "L3", "2026-03"): 10}
    errors = _errors(forecast, actual)
    table = acc.accuracy_table(errors, level="family_region", items=ITEMS, locations=LOCATIONS, by=("source",))
    fa = table[(table["family"] == "FA") & (table["region"] == "R1")].iloc[0]
    # By hand: FA × R1 totals are 40 vs 40 (2026-02) and 30 vs 20 (2026-03): errors 0 and −10.
    assert fa["n"] == 2
    assert fa["mad"] == pytest.approx(5.0)
    assert fa["wape"] == pytest.approx(100 * 10 / 60)
    assert fa["bias"] == pytest.approx(-5.0)
    # The same source at item grain is blamed for the split: cell errors 10,10,5,5,5,5 over 50 units.
    item = acc.accuracy_table(errors[errors["item"] != "B1"], level="item", items=ITEMS, locations=LOCATIONS,
                              by=("source",))
    assert (item["mad"] * item["n"]).sum() == pytest.approx(40.0)
    cell = item[(item["item"] == "A1") & (item["location"] == "L1")].iloc[0]
    assert cell["wape"] == pytest.approx(100 * 15 / 20)  # |10 − 20| + |10 − 15| over 20 units


def test_family_region_matches_sklearn_on_group_totals():
    rng = np.random.default_rng(7)
    cells = [(i, l) for i in ITEMS["item"] for l in LOCATIONS["location"]]
    months = [f"2026-{m:02d}" for m in range(2, 8)]
    actual = {(i, l, p): float(rng.integers(0, 50)) for (i, l) in cells for p in months}
    forecast = {k: float(v + rng.normal(0, 6)) for k, v in actual.items()}
    errors = _errors(forecast, actual)
    table = acc.accuracy_table(errors, level="family_region", items=ITEMS, locations=LOCATIONS, by=("source",))
    frame = errors.merge(ITEMS[["item", "family"]], on="item").merge(LOCATIONS, on="location")
    for (family, region), group in frame.groupby(["family", "region"]):
        totals = group.groupby("period")[["forecast", "actual"]].sum()
        row = table[(table["family"] == family) & (table["region"] == region)].iloc[0]
        # Oracle: scikit-learn's MAE / MSE of the group totals (reference library).
        assert row["mad"] == pytest.approx(mean_absolute_error(totals["actual"], totals["forecast"]))
        assert row["mse"] == pytest.approx(mean_squared_error(totals["actual"], totals["forecast"]))
    # Every item sits at every location, so all four family × region groups appear, once each.
    assert sorted(map(tuple, table[["family", "region"]].to_numpy())) == [("FA", "R1"), ("FA", "R2"),
                                                                          ("FB", "R1"), ("FB", "R2")]


@pytest.mark.slow
@settings(max_examples=20, deadline=None)
@given(st.integers(0, 2**31 - 1))
def test_wape_never_rises_as_cells_are_summed(seed):
    # Triangle inequality: Σ_groups |Σ e| ≤ Σ |e| over the same cells and actuals, so WAPE at
    # family × region is at most the item WAPE and at least the total's (common practice, and a
    # property of the absolute value).
    rng = np.random.default_rng(seed)
    cells = [(i, l) for i in ITEMS["item"] for l in LOCATIONS["location"]]
    actual = {(i, l, "2026-04"): float(rng.integers(1, 30)) for (i, l) in cells}
    forecast = {k: float(max(0.0, v + rng.normal(0, 10))) for k, v in actual.items()}
    errors = _errors(forecast, actual)
    wape = {level: acc.accuracy_table(errors, level=level, items=ITEMS, locations=LOCATIONS,
                                      by=("source",))
            for level in ("item", "family_region", "total")}
    item_wape = 100 * errors["error"].abs().sum() / errors["actual"].sum()
    fr_wape = 100 * wape["family_region"]["mad"].mul(wape["family_region"]["n"]).sum() / errors["actual"].sum()
    assert wape["item"]["wape"].notna().all()
    assert fr_wape <= item_wape + 1e-9
    assert wape["total"]["wape"].iloc[0] <= fr_wape + 1e-9


def test_family_region_level_is_known():
    assert acc.LEVEL_KEYS["family_region"] == ("family", "region")
    # Still a closed set: a near-miss spelling is refused.
    from consensus.errors import InvalidSpec
    with pytest.raises(InvalidSpec):
        acc.accuracy_table(_errors({("A1", "L1", "2026-02"): 1}, {("A1", "L1", "2026-02"): 1}),
                           level="family×region", items=ITEMS, locations=LOCATIONS)
