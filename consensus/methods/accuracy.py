"""Forecast accuracy: error measures, the error table and accuracy by level.

Every measure shares one signature, ``measure(actual, forecast) -> float``,
so any list of them can be passed around (see :data:`MEASURES`).  The error
of a forecast is ``e = actual − forecast``: a positive error means the source
forecast too low, a positive bias means it under-forecasts on average.

MAPE, WAPE and bias_pct are reported in percent (100 = 100 %).
"""

from __future__ import annotations

from typing import Callable

import numpy as np
import pandas as pd

from consensus.errors import InvalidSpec
from consensus.periods import lag_bucket_labels, month_indexes

#: Accuracy levels and the key columns a group at that level is named by.
#: "item" is the planning cell (item × location): sources forecast at that
#: grain, so it is the finest level there is to measure.
LEVEL_KEYS: dict[str, tuple[str, ...]] = {
    "item": ("item", "location"),
    "family": ("family",),
    "location": ("location",),
    "region": ("region",),
    # Sales plan family × region, so this is where their own numbers are scored.
    "family_region": ("family", "region"),
    "total": (),
}

#: |tracking signal| above this is flagged (common practice in operations
#: management texts: limits of ±4 MADs).
TRACKING_SIGNAL_LIMIT = 4.0

#: Default season length for the MASE scale: monthly data, yearly season.
MONTHS_PER_SEASON = 12


def month_indexes_factorized(months: pd.Series) -> np.ndarray:
    """:func:`consensus.periods.month_indexes`, parsing each distinct month once.

    Frames hold millions of rows but only a few dozen distinct months, so
    factorising first turns the string parsing into an integer lookup.
    """
    codes, uniques = pd.factorize(months, sort=False)
    if not len(uniques):
        return np.empty(len(codes), dtype=int)
    return month_indexes(pd.Series(uniques, dtype=object))[codes]


def _as_float_arrays(actual, forecast) -> tuple[np.ndarray, np.ndarray]:
    a = np.asarray(actual, dtype=float).ravel()
    f = np.asarray(forecast, dtype=float).ravel()
    if a.shape != f.shape:
        raise ValueError(f"actual and forecast differ in length: {a.size} vs {f.size}")
    return a, f


def mad(actual: np.ndarray, forecast: np.ndarray) -> float:
    """Mean absolute deviation (mean absolute error): mean(|actual − forecast|)."""
    a, f = _as_float_arrays(actual, forecast)
    return float(np.mean(np.abs(a - f))) if a.size else float("nan")


def mse(actual: np.ndarray, forecast: np.ndarray) -> float:
    """Mean squared error: mean((actual − forecast)²)."""
    a, f = _as_float_arrays(actual, forecast)
    return float(np.mean((a - f) ** 2)) if a.size else float("nan")


def rmse(actual: np.ndarray, forecast: np.ndarray) -> float:
    """Root mean squared error: sqrt(MSE)."""
    return float(np.sqrt(mse(actual, forecast)))


def mape(actual: np.ndarray, forecast: np.ndarray) -> float:
    """Mean absolute percentage error in percent: 100 · mean(|e| / |actual|).

    Cells whose actual is zero have no defined percentage error and are left
    out; :func:`zero_actual_count` says how many were.  NaN when no cell is left.
    """
    a, f = _as_float_arrays(actual, forecast)
    keep = a != 0
    if not keep.any():
        return float("nan")
    return float(100.0 * np.mean(np.abs(a[keep] - f[keep]) / np.abs(a[keep])))


def zero_actual_count(actual: np.ndarray, forecast: np.ndarray) -> float:
    """How many cells MAPE left out because their actual was zero."""
    a, _ = _as_float_arrays(actual, forecast)
    return float(np.count_nonzero(a == 0))


def wape(actual: np.ndarray, forecast: np.ndarray) -> float:
    """Weighted absolute percentage error in percent: 100 · Σ|e| / Σ actual.

    Also called MAD/mean ratio; it stays defined when single actuals are zero.
    NaN when the actuals sum to zero.
    """
    a, f = _as_float_arrays(actual, forecast)
    total = a.sum()
    return float(100.0 * np.abs(a - f).sum() / total) if total != 0 else float("nan")


def bias(actual: np.ndarray, forecast: np.ndarray) -> float:
    """Mean error, e = actual − forecast; positive means under-forecasting."""
    a, f = _as_float_arrays(actual, forecast)
    return float(np.mean(a - f)) if a.size else float("nan")


def bias_pct(actual: np.ndarray, forecast: np.ndarray) -> float:
    """Bias in percent of demand: 100 · Σe / Σ actual."""
    a, f = _as_float_arrays(actual, forecast)
    total = a.sum()
    return float(100.0 * (a - f).sum() / total) if total != 0 else float("nan")


def tracking_signal(actual: np.ndarray, forecast: np.ndarray) -> float:
    """Latest tracking signal of an ordered error sequence: Σe / MAD.

    See :func:`tracking_signal_series`; the last value of the running signal
    is the sum of all errors divided by the MAD of all errors.
    """
    series = tracking_signal_series(np.asarray(actual, float) - np.asarray(forecast, float))
    return float(series[-1]) if series.size else float("nan")


def tracking_signal_series(errors: np.ndarray) -> np.ndarray:
    """Running tracking signal of errors in time order.

    TS_t = (e_1 + … + e_t) / MAD_t with MAD_t = (|e_1| + … + |e_t|) / t, the
    cumulative-MAD form (the running sum of forecast errors divided by the
    mean absolute deviation, as in operations management texts).  TS is 0
    while every error so far is 0.  |TS| > 4 says the forecast is biased
    (common practice).
    """
    e = np.asarray(errors, dtype=float).ravel()
    if not e.size:
        return e
    running_sum = np.cumsum(e)
    running_mad = np.cumsum(np.abs(e)) / np.arange(1, e.size + 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        ts = np.where(running_mad > 0, running_sum / running_mad, 0.0)
    return ts


#: Every measure by name; each is ``measure(actual, forecast) -> float``.
MEASURES: dict[str, Callable[[np.ndarray, np.ndarray], float]] = {
    "mad": mad,
    "mse": mse,
    "rmse": rmse,
    "mape": mape,
    "wape": wape,
    "bias": bias,
    "bias_pct": bias_pct,
}

#: Counts that go with the measures (same signature): MAPE's excluded cells.
COMPANION_COUNTS: dict[str, Callable[[np.ndarray, np.ndarray], float]] = {
    "n_zero_actual": zero_actual_count,
}


def forecast_errors(forecasts: pd.DataFrame, actuals: pd.DataFrame) -> pd.DataFrame:
    """Pair every forecast with its actual: one row per forecast cell that can be scored.

    forecasts: [source, cycle, item, location, period, quantity];
    actuals: [item, location, period, quantity].

    Which cells are scored (the zero-demand rule):

    * the forecast's period must be a month that has actuals for some cell
      (months still in the future, or never loaded, are not scored);
    * an item × location that has an actual row that month takes it;
    * an item × location with no row that month counts as 0 demand only
      when it has actual rows in some other month — order history lists
      what was ordered, so a known series with no row had no orders;
      a series with no actuals at all is unknown (new, or a typo) and
      is not scored rather than being scored against an invented zero;
    * forecasts at lag < 1 (periods not after their cycle) are not forecasts
      and are left out.

    Returns [source, cycle, item, location, period, lag, lag_bucket,
    forecast, actual, error] with error = actual − forecast.
    """
    columns = ["source", "cycle", "item", "location", "period", "lag", "lag_bucket", "forecast", "actual", "error"]
    fc = forecasts[["source", "cycle", "item", "location", "period", "quantity"]].rename(columns={"quantity": "forecast"})
    act = (
        actuals.groupby(["item", "location", "period"], as_index=False, sort=True)["quantity"].sum()
        .rename(columns={"quantity": "actual"})
    )
    if fc.empty or act.empty:
        return pd.DataFrame({c: pd.Series(dtype=float if c in ("forecast", "actual", "error") else object) for c in columns})
    fc = fc.assign(lag=month_indexes_factorized(fc["period"]) - month_indexes_factorized(fc["cycle"]))
    fc = fc[fc["lag"] >= 1]
    months_with_actuals = pd.Index(act["period"].unique())
    known_series = act[["item", "location"]].drop_duplicates()
    fc = fc[fc["period"].isin(months_with_actuals)]
    fc = fc.merge(known_series, on=["item", "location"], how="inner")
    out = fc.merge(act, on=["item", "location", "period"], how="left")
    out["actual"] = out["actual"].fillna(0.0).astype(float)
    out["forecast"] = out["forecast"].astype(float)
    out["error"] = out["actual"] - out["forecast"]
    out["lag"] = out["lag"].astype(int)
    out["lag_bucket"] = lag_bucket_labels(out["lag"].to_numpy())
    out = out.sort_values(["source", "cycle", "item", "location", "period"], kind="mergesort").reset_index(drop=True)
    return out[columns]


def _check_level(level: str) -> tuple[str, ...]:
    if level not in LEVEL_KEYS:
        raise InvalidSpec(f"level must be one of {sorted(LEVEL_KEYS)}, got {level!r}")
    return LEVEL_KEYS[level]


def _attach_level_keys(frame: pd.DataFrame, level: str, items: pd.DataFrame, locations: pd.DataFrame) -> pd.DataFrame:
    if level == "family_region":
        frame = _attach_level_keys(frame, "family", items, locations)
        return _attach_level_keys(frame, "region", items, locations)
    if level == "family" and "family" not in frame.columns:
        frame = frame.merge(items[["item", "family"]], on="item", how="left")
        frame["family"] = frame["family"].fillna("(unknown family)")
    if level == "region" and "region" not in frame.columns:
        frame = frame.merge(locations[["location", "region"]], on="location", how="left")
        frame["region"] = frame["region"].fillna("(unknown region)")
    return frame


def _measures_from_sums(g: pd.DataFrame) -> pd.DataFrame:
    """Measures of each group from its per-group sums (vectorised over groups)."""
    n = g["n"].to_numpy(float)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = pd.DataFrame(index=g.index)
        out["n"] = g["n"].astype(int)
        out["n_zero_actual"] = g["n_zero_actual"].astype(int)
        out["mad"] = g["sum_abs"] / n
        out["mse"] = g["sum_sq"] / n
        out["rmse"] = np.sqrt(out["mse"])
        out["mape"] = np.where(g["n_nonzero"] > 0, 100.0 * g["sum_ape"] / g["n_nonzero"], np.nan)
        out["wape"] = np.where(g["sum_actual"] != 0, 100.0 * g["sum_abs"] / g["sum_actual"], np.nan)
        out["bias"] = g["sum_err"] / n
        out["bias_pct"] = np.where(g["sum_actual"] != 0, 100.0 * g["sum_err"] / g["sum_actual"], np.nan)
        # The latest value of the running signal: Σe / (Σ|e| / n).
        out["tracking_signal"] = np.where(g["sum_abs"] > 0, g["sum_err"] / out["mad"], 0.0)
    out["ts_flag"] = np.abs(out["tracking_signal"]) > TRACKING_SIGNAL_LIMIT
    return out


def accuracy_table(
    errors: pd.DataFrame,
    *,
    level: str,
    items: pd.DataFrame,
    locations: pd.DataFrame,
    by: tuple[str, ...] = ("source", "lag_bucket"),
    seasonal_scale: pd.DataFrame | float | None = None,
) -> pd.DataFrame:
    """Accuracy of each source by ``by`` and by group at ``level``.

    A group's forecast is the SUM of its cells' forecasts per (source, cycle,
    period), scored against the sum of their actuals, so a family shows how
    well the family total was forecast — errors of single items partly cancel
    in the sum, which is why groups read better than items.

    Measures: see the module functions; ``tracking_signal`` is the latest
    running signal Σe / MAD over the group's errors in period order
    (:func:`tracking_signal_series`), ``ts_flag`` is |TS| > 4.
    ``mase`` (Hyndman & Koehler 2006, "Another look at measures of forecast
    accuracy", IJF 22) is MAD / scale, the scale being the in-sample MAE of
    the seasonal naive forecast y_t = y_{t−12} on the group's history:
    pass ``seasonal_scale`` as a frame [level keys…, scale] (from
    :func:`seasonal_naive_scale`) or one number for level "total".

    Returns [by…, level keys…, n, n_zero_actual, mad, mse, rmse, mape, wape,
    bias, bias_pct, tracking_signal, ts_flag, mase].
    """
    keys = list(_check_level(level))
    by = list(by)
    unknown = [c for c in by if c not in errors.columns]
    if unknown:
        raise InvalidSpec(f"cannot group accuracy by {unknown}: not columns of the error table")
    frame = _attach_level_keys(errors, level, items, locations)
    group_cols = list(dict.fromkeys(by + keys))
    # Sum cells into group totals per forecast instance before scoring.
    instance_cols = list(dict.fromkeys(group_cols + ["source", "cycle", "period"]))
    summed = frame.groupby(instance_cols, as_index=False, sort=True)[["forecast", "actual"]].sum()
    e = summed["actual"] - summed["forecast"]
    a = summed["actual"]
    nonzero = a != 0
    parts = pd.DataFrame(
        {
            "n": 1,
            "n_zero_actual": (~nonzero).astype(int),
            "n_nonzero": nonzero.astype(int),
            "sum_abs": e.abs(),
            "sum_sq": e * e,
            "sum_err": e,
            "sum_actual": a,
            "sum_ape": np.where(nonzero, e.abs() / a.abs().where(nonzero, 1.0), 0.0),
        }
    )
    for col in group_cols:
        parts[col] = summed[col].to_numpy()
    if group_cols:
        sums = parts.groupby(group_cols, sort=True).sum(numeric_only=True)
    else:
        sums = parts.sum(numeric_only=True).to_frame().T
    table = _measures_from_sums(sums).reset_index()
    if not group_cols:
        table = table.drop(columns=["index"])
    table = _attach_mase(table, keys, seasonal_scale)
    ordered = group_cols + ["n", "n_zero_actual", "mad", "mse", "rmse", "mape", "wape", "bias", "bias_pct",
                            "tracking_signal", "ts_flag", "mase"]
    return table[ordered].reset_index(drop=True)


def _attach_mase(table: pd.DataFrame, keys: list[str], seasonal_scale) -> pd.DataFrame:
    if seasonal_scale is None:
        return table.assign(mase=np.nan)
    if np.isscalar(seasonal_scale):
        scale = np.full(len(table), float(seasonal_scale))
    else:
        missing = [k for k in keys + ["scale"] if k not in seasonal_scale.columns]
        if missing:
            raise InvalidSpec(f"seasonal_scale lacks columns {missing}")
        if keys:
            scale = table[keys].merge(seasonal_scale[keys + ["scale"]], on=keys, how="left")["scale"].to_numpy(float)
        else:
            scale = np.full(len(table), float(seasonal_scale["scale"].iloc[0]))
    with np.errstate(divide="ignore", invalid="ignore"):
        mase_values = np.where(scale > 0, table["mad"].to_numpy(float) / scale, np.nan)
    return table.assign(mase=mase_values)


def seasonal_naive_scale(
    actuals: pd.DataFrame,
    *,
    level: str,
    items: pd.DataFrame,
    locations: pd.DataFrame,
    season: int = MONTHS_PER_SEASON,
) -> pd.DataFrame:
    """In-sample MAE of the seasonal naive forecast per group: the MASE scale.

    scale = 1/(T − m) · Σ_{t=m+1..T} |y_t − y_{t−m}| (Hyndman & Koehler 2006),
    y the group's summed actuals by month.  Each group's months run from its
    first to its last actual; months inside that span with no row are 0
    demand.  Groups with fewer than m + 1 months get NaN.

    Returns [level keys…, scale, n_scale] (n_scale = number of differences).
    """
    keys = list(_check_level(level))
    if not isinstance(season, (int, np.integer)) or season < 1:
        raise InvalidSpec(f"season must be a positive whole number of months, got {season!r}")
    frame = _attach_level_keys(actuals, level, items, locations)
    frame = frame.assign(_m=month_indexes_factorized(frame["period"]))
    group = keys if keys else None
    if group:
        totals = frame.groupby(keys + ["_m"], sort=True)["quantity"].sum().unstack("_m")
    else:
        totals = frame.groupby("_m", sort=True)["quantity"].sum().to_frame().T
    if totals.empty:
        return pd.DataFrame(columns=keys + ["scale", "n_scale"])
    months = np.arange(totals.columns.min(), totals.columns.max() + 1)
    wide = totals.reindex(columns=months).to_numpy(float)
    present = ~np.isnan(wide)
    first = np.argmax(present, axis=1)
    last = wide.shape[1] - 1 - np.argmax(present[:, ::-1], axis=1)
    position = np.arange(wide.shape[1])
    inside = (position >= first[:, None]) & (position <= last[:, None])
    y = np.where(inside, np.nan_to_num(wide, nan=0.0), np.nan)
    diffs = np.abs(y[:, season:] - y[:, :-season]) if wide.shape[1] > season else np.empty((len(y), 0))
    n_scale = np.sum(~np.isnan(diffs), axis=1)
    with np.errstate(invalid="ignore"):
        scale = np.where(n_scale > 0, np.nansum(diffs, axis=1) / np.maximum(n_scale, 1), np.nan)
    out = pd.DataFrame({"scale": scale, "n_scale": n_scale.astype(int)})
    if keys:
        index_frame = totals.index.to_frame(index=False)
        out = pd.concat([index_frame.reset_index(drop=True), out], axis=1)
    return out[keys + ["scale", "n_scale"]]


#: Levels of :func:`pooled_accuracy` and the keys each sums to.
POOLED_LEVELS = {"item": ["item", "location"], "family_region": ["family", "region"], "family": ["family"],
                 "total": []}


def pooled_accuracy(errors: pd.DataFrame, *, level: str, items: pd.DataFrame,
                    locations: pd.DataFrame) -> pd.DataFrame:
    """One row per source and lag bucket at a level: cells summed to the level's groups, then measured together.

    Item level pools every item × location cell; family × region (the grain
    sales submit at) and family first sum each group; total sums everything.
    The tracking signal is each group's own (see :func:`tracking_signal_series`),
    averaged over the level's groups.
    Reading them side by side shows how much better groups are forecast than
    single items, and judges each source at the grain it forecast.
    """
    if level not in POOLED_LEVELS:
        raise InvalidSpec(f"level must be one of {list(POOLED_LEVELS)}, got {level!r}")
    keys = POOLED_LEVELS[level]
    e = errors.merge(items[["item", "family"]], on="item").merge(locations[["location", "region"]], on="location")
    summed = (e.groupby(["source", "lag_bucket", "cycle", "period", *keys], as_index=False)[["forecast", "actual"]]
              .sum().sort_values(["period", "cycle"]))
    signals = _group_tracking_signals(summed, ["source", "lag_bucket", *keys])
    mean_signal = signals.groupby(["source", "lag_bucket"])["tracking_signal"].mean()
    rows = []
    for (source, bucket), g in summed.groupby(["source", "lag_bucket"], sort=True):
        a, f = g["actual"].to_numpy(float), g["forecast"].to_numpy(float)
        row = {"source": source, "lag_bucket": bucket, "n": len(g),
               "n_zero_actual": int(zero_actual_count(a, f))}
        row.update({name: measure(a, f) for name, measure in MEASURES.items()})
        row["tracking_signal"] = float(mean_signal.loc[(source, bucket)])
        row["ts_flag"] = bool(abs(row["tracking_signal"]) > 4)
        row["mase"] = np.nan
        rows.append(row)
    return pd.DataFrame(rows)


def _group_tracking_signals(summed: pd.DataFrame, keys: list[str]) -> pd.DataFrame:
    """Each group's latest tracking signal, Σe / MAD over its own errors in period order (vectorised).

    A pooled row reports the mean of its groups' signals: one running sum over
    thousands of item series would grow with their number and mean nothing.
    """
    ordered = summed.sort_values([*keys, "period", "cycle"], kind="mergesort")
    error = ordered["actual"] - ordered["forecast"]
    grouped = pd.DataFrame({"e": error, "abs": error.abs()}).groupby([ordered[k] for k in keys], sort=False)
    running = pd.DataFrame({"sum": grouped["e"].cumsum(), "abs": grouped["abs"].cumsum(),
                            "n": grouped.cumcount() + 1})
    last = running.groupby([ordered[k] for k in keys], sort=False).tail(1)
    mad_so_far = last["abs"] / last["n"]
    signal = np.where(mad_so_far > 0, last["sum"] / mad_so_far.where(mad_so_far > 0, 1.0), 0.0)
    return ordered.loc[last.index, keys].assign(tracking_signal=signal)


# ---------------------------------------------------------------------------
# Scoring by demand pattern: slow and lumpy items judged with a scaled error.
# ---------------------------------------------------------------------------

#: MASE scales of :func:`accuracy_by_pattern` and the season length m each differences over.
MASE_SCALES: dict[str, int] = {"naive": 1, "seasonal_naive": MONTHS_PER_SEASON}

#: Row order of the pattern table: the Syntetos–Boylan–Croston classes, then series the map did not name.
PATTERN_ORDER: tuple[str, ...] = ("smooth", "erratic", "intermittent", "lumpy", "no_demand", "unclassified")


def series_naive_scale(history: pd.DataFrame, *, season: int = 1) -> pd.DataFrame:
    """In-sample MAE of the (seasonal) naive forecast of each item × location: the MASE denominator.

    scale_i = 1/(T_i − m) · Σ_{t=m+1..T_i} |y_t − y_{t−m}| (Hyndman & Koehler
    2006, "Another look at measures of forecast accuracy", IJF 22(4):679–688;
    m = 1 is their one-step naive scale).  A series runs from its first row
    to the last month of ``history`` as a whole, months without a row being
    0 demand: order history lists only what was ordered, and the zeros after
    an intermittent item's last order are part of its record (the rule of
    :func:`forecast_errors`).  NaN where a series has no m + 1 months.

    ``history``: [item, location, period, quantity].  Returns [item,
    location, scale, n_scale] (n_scale = number of differences).
    """
    if not isinstance(season, (int, np.integer)) or season < 1:
        raise InvalidSpec(f"season must be a positive whole number of months, got {season!r}")
    if history.empty:
        return pd.DataFrame({"item": pd.Series(dtype=object), "location": pd.Series(dtype=object),
                             "scale": pd.Series(dtype=float), "n_scale": pd.Series(dtype=int)})
    frame = history.assign(_m=month_indexes_factorized(history["period"]))
    totals = frame.groupby(["item", "location", "_m"], sort=True)["quantity"].sum().unstack("_m")
    months = np.arange(totals.columns.min(), totals.columns.max() + 1)
    wide = totals.reindex(columns=months).to_numpy(float)
    first = np.argmax(~np.isnan(wide), axis=1)
    inside = np.arange(wide.shape[1])[None, :] >= first[:, None]
    y = np.where(inside, np.nan_to_num(wide, nan=0.0), np.nan)
    diffs = np.abs(y[:, season:] - y[:, :-season]) if y.shape[1] > season else np.empty((len(y), 0))
    n_scale = np.sum(~np.isnan(diffs), axis=1)
    scale = np.where(n_scale > 0, np.nansum(diffs, axis=1) / np.maximum(n_scale, 1), np.nan)
    out = totals.index.to_frame(index=False)
    return out.assign(scale=scale, n_scale=n_scale.astype(int))


def accuracy_by_pattern(errors: pd.DataFrame, patterns: pd.DataFrame, history: pd.DataFrame, *,
                        by: tuple[str, ...] = ("source", "lag_bucket"), scale: str = "naive") -> pd.DataFrame:
    """WAPE, MASE and bias of each source, apart for each demand pattern (smooth, erratic, intermittent, lumpy).

    A slow or lumpy item's WAPE is often above 100 % even for a good
    forecast (most months are 0, so Σ|e| easily exceeds Σ actual); read with
    its scaled error and bias, it is judged against what is possible for it.

    * WAPE % = 100 · Σ|e| / Σ actual over the group's cells (e = actual − forecast);
    * MASE = mean over the group's cells of |e| / scale_i, scale_i the series'
      in-sample naive MAE (:func:`series_naive_scale`; Hyndman & Koehler 2006:
      the scaled errors q = e / scale of all series pooled, MASE = mean |q|).
      ``scale="naive"`` (default) differences one month, their definition and
      the one that stays defined on sparse series (a seasonal difference of
      an intermittent item compares one lonely order with another);
      ``"seasonal_naive"`` differences 12 months, as
      :func:`accuracy_table` does.  Cells whose series has no usable scale
      (too short, or a constant history) are left out of MASE only;
      ``n_mase`` counts the cells that entered it.  MASE < 1: better than the
      in-sample naive forecast was.
    * bias = mean e (positive: under-forecast) and bias_pct = 100 · Σe / Σ actual.

    ``errors``: [item, location, forecast, actual] and the ``by`` columns (as
    from :func:`forecast_errors`); ``patterns``: [item, location, pattern]
    (e.g. the statistical run's classes from
    :func:`consensus.methods.demand_pattern.classify_demand`); series it
    does not name are "unclassified".  ``history``: the order history the
    scale is measured on, [item, location, period, quantity] — pass what was
    known before the forecasts, so the scale is in-sample.

    Returns [by…, pattern, n, n_series, n_zero_actual, wape, mase, n_mase,
    bias, bias_pct], patterns in :data:`PATTERN_ORDER` within each by-group.
    """
    if scale not in MASE_SCALES:
        raise InvalidSpec(f"scale must be one of {sorted(MASE_SCALES)}, got {scale!r}")
    by = list(by)
    missing = [c for c in ["item", "location", "forecast", "actual", *by] if c not in errors.columns]
    if missing:
        raise InvalidSpec(f"cannot score by pattern: the error table lacks {missing}")
    missing = [c for c in ("item", "location", "pattern") if c not in patterns.columns]
    if missing:
        raise InvalidSpec(f"patterns lacks columns {missing}")
    unknown = sorted(set(patterns["pattern"].dropna()) - set(PATTERN_ORDER))
    if unknown:
        raise InvalidSpec(f"unknown demand patterns {unknown}; expected {list(PATTERN_ORDER)}")
    if patterns.duplicated(["item", "location"]).any():
        raise InvalidSpec("patterns names some item × location more than once")
    # One table per series (pattern, scale, id), so the error rows are merged once.
    series = patterns[["item", "location", "pattern"]].merge(
        series_naive_scale(history, season=MASE_SCALES[scale])[["item", "location", "scale"]],
        on=["item", "location"], how="outer")
    series["_series"] = np.arange(len(series))
    frame = errors[["item", "location", "forecast", "actual", *[c for c in by if c not in ("item", "location")]]]
    frame = frame.merge(series, on=["item", "location"], how="left")
    frame["pattern"] = frame["pattern"].fillna("unclassified")
    unnamed = frame["_series"].isna().to_numpy()
    if unnamed.any():  # series in neither table still count once each
        codes = frame.loc[unnamed, ["item", "location"]].groupby(["item", "location"], sort=False).ngroup()
        frame.loc[unnamed, "_series"] = len(series) + codes.to_numpy()
    a = frame["actual"].to_numpy(float)
    e = a - frame["forecast"].to_numpy(float)
    s = frame["scale"].to_numpy(float)
    with np.errstate(divide="ignore", invalid="ignore"):
        scaled = np.where(s > 0, np.abs(e) / s, np.nan)
    parts = pd.DataFrame({"n": 1, "n_zero_actual": (a == 0).astype(int), "sum_abs": np.abs(e), "sum_err": e,
                          "sum_actual": a, "sum_scaled": np.nan_to_num(scaled), "n_mase": ~np.isnan(scaled),
                          "_series": frame["_series"].to_numpy(np.int64)})
    keys = [*by, "pattern"]
    for key in keys:
        parts[key] = frame[key].to_numpy()
    grouped = parts.groupby(keys, sort=False)
    sums = grouped[["n", "n_zero_actual", "sum_abs", "sum_err", "sum_actual", "sum_scaled", "n_mase"]].sum()
    sums["n_series"] = grouped["_series"].nunique()
    out = sums.reset_index()
    with np.errstate(divide="ignore", invalid="ignore"):
        total = out["sum_actual"].to_numpy(float)
        out["wape"] = np.where(total != 0, 100.0 * out["sum_abs"] / total, np.nan)
        out["mase"] = np.where(out["n_mase"] > 0, out["sum_scaled"] / out["n_mase"], np.nan)
        out["bias"] = out["sum_err"] / out["n"]
        out["bias_pct"] = np.where(total != 0, 100.0 * out["sum_err"] / total, np.nan)
    out["_order"] = out["pattern"].map({p: i for i, p in enumerate(PATTERN_ORDER)})
    out = out.sort_values([*by, "_order"], kind="mergesort").reset_index(drop=True)
    columns = [*by, "pattern", "n", "n_series", "n_zero_actual", "wape", "mase", "n_mase", "bias", "bias_pct"]
    return out.astype({"n": int, "n_series": int, "n_zero_actual": int, "n_mase": int})[columns]
