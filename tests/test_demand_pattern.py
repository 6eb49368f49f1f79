"""Demand classification, trend and seasonality tests against their sources and scipy."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from statsmodels.datasets import co2, elec_equip

from consensus.methods.demand_pattern import (
    classify_demand,
    classify_pattern,
    detect_seasonality,
    detect_trend,
    mann_kendall_z,
    measure_intermittency,
    seasonal_f_statistic,
)


@pytest.mark.parametrize(
    "adi, cv2, expected",
    [
        # Syntetos, Boylan & Croston (2005): cut-offs ADI 1.32, CV² 0.49;
        # a value equal to a cut-off is taken on the low side (our choice, documented).
        (1.0, 0.10, "smooth"),
        (1.32, 0.49, "smooth"),
        (1.32, 0.4901, "erratic"),
        (1.3201, 0.49, "intermittent"),
        (1.3201, 0.4901, "lumpy"),
        (3.0, 2.0, "lumpy"),
        (1.1, 1.5, "erratic"),
        (2.5, 0.2, "intermittent"),
    ],
)
def test_classification_at_the_published_cutoffs(adi, cv2, expected):
    assert classify_pattern(np.array([adi]), np.array([cv2]))[0] == expected


def test_adi_and_cv2_boundaries_from_series():
    # ADI = 66 months / 50 demand months = 1.32 exactly; sizes alternate 3 and 17
    # (mean 10, population variance 49) so CV² = 49/100 = 0.49 exactly -> smooth.
    sizes = np.resize([3.0, 17.0], 50)
    y = np.zeros((3, 67))
    y[0, 1:51] = sizes  # 50 demands then 16 zero months: span of 66 months
    # one more zero month: ADI = 67/50 = 1.34 -> intermittent
    y[1, 0:50] = sizes
    # sizes 2 and 18: variance 64, CV² 0.64 -> erratic
    y[2, 1:51] = np.resize([2.0, 18.0], 50)
    start = np.array([1, 0, 1])
    adi, cv2 = measure_intermittency(y, start)
    assert adi[0] == 1.32 and cv2[0] == 0.49
    assert adi[1] == pytest.approx(1.34)
    assert cv2[2] == pytest.approx(0.64)
    assert list(classify_demand(y, start)) == ["smooth", "intermittent", "erratic"]


def test_no_demand_is_its_own_pattern():
    y = np.zeros((1, 12))
    assert classify_demand(y, np.array([12]))[0] == "no_demand"


def test_mann_kendall_matches_scipy_kendall_tau():
    # Mann-Kendall S/sqrt(var) with tie correction is Kendall's tau test of y
    # against time; scipy.stats.kendalltau(method="asymptotic") is the oracle.
    rng = np.random.default_rng(11)
    y = rng.poisson(3, size=(6, 40)).astype(float) + np.linspace(0, 4, 40) * np.arange(6)[:, None] / 5
    y[2, ::3] = 0.0  # plenty of ties
    start = np.array([0, 4, 10, 0, 25, 37])
    z = mann_kendall_z(y, start)
    for row in range(6):
        span = y[row, start[row]:]
        ref = stats.kendalltau(np.arange(len(span)), span, method="asymptotic")
        assert 2 * stats.norm.sf(abs(z[row])) == pytest.approx(ref.pvalue, rel=1e-9)
        assert np.sign(z[row]) == np.sign(ref.statistic)


def test_seasonal_f_matches_scipy_one_way_anova():
    # The F statistic is scipy.stats.f_oneway over the 12 month-of-year groups of
    # the least-squares-detrended span (numpy.polyfit gives the line).
    y = elec_equip.load().data.iloc[:60, 0].to_numpy()
    rng = np.random.default_rng(5)
    matrix = np.vstack([y, rng.normal(50, 5, 60), y + rng.normal(0, 20, 60)])
    start = np.array([0, 0, 9])
    f, _, _ = seasonal_f_statistic(matrix, start)
    for row in range(3):
        span = matrix[row, start[row]:]
        t = np.arange(start[row], 60)
        resid = span - np.polyval(np.polyfit(t, span, 1), t)
        groups = [resid[(t % 12) == s] for s in range(12)]
        assert f[row] == pytest.approx(stats.f_oneway(*groups).statistic, rel=1e-9)


def test_real_seasonal_and_trending_series_are_detected():
    # elec_equip (statsmodels.datasets, Euro-area orders) is strongly seasonal;
    # co2 (Mauna Loa, statsmodels.datasets, weekly -> monthly means) rises
    # steadily and has an annual cycle; white noise has neither.
    orders = elec_equip.load().data.iloc[:48, 0].to_numpy()
    co2_monthly = co2.load_pandas().data["co2"].resample("MS").mean().interpolate().to_numpy()[:120]
    noise = np.random.default_rng(2).normal(100, 10, 48)
    matrix = np.full((3, 120), np.nan)
    matrix[0, 72:] = orders
    matrix[1] = co2_monthly
    matrix[2, 72:] = noise
    start = np.array([72, 0, 72])
    assert list(detect_seasonality(matrix, start)) == [True, True, False]
    trend = detect_trend(matrix, start)
    assert trend[1] and not trend[2]


def test_short_spans_are_never_flagged():
    y = np.tile(np.arange(1.0, 13.0), 2)[None, :]  # 23 months: under two seasons
    assert not detect_seasonality(y[:, 1:], np.array([0]))[0]
    assert not detect_trend(np.arange(11.0)[None, :], np.array([0]))[0]  # 11 months < 12
    assert detect_trend(np.arange(12.0)[None, :], np.array([0]))[0]


def test_unknown_months_are_left_out_of_every_statistic():
    # NaN is an unknown month: ADI/CV² count known months only (by hand with
    # numpy), Mann-Kendall is scipy's Kendall tau of the known months against
    # their times, the seasonal F is scipy's one-way ANOVA of the known months.
    y = elec_equip.load().data.iloc[:60, 0].to_numpy().copy()
    y[[5, 17, 18, 40]] = np.nan
    sparse = np.array([0, 3, np.nan, 0, 0, 5, 0, np.nan, 2, 0, 0, 4, 0, 0, 6, 0], dtype=float)
    adi, cv2 = measure_intermittency(sparse[None, :], np.array([1]))
    known = sparse[1:][np.isfinite(sparse[1:])]
    sizes = known[known > 0]
    assert adi[0] == pytest.approx(len(known) / len(sizes))
    assert cv2[0] == pytest.approx(sizes.var() / sizes.mean() ** 2)
    t = np.arange(60)
    ok = np.isfinite(y)
    z = mann_kendall_z(y[None, :], np.array([0]))[0]
    ref = stats.kendalltau(t[ok], y[ok], method="asymptotic")
    assert 2 * stats.norm.sf(abs(z)) == pytest.approx(ref.pvalue, rel=1e-9)
    f, _, df_within = seasonal_f_statistic(y[None, :], np.array([0]))
    resid = y[ok] - np.polyval(np.polyfit(t[ok], y[ok], 1), t[ok])
    groups = [resid[(t[ok] % 12) == s] for s in range(12)]
    assert f[0] == pytest.approx(stats.f_oneway(*groups).statistic, rel=1e-9)
    assert df_within[0] == ok.sum() - 12


def test_trend_of_a_long_span_is_tested_on_its_last_ten_years():
    # A span that falls for 200 months and is then flat for ten years: the flag
    # is scipy's Kendall tau test (asymptotic) of the last 120 months only.
    from consensus.methods.demand_pattern import TREND_WINDOW_MONTHS

    rng = np.random.default_rng(2)
    y = np.r_[np.linspace(100, 10, 200), rng.normal(10, 1, 120)]  # falls, then flat for ten years
    flag = detect_trend(y[None, :], np.array([0]))[0]
    recent = y[-TREND_WINDOW_MONTHS:]
    ref = stats.kendalltau(np.arange(len(recent)), recent, method="asymptotic")
    assert flag == bool(ref.pvalue < 0.05)
    assert not flag and detect_trend(y[None, :200], np.array([0]))[0]
