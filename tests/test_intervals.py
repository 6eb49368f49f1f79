"""Error bands: numpy quantile oracle, normal-distribution facts, interval score examples, calibration backtest."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from consensus.errors import InvalidSpec
from consensus.methods.intervals import backtest_bands, empirical_bands, interval_coverage, winkler_score


def relative_errors(n, lag_bucket, sd, seed):
    rng = np.random.default_rng(seed)
    forecast = rng.uniform(20, 500, size=n)
    return pd.DataFrame({"lag_bucket": lag_bucket, "forecast": forecast,
                         "actual": forecast * (1 + rng.normal(0, sd, size=n))})


def test_winkler_score_examples():
    # Interval score (Winkler, 1972; Gneiting & Raftery, 2007, eq. 43): 80% interval [80, 120]:
    # y = 100 inside → width 40; y = 130 → 40 + (2/0.2)·10 = 140; y = 70 → also 140 by symmetry.
    np.testing.assert_allclose(winkler_score([80, 80, 80], [120, 120, 120], [100, 130, 70], level=0.8),
                               [40.0, 140.0, 140.0])


def test_interval_coverage_counts_ends_as_inside():
    assert interval_coverage([0, 0, 0, 0], [10, 10, 10, 10], [0, 10, 11, np.nan]) == pytest.approx(2 / 3)


def test_empirical_band_is_the_quantile_of_relative_errors():
    # Williams & Goodman (1971): band = F·(1 + empirical quantile of past relative errors);
    # oracle numpy.quantile (linear interpolation, Hyndman & Fan type 7).
    past = relative_errors(200, "1", 0.2, seed=1)
    forecast = pd.DataFrame({"item": ["KIT-A"], "lag_bucket": ["1"], "consensus": [250.0]})
    out = empirical_bands(forecast, past)
    rel = (past["actual"] - past["forecast"]) / past["forecast"]
    for level, pct in ((0.8, 80), (0.95, 95)):
        low, high = np.quantile(rel, [(1 - level) / 2, (1 + level) / 2])
        assert out[f"lower_{pct}"].iloc[0] == pytest.approx(250 * (1 + low))
        assert out[f"upper_{pct}"].iloc[0] == pytest.approx(250 * (1 + high))
    assert out["band_method"].iloc[0] == "empirical, 200 errors"


def test_short_history_uses_normal_from_mad():
    # For normal errors E|e| = σ·√(2/π), so σ ≈ 1.25·MAD (normal distribution fact).  With a large
    # sample but min_errors above it, the MAD band approaches F·(1 ± z·σ): z = 1.2816 (80%), 1.9600 (95%)
    # (scipy.stats.norm.ppf as the table of normal quantiles).
    past = relative_errors(20_000, "2-3", 0.1, seed=2)
    forecast = pd.DataFrame({"lag_bucket": ["2-3"], "consensus": [1000.0]})
    out = empirical_bands(forecast, past, min_errors=50_000)
    assert out["band_method"].iloc[0] == "normal from MAD, 20000 errors"
    for level, pct in ((0.8, 80), (0.95, 95)):
        z = stats.norm.ppf((1 + level) / 2)
        assert out[f"upper_{pct}"].iloc[0] == pytest.approx(1000 * (1 + z * 0.1), rel=0.005)
        assert out[f"lower_{pct}"].iloc[0] == pytest.approx(1000 * (1 - z * 0.1), rel=0.005)


def test_groups_are_kept_apart_and_empty_groups_borrow_the_pool():
    past = pd.concat([relative_errors(100, "1", 0.05, 3), relative_errors(100, "7+", 0.5, 4)], ignore_index=True)
    forecast = pd.DataFrame({"lag_bucket": ["1", "7+", "4-6"], "consensus": [100.0, 100.0, 100.0]})
    out = empirical_bands(forecast, past).set_index("lag_bucket")
    width = out["upper_80"] - out["lower_80"]
    assert width["7+"] > 5 * width["1"]
    assert out.loc["4-6", "band_method"] == "empirical, pooled, 200 errors"


def test_lag_bucket_is_derived_from_cycle_and_period():
    past = relative_errors(40, "2-3", 0.1, 5)
    forecast = pd.DataFrame({"cycle": ["2027-01"], "period": ["2027-03"], "consensus": [10.0]})
    out = empirical_bands(forecast, past)
    assert out["lag_bucket"].iloc[0] == "2-3" and out["band_method"].iloc[0] == "empirical, 40 errors"


def test_bands_are_checked():
    past = relative_errors(10, "1", 0.1, 6)
    forecast = pd.DataFrame({"lag_bucket": ["1"], "consensus": [10.0]})
    with pytest.raises(InvalidSpec):
        empirical_bands(forecast, past, levels=(0.8, 1.2))
    with pytest.raises(InvalidSpec):
        empirical_bands(forecast, past, by=("family",))
    with pytest.raises(InvalidSpec):
        winkler_score([1], [2], [1], level=0.0)


@settings(max_examples=50, deadline=None)
@given(errors=st.lists(st.tuples(st.floats(0.1, 1e4), st.floats(0, 1e4)), min_size=1, max_size=60),
       points=st.lists(st.floats(0, 1e5), min_size=1, max_size=10), min_errors=st.integers(1, 40))
def test_bands_hold_the_forecast_and_stay_nonnegative(errors, points, min_errors):
    past = pd.DataFrame(errors, columns=["forecast", "actual"]).assign(lag_bucket="1")
    forecast = pd.DataFrame({"lag_bucket": "1", "consensus": points})
    out = empirical_bands(forecast, past, min_errors=min_errors)
    tol = 1e-9 * (1 + out["consensus"])
    for pct in (80, 95):
        assert (out[f"lower_{pct}"] >= 0).all()
        assert (out[f"lower_{pct}"] <= out["consensus"] + tol).all()
        assert (out[f"upper_{pct}"] >= out["consensus"] - tol).all()
    # The wider level contains the narrower one (quantiles are monotone).
    assert (out["lower_95"] <= out["lower_80"] + tol).all() and (out["upper_95"] >= out["upper_80"] - tol).all()


def test_backtest_coverage_is_near_nominal_for_stable_errors():
    # With errors drawn from one fixed distribution, empirical quantiles are consistent, so
    # out-of-sample coverage approaches the nominal level (Williams & Goodman, 1971); we ask for the
    # planning target of 5 points.  Invented data, fixed seed.
    rng = np.random.default_rng(8)
    rows = []
    cycles = [f"2025-{m:02d}" for m in range(1, 13)] + [f"2026-{m:02d}" for m in range(1, 13)]
    for index, cycle in enumerate(cycles):
        for lag in range(1, 7):
            period_index = 2025 * 12 + index + lag
            period = f"{period_index // 12}-{period_index % 12 + 1:02d}"
            forecast = rng.uniform(50, 400, size=60)
            actual = forecast * np.exp(rng.normal(0, 0.1 + 0.04 * lag, size=60))  # lognormal, wider with lag
            rows.append(pd.DataFrame({"cycle": cycle, "period": period, "lag": lag, "forecast": forecast,
                                      "actual": actual}))
    errors = pd.concat(rows, ignore_index=True)
    result = backtest_bands(errors, first_test_cycle="2025-07").set_index("level")
    assert result.loc[0.8, "coverage"] == pytest.approx(0.8, abs=0.05)
    assert result.loc[0.95, "coverage"] == pytest.approx(0.95, abs=0.05)
    assert result.loc[0.8, "n_cycles"] == 18
    assert result.loc[0.8, "mean_winkler"] > 0


def test_backtest_uses_only_actuals_known_at_each_cycle():
    # A single earlier error known by the test cycle, and one not yet known (period after the cycle):
    # the band must come from the first only (1 error → normal from MAD).
    errors = pd.DataFrame({"cycle": ["2026-01", "2026-01", "2026-02"], "period": ["2026-02", "2026-05", "2026-03"],
                           "forecast": [100.0, 100.0, 100.0], "actual": [110.0, 500.0, 105.0]})
    result = backtest_bands(errors, levels=(0.8,), min_errors=30, first_test_cycle="2026-02")
    # MAD = 0.10 → σ = 0.1253, 80% band 100·(1 ± 1.2816·0.1253) = [83.9, 116.1] contains 105.
    assert result.loc[0, "coverage"] == 1.0
    assert result.loc[0, "mean_winkler"] == pytest.approx(2 * 100 * stats.norm.ppf(0.9) * 0.1 * np.sqrt(np.pi / 2))
