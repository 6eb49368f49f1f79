"""Croston and SBA against the published recursions, worked by hand."""

from __future__ import annotations

import numpy as np
import pytest
from statsmodels.tsa.holtwinters import ExponentialSmoothing

from consensus.errors import InvalidSpec
from consensus.methods.intermittent import (
    CROSTON_ALPHAS,
    bias_factor,
    first_interval,
    fit_croston,
    forecast_croston,
    run_croston,
)

# A short intermittent series, months 0..9.
SERIES = np.array([[3, 0, 0, 5, 0, 2, 0, 0, 0, 4]], dtype=float)


def test_croston_and_sba_by_hand():
    # Croston (1972): z_t = a*y_t + (1-a)*z, p_t = a*q_t + (1-a)*p at demand months.
    # a = 0.2, z0 = 3 (first demand), p0 = 3 (months 0 -> 3, first interval):
    #   month 3: q=3  z = .2*5 + .8*3    = 3.4     p = .2*3 + .8*3   = 3.0
    #   month 5: q=2  z = .2*2 + .8*3.4  = 3.12    p = .2*2 + .8*3   = 2.8
    #   month 9: q=4  z = .2*4 + .8*3.12 = 3.296   p = .2*4 + .8*2.8 = 3.04
    # Croston forecast z/p = 3.296/3.04 = 1.0842105263;
    # SBA (Syntetos & Boylan 2005) multiplies by 1 - a/2 = 0.9: 0.9757894737.
    start = np.array([0])
    p0 = first_interval(SERIES, start, np.array([10]))
    assert p0[0] == 3.0
    croston = run_croston(SERIES, start, alpha=0.2, method="croston", interval0=p0,
                          origins=np.array([9]), horizon=3)
    sba = run_croston(SERIES, start, alpha=0.2, method="sba", interval0=p0, origins=np.array([9]), horizon=3)
    np.testing.assert_allclose(croston.forecasts[0, 0, 0], [1.0842105263] * 3, atol=1e-9)
    np.testing.assert_allclose(sba.forecasts[0, 0, 0], [0.9757894737] * 3, atol=1e-9)
    # forecasts made after month 4 (state of month 3): 3.4/3 = 1.1333…
    mid = run_croston(SERIES, start, alpha=0.2, method="croston", interval0=p0, origins=np.array([4]), horizon=1)
    assert mid.forecasts[0, 0, 0, 0] == pytest.approx(3.4 / 3.0)


def test_one_step_sse_by_hand():
    # One-step forecasts (Croston, a = 0.2) for months 1..9 from the states above:
    # months 1-3: 3/3 = 1; months 4-5: 3.4/3; months 6-9: 3.12/2.8.
    f = np.array([1, 1, 1, 3.4 / 3, 3.4 / 3, 3.12 / 2.8, 3.12 / 2.8, 3.12 / 2.8, 3.12 / 2.8])
    expected = float(((SERIES[0, 1:] - f) ** 2).sum())
    run = run_croston(SERIES, np.array([0]), alpha=0.2, method="croston", interval0=np.array([3.0]),
                      fit_ends=(np.array([10]),))
    assert run.sse[0][0, 0] == pytest.approx(expected)


def test_sba_factor_is_one_minus_half_alpha():
    # Syntetos & Boylan (2005), eq. for the approximation: (1 - a/2) * z/p.
    np.testing.assert_allclose(bias_factor("sba", CROSTON_ALPHAS), 1 - CROSTON_ALPHAS / 2)
    np.testing.assert_allclose(bias_factor("croston", CROSTON_ALPHAS), 1.0)
    with pytest.raises(InvalidSpec):
        bias_factor("tsb", 0.1)


def test_demand_every_month_reduces_to_simple_exponential_smoothing():
    # With demand in every month q = p = 1, so Croston's z/p is SES of y;
    # statsmodels' ExponentialSmoothing (known initial level y_0) is the oracle.
    rng = np.random.default_rng(3)
    y = rng.uniform(5, 15, 30)
    run = run_croston(y[None, :], np.array([0]), alpha=0.15, method="croston", interval0=np.array([1.0]),
                      origins=np.array([29]), horizon=1)
    res = ExponentialSmoothing(y, initialization_method="known", initial_level=y[0]).fit(
        smoothing_level=0.15, optimized=False
    )
    assert run.forecasts[0, 0, 0, 0] == pytest.approx(res.forecast(1)[0], abs=1e-9)


def test_different_starts_and_fit_window_do_not_peek():
    y = np.zeros((2, 24))
    y[0, 2:] = np.tile([4, 0, 0, 6, 0, 1], 4)[:22]
    y[1, 10:] = np.tile([0, 7, 0], 5)[1:15]  # first demand at column 10
    start = np.array([2, 10])
    train_end = np.array([18, 18])
    fit = fit_croston(y, start, method="sba", fit_ends=(train_end,), init_available=train_end - start)
    changed = y.copy()
    changed[:, 18:] = 50.0
    fit_changed = fit_croston(changed, start, method="sba", fit_ends=(train_end,), init_available=train_end - start)
    np.testing.assert_array_equal(fit.alpha[0], fit_changed.alpha[0])
    a = forecast_croston(y, start, method="sba", alpha=fit.alpha[0], init_available=train_end - start,
                         origins=np.array([17]), horizon=4)
    b = forecast_croston(changed, start, method="sba", alpha=fit.alpha[0], init_available=train_end - start,
                         origins=np.array([17]), horizon=4)
    np.testing.assert_array_equal(a, b)
    # the second series alone gives the same forecast as inside the matrix
    alone = forecast_croston(y[1:, 10:], np.array([0]), method="sba", alpha=fit.alpha[0][1:],
                             init_available=np.array([8]), origins=np.array([7]), horizon=4)
    np.testing.assert_allclose(a[1], alone[0])


def test_single_demand_is_not_fittable():
    y = np.array([[0, 5, 0, 0, 0, 0]], dtype=float)
    fit = fit_croston(y, np.array([1]), method="croston", fit_ends=(np.array([6]),), init_available=np.array([5]))
    assert np.isinf(fit.sse[0][0])


def test_unknown_month_updates_nothing_and_is_not_scored_by_hand():
    # The series of test_croston_and_sba_by_hand with month 4 unknown (it was 0):
    # a month without demand updates nothing either, so the states, forecasts
    # and SSE over the known months are the same as there, less month 4's error.
    with_gap = SERIES.copy()
    with_gap[0, 4] = np.nan
    p0 = first_interval(with_gap, np.array([0]), np.array([10]))
    run = run_croston(with_gap, np.array([0]), alpha=0.2, method="croston", interval0=p0,
                      fit_ends=(np.array([10]),), origins=np.array([9]), horizon=2)
    np.testing.assert_allclose(run.forecasts[0, 0, 0], [1.0842105263] * 2, atol=1e-9)
    f = np.array([1, 1, 1, 3.4 / 3, 3.4 / 3, 3.12 / 2.8, 3.12 / 2.8, 3.12 / 2.8, 3.12 / 2.8])
    err2 = (SERIES[0, 1:] - f) ** 2
    assert run.sse[0][0, 0] == pytest.approx(err2.sum() - err2[3])
