"""Croston's method and its Syntetos–Boylan correction, for many series at once.

Croston (1972, "Forecasting and stock control for intermittent demands",
Operational Research Quarterly 23(3)) smooths the non-zero demand sizes and
the intervals between them separately, updating only in months with demand:

* if ``y_t > 0``: ``z_t = α·y_t + (1−α)·z_{t−1}``,
  ``p_t = α·q_t + (1−α)·p_{t−1}`` with ``q_t`` the months since the previous
  demand; otherwise ``z`` and ``p`` carry over;
* forecast for every future month: ``z_t / p_t``.

An unknown month (NaN) updates nothing and is not scored; the months-since
counter runs on through it (time passes whether or not its orders are known).

Syntetos & Boylan (2005, "The accuracy of intermittent demand estimates",
International Journal of Forecasting 21(2)) showed that ratio is biased
upwards and multiply it by ``1 − α/2`` (SBA).

Initialisation (Croston left it open): the span starts at the first demand,
``z_0`` is that demand and ``p_0`` the interval to the second demand inside
the fitting window; updates start at the second demand.  Arrays follow the
layout of :mod:`consensus.methods.smoothing`: ``y`` is ``(n_series,
n_months)``, series ``i`` lives in columns ``start[i] …``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from consensus.errors import InvalidSpec

#: Smoothing constants searched (Croston-type methods are usually run with
#: α between 0.05 and 0.3; Syntetos & Boylan 2005 study 0.05–0.20).
CROSTON_ALPHAS = np.round(np.arange(0.05, 0.301, 0.025), 4)

INTERMITTENT_METHODS = ("croston", "sba")


def bias_factor(method: str, alpha) -> np.ndarray:
    """Multiplier of ``z/p``: 1 for Croston, ``1 − α/2`` for SBA (Syntetos & Boylan 2005)."""
    if method not in INTERMITTENT_METHODS:
        raise InvalidSpec(f"unknown intermittent method {method!r}; expected one of {INTERMITTENT_METHODS}")
    alpha = np.asarray(alpha, dtype=float)
    return np.ones_like(alpha) if method == "croston" else 1.0 - alpha / 2.0


def first_interval(y: np.ndarray, start: np.ndarray, available: np.ndarray) -> np.ndarray:
    """Months from the first to the second demand within ``available`` span months (NaN if none)."""
    n_series, n_months = y.shape
    t = np.arange(n_months)
    after_first = (t[None, :] > start[:, None]) & (t[None, :] < (start + available)[:, None])
    is_demand = after_first & (y > 0)
    has_second = is_demand.any(axis=1)
    second = np.argmax(is_demand, axis=1)
    return np.where(has_second, second - start, np.nan).astype(float)


@dataclass(frozen=True)
class CrostonRun:
    """SSE per fitting window ``(n_series, n_grid)`` and forecasts ``(n_series, n_grid, n_origins, horizon)``."""

    sse: tuple[np.ndarray, ...]
    forecasts: np.ndarray | None


def run_croston(
    y: np.ndarray,
    start: np.ndarray,
    *,
    alpha,
    method: str = "croston",
    interval0: np.ndarray,
    fit_ends: Sequence[np.ndarray] = (),
    origins: np.ndarray | None = None,
    horizon: int = 0,
) -> CrostonRun:
    """Run Croston/SBA over all series and smoothing constants at once.

    ``alpha`` is a scalar, ``(n_grid,)`` or ``(n_series, n_grid)``.  The one-step
    forecast for month t is the bias factor × ``z/p`` after month t−1; the
    first month of a span (the first demand) has no forecast and no error.
    """
    y = np.asarray(y, dtype=float)
    start = np.asarray(start, dtype=int)
    n_series, n_months = y.shape
    shape = np.broadcast_shapes((n_series, 1), np.shape(alpha))
    a = np.broadcast_to(np.asarray(alpha, dtype=float), shape)
    factor = bias_factor(method, a)
    first_demand = np.take_along_axis(y, np.minimum(start, n_months - 1)[:, None], axis=1)
    size = np.broadcast_to(first_demand, shape).copy()
    interval = np.broadcast_to(np.asarray(interval0, dtype=float)[:, None], shape).copy()
    since = np.zeros((n_series, 1))
    ends = [np.asarray(e, dtype=int) for e in fit_ends]
    sse = [np.zeros(shape) for _ in ends]
    origins = np.asarray([] if origins is None else origins, dtype=int)
    origin_slot = {int(o): k for k, o in enumerate(origins)}
    forecasts = np.full(shape + (len(origins), horizon), np.nan) if len(origins) and horizon else None
    first = int(start.min()) if n_series else n_months
    with np.errstate(all="ignore"):
        for t in range(max(first, 0), n_months):
            started = (t >= start)[:, None]
            updating = (t > start)[:, None]
            obs = y[:, t][:, None]
            known = np.isfinite(obs)
            pred = factor * size / interval
            err2 = (obs - pred) ** 2
            for acc, end in zip(sse, ends):
                acc += np.where(updating & known & (t < end)[:, None], err2, 0.0)
            since = np.where(updating, since + 1, since)
            demand = updating & (obs > 0)
            size = np.where(demand, a * obs + (1 - a) * size, size)
            interval = np.where(demand, a * since + (1 - a) * interval, interval)
            since = np.where(demand | ~started, 0.0, since)
            k = origin_slot.get(t)
            if k is not None:
                forecasts[:, :, k, :] = (factor * size / interval)[..., None]
    return CrostonRun(sse=tuple(sse), forecasts=forecasts)


@dataclass(frozen=True)
class CrostonFit:
    """Best α per series for each fitting window, with the minimal SSE."""

    method: str
    alpha: tuple[np.ndarray, ...]
    sse: tuple[np.ndarray, ...]


def fit_croston(
    y: np.ndarray,
    start: np.ndarray,
    *,
    method: str,
    fit_ends: Sequence[np.ndarray],
    init_available: np.ndarray,
) -> CrostonFit:
    """Choose α from :data:`CROSTON_ALPHAS` per series by in-sample one-step SSE over each window.

    ``p_0`` is the first interval within the first ``init_available`` months,
    so a training-window fit never reads later months.  Series with fewer
    than two demands there get inf SSE (not fittable).
    """
    interval0 = first_interval(np.asarray(y, float), np.asarray(start, int), np.asarray(init_available, int))
    run = run_croston(y, start, alpha=CROSTON_ALPHAS, method=method, interval0=interval0, fit_ends=fit_ends)
    rows = np.arange(np.shape(y)[0])
    alphas, sses = [], []
    for window_sse in run.sse:
        sse = np.where(np.isfinite(window_sse) & np.isfinite(interval0)[:, None], window_sse, np.inf)
        best = np.argmin(sse, axis=1)
        alphas.append(CROSTON_ALPHAS[best])
        sses.append(sse[rows, best])
    return CrostonFit(method=method, alpha=tuple(alphas), sse=tuple(sses))


def forecast_croston(
    y: np.ndarray,
    start: np.ndarray,
    *,
    method: str,
    alpha: np.ndarray,
    init_available: np.ndarray,
    origins: np.ndarray,
    horizon: int,
) -> np.ndarray:
    """Forecasts ``(n_series, len(origins), horizon)`` with fixed per-series α (rolling origin)."""
    interval0 = first_interval(np.asarray(y, float), np.asarray(start, int), np.asarray(init_available, int))
    run = run_croston(
        y, start, alpha=np.asarray(alpha, float)[:, None], method=method, interval0=interval0,
        origins=origins, horizon=horizon,
    )
    return run.forecasts[:, 0]
