"""The Theta method for many monthly series at once.

Assimakopoulos & Nikolopoulos (2000, "The theta model: a decomposition
approach to forecasting", International Journal of Forecasting 16(4)) split a
seasonally adjusted series into two "theta lines", the linear trend (θ = 0)
and a line with doubled curvature (θ = 2) extrapolated by simple exponential
smoothing, and average their forecasts.  Hyndman & Billah (2003, "Unmasking
the Theta method", IJF 19(2)) showed this is SES with drift equal to half the
slope of the fitted line:

    ŷ_{T+h} = ℓ_T + ½·b₀·(h − 1 + 1/α − (1−α)^n / α)

with ``ℓ_T`` the SES level after the last month, ``α`` its smoothing
constant, ``b₀`` the least-squares slope of the adjusted series on time and
``n`` the number of months smoothed (statsmodels' ``ThetaModel`` forecast with
θ = 2, the tests' oracle).  Seasonality is removed first by classical
multiplicative decomposition (additive when a value is not positive) and put
back on the forecast, as in the M3 competition's Theta (Makridakis & Hibon
2000).

Arrays follow :mod:`consensus.methods.smoothing`: ``y`` is ``(n_series,
n_months)`` and series ``i`` lives in columns ``start[i] …``; NaN months are
unknown (left out of the decomposition and the slope, carried through SES by
its forecast).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from consensus.methods import smoothing


def classical_seasonal_index(
    y: np.ndarray, start: np.ndarray, *, end: np.ndarray, multiplicative: np.ndarray, season_length: int = 12
) -> np.ndarray:
    """Seasonal index by slot ``t mod m`` of columns ``start … end−1``, shape ``(n, m)``.

    Classical decomposition (Persons 1919; Makridakis, Wheelwright & Hyndman
    1998, ch. 3; statsmodels' ``seasonal_decompose``): the centred 2×m moving
    average is the trend, each slot's index is the mean of ``y / trend``
    (``y − trend`` where ``multiplicative`` is False) over the months where
    the average is defined, normalised to mean 1 (sum 0).  A slot without a
    ratio gets the neutral index.
    """
    y = np.asarray(y, dtype=float)
    start = np.asarray(start, dtype=int)
    end = np.asarray(end, dtype=int)
    multiplicative = np.asarray(multiplicative, dtype=bool)
    n_series, n_months = y.shape
    m = int(season_length)
    t = np.arange(n_months)[None, :]
    inside = (t >= start[:, None]) & (t < end[:, None])
    values = np.where(inside, y, np.nan)
    weights = np.r_[0.5, np.ones(m - 1), 0.5] / m if m % 2 == 0 else np.ones(m) / m
    half = len(weights) // 2
    trend = np.full((n_series, n_months), np.nan)
    if n_months > 2 * half:
        acc = np.zeros((n_series, n_months - 2 * half))
        for k, w in enumerate(weights):
            acc = acc + w * values[:, k:n_months - 2 * half + k]
        trend[:, half:n_months - half] = acc
    with np.errstate(all="ignore"):
        detrended = np.where(multiplicative[:, None], values / trend, values - trend)
    slot = t[0] % m
    index = np.zeros((n_series, m))
    for s in range(m):
        cols = detrended[:, slot == s]
        finite = np.isfinite(cols)
        count = finite.sum(axis=1)
        mean = np.where(finite, cols, 0.0).sum(axis=1) / np.maximum(count, 1)
        index[:, s] = np.where(count > 0, mean, np.where(multiplicative, 1.0, 0.0))
    with np.errstate(all="ignore"):
        normalised = np.where(multiplicative[:, None], index / index.mean(axis=1, keepdims=True),
                              index - index.mean(axis=1, keepdims=True))
    return normalised


@dataclass(frozen=True)
class ThetaFit:
    """What the Theta forecast needs per series: SES α and initial level, slope b₀, season and its kind."""

    alpha: np.ndarray
    level0: np.ndarray
    slope: np.ndarray
    season: np.ndarray  # (n, m) by slot t mod m; ones (zeros) when not seasonal
    multiplicative: np.ndarray
    sse: np.ndarray


def _adjusted(y, fit: ThetaFit, season_length: int) -> np.ndarray:
    slot = np.arange(y.shape[1]) % season_length
    index = fit.season[:, slot]
    with np.errstate(all="ignore"):
        return np.where(fit.multiplicative[:, None], y / index, y - index)


def fit_theta(
    y: np.ndarray,
    start: np.ndarray,
    *,
    end: np.ndarray,
    seasonal: np.ndarray,
    season_length: int = 12,
    refine: bool = True,
) -> ThetaFit:
    """Fit the Theta method on columns ``start … end−1`` of each series.

    Series flagged ``seasonal`` are adjusted by :func:`classical_seasonal_index`
    (multiplicative when every known month of the window is positive); ``b₀``
    is the least-squares slope of the adjusted window on time; ``α`` and the
    initial level come from :func:`consensus.methods.smoothing.fit_smoothing`
    ("ses": grid, then refinement) on the adjusted window.
    """
    y = np.asarray(y, dtype=float)
    start = np.asarray(start, dtype=int)
    end = np.asarray(end, dtype=int)
    n_series, n_months = y.shape
    m = int(season_length)
    t = np.arange(n_months)[None, :]
    window = (t >= start[:, None]) & (t < end[:, None]) & np.isfinite(y)
    positive = np.where(window, y > 0, True).all(axis=1)
    seasonal = np.asarray(seasonal, dtype=bool)
    season = classical_seasonal_index(y, start, end=end, multiplicative=positive, season_length=m)
    neutral = np.where(positive[:, None], 1.0, 0.0) * np.ones((1, m))
    season = np.where(seasonal[:, None], season, neutral)
    draft = ThetaFit(np.zeros(n_series), np.zeros(n_series), np.zeros(n_series), season, positive,
                     np.zeros(n_series))
    adjusted = _adjusted(y, draft, m)
    count = window.sum(axis=1)
    with np.errstate(all="ignore"):
        t_mean = np.where(window, t, 0).sum(axis=1) / count
        a_mean = np.where(window, adjusted, 0.0).sum(axis=1) / count
        dt = np.where(window, t - t_mean[:, None], 0.0)
        slope = (dt * np.where(window, adjusted - a_mean[:, None], 0.0)).sum(axis=1) / (dt**2).sum(axis=1)
    slope = np.nan_to_num(slope)
    fit = smoothing.fit_smoothing(
        np.where(np.isfinite(adjusted), adjusted, np.nan), start, method="ses", fit_ends=(end,),
        init_available=end - start, season_length=m, refine=refine,
    )
    return ThetaFit(fit.params[0]["alpha"], fit.states[0].level, slope, season, positive, fit.sse[0])


def forecast_theta(
    y: np.ndarray,
    start: np.ndarray,
    fit: ThetaFit,
    *,
    origins: np.ndarray,
    horizon: int,
    season_length: int = 12,
) -> np.ndarray:
    """Theta forecasts ``(n_series, len(origins), horizon)`` with fixed α, b₀ and season (rolling origin).

    From origin ``o`` the SES level has smoothed ``n = o − start + 1`` months;
    ``ŷ_{o+h} = (ℓ_o + ½·b₀·(h − 1 + 1/α − (1−α)^n/α))`` × (or +) the index
    of month ``o+h``'s slot.
    """
    y = np.asarray(y, dtype=float)
    start = np.asarray(start, dtype=int)
    origins = np.asarray(origins, dtype=int)
    m = int(season_length)
    adjusted = _adjusted(y, fit, m)
    run = smoothing.run_smoothing(
        adjusted, start, alpha=fit.alpha[:, None], level0=fit.level0, origins=origins, horizon=horizon,
    )
    level = run.forecasts[:, 0]  # (n, K, H): the SES forecast is flat at the level
    a = fit.alpha[:, None, None]
    smoothed = (origins[None, :] - start[:, None] + 1).astype(float)[:, :, None]
    h = np.arange(1, horizon + 1, dtype=float)[None, None, :]
    with np.errstate(all="ignore"):
        drift = h - 1 + 1 / a - (1 - a) ** smoothed / a
    point = level + 0.5 * fit.slope[:, None, None] * drift
    slot = (origins[:, None] + np.arange(1, horizon + 1)[None, :]) % m  # (K, H)
    index = fit.season[:, slot]  # (n, K, H)
    return np.where(fit.multiplicative[:, None, None], point * index, point + index)
