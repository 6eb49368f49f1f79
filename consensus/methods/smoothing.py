"""Exponential smoothing for many monthly series at once.

Every function works on a matrix ``y`` of shape ``(n_series, n_months)`` whose
columns are consecutive months ending at the cycle month; series ``i`` lives in
columns ``start[i] … n_months−1`` (its *span*) and values before its start are
ignored.  The recursions loop over months only; series and parameter grids are
numpy axes, so fitting ten thousand series is a few dozen array operations per
month rather than a Python loop over series.

The recursions are the error-correction forms of Hyndman, Koehler, Ord &
Snyder, *Forecasting with Exponential Smoothing* (Springer 2008), ch. 2, with
additive (optionally damped) trend:

* level     ``l_t = α·a_t + (1−α)·(l_{t−1} + φ·b_{t−1})``
* trend     ``b_t = β·(l_t − l_{t−1}) + (1−β)·φ·b_{t−1}``
* season    ``s_t = γ·(y_t − l_{t−1} − φ·b_{t−1}) + (1−γ)·s_{t−m}`` (additive) or
  ``s_t = γ·y_t/(l_{t−1} + φ·b_{t−1}) + (1−γ)·s_{t−m}`` (multiplicative)
* one-step forecast ``ŷ_t = l_{t−1} + φ·b_{t−1}`` (+ or × ``s_{t−m}``),
  h-step forecast ``l_T + (φ + φ² + … + φ^h)·b_T`` (+ or × the latest season)

where ``a_t`` is ``y_t``, ``y_t − s_{t−m}`` or ``y_t / s_{t−m}``.  These are the
same recursions as statsmodels' ``ExponentialSmoothing`` (its
``smoothing_trend`` is the β above), which the tests use as the oracle.
Simple exponential smoothing is the case without trend and season (Brown 1959;
NIST/SEMATECH e-Handbook of Statistical Methods, section 6.4.3.1); Holt (1957)
adds the trend, Gardner & McKenzie (1985) the damping φ, Winters (1960) the
season.
"""

from __future__ import annotations

from dataclasses import dataclass
from itertools import product
from typing import Sequence

import numpy as np

from consensus.errors import InvalidSpec

#: Smoothing methods and their structure: (has trend, is damped, season kind).
SMOOTHING_METHODS: dict[str, tuple[bool, bool, str | None]] = {
    "ses": (False, False, None),
    "holt": (True, False, None),
    "holt_damped": (True, True, None),
    "holt_winters_add": (True, True, "add"),
    "holt_winters_mul": (True, True, "mul"),
}

#: Initial trend is estimated from at most this many first observations
#: (the heuristic of Hyndman et al. 2008, section 2.6.1, uses the first ten).
TREND_INIT_MONTHS = 10


@dataclass(frozen=True)
class SmoothingRun:
    """What one pass of the recursion over all months produced.

    ``sse[k]`` is the in-sample one-step squared error summed over months
    ``start … fit_ends[k]−1`` of each series, shape ``(n_series, n_grid)``; NaN
    or inf marks a parameter set whose recursion broke down (e.g. a
    multiplicative season meeting a zero).  ``fitted`` (optional) holds the
    one-step fitted values ``(n_series, n_grid, n_months)``, NaN outside the
    span.  ``forecasts[i, g, k, h−1]`` is the h-step forecast made after
    observing month ``origins[k]``.
    """

    sse: tuple[np.ndarray, ...]
    fitted: np.ndarray | None
    forecasts: np.ndarray | None


def _grid_shape(n_series: int, *params) -> tuple[int, int]:
    """Broadcast shape ``(n_series, n_grid)`` of parameters given as scalars, (G,) or (n, G)."""
    shapes = [(n_series, 1)]
    for p in params:
        if p is None:
            continue
        arr = np.asarray(p)
        if arr.ndim > 2:
            raise InvalidSpec("smoothing parameters must be scalars, (n_grid,) or (n_series, n_grid) arrays")
        shapes.append(arr.shape)
    return np.broadcast_shapes(*shapes)


def _as_grid(p, shape, default: float) -> np.ndarray:
    return np.broadcast_to(np.asarray(default if p is None else p, dtype=float), shape)


def run_smoothing(
    y: np.ndarray,
    start: np.ndarray,
    *,
    alpha,
    beta=None,
    gamma=None,
    phi=None,
    trend: bool = False,
    seasonal: str | None = None,
    season_length: int = 12,
    level0: np.ndarray,
    trend0: np.ndarray | None = None,
    season0: np.ndarray | None = None,
    fit_ends: Sequence[np.ndarray] = (),
    keep_fitted: bool = False,
    origins: np.ndarray | None = None,
    horizon: int = 0,
) -> SmoothingRun:
    """Run the exponential-smoothing recursion over every series and parameter set at once.

    Parameters are scalars, ``(n_grid,)`` arrays shared by all series, or
    ``(n_series, n_grid)`` arrays.  Initial states are those *before* the first
    month of each span (statsmodels' ``initialization_method="known"``):
    ``level0`` and ``trend0`` have shape ``(n_series,)``; ``season0[i, j]`` is
    the seasonal term applied to the j-th month of series i's span.
    ``phi=None`` means no damping (φ = 1).  See the module docstring for the
    recursions.
    """
    if seasonal not in (None, "add", "mul"):
        raise InvalidSpec(f"seasonal must be None, 'add' or 'mul', got {seasonal!r}")
    y = np.asarray(y, dtype=float)
    start = np.asarray(start, dtype=int)
    n_series, n_months = y.shape
    shape = _grid_shape(n_series, alpha, beta, gamma, phi)
    a = _as_grid(alpha, shape, 0.0)
    b_ = _as_grid(beta, shape, 0.0)
    g_ = _as_grid(gamma, shape, 0.0)
    ph = _as_grid(phi, shape, 1.0) if trend else np.zeros(shape)
    m = int(season_length)

    level = np.broadcast_to(np.asarray(level0, dtype=float)[:, None], shape).copy()
    slope = (
        np.broadcast_to(np.asarray(trend0, dtype=float)[:, None], shape).copy() if trend else np.zeros(shape)
    )
    seasons = None
    if seasonal is not None:
        # slot (t mod m) holds the latest seasonal term for month t, so a
        # series' initial terms go where its span's first months fall
        seasons = np.empty((m,) + shape)
        season0 = np.asarray(season0, dtype=float)
        slots = (start[:, None] + np.arange(m)) % m
        rows = np.repeat(np.arange(n_series), m)
        seasons[slots.ravel(), rows, :] = season0.reshape(-1)[:, None]

    ends = [np.asarray(e, dtype=int) for e in fit_ends]
    sse = [np.zeros(shape) for _ in ends]
    fitted = np.full(shape + (n_months,), np.nan) if keep_fitted else None
    origins = np.asarray([] if origins is None else origins, dtype=int)
    forecasts = np.full(shape + (len(origins), horizon), np.nan) if len(origins) and horizon else None
    origin_slot = {int(o): k for k, o in enumerate(origins)}
    if forecasts is not None and trend:
        steps = np.arange(1, horizon + 1)
        damp_sums = np.cumsum(ph[..., None] ** steps, axis=-1)  # φ + … + φ^h
    first = int(start.min()) if n_series else n_months

    with np.errstate(all="ignore"):
        for t in range(max(first, 0), n_months):
            active = (t >= start)[:, None]
            obs = y[:, t][:, None]
            base = level + ph * slope
            if seasonal == "add":
                s_old = seasons[t % m]
                pred = base + s_old
                new_level = a * (obs - s_old) + (1 - a) * base
                new_season = g_ * (obs - base) + (1 - g_) * s_old
            elif seasonal == "mul":
                s_old = seasons[t % m]
                pred = base * s_old
                new_level = a * (obs / s_old) + (1 - a) * base
                new_season = g_ * (obs / base) + (1 - g_) * s_old
            else:
                pred = base
                new_level = a * obs + (1 - a) * base
            err2 = (obs - pred) ** 2
            for acc, end in zip(sse, ends):
                acc += np.where(active & (t < end)[:, None], err2, 0.0)
            if fitted is not None:
                fitted[..., t] = np.where(active, pred, np.nan)
            if trend:
                new_slope = b_ * (new_level - level) + (1 - b_) * ph * slope
                slope = np.where(active, new_slope, slope)
            level = np.where(active, new_level, level)
            if seasons is not None:
                seasons[t % m] = np.where(active, new_season, s_old)
            k = origin_slot.get(t)
            if k is not None:
                out = level[..., None] + (damp_sums * slope[..., None] if trend else 0.0)
                if seasons is not None:
                    ahead = seasons[(t + np.arange(1, horizon + 1)) % m]  # (H, n, G)
                    ahead = np.moveaxis(ahead, 0, -1)
                    out = out + ahead if seasonal == "add" else out * ahead
                forecasts[:, :, k, :] = out
    return SmoothingRun(sse=tuple(sse), fitted=fitted, forecasts=forecasts)


def _span_window(y: np.ndarray, start: np.ndarray, length: int) -> np.ndarray:
    """The first ``length`` months of each span, shape (n, length); NaN past the end of the matrix."""
    n_months = y.shape[1]
    idx = start[:, None] + np.arange(length)
    inside = idx < n_months
    out = np.take_along_axis(y, np.minimum(idx, n_months - 1), axis=1)
    return np.where(inside, out, np.nan)


def estimate_initial_states(
    y: np.ndarray,
    start: np.ndarray,
    *,
    available: np.ndarray,
    trend: bool,
    seasonal: str | None,
    season_length: int = 12,
) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """Heuristic initial level, trend and season from the first months of each span.

    Only the first ``available[i]`` months of series i are used, so a backcast
    never initialises from its own holdout.

    * no trend: ``l_0 = y_1`` (the NIST/SEMATECH e-Handbook 6.4.3.1 convention,
      first smoothed value = first observation);
    * trend, no season: a least-squares line through the first
      ``min(10, available)`` observations, ``y_j ≈ l_0 + b_0·j``
      (Hyndman et al. 2008, section 2.6.1);
    * trend and season (needs two full seasons): with season means ``A_1``,
      ``A_2``, ``b_0 = (A_2 − A_1)/m``, ``l_0 = A_1 − b_0·(m+1)/2``, and each
      seasonal term the mean over both years of ``y_j − (l_0 + b_0·j)``
      (additive) or ``y_j / (l_0 + b_0·j)`` (multiplicative), normalised to
      sum 0 or mean 1 (classical decomposition initialisation, Makridakis,
      Wheelwright & Hyndman, *Forecasting: Methods and Applications*, 1998).
    """
    y = np.asarray(y, dtype=float)
    start = np.asarray(start, dtype=int)
    available = np.asarray(available, dtype=int)
    n_series = y.shape[0]
    m = int(season_length)
    if seasonal is not None:
        window = _span_window(y, start, 2 * m)
        enough = (available >= 2 * m)[:, None]
        window = np.where(enough, window, np.nan)
        first_mean = window[:, :m].mean(axis=1)
        second_mean = window[:, m:].mean(axis=1)
        slope0 = (second_mean - first_mean) / m
        level0 = first_mean - slope0 * (m + 1) / 2
        line = level0[:, None] + slope0[:, None] * np.arange(1, 2 * m + 1)
        with np.errstate(all="ignore"):
            if seasonal == "add":
                season = (window - line).reshape(n_series, 2, m).mean(axis=1)
                season = season - season.mean(axis=1, keepdims=True)
            else:
                season = (window / line).reshape(n_series, 2, m).mean(axis=1)
                season = season / season.mean(axis=1, keepdims=True)
        return level0, slope0, season
    if not trend:
        return _span_window(y, start, 1)[:, 0], np.zeros(n_series), None
    k = np.clip(available, 1, TREND_INIT_MONTHS)
    window = _span_window(y, start, TREND_INIT_MONTHS)
    j = np.arange(1, TREND_INIT_MONTHS + 1, dtype=float)
    use = j[None, :] <= k[:, None]
    count = use.sum(axis=1)
    jm = np.where(use, j, 0).sum(axis=1) / count
    ym = np.where(use, window, 0).sum(axis=1) / count
    dj = np.where(use, j - jm[:, None], 0.0)
    sxx = (dj**2).sum(axis=1)
    sxy = (dj * np.where(use, window - ym[:, None], 0.0)).sum(axis=1)
    slope0 = np.where(sxx > 0, sxy / np.where(sxx > 0, sxx, 1.0), 0.0)
    level0 = ym - slope0 * jm
    return level0, slope0, None


def _grid_values(*axes: Sequence[float], constraint=None) -> np.ndarray:
    combos = [c for c in product(*axes) if constraint is None or constraint(*c)]
    return np.array(combos, dtype=float).T  # (n_params, G)


#: Parameter grids searched for every series at once.  β ≤ α and γ ≤ 1 − α
#: follow the usual admissible region (statsmodels' restricted bounds,
#: after Hyndman et al. 2008, section 10.1).
PARAMETER_GRIDS: dict[str, np.ndarray] = {
    "ses": _grid_values(np.round(np.linspace(0.02, 1.0, 50), 4)),
    "holt": _grid_values(
        (0.05, 0.1, 0.2, 0.3, 0.45, 0.6, 0.8, 1.0),
        (0.01, 0.05, 0.1, 0.2, 0.4),
        constraint=lambda a, b: b <= a,
    ),
    "holt_damped": _grid_values(
        (0.05, 0.1, 0.2, 0.3, 0.45, 0.6, 0.8),
        (0.01, 0.05, 0.1, 0.2),
        (0.8, 0.88, 0.94, 0.98),
        constraint=lambda a, b, p: b <= a,
    ),
    "holt_winters_add": _grid_values(
        (0.05, 0.1, 0.2, 0.35, 0.55),
        (0.01, 0.05, 0.15),
        (0.01, 0.1, 0.25),
        (0.9, 0.98, 1.0),
        constraint=lambda a, b, g, p: b <= a and g <= 1 - a,
    ),
}
PARAMETER_GRIDS["holt_winters_mul"] = PARAMETER_GRIDS["holt_winters_add"]

#: Names of the rows of each grid.
GRID_PARAMETERS: dict[str, tuple[str, ...]] = {
    "ses": ("alpha",),
    "holt": ("alpha", "beta"),
    "holt_damped": ("alpha", "beta", "phi"),
    "holt_winters_add": ("alpha", "beta", "gamma", "phi"),
    "holt_winters_mul": ("alpha", "beta", "gamma", "phi"),
}


def minimum_months(method: str, *, season_length: int = 12) -> int:
    """Fewest span months a smoothing method is fitted on (two seasons for Holt–Winters)."""
    if method not in SMOOTHING_METHODS:
        raise InvalidSpec(f"unknown smoothing method {method!r}; expected one of {sorted(SMOOTHING_METHODS)}")
    has_trend, _, seasonal = SMOOTHING_METHODS[method]
    if seasonal is not None:
        return 2 * season_length
    return 4 if has_trend else 2


@dataclass(frozen=True)
class SmoothingFit:
    """Best grid parameters of one method for each series and each fitting window.

    ``params[k][name]`` is an ``(n_series,)`` array for window ``fit_ends[k]``;
    ``sse[k]`` the matching minimal in-sample one-step SSE (inf where the
    recursion broke down for every grid point).
    """

    method: str
    params: tuple[dict[str, np.ndarray], ...]
    sse: tuple[np.ndarray, ...]


def fit_smoothing(
    y: np.ndarray,
    start: np.ndarray,
    *,
    method: str,
    fit_ends: Sequence[np.ndarray],
    init_available: np.ndarray,
    season_length: int = 12,
) -> SmoothingFit:
    """Fit one smoothing method to every series by grid search on in-sample one-step SSE.

    One recursion pass evaluates the whole grid (``PARAMETER_GRIDS[method]``)
    for all series, accumulating the SSE over each window ``start …
    fit_ends[k]−1``; the arg-min per series and window is kept.  Initial
    states come from :func:`estimate_initial_states` using only the first
    ``init_available`` months of each span (pass the shortest window's length
    so that a fit on a training window never sees later months and all
    windows share one pass).
    """
    if method not in SMOOTHING_METHODS:
        raise InvalidSpec(f"unknown smoothing method {method!r}; expected one of {sorted(SMOOTHING_METHODS)}")
    has_trend, _, seasonal = SMOOTHING_METHODS[method]
    grid = PARAMETER_GRIDS[method]
    names = GRID_PARAMETERS[method]
    values = dict(zip(names, grid))
    start = np.asarray(start, dtype=int)
    level0, trend0, season0 = estimate_initial_states(
        y, start, available=init_available, trend=has_trend, seasonal=seasonal, season_length=season_length
    )
    run = run_smoothing(
        y, start, alpha=values["alpha"], beta=values.get("beta"), gamma=values.get("gamma"),
        phi=values.get("phi"), trend=has_trend, seasonal=seasonal, season_length=season_length,
        level0=level0, trend0=trend0, season0=season0, fit_ends=fit_ends,
    )
    params_out: list[dict[str, np.ndarray]] = []
    sse_out: list[np.ndarray] = []
    rows = np.arange(y.shape[0])
    for window_sse in run.sse:
        sse = np.where(np.isfinite(window_sse), window_sse, np.inf)
        best = np.argmin(sse, axis=1)
        params_out.append({name: grid[k][best] for k, name in enumerate(names)})
        sse_out.append(sse[rows, best])
    return SmoothingFit(method=method, params=tuple(params_out), sse=tuple(sse_out))


def forecast_smoothing(
    y: np.ndarray,
    start: np.ndarray,
    *,
    method: str,
    params: dict[str, np.ndarray],
    available: np.ndarray,
    origins: np.ndarray,
    horizon: int,
    season_length: int = 12,
) -> np.ndarray:
    """Forecasts ``(n_series, len(origins), horizon)`` of a fitted method from each origin month.

    Initial states use the first ``available`` months (as in the fit); the
    recursion then runs with the fixed per-series parameters through every
    month, so a forecast from origin ``o`` uses data up to ``o`` only
    (rolling origin with fixed parameters, Tashman 2000).
    """
    has_trend, _, seasonal = SMOOTHING_METHODS[method]
    level0, trend0, season0 = estimate_initial_states(
        y, start, available=available, trend=has_trend, seasonal=seasonal, season_length=season_length
    )

    def column(name):
        return None if name not in params else np.asarray(params[name], dtype=float)[:, None]

    run = run_smoothing(
        y, start, alpha=column("alpha"), beta=column("beta"), gamma=column("gamma"), phi=column("phi"),
        trend=has_trend, seasonal=seasonal, season_length=season_length,
        level0=level0, trend0=trend0, season0=season0, origins=origins, horizon=horizon,
    )
    return run.forecasts[:, 0]
