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

Fitting is a grid search over :data:`PARAMETER_GRIDS` from heuristic initial
states (:func:`fit_smoothing`), optionally followed by Levenberg–Marquardt on
the smoothing parameters and the initial states together
(:func:`refine_smoothing`), which is what statsmodels'
``initialization_method="estimated"`` optimises.  A NaN month is unknown:
the state is updated with its one-step forecast and it adds no error.  Every
number of a series is computed from that series alone (products and sums
never run across series), so the same series gives the same bits in any
block.
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

#: Series × parameter sets one recursion pass updates at a time: each state array is then
#: about 256 KiB and stays in the processor's cache through the months, instead of
#: streaming through memory every month (a series' numbers do not depend on the chunk).
PASS_CELLS = 32_768


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
    ``level0`` and ``trend0`` have shape ``(n_series,)`` or ``(n_series,
    n_grid)``; ``season0[i, j]`` (or ``season0[i, g, j]``) is the seasonal term
    applied to the j-th month of series i's span.  ``phi=None`` means no
    damping (φ = 1).  See the module docstring for the recursions, which run
    in their error-correction form (Hyndman et al. 2008, table 2.1): with
    ``e_t = y_t − ŷ_t``, ``l_t = base + α·e_t``, ``b_t = φ·b_{t−1} + αβ·e_t``,
    ``s_t = s_{t−m} + γ·e_t`` (additive season) or, multiplicative,
    ``l_t = base + α·e_t/s_{t−m}``, ``b_t = φ·b_{t−1} + αβ·e_t/s_{t−m}``,
    ``s_t = s_{t−m} + γ·e_t/base`` with ``base = l_{t−1} + φ·b_{t−1}``, the
    same numbers as the weighted-average form with fewer operations.

    A NaN in ``y`` is an unknown month (not zero): the state is updated with
    the one-step forecast in its place (``e_t = 0``), so level, trend and
    season carry on as forecast (the usual state-space treatment of a missing
    observation, Durbin & Koopman, *Time Series Analysis by State Space
    Methods*, 2nd ed., section 4.10; Hyndman et al. 2008, section 2.5), and
    the month adds nothing to the squared errors.
    """
    if seasonal not in (None, "add", "mul"):
        raise InvalidSpec(f"seasonal must be None, 'add' or 'mul', got {seasonal!r}")
    y = np.asarray(y, dtype=float)
    start = np.asarray(start, dtype=int)
    n_series, n_months = y.shape
    shape = _grid_shape(n_series, alpha, beta, gamma, phi, level0 if np.ndim(level0) == 2 else None)
    n_grid = shape[1]
    m = int(season_length)
    a_all = _as_grid(alpha, shape, 0.0)
    ab_all = _as_grid(np.asarray(0.0 if alpha is None else alpha, dtype=float)
                      * np.asarray(0.0 if beta is None else beta, dtype=float), shape, 0.0) if trend else None
    g_all = _as_grid(gamma, shape, 0.0) if seasonal is not None else None
    ph_all = _as_grid(phi, shape, 1.0) if trend and phi is not None else None
    level0 = np.asarray(level0, dtype=float)
    trend0 = np.asarray(trend0, dtype=float) if trend else None
    if seasonal is not None:
        season0 = np.asarray(season0, dtype=float)
        if season0.ndim == 2:
            season0 = season0[:, None, :]

    ends = [np.asarray(e, dtype=int) for e in fit_ends]
    sse = [np.zeros(shape) for _ in ends]
    fitted = np.full(shape + (n_months,), np.nan) if keep_fitted else None
    origins = np.asarray([] if origins is None else origins, dtype=int)
    forecasts = np.full(shape + (len(origins), horizon), np.nan) if len(origins) and horizon else None
    origin_slot = {int(o): k for k, o in enumerate(origins)}
    steps = np.arange(1, horizon + 1)
    observed = np.isfinite(y)
    # months after every fitting window add nothing when no fitted values or
    # forecasts are asked for (the sums would only gain zeros)
    stop = n_months if (fitted is not None or forecasts is not None or not ends) else int(max(e.max() for e in ends))
    chunk = max(1, PASS_CELLS // max(n_grid, 1))

    # Inside a chunk every array is (n_grid, series): numpy's inner loops then
    # run along the series, and states are updated in place (no new arrays a month).
    with np.errstate(all="ignore"):
        for lo in range(0, n_series, chunk):
            rows = slice(lo, min(lo + chunk, n_series))
            nc = rows.stop - rows.start
            cshape = (n_grid, nc)
            yc, sc, known_c = y[rows], start[rows], observed[rows]
            a = a_all[rows].T
            ab = ab_all[rows].T if trend else None
            g = g_all[rows].T if seasonal is not None else None
            ph = ph_all[rows].T if ph_all is not None else None
            level = _chunk_state(level0[rows], cshape)
            level_new = np.empty(cshape)
            slope = slope_new = phb = base = None
            if trend:
                slope = _chunk_state(trend0[rows], cshape)
                slope_new, base = np.empty(cshape), np.empty(cshape)
                phb = np.empty(cshape) if ph is not None else None
            pred = np.empty(cshape) if seasonal is not None else None
            err, tmp = np.empty(cshape), np.empty(cshape)
            q = np.empty(cshape) if seasonal == "mul" else None
            seasons = None
            if seasonal is not None:
                # slot (t mod m) holds the latest seasonal term for month t, so a
                # series' initial terms go where its span's first months fall
                seasons = np.empty((m,) + cshape)
                slots = (sc[:, None] + np.arange(m)) % m  # (nc, m)
                seasons[slots, :, np.arange(nc)[:, None]] = np.moveaxis(
                    np.broadcast_to(season0[rows], (nc, n_grid, m)), 2, 1)
            acc_c = [np.zeros(cshape) for _ in ends]
            ends_c = [(e[rows], int(e[rows].min()), int(e[rows].max())) for e in ends]
            damp_sums = None
            if forecasts is not None and trend:
                damping = np.ones((1, 1)) if ph is None else ph
                damp_sums = np.cumsum(damping[..., None] ** steps, axis=-1)  # φ + … + φ^h
            first, last_start = int(sc.min()), int(sc.max())
            all_known_months = known_c.all(axis=0)
            for t in range(max(first, 0), min(stop, n_months)):
                all_active = t >= last_start
                active = None if all_active else t >= sc  # (nc,)
                if trend:
                    phb_t = slope if ph is None else np.multiply(ph, slope, out=phb)
                    base_t = np.add(level, phb_t, out=base)
                else:
                    base_t = level
                if seasonal is not None:
                    s_old = seasons[t % m]
                    pred_t = (np.add if seasonal == "add" else np.multiply)(base_t, s_old, out=pred)
                else:
                    pred_t = base_t
                np.subtract(yc[:, t], pred_t, out=err)
                if not (all_active and all_known_months[t]):
                    # an unknown month is updated with its own forecast: no error
                    scored = known_c[:, t] if all_active else known_c[:, t] & active
                    np.copyto(err, 0.0, where=~scored)
                for acc, (end, end_min, end_max) in zip(acc_c, ends_c):
                    if t < end_min:
                        acc += np.multiply(err, err, out=tmp)
                    elif t < end_max:
                        np.multiply(err, err, out=tmp)
                        np.copyto(tmp, 0.0, where=t >= end)
                        acc += tmp
                if fitted is not None:
                    fitted[rows, :, t] = (pred_t if all_active else np.where(active, pred_t, np.nan)).T
                q_t = np.divide(err, s_old, out=q) if seasonal == "mul" else err
                if seasonal is not None:
                    if seasonal == "add":
                        np.multiply(g, err, out=tmp)
                    else:
                        np.divide(err, base_t, out=tmp)
                        tmp *= g
                    if all_active:
                        s_old += tmp
                    else:
                        tmp += s_old
                        np.copyto(s_old, tmp, where=active)
                np.add(base_t, np.multiply(a, q_t, out=tmp), out=level_new)
                if all_active:
                    level, level_new = level_new, level
                else:
                    np.copyto(level, level_new, where=active)
                if trend:
                    np.add(phb_t, np.multiply(ab, q_t, out=tmp), out=slope_new)
                    if all_active:
                        slope, slope_new = slope_new, slope
                    else:
                        np.copyto(slope, slope_new, where=active)
                k = origin_slot.get(t)
                if k is not None:
                    out = level[..., None] + (damp_sums * slope[..., None] if trend else 0.0)  # (G, nc, H)
                    if seasons is not None:
                        ahead = np.moveaxis(seasons[(t + steps) % m], 0, -1)
                        out = out + ahead if seasonal == "add" else out * ahead
                    forecasts[rows, :, k, :] = np.swapaxes(out, 0, 1)
            for acc, total in zip(acc_c, sse):
                total[rows] = acc.T
    return SmoothingRun(sse=tuple(sse), fitted=fitted, forecasts=forecasts)


def _chunk_state(value: np.ndarray, shape: tuple[int, int]) -> np.ndarray:
    """A chunk's initial state, given per series ``(nc,)`` or per series and grid point ``(nc, G)``, as ``(G, nc)``."""
    value = np.asarray(value, dtype=float)
    return np.array(np.broadcast_to(value if value.ndim == 1 else value.T, shape))


def _span_window(y: np.ndarray, start: np.ndarray, length: int) -> np.ndarray:
    """The first ``length`` months of each span, shape (n, length); NaN past the end of the matrix."""
    n_months = y.shape[1]
    idx = start[:, None] + np.arange(length)
    inside = idx < n_months
    out = np.take_along_axis(y, np.minimum(idx, n_months - 1), axis=1)
    return np.where(inside, out, np.nan)


def _nan_mean(values: np.ndarray, axis: int) -> np.ndarray:
    """Mean of the finite values along ``axis`` (NaN where there are none), without numpy's warning."""
    finite = np.isfinite(values)
    count = finite.sum(axis=axis)
    with np.errstate(all="ignore"):
        return np.where(count > 0, np.where(finite, values, 0.0).sum(axis=axis) / count, np.nan)


@dataclass(frozen=True)
class InitialStates:
    """States before the first month of each span: level ``(n,)``, trend ``(n,)``, season ``(n, m)`` or None."""

    level: np.ndarray
    trend: np.ndarray
    season: np.ndarray | None

    def take(self, rows) -> "InitialStates":
        return InitialStates(self.level[rows], self.trend[rows], None if self.season is None else self.season[rows])


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
    never initialises from its own holdout.  Unknown (NaN) months are left
    out of every mean and of the line.

    * no trend: ``l_0 = y_1`` (the NIST/SEMATECH e-Handbook 6.4.3.1 convention,
      first smoothed value = first observation; the first known month when
      the first is unknown);
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
        first_mean = _nan_mean(window[:, :m], axis=1)
        second_mean = _nan_mean(window[:, m:], axis=1)
        slope0 = (second_mean - first_mean) / m
        level0 = first_mean - slope0 * (m + 1) / 2
        line = level0[:, None] + slope0[:, None] * np.arange(1, 2 * m + 1)
        with np.errstate(all="ignore"):
            if seasonal == "add":
                season = _nan_mean((window - line).reshape(n_series, 2, m), axis=1)
                season = season - season.mean(axis=1, keepdims=True)
            else:
                season = _nan_mean((window / line).reshape(n_series, 2, m), axis=1)
                season = season / season.mean(axis=1, keepdims=True)
        return level0, slope0, season
    if not trend:
        window = _span_window(y, start, max(int(available.max()) if len(available) else 1, 1))
        usable = np.isfinite(window) & (np.arange(window.shape[1])[None, :] < available[:, None])
        first_known = np.argmax(usable, axis=1)
        level0 = np.where(usable.any(axis=1), window[np.arange(n_series), first_known], np.nan)
        return level0, np.zeros(n_series), None
    k = np.clip(available, 1, TREND_INIT_MONTHS)
    window = _span_window(y, start, TREND_INIT_MONTHS)
    j = np.arange(1, TREND_INIT_MONTHS + 1, dtype=float)
    use = (j[None, :] <= k[:, None]) & np.isfinite(window)
    count = use.sum(axis=1)
    with np.errstate(all="ignore"):
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
        # φ = 0.9 dropped: the refinement moves φ anyway, and starting there
        # won nothing on the benches (bench_statistical_real: mean WAPE 4.77 %
        # against 4.79 % with it) at a third of the grid's cost
        (0.98, 1.0),
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

#: Bounds the refinement keeps: α in [ALPHA_MIN, 1], β in [0, α], γ in [0, 1 − α]
#: (Hyndman et al. 2008, section 10.1, the "usual" region), φ in PHI_BOUNDS
#: (the range of the grids; Gardner & McKenzie 1985 damp with φ < 1).
ALPHA_MIN = 1e-4
PHI_BOUNDS = (0.8, 1.0)
#: Smallest multiplicative seasonal index the refinement allows (a season can't flip sign).
SEASON_MIN = 1e-3
#: Levenberg–Marquardt iterations after the grid, and the damping tried in each.
REFINE_ITERATIONS = 3
REFINE_DAMPING = (1e-3, 1e-1, 1e1)


def minimum_months(method: str, *, season_length: int = 12) -> int:
    """Fewest span months a smoothing method is fitted on (two seasons for Holt–Winters)."""
    if method not in SMOOTHING_METHODS:
        raise InvalidSpec(f"unknown smoothing method {method!r}; expected one of {sorted(SMOOTHING_METHODS)}")
    has_trend, _, seasonal = SMOOTHING_METHODS[method]
    if seasonal is not None:
        return 2 * season_length
    return 4 if has_trend else 2


def _parameter_layout(method: str, season_length: int) -> dict[str, slice]:
    """Columns of each free quantity in the refinement's parameter vector (smoothing, then initial states)."""
    has_trend, damped, seasonal = SMOOTHING_METHODS[method]
    names = ["alpha"] + (["beta"] if has_trend else []) + (["gamma"] if seasonal else []) + (["phi"] if damped else [])
    names += ["level0"] + (["trend0"] if has_trend else [])
    layout = {name: slice(k, k + 1) for k, name in enumerate(names)}
    if seasonal:
        layout["season0"] = slice(len(names), len(names) + season_length)
    return layout


def _pack(method, params, states, layout, n_series) -> np.ndarray:
    width = max(s.stop for s in layout.values())
    theta = np.zeros((n_series, width))
    for name, cols in layout.items():
        if name == "level0":
            theta[:, cols] = states.level[:, None]
        elif name == "trend0":
            theta[:, cols] = states.trend[:, None]
        elif name == "season0":
            theta[:, cols] = states.season
        else:
            theta[:, cols] = np.asarray(params[name], dtype=float)[:, None]
    return theta


def _unpack(theta, layout, method) -> tuple[dict[str, np.ndarray], InitialStates]:
    """Parameters and states from ``theta`` (..., P); leading axes kept."""
    has_trend, damped, seasonal = SMOOTHING_METHODS[method]
    params = {name: theta[..., layout[name]][..., 0] for name in GRID_PARAMETERS[method]}
    level = theta[..., layout["level0"]][..., 0]
    slope = theta[..., layout["trend0"]][..., 0] if has_trend else np.zeros_like(level)
    season = theta[..., layout["season0"]] if seasonal else None
    return params, InitialStates(level, slope, season)


def _project(theta, layout, method) -> np.ndarray:
    """Clip ``theta`` into the admissible region and renormalise the season (level absorbs the shift).

    Adding c to the additive seasonal terms and subtracting it from the
    level (or scaling the multiplicative terms by 1/c and level and trend by
    c) leaves every one-step forecast unchanged, so renormalising to sum 0 /
    mean 1 changes no error and keeps the solution unique.
    """
    theta = theta.copy()
    _, _, seasonal = SMOOTHING_METHODS[method]
    a = np.clip(theta[..., layout["alpha"]], ALPHA_MIN, 1.0)
    theta[..., layout["alpha"]] = a
    if "beta" in layout:
        theta[..., layout["beta"]] = np.clip(theta[..., layout["beta"]], 0.0, a)
    if "gamma" in layout:
        theta[..., layout["gamma"]] = np.clip(theta[..., layout["gamma"]], 0.0, 1.0 - a)
    if "phi" in layout:
        theta[..., layout["phi"]] = np.clip(theta[..., layout["phi"]], *PHI_BOUNDS)
    if seasonal == "add":
        shift = theta[..., layout["season0"]].mean(axis=-1, keepdims=True)
        theta[..., layout["season0"]] -= shift
        theta[..., layout["level0"]] += shift
    elif seasonal == "mul":
        s = np.maximum(theta[..., layout["season0"]], SEASON_MIN)
        scale = s.mean(axis=-1, keepdims=True)
        theta[..., layout["season0"]] = s / scale
        theta[..., layout["level0"]] *= scale
        theta[..., layout["trend0"]] *= scale
    return theta


def _held_at_bounds(theta: np.ndarray, jte: np.ndarray, layout: dict[str, slice]) -> np.ndarray:
    """(n, P) True where a bounded parameter sits on a bound and the descent direction ``Jᵀe`` points out of it."""
    held = np.zeros(theta.shape, dtype=bool)
    a = theta[:, layout["alpha"].start]
    bounds = {"alpha": (ALPHA_MIN, 1.0), "beta": (0.0, a), "gamma": (0.0, 1.0 - a), "phi": PHI_BOUNDS}
    for name, (low, high) in bounds.items():
        if name not in layout:
            continue
        k = layout[name].start
        value, push = theta[:, k], jte[:, k]
        tol = 1e-9
        held[:, k] = ((value <= np.asarray(low) + tol) & (push < 0)) | ((value >= np.asarray(high) - tol) & (push > 0))
    return held


def _jacobian_pass(y, start, fit_end, theta, *, method, layout, season_length):
    """SSE, JᵀJ and Jᵀe of the one-step errors at ``theta`` (one parameter set per series).

    Forward-mode derivatives of the error-correction recursion of
    :func:`run_smoothing`: with ``d·`` the gradient of a state with respect
    to the parameter vector, ``e`` the one-step error and ``d e = −d ŷ``,
    ``d(φb) = φ·d b (+ b at φ)``, ``d base = d l + d(φb)`` and, additive
    season, ``d ŷ = d base + d s``, ``d l' = d base + α·d e (+ e at α)``,
    ``d b' = d(φb) + αβ·d e (+ βe at α, αe at β)``, ``d s' = d s + γ·d e (+ e at γ)``;
    multiplicative, ``d ŷ = s·d base + base·d s``, with ``q = e/s``,
    ``d q = (d e − q·d s)/s`` and ``r = e/base``, ``d r = (d e − r·d base)/base``:
    ``d l' = d base + α·d q (+ q at α)``, ``d b' = d(φb) + αβ·d q (+ βq at α, αq at β)``,
    ``d s' = d s + γ·d r (+ r at γ)``.  A month that is not scored (unknown,
    or after the fitting window) has ``e = d e = 0``: the state carries on as
    forecast, the usual treatment of a missing observation.  Only the season
    slot of the current month changes, so a month costs O(P), not O(P²); the
    products JᵀJ are formed once at the end.
    """
    has_trend, damped, seasonal = SMOOTHING_METHODS[method]
    m = int(season_length)
    n_series, n_months = y.shape
    width = theta.shape[1]
    params, states = _unpack(theta, layout, method)
    # every array is (parameter, series) or (series,): numpy's inner loops run along the series
    a = params["alpha"]
    b = params["beta"] if has_trend else None
    ab = a * b if has_trend else None
    g = params["gamma"] if seasonal else None
    ph = params["phi"] if damped else None
    ia = layout["alpha"].start
    ib = layout["beta"].start if has_trend else None
    ig = layout["gamma"].start if seasonal else None
    ip = layout["phi"].start if damped else None
    level = states.level.astype(float, copy=True)
    slope = states.trend.astype(float, copy=True) if has_trend else None
    d_level = np.zeros((width, n_series))
    d_level[layout["level0"].start] = 1.0
    d_slope = None
    if has_trend:
        d_slope = np.zeros((width, n_series))
        d_slope[layout["trend0"].start] = 1.0
    rows = np.arange(n_series)
    if seasonal:
        seasons = np.empty((m, n_series))
        d_seasons = np.zeros((m, width, n_series))
        s0 = layout["season0"].start
        for j in range(m):
            slot = (start + j) % m
            seasons[slot, rows] = states.season[:, j]
            d_seasons[slot, s0 + j, rows] = 1.0
    sse = np.zeros(n_series)
    observed = np.isfinite(y)
    # gradients and errors of every month t in first … stop−1 (all that a
    # series' window reads): (series, parameter, month), so each series'
    # Jacobian is one slice for the products at the end
    grads = np.empty((n_series, width, n_months))
    errs = np.empty((n_series, n_months))
    d_pred = np.empty((width, n_series))
    err = np.empty(n_series)
    first = int(start.min()) if n_series else n_months
    last_start = int(start.max()) if n_series else 0
    known_months = observed.all(axis=0)
    end_min = int(fit_end.min()) if n_series else 0
    stop = min(int(fit_end.max()), n_months) if n_series else 0  # later months are never scored
    with np.errstate(all="ignore"):
        for t in range(max(first, 0), stop):
            if t >= last_start and known_months[t] and t < end_min:
                # every series active, known and scored: the same steps, in place
                if seasonal:
                    s_old = seasons[t % m]
                    d_s = d_seasons[t % m]
                if has_trend:
                    phb = ph * slope if damped else slope.copy()
                    if damped:
                        d_slope *= ph  # now d(φb)
                        d_slope[ip] += slope
                    d_level += d_slope  # now d base
                    base = level + phb
                else:
                    base = level.copy()
                if seasonal == "add":
                    pred = base + s_old
                    np.add(d_level, d_s, out=d_pred)
                elif seasonal == "mul":
                    pred = base * s_old
                    np.multiply(base, d_s, out=d_pred)
                    d_pred += d_level * s_old
                else:
                    pred = base
                    d_pred[...] = d_level
                np.subtract(y[:, t], pred, out=err)
                sse += err * err
                grads[:, :, t] = d_pred.T
                errs[:, t] = err
                if seasonal == "mul":
                    q = err / s_old
                    d_q = q * d_s
                    d_q += d_pred
                    d_q *= -1.0 / s_old
                    r = err / base
                    d_r = r * d_level
                    d_r += d_pred
                    d_r *= -1.0 / base
                    d_s += g * d_r  # the season's new gradient, in its slot
                    d_s[ig] += r
                    seasons[t % m] = s_old + g * r
                    step, d_step = q, d_q
                else:
                    if seasonal == "add":
                        d_s -= g * d_pred
                        d_s[ig] += err
                        seasons[t % m] = s_old + g * err
                    step, d_step = err, -d_pred
                d_level += a * d_step
                d_level[ia] += step
                level = base + a * step
                if has_trend:
                    d_slope += ab * d_step
                    d_slope[ia] += b * step
                    d_slope[ib] += a * step
                    slope = phb + ab * step
                continue
            all_active = t >= last_start
            active = None if all_active else t >= start
            if has_trend:
                if damped:
                    phb = ph * slope
                    d_phb = ph * d_slope
                    d_phb[ip] += slope
                else:
                    phb, d_phb = slope, d_slope
                base = level + phb
                d_base = d_level + d_phb
            else:
                base, d_base = level, d_level
            if seasonal:
                s_old = seasons[t % m]
                d_s = d_seasons[t % m]
            # d_pred: the error's gradient is −d ŷ where scored, 0 elsewhere
            if seasonal == "add":
                pred = base + s_old
                np.add(d_base, d_s, out=d_pred)
            elif seasonal == "mul":
                pred = base * s_old
                np.multiply(d_base, s_old, out=d_pred)
                d_pred += base * d_s
            else:
                pred = base
                d_pred[...] = d_base
            np.subtract(y[:, t], pred, out=err)
            if not (all_active and known_months[t] and t < end_min):
                # an unknown month, or one after the window, carries the state on as forecast
                unscored = ~observed[:, t] | (t >= fit_end)
                if not all_active:
                    unscored |= ~active
                err[unscored] = 0.0
                d_pred[:, unscored] = 0.0
            sse += err * err
            grads[:, :, t] = d_pred.T
            errs[:, t] = err
            if seasonal == "mul":
                q = err / s_old
                d_q = (d_pred + q * d_s) * (-1.0 / s_old)
                r = err / base
                d_r = (d_pred + r * d_base) * (-1.0 / base)
                new_level = base + a * q
                d_new_level = d_base + a * d_q
                d_new_level[ia] += q
                new_season = s_old + g * r
                d_new_season = d_s + g * d_r
                d_new_season[ig] += r
            else:
                q, d_q = err, None
                new_level = base + a * err
                d_new_level = d_base - a * d_pred
                d_new_level[ia] += err
                if seasonal == "add":
                    new_season = s_old + g * err
                    d_new_season = d_s - g * d_pred
                    d_new_season[ig] += err
            if has_trend:
                new_slope = phb + ab * q
                d_new_slope = d_phb + ab * d_q if d_q is not None else d_phb - ab * d_pred
                d_new_slope[ia] += b * q
                d_new_slope[ib] += a * q
                slope = new_slope if all_active else np.where(active, new_slope, slope)
                d_slope = d_new_slope if all_active else np.where(active, d_new_slope, d_slope)
            level = new_level if all_active else np.where(active, new_level, level)
            d_level = d_new_level if all_active else np.where(active, d_new_level, d_level)
            if seasonal:
                seasons[t % m] = new_season if all_active else np.where(active, new_season, s_old)
                d_seasons[t % m] = d_new_season if all_active else np.where(active, d_new_season, d_s)
    # JᵀJ and Jᵀe per series over its own scored months only, series of one
    # span and one window length at a time: each product then has the same
    # operands and shape whichever other series share the block (or how many
    # months the matrix has before the span), so a series' numbers are the
    # same bits in any partition of the series
    jtj = np.zeros((n_series, width, width))
    jte = np.zeros((n_series, width))
    scored_months = np.clip(np.minimum(fit_end, n_months) - start, 0, None)
    key = (n_months - start) * (n_months + 1) + scored_months
    for value in np.unique(key):
        rows = np.flatnonzero(key == value)
        first_month = int(start[rows[0]])
        length = int(scored_months[rows[0]])
        if length <= 0:
            continue
        window = slice(first_month, first_month + length)
        if rows[-1] - rows[0] + 1 == len(rows):  # consecutive rows (blocks come sorted by start): no gather
            rows = slice(int(rows[0]), int(rows[-1]) + 1)
        gt = np.ascontiguousarray(grads[rows, :, window])  # (r, P, length)
        jtj[rows] = np.matmul(gt, np.swapaxes(gt, 1, 2))
        jte[rows] = np.matmul(gt, np.ascontiguousarray(errs[rows, window])[:, :, None])[:, :, 0]
    return sse, jtj, jte


def _solve_damped(normal: np.ndarray, damping: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """Solve ``(normal + diag(damping[:, k])) x = rhs`` for every series and damping k: steps ``(n, K, P)``.

    ``normal`` is ``(n, P, P)`` symmetric positive semi-definite (JᵀJ, or
    the identity's rows for held parameters), ``damping`` ``(n, K, P)`` the
    positive Levenberg–Marquardt terms, ``rhs`` ``(n, P)``.  Cholesky
    factorisation ``A = UᵀU`` without pivoting (the damped system is
    positive definite; Golub & Van Loan, *Matrix Computations*, 4th ed.,
    algorithm 4.2.1) of all n·K systems at once, the systems along numpy's
    inner axis and only the upper triangle updated: a third cheaper than
    LAPACK's LU called once per 18 × 18 system.  A pivot that rounding makes
    non-positive gives a NaN step, which the caller's SSE test rejects.
    """
    n, width, _ = normal.shape
    k_count = damping.shape[1]
    system = np.empty((width, width, n, k_count))
    system[...] = normal.transpose(1, 2, 0)[:, :, :, None]
    diagonal = np.arange(width)
    system[diagonal, diagonal] += damping.transpose(2, 0, 1)
    system = system.reshape(width, width, n * k_count)
    x = np.empty((width, n, k_count))
    x[...] = rhs.T[:, :, None]
    x = x.reshape(width, n * k_count)
    inverse_pivot = np.empty((width, n * k_count))
    with np.errstate(all="ignore"):
        for k in range(width):
            inverse_pivot[k] = 1.0 / np.sqrt(system[k, k])
            row = system[k, k + 1:]
            row *= inverse_pivot[k]  # row k of U right of the diagonal
            x[k] *= inverse_pivot[k]  # forward substitution Uᵀz = b as U is made
            for j in range(k + 1, width):
                system[j, j:] -= row[j - k - 1] * row[j - k - 1:]
            x[k + 1:] -= row * x[k]
        for k in range(width - 1, -1, -1):  # back substitution U x = z
            if k + 1 < width:
                x[k] -= (system[k, k + 1:] * x[k + 1:]).sum(axis=0)
            x[k] *= inverse_pivot[k]
    return x.reshape(width, n, k_count).transpose(1, 2, 0)


def _sse_of(y, start, fit_end, theta, *, method, layout, season_length) -> np.ndarray:
    """In-sample one-step SSE ``(n, K)`` of candidate parameter vectors ``theta`` ``(n, K, P)``."""
    has_trend, _, seasonal = SMOOTHING_METHODS[method]
    params, states = _unpack(theta, layout, method)
    run = run_smoothing(
        y, start, alpha=params["alpha"], beta=params.get("beta"), gamma=params.get("gamma"), phi=params.get("phi"),
        trend=has_trend, seasonal=seasonal, season_length=season_length, level0=states.level,
        trend0=states.trend if has_trend else None, season0=states.season, fit_ends=(fit_end,),
    )
    return run.sse[0]


def refine_smoothing(
    y: np.ndarray,
    start: np.ndarray,
    *,
    method: str,
    params: dict[str, np.ndarray],
    states: InitialStates,
    fit_end: np.ndarray,
    season_length: int = 12,
    iterations: int | None = None,
) -> tuple[dict[str, np.ndarray], InitialStates, np.ndarray]:
    """Polish grid parameters and heuristic initial states jointly by Levenberg–Marquardt on the one-step SSE.

    The grid point and heuristic states are the start; each iteration solves
    ``(JᵀJ + λ·diag JᵀJ) δ = Jᵀe`` (Levenberg 1944; Marquardt 1963) for the
    smoothing parameters *and* the initial level, trend and seasonal terms
    together (the estimated initial states of Hyndman et al. 2008, section
    2.6.2, and of statsmodels' ``initialization_method="estimated"``), for
    each of :data:`REFINE_DAMPING` λ at once, and keeps the best step only
    if it lowers the SSE, so the result is never worse than the grid.  The
    Jacobian comes from :func:`_jacobian_pass`.  Steps are clipped to the
    admissible region (:func:`_project`).  All series at once; each
    series' numbers depend on its own data only.
    """
    iterations = REFINE_ITERATIONS if iterations is None else int(iterations)
    y = np.asarray(y, dtype=float)
    start = np.asarray(start, dtype=int)
    fit_end = np.asarray(fit_end, dtype=int)
    n_series = y.shape[0]
    layout = _parameter_layout(method, season_length)
    theta = _project(_pack(method, params, states, layout, n_series), layout, method)
    width = theta.shape[1]
    diagonal = np.arange(width)
    damping = np.array(REFINE_DAMPING)
    scale = np.ones(n_series)  # per-series multiplier of the damping, adapted as steps fail or succeed
    sse, jtj, jte = _jacobian_pass(y, start, fit_end, theta, method=method, layout=layout,
                                   season_length=season_length)
    for iteration in range(iterations):
        usable = np.isfinite(sse) & np.isfinite(jtj).all(axis=(1, 2)) & np.isfinite(jte).all(axis=1)
        diag = np.where(usable[:, None], np.diagonal(jtj, axis1=1, axis2=2), 1.0)
        # a column without gradient (a state no scored month depends on) still gets a pivot
        ridge = 1e-10 * np.maximum(diag.max(axis=1, initial=0.0), 1e-12)
        lam = scale[:, None] * damping[None, :]  # (n, K)
        # a parameter on a bound whose descent direction points outwards is
        # held there for this step (an active-set projection), so clipping
        # does not bend the step of the others: its row and column are the
        # identity's, its right-hand side 0
        held = _held_at_bounds(theta, jte, layout)
        keep = ~held
        free = usable[:, None] & keep
        rhs = np.where(free, jte, 0.0)
        normal = np.where(free[:, :, None] & free[:, None, :], jtj, 0.0)
        normal[:, diagonal, diagonal] += ~free  # held (or a series without a usable Jacobian): identity
        step = _solve_damped(normal, lam[:, :, None] * (keep * (diag + ridge[:, None]))[:, None, :], rhs)
        candidates = _project(theta[:, None, :] + step, layout, method)  # (n, K, P)
        trial = _sse_of(y, start, fit_end, candidates, method=method, layout=layout, season_length=season_length)
        trial = np.where(np.isfinite(trial), trial, np.inf)
        best = np.argmin(trial, axis=1)
        best_sse = trial[np.arange(n_series), best]
        better = usable & (best_sse < sse)
        theta = np.where(better[:, None], candidates[np.arange(n_series), best], theta)
        scale = np.clip(np.where(better, scale * damping[best] / damping[1], scale * 100.0), 1e-6, 1e6)
        sse = np.where(better, best_sse, sse)
        if iteration < iterations - 1:
            # the SSE kept is the trial's (the same recursion as the grid's)
            _, jtj, jte = _jacobian_pass(y, start, fit_end, theta, method=method, layout=layout,
                                         season_length=season_length)
    refined, new_states = _unpack(theta, layout, method)
    return refined, new_states, sse


@dataclass(frozen=True)
class SmoothingFit:
    """Best parameters and initial states of one method for each series and each fitting window.

    ``params[k][name]`` is an ``(n_series,)`` array for window ``fit_ends[k]``,
    ``states[k]`` the matching initial states; ``sse[k]`` the minimal
    in-sample one-step SSE (inf where the recursion broke down for every grid
    point).
    """

    method: str
    params: tuple[dict[str, np.ndarray], ...]
    sse: tuple[np.ndarray, ...]
    states: tuple[InitialStates, ...]


def fit_smoothing(
    y: np.ndarray,
    start: np.ndarray,
    *,
    method: str,
    fit_ends: Sequence[np.ndarray],
    init_available: np.ndarray,
    season_length: int = 12,
    refine: bool | Sequence[int] = True,
) -> SmoothingFit:
    """Fit one smoothing method to every series: grid search on in-sample one-step SSE, then refinement.

    One recursion pass evaluates the whole grid (``PARAMETER_GRIDS[method]``)
    for all series, accumulating the SSE over each window ``start …
    fit_ends[k]−1``; the arg-min per series and window is kept.  Heuristic
    initial states come from :func:`estimate_initial_states` using only the
    first ``init_available`` months of each span (pass the shortest window's
    length so that a fit on a training window never sees later months and
    all windows share one pass).  With ``refine`` (True, or the indexes of
    the windows to refine) each window's grid point and states are then
    polished by :func:`refine_smoothing` on that window alone.
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
    heuristic = InitialStates(level0, trend0, season0)
    run = run_smoothing(
        y, start, alpha=values["alpha"], beta=values.get("beta"), gamma=values.get("gamma"),
        phi=values.get("phi"), trend=has_trend, seasonal=seasonal, season_length=season_length,
        level0=level0, trend0=trend0, season0=season0, fit_ends=fit_ends,
    )
    params_out: list[dict[str, np.ndarray]] = []
    sse_out: list[np.ndarray] = []
    states_out: list[InitialStates] = []
    rows = np.arange(y.shape[0])
    refined_windows = range(len(fit_ends)) if refine is True else (() if refine is False else tuple(refine))
    for window, (end, window_sse) in enumerate(zip(fit_ends, run.sse)):
        sse = np.where(np.isfinite(window_sse), window_sse, np.inf)
        best = np.argmin(sse, axis=1)
        params = {name: grid[k][best] for k, name in enumerate(names)}
        best_sse = sse[rows, best]
        states = heuristic
        if window in refined_windows:
            ok = np.flatnonzero(np.isfinite(best_sse))
            if len(ok):
                polished, polished_states, polished_sse = refine_smoothing(
                    y[ok], start[ok], method=method, params={k: v[ok] for k, v in params.items()},
                    states=heuristic.take(ok), fit_end=np.asarray(end)[ok], season_length=season_length,
                )
                params = {k: v.copy() for k, v in params.items()}
                for k in params:
                    params[k][ok] = polished[k]
                level, slope = heuristic.level.copy(), heuristic.trend.copy()
                level[ok], slope[ok] = polished_states.level, polished_states.trend
                season = None
                if heuristic.season is not None:
                    season = heuristic.season.copy()
                    season[ok] = polished_states.season
                states = InitialStates(level, slope, season)
                best_sse = best_sse.copy()
                best_sse[ok] = polished_sse
        params_out.append(params)
        sse_out.append(best_sse)
        states_out.append(states)
    return SmoothingFit(method=method, params=tuple(params_out), sse=tuple(sse_out), states=tuple(states_out))


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
    states: InitialStates | None = None,
) -> np.ndarray:
    """Forecasts ``(n_series, len(origins), horizon)`` of a fitted method from each origin month.

    Initial states are ``states`` (a fit's) or, when None, the heuristic ones
    from the first ``available`` months; the recursion then runs with the
    fixed per-series parameters through every month, so a forecast from
    origin ``o`` uses data up to ``o`` only (rolling origin with fixed
    parameters, Tashman 2000).
    """
    has_trend, _, seasonal = SMOOTHING_METHODS[method]
    if states is None:
        states = InitialStates(*estimate_initial_states(
            y, start, available=available, trend=has_trend, seasonal=seasonal, season_length=season_length
        ))

    def column(name):
        return None if name not in params else np.asarray(params[name], dtype=float)[:, None]

    run = run_smoothing(
        y, start, alpha=column("alpha"), beta=column("beta"), gamma=column("gamma"), phi=column("phi"),
        trend=has_trend, seasonal=seasonal, season_length=season_length,
        level0=states.level, trend0=states.trend, season0=states.season, origins=origins, horizon=horizon,
    )
    return run.forecasts[:, 0]
