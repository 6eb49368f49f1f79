"""Demand patterns, trend and seasonality of many monthly series at once.

Arrays follow :mod:`consensus.methods.smoothing`: ``y`` is ``(n_series,
n_months)`` and series ``i`` lives in columns ``start[i] … n_months−1``.  A
NaN month is unknown: every statistic below leaves it out (it is neither
demand nor a zero).

* **Pattern** (Syntetos, Boylan & Croston 2005, "On the categorization of
  demand patterns", Journal of the Operational Research Society 56(5)):
  ``ADI`` = months in the span / months with demand (> 0); ``CV²`` =
  variance / mean² of the non-zero demands (population variance, ddof 0).
  ADI ≤ 1.32 and CV² ≤ 0.49 → smooth; ADI ≤ 1.32, CV² > 0.49 → erratic;
  ADI > 1.32, CV² ≤ 0.49 → intermittent; both above → lumpy.  A value equal
  to a cut-off counts on the low side.  A series with no demand is
  "no_demand".
* **Trend**: Mann–Kendall test (Mann 1945; Kendall 1975) of the span,
  ``S = Σ_{i<j} sign(y_j − y_i)``, variance with the tie correction
  ``[n(n−1)(2n+5) − Σ_g t_g(t_g−1)(2t_g+5)] / 18``, ``Z = S/√var`` (no
  continuity correction, as scipy's asymptotic Kendall τ test); trend when
  |Z| > 1.96 (two-sided 5 %) and the span has at least 12 months; a span
  longer than ten years is tested on its last ten.
* **Seasonality**: one-way analysis of variance of the linearly detrended
  span grouped by season slot (month of year for m = 12), the idea of the
  X-11 test for stable seasonality (Lothian & Morry 1978, Statistics
  Canada), here on detrended values rather than SI ratios: ``F = [Σ_s n_s
  ē_s²/(m−1)] / [Σ_s Σ_t (e_t − ē_s)²/(n−m)]``; seasonal when its p-value
  under F(m−1, n−m) is below 1 % and the span holds at least two seasons.
  (The autocorrelation test at lag m with Bartlett's limit, as in the M4
  benchmarks, misses strong seasons in four-year spans because the same
  season inflates its own limit, so it is not used.)
"""

from __future__ import annotations

import numpy as np
from scipy import special  # fdtrc is scipy.stats' f.sf without the 0.3 s import of scipy.stats

ADI_CUTOFF = 1.32
CV2_CUTOFF = 0.49
PATTERNS = ("smooth", "erratic", "intermittent", "lumpy", "no_demand")

TREND_MIN_MONTHS = 12
TREND_WINDOW_MONTHS = 120
TREND_Z = 1.96
SEASONALITY_MIN_SEASONS = 2
SEASONALITY_P = 0.01


def _span_mask(shape: tuple[int, int], start: np.ndarray) -> np.ndarray:
    return np.arange(shape[1])[None, :] >= np.asarray(start, dtype=int)[:, None]


def _known_span(y: np.ndarray, start: np.ndarray) -> np.ndarray:
    """Months of each span whose quantity is known (not NaN): an unknown month is left out, not counted as zero."""
    return _span_mask(y.shape, start) & np.isfinite(y)


def measure_intermittency(y: np.ndarray, start: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """ADI and CV² of each series' span (NaN where there is no demand; CV² 0 for one demand)."""
    y = np.asarray(y, dtype=float)
    span = _known_span(y, start)
    demand = span & (y > 0)
    n_span = span.sum(axis=1)
    n_demand = demand.sum(axis=1)
    with np.errstate(all="ignore"):
        adi = np.where(n_demand > 0, n_span / np.maximum(n_demand, 1), np.nan)
        sizes = np.where(demand, y, 0.0)
        mean = sizes.sum(axis=1) / n_demand
        var = np.where(demand, (y - mean[:, None]) ** 2, 0.0).sum(axis=1) / n_demand
        cv2 = np.where(n_demand > 0, var / mean**2, np.nan)
    return adi, cv2


def classify_pattern(adi, cv2) -> np.ndarray:
    """Pattern names from ADI and CV² at the Syntetos–Boylan–Croston cut-offs 1.32 and 0.49."""
    adi = np.asarray(adi, dtype=float)
    cv2 = np.asarray(cv2, dtype=float)
    frequent = adi <= ADI_CUTOFF
    steady = cv2 <= CV2_CUTOFF
    out = np.where(frequent, np.where(steady, "smooth", "erratic"), np.where(steady, "intermittent", "lumpy"))
    return np.where(np.isnan(adi), "no_demand", out).astype(object)


def classify_demand(y: np.ndarray, start: np.ndarray) -> np.ndarray:
    """Pattern of each series' span: smooth, erratic, intermittent, lumpy or no_demand."""
    return classify_pattern(*measure_intermittency(y, start))


def mann_kendall_z(y: np.ndarray, start: np.ndarray) -> np.ndarray:
    """Mann–Kendall Z of each span with the tie-corrected variance (NaN for spans under 3 months).

    ``S`` counts the pairs of months t < t + d, both known in the span,
    with ``y_{t+d} > y_t`` less those with ``y_{t+d} < y_t`` (contiguous
    slices, one lag d at a time);
    the tie groups come from each span's sorted values (a run of equal
    values of length t is a group of size t).
    """
    y = np.asarray(y, dtype=float)
    start = np.asarray(start, dtype=int)
    n_series, n_months = y.shape
    span = _known_span(y, start)
    yy = np.where(span, y, np.nan)  # a comparison with NaN is false: a pair with an unknown month counts nowhere
    s = np.zeros(n_series, dtype=np.int64)
    for lag in range(1, n_months):
        diff = yy[:, lag:] - yy[:, :-lag]
        s += np.count_nonzero(diff > 0, axis=1) - np.count_nonzero(diff < 0, axis=1)
    n = span.sum(axis=1).astype(float)
    # tie groups: runs of equal values in each sorted span (NaN sort last)
    positions = np.arange(n_months)
    ordered = np.sort(yy, axis=1)
    new_run = np.ones(ordered.shape, dtype=bool)
    new_run[:, 1:] = ordered[:, 1:] != ordered[:, :-1]
    run_start = np.maximum.accumulate(np.where(new_run, positions, 0), axis=1)
    run_end = np.minimum.accumulate(np.where(np.roll(new_run, -1, axis=1) | (positions == n_months - 1),
                                             positions, n_months)[:, ::-1], axis=1)[:, ::-1]
    tie_size = run_end - run_start + 1  # the size of the group each value belongs to
    ties = np.where(np.isfinite(ordered), (tie_size - 1) * (2 * tie_size + 5), 0).sum(axis=1)
    var = (n * (n - 1) * (2 * n + 5) - ties) / 18.0
    with np.errstate(all="ignore"):
        return np.where((n >= 3) & (var > 0), s.astype(float) / np.sqrt(var), np.nan)


def detect_trend(y: np.ndarray, start: np.ndarray) -> np.ndarray:
    """True where the Mann–Kendall test finds a monotonic trend (|Z| > 1.96, span ≥ 12 months).

    The test looks at the last :data:`TREND_WINDOW_MONTHS` months of a span at
    most: the trend a forecast extrapolates is the recent one, and the pair
    count grows with the square of the months.
    """
    y = np.asarray(y, dtype=float)
    start = np.asarray(start, dtype=int)
    window = min(TREND_WINDOW_MONTHS, y.shape[1])
    offset = y.shape[1] - window
    z = mann_kendall_z(y[:, offset:], np.maximum(start - offset, 0))
    n = y.shape[1] - start
    return (n >= TREND_MIN_MONTHS) & (np.abs(np.nan_to_num(z)) > TREND_Z)


def seasonal_f_statistic(y: np.ndarray, start: np.ndarray, *, season_length: int = 12):
    """One-way ANOVA F of each linearly detrended span grouped by season slot (t mod m).

    Returns ``(F, df_between, df_within)``; F is NaN where a span has fewer
    than two seasons or no within-slot variation.  Same statistic as
    ``scipy.stats.f_oneway`` over the m groups of detrended values.
    """
    y = np.asarray(y, dtype=float)
    start = np.asarray(start, dtype=int)
    m = int(season_length)
    span = _known_span(y, start)
    t = np.arange(y.shape[1], dtype=float)[None, :]
    n = span.sum(axis=1)
    slot = np.arange(y.shape[1]) % m
    with np.errstate(all="ignore"):
        t_mean = np.where(span, t, 0).sum(axis=1) / n
        y_mean = np.where(span, y, 0).sum(axis=1) / n
        dt = np.where(span, t - t_mean[:, None], 0.0)
        dy = np.where(span, y - y_mean[:, None], 0.0)  # unknown months drop out here
        slope = (dt * dy).sum(axis=1) / (dt**2).sum(axis=1)
        resid = np.where(span, dy - np.nan_to_num(slope)[:, None] * dt, 0.0)  # mean 0 over the span
        between = np.zeros(y.shape[0])
        within = np.zeros(y.shape[0])
        for s in range(m):
            cols = slot == s
            count = span[:, cols].sum(axis=1)
            total = resid[:, cols].sum(axis=1)
            group_mean = np.where(count > 0, total / np.maximum(count, 1), 0.0)
            between += count * group_mean**2
            within += np.where(span[:, cols], (resid[:, cols] - group_mean[:, None]) ** 2, 0.0).sum(axis=1)
        df_between = m - 1
        df_within = n - m
        f = (between / df_between) / (within / df_within)
    enough = n >= SEASONALITY_MIN_SEASONS * m
    return np.where(enough & (within > 0), f, np.nan), df_between, df_within


def detect_seasonality(y: np.ndarray, start: np.ndarray, *, season_length: int = 12) -> np.ndarray:
    """True where the seasonal-slot ANOVA of the detrended span rejects 'no seasonality' at 1 %."""
    f, df_between, df_within = seasonal_f_statistic(y, start, season_length=season_length)
    with np.errstate(all="ignore"):
        p_value = special.fdtrc(df_between, np.maximum(df_within, 1), f)  # F upper tail
    return np.isfinite(f) & (p_value < SEASONALITY_P)
