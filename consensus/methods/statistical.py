"""The statistical forecast: one method per item × location, chosen on its own history.

:func:`forecast_statistical` is the public entry point.  For a cycle ``C`` it
uses only order history up to and including ``C`` (later rows are dropped
first, so a backcast made at a past cycle cannot peek), and forecasts
``C+1 … C+horizon``.

How each series is forecast
---------------------------
1. **Span.**  A series starts at its first month with demand (> 0); months
   from then to ``C`` without a row are zero demand.  A NaN quantity is an
   *unknown* month, not zero, and so is every month after the last month
   with any row at all (a cycle opened before its month's orders are in):
   fits update through it with the one-step forecast in its place and leave
   it out of their squared errors, the holdout does not score it, and the
   profile statistics skip it.  ``n_months`` is the span length; the
   methods see at most its last :data:`MAX_FIT_SEASONS` seasons (12 years
   of months).
2. **Profile.**  Pattern (smooth / erratic / intermittent / lumpy), trend
   and seasonality from :mod:`consensus.methods.demand_pattern`.
3. **New items.**  A span shorter than :data:`NEW_ITEM_MONTHS` (6) months is
   too short to fit or hold out anything: the forecast is the family's
   seasonal profile scaled to the item's own demand so far (see
   :func:`forecast_new_items`); a series with no demand at all gets zero.
4. **Candidates** (:data:`DEFAULT_METHODS`).  Seasonal series that
   Holt–Winters can be fitted to: Holt–Winters only (damped or not;
   additive, and multiplicative when the span is strictly positive), since
   on a 12-month holdout seasonal naive (Holt–Winters without smoothing) and
   the methods without a season mostly add selection noise.  Other smooth
   and erratic series: naive, moving average (3 months), SES, damped Holt,
   Holt when a trend was found, seasonal naive when seasonal.  Intermittent
   and lumpy series: Croston, SBA, SES, moving average.  On request
   (``methods=``): ``theta`` (:mod:`consensus.methods.theta`) and
   ``combination``, the equal-weight mean of whichever of
   :data:`COMBINED_METHODS` a series can be fitted with (at least two; the
   series table's ``combined`` column names them); equal weights because
   estimated ones rarely beat them (Clemen 1989; the M3 and M4 competitions,
   Makridakis & Hibon 2000, Makridakis et al. 2020).  Neither is in the
   default set: on the real-series bench they were picked by the holdout
   about as often as they helped.  When the restriction leaves nothing that
   suits a series' profile, any requested method its data allow is used,
   and failing that the new-item fallback.
5. **Fit.**  Smoothing parameters by grid search minimising in-sample
   one-step squared error, all series at once (see
   :func:`consensus.methods.smoothing.fit_smoothing`); Croston/SBA likewise.
   Fits with a trend (:data:`REFINED_METHODS`) are then refined:
   Levenberg–Marquardt on the smoothing parameters and the initial level,
   trend and seasonal terms together
   (:func:`consensus.methods.smoothing.refine_smoothing`), 3 iterations on
   the training window and :data:`FULL_REFINE_ITERATIONS` more on the whole
   span starting from there.  Of the two Holt–Winters forms only the one
   whose grid fit scores better on the holdout is refined and stays a
   candidate (:data:`REFINE_MARGIN`): refining both cost a quarter more
   for a mean WAPE / MASE of 4.69 % / 0.749 instead of 4.77 % / 0.758 on
   the real-series bench, and no gain on the synthetic and scale benches.
   The grid alone trailed statsmodels' optimiser, because heuristic
   seasonal states from the first two years are poor and the grid then
   favours large γ (refining the trended
   non-seasonal fits too took the synthetic bench's holdout WAPE from
   0.2267 to 0.2260 at no extra time, their grids now running over the
   training window only).
6. **Rolling-origin holdout.**  The last ``K = min(12, n_months // 2)``
   months are held out.  Parameters fitted on the months before them are
   kept fixed while the state rolls forward month by month; from every
   origin the method forecasts up to ``min(horizon, K)`` months ahead
   (Tashman 2000, "Out-of-sample tests of forecasting accuracy",
   International Journal of Forecasting 16(4)).  The method with the lowest
   holdout WAPE, ``Σ|actual − forecast| / Σ|actual|`` over all origins and
   lags, is chosen; ties go to the simpler method (earlier in
   :data:`CANDIDATE_METHODS`).
7. **Forecast.**  The chosen method is refitted on the whole span and
   forecasts the horizon; negative values are set to zero.  Series are
   fitted in blocks, but every number of a series depends on its own
   history only (no sum runs across series), so any partition of the
   series gives the same bits.
8. **Intervals.**  Empirical quantiles of the chosen method's holdout errors
   (actual − forecast) at each lag (Williams & Goodman 1971; Lee & Scholtes
   2014), added to the forecast and floored at zero: the 80 % interval is
   the 10 % … 90 % quantiles, the 95 % interval 2.5 % … 97.5 % (linear
   interpolation between order statistics, numpy's default).  A lag with
   fewer than :data:`MIN_INTERVAL_ERRORS` holdout errors (or beyond the
   holdout) reuses the last lag that had enough, widened by √(h/h₀) (the
   random-walk growth of forecast error, a stated extrapolation, not an
   empirical quantile).  New-item fallbacks have no holdout and get no
   interval (NaN).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
import pandas as pd

from consensus.errors import InvalidSpec
from consensus.methods import intermittent, smoothing, theta
from consensus.methods.demand_pattern import classify_demand, detect_seasonality, detect_trend
from consensus.periods import is_month, month_index, month_names

#: Methods a series can be fitted with, simplest first (ties go to the earlier one).
CANDIDATE_METHODS: tuple[str, ...] = (
    "naive",
    "seasonal_naive",
    "moving_average",
    "ses",
    "croston",
    "sba",
    "holt_damped",
    "holt",
    "theta",
    "holt_winters_add",
    "holt_winters_mul",
    "combination",
)
#: Methods the "combination" candidate averages (those of them a series could be fitted with).
COMBINED_METHODS: tuple[str, ...] = ("theta", "holt_winters_add", "holt_winters_mul")
#: Candidates when ``methods`` is not given.  Theta and the combination are
#: offered on request only: on the ten-series real bench and the synthetic one
#: they were chosen on a 12-month holdout about as often as they helped
#: (bench/bench_statistical_real.py --methods ...; see the module docstring).
DEFAULT_METHODS: tuple[str, ...] = tuple(m for m in CANDIDATE_METHODS if m not in ("theta", "combination"))
#: Methods the tool falls back to when no candidate can be fitted.
FALLBACK_METHODS: tuple[str, ...] = ("new_item_profile", "zero_demand")
#: The closed set of names that can appear in the ``method`` columns.
METHODS: tuple[str, ...] = CANDIDATE_METHODS + FALLBACK_METHODS

NEW_ITEM_MONTHS = 6
HOLDOUT_MONTHS = 12
MOVING_AVERAGE_MONTHS = 3
MIN_INTERVAL_ERRORS = 3
#: Seasons of history the methods see at most (144 months for monthly data):
#: twelve observations of every seasonal index; the recursions' cost grows
#: with the months.  On the real-series bench 10, 12 and 15 years gave a mean
#: WAPE of 4.80 %, 4.72 % and 4.73 % against 4.71 % with every month (up to 40
#: years) at 2.2× the cost.
MAX_FIT_SEASONS = 12
#: Series fitted together; bounds memory (grid × series × season arrays).
BLOCK_SERIES = 2000
#: ... and series × months fitted together (the refinement keeps a gradient per month).
BLOCK_CELLS = 2000 * 60

_INTERMITTENT_PATTERNS = ("intermittent", "lumpy")
#: Methods whose grid fit is polished by Levenberg–Marquardt (smoothing.refine_smoothing):
#: those with a trend, whose initial trend and seasonal states matter most (see the
#: module docstring).  SES keeps its 50-point grid of α and first-month level.
REFINED_METHODS = ("holt_damped", "holt", "holt_winters_add", "holt_winters_mul")
#: Refined methods of which a series refines only those whose grid fit scores on the holdout
#: within REFINE_MARGIN of the best of them; the others drop out (see
#: :func:`_refine_holdout_contenders`).  The additive and the multiplicative season are two
#: forms of one model, and refining both for every seasonal series was about half the
#: refinement's cost.  Holt and damped Holt are cheap to refine and are both refined.
WINNER_REFINED_METHODS = ("holt_winters_add", "holt_winters_mul")
#: A form is refined when its grid fit's holdout sum of |error| is at most this multiple of
#: the best form's; 1 refines the grid winner only (ties both).  On the real-series bench
#: mean WAPE / MASE were 4.77 % / 0.758 at 1, 4.72 % / 0.749 at 1.02, 4.71 % / 0.747 at 1.05
#: and 4.69 % / 0.749 refining both, at 0.44, 0.49, 0.53 and 0.56 of the CPU time the
#: statistical source took before these changes (bench_statistical.py --data scale, both
#: measured in one process); the synthetic and the scale benches moved by 0.3 % or less.
REFINE_MARGIN = 1.0
#: Refinement iterations of the whole-span refit, warm-started from the training-window fit.
FULL_REFINE_ITERATIONS = 2
_PARAMETER_COLUMNS = ("alpha", "beta", "gamma", "phi")


@dataclass(frozen=True)
class StatisticalResult:
    """The statistical source for one cycle.

    * ``forecast``: [item, location, period, lag, quantity, method]
    * ``intervals``: [item, location, period, lower_80, upper_80, lower_95, upper_95]
      (one lower/upper pair per requested level), empirical holdout quantiles
    * ``series``: [item, location, pattern, has_trend, has_seasonality, method,
      alpha, beta, gamma, phi, holdout_wape, n_months, fallback]
    * ``seasonal_naive``: [item, location, period, lag, quantity], the
      reference forecast for MASE and forecast value added (``y_{C+h−m⌈h/m⌉}``;
      the last month where the span is shorter than a season, zero without
      demand)
    """

    forecast: pd.DataFrame
    intervals: pd.DataFrame
    series: pd.DataFrame
    seasonal_naive: pd.DataFrame


@dataclass(frozen=True)
class DemandMatrix:
    """Monthly history as a dense matrix: row per (item, location), column per month up to the cycle.

    ``first_month`` is the month index of column 0; the last column is the
    cycle.  ``start[i]`` is the column of series i's first demand (``n_months``
    of the matrix when it has none).
    """

    keys: pd.DataFrame
    y: np.ndarray
    start: np.ndarray
    first_month: int


def build_demand_matrix(history: pd.DataFrame, *, cycle: str) -> DemandMatrix:
    """Turn long actuals [item, location, period, quantity] into a :class:`DemandMatrix`.

    Rows after ``cycle`` are dropped first; duplicate rows of a month are
    summed; months without a row inside the history are zero demand.  An
    unknown quantity (NaN, or an empty cell) is an unknown month, kept as NaN
    (a month with any unknown row is unknown), and so is every month after
    the last month that has any row at all, up to the cycle: a cycle opened
    before its month's orders are in knows nothing of that month yet.
    Raises ``InvalidSpec`` when a column is missing, a period is not
    "YYYY-MM" or a quantity is text or infinite.
    """
    missing = {"item", "location", "period", "quantity"} - set(history.columns)
    if missing:
        raise InvalidSpec(f"history lacks column(s) {sorted(missing)}; expected [item, location, period, quantity]")
    # each distinct period string is checked once, not once per row
    codes, uniques = pd.factorize(history["period"].astype(str), sort=False)
    text = pd.Series(uniques, dtype=object).astype(str).str.strip()
    bad = ~text.str.fullmatch(r"\d{4}-(0[1-9]|1[0-2])")
    if bad.any():
        raise InvalidSpec(f"history period {text[bad].iloc[0]!r} is not a month in YYYY-MM form")
    unique_month = (text.str.slice(0, 4).astype(int).to_numpy() * 12 + text.str.slice(5, 7).astype(int).to_numpy() - 1
                    if len(text) else np.zeros(0, dtype=int))
    month = unique_month[codes] if len(codes) else np.zeros(0, dtype=int)
    raw = history["quantity"]
    quantity = pd.to_numeric(raw, errors="coerce").to_numpy(dtype=float)
    unknown = pd.isna(raw).to_numpy()
    if (np.isnan(quantity) & ~unknown).any() or np.isinf(quantity).any():
        raise InvalidSpec("history has a quantity that is not a number (an unknown month is left empty or NaN)")
    cycle_index = month_index(cycle)
    known = month <= cycle_index
    frame = pd.DataFrame(
        {
            "item": history["item"].to_numpy()[known],
            "location": history["location"].to_numpy()[known],
            "month": month[known],
            "quantity": quantity[known],
        }
    )
    grouped = frame.groupby(["item", "location"], sort=True)
    code = grouped.ngroup().to_numpy()
    keys = grouped.size().reset_index()[["item", "location"]]
    first_month = int(frame["month"].min()) if len(frame) else cycle_index
    n_months = cycle_index - first_month + 1
    y = np.zeros((len(keys), n_months))
    column = frame["month"].to_numpy() - first_month
    # a NaN row makes its month NaN: add.at propagates it
    np.add.at(y, (code, column), frame["quantity"].to_numpy())
    if len(frame):
        y[:, int(column.max()) + 1:] = np.nan  # whole trailing months without any row: not in yet
    has_demand = y > 0
    start = np.where(has_demand.any(axis=1), np.argmax(has_demand, axis=1), n_months)
    return DemandMatrix(keys=keys, y=y, start=start.astype(int), first_month=first_month)


def forecast_benchmark(
    y: np.ndarray, start: np.ndarray, *, method: str, origins: np.ndarray, horizon: int, season_length: int = 12
) -> np.ndarray:
    """Naive, seasonal naive or moving-average forecasts ``(n_series, len(origins), horizon)``.

    * naive: ``ŷ_{o+h} = y_o``;
    * seasonal naive: ``ŷ_{o+h} = y_{o+h−m·⌈h/m⌉}`` (Hyndman & Athanasopoulos,
      *Forecasting: Principles and Practice*, 3rd ed., section 5.2), naive
      when the span up to ``o`` is shorter than one season;
    * moving average: mean of the last 3 months of the span up to ``o``.

    Unknown (NaN) months: naive uses the latest known month up to ``o``,
    seasonal naive falls back to that naive value where its month is
    unknown, and the moving average is over the known months of its window
    (the naive value when none is known).  NaN only where nothing up to
    ``o`` is known.
    """
    y = np.asarray(y, dtype=float)
    start = np.asarray(start, dtype=int)
    origins = np.asarray(origins, dtype=int)
    n_series, n_months = y.shape
    rows = np.arange(n_series)[:, None, None]
    # latest known month at or before each column (forward fill)
    known = np.isfinite(y)
    latest = np.maximum.accumulate(np.where(known, np.arange(n_months)[None, :], -1), axis=1)
    filled = np.where(latest >= 0, y[np.arange(n_series)[:, None], np.maximum(latest, 0)], np.nan)
    last = filled[:, origins][:, :, None]  # (n, K, 1)
    if method == "naive":
        return np.broadcast_to(last, (n_series, len(origins), horizon)).copy()
    if method == "seasonal_naive":
        h = np.arange(1, horizon + 1)
        back = h - season_length * np.ceil(h / season_length).astype(int)  # in −m+1 … 0
        idx = origins[:, None] + back[None, :]  # (K, H)
        full_season = (origins[None, :] - start[:, None] + 1 >= season_length)[:, :, None]
        seasonal = y[rows, np.maximum(idx, 0)[None, :, :]]
        return np.where(full_season & np.isfinite(seasonal), seasonal, last)
    if method == "moving_average":
        offsets = np.arange(MOVING_AVERAGE_MONTHS)
        idx = origins[:, None] - offsets[None, :]  # (K, W)
        values = y[rows, np.maximum(idx, 0)[None, :, :]]
        inside = (idx[None, :, :] >= start[:, None, None]) & np.isfinite(values)
        count = inside.sum(axis=2)
        mean = np.where(inside, values, 0.0).sum(axis=2) / np.maximum(count, 1)
        mean = np.where(count > 0, mean, last[:, :, 0])
        return np.broadcast_to(mean[:, :, None], (n_series, len(origins), horizon)).copy()
    raise InvalidSpec(f"unknown benchmark method {method!r}; expected naive, seasonal_naive or moving_average")


def seasonal_profiles(
    y: np.ndarray, start: np.ndarray, group: np.ndarray, *, first_month: int, season_length: int = 12
) -> np.ndarray:
    """Seasonal index per group and calendar slot, shape (n_groups, m), mean 1; ones where unknown.

    Classical ratio-to-moving-average decomposition (Persons 1919; Makridakis,
    Wheelwright & Hyndman 1998, ch. 3) of each group's total demand: the
    ratio of the total to its centred m-month moving average (2×m for even
    m), averaged per calendar slot and normalised to mean 1.  A group needs
    every slot covered by at least one ratio, i.e. two seasons of history;
    otherwise its profile is flat.  Slot of column t is
    ``(first_month + t) mod m``.  ``group`` is −1 for series in no group.  A
    month unknown (NaN) for any member leaves the group's total unknown, and
    no ratio is taken where the moving average would span it.
    """
    y = np.asarray(y, dtype=float)
    group = np.asarray(group, dtype=int)
    m = int(season_length)
    n_groups = int(group.max()) + 1 if len(group) and group.max() >= 0 else 0
    n_months = y.shape[1]
    profiles = np.ones((n_groups, m))
    if n_groups == 0:
        return profiles
    known = group >= 0
    totals = np.zeros((n_groups, n_months))
    np.add.at(totals, group[known], np.where(np.arange(n_months)[None, :] >= start[known, None], y[known], 0.0))
    group_start = np.full(n_groups, n_months)
    np.minimum.at(group_start, group[known], start[known])
    weights = np.ones(m + 1) / m if m % 2 == 0 else np.ones(m) / m
    if m % 2 == 0:
        weights[0] = weights[-1] = 0.5 / m
    half = len(weights) // 2
    cma = np.full((n_groups, n_months), np.nan)
    centre = np.arange(half, n_months - half)
    if len(centre):
        acc = np.zeros((n_groups, len(centre)))
        for k, w in enumerate(weights):
            acc += w * totals[:, centre - half + k]
        cma[:, centre] = acc
    covered = np.arange(n_months)[None, :] - half >= group_start[:, None]
    with np.errstate(all="ignore"):
        ratio = np.where(covered & (cma > 0), totals / cma, np.nan)
    slot = (first_month + np.arange(n_months)) % m
    sums = np.zeros((n_groups, m))
    counts = np.zeros((n_groups, m))
    finite = np.isfinite(ratio)
    for s in range(m):
        cols = slot == s
        sums[:, s] = np.where(finite[:, cols], ratio[:, cols], 0.0).sum(axis=1)
        counts[:, s] = finite[:, cols].sum(axis=1)
    good = (counts > 0).all(axis=1)
    with np.errstate(all="ignore"):
        index = sums / counts
        index = index / index.mean(axis=1, keepdims=True)
    profiles[good] = index[good]
    return profiles


def forecast_new_items(
    y: np.ndarray, start: np.ndarray, profile: np.ndarray, *, first_month: int, horizon: int, season_length: int = 12
) -> np.ndarray:
    """Forecasts ``(n_series, horizon)`` for short histories: seasonal profile × deseasonalised mean.

    ``level = mean_t (y_t / index_{slot(t)})`` over the span, then
    ``ŷ_{T+h} = level · index_{slot(T+h)}``; ``profile`` is each series'
    ``(n_series, m)`` index (ones when its family has none).  Zero for a
    series without demand.  Unknown (NaN) months are left out of the mean.
    """
    y = np.asarray(y, dtype=float)
    n_series, n_months = y.shape
    m = int(season_length)
    span = np.arange(n_months)[None, :] >= np.asarray(start)[:, None]
    slot = (first_month + np.arange(n_months)) % m
    index = profile[:, slot]
    span &= np.isfinite(y)  # an unknown month says nothing about the level
    with np.errstate(all="ignore"):
        level = np.where(span, y / index, 0.0).sum(axis=1) / span.sum(axis=1)
    level = np.nan_to_num(level)
    ahead = (first_month + n_months - 1 + np.arange(1, horizon + 1)) % m
    return np.maximum(level[:, None] * profile[:, ahead], 0.0)


def nan_quantiles(values: np.ndarray, probs: Sequence[float]) -> np.ndarray:
    """Quantiles over axis 1 ignoring NaN, shape ``(len(probs), n, …)``; NaN where a slice is all NaN.

    Linear interpolation between order statistics, ``x_(⌊p(k−1)⌋)`` to
    ``x_(⌈p(k−1)⌉)`` of the k finite values (Hyndman & Fan 1996, definition
    7, numpy's default), done with one sort instead of numpy.nanquantile's
    per-slice loop.
    """
    ordered = np.sort(values, axis=1)  # NaN sort last
    count = np.isfinite(values).sum(axis=1)
    out = []
    for p in probs:
        position = p * np.maximum(count - 1, 0)
        below = np.floor(position).astype(int)
        above = np.minimum(below + 1, np.maximum(count - 1, 0))
        low = np.take_along_axis(ordered, below[:, None], axis=1)[:, 0]
        high = np.take_along_axis(ordered, above[:, None], axis=1)[:, 0]
        q = low + (position - below) * (high - low)
        out.append(np.where(count > 0, q, np.nan))
    return np.stack(out)


def empirical_intervals(
    point: np.ndarray, errors: np.ndarray, *, levels: Sequence[float]
) -> dict[float, tuple[np.ndarray, np.ndarray]]:
    """Lower/upper bounds ``(n_series, horizon)`` per level from holdout errors ``(n_series, n_origins, n_lags)``.

    Bounds are ``point + q_{(1−L)/2}(e_h)`` and ``point + q_{(1+L)/2}(e_h)``
    floored at 0, with ``e_h`` the finite errors at lag h; lags with fewer
    than :data:`MIN_INTERVAL_ERRORS` errors, or beyond the last error lag,
    reuse the last lag h₀ that had enough with quantiles scaled by √(h/h₀).
    Series without such a lag get NaN.
    """
    point = np.asarray(point, dtype=float)
    errors = np.asarray(errors, dtype=float)
    n_series, horizon = point.shape
    n_lags = errors.shape[2]
    counts = np.isfinite(errors).sum(axis=1)  # (n, n_lags)
    enough = counts >= MIN_INTERVAL_ERRORS
    lag_numbers = np.arange(1, n_lags + 1)
    last_good = np.maximum.accumulate(np.where(enough, lag_numbers[None, :], 0), axis=1)  # (n, n_lags)
    tail = np.repeat(last_good[:, -1:], max(horizon - n_lags, 0), axis=1)
    base_lag = np.concatenate([last_good, tail], axis=1)[:, :horizon]  # h₀ for each h
    h = np.arange(1, horizon + 1)[None, :]
    scale = np.sqrt(h / np.maximum(base_lag, 1))
    probs = sorted({p for level in levels for p in ((1 - level) / 2, (1 + level) / 2)})
    quantiles = nan_quantiles(errors, probs)
    rows = np.arange(n_series)[:, None]
    out: dict[float, tuple[np.ndarray, np.ndarray]] = {}
    for level in levels:
        bounds = []
        for p in ((1 - level) / 2, (1 + level) / 2):
            q = quantiles[probs.index(p)]
            q = np.where(enough, q, np.nan) if n_lags else q
            picked = q[rows, np.maximum(base_lag - 1, 0)] if n_lags else np.full((n_series, horizon), np.nan)
            picked = np.where(base_lag > 0, picked * scale, np.nan)
            bounds.append(np.maximum(point + picked, 0.0))
        out[level] = (bounds[0], bounds[1])
    return out


def _validate(cycle, horizon, methods, season_length, levels) -> tuple[str, ...]:
    if not isinstance(cycle, str) or not is_month(cycle):
        raise InvalidSpec(f"cycle must be a month in YYYY-MM form, got {cycle!r}")
    if isinstance(horizon, bool) or not isinstance(horizon, (int, np.integer)) or horizon < 1:
        raise InvalidSpec(f"horizon must be a positive whole number of months, got {horizon!r}")
    if isinstance(season_length, bool) or not isinstance(season_length, (int, np.integer)) or season_length < 2:
        raise InvalidSpec(f"season_length must be a whole number ≥ 2, got {season_length!r}")
    for level in levels:
        if not (0 < float(level) < 1):
            raise InvalidSpec(f"interval levels must lie strictly between 0 and 1, got {level!r}")
    if len(set(round(100 * float(v), 6) for v in levels)) != len(levels):
        raise InvalidSpec(f"interval levels must be distinct, got {list(levels)!r}")
    if methods is None:
        return DEFAULT_METHODS
    if isinstance(methods, str):
        raise InvalidSpec("methods must be a sequence of method names, not one string")
    chosen = tuple(methods)
    unknown = [m for m in chosen if m not in CANDIDATE_METHODS]
    if unknown or not chosen:
        raise InvalidSpec(f"unknown method(s) {unknown or chosen!r}; expected some of {list(CANDIDATE_METHODS)}")
    return tuple(m for m in CANDIDATE_METHODS if m in chosen)


def _level_label(level: float) -> str:
    percent = 100 * float(level)
    return f"{percent:g}".replace(".", "_")


@dataclass
class _BlockResult:
    method: np.ndarray  # index into CANDIDATE_METHODS, −1 where nothing fitted
    params: dict[str, np.ndarray]
    point: np.ndarray  # (n, horizon)
    errors: np.ndarray  # (n, n_origins, n_lags) holdout errors of the chosen method
    wape: np.ndarray
    members: np.ndarray  # (n, n_candidates) methods the chosen combination averaged


_BENCHMARKS = ("naive", "seasonal_naive", "moving_average")


def _select_block(
    y: np.ndarray,
    start: np.ndarray,
    allowed: np.ndarray,
    seasonal: np.ndarray,
    *,
    choosable: np.ndarray,
    horizon: int,
    season_length: int,
) -> _BlockResult:
    """Fit, hold out, choose and forecast every allowed candidate for a block of series.

    ``allowed`` is ``(n, n_candidates)``: which methods each series is fitted
    with; ``choosable`` ``(n_candidates,)`` which may be chosen on their own
    (a combination member that was not requested alone is only averaged);
    ``seasonal`` which series Theta deseasonalises.
    """
    n_series, n_months = y.shape
    last = n_months - 1
    span_months = n_months - start
    holdout = np.minimum(HOLDOUT_MONTHS, span_months // 2)
    train_end = n_months - holdout  # first held-out column
    train_months = train_end - start
    n_lags = min(horizon, HOLDOUT_MONTHS)
    origins = np.arange(max(0, last - HOLDOUT_MONTHS), last)  # holdout origins
    target = origins[:, None] + np.arange(1, n_lags + 1)[None, :]  # (K, L)
    valid = (origins[None, :, None] >= (train_end - 1)[:, None, None]) & (target[None, :, :] <= last)
    actual = y[:, np.minimum(target, last)]  # (n, K, L)
    valid &= np.isfinite(actual)  # an unknown month is not scored
    denominator = np.where(valid, np.abs(actual), 0.0).sum(axis=(1, 2))
    n_candidates = len(CANDIDATE_METHODS)
    combination = CANDIDATE_METHODS.index("combination")
    # the combination averages its members' refined fits: with it, every refined method is refined
    winner_refined = () if allowed[:, combination].any() else WINNER_REFINED_METHODS

    scores = np.full((n_series, n_candidates), np.inf)
    holdout_forecasts = np.full((n_series, n_candidates, len(origins), n_lags), np.nan)
    croston_fits: dict[int, intermittent.CrostonFit] = {}
    smoothing_fits: dict[int, smoothing.SmoothingFit] = {}
    member_rows: dict[int, np.ndarray] = {}

    def score(k: int, rows: np.ndarray, fc: np.ndarray) -> None:
        fc = np.maximum(fc, 0.0)
        err = np.where(valid[rows], actual[rows] - fc, np.nan)
        broken = (valid[rows] & ~np.isfinite(err)).any(axis=(1, 2))
        scores[rows, k] = np.where(broken, np.inf, np.nansum(np.abs(err), axis=(1, 2)))
        holdout_forecasts[rows, k] = fc

    for k, method in enumerate(CANDIDATE_METHODS):
        rows = np.flatnonzero(allowed[:, k])
        if not len(rows) or k == combination:
            continue
        ys, ss = y[rows], start[rows]
        if method in _BENCHMARKS:
            fc = forecast_benchmark(ys, ss, method=method, origins=origins, horizon=n_lags, season_length=season_length)
        elif method in intermittent.INTERMITTENT_METHODS:
            fit = intermittent.fit_croston(
                ys, ss, method=method, fit_ends=(train_end[rows], np.full(len(rows), n_months)),
                init_available=train_months[rows],
            )
            fc = intermittent.forecast_croston(
                ys, ss, method=method, alpha=fit.alpha[0], init_available=train_months[rows],
                origins=origins, horizon=n_lags,
            )
            croston_fits[k] = fit
            fc = np.where(np.isfinite(fit.sse[0])[:, None, None], fc, np.nan)
        elif method == "theta":
            fit = theta.fit_theta(ys, ss, end=train_end[rows], seasonal=seasonal[rows], season_length=season_length)
            fc = theta.forecast_theta(ys, ss, fit, origins=origins, horizon=n_lags, season_length=season_length)
            fc = np.where(np.isfinite(fit.sse)[:, None, None], fc, np.nan)
        else:
            # a refined method's whole-span fit starts from its training-window
            # fit, so its grid needs the training window only
            refined = method in REFINED_METHODS
            ends = (train_end[rows],) if refined else (train_end[rows], np.full(len(rows), n_months))
            fit = smoothing.fit_smoothing(
                ys, ss, method=method, fit_ends=ends, init_available=train_months[rows],
                season_length=season_length, refine=refined and method not in winner_refined,
            )
            smoothing_fits[k] = fit
            fc = smoothing.forecast_smoothing(
                ys, ss, method=method, params=fit.params[0], available=train_months[rows],
                origins=origins, horizon=n_lags, season_length=season_length, states=fit.states[0],
            )
            fc = np.where(np.isfinite(fit.sse[0])[:, None, None], fc, np.nan)
        score(k, rows, fc)
        member_rows[k] = rows

    group = [k for k, name in enumerate(CANDIDATE_METHODS) if name in winner_refined and k in smoothing_fits]
    if group:
        _refine_holdout_contenders(y, start, group=group, scores=scores, smoothing_fits=smoothing_fits,
                               member_rows=member_rows, train_end=train_end, train_months=train_months,
                               origins=origins, n_lags=n_lags, season_length=season_length, score=score)

    # the combination: the mean of its members' forecasts (floored at zero),
    # for series where at least two members gave a usable holdout forecast
    members = np.zeros((n_series, n_candidates), dtype=bool)
    in_combination = np.array([m in COMBINED_METHODS for m in CANDIDATE_METHODS])
    members[:, in_combination] = np.isfinite(scores[:, in_combination])
    can_combine = allowed[:, combination] & (members.sum(axis=1) >= 2)
    if can_combine.any():
        rows = np.flatnonzero(can_combine)
        picked = members[rows][:, :, None, None]
        mean = np.where(picked, holdout_forecasts[rows], 0.0).sum(axis=1) / members[rows].sum(axis=1)[:, None, None]
        score(combination, rows, mean)
    members &= can_combine[:, None]

    chosen = np.argmin(np.where(choosable[None, :], scores, np.inf), axis=1)
    fitted_any = np.isfinite(scores[np.arange(n_series), chosen]) & choosable[chosen]
    chosen = np.where(fitted_any, chosen, -1)
    point = np.full((n_series, horizon), np.nan)
    params = {name: np.full(n_series, np.nan) for name in _PARAMETER_COLUMNS}
    final_origin = np.array([last])

    def final(k: int, sel: np.ndarray) -> tuple[np.ndarray, dict[str, np.ndarray]]:
        """Whole-span forecasts (len(sel), horizon) of method k, and the parameters it used."""
        method = CANDIDATE_METHODS[k]
        ys, ss = y[sel], start[sel]
        if method in _BENCHMARKS:
            fc = forecast_benchmark(ys, ss, method=method, origins=final_origin, horizon=horizon,
                                    season_length=season_length)
            return fc[:, 0], {}
        position = np.searchsorted(member_rows[k], sel)
        if method in intermittent.INTERMITTENT_METHODS:
            alpha = croston_fits[k].alpha[1][position]
            fc = intermittent.forecast_croston(ys, ss, method=method, alpha=alpha, init_available=train_months[sel],
                                               origins=final_origin, horizon=horizon)
            return fc[:, 0], {"alpha": alpha}
        if method == "theta":
            fit = theta.fit_theta(ys, ss, end=np.full(len(sel), n_months), seasonal=seasonal[sel],
                                  season_length=season_length)
            fc = theta.forecast_theta(ys, ss, fit, origins=final_origin, horizon=horizon, season_length=season_length)
            return np.where(np.isfinite(fit.sse)[:, None], fc[:, 0], np.nan), {"alpha": fit.alpha}
        fit = smoothing_fits[k]
        if method in REFINED_METHODS:
            # the whole-span refit starts from the refined training-window fit
            # (same span start, so its states are valid initial states)
            chosen_params, states, _ = smoothing.refine_smoothing(
                ys, ss, method=method, params={name: values[position] for name, values in fit.params[0].items()},
                states=fit.states[0].take(position), fit_end=np.full(len(sel), n_months),
                season_length=season_length, iterations=FULL_REFINE_ITERATIONS,
            )
        else:
            chosen_params = {name: values[position] for name, values in fit.params[1].items()}
            states = fit.states[1].take(position)
        fc = smoothing.forecast_smoothing(
            ys, ss, method=method, params=chosen_params, available=train_months[sel], origins=final_origin,
            horizon=horizon, season_length=season_length, states=states,
        )
        return fc[:, 0], chosen_params

    for k in range(n_candidates):
        sel = np.flatnonzero(chosen == k)
        if not len(sel):
            continue
        if k == combination:
            total = np.zeros((len(sel), horizon))
            for j in np.flatnonzero(members[sel].any(axis=0)):
                part = sel[members[sel, j]]
                fc, _ = final(j, part)
                total[np.searchsorted(sel, part)] += np.maximum(fc, 0.0)
            point[sel] = total / members[sel].sum(axis=1)[:, None]
            continue
        fc, used = final(k, sel)
        point[sel] = fc
        for name, values in used.items():
            params[name][sel] = values
    params["phi"][chosen == CANDIDATE_METHODS.index("holt")] = 1.0  # undamped Holt: φ = 1
    # a whole-span refit whose recursion broke down leaves the series to the fallback
    usable = fitted_any & np.isfinite(point).all(axis=1)
    chosen = np.where(usable, chosen, -1)
    rows = np.arange(n_series)
    errors = np.where(valid, actual - holdout_forecasts[rows, np.maximum(chosen, 0)], np.nan)
    with np.errstate(all="ignore"):
        best = scores[rows, np.maximum(chosen, 0)]
        wape = np.where(usable & (denominator > 0), best / denominator, np.nan)
    members &= (chosen == combination)[:, None]
    return _BlockResult(method=chosen, params=params, point=point, errors=errors, wape=wape, members=members)


def _refine_holdout_contenders(y, start, *, group, scores, smoothing_fits, member_rows, train_end, train_months,
                               origins, n_lags, season_length, score) -> None:
    """Of the grid fits of the methods ``group``, refine each series' contenders on the holdout; the rest drop out.

    ``scores[:, k]`` holds the holdout sum of |error| of method k's grid
    fit.  A method is a contender for a series when its score is at most
    :data:`REFINE_MARGIN` times the series' best in the group.  Contenders
    are refined on the training window
    (:func:`consensus.methods.smoothing.refine_smoothing`, updating
    ``smoothing_fits`` in place) and their holdout forecasts and scores
    replaced by the refined fits' (``score``); the others get an infinite
    score, unless every refined fit of the series broke down, when they keep
    their grid scores.  Every step is per series.
    """
    grid_scores = scores[:, group].copy()
    best = grid_scores.min(axis=1)
    scores[:, group] = np.inf
    for j, k in enumerate(group):
        rows = member_rows[k]
        fit = smoothing_fits[k]
        mine = grid_scores[rows, j]
        position = np.flatnonzero(np.isfinite(mine) & (mine <= REFINE_MARGIN * best[rows]) & np.isfinite(fit.sse[0]))
        if not len(position):
            continue
        sel = rows[position]
        method = CANDIDATE_METHODS[k]
        params, states, sse = smoothing.refine_smoothing(
            y[sel], start[sel], method=method, params={name: v[position] for name, v in fit.params[0].items()},
            states=fit.states[0].take(position), fit_end=train_end[sel], season_length=season_length,
        )
        for name in params:
            fit.params[0][name][position] = params[name]
        fit.states[0].level[position] = states.level
        fit.states[0].trend[position] = states.trend
        if fit.states[0].season is not None:
            fit.states[0].season[position] = states.season
        fit.sse[0][position] = sse
        fc = smoothing.forecast_smoothing(
            y[sel], start[sel], method=method, params=params, available=train_months[sel], origins=origins,
            horizon=n_lags, season_length=season_length, states=states,
        )
        score(k, sel, np.where(np.isfinite(sse)[:, None, None], fc, np.nan))
    # where every refined fit broke down, the others' grid fits stand
    broken = ~np.isfinite(scores[:, group]).any(axis=1)
    contender = grid_scores[broken] <= REFINE_MARGIN * best[broken, None]
    scores[np.ix_(broken, group)] = np.where(contender, np.inf, grid_scores[broken])


def _allowed_candidates(
    *, requested: tuple[str, ...], pattern: np.ndarray, has_trend: np.ndarray, has_seasonality: np.ndarray,
    y: np.ndarray, start: np.ndarray, season_length: int,
) -> np.ndarray:
    """Which candidates each series may use: requested, fittable on its data, suited to its profile."""
    n_series, n_months = y.shape
    span_months = n_months - start
    train_months = span_months - np.minimum(HOLDOUT_MONTHS, span_months // 2)
    span = np.arange(n_months)[None, :] >= start[:, None]
    positive = np.where(span & np.isfinite(y), y > 0, True).all(axis=1)
    train_end = start + train_months
    demand_in_train = (span & (np.arange(n_months)[None, :] < train_end[:, None]) & (y > 0)).sum(axis=1)
    sparse = np.isin(pattern, _INTERMITTENT_PATTERNS)
    fittable = {
        "naive": train_months >= 1,
        "seasonal_naive": train_months >= season_length,
        "moving_average": train_months >= 1,
        "ses": train_months >= smoothing.minimum_months("ses"),
        "croston": demand_in_train >= 2,
        "sba": demand_in_train >= 2,
        "holt_damped": train_months >= smoothing.minimum_months("holt_damped"),
        "holt": train_months >= smoothing.minimum_months("holt"),
        "holt_winters_add": train_months >= smoothing.minimum_months("holt_winters_add", season_length=season_length),
        "holt_winters_mul": (train_months >= smoothing.minimum_months("holt_winters_mul", season_length=season_length))
        & positive,
        "theta": train_months >= np.where(has_seasonality, 2 * season_length, 4),
        "combination": np.ones(n_series, bool),  # usable where two members are (see _select_block)
    }
    # where Holt–Winters can be fitted to a seasonal series, seasonal naive
    # (HW without smoothing) and the methods without a season only add
    # selection noise on a 12-month holdout (and time)
    seasonal_fit = has_seasonality & fittable["holt_winters_add"] & ("holt_winters_add" in requested)
    nonseasonal = ~seasonal_fit
    suited = {
        "naive": ~sparse & nonseasonal,
        "seasonal_naive": ~sparse & ~seasonal_fit,
        "moving_average": nonseasonal,
        "ses": nonseasonal,
        "croston": sparse,
        "sba": sparse,
        "holt_damped": ~sparse & nonseasonal,
        "holt": ~sparse & has_trend & nonseasonal,
        "holt_winters_add": ~sparse & has_seasonality,
        "holt_winters_mul": ~sparse & has_seasonality,
        "theta": ~sparse,
        "combination": ~sparse,
    }
    wanted = np.array([m in requested for m in CANDIDATE_METHODS])
    can = np.stack([fittable[m] for m in CANDIDATE_METHODS], axis=1) & wanted[None, :]
    preferred = can & np.stack([suited[m] for m in CANDIDATE_METHODS], axis=1)
    return np.where(preferred.any(axis=1)[:, None], preferred, can)


def _member_names(members: np.ndarray) -> np.ndarray:
    """'theta+holt_winters_mul'-style names of each row's members ``(n, n_candidates)``; '' for none."""
    out = np.full(len(members), "", dtype=object)
    for k in np.flatnonzero(members.any(axis=0)):
        name = CANDIDATE_METHODS[k]
        out = np.where(members[:, k], np.where(out == "", name, out + "+" + name), out)
    return out


def _blocks(rows: np.ndarray, span_months: np.ndarray):
    """Consecutive slices of ``rows`` (longest span first) of at most BLOCK_SERIES series and BLOCK_CELLS series × months."""
    lo = 0
    while lo < len(rows):
        size = max(1, min(BLOCK_SERIES, BLOCK_CELLS // max(int(span_months[rows[lo]]), 1)))
        yield rows[lo:lo + size]
        lo += size


def forecast_statistical(
    history: pd.DataFrame,
    *,
    cycle: str,
    horizon: int,
    families: pd.Series | None = None,
    methods: Sequence[str] | None = None,
    season_length: int = 12,
    levels: Sequence[float] = (0.8, 0.95),
) -> StatisticalResult:
    """Forecast every item × location from its own monthly history known at ``cycle``.

    ``history`` holds long monthly actuals [item, location, period,
    quantity]; rows after ``cycle`` are ignored.  ``families`` maps item →
    family for the new-item fallback.  ``methods`` restricts the candidates
    (names from :data:`CANDIDATE_METHODS`; others raise ``InvalidSpec``).
    The module docstring gives the whole procedure and its sources.
    """
    requested = _validate(cycle, horizon, methods, season_length, levels)
    horizon = int(horizon)
    m = int(season_length)
    matrix = build_demand_matrix(history, cycle=cycle)
    keys = matrix.keys
    span_months = matrix.y.shape[1] - matrix.start  # the whole span: what n_months reports, what makes a new item
    # every method sees at most the last MAX_FIT_SEASONS seasons
    offset = max(matrix.y.shape[1] - MAX_FIT_SEASONS * m, 0)
    y = matrix.y[:, offset:]
    start = np.maximum(matrix.start - offset, 0)
    first_month = matrix.first_month + offset
    n_series, n_months = y.shape
    fit_span = n_months - start

    pattern = classify_demand(y, start)
    has_trend = detect_trend(y, start)
    has_seasonality = detect_seasonality(y, start, season_length=m)

    method_name = np.full(n_series, "", dtype=object)
    params = {name: np.full(n_series, np.nan) for name in _PARAMETER_COLUMNS}
    point = np.zeros((n_series, horizon))
    wape = np.full(n_series, np.nan)
    fallback = np.full(n_series, "", dtype=object)
    combined = np.full(n_series, "", dtype=object)
    bounds = {level: (np.full((n_series, horizon), np.nan), np.full((n_series, horizon), np.nan)) for level in levels}

    allowed = _allowed_candidates(
        requested=requested, pattern=pattern, has_trend=has_trend, has_seasonality=has_seasonality,
        y=y, start=start, season_length=m,
    )
    # a requested combination needs its members fitted, asked for or not
    with_members = requested + (COMBINED_METHODS if "combination" in requested else ())
    fitted = _allowed_candidates(
        requested=tuple(name for name in CANDIDATE_METHODS if name in with_members), pattern=pattern,
        has_trend=has_trend,
        has_seasonality=has_seasonality, y=y, start=start, season_length=m,
    ) & (allowed.any(axis=1)[:, None])
    fitted |= allowed
    choosable = np.array([name in requested for name in CANDIDATE_METHODS])
    fit_rows = np.flatnonzero((span_months >= NEW_ITEM_MONTHS) & allowed.any(axis=1))
    # longest spans first, so a block's recursions run over about its own
    # months only (a series' numbers do not depend on its block)
    fit_rows = fit_rows[np.argsort(start[fit_rows], kind="stable")]
    for rows in _blocks(fit_rows, fit_span):
        block = _select_block(y[rows], start[rows], fitted[rows], has_seasonality[rows], choosable=choosable,
                              horizon=horizon, season_length=m)
        ok = block.method >= 0
        done = rows[ok]
        method_name[done] = np.array(CANDIDATE_METHODS, dtype=object)[block.method[ok]]
        for name in _PARAMETER_COLUMNS:
            params[name][done] = block.params[name][ok]
        point[done] = np.maximum(block.point[ok], 0.0)
        wape[done] = block.wape[ok]
        combined[done] = _member_names(block.members[ok])
        for level, (low, high) in empirical_intervals(point[done], block.errors[ok], levels=levels).items():
            bounds[level][0][done] = low
            bounds[level][1][done] = high

    rest = np.flatnonzero(method_name == "")
    if len(rest):
        group = np.full(n_series, -1)
        family_of = None
        if families is not None:
            family_of = keys["item"].map(families).to_numpy(dtype=object)
            known = pd.notna(family_of)
            codes, _ = pd.factorize(pd.Series(family_of[known], dtype=object), sort=True)
            group[known] = codes
        profiles = seasonal_profiles(y, start, group, first_month=first_month, season_length=m)
        own = np.ones((len(rest), m))
        in_group = group[rest] >= 0
        own[in_group] = profiles[group[rest][in_group]]
        point[rest] = forecast_new_items(
            y[rest], start[rest], own, first_month=first_month, horizon=horizon, season_length=m
        )
        no_demand = span_months[rest] == 0
        method_name[rest] = np.where(no_demand, "zero_demand", "new_item_profile")
        flat = (own == 1.0).all(axis=1)
        family_names = pd.Series(
            family_of[rest] if family_of is not None else np.full(len(rest), ""), dtype=object
        ).fillna("").astype(str).to_numpy(dtype=object)
        how = np.where(
            ~in_group,
            "flat profile (no family given) × item mean",
            np.where(
                flat,
                "flat profile (family " + family_names + " has no seasonal profile: under two seasons) × item mean",
                "family " + family_names + " seasonal profile × item mean",
            ),
        )
        reason = np.where(
            span_months[rest] < NEW_ITEM_MONTHS,
            "new item: " + span_months[rest].astype(str) + " month(s) since first demand",
            "no requested method gives a usable forecast from " + span_months[rest].astype(str)
            + " month(s) of history",
        )
        fallback[rest] = np.where(no_demand, "no demand in history: forecast zero", reason + "; " + how)

    cycle_index = month_index(cycle)
    steps = np.arange(1, horizon + 1)
    periods = month_names(cycle_index + steps)
    item_rep = np.repeat(keys["item"].to_numpy(), horizon)
    location_rep = np.repeat(keys["location"].to_numpy(), horizon)
    period_rep = np.tile(periods, n_series)
    lag_rep = np.tile(steps, n_series)
    forecast = pd.DataFrame(
        {
            "item": item_rep, "location": location_rep, "period": period_rep, "lag": lag_rep,
            "quantity": np.maximum(point, 0.0).ravel(), "method": np.repeat(method_name, horizon),
        }
    )
    intervals = pd.DataFrame({"item": item_rep, "location": location_rep, "period": period_rep})
    for level in levels:
        label = _level_label(level)
        intervals[f"lower_{label}"] = bounds[level][0].ravel()
        intervals[f"upper_{label}"] = bounds[level][1].ravel()

    reference = forecast_benchmark(
        y, np.minimum(start, n_months - 1), method="seasonal_naive", origins=np.array([n_months - 1]),
        horizon=horizon, season_length=m,
    )[:, 0, :]
    seasonal_naive = pd.DataFrame(
        {
            "item": item_rep, "location": location_rep, "period": period_rep, "lag": lag_rep,
            "quantity": np.maximum(np.nan_to_num(reference), 0.0).ravel(),
        }
    )
    series = pd.DataFrame(
        {
            "item": keys["item"].to_numpy(),
            "location": keys["location"].to_numpy(),
            "pattern": pattern,
            "has_trend": has_trend,
            "has_seasonality": has_seasonality,
            "method": method_name,
            **params,
            "holdout_wape": wape,
            "n_months": span_months.astype(int),
            "fallback": fallback,
            "combined": combined,
        }
    )
    return StatisticalResult(forecast=forecast, intervals=intervals, series=series, seasonal_naive=seasonal_naive)
