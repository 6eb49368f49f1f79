"""Error bands from the consensus's own measured errors, and how to score them.

Bands follow Williams & Goodman (1971, JASA 66:752–754): the interval for a
new forecast is read off the empirical distribution of past forecast errors
at the same lag.  Errors are scaled to the forecast's level as relative
errors e = (actual − forecast) / forecast, so a band is

    [F·(1 + q_lo), F·(1 + q_hi)],  q the (1∓level)/2 quantiles of e,

which lets errors of a 10-unit item inform a 10,000-unit family.  (Relative
errors are the natural scale here because demand errors grow roughly in
proportion to the level; the quantile of a ratio is equivariant under the
monotone map, so this is also the quantile of actual / forecast.)  Past
errors whose forecast is not positive cannot be scaled and are left out.

Where a group has fewer than ``min_errors`` errors, quantiles are too coarse;
the band is then normal with σ ≈ 1.25 · MAD of the relative errors (for a
normal error E|e| = σ·√(2/π), so σ = 1.2533·MAD; Brown, 1959, common
practice in inventory control; the attribution is from memory).  A group with no errors at all borrows all
past errors pooled.  Bands are widened where needed to contain the forecast
itself (a past bias can put both quantiles on one side) and clipped at 0.

Scoring: the interval (Winkler) score of Winkler (1972, JASA 67:187–191),
in the form of Gneiting & Raftery (2007, JASA 102:359–378, eq. 43).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd
from scipy import stats

from consensus.errors import InvalidSpec
from consensus.periods import lag_bucket_labels, lags

#: Normal-approximation factor σ/MAD = √(π/2) ≈ 1.25.
SIGMA_PER_MAD = float(np.sqrt(np.pi / 2))


def band_columns(levels: Sequence[float]) -> list[str]:
    """The column names of bands at ``levels``: lower_80, upper_80, lower_95, upper_95 …"""
    names = []
    for level in levels:
        pct = int(round(100 * level))
        names += [f"lower_{pct}", f"upper_{pct}"]
    return names


def _check_levels(levels: Sequence[float]) -> tuple[float, ...]:
    levels = tuple(float(level) for level in levels)
    if not levels or any(not 0 < level < 1 for level in levels):
        raise InvalidSpec(f"band levels must lie strictly between 0 and 1, got {levels}")
    if len({int(round(100 * level)) for level in levels}) != len(levels):
        raise InvalidSpec(f"band levels {levels} would share column names")
    return levels


def _with_lag_bucket(frame: pd.DataFrame) -> pd.DataFrame:
    """Add lag_bucket from lag, or from cycle and period, when the frame lacks it."""
    if "lag_bucket" in frame.columns:
        return frame
    if "lag" in frame.columns:
        return frame.assign(lag_bucket=lag_bucket_labels(frame["lag"].to_numpy()))
    if {"cycle", "period"} <= set(frame.columns):
        return frame.assign(lag_bucket=lag_bucket_labels(lags(frame["cycle"], frame["period"])))
    return frame


def _group_quantiles(errors: pd.DataFrame, keys: list[str], probabilities: list[float]) -> pd.DataFrame:
    """Per group: count, MAD and the empirical quantiles of the relative error."""
    if keys:
        grouped = errors.assign(_abs=errors["relative"].abs()).groupby(keys, sort=False, dropna=False)
        summary = grouped.agg(n=("relative", "size"), mad=("_abs", "mean"))
        quantiles = grouped["relative"].quantile(probabilities).unstack()
    else:
        rel = errors["relative"]
        summary = pd.DataFrame({"n": [len(rel)], "mad": [np.abs(rel).mean()]})
        quantiles = pd.DataFrame([np.quantile(rel, probabilities)] if len(rel) else [[np.nan] * len(probabilities)],
                                 columns=probabilities)
    quantiles.columns = [f"_q{p!r}" for p in quantiles.columns]
    out = summary.join(quantiles) if keys else pd.concat([summary, quantiles], axis=1)
    return out.reset_index() if keys else out


def band_table(past_errors: pd.DataFrame, *, levels: Sequence[float] = (0.8, 0.95),
               by: Sequence[str] = ("lag_bucket",)) -> pd.DataFrame:
    """Per group of ``by``: the count, the MAD and the quantiles of past relative errors e = (a − f) / f.

    One more row, with every ``by`` column empty (None), pools all errors.
    Past errors whose forecast is not positive cannot be scaled and are left
    out.  The table is what :func:`apply_bands` reads, so a run can keep it
    instead of the errors themselves.
    """
    levels = _check_levels(levels)
    keys = list(by)
    past_errors = _with_lag_bucket(past_errors)
    missing = [k for k in keys if k not in past_errors.columns]
    if missing:
        raise InvalidSpec(f"cannot group bands by {missing}: not columns of past_errors")
    missing = [c for c in ("forecast", "actual") if c not in past_errors.columns]
    if missing:
        raise ValueError(f"past_errors lacks columns {missing}")
    f_past = past_errors["forecast"].astype(float)
    a_past = past_errors["actual"].astype(float)
    usable = (f_past > 0) & a_past.notna()
    errors = past_errors.loc[usable, keys].assign(relative=((a_past - f_past) / f_past)[usable].to_numpy())
    probabilities = _probabilities(levels)
    by_group = _group_quantiles(errors, keys, probabilities) if keys else pd.DataFrame()
    pooled = _group_quantiles(errors, [], probabilities).assign(**{k: None for k in keys})
    table = pd.concat([by_group, pooled], ignore_index=True) if keys else pooled
    table["n"] = table["n"].astype(int)
    return table[[*keys, "n", "mad", *[f"_q{p!r}" for p in probabilities]]]


def _probabilities(levels: Sequence[float]) -> list[float]:
    return sorted({p for level in levels for p in ((1 - level) / 2, (1 + level) / 2)})


def apply_bands(forecast: pd.DataFrame, table: pd.DataFrame, *, levels: Sequence[float] = (0.8, 0.95),
                by: Sequence[str] = ("lag_bucket",), min_errors: int = 30) -> pd.DataFrame:
    """Bands around each ``consensus`` number from a :func:`band_table`; see :func:`empirical_bands`."""
    levels = _check_levels(levels)
    if not isinstance(min_errors, (int, np.integer)) or min_errors < 1:
        raise InvalidSpec(f"min_errors must be a positive whole number, got {min_errors!r}")
    keys = list(by)
    forecast = _with_lag_bucket(forecast)
    if "consensus" not in forecast.columns:
        raise ValueError("forecast needs a consensus column")
    missing = [k for k in keys if k not in forecast.columns]
    if missing:
        raise InvalidSpec(f"cannot group bands by {missing}: not columns of forecast")
    probabilities = _probabilities(levels)
    quantile_columns = [f"_q{p!r}" for p in probabilities]
    if keys:
        pooled_mask = table[keys].isna().all(axis=1)
        pooled = table.loc[pooled_mask].iloc[0] if pooled_mask.any() else None
        groups = table.loc[~pooled_mask, [*keys, "n", "mad", *quantile_columns]]
        out = forecast.merge(groups, on=keys, how="left", sort=False)
    else:
        pooled = table.iloc[0]
        out = forecast.assign(**{c: pooled[c] for c in ["n", "mad", *quantile_columns]})
    total = int(pooled["n"]) if pooled is not None else 0
    out["n"] = out["n"].fillna(0)
    borrowed = (out["n"] == 0).to_numpy()
    for column in ["n", "mad", *quantile_columns]:
        fill = pooled[column] if pooled is not None else np.nan
        out[column] = np.where(borrowed, fill, out[column].to_numpy(dtype=float))
    n = out["n"].to_numpy(dtype=float)
    empirical = n >= min_errors
    level_point = out["consensus"].astype(float).to_numpy()
    for level in levels:
        low_q = out[f"_q{(1 - level) / 2!r}"].to_numpy(dtype=float)
        high_q = out[f"_q{(1 + level) / 2!r}"].to_numpy(dtype=float)
        half_width = stats.norm.ppf((1 + level) / 2) * SIGMA_PER_MAD * out["mad"].to_numpy(dtype=float)
        low = np.where(empirical, low_q, -half_width)
        high = np.where(empirical, high_q, half_width)
        low, high = np.minimum(low, 0.0), np.maximum(high, 0.0)  # the band holds the forecast itself
        pct = int(round(100 * level))
        out[f"lower_{pct}"] = np.clip(level_point * (1 + low), 0.0, None)
        out[f"upper_{pct}"] = np.maximum(level_point * (1 + high), out[f"lower_{pct}"])
        # A negative forecast cannot be scaled; its band collapses onto zero and the point.
        out.loc[level_point < 0, [f"lower_{pct}", f"upper_{pct}"]] = np.nan
    count_text = out["n"].astype(int).astype(str) + " errors"
    method = np.where(empirical, "empirical, ", "normal from MAD, ")
    method = np.where(borrowed, np.char.add(method.astype(str), "pooled, "), method)
    out["band_method"] = pd.Series(method, index=out.index).astype(object) + count_text.astype(object)
    out.loc[borrowed, "band_method"] = np.where(total >= min_errors, "empirical, pooled, ",
                                                "normal from MAD, pooled, ") + f"{total} errors"
    if total == 0:
        out.loc[:, band_columns(levels)] = np.nan
        out["band_method"] = "no past errors"
    helper = ["n", "mad"] + [c for c in out.columns if c.startswith("_q")]
    return out.drop(columns=helper)


def empirical_bands(forecast: pd.DataFrame, past_errors: pd.DataFrame, *, levels: Sequence[float] = (0.8, 0.95),
                    by: Sequence[str] = ("lag_bucket",), min_errors: int = 30) -> pd.DataFrame:
    """Prediction bands around each consensus number from past relative errors in its group.

    ``forecast`` has the key columns, ``consensus`` and the ``by`` columns
    (``lag_bucket`` is derived from ``lag`` or ``cycle`` + ``period`` when
    absent); ``past_errors`` has ``forecast``, ``actual`` and the ``by``
    columns.  For each group with n ≥ ``min_errors`` usable errors:
    band = F·(1 + quantile of e at (1 ∓ level)/2) (Williams & Goodman, 1971);
    otherwise F·(1 ∓ z·1.25·MAD(e)) with z the normal quantile.  Returns
    ``forecast`` with lower_/upper_ columns per level and ``band_method``
    ("empirical, n errors" or "normal from MAD, n errors", with "pooled" when
    the group had none and all errors were used).
    """
    table = band_table(past_errors, levels=levels, by=by)
    return apply_bands(forecast, table, levels=levels, by=by, min_errors=min_errors)


def winkler_score(lower, upper, actual, *, level: float) -> np.ndarray:
    """Interval score of a central (level) interval: width plus 2/α times the miss.

    S(l, u; y) = (u − l) + (2/α)(l − y)·1{y < l} + (2/α)(y − u)·1{y > u},
    α = 1 − level (Winkler, 1972; Gneiting & Raftery, 2007, eq. 43).  Lower is
    better.  Elementwise; take the mean for a summary.
    """
    level = _check_levels([level])[0]
    alpha = 1.0 - level
    lo, hi, y = (np.asarray(v, dtype=float) for v in (lower, upper, actual))
    below = np.clip(lo - y, 0.0, None)
    above = np.clip(y - hi, 0.0, None)
    return (hi - lo) + (2.0 / alpha) * (below + above)


def interval_coverage(lower, upper, actual) -> float:
    """Share of actuals inside their interval [lower, upper] (ends included); NaN rows left out."""
    lo, hi, y = (np.asarray(v, dtype=float) for v in (lower, upper, actual))
    known = ~(np.isnan(lo) | np.isnan(hi) | np.isnan(y))
    if not known.any():
        return float("nan")
    return float(np.mean((y[known] >= lo[known]) & (y[known] <= hi[known])))


def backtest_bands(errors: pd.DataFrame, *, levels: Sequence[float] = (0.8, 0.95), by: Sequence[str] = ("lag_bucket",),
                   min_errors: int = 30, first_test_cycle: str | None = None) -> pd.DataFrame:
    """Rolling-origin check of the bands: build from what was known, score on what came next.

    ``errors`` has [cycle, period, forecast, actual] and the ``by`` columns
    (lag_bucket derived if absent).  For each test cycle c (from
    ``first_test_cycle``, default the second cycle), bands for c's forecasts
    come from the errors whose actual was known at c (period ≤ c); they are
    then scored against c's actuals.  Returns one row per nominal level:
    [level, n, coverage, coverage_gap (coverage − level), mean_winkler,
    n_cycles].
    """
    levels = _check_levels(levels)
    errors = _with_lag_bucket(errors)
    missing = [c for c in ("cycle", "period", "forecast", "actual") if c not in errors.columns]
    if missing:
        raise ValueError(f"errors lack columns {missing}")
    cycles = sorted(errors["cycle"].astype(str).unique())
    if first_test_cycle is None:
        first_test_cycle = cycles[1] if len(cycles) > 1 else None
    tests = [c for c in cycles if first_test_cycle is not None and c >= first_test_cycle]
    scored = []
    cycle_text, period_text = errors["cycle"].astype(str), errors["period"].astype(str)
    for cycle in tests:
        known = errors[period_text <= cycle]
        current = errors[(cycle_text == cycle) & errors["actual"].notna()]
        if known.empty or current.empty:
            continue
        banded = empirical_bands(current.assign(consensus=current["forecast"].astype(float)), known,
                                 levels=levels, by=by, min_errors=min_errors)
        scored.append(banded.assign(_cycle=cycle))
    rows = []
    if scored:
        result = pd.concat(scored, ignore_index=True)
        for level in levels:
            pct = int(round(100 * level))
            lo, hi, y = result[f"lower_{pct}"], result[f"upper_{pct}"], result["actual"].astype(float)
            keep = lo.notna().to_numpy()
            coverage = interval_coverage(lo[keep], hi[keep], y[keep])
            score = winkler_score(lo[keep], hi[keep], y[keep], level=level)
            rows.append({"level": level, "n": int(keep.sum()), "coverage": coverage,
                         "coverage_gap": coverage - level, "mean_winkler": float(np.mean(score)) if keep.any()
                         else float("nan"), "n_cycles": int(result.loc[keep, "_cycle"].nunique())})
    return pd.DataFrame(rows, columns=["level", "n", "coverage", "coverage_gap", "mean_winkler", "n_cycles"])
