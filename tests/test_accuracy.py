"""Accuracy measures, the error table and accuracy by level."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import (
    mean_absolute_error,
    mean_absolute_percentage_error,
    mean_squared_error,
    root_mean_squared_error,
)

from consensus.errors import InvalidSpec
from consensus.methods import accuracy as acc
from consensus.periods import horizon_months, month_range

# ---------------------------------------------------------------- measures


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_measures_match_scikit_learn(seed):
    # Reference library: scikit-learn.metrics (MAE, MSE, RMSE, MAPE as a fraction).
    rng = np.random.default_rng(seed)
    actual = rng.gamma(3.0, 40.0, size=200) + 1.0
    forecast = actual + rng.normal(0, 25, size=200)
    assert acc.mad(actual, forecast) == pytest.approx(mean_absolute_error(actual, forecast), rel=1e-12)
    assert acc.mse(actual, forecast) == pytest.approx(mean_squared_error(actual, forecast), rel=1e-12)
    assert acc.rmse(actual, forecast) == pytest.approx(root_mean_squared_error(actual, forecast), rel=1e-12)
    # Our MAPE is in percent; scikit-learn returns a fraction.
    assert acc.mape(actual, forecast) == pytest.approx(100 * mean_absolute_percentage_error(actual, forecast), rel=1e-12)


def test_mape_leaves_out_zero_actuals_and_counts_them():
    actual = np.array([0.0, 10.0, 20.0, 0.0])
    forecast = np.array([5.0, 12.0, 15.0, 1.0])
    # Hand check: (2/10 + 5/20) / 2 = 0.225 -> 22.5 %.
    assert acc.mape(actual, forecast) == pytest.approx(22.5)
    assert acc.zero_actual_count(actual, forecast) == 2
    # scikit-learn on the nonzero cells only agrees.
    keep = actual != 0
    assert acc.mape(actual, forecast) == pytest.approx(100 * mean_absolute_percentage_error(actual[keep], forecast[keep]))
    assert np.isnan(acc.mape(np.zeros(3), np.ones(3)))


def test_wape_bias_and_bias_pct_by_their_definitions():
    # Hand check: e = 2, −1, 3, 2; Σ|e| = 8, Σe = 6, Σ actual = 100.
    actual = np.array([10.0, 20.0, 30.0, 40.0])
    forecast = np.array([8.0, 21.0, 27.0, 38.0])
    assert acc.wape(actual, forecast) == pytest.approx(100 * 8 / 100)
    assert acc.bias(actual, forecast) == pytest.approx(6 / 4)
    assert acc.bias_pct(actual, forecast) == pytest.approx(100 * 6 / 100)
    # Positive bias = under-forecast (e = actual − forecast).
    assert acc.bias(actual, forecast) > 0


def test_every_measure_shares_one_signature():
    actual, forecast = np.array([3.0, 4.0, 5.0]), np.array([2.0, 4.0, 7.0])
    values = {name: fn(actual, forecast) for name, fn in acc.MEASURES.items()}
    assert set(values) == {"mad", "mse", "rmse", "mape", "wape", "bias", "bias_pct"}
    assert all(isinstance(v, float) for v in values.values())


def _ses_one_step_errors(y: np.ndarray, alpha: float) -> np.ndarray:
    # NIST convention: S_2 = y_1, S_t = α·y_{t−1} + (1 − α)·S_{t−1}; S_t forecasts y_t.
    smoothed = [y[0]]
    for t in range(1, len(y) - 1):
        smoothed.append(alpha * y[t] + (1 - alpha) * smoothed[-1])
    return y[1:] - np.array(smoothed)


def test_nist_single_exponential_smoothing_example():
    # NIST/SEMATECH e-Handbook of Statistical Methods, section 6.4.3.1
    # (Single Exponential Smoothing): 12 observations, SES with the first
    # smoothed value equal to the first observation; reported SSE 208.82 for
    # α = 0.1 and MSE 16.50 for α = 0.5 (11 one-step errors each).
    y = np.array([71, 70, 69, 68, 64, 65, 72, 78, 75, 75, 75, 70], dtype=float)
    e_01 = _ses_one_step_errors(y, 0.1)
    e_05 = _ses_one_step_errors(y, 0.5)
    forecasts_01 = y[1:] - e_01
    forecasts_05 = y[1:] - e_05
    assert acc.mse(y[1:], forecasts_01) * len(e_01) == pytest.approx(208.82, abs=0.01)
    assert acc.mse(y[1:], forecasts_05) == pytest.approx(16.50, abs=0.01)
    assert acc.rmse(y[1:], forecasts_05) == pytest.approx(np.sqrt(16.50), abs=0.01)
    # The smoother α = 0.5 tracks this series better, as the handbook concludes.
    assert acc.mse(y[1:], forecasts_05) < acc.mse(y[1:], forecasts_01)


def test_textbook_exponential_smoothing_mad_mse_mape():
    # From memory: the operations-management textbook example of tonnage
    # unloaded over 8 quarters (180 168 159 175 190 205 180 182), SES from an
    # initial forecast of 175 with forecasts rounded to 2 decimals; quoted
    # results MAD 10.31 / MSE 190.82 / MAPE 5.59 % (α = .10) and MAD 12.33 /
    # MSE 195.24 / MAPE 6.76 % (α = .50).  Recomputed here independently.
    y = np.array([180, 168, 159, 175, 190, 205, 180, 182], dtype=float)
    for alpha, quoted in ((0.10, (10.31, 190.82, 5.59)), (0.50, (12.33, 195.24, 6.76))):
        f = [175.0]
        for t in range(len(y) - 1):
            f.append(round(f[-1] + alpha * (y[t] - f[-1]), 2))
        f = np.array(f)
        e = y - f
        assert acc.mad(y, f) == pytest.approx(np.mean(np.abs(e)))
        assert acc.mad(y, f) == pytest.approx(quoted[0], abs=0.01)
        # The remembered MSE for α = .5 may carry the book's rounding: 0.05 slack.
        assert acc.mse(y, f) == pytest.approx(quoted[1], abs=0.05)
        assert acc.mape(y, f) == pytest.approx(quoted[2], abs=0.01)


def test_naive_and_moving_average_hand_example():
    # Hand-checked series 10 12 11 14 13 (our own numbers, worked on paper):
    # naive errors 2 −1 3 −1 -> MAD 1.75, MSE 3.75, MAPE 13.72 %;
    # 2-month moving average forecasts 11 11.5 12.5 -> errors 0 2.5 0.5 ->
    # MAD 1.0, MSE 2.1667, MAPE 7.23 %.  numpy recomputes each independently.
    y = np.array([10, 12, 11, 14, 13], dtype=float)
    naive = y[:-1]
    moving = np.convolve(y, np.ones(2) / 2, mode="valid")[:-1]
    assert acc.mad(y[1:], naive) == pytest.approx(1.75)
    assert acc.mse(y[1:], naive) == pytest.approx(3.75)
    assert acc.mape(y[1:], naive) == pytest.approx(100 * np.mean(np.abs(y[1:] - naive) / y[1:]))
    assert acc.mape(y[1:], naive) == pytest.approx(13.72, abs=0.005)
    assert acc.mad(y[2:], moving) == pytest.approx(1.0)
    assert acc.mse(y[2:], moving) == pytest.approx(6.5 / 3)
    assert acc.mape(y[2:], moving) == pytest.approx(7.23, abs=0.005)


def test_tracking_signal_hand_checked():
    # Errors 5, −2, 4, 3: running sums 5, 3, 7, 10; running MAD 5, 3.5, 11/3, 3.5;
    # TS = 1, 0.857, 1.909, 2.857 (worked on paper).
    ts = acc.tracking_signal_series(np.array([5.0, -2.0, 4.0, 3.0]))
    np.testing.assert_allclose(ts, [1.0, 3 / 3.5, 7 / (11 / 3), 10 / 3.5])
    assert acc.tracking_signal(np.array([5.0, -2, 4, 3]) + 10, np.full(4, 10.0)) == pytest.approx(10 / 3.5)
    # An always-late forecast drifts to TS = n: every error has the same sign.
    assert acc.tracking_signal_series(np.full(6, 2.0))[-1] == pytest.approx(6.0)
    assert acc.tracking_signal_series(np.zeros(3))[-1] == 0.0


# ---------------------------------------------------------------- tables

ITEMS = pd.DataFrame({"item": ["A", "B", "C"], "family": ["F1", "F1", "F2"], "unit_price": [1.0, 2.0, 3.0]})
LOCATIONS = pd.DataFrame({"location": ["L1", "L2"], "region": ["R1", "R1"]})


def test_forecast_errors_zero_demand_rule():
    actuals = pd.DataFrame(
        {
            "item": ["A", "A", "B"],
            "location": ["L1", "L1", "L1"],
            "period": ["2026-02", "2026-03", "2026-02"],
            "quantity": [10.0, 12.0, 7.0],
        }
    )
    forecasts = pd.DataFrame(
        {
            "source": ["sales"] * 5,
            "cycle": ["2026-01"] * 5,
            "item": ["A", "B", "C", "A", "A"],
            "location": ["L1", "L1", "L1", "L1", "L1"],
            "period": ["2026-03", "2026-03", "2026-03", "2026-04", "2026-01"],
            "quantity": [11.0, 5.0, 9.0, 13.0, 1.0],
        }
    )
    errors = acc.forecast_errors(forecasts, actuals)
    got = errors.set_index(["item", "period"])
    # B/L1 has history but no row in 2026-03 -> scored against 0 demand.
    assert got.loc[("B", "2026-03"), "actual"] == 0.0
    assert got.loc[("B", "2026-03"), "error"] == -5.0
    assert got.loc[("A", "2026-03"), "error"] == 1.0
    assert got.loc[("A", "2026-03"), "lag"] == 2 and got.loc[("A", "2026-03"), "lag_bucket"] == "2-3"
    # C has no history at all; 2026-04 has no actuals; 2026-01 is lag 0.
    assert set(map(tuple, errors[["item", "period"]].to_numpy())) == {("A", "2026-03"), ("B", "2026-03")}
    assert list(errors.columns) == ["source", "cycle", "item", "location", "period", "lag", "lag_bucket",
                                    "forecast", "actual", "error"]


def _simulated_errors(seed: int, n_cycles: int = 10, noise_sd: float = 20.0) -> tuple[pd.DataFrame, pd.DataFrame]:
    rng = np.random.default_rng(seed)
    months = month_range("2024-01", "2026-12")
    cells = [(i, l) for i in ITEMS["item"] for l in LOCATIONS["location"]]
    level = {c: 100 + 50 * k for k, c in enumerate(cells)}
    actual_rows = [(i, l, m, max(0.0, level[(i, l)] + rng.normal(0, noise_sd))) for (i, l) in cells for m in months]
    actuals = pd.DataFrame(actual_rows, columns=["item", "location", "period", "quantity"])
    fc_rows = []
    for cycle in months[12 : 12 + n_cycles]:
        for period in horizon_months(cycle, 3):
            for i, l in cells:
                fc_rows.append(("stat", cycle, i, l, period, float(level[(i, l)])))
    forecasts = pd.DataFrame(fc_rows, columns=["source", "cycle", "item", "location", "period", "quantity"])
    return acc.forecast_errors(forecasts, actuals), actuals


@pytest.mark.parametrize("seed", [11, 12, 13])
def test_groups_forecast_better_than_items_on_independent_noise(seed):
    # Property (fixed seeds): with independent cell noise, summing n cells
    # shrinks the relative error ~1/sqrt(n) (errors partly cancel), so family
    # and total WAPE sit below every item's WAPE.
    errors, _ = _simulated_errors(seed)
    item_table = acc.accuracy_table(errors, level="item", items=ITEMS, locations=LOCATIONS, by=("source",))
    family_table = acc.accuracy_table(errors, level="family", items=ITEMS, locations=LOCATIONS, by=("source",))
    total_table = acc.accuracy_table(errors, level="total", items=ITEMS, locations=LOCATIONS, by=("source",))
    assert total_table["wape"].iloc[0] < item_table["wape"].mean()
    assert family_table.set_index("family").loc["F1", "wape"] < item_table[item_table["item"].isin(["A", "B"])]["wape"].min()


def test_accuracy_table_sums_groups_before_scoring():
    errors = pd.DataFrame(
        {
            "source": ["s"] * 4,
            "cycle": ["2026-01"] * 4,
            "item": ["A", "B", "A", "B"],
            "location": ["L1", "L1", "L1", "L1"],
            "period": ["2026-02", "2026-02", "2026-03", "2026-03"],
            "lag": [1, 1, 2, 2],
            "lag_bucket": ["1", "1", "2-3", "2-3"],
            "forecast": [10.0, 10.0, 10.0, 10.0],
            "actual": [12.0, 8.0, 15.0, 11.0],
        }
    )
    errors["error"] = errors["actual"] - errors["forecast"]
    fam = acc.accuracy_table(errors, level="family", items=ITEMS, locations=LOCATIONS, by=("source",))
    # Family sums: 20 vs 20 (e = 0) and 20 vs 26 (e = 6): MAD 3, MSE 18; scoring
    # items one by one would give errors 2, −2, 5, 1 (MSE 8.5) instead.
    row = fam.iloc[0]
    assert row["n"] == 2
    assert row["mad"] == pytest.approx(3.0)
    assert row["mse"] == pytest.approx(18.0)
    assert row["wape"] == pytest.approx(100 * 6 / 46)
    assert row["tracking_signal"] == pytest.approx(6 / 3.0)
    item = acc.accuracy_table(errors, level="item", items=ITEMS, locations=LOCATIONS, by=("source",))
    # Item level averages its own cells: A errors 2, 5 -> MAD 3.5.
    assert item.set_index("item").loc["A", "mad"] == pytest.approx(3.5)
    assert list(fam.columns) == ["source", "family", "n", "n_zero_actual", "mad", "mse", "rmse", "mape", "wape",
                                 "bias", "bias_pct", "tracking_signal", "ts_flag", "mase"]


def test_ts_flag_beyond_four_mads():
    errors, _ = _simulated_errors(5, n_cycles=10, noise_sd=5.0)
    biased = errors.assign(forecast=errors["forecast"] * 0.9)
    biased["error"] = biased["actual"] - biased["forecast"]
    table = acc.accuracy_table(biased, level="total", items=ITEMS, locations=LOCATIONS)
    assert table["ts_flag"].all() and (table["tracking_signal"] > 4).all()


def test_seasonal_naive_scale_and_mase():
    # MASE scale (Hyndman & Koehler 2006): mean |y_t − y_{t−12}| of the history.
    errors, actuals = _simulated_errors(7)
    scale = acc.seasonal_naive_scale(actuals, level="item", items=ITEMS, locations=LOCATIONS)
    one = actuals[(actuals["item"] == "B") & (actuals["location"] == "L2")].sort_values("period")["quantity"].to_numpy()
    expected = np.mean(np.abs(one[12:] - one[:-12]))
    got = scale[(scale["item"] == "B") & (scale["location"] == "L2")]
    assert got["scale"].iloc[0] == pytest.approx(expected)
    assert got["n_scale"].iloc[0] == len(one) - 12
    table = acc.accuracy_table(errors, level="item", items=ITEMS, locations=LOCATIONS, by=("source",),
                               seasonal_scale=scale)
    row = table[(table["item"] == "B") & (table["location"] == "L2")].iloc[0]
    assert row["mase"] == pytest.approx(row["mad"] / expected)


def test_seasonal_naive_scale_fills_missing_months_inside_the_span_with_zero():
    actuals = pd.DataFrame(
        {
            "item": ["A"] * 13,
            "location": ["L1"] * 13,
            "period": month_range("2025-01", "2026-02")[:1] + month_range("2025-03", "2026-02"),
            "quantity": [5.0] * 13,
        }
    )
    # 2025-02 missing -> 0; differences y_t − y_{t−12} for t = 2026-01 (5 − 5) and 2026-02 (5 − 0).
    scale = acc.seasonal_naive_scale(actuals, level="total", items=ITEMS, locations=LOCATIONS)
    assert scale["scale"].iloc[0] == pytest.approx(2.5)


def test_unknown_level_is_rejected():
    errors, _ = _simulated_errors(1, n_cycles=2)
    with pytest.raises(InvalidSpec):
        acc.accuracy_table(errors, level="country", items=ITEMS, locations=LOCATIONS)
    with pytest.raises(InvalidSpec):
        acc.seasonal_naive_scale(errors, level="sku", items=ITEMS, locations=LOCATIONS)
