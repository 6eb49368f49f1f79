"""Exponential smoothing against the NIST/SEMATECH worked example and statsmodels."""

from __future__ import annotations

import numpy as np
import pytest
from statsmodels.datasets import elec_equip
from statsmodels.tsa.holtwinters import ExponentialSmoothing

from consensus.errors import InvalidSpec
from consensus.methods.smoothing import (
    PARAMETER_GRIDS,
    estimate_initial_states,
    fit_smoothing,
    forecast_smoothing,
    run_smoothing,
)

# NIST/SEMATECH e-Handbook of Statistical Methods, section 6.4.3.1 (single
# exponential smoothing), the 12 observations of its example.
NIST_DATA = np.array([71, 70, 69, 68, 64, 65, 72, 78, 75, 75, 75, 70], dtype=float)


def elec_equip_series(months: int = 120) -> np.ndarray:
    """Euro-area electrical equipment orders, monthly from 1995-01: statsmodels.datasets.elec_equip (ships its CSV)."""
    return elec_equip.load().data.iloc[:months, 0].to_numpy(dtype=float)


@pytest.mark.parametrize(
    "alpha, sse, mse, next_forecast",
    [
        # NIST 6.4.3.1: "alpha = .1 ... SSE = 208.82"; next forecast 71.50 recomputed exactly
        (0.1, 208.82, 18.98, 71.50),
        # NIST 6.4.3.1: "alpha = .5 ... MSE = 16.50"; next forecast 72.40
        (0.5, 181.46, 16.50, 72.40),
    ],
)
def test_ses_reproduces_nist_handbook_example(alpha, sse, mse, next_forecast):
    # Handbook convention: S_2 = y_1 (first smoothed value = first observation),
    # so the first month has no error; SSE sums the 11 one-step errors of
    # months 2..12 and MSE = SSE / 11.  (SSE / 12 would give 15.12 for
    # alpha = .5, not the handbook's 16.50.)
    y = NIST_DATA[None, :]
    start = np.array([0])
    level0, _, _ = estimate_initial_states(y, start, available=np.array([12]), trend=False, seasonal=None)
    assert level0[0] == 71.0
    run = run_smoothing(
        y, start, alpha=alpha, level0=level0, fit_ends=(np.array([12]),), origins=np.array([11]), horizon=1
    )
    assert round(float(run.sse[0][0, 0]), 2) == sse
    assert round(float(run.sse[0][0, 0]) / 11, 2) == mse
    assert round(float(run.forecasts[0, 0, 0, 0]), 2) == next_forecast


def test_ses_grid_fit_is_the_grid_minimum_of_statsmodels_sse():
    # statsmodels SimpleExpSmoothing-equivalent (ExponentialSmoothing without
    # trend/season, known initial level) gives the SSE for each grid alpha.
    y = NIST_DATA
    grid = PARAMETER_GRIDS["ses"][0]
    sm_sse = []
    for a in grid:
        res = ExponentialSmoothing(y, initialization_method="known", initial_level=y[0]).fit(
            smoothing_level=a, optimized=False
        )
        sm_sse.append(res.sse)
    fit = fit_smoothing(
        y[None, :], np.array([0]), method="ses", fit_ends=(np.array([12]),), init_available=np.array([12])
    )
    assert fit.params[0]["alpha"][0] == pytest.approx(grid[int(np.argmin(sm_sse))])
    assert fit.sse[0][0] == pytest.approx(min(sm_sse), rel=1e-9)


CONFIGS = [
    # (trend, damped, seasonal, alpha, beta, gamma, phi)
    (False, False, None, 0.3, None, None, None),
    (True, False, None, 0.3, 0.1, None, None),
    (True, True, None, 0.4, 0.2, None, 0.9),
    (True, False, "add", 0.3, 0.1, 0.2, None),
    (True, True, "add", 0.3, 0.05, 0.25, 0.92),
    (True, False, "mul", 0.25, 0.1, 0.3, None),
    (True, True, "mul", 0.2, 0.1, 0.2, 0.95),
]


@pytest.mark.parametrize("trend, damped, seasonal, alpha, beta, gamma, phi", CONFIGS)
def test_recursion_matches_statsmodels_exponential_smoothing(trend, damped, seasonal, alpha, beta, gamma, phi):
    y = elec_equip_series()
    n = len(y)
    matrix, start = y[None, :], np.array([0])
    level0, trend0, season0 = estimate_initial_states(
        matrix, start, available=np.array([n]), trend=trend, seasonal=seasonal
    )
    known = {"initial_level": level0[0]}
    if trend:
        known["initial_trend"] = trend0[0]
    if seasonal:
        known["initial_seasonal"] = season0[0]
    model = ExponentialSmoothing(
        y, trend="add" if trend else None, damped_trend=damped, seasonal=seasonal,
        seasonal_periods=12 if seasonal else None, initialization_method="known", **known,
    )
    fixed = {"smoothing_level": alpha}
    if trend:
        fixed["smoothing_trend"] = beta
    if seasonal:
        fixed["smoothing_seasonal"] = gamma
    if damped:
        fixed["damping_trend"] = phi
    res = model.fit(optimized=False, **fixed)
    horizon = 30
    run = run_smoothing(
        matrix, start, alpha=alpha, beta=beta, gamma=gamma, phi=phi, trend=trend, seasonal=seasonal,
        level0=level0, trend0=trend0, season0=season0, fit_ends=(np.array([n]),), keep_fitted=True,
        origins=np.array([n - 1]), horizon=horizon,
    )
    np.testing.assert_allclose(run.fitted[0, 0], res.fittedvalues, atol=1e-6, rtol=0)
    assert run.sse[0][0, 0] == pytest.approx(res.sse, rel=1e-9)
    ours = run.forecasts[0, 0, 0]
    theirs = res.forecast(horizon)
    h = np.arange(1, horizon + 1)
    if seasonal is None:
        np.testing.assert_allclose(ours, theirs, atol=1e-6, rtol=0)
        return
    # statsmodels 0.15 uses the seasonal term of two seasons back at h = 12, 24, …
    # (statsmodels issue #9538, fixed by PR #10230); elsewhere the forecasts agree.
    off_season = h % 12 != 0
    np.testing.assert_allclose(ours[off_season], theirs[off_season], atol=1e-6, rtol=0)
    # At h = 12k check the textbook forecast l_T + φ_h·b_T (+/×) s_T
    # (Hyndman et al. 2008, Table 2.1) built from statsmodels' own final components.
    damp = np.cumsum((phi if damped else 1.0) ** h)
    base = res.level[-1] + damp * res.trend[-1]
    textbook = base + res.season[-1] if seasonal == "add" else base * res.season[-1]
    np.testing.assert_allclose(ours[~off_season], textbook[~off_season], atol=1e-6, rtol=0)


def test_many_series_with_different_starts_match_each_alone():
    # Vectorisation check: elec_equip placed at column 0, 7 and 30 of one
    # matrix (junk before each start) gives statsmodels' fit of each span.
    y = elec_equip_series(150)
    starts = np.array([0, 7, 30])
    matrix = np.full((3, 150), 999.0)
    for row, s in enumerate(starts):
        matrix[row, s:] = y[: 150 - s]
    level0, trend0, season0 = estimate_initial_states(
        matrix, starts, available=150 - starts, trend=True, seasonal="add"
    )
    run = run_smoothing(
        matrix, starts, alpha=0.3, beta=0.05, gamma=0.2, phi=0.95, trend=True, seasonal="add",
        level0=level0, trend0=trend0, season0=season0, keep_fitted=True, origins=np.array([149]), horizon=11,
    )
    for row, s in enumerate(starts):
        span = y[: 150 - s]
        res = ExponentialSmoothing(
            span, trend="add", damped_trend=True, seasonal="add", seasonal_periods=12,
            initialization_method="known", initial_level=level0[row], initial_trend=trend0[row],
            initial_seasonal=season0[row],
        ).fit(smoothing_level=0.3, smoothing_trend=0.05, smoothing_seasonal=0.2, damping_trend=0.95, optimized=False)
        np.testing.assert_allclose(run.fitted[row, 0, s:], res.fittedvalues, atol=1e-6, rtol=0)
        assert np.isnan(run.fitted[row, 0, :s]).all()
        np.testing.assert_allclose(run.forecasts[row, 0, 0], res.forecast(11), atol=1e-6, rtol=0)


def test_training_fit_ignores_months_after_its_window():
    y = np.vstack([elec_equip_series(60), elec_equip_series(60) * 0.5 + 3])
    start = np.array([0, 0])
    train_end = np.array([48, 48])
    fit_a = fit_smoothing(y, start, method="holt_winters_add", fit_ends=(train_end,), init_available=train_end)
    changed = y.copy()
    changed[:, 48:] = 1e6
    fit_b = fit_smoothing(changed, start, method="holt_winters_add", fit_ends=(train_end,), init_available=train_end)
    for name in ("alpha", "beta", "gamma", "phi"):
        np.testing.assert_array_equal(fit_a.params[0][name], fit_b.params[0][name])
    # and a forecast from the last training month does not move either
    fc_a = forecast_smoothing(y, start, method="holt_winters_add", params=fit_a.params[0], available=train_end,
                              origins=np.array([47]), horizon=6)
    fc_b = forecast_smoothing(changed, start, method="holt_winters_add", params=fit_a.params[0],
                              available=train_end, origins=np.array([47]), horizon=6)
    np.testing.assert_array_equal(fc_a, fc_b)


def test_grid_fit_beats_every_grid_point_for_each_series():
    # The arg-min is per series: re-running each grid point alone never gives a lower SSE.
    rng = np.random.default_rng(7)
    y = elec_equip_series(48)[None, :] * rng.uniform(0.5, 2.0, (4, 1)) + rng.normal(0, 3, (4, 48))
    start = np.array([0, 0, 5, 10])
    avail = 48 - start
    fit = fit_smoothing(y, start, method="holt_damped", fit_ends=(np.full(4, 48),), init_available=avail)
    level0, trend0, _ = estimate_initial_states(y, start, available=avail, trend=True, seasonal=None)
    a, b, p = PARAMETER_GRIDS["holt_damped"]
    every = run_smoothing(y, start, alpha=a, beta=b, phi=p, trend=True, level0=level0, trend0=trend0,
                          fit_ends=(np.full(4, 48),)).sse[0]
    np.testing.assert_allclose(fit.sse[0], every.min(axis=1), rtol=1e-12)


def test_unknown_seasonal_kind_is_rejected():
    with pytest.raises(InvalidSpec):
        run_smoothing(np.ones((1, 5)), np.array([0]), alpha=0.1, level0=np.ones(1), seasonal="both")
    with pytest.raises(InvalidSpec):
        fit_smoothing(np.ones((1, 5)), np.array([0]), method="arima", fit_ends=(np.array([5]),),
                      init_available=np.array([5]))
