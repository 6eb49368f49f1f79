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

Scaling rules (``rule=``).  "relative" (the default) reads one distribution
of relative errors per lag bucket for every forecast.  Relative errors are
not alike across sizes, though: a slow item's relative error is far wider
than a main item's (a Poisson-like count has sd ∝ √F, so sd(e/F) ∝ 1/√F), so
one pooled band is too narrow for small forecasts and too wide for large
ones, even when its average coverage is right.  "relative_by_size" reads the
quantiles within forecast-size classes as well: the past errors' positive
forecasts are cut at their 1/k … (k−1)/k quantiles into k =
``size_classes`` equal-count classes, and each new forecast takes the
relative errors of its own class (and lag bucket).  This is the
category-conditional calibration of Mondrian conformal prediction (Vovk,
Gammerman & Shafer 2005, "Algorithmic Learning in a Random World", ch. 4;
from memory), with forecast size as the category: coverage then holds class
by class, not only on average.  Both rules scale by the forecast, so bands
at every level are read the same way.  ``few_errors="student_t"`` widens the
MAD fallback of a group with few errors by Student's t quantile in place of
the normal one, which matters for family and total bands in a young store.

Levels.  :func:`level_errors` sums cells' forecasts and actuals to a level
(family, total …) per source, cycle and month; :func:`level_bands` gives a
level's bands from its own past errors, so family and total bands carry the
correlation between items that an independence sum (√Σ deviation²) leaves
out.  :func:`score_bands` and :func:`backtest_bands_by_level` report
coverage and the Winkler score by level and lag bucket.  A run's stored
family and total bands (:func:`stored_level_bands`) read the published
plans' own errors at those levels, with a stand-in record pooled in only
while they are few (:func:`own_errors_first`, the rule the item bands keep).

Scoring: the interval (Winkler) score of Winkler (1972, JASA 67:187–191),
in the form of Gneiting & Raftery (2007, JASA 102:359–378, eq. 43).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd
from scipy import special  # stdtrit, ndtri: what scipy.stats' t.ppf and norm.ppf call (stats takes 0.3 s to import)

from consensus.errors import InvalidSpec
from consensus.methods.accuracy import LEVEL_KEYS
from consensus.periods import lag_bucket_labels, lags

#: Normal-approximation factor σ/MAD = √(π/2) ≈ 1.25.
SIGMA_PER_MAD = float(np.sqrt(np.pi / 2))

#: How past errors are scaled to a new forecast (see the module docstring).
BAND_RULES = ("relative", "relative_by_size")
#: Forecast-size classes of the "relative_by_size" rule.
DEFAULT_SIZE_CLASSES = 5
#: How a group with fewer than min_errors errors is banded, and how band_method says so.
FEW_ERRORS_TEXT = {"normal": "normal from MAD, ", "student_t": "Student t from MAD, "}
#: Fewest of the plan's own past errors its bands are read from alone (see :func:`own_errors_first`).
MIN_OWN_BAND_ERRORS = 30


def own_errors_first(own: pd.DataFrame | None, fallback: pd.DataFrame | None, *,
                     min_own: int = MIN_OWN_BAND_ERRORS) -> tuple[pd.DataFrame | None, str]:
    """The errors a plan's bands are read from: its own, pooled with a stand-in record while they are few.

    A band should come from the errors of the forecast it is put around, so
    the plan's own past errors (its published numbers against what came)
    are used alone once there are at least ``min_own`` of them; before that
    the nearest comparable record (``fallback``) is pooled in rather than a
    band invented from a handful of errors (common practice).  The item
    bands pool the statistical source's cell errors; the family and total
    bands the errors the run's combination would have made at that level.
    Returns (errors, "own" | "pooled" | "fallback" | "none").
    """
    n_own = 0 if own is None else len(own)
    n_fallback = 0 if fallback is None else len(fallback)
    if n_own >= min_own:
        return own, "own"
    if n_own and n_fallback:
        return pd.concat([own, fallback], ignore_index=True), "pooled"
    if n_own:
        return own, "own"
    if n_fallback:
        return fallback, "fallback"
    return None, "none"


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
    """Per group: count, MAD and the empirical quantiles of the relative error (groups in key order, so the
    table does not depend on the order the errors came in)."""
    if keys:
        grouped = errors.assign(_abs=errors["relative"].abs()).groupby(keys, sort=True, dropna=False)
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


def empirical_bands(forecast: pd.DataFrame, past_errors: pd.DataFrame, *, levels: Sequence[float] = (0.8, 0.95),
                    by: Sequence[str] = ("lag_bucket",), min_errors: int = 30, rule: str = "relative",
                    size_classes: int = DEFAULT_SIZE_CLASSES, few_errors: str = "normal") -> pd.DataFrame:
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

    ``rule="relative_by_size"`` adds the forecast-size class (``size_classes``
    equal-count classes of the past positive forecasts) to the groups, and
    says "size class j of k" in ``band_method``; a group with no errors
    borrows its class's errors over all lags before all errors pooled.  The
    classes are as many as the errors afford, at most ``size_classes`` and
    at most n / (``min_errors`` × number of ``by`` groups), so a class holds
    ``min_errors`` errors per group on average; where errors are few (a
    family or the total in a young store) the rule falls back to one class,
    which is the relative rule.

    ``few_errors="student_t"`` widens the MAD band of a group with n <
    ``min_errors`` errors to Student's t with n degrees of freedom in place
    of z: for N(0, σ²) errors and σ estimated from n of them about a known
    centre 0, a new error over σ̂ is t-distributed with n degrees of freedom
    (Student 1908; common statistical fact), so a band from 3 errors needs
    t = 1.64 at 80 % rather than z = 1.28.  The MAD-based σ̂ is treated the
    same way (an approximation).
    """
    table = band_table(past_errors, levels=levels, by=by, min_errors=min_errors, rule=rule,
                       size_classes=size_classes)
    return apply_bands(forecast, table, levels=levels, by=by, min_errors=min_errors, few_errors=few_errors)


#: Columns of a band table besides the ``by`` keys (see :func:`band_table`).
TABLE_COLUMNS = ["kind", "_size_class", "edge", "n", "mad"]


def band_table(past_errors: pd.DataFrame, *, levels: Sequence[float] = (0.8, 0.95),
               by: Sequence[str] = ("lag_bucket",), min_errors: int = 30, rule: str = "relative",
               size_classes: int = DEFAULT_SIZE_CLASSES) -> pd.DataFrame:
    """What bands are read from: count, MAD and quantiles of past relative errors per group, as one frame.

    Rows of ``kind`` "group" (per ``by`` group, and size class under
    "relative_by_size"), "class" (per size class over every group), "pooled"
    (all errors) and "edge" (the size classes' cut points, in ``edge``).  A
    run keeps this table instead of the errors; :func:`apply_bands` reads it.
    """
    levels = _check_levels(levels)
    if not isinstance(min_errors, (int, np.integer)) or min_errors < 1:
        raise InvalidSpec(f"min_errors must be a positive whole number, got {min_errors!r}")
    _check_rule(rule, size_classes)
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
    edges = np.empty(0)
    group_keys = list(keys)
    if rule == "relative_by_size":
        # As many classes as the errors allow: on average min_errors errors per class and group.
        n_groups = max(1, errors.groupby(keys, sort=False, dropna=False).ngroups) if keys else 1
        affordable = int(np.clip(len(errors) // (min_errors * n_groups), 1, size_classes))
        edges = size_class_edges(f_past[usable].to_numpy(), size_classes=affordable)
        errors["_size_class"] = np.searchsorted(edges, f_past[usable].to_numpy(), side="right")
        group_keys = keys + ["_size_class"]
    probabilities = _probabilities(levels)
    parts = []
    if group_keys:
        parts.append(_group_quantiles(errors, group_keys, probabilities).assign(kind="group"))
    if len(edges):
        parts.append(_group_quantiles(errors, ["_size_class"], probabilities).assign(kind="class"))
        parts.append(pd.DataFrame({"kind": "edge", "edge": edges}))
    parts.append(_group_quantiles(errors, [], probabilities).assign(kind="pooled"))
    table = pd.concat(parts, ignore_index=True)
    for column in [*keys, "_size_class"]:
        if column not in table:
            table[column] = None
    if "edge" not in table:
        table["edge"] = np.nan
    table["_size_class"] = table["_size_class"].astype(float)
    table["n"] = table["n"].fillna(0).astype(int)
    return table[[*keys, *TABLE_COLUMNS, *[f"_q{p!r}" for p in probabilities]]].reset_index(drop=True)


def _probabilities(levels: Sequence[float]) -> list[float]:
    return sorted({p for level in levels for p in ((1 - level) / 2, (1 + level) / 2)})


def apply_bands(forecast: pd.DataFrame, table: pd.DataFrame, *, levels: Sequence[float] = (0.8, 0.95),
                by: Sequence[str] = ("lag_bucket",), min_errors: int = 30, few_errors: str = "normal") -> pd.DataFrame:
    """Bands around each ``consensus`` number from a :func:`band_table`; see :func:`empirical_bands`."""
    levels = _check_levels(levels)
    _check_rule("relative", 1, few_errors)
    keys = list(by)
    forecast = _with_lag_bucket(forecast)
    if "consensus" not in forecast.columns:
        raise ValueError("forecast needs a consensus column")
    missing = [k for k in keys if k not in forecast.columns]
    if missing:
        raise InvalidSpec(f"cannot group bands by {missing}: not columns of forecast")
    probabilities = _probabilities(levels)
    stats_columns = ["n", "mad", *[f"_q{p!r}" for p in probabilities]]
    pooled = table[table["kind"] == "pooled"].iloc[0]
    edges = np.sort(table.loc[table["kind"] == "edge", "edge"].to_numpy(float))
    n_classes = len(edges) + 1 if len(edges) else 0
    group_keys = list(keys)
    out = forecast
    if n_classes:
        out = out.assign(_size_class=np.searchsorted(edges, out["consensus"].to_numpy(dtype=float),
                                                     side="right").astype(float))
        group_keys = keys + ["_size_class"]
    if group_keys:
        groups = table.loc[table["kind"] == "group", [*group_keys, *stats_columns]]
        out = out.merge(groups, on=group_keys, how="left", sort=False)
    else:
        out = out.assign(**{c: pooled[c] for c in stats_columns})
    out["n"] = out["n"].fillna(0)
    borrowed = (out["n"] == 0).to_numpy()
    class_pooled = np.zeros(len(out), dtype=bool)
    if n_classes:  # a group with no errors borrows its size class's errors over every lag first
        by_class = table.loc[table["kind"] == "class", ["_size_class", *stats_columns]]
        fallback = out[["_size_class"]].merge(by_class, on="_size_class", how="left", sort=False)
        class_pooled = borrowed & (fallback["n"].fillna(0).to_numpy(float) > 0)
        for column in stats_columns:
            out[column] = np.where(class_pooled, fallback[column].to_numpy(dtype=float),
                                   out[column].to_numpy(dtype=float))
    for column in stats_columns:
        out[column] = np.where(borrowed & ~class_pooled, pooled[column], out[column].to_numpy(dtype=float))
    n = out["n"].to_numpy(dtype=float)
    empirical = n >= min_errors
    level_point = out["consensus"].astype(float).to_numpy()
    for level in levels:
        low_q = out[f"_q{(1 - level) / 2!r}"].to_numpy(dtype=float)
        high_q = out[f"_q{(1 + level) / 2!r}"].to_numpy(dtype=float)
        if few_errors == "student_t":
            factor = special.stdtrit(np.maximum(n, 1).astype(float), (1 + level) / 2)  # Student t quantile
        else:
            factor = special.ndtri((1 + level) / 2)  # normal quantile
        half_width = factor * SIGMA_PER_MAD * out["mad"].to_numpy(dtype=float)
        low = np.where(empirical, low_q, -half_width)
        high = np.where(empirical, high_q, half_width)
        low, high = np.minimum(low, 0.0), np.maximum(high, 0.0)  # the band holds the forecast itself
        pct = int(round(100 * level))
        out[f"lower_{pct}"] = np.clip(level_point * (1 + low), 0.0, None)
        out[f"upper_{pct}"] = np.maximum(level_point * (1 + high), out[f"lower_{pct}"])
        # A negative forecast cannot be scaled; its band collapses onto zero and the point.
        out.loc[level_point < 0, [f"lower_{pct}", f"upper_{pct}"]] = np.nan
    count_text = out["n"].astype(int).astype(str) + " errors"
    method = np.where(empirical, "empirical, ", FEW_ERRORS_TEXT[few_errors])
    method = np.where(borrowed, np.char.add(method.astype(str), "pooled, "), method)
    out["band_method"] = pd.Series(method, index=out.index).astype(object) + count_text.astype(object)
    total = int(pooled["n"])
    if n_classes and total:
        size_text = ", size class " + (out["_size_class"].astype(int) + 1).astype(str) + f" of {n_classes}"
        out["band_method"] = out["band_method"].astype(object) + np.where(borrowed & ~class_pooled, "",
                                                                          size_text.astype(object))
    if total == 0:
        out.loc[:, band_columns(levels)] = np.nan
        out["band_method"] = "no past errors"
    helper = ["n", "mad", "_size_class"] + [c for c in out.columns if c.startswith("_q")]
    return out.drop(columns=[c for c in helper if c in out.columns])


def _check_rule(rule: str, size_classes: int, few_errors: str = "normal") -> None:
    if few_errors not in FEW_ERRORS_TEXT:
        raise InvalidSpec(f"few_errors must be one of {list(FEW_ERRORS_TEXT)}, got {few_errors!r}")
    if rule not in BAND_RULES:
        raise InvalidSpec(f"band rule must be one of {list(BAND_RULES)}, got {rule!r}")
    if not isinstance(size_classes, (int, np.integer)) or size_classes < 1:
        raise InvalidSpec(f"size_classes must be a positive whole number, got {size_classes!r}")


def size_class_edges(forecasts, *, size_classes: int = DEFAULT_SIZE_CLASSES) -> np.ndarray:
    """Cut points of ``size_classes`` equal-count classes of positive forecasts (their j/k quantiles).

    A forecast F is in class ``searchsorted(edges, F, side="right")`` (0 the
    smallest); repeated cut points are merged, so heavily tied forecasts make
    fewer classes.  numpy's default (linear) quantile.
    """
    values = np.asarray(forecasts, dtype=float)
    values = values[np.isfinite(values) & (values > 0)]
    if values.size == 0 or size_classes <= 1:
        return np.empty(0)
    return np.unique(np.quantile(values, np.arange(1, size_classes) / size_classes))


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


def rolling_origin_bands(errors: pd.DataFrame, *, levels: Sequence[float] = (0.8, 0.95),
                         by: Sequence[str] = ("lag_bucket",), min_errors: int = 30, first_test_cycle: str | None = None,
                         rule: str = "relative", size_classes: int = DEFAULT_SIZE_CLASSES,
                         few_errors: str = "normal") -> pd.DataFrame:
    """Each test cycle's forecasts with the bands the errors known at that cycle (period ≤ cycle) give.

    The rows of ``errors`` whose cycle is a test cycle (from
    ``first_test_cycle``, default the second cycle) and whose actual is
    known, with ``consensus`` = their forecast and the band columns of
    :func:`empirical_bands`; empty when nothing could be tested.  The
    scoring functions summarise it; it is public so a breakdown (by size,
    pattern, family …) can be read from the same rows.
    """
    levels = _check_levels(levels)
    _check_rule(rule, size_classes, few_errors)
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
    for cycle in tests:  # one vectorised band computation per cycle: what was known changes with the cycle
        known = errors[period_text <= cycle]
        current = errors[(cycle_text == cycle) & errors["actual"].notna()]
        if known.empty or current.empty:
            continue
        banded = empirical_bands(current.assign(consensus=current["forecast"].astype(float)), known,
                                 levels=levels, by=by, min_errors=min_errors, rule=rule, size_classes=size_classes,
                                 few_errors=few_errors)
        scored.append(banded)
    return pd.concat(scored, ignore_index=True) if scored else pd.DataFrame()


def _coverage_rows(banded: pd.DataFrame, levels: tuple[float, ...], actual: str = "actual") -> list[dict]:
    """Per nominal level: n, coverage, coverage gap, mean Winkler score and cycles, over the banded rows."""
    rows = []
    for level in levels:
        pct = int(round(100 * level))
        if banded.empty:
            rows.append({"nominal": level, "n": 0, "coverage": float("nan"), "coverage_gap": float("nan"),
                         "mean_winkler": float("nan"), "n_cycles": 0})
            continue
        lo, hi, y = banded[f"lower_{pct}"], banded[f"upper_{pct}"], banded[actual].astype(float)
        keep = (lo.notna() & hi.notna() & y.notna()).to_numpy()
        coverage = interval_coverage(lo[keep], hi[keep], y[keep])
        score = winkler_score(lo[keep], hi[keep], y[keep], level=level)
        n_cycles = int(banded.loc[keep, "cycle"].nunique()) if "cycle" in banded.columns else 0
        rows.append({"nominal": level, "n": int(keep.sum()), "coverage": coverage, "coverage_gap": coverage - level,
                     "mean_winkler": float(np.mean(score)) if keep.any() else float("nan"), "n_cycles": n_cycles})
    return rows


def backtest_bands(errors: pd.DataFrame, *, levels: Sequence[float] = (0.8, 0.95), by: Sequence[str] = ("lag_bucket",),
                   min_errors: int = 30, first_test_cycle: str | None = None, rule: str = "relative",
                   size_classes: int = DEFAULT_SIZE_CLASSES, few_errors: str = "normal") -> pd.DataFrame:
    """Rolling-origin check of the bands: build from what was known, score on what came next.

    ``errors`` has [cycle, period, forecast, actual] and the ``by`` columns
    (lag_bucket derived if absent).  For each test cycle c (from
    ``first_test_cycle``, default the second cycle), bands for c's forecasts
    come from the errors whose actual was known at c (period ≤ c); they are
    then scored against c's actuals.  ``rule``, ``size_classes`` and
    ``few_errors`` as in :func:`empirical_bands`.  Returns one row per nominal level:
    [level, n, coverage, coverage_gap (coverage − level), mean_winkler,
    n_cycles].
    """
    levels = _check_levels(levels)
    _check_rule(rule, size_classes, few_errors)
    banded = rolling_origin_bands(errors, levels=levels, by=by, min_errors=min_errors,
                                   first_test_cycle=first_test_cycle, rule=rule, size_classes=size_classes,
                                   few_errors=few_errors)
    rows = _coverage_rows(banded, levels) if not banded.empty else []
    return pd.DataFrame(rows, columns=["nominal", "n", "coverage", "coverage_gap", "mean_winkler", "n_cycles"]).rename(
        columns={"nominal": "level"})


# ---------------------------------------------------------------------------
# Bands at every level: family and total from their own errors, and scores by level.
# ---------------------------------------------------------------------------

#: Levels bands can be given at and the keys a group there is named by (as in accuracy).
BAND_LEVEL_KEYS: dict[str, tuple[str, ...]] = dict(LEVEL_KEYS)
#: The levels :func:`backtest_bands_by_level` and :func:`score_bands_by_level` report by default.
DEFAULT_BAND_LEVELS = ("item", "family", "total")
SCORE_COLUMNS = ["level", "lag_bucket", "nominal", "n", "coverage", "coverage_gap", "mean_winkler", "n_cycles"]


def _level_keys(level: str) -> list[str]:
    if level not in BAND_LEVEL_KEYS:
        raise InvalidSpec(f"level must be one of {list(BAND_LEVEL_KEYS)}, got {level!r}")
    return list(BAND_LEVEL_KEYS[level])


def _with_level_keys(frame: pd.DataFrame, keys: list[str], items: pd.DataFrame | None,
                     locations: pd.DataFrame | None) -> pd.DataFrame:
    """Add family / region from the masters where the level needs them and the frame lacks them."""
    if "family" in keys and "family" not in frame.columns:
        if items is None:
            raise InvalidSpec("family-level bands need the items master")
        frame = frame.merge(items[["item", "family"]], on="item", how="left")
        frame["family"] = frame["family"].fillna("(unknown family)")
    if "region" in keys and "region" not in frame.columns:
        if locations is None:
            raise InvalidSpec("region-level bands need the locations master")
        frame = frame.merge(locations[["location", "region"]], on="location", how="left")
        frame["region"] = frame["region"].fillna("(unknown region)")
    return frame


def level_errors(errors: pd.DataFrame, *, level: str, items: pd.DataFrame | None = None,
                 locations: pd.DataFrame | None = None) -> pd.DataFrame:
    """Errors of a level's summed forecasts against its summed actuals, per source, cycle and month.

    F_g = Σ_{cells in g} F, A_g = Σ_{cells in g} A, e_g = A_g − F_g, for each
    (source, cycle, period) and group g of ``level`` ("item", "family",
    "family_region", "location", "region", "total").  These are the errors
    the level's own forecast made, so they carry whatever correlation the
    cells' errors had.  ``errors``: [cycle, item, location, period, forecast,
    actual] and optionally source (as from
    :func:`consensus.methods.accuracy.forecast_errors`).

    Returns [source?, cycle, period, level keys…, lag, lag_bucket, forecast,
    actual, error, n_cells].
    """
    keys = _level_keys(level)
    missing = [c for c in ("cycle", "item", "location", "period", "forecast", "actual") if c not in errors.columns]
    if missing:
        raise ValueError(f"errors lack columns {missing}")
    frame = _with_level_keys(errors, keys, items, locations)
    instance = [c for c in ("source", "cycle", "period") if c in frame.columns] + keys
    grouped = frame.groupby(instance, sort=True, dropna=False)
    out = grouped[["forecast", "actual"]].sum().join(grouped.size().rename("n_cells")).reset_index()
    out["lag"] = lags(out["cycle"], out["period"]) if len(out) else np.array([], dtype=int)
    out["lag_bucket"] = lag_bucket_labels(out["lag"].to_numpy()) if len(out) else np.array([], dtype=object)
    out["error"] = out["actual"] - out["forecast"]
    return out[[*instance, "lag", "lag_bucket", "forecast", "actual", "error", "n_cells"]]


def level_bands(consensus: pd.DataFrame, past_errors: pd.DataFrame, *, level: str,
                items: pd.DataFrame | None = None, locations: pd.DataFrame | None = None,
                levels: Sequence[float] = (0.8, 0.95), by: Sequence[str] = ("lag_bucket",), min_errors: int = 30,
                rule: str = "relative", size_classes: int = DEFAULT_SIZE_CLASSES,
                few_errors: str = "normal") -> pd.DataFrame:
    """Bands of a level's total forecast read off that level's own past errors.

    The consensus cells [cycle, item, location, period, consensus] (or
    ``lag`` instead of cycle) are summed to ``level``; ``past_errors`` (cells,
    as for :func:`level_errors`) are summed the same way; then
    :func:`empirical_bands` with the same scaling rule as the item bands:
    band = F_g·(1 + quantile of e_g / F_g) by lag bucket (Williams & Goodman
    1971).  Because the errors are the level's own, positively correlated
    item errors widen the family band as they should; an independence sum
    √Σ(item deviation²) would not.

    Returns [cycle?, period, lag?, level keys…, lag_bucket, consensus,
    n_cells, lower_/upper_ per level, band_method].
    """
    keys = _level_keys(level)
    levels = _check_levels(levels)
    _check_rule(rule, size_classes, few_errors)
    for column in ("item", "location", "period", "consensus"):
        if column not in consensus.columns:
            raise ValueError(f"consensus lacks column {column}")
    extra = [c for c in by if c not in ("lag_bucket", *keys)]
    if extra:
        raise InvalidSpec(f"level bands can be grouped by lag_bucket and the level's keys only, not {extra}")
    frame = _with_level_keys(consensus, keys, items, locations)
    instance = [c for c in ("cycle", "period", "lag") if c in frame.columns] + keys
    grouped = frame.groupby(instance, sort=True, dropna=False)
    summed = grouped["consensus"].sum().to_frame().join(grouped.size().rename("n_cells")).reset_index()
    summed = _with_lag_bucket(summed)
    past = level_errors(past_errors, level=level, items=items, locations=locations)
    banded = empirical_bands(summed, past, levels=levels, by=by, min_errors=min_errors, rule=rule,
                             size_classes=size_classes, few_errors=few_errors)
    return banded.reset_index(drop=True)


def _level_actuals(actuals: pd.DataFrame, keys: list[str], items, locations) -> pd.DataFrame:
    """Actuals summed to the level by month, 0 for a known group in a month that has actuals."""
    frame = _with_level_keys(actuals, keys, items, locations)
    if keys:
        summed = frame.groupby([*keys, "period"], sort=True)["quantity"].sum().unstack("period", fill_value=0.0)
        return summed.stack().rename("actual").reset_index()
    return frame.groupby("period", sort=True)["quantity"].sum().rename("actual").reset_index()


def score_bands(bands: pd.DataFrame, actuals: pd.DataFrame, *, level: str, items: pd.DataFrame | None = None,
                locations: pd.DataFrame | None = None, levels: Sequence[float] = (0.8, 0.95)) -> pd.DataFrame:
    """Coverage and mean Winkler score of stored bands at one level, by lag bucket and over all lags.

    ``bands``: [cycle, period, level keys…, lower_/upper_ per level] (``lag``
    or ``lag_bucket`` may stand in for cycle), e.g. stored item lines or the
    output of :func:`level_bands`; ``actuals``: [item, location, period,
    quantity], summed to the level.  A band is scored when its month has
    actuals and its group has actuals in some month (a group with no row
    that month had 0 demand: the rule of ``forecast_errors``).  Coverage is
    the share of actuals in [lower, upper]; the Winkler score is
    (u − l) + (2/α)·miss (Winkler 1972; Gneiting & Raftery 2007, eq. 43).

    Returns [level, lag_bucket ("all" for every lag), nominal, n, coverage,
    coverage_gap, mean_winkler, n_cycles].
    """
    keys = _level_keys(level)
    levels = _check_levels(levels)
    missing = [c for c in ["period", *keys, *band_columns(levels)] if c not in bands.columns]
    if missing:
        raise ValueError(f"bands lack columns {missing}")
    bands = _with_lag_bucket(bands)
    if "lag_bucket" not in bands.columns:
        raise ValueError("bands need lag_bucket, lag, or cycle and period")
    observed = _level_actuals(actuals, keys, items, locations)
    scored = bands.merge(observed, on=[*keys, "period"], how="inner")
    rows = []
    buckets = [label for label in dict.fromkeys(lag_bucket_labels(np.arange(1, 200))) if label]
    for bucket in [*buckets, "all"]:
        part = scored if bucket == "all" else scored[scored["lag_bucket"] == bucket]
        if part.empty and bucket != "all":
            continue
        rows += [{"level": level, "lag_bucket": bucket, **row} for row in _coverage_rows(part, levels)]
    return pd.DataFrame(rows, columns=SCORE_COLUMNS)


def score_bands_by_level(bands: Mapping[str, pd.DataFrame], actuals: pd.DataFrame, *,
                         items: pd.DataFrame | None = None, locations: pd.DataFrame | None = None,
                         levels: Sequence[float] = (0.8, 0.95)) -> pd.DataFrame:
    """:func:`score_bands` for each level's stored bands, one table: {"item": lines, "family": …, "total": …}."""
    tables = [score_bands(frame, actuals, level=level, items=items, locations=locations, levels=levels)
              for level, frame in bands.items()]
    return pd.concat(tables, ignore_index=True) if tables else pd.DataFrame(columns=SCORE_COLUMNS)


def backtest_bands_by_level(errors: pd.DataFrame, *, items: pd.DataFrame | None = None,
                            locations: pd.DataFrame | None = None,
                            hierarchy: Sequence[str] = DEFAULT_BAND_LEVELS, levels: Sequence[float] = (0.8, 0.95),
                            by: Sequence[str] = ("lag_bucket",), min_errors: int = 30,
                            first_test_cycle: str | None = None, rule: str = "relative",
                            size_classes: int = DEFAULT_SIZE_CLASSES, few_errors: str = "normal") -> pd.DataFrame:
    """Rolling-origin check of bands at each level, each level's bands from its own past errors.

    ``errors``: one forecast's cell errors [cycle, item, location, period,
    forecast, actual] (e.g. the consensus's own, from ``forecast_errors``).
    For each level in ``hierarchy`` the cells are summed to the level
    (:func:`level_errors`); for each test cycle c the level's bands come from
    its errors known at c (period ≤ c) and are scored on c's actuals, as
    :func:`backtest_bands` does for cells.

    Returns [level, lag_bucket ("all" for every lag), nominal, n, coverage,
    coverage_gap, mean_winkler, n_cycles].
    """
    levels = _check_levels(levels)
    _check_rule(rule, size_classes, few_errors)
    rows = []
    buckets = [label for label in dict.fromkeys(lag_bucket_labels(np.arange(1, 200))) if label]
    for level in hierarchy:
        summed = level_errors(errors, level=level, items=items, locations=locations)
        banded = rolling_origin_bands(summed, levels=levels, by=by, min_errors=min_errors,
                                       first_test_cycle=first_test_cycle, rule=rule, size_classes=size_classes,
                                       few_errors=few_errors)
        for bucket in [*buckets, "all"]:
            part = banded if bucket == "all" or banded.empty else banded[banded["lag_bucket"] == bucket]
            if bucket != "all" and part.empty:
                continue
            rows += [{"level": level, "lag_bucket": bucket, **row} for row in _coverage_rows(part, levels)]
    return pd.DataFrame(rows, columns=SCORE_COLUMNS)


# ---------------------------------------------------------------------------
# Level bands a run stores: family and total plans banded from those levels' own past errors.
# ---------------------------------------------------------------------------

#: Levels a run stores bands for besides item × location.
STORED_BAND_LEVELS = ("family", "total")
LEVEL_BAND_COLUMNS = ["level", "node", "period", "lag", "consensus", "band_method"]
LEVEL_ERROR_COLUMNS = ["cycle", "node", "period", "lag", "forecast", "actual"]
#: The source the published plans' numbers carry in the history (consensus.vocabulary.SOURCES).
PLAN_SOURCE = "consensus"
#: How band_method says which errors a level band was read from (the basis of :func:`own_errors_first`).
LEVEL_BASIS_TEXT = {"own": "{level} plans' own errors", "pooled": "{level} plans' own errors pooled with the "
                    "combination's", "fallback": "{level} combination's errors"}


def published_level_errors(node_errors: pd.DataFrame | None) -> dict[str, pd.DataFrame]:
    """The errors the published plans made at family and total level: {level: LEVEL_ERROR_COLUMNS frame}.

    Each past cycle's published plan summed to the family (and to the
    total), against the orders summed the same way (``node_errors`` of the
    history, source "consensus").  These are the level's own out-of-sample
    errors, the same record the item bands read at cell level, so items
    that miss together widen them as they should.
    """
    if node_errors is None or node_errors.empty:
        return {level: pd.DataFrame(columns=LEVEL_ERROR_COLUMNS) for level in STORED_BAND_LEVELS}
    mine = node_errors[(node_errors["source"] == PLAN_SOURCE) & node_errors["level"].isin(STORED_BAND_LEVELS)]
    mine = mine.rename(columns={"node_item": "node"})
    return {level: mine.loc[mine["level"] == level, LEVEL_ERROR_COLUMNS].reset_index(drop=True)
            for level in STORED_BAND_LEVELS}


def level_band_errors(node_errors: pd.DataFrame | None, weights: pd.DataFrame | None,
                      factors: pd.DataFrame | None = None, *, min_own: int = MIN_OWN_BAND_ERRORS
                      ) -> dict[str, tuple[pd.DataFrame | None, str]]:
    """What each level's band is read from: {level: (errors, basis)}, by :func:`own_errors_first`.

    The published plans' own errors at the level (:func:`published_level_errors`)
    alone once there are ``min_own`` of them; before that pooled with the
    errors today's combination would have made (:func:`combined_level_errors`,
    only when ``weights`` are given).  The combination's record is a
    stand-in, not the band's basis: it weighs past sources with today's
    weights but corrects them with the factors re-judged from the record in
    the window, so in a young store it replays a biased source (sales
    forecasting high before its bias could be judged) at a weight no run
    gave it uncorrected.  A bias common to every family adds up at the
    total, where the spread of the plan's own errors is smallest, and the
    total band grew wider than the plan's errors warranted.
    """
    own = published_level_errors(node_errors)
    stand_in = combined_level_errors(node_errors, weights, factors) if weights is not None and len(weights) else {}
    return {level: own_errors_first(own.get(level), stand_in.get(level), min_own=min_own)
            for level in STORED_BAND_LEVELS}


def combined_level_errors(node_errors: pd.DataFrame, weights: pd.DataFrame, factors: pd.DataFrame | None = None
                          ) -> dict[str, pd.DataFrame]:
    """The family and total errors today's combination would have made in past cycles: {level: [cycle, node, period, lag, forecast, actual]}.

    For each past (cycle, month) and family, each source's family total
    (``node_errors`` of level "family") is corrected by the factor that cycle
    applied (``factors``: [cycle, segment, lag_bucket, source, factor], from
    :func:`consensus.methods.bias.factors_as_known`) and turned into a
    relative error r_i = (A_i − k_i·F_i) / A_i over the cells it covered;
    the combination's relative error is r = Σ w_i r_i / Σ w_i over the
    sources present, with the run's weights w of the family and lag bucket
    (the in-sample combined residuals of Wickramasuriya, Athanasopoulos &
    Hyndman 2019, as :mod:`consensus.methods.reconciliation` forms them for
    MinT).  Forecast = A·(1 − r) with A the family's actual over its most
    covered source's cells; the total sums the families of a month.  Only
    months that every weighed source forecast count.

    These errors are the level's (items that miss together move them
    together), but of a combination no run made: :func:`level_band_errors`
    pools them in only while the published plans' own record is short.
    """
    columns = LEVEL_ERROR_COLUMNS
    empty = {level: pd.DataFrame(columns=columns) for level in STORED_BAND_LEVELS}
    if node_errors is None or node_errors.empty or weights is None or weights.empty:
        return empty
    fam = node_errors[(node_errors["level"] == "family") & node_errors["source"].isin(set(weights["source"]))]
    fam = fam[fam["actual"] > 0]
    if fam.empty:
        return empty
    fam = fam.assign(segment=fam["node_item"].astype(object),
                     lag_bucket=lag_bucket_labels(fam["lag"].to_numpy(int)))
    keys = ["segment", "lag_bucket", "source"]
    fam = fam.merge(weights[keys + ["weight"]], on=keys, how="inner")
    if factors is not None and len(factors):
        fam = fam.merge(factors[["cycle", *keys, "factor"]], on=["cycle", *keys], how="left")
        k = fam["factor"].fillna(1.0).to_numpy(float)
    else:
        k = np.ones(len(fam))
    fam["weighted"] = fam["weight"] * (fam["actual"] - k * fam["forecast"]) / fam["actual"]
    grouped = fam.groupby(["cycle", "segment", "period", "lag"], sort=True)
    out = pd.DataFrame({"weighted": grouped["weighted"].sum(), "w": grouped["weight"].sum(),
                        "actual": grouped["actual"].max(), "n_sources": grouped["source"].nunique()}).reset_index()
    # Only months every weighed source forecast: a cycle before the people's record began is not today's method.
    out = out[(out["w"] > 0) & (out["n_sources"] == weights["source"].nunique())]
    out["forecast"] = out["actual"] * (1 - out["weighted"] / out["w"])
    family = out.rename(columns={"segment": "node"})[columns]
    total = family.groupby(["cycle", "period", "lag"], sort=True)[["forecast", "actual"]].sum().reset_index()
    return {"family": family, "total": total.assign(node="all")[columns]}


def stored_level_bands(consensus: pd.DataFrame, level_errors: Mapping[str, pd.DataFrame | None], *,
                       items: pd.DataFrame, cycle: str, levels: Sequence[float] = (0.8, 0.95), min_errors: int = 30,
                       basis: Mapping[str, str] | None = None) -> pd.DataFrame:
    """Bands of the family and total plans from errors of the family and total plans themselves.

    ``consensus``: the run's cells [item, location, period, consensus];
    ``level_errors``: {level: [lag, forecast, actual]} of that level (e.g.
    from :func:`level_band_errors`, whose basis per level ``basis`` passes
    on to ``band_method``: "own", "pooled" or "fallback", default "own").
    Band = F_g·(1 + quantile of e_g/F_g)
    by lag bucket (Williams & Goodman 1971), the normal MAD band while a lag
    bucket has fewer than ``min_errors`` errors (:func:`apply_bands`).
    Because the errors are the level's own, items that miss together widen
    the family band as they should; no independence between items is assumed.

    Returns [level, node, period, lag, consensus, band_method, lower_/upper_
    per level]; ``node`` is the family's name (or "all" for the total).
    """
    levels = _check_levels(levels)
    family = items.drop_duplicates("item").set_index("item")["family"]
    cells = consensus[["item", "period", "consensus"]].assign(
        family=consensus["item"].map(family).fillna("(unknown family)").astype(object))
    parts = []
    for level in STORED_BAND_LEVELS:
        node = cells["family"] if level == "family" else pd.Series("all", index=cells.index, dtype=object)
        summed = cells.assign(node=node).groupby(["node", "period"], sort=True)["consensus"].sum().reset_index()
        summed["lag"] = lags(pd.Series(cycle, index=summed.index), summed["period"]) if len(summed) else []
        summed["lag_bucket"] = lag_bucket_labels(summed["lag"].to_numpy(int))
        past = level_errors.get(level)
        if past is None or past.empty:
            banded = summed.assign(**{c: np.nan for c in band_columns(levels)}, band_method="no error history yet")
        else:
            past = past.assign(lag_bucket=lag_bucket_labels(past["lag"].to_numpy(int)))
            table = band_table(past[["lag_bucket", "forecast", "actual"]], levels=levels, min_errors=min_errors)
            banded = apply_bands(summed, table, levels=levels, min_errors=min_errors)
            text = LEVEL_BASIS_TEXT[(basis or {}).get(level, "own")].format(level=level)
            banded["band_method"] = f"{text}: " + banded["band_method"].astype(str)
        parts.append(banded.assign(level=level))
    out = pd.concat(parts, ignore_index=True)
    return out[[*LEVEL_BAND_COLUMNS, *band_columns(levels)]].reset_index(drop=True)
