"""The Theta method against statsmodels' ThetaModel (Assimakopoulos & Nikolopoulos 2000; Hyndman & Billah 2003)."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from statsmodels.datasets import elec_equip
from statsmodels.tsa.forecasting.theta import ThetaModel
from statsmodels.tsa.seasonal import seasonal_decompose

from consensus.methods.theta import classical_seasonal_index, fit_theta, forecast_theta


def orders(months: int) -> np.ndarray:
    """Euro-area electrical equipment orders (statsmodels.datasets.elec_equip, shipped offline)."""
    return elec_equip.load().data.iloc[:months, 0].to_numpy(dtype=float)


@pytest.mark.parametrize("model", ["mul", "add"])
def test_seasonal_index_is_statsmodels_classical_decomposition(model):
    y = orders(96)
    index = classical_seasonal_index(y[None, :], np.array([0]), end=np.array([96]),
                                     multiplicative=np.array([model == "mul"]))
    reference = seasonal_decompose(y, model=model, period=12).seasonal[:12]
    np.testing.assert_allclose(index[0], reference, rtol=1e-10, atol=1e-10)


@pytest.mark.parametrize("seasonal", [True, False])
def test_forecast_is_statsmodels_theta_model_at_its_alpha(seasonal):
    # statsmodels' ThetaModel (theta = 2, multiplicative decomposition forced
    # on or off, OLS slope, SES with known initial level = first adjusted
    # month) is the oracle: at its alpha our decomposition, slope and
    # forecast give its numbers.
    y = orders(120)
    reference = ThetaModel(y, period=12, deseasonalize=seasonal, use_test=False, method="mul").fit()
    ours = fit_theta(y[None, :], np.array([0]), end=np.array([120]), seasonal=np.array([seasonal]))
    assert ours.slope[0] == pytest.approx(reference.params["b0"], rel=1e-9)
    adjusted0 = y[0] / ours.season[0, 0]
    at_theirs = dataclasses.replace(ours, alpha=np.array([reference.params["alpha"]]), level0=np.array([adjusted0]))
    fc = forecast_theta(y[None, :], np.array([0]), at_theirs, origins=np.array([119]), horizon=18)
    np.testing.assert_allclose(fc[0, 0], reference.forecast(18), rtol=1e-9)


def test_fitted_alpha_is_no_worse_in_sample_than_statsmodels():
    # Our alpha (grid, then refinement of alpha and the initial level) reaches
    # an in-sample SES error of the adjusted series no higher than at
    # statsmodels' maximum-likelihood alpha with its fixed initial level.
    from consensus.methods.smoothing import run_smoothing

    y = orders(150)
    reference = ThetaModel(y, period=12, use_test=False, method="mul").fit()
    ours = fit_theta(y[None, :], np.array([0]), end=np.array([150]), seasonal=np.array([True]))
    adjusted = y / ours.season[0, np.arange(150) % 12]
    theirs = run_smoothing(adjusted[None, :], np.array([0]), alpha=reference.params["alpha"],
                           level0=adjusted[:1], fit_ends=(np.array([150]),)).sse[0][0, 0]
    assert ours.sse[0] <= theirs * (1 + 1e-9)


def test_rolling_origins_use_only_the_months_up_to_each_origin():
    y = orders(72)
    fit = fit_theta(y[None, :], np.array([0]), end=np.array([60]), seasonal=np.array([True]))
    changed = y.copy()
    changed[65:] = 1e6
    a = forecast_theta(y[None, :], np.array([0]), fit, origins=np.array([59, 62, 64]), horizon=6)
    b = forecast_theta(changed[None, :], np.array([0]), fit, origins=np.array([59, 62, 64]), horizon=6)
    np.testing.assert_array_equal(a, b)
