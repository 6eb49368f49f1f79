"""Accuracy by demand pattern: WAPE, MASE and bias apart for smooth, erratic, intermittent and lumpy series."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import mean_absolute_error

from consensus.errors import InvalidSpec
from consensus.methods import accuracy as acc
from consensus.methods.demand_pattern import classify_demand
from consensus.periods import month_index, month_names


def monthly(item: str, location: str, first: str, values) -> pd.DataFrame:
    """History rows for the non-zero months only, as order history lists them."""
    months = month_names(month_index(first) + np.arange(len(values)))
    frame = pd.DataFrame({"item": item, "location": location, "period": months, "quantity": np.asarray(values, float)})
    return frame[frame["quantity"] != 0]


def hand_example():
    # KIT-A smooth: history 10, 12, 11, 13, 12, 14 (2026-01..06) → one-step diffs 2, 1, 2, 1, 2 → scale 8/5.
    # KIT-B intermittent: history 0, 4, 0, 0, 6, 0 (2026-01..06; rows only for the 4 and the 6) → the series
    # runs from its first row (02) to the history's last month (06): 4, 0, 0, 6, 0 → diffs 4, 0, 6, 6 →
    # scale 16/4 = 4.
    history = pd.concat([monthly("KIT-A", "DC-1", "2026-01", [10, 12, 11, 13, 12, 14]),
                         monthly("KIT-B", "DC-1", "2026-01", [0, 4, 0, 0, 6, 0])], ignore_index=True)
    errors = pd.DataFrame({
        "source": "dc", "lag_bucket": "1",
        "item": ["KIT-A", "KIT-A", "KIT-B", "KIT-B"], "location": "DC-1",
        "forecast": [12.0, 12.0, 2.0, 2.0], "actual": [14.0, 10.0, 0.0, 8.0]})
    patterns = pd.DataFrame({"item": ["KIT-A", "KIT-B"], "location": "DC-1", "pattern": ["smooth", "intermittent"]})
    return errors, patterns, history


def test_naive_scale_by_hand():
    _, _, history = hand_example()
    scale = acc.series_naive_scale(history).set_index("item")
    assert scale.loc["KIT-A", "scale"] == pytest.approx(8 / 5) and scale.loc["KIT-A", "n_scale"] == 5
    assert scale.loc["KIT-B", "scale"] == pytest.approx(4.0) and scale.loc["KIT-B", "n_scale"] == 4


def test_accuracy_by_pattern_by_hand():
    # smooth KIT-A: |e| = 2, 2 → WAPE 100·4/24 = 16.67 %, MASE = (2 + 2)/2 / (8/5) = 1.25, bias (2 − 2)/2 = 0.
    # intermittent KIT-B: e = −2, 6 → WAPE 100·8/8 = 100 %, MASE = (2/4 + 6/4)/2 = 1.0, bias 2, bias % 50.
    errors, patterns, history = hand_example()
    table = acc.accuracy_by_pattern(errors, patterns, history).set_index("pattern")
    assert list(table.index) == ["smooth", "intermittent"]
    assert table.loc["smooth", "wape"] == pytest.approx(100 * 4 / 24)
    assert table.loc["smooth", "mase"] == pytest.approx(1.25)
    assert table.loc["smooth", "bias"] == pytest.approx(0.0)
    assert table.loc["intermittent", "wape"] == pytest.approx(100.0)
    assert table.loc["intermittent", "mase"] == pytest.approx(1.0)
    assert table.loc["intermittent", "bias"] == pytest.approx(2.0)
    assert table.loc["intermittent", "bias_pct"] == pytest.approx(50.0)
    assert table.loc["intermittent", "n_zero_actual"] == 1 and table.loc["intermittent", "n_series"] == 1


def test_mase_and_wape_match_scikit_learn():
    # Oracle scikit-learn's mean_absolute_error: for each series MASE_i = MAE(actual, forecast) /
    # MAE(y[1:], y[:-1]) (Hyndman & Koehler 2006); pooling the scaled errors of a class weighs each series
    # by its number of forecasts.  WAPE = 100 · n · MAE / Σ actual.  Invented data, fixed seed.
    rng = np.random.default_rng(4)
    history, errors, expected = [], [], {}
    for k in range(6):
        y = rng.poisson(3 if k < 3 else 40, size=30).astype(float)
        y[rng.random(30) < (0.6 if k < 3 else 0.0)] = 0.0
        y[0] = max(y[0], 1.0)  # the series starts at its first row
        item = f"IT-{k}"
        history.append(monthly(item, "DC-1", "2024-01", y))
        n = 5 + k
        actual = rng.poisson(3 if k < 3 else 40, size=n).astype(float)
        forecast = rng.uniform(0, 6 if k < 3 else 60, size=n)
        errors.append(pd.DataFrame({"source": "stat", "lag_bucket": "2-3", "item": item, "location": "DC-1",
                                    "forecast": forecast, "actual": actual}))
        expected[item] = (mean_absolute_error(actual, forecast) / mean_absolute_error(y[1:], y[:-1]), n,
                          mean_absolute_error(actual, forecast), actual.sum())
    history = pd.concat(history, ignore_index=True)
    errors = pd.concat(errors, ignore_index=True)
    patterns = pd.DataFrame({"item": [f"IT-{k}" for k in range(6)], "location": "DC-1",
                             "pattern": ["lumpy"] * 3 + ["smooth"] * 3})
    table = acc.accuracy_by_pattern(errors, patterns, history).set_index("pattern")
    for pattern, members in (("lumpy", ["IT-0", "IT-1", "IT-2"]), ("smooth", ["IT-3", "IT-4", "IT-5"])):
        mase, n, mae, total = (np.array([expected[m][j] for m in members]) for j in range(4))
        assert table.loc[pattern, "mase"] == pytest.approx(np.sum(mase * n) / np.sum(n))
        assert table.loc[pattern, "wape"] == pytest.approx(100 * np.sum(mae * n) / np.sum(total))
        assert table.loc[pattern, "n"] == n.sum() and table.loc[pattern, "n_series"] == 3


def test_seasonal_scale_differences_twelve_months():
    # Hyndman & Koehler (2006) seasonal form: scale = mean |y_t − y_{t−12}|; oracle scikit-learn on the
    # shifted history.
    rng = np.random.default_rng(9)
    y = rng.poisson(20, size=36).astype(float) + 1
    history = monthly("IT-S", "DC-2", "2023-01", y)
    scale = acc.series_naive_scale(history, season=12)
    assert scale["scale"].iloc[0] == pytest.approx(mean_absolute_error(y[12:], y[:-12]))
    assert scale["n_scale"].iloc[0] == 24


def test_patterns_from_the_classifier_and_unclassified_series():
    # The class map can come straight from demand_pattern.classify_demand (Syntetos, Boylan & Croston 2005);
    # a series the map does not name is scored as "unclassified" rather than dropped.
    errors, _, history = hand_example()
    wide = np.array([[10, 12, 11, 13, 12, 14], [0, 4, 0, 0, 6, 0]], dtype=float)
    classes = classify_demand(wide, np.array([0, 1]))
    patterns = pd.DataFrame({"item": ["KIT-A", "KIT-B"], "location": "DC-1", "pattern": classes})
    table = acc.accuracy_by_pattern(errors, patterns.iloc[:1], history)
    assert set(table["pattern"]) == {classes[0], "unclassified"}
    assert table["n"].sum() == 4


def test_a_constant_history_has_no_scale():
    # A series that never changed has a naive MAE of 0: its scaled error is undefined (Hyndman & Koehler
    # 2006 note this limit), so its cells count for WAPE and bias but not MASE.
    history = monthly("KIT-C", "DC-1", "2026-01", [5, 5, 5, 5])
    errors = pd.DataFrame({"source": "dc", "lag_bucket": "1", "item": "KIT-C", "location": "DC-1",
                           "forecast": [5.0], "actual": [7.0]})
    patterns = pd.DataFrame({"item": ["KIT-C"], "location": ["DC-1"], "pattern": ["smooth"]})
    row = acc.accuracy_by_pattern(errors, patterns, history).iloc[0]
    assert np.isnan(row["mase"]) and row["n_mase"] == 0 and row["wape"] == pytest.approx(100 * 2 / 7)


def test_options_are_checked():
    errors, patterns, history = hand_example()
    with pytest.raises(InvalidSpec):
        acc.accuracy_by_pattern(errors, patterns, history, scale="mean")
    with pytest.raises(InvalidSpec):
        acc.accuracy_by_pattern(errors, patterns.assign(pattern="slow"), history)
    with pytest.raises(InvalidSpec):
        acc.accuracy_by_pattern(errors, patterns, history, by=("family",))
