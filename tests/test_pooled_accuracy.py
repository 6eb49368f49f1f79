"""Pooled accuracy by level: cells summed to groups first, then measured together."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.metrics import mean_absolute_error, mean_squared_error

from consensus.errors import InvalidSpec
from consensus.methods.accuracy import pooled_accuracy

ITEMS = pd.DataFrame({"item": ["A", "B", "C"], "family": ["F1", "F1", "F2"], "unit_price": [1.0, 1.0, 1.0]})
LOCATIONS = pd.DataFrame({"location": ["L1", "L2"], "region": ["R1", "R2"]})


def _errors(seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    keys = pd.MultiIndex.from_product([["A", "B", "C"], ["L1", "L2"], ["2026-01", "2026-02", "2026-03"]],
                                      names=["item", "location", "period"]).to_frame(index=False)
    frame = keys.assign(source="s", cycle="2025-12", lag_bucket="1",
                        actual=rng.integers(0, 50, len(keys)).astype(float))
    frame["forecast"] = np.maximum(frame["actual"] + rng.normal(0, 8, len(keys)), 0)
    frame["error"] = frame["actual"] - frame["forecast"]
    return frame


def test_item_level_equals_scikit_learn_on_the_cells():
    # reference: scikit-learn's mean_absolute_error / mean_squared_error on the raw cells
    e = _errors(3)
    row = pooled_accuracy(e, level="item", items=ITEMS, locations=LOCATIONS).iloc[0]
    assert row["mad"] == pytest.approx(mean_absolute_error(e["actual"], e["forecast"]))
    assert row["mse"] == pytest.approx(mean_squared_error(e["actual"], e["forecast"]))
    assert row["wape"] == pytest.approx(100 * np.abs(e["error"]).sum() / e["actual"].sum())


def test_family_level_measures_the_summed_family_series():
    # reference: the same measures on family totals computed with a plain pandas groupby
    e = _errors(5)
    fam = e.merge(ITEMS, on="item").groupby(["family", "period"])[["actual", "forecast"]].sum()
    row = pooled_accuracy(e, level="family", items=ITEMS, locations=LOCATIONS).iloc[0]
    assert row["n"] == len(fam)
    assert row["mad"] == pytest.approx(mean_absolute_error(fam["actual"], fam["forecast"]))


@pytest.mark.slow
@settings(max_examples=20, deadline=None)
@given(st.integers(0, 10_000))
def test_wape_never_rises_from_item_to_family_to_total(seed):
    # triangle inequality: |Σe| ≤ Σ|e|, so summing cells can only shrink absolute error (common practice)
    e = _errors(seed)
    wape = {lvl: pooled_accuracy(e, level=lvl, items=ITEMS, locations=LOCATIONS)["wape"].iloc[0]
            for lvl in ("item", "family_region", "family", "total")}
    assert wape["total"] <= wape["family"] + 1e-9 <= wape["item"] + 2e-9
    assert wape["family_region"] <= wape["item"] + 1e-9


def test_unknown_level_is_refused():
    with pytest.raises(InvalidSpec):
        pooled_accuracy(_errors(1), level="galaxy", items=ITEMS, locations=LOCATIONS)


def test_tracking_signal_is_the_mean_of_each_groups_own_signal():
    # reference: tracking_signal_series applied to each item × location series by hand (operations-management
    # definition, common practice), then averaged
    from consensus.methods.accuracy import tracking_signal_series

    e = _errors(11)
    by_hand = [tracking_signal_series(g.sort_values("period")["error"].to_numpy())[-1]
               for _, g in e.groupby(["item", "location"])]
    row = pooled_accuracy(e, level="item", items=ITEMS, locations=LOCATIONS).iloc[0]
    assert row["tracking_signal"] == pytest.approx(np.mean(by_hand))
    total = pooled_accuracy(e, level="total", items=ITEMS, locations=LOCATIONS).iloc[0]
    summed = e.groupby("period")["error"].sum().sort_index().to_numpy()
    assert total["tracking_signal"] == pytest.approx(tracking_signal_series(summed)[-1])
