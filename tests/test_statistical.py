"""The statistical source end to end: selection, fallback, intervals, reference forecast, invariants."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from statsmodels.datasets import elec_equip
from statsmodels.tsa.holtwinters import ExponentialSmoothing

from consensus.errors import InvalidSpec
from consensus.methods.smoothing import PARAMETER_GRIDS
from consensus.methods.statistical import (
    METHODS,
    StatisticalResult,
    build_demand_matrix,
    forecast_statistical,
    nan_quantiles,
)
from consensus.periods import month_index, month_name

FORECAST_COLUMNS = ["item", "location", "period", "lag", "quantity", "method"]
INTERVAL_COLUMNS = ["item", "location", "period", "lower_80", "upper_80", "lower_95", "upper_95"]
SERIES_COLUMNS = ["item", "location", "pattern", "has_trend", "has_seasonality", "method", "alpha", "beta",
                  "gamma", "phi", "holdout_wape", "n_months", "fallback", "combined"]


def long_history(series: dict[tuple[str, str], np.ndarray], first: str = "2021-01") -> pd.DataFrame:
    """Long actuals from arrays of monthly quantities starting at ``first``."""
    base = month_index(first)
    rows = [
        (item, location, month_name(base + k), float(q))
        for (item, location), values in series.items()
        for k, q in enumerate(values)
    ]
    return pd.DataFrame(rows, columns=["item", "location", "period", "quantity"])


def orders(months: int = 48) -> np.ndarray:
    """Euro-area electrical equipment orders (statsmodels.datasets.elec_equip, shipped offline)."""
    return elec_equip.load().data.iloc[:months, 0].to_numpy(dtype=float)


@pytest.fixture(scope="module")
def scenario() -> pd.DataFrame:
    rng = np.random.default_rng(42)
    t = np.arange(48)
    series = {
        ("SEAS", "L1"): orders(48),
        ("TREND", "L1"): np.round(40 + 3 * t + rng.normal(0, 4, 48)),
        ("FLAT", "L2"): np.round(rng.normal(80, 6, 48)),
        ("SPARSE", "L1"): (rng.random(48) < 0.3) * np.round(rng.gamma(2, 6, 48)),
        ("NEW", "L1"): np.r_[np.zeros(44), [12, 15, 9, 14]],
    }
    return long_history(series, first="2021-01")


@pytest.fixture(scope="module")
def result(scenario) -> StatisticalResult:
    families = pd.Series({"SEAS": "F1", "TREND": "F1", "FLAT": "F2", "SPARSE": "F2", "NEW": "F1"})
    return forecast_statistical(scenario, cycle="2024-12", horizon=18, families=families)


def test_frames_have_the_promised_shape(result):
    assert list(result.forecast.columns) == FORECAST_COLUMNS
    assert list(result.intervals.columns) == INTERVAL_COLUMNS
    assert list(result.series.columns) == SERIES_COLUMNS
    assert list(result.seasonal_naive.columns) == ["item", "location", "period", "lag", "quantity"]
    assert len(result.series) == 5 and len(result.forecast) == 5 * 18
    first = result.forecast[result.forecast["item"] == "FLAT"]
    assert list(first["period"]) == [month_name(month_index("2025-01") + k) for k in range(18)]
    assert list(first["lag"]) == list(range(1, 19))
    assert (result.forecast["quantity"] >= 0).all()
    assert set(result.forecast["method"]) <= set(METHODS)


def test_profiles_and_choices_follow_the_data(result):
    by_item = result.series.set_index("item")
    assert by_item.loc["SEAS", "has_seasonality"]
    assert by_item.loc["SEAS", "method"] in {"holt_winters_add", "holt_winters_mul", "seasonal_naive"}
    assert by_item.loc["TREND", "has_trend"]
    assert by_item.loc["SPARSE", "pattern"] in {"intermittent", "lumpy"}
    assert by_item.loc["SPARSE", "method"] in {"croston", "sba", "ses", "moving_average"}
    assert by_item.loc["NEW", "method"] == "new_item_profile"
    assert by_item.loc["NEW", "n_months"] == 4 and "new item" in by_item.loc["NEW", "fallback"]
    assert (by_item.drop(index="NEW")["fallback"] == "").all()
    assert by_item.drop(index="NEW")["holdout_wape"].notna().all()


def test_intervals_are_ordered_and_nested(result):
    iv = result.intervals.merge(result.forecast, on=["item", "location", "period"])
    fitted = iv[iv["method"] != "new_item_profile"]
    assert fitted[INTERVAL_COLUMNS[3:]].notna().all().all()
    assert (fitted["lower_95"] <= fitted["lower_80"] + 1e-9).all()
    assert (fitted["lower_80"] <= fitted["upper_80"] + 1e-9).all()
    assert (fitted["upper_80"] <= fitted["upper_95"] + 1e-9).all()
    assert (fitted["lower_95"] >= 0).all()
    assert iv.loc[iv["method"] == "new_item_profile", INTERVAL_COLUMNS[3:]].isna().all().all()


def test_naive_holdout_wape_and_intervals_recomputed_by_hand():
    # With methods=["naive"] the rolling-origin errors are y[o+h] - y[o] for the
    # 12 origins o = T-13 … T-2 (holdout K = min(12, 48 // 2)).  WAPE and the
    # empirical quantiles (numpy.quantile, linear) are recomputed here.
    y = orders(48)
    history = long_history({("A", "X"): y}, first="2021-01")
    res = forecast_statistical(history, cycle="2024-12", horizon=3, methods=["naive"])
    origins = np.arange(35, 47)
    errors = {h: np.array([y[o + h] - y[o] for o in origins if o + h <= 47]) for h in (1, 2, 3)}
    actuals = np.concatenate([[y[o + h] for o in origins if o + h <= 47] for h in (1, 2, 3)])
    wape = np.abs(np.concatenate(list(errors.values()))).sum() / np.abs(actuals).sum()
    assert res.series["holdout_wape"].iloc[0] == pytest.approx(wape)
    assert (res.forecast["quantity"] == y[-1]).all()
    for h in (1, 2, 3):
        row = res.intervals.iloc[h - 1]
        assert row["lower_80"] == pytest.approx(max(0.0, y[-1] + np.quantile(errors[h], 0.1)))
        assert row["upper_95"] == pytest.approx(y[-1] + np.quantile(errors[h], 0.975))


def test_nan_quantiles_match_numpy_nanquantile():
    # numpy.nanquantile (linear, Hyndman & Fan definition 7) is the oracle.
    rng = np.random.default_rng(8)
    x = rng.normal(size=(50, 12, 6))
    x[rng.random(x.shape) < 0.4] = np.nan
    x[0, :, 0] = np.nan
    probs = [0.025, 0.1, 0.5, 0.9, 0.975]
    with np.errstate(all="ignore"), pytest.warns(RuntimeWarning):
        expected = np.nanquantile(x, probs, axis=1)
    np.testing.assert_allclose(nan_quantiles(x, probs), expected, rtol=1e-12, atol=1e-12)


def test_ses_forecast_agrees_with_statsmodels_at_the_chosen_alpha():
    # Whole pipeline for one method: the reported alpha minimises statsmodels'
    # in-sample SSE over our grid (known initial level = first month), and the
    # forecast equals statsmodels' forecast at that alpha.
    y = orders(40)
    history = long_history({("A", "X"): y}, first="2021-01")
    res = forecast_statistical(history, cycle=month_name(month_index("2021-01") + 39), horizon=5, methods=["ses"])
    alpha = res.series["alpha"].iloc[0]
    sse = [ExponentialSmoothing(y, initialization_method="known", initial_level=y[0]).fit(
        smoothing_level=a, optimized=False).sse for a in PARAMETER_GRIDS["ses"][0]]
    assert alpha == pytest.approx(PARAMETER_GRIDS["ses"][0][int(np.argmin(sse))])
    reference = ExponentialSmoothing(y, initialization_method="known", initial_level=y[0]).fit(
        smoothing_level=alpha, optimized=False).forecast(5)
    np.testing.assert_allclose(res.forecast["quantity"], reference, atol=1e-6)


def test_missing_months_inside_the_span_are_zero_demand():
    y = np.array([5, 0, 0, 7, 0, 3, 0, 0, 6, 0, 0, 4, 2, 0, 0, 5], dtype=float)
    full = long_history({("A", "X"): y})
    gaps = full[full["quantity"] != 0]
    a = forecast_statistical(full, cycle="2022-04", horizon=4)
    b = forecast_statistical(gaps, cycle="2022-04", horizon=4)
    pd.testing.assert_frame_equal(a.forecast, b.forecast)
    pd.testing.assert_frame_equal(a.series, b.series)
    matrix = build_demand_matrix(gaps, cycle="2022-04")
    np.testing.assert_array_equal(matrix.y[0], y)


def test_new_item_gets_the_family_profile_scaled_to_its_demand():
    # Family F: one established item with a pure seasonal shape; the classical
    # ratio-to-centred-2x12-moving-average index is recomputed with pandas rolling
    # means (Makridakis, Wheelwright & Hyndman 1998, ch. 3).
    months = 36
    shape = 1 + 0.5 * np.sin(2 * np.pi * np.arange(months) / 12)
    old = np.round(100 * shape * (1 + 0.01 * np.arange(months)), 3)
    new = np.r_[np.zeros(months - 3), [20.0, 30.0, 25.0]]
    history = long_history({("OLD", "X"): old, ("NEW", "X"): new}, first="2022-01")
    families = pd.Series({"OLD": "F", "NEW": "F"})
    res = forecast_statistical(history, cycle="2024-12", horizon=12, families=families)
    total = pd.Series(old + new)
    cma = total.rolling(12).mean().rolling(2).mean().shift(-6)
    ratio = total / cma
    index = ratio.groupby(np.arange(months) % 12).mean()
    index = index / index.mean()
    level = np.mean(new[-3:] / index.to_numpy()[[9, 10, 11]])  # Oct, Nov, Dec
    expected = level * index.to_numpy()  # Jan … Dec of the next year
    got = res.forecast[res.forecast["item"] == "NEW"]["quantity"].to_numpy()
    np.testing.assert_allclose(got, expected, rtol=1e-9)
    text = res.series.set_index("item").loc["NEW", "fallback"]
    assert "family F seasonal profile" in text


def test_new_item_without_family_is_flat_and_no_demand_is_zero():
    history = long_history({("NEW", "X"): [0, 0, 4, 6], ("NONE", "X"): [0, 0, 0, 0]})
    res = forecast_statistical(history, cycle="2021-04", horizon=2)
    q = res.forecast.set_index("item")["quantity"]
    assert list(q.loc["NEW"]) == [5.0, 5.0]
    assert list(q.loc["NONE"]) == [0.0, 0.0]
    series = res.series.set_index("item")
    assert series.loc["NONE", "method"] == "zero_demand" and series.loc["NONE", "pattern"] == "no_demand"
    assert "no family given" in series.loc["NEW", "fallback"]


def test_seasonal_naive_reference_repeats_last_season():
    y = orders(30)
    history = long_history({("A", "X"): y, ("B", "X"): np.r_[np.zeros(24), [3, 4, 5, 6, 7, 8]]})
    res = forecast_statistical(history, cycle=month_name(month_index("2021-01") + 29), horizon=14)
    ref = res.seasonal_naive
    a = ref[ref["item"] == "A"]["quantity"].to_numpy()
    np.testing.assert_allclose(a, np.r_[y[18:30], y[18:20]])  # y_{T+h-12⌈h/12⌉}
    b = ref[ref["item"] == "B"]["quantity"].to_numpy()
    assert (b == 8.0).all()  # span shorter than a season: last month


def test_methods_restrict_the_candidates(scenario):
    res = forecast_statistical(scenario, cycle="2024-12", horizon=6, methods=["ses", "holt_damped"])
    fitted = res.series[res.series["fallback"] == ""]
    assert set(fitted["method"]) <= {"ses", "holt_damped"}


@pytest.mark.parametrize(
    "kwargs",
    [
        {"methods": ["ses", "prophet"]},
        {"methods": "ses"},
        {"methods": []},
        {"horizon": 0},
        {"cycle": "2024-13"},
        {"levels": (0.8, 1.2)},
        {"season_length": 1},
    ],
)
def test_bad_settings_raise_invalid_spec(scenario, kwargs):
    args = {"cycle": "2024-12", "horizon": 6} | kwargs
    with pytest.raises(InvalidSpec):
        forecast_statistical(scenario, **args)


def test_bad_history_raises_invalid_spec():
    with pytest.raises(InvalidSpec):
        forecast_statistical(pd.DataFrame({"item": ["A"], "period": ["2024-01"], "quantity": [1.0]}),
                             cycle="2024-01", horizon=1)
    bad = pd.DataFrame({"item": ["A"], "location": ["X"], "period": ["2024-1"], "quantity": [1.0]})
    with pytest.raises(InvalidSpec):
        forecast_statistical(bad, cycle="2024-01", horizon=1)


# --- properties (hypothesis) -------------------------------------------------

histories = st.lists(
    st.tuples(
        st.sampled_from(["A", "B", "C"]),
        st.sampled_from(["X", "Y"]),
        st.integers(min_value=0, max_value=35),  # month offset from 2022-01
        st.floats(min_value=0, max_value=500, allow_nan=False, allow_infinity=False),
    ),
    min_size=1,
    max_size=80,
)


def frame_of(rows) -> pd.DataFrame:
    base = month_index("2022-01")
    return pd.DataFrame(
        [(i, loc, month_name(base + k), q) for i, loc, k, q in rows],
        columns=["item", "location", "period", "quantity"],
    )


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(histories, st.integers(min_value=1, max_value=14))
def test_forecasts_and_bounds_are_never_negative(rows, horizon):
    res = forecast_statistical(frame_of(rows), cycle="2024-12", horizon=horizon)
    assert (res.forecast["quantity"] >= 0).all()
    assert (res.seasonal_naive["quantity"] >= 0).all()
    bounds = res.intervals[INTERVAL_COLUMNS[3:]].to_numpy()
    assert (bounds[~np.isnan(bounds)] >= 0).all()
    assert len(res.forecast) == len(res.series) * horizon


@settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(histories, histories)
def test_history_after_the_cycle_changes_nothing(rows, later_rows):
    known = frame_of(rows)
    future = frame_of(later_rows)
    future["period"] = [month_name(month_index(p) + 36) for p in future["period"]]  # all after 2024-12
    a = forecast_statistical(known, cycle="2024-12", horizon=6)
    b = forecast_statistical(pd.concat([future, known, future]), cycle="2024-12", horizon=6)
    for name in ("forecast", "intervals", "series", "seasonal_naive"):
        pd.testing.assert_frame_equal(getattr(a, name), getattr(b, name))


@pytest.mark.slow
@settings(max_examples=15, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(histories)
def test_reruns_and_row_order_give_identical_results(rows):
    frame = frame_of(rows)
    a = forecast_statistical(frame, cycle="2024-12", horizon=4)
    b = forecast_statistical(frame, cycle="2024-12", horizon=4)
    c = forecast_statistical(frame.iloc[::-1].reset_index(drop=True), cycle="2024-12", horizon=4)
    for name in ("forecast", "intervals", "series", "seasonal_naive"):
        pd.testing.assert_frame_equal(getattr(a, name), getattr(b, name))
        pd.testing.assert_frame_equal(getattr(a, name), getattr(c, name), check_exact=False, rtol=1e-9)


# --- unknown months ------------------------------------------------------------

def test_unknown_quantities_and_trailing_months_are_nan_in_the_matrix():
    # NaN (or an empty cell) is an unknown month; a month with any unknown row
    # is unknown; absent rows inside the history are zero; whole trailing
    # months with no row at all (orders not in yet) are unknown.
    history = pd.DataFrame({
        "item": ["A", "A", "A", "A", "B", "B"],
        "location": ["X"] * 6,
        "period": ["2024-01", "2024-02", "2024-03", "2024-03", "2024-01", "2024-04"],
        "quantity": [5.0, None, 2.0, 1.0, 3.0, np.nan],
    })
    matrix = build_demand_matrix(history, cycle="2024-06")
    np.testing.assert_array_equal(matrix.y[0], [5.0, np.nan, 3.0, 0.0, np.nan, np.nan])
    np.testing.assert_array_equal(matrix.y[1], [3.0, 0.0, 0.0, np.nan, np.nan, np.nan])
    for bad in ("many", np.inf):
        broken = history.assign(quantity=history["quantity"].astype(object))
        broken.loc[0, "quantity"] = bad
        with pytest.raises(InvalidSpec):
            build_demand_matrix(broken, cycle="2024-06")


def test_unknown_months_are_left_out_of_the_holdout_by_hand():
    # methods=["naive"]: the holdout errors are y[o+h] - (latest known y up to o)
    # over the 12 origins, skipping every target month that is unknown.
    y = orders(48).copy()
    y[[40, 44]] = np.nan
    history = long_history({("A", "X"): y}, first="2021-01")
    res = forecast_statistical(history, cycle="2024-12", horizon=3, methods=["naive"])
    filled = pd.Series(y).ffill().to_numpy()
    errors, actuals = [], []
    for o in range(35, 47):
        for h in (1, 2, 3):
            if o + h <= 47 and np.isfinite(y[o + h]):
                errors.append(y[o + h] - filled[o])
                actuals.append(y[o + h])
    assert res.series["holdout_wape"].iloc[0] == pytest.approx(np.abs(errors).sum() / np.abs(actuals).sum())
    assert (res.forecast["quantity"] == y[-1]).all()


def test_a_cycle_opened_before_its_orders_are_in_forecasts_through_the_unknown_months():
    # History through 2024-10, cycle 2024-12: months 11 and 12 are unknown,
    # the forecast for 2025-01 is the model's 3-step forecast from October.
    # With SES that is the October level (flat forecast), recomputed with
    # statsmodels at the alpha we report.
    y = orders(46)
    history = long_history({("A", "X"): y}, first="2021-01")
    res = forecast_statistical(history, cycle="2024-12", horizon=2, methods=["ses"])
    alpha = res.series["alpha"].iloc[0]
    reference = ExponentialSmoothing(y, initialization_method="known", initial_level=y[0]).fit(
        smoothing_level=alpha, optimized=False).forecast(3)
    np.testing.assert_allclose(res.forecast["quantity"], reference[1:], rtol=1e-9)
    assert res.series["n_months"].iloc[0] == 48
    matrix = build_demand_matrix(history, cycle="2024-12")
    assert np.isnan(matrix.y[0, -2:]).all()


# --- partitions ------------------------------------------------------------------

@pytest.fixture(scope="module")
def store_of_families():
    """36 item × location series in 4 families: seasonal, trending, intermittent, new, late-starting, with an unknown month."""
    rng = np.random.default_rng(11)
    base = orders(60)
    t = np.arange(60)
    series, families = {}, {}
    for k in range(36):
        family = f"F{k % 4}"
        kind = k % 6
        if kind == 0:
            values = np.round(base * rng.uniform(0.3, 3.0) + rng.normal(0, 3, 60))
        elif kind == 1:
            values = np.round(50 + 2 * t + rng.normal(0, 5, 60))
        elif kind == 2:
            values = (rng.random(60) < 0.3) * np.round(rng.gamma(2, 5, 60))
        elif kind == 3:
            values = np.r_[np.zeros(57), [4, 6, 5]]
        elif kind == 4:
            values = np.round(base[:60] * rng.uniform(0.5, 2))
            values[:rng.integers(1, 30)] = 0  # later start
        else:
            values = np.round(rng.normal(100, 10, 60))
            values[rng.integers(20, 59)] = np.nan  # an unknown month
        if family == "F3":
            values[:18] = 0  # this family's matrix starts later than the store's
        item = f"I{k:02d}"
        series[(item, f"L{k % 3}")] = np.maximum(values, 0) if kind != 5 else values
        families[item] = family
    history = long_history(series, first="2020-01")
    history = history[history["quantity"] != 0]  # absent rows are zero demand
    families = pd.Series(families)
    return history, families


def test_a_family_forecast_alone_is_bit_for_bit_its_rows_in_the_whole_store(store_of_families):
    # The run spreads families over processes: every row of a family's result
    # must equal, exactly, its rows when all families are forecast together.
    history, families = store_of_families
    whole = forecast_statistical(history, cycle="2024-12", horizon=12, families=families)
    for family in ("F1", "F3"):
        items = families.index[families == family]
        subset = history[history["item"].isin(items)]
        part = forecast_statistical(subset, cycle="2024-12", horizon=12, families=families[items])
        if family == "F3":  # a partition whose matrix has fewer months than the store's
            assert build_demand_matrix(subset, cycle="2024-12").first_month > month_index("2020-01")
        for name in ("forecast", "intervals", "series", "seasonal_naive"):
            mine = getattr(part, name).reset_index(drop=True)
            theirs = getattr(whole, name)
            theirs = theirs[theirs["item"].isin(items)].reset_index(drop=True)
            pd.testing.assert_frame_equal(mine, theirs, check_exact=True)


# --- Theta and the combination (on request) ---------------------------------------

def test_theta_on_request_is_the_theta_method_refitted_on_the_whole_span():
    # methods=["theta"]: the forecast is fit_theta/forecast_theta (checked
    # against statsmodels' ThetaModel in test_theta.py) on the whole span,
    # deseasonalised because the series is seasonal; alpha is reported.
    from consensus.methods.theta import fit_theta, forecast_theta

    y = orders(60)
    history = long_history({("A", "X"): y}, first="2020-01")
    res = forecast_statistical(history, cycle="2024-12", horizon=8, methods=["theta"])
    assert res.series["method"].iloc[0] == "theta" and res.series["has_seasonality"].iloc[0]
    fit = fit_theta(y[None, :], np.array([0]), end=np.array([60]), seasonal=np.array([True]))
    expected = forecast_theta(y[None, :], np.array([0]), fit, origins=np.array([59]), horizon=8)[0, 0]
    np.testing.assert_allclose(res.forecast["quantity"], np.maximum(expected, 0), rtol=1e-12)
    assert res.series["alpha"].iloc[0] == fit.alpha[0]


def test_combination_is_the_mean_of_its_members_each_forecast_alone():
    # A combination requested alone averages every member it could fit (they
    # are fitted for it, not chosen on their own); each member's forecast is
    # what that member gives when it is the only method requested.
    y = orders(60)
    history = long_history({("A", "X"): y}, first="2020-01")
    res = forecast_statistical(history, cycle="2024-12", horizon=6, methods=["combination"])
    assert res.series["method"].iloc[0] == "combination"
    assert res.series["combined"].iloc[0] == "theta+holt_winters_add+holt_winters_mul"
    alone = [forecast_statistical(history, cycle="2024-12", horizon=6, methods=[m]).forecast["quantity"].to_numpy()
             for m in ("theta", "holt_winters_add", "holt_winters_mul")]
    np.testing.assert_allclose(res.forecast["quantity"], np.mean(alone, axis=0), rtol=1e-12)
    for m, fc in zip(("theta", "holt_winters_add", "holt_winters_mul"), alone):
        assert forecast_statistical(history, cycle="2024-12", horizon=6, methods=[m]).series["method"].iloc[0] == m


def test_methods_see_the_last_twelve_seasons_of_a_long_history():
    # 20 years of elec_equip (statsmodels.datasets): the forecast is the one
    # made from its last 144 months alone; n_months still reports the span.
    from consensus.methods.statistical import MAX_FIT_SEASONS

    y = elec_equip.load().data.iloc[:240, 0].to_numpy(dtype=float)
    long = forecast_statistical(long_history({("A", "X"): y}, first="2005-01"), cycle="2024-12", horizon=6)
    kept = MAX_FIT_SEASONS * 12
    short = forecast_statistical(long_history({("A", "X"): y[-kept:]}, first=month_name(month_index("2024-12") - kept + 1)),
                                 cycle="2024-12", horizon=6)
    pd.testing.assert_frame_equal(long.forecast, short.forecast, check_exact=True)
    pd.testing.assert_frame_equal(long.intervals, short.intervals, check_exact=True)
    assert long.series["n_months"].iloc[0] == 240 and short.series["n_months"].iloc[0] == kept


histories_with_unknowns = st.lists(
    st.tuples(
        st.sampled_from(["A", "B", "C"]),
        st.sampled_from(["X", "Y"]),
        st.integers(min_value=0, max_value=35),
        st.one_of(st.floats(min_value=0, max_value=500, allow_nan=False, allow_infinity=False), st.just(np.nan)),
    ),
    min_size=1,
    max_size=80,
)


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(histories_with_unknowns, st.integers(min_value=1, max_value=14))
def test_unknown_months_never_leak_into_the_numbers(rows, horizon):
    # Whatever months are unknown, every forecast is a finite non-negative
    # number, the bounds are non-negative where given, the holdout WAPE is
    # finite or NaN (never inf), and the reference forecast is finite.
    res = forecast_statistical(frame_of(rows), cycle="2024-12", horizon=horizon)
    assert np.isfinite(res.forecast["quantity"]).all() and (res.forecast["quantity"] >= 0).all()
    assert np.isfinite(res.seasonal_naive["quantity"]).all()
    bounds = res.intervals[INTERVAL_COLUMNS[3:]].to_numpy()
    assert (bounds[~np.isnan(bounds)] >= 0).all()
    assert not np.isinf(res.series["holdout_wape"]).any()
    assert set(res.series["method"]) <= set(METHODS)


def test_block_boundaries_change_no_bit(store_of_families, monkeypatch):
    # Blocks of 3 series (and of 100 series × months) instead of thousands:
    # every frame is the same, bit for bit.
    import consensus.methods.statistical as statistical

    history, families = store_of_families
    whole = forecast_statistical(history, cycle="2024-12", horizon=12, families=families)
    monkeypatch.setattr(statistical, "BLOCK_SERIES", 3)
    monkeypatch.setattr(statistical, "BLOCK_CELLS", 100)
    split = forecast_statistical(history, cycle="2024-12", horizon=12, families=families)
    for name in ("forecast", "intervals", "series", "seasonal_naive"):
        pd.testing.assert_frame_equal(getattr(split, name), getattr(whole, name), check_exact=True)


# --- which Holt–Winters forms are refined -------------------------------------------

def _seasonal_store() -> pd.DataFrame:
    """Five seasonal series: elec_equip orders (statsmodels.datasets) scaled, shifted and noised, fixed seed."""
    rng = np.random.default_rng(11)
    base = orders(60)
    return long_history({(f"S{k}", "L"): np.round(base * rng.uniform(0.5, 2.0) + rng.normal(0, 3, 60) + 10 * k)
                         for k in range(5)}, first="2020-01")


def test_a_seasonal_series_forecast_is_its_chosen_form_forecast_alone():
    # Contenders are refined from their own grid fits, so the form chosen gives
    # the same bits when it is the only method requested.
    history = _seasonal_store()
    both = forecast_statistical(history, cycle="2024-12", horizon=6)
    for item, method in both.series.set_index("item")["method"].items():
        assert method in ("holt_winters_add", "holt_winters_mul")
        mine = history[history["item"] == item]
        alone = forecast_statistical(mine, cycle="2024-12", horizon=6, methods=[method])
        np.testing.assert_array_equal(alone.forecast["quantity"].to_numpy(),
                                      both.forecast.loc[both.forecast["item"] == item, "quantity"].to_numpy())


@pytest.mark.parametrize("margin, refined_forms", [(1.0, 1), (1e9, 2)])
def test_only_forms_within_the_margin_of_the_best_grid_fit_are_refined(monkeypatch, margin, refined_forms):
    import consensus.methods.statistical as statistical
    from consensus.methods import smoothing

    calls = []
    real = smoothing.refine_smoothing

    def recording(y, *args, **kwargs):
        if kwargs.get("iterations") is None:  # the training-window refinement
            calls.append((kwargs["method"], len(y)))
        return real(y, *args, **kwargs)

    monkeypatch.setattr(statistical, "REFINE_MARGIN", margin)
    monkeypatch.setattr(smoothing, "refine_smoothing", recording)
    forecast_statistical(_seasonal_store(), cycle="2024-12", horizon=6)
    refined = sum(n for method, n in calls if method.startswith("holt_winters"))
    assert refined == refined_forms * 5
