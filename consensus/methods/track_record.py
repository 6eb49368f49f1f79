"""A submitter's own track record: accuracy by lag bucket over the groups they answer for, and their weight, in words.

Everything here reads what a run stored (the scorecard rows of
``accuracy_groups`` and the ``weights`` part) and measures nothing again.

Pooling the groups a sales lead answers for (e.g. every family of region
NORTH) uses the scorecard's own sums: Σ|e| = MAD·n, Σe = bias·n and Σa as
stored (``sum_actual``; for a run stored before that column, recovered as
100·Σ|e| / WAPE, or 100·Σe / bias % when WAPE is 0), so that

* WAPE = 100 · Σ|e| / Σa and bias % = 100 · Σe / Σa over every scored
  forecast of the groups (common practice; e = actual − forecast, so a
  negative bias means the forecasts ran high), and
* the tracking signal is the mean of the groups' own signals
  (Σe / MAD per group, Brown 1959), as :mod:`consensus.methods.scoring` pools
  groups, since one running sum over several groups grows with their number.

In such an older run, a group whose forecasts were all exactly right has
MAD = bias = 0 and its orders cannot be recovered from the row; it adds no
error and is left out of the denominators (``n_unrecovered`` counts such
groups).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from consensus.methods.accuracy import TRACKING_SIGNAL_LIMIT
from consensus.vocabulary import (WEIGHT_BASES, WEIGHT_SCHEMES, describe_lag_bucket, format_number, label,
                                  ordered, source_label)

POOLED_COLUMNS = ["lag_bucket", "n", "n_groups", "n_unrecovered", "wape", "bias_pct", "tracking_signal", "ts_flag"]
#: Below this size (in % of orders) a bias reads as "about right on average" (common practice: rounding noise).
NEUTRAL_BIAS_PCT = 0.5
#: A weight within 5% of the equal share either way reads as "about an equal share" (common practice).
NEAR_EQUAL = 0.05


@dataclass(frozen=True)
class TrackRecord:
    """What a run measured of one submitter's forecasts, and the weight it gave them.

    ``groups``: the scorecard's rows for the submitter's groups (level, node,
    lag bucket, n, WAPE, bias %, tracking signal …, as stored); ``pooled``:
    one row per lag bucket (:data:`POOLED_COLUMNS`) with ``sentence``;
    ``weights``: the submitter's weight rows with ``n_sources``,
    ``equal_share``, ``basis_label`` and ``why``.
    """

    source: str
    scope: str
    level: str
    run_cycle: str
    run_id: int
    run_status: str
    cycles: tuple[str, ...]
    groups: pd.DataFrame
    pooled: pd.DataFrame
    weights: pd.DataFrame
    scheme: str


def pool_groups(groups: pd.DataFrame) -> pd.DataFrame:
    """Pool scorecard group rows per lag bucket: WAPE, bias % and tracking signal over all their forecasts.

    ``groups`` holds the scorecard columns lag_bucket, n, mad, wape, bias,
    bias_pct, tracking_signal; see the module docstring for the formulas.
    """
    if groups.empty:
        return pd.DataFrame(columns=POOLED_COLUMNS)
    n = groups["n"].to_numpy(float)
    sum_abs = groups["mad"].to_numpy(float) * n
    sum_err = groups["bias"].to_numpy(float) * n
    wape = groups["wape"].to_numpy(float)
    bias_pct = groups["bias_pct"].to_numpy(float)
    with np.errstate(divide="ignore", invalid="ignore"):
        from_wape = np.where(np.isfinite(wape) & (wape > 0), 100.0 * sum_abs / wape, np.nan)
        from_bias = np.where(np.isfinite(bias_pct) & (bias_pct != 0), 100.0 * sum_err / bias_pct, np.nan)
    sum_actual = np.where(np.isfinite(from_wape), from_wape, from_bias)
    if "sum_actual" in groups:
        stored = groups["sum_actual"].to_numpy(float)
        sum_actual = np.where(np.isfinite(stored), stored, sum_actual)
    known = np.isfinite(sum_actual)
    parts = pd.DataFrame({"lag_bucket": groups["lag_bucket"].astype(str).to_numpy(), "n": n, "n_groups": 1,
                          "n_unrecovered": (~known).astype(int), "sum_abs": np.where(known, sum_abs, 0.0),
                          "sum_err": np.where(known, sum_err, 0.0), "sum_actual": np.where(known, sum_actual, 0.0),
                          "tracking_signal": groups["tracking_signal"].to_numpy(float)})
    grouped = parts.groupby("lag_bucket", sort=True)
    sums = grouped[["n", "n_groups", "n_unrecovered", "sum_abs", "sum_err", "sum_actual"]].sum()
    positive = sums["sum_actual"].where(sums["sum_actual"] > 0)
    out = pd.DataFrame({"n": sums["n"].astype(int), "n_groups": sums["n_groups"].astype(int),
                        "n_unrecovered": sums["n_unrecovered"].astype(int),
                        "wape": 100.0 * sums["sum_abs"] / positive, "bias_pct": 100.0 * sums["sum_err"] / positive,
                        "tracking_signal": grouped["tracking_signal"].mean()})
    out["ts_flag"] = np.abs(out["tracking_signal"]) > TRACKING_SIGNAL_LIMIT
    return out.reset_index()[POOLED_COLUMNS]


def describe_bucket(bucket, *, wape: float, bias_pct: float, tracking_signal: float, n: int,
                    limit: float = TRACKING_SIGNAL_LIMIT) -> str:
    """One plain sentence on a lag bucket, e.g. "Your forecasts 2–3 months ahead ran 12% high on average …".

    "High" and "low" are the sign of −bias % (e = actual − forecast, so a
    negative bias is a forecast above what was ordered); the size of a miss
    is WAPE; a tracking signal beyond ±``limit`` (4, Brown 1959) says the
    misses kept to one side.
    """
    ahead = describe_lag_bucket(bucket)
    if not n or not np.isfinite(wape):
        return f"None of your forecasts {ahead} has been compared with orders yet."
    if not np.isfinite(bias_pct) or abs(bias_pct) < NEUTRAL_BIAS_PCT:
        lean = "were about right on average"
    else:
        lean = f"ran {format_number(abs(bias_pct), digits=0)}% {'high' if bias_pct < 0 else 'low'} on average"
    text = (f"Your forecasts {ahead} {lean} against what customers ordered; month by month they missed by "
            f"{format_number(wape, digits=0)}% of the orders (WAPE, {int(n)} forecasts).")
    if np.isfinite(tracking_signal) and abs(tracking_signal) > limit:
        side = "above" if tracking_signal < 0 else "below"
        text += (f" The misses kept falling {side} the orders (tracking signal {format_number(tracking_signal)}, "
                 f"beyond ±{format_number(limit)}): a steady lean, not bad luck.")
    return text


def explain_weights(weights: pd.DataFrame, *, source: str, segments, scheme: str) -> pd.DataFrame:
    """The submitter's weight rows in ``segments``, with how many sources shared the segment and why, in words.

    ``why`` compares the submitter's past error with the other sources' in
    the same segment and lag bucket (mean squared error for the MSE
    schemes, MAD for inverse_mad), the measure the weights follow
    (Bates & Granger 1969), and says when the weight was pulled toward equal
    (ψ, Stock & Watson 2004) or taken from pooled history.
    """
    columns = ["segment", "lag_bucket", "weight", "n_sources", "equal_share", "basis", "basis_label", "why", "note"]
    if weights.empty:
        return pd.DataFrame(columns=columns)
    keys = ["segment", "lag_bucket"]
    table = weights.assign(segment=weights["segment"].astype(str), lag_bucket=weights["lag_bucket"].astype(str))
    table["n_sources"] = table.groupby(keys)["source"].transform("size")
    mine = table[(table["source"] == source) & table["segment"].isin([str(s) for s in segments])].copy()
    if mine.empty:
        return pd.DataFrame(columns=columns)
    measure = "mad" if scheme == "inverse_mad" else "mse"
    rank = {key: position for position, key in enumerate(ordered(table["source"].unique()))}
    others = table[table["source"] != source]
    others = others.assign(_rank=others["source"].map(rank)).sort_values(keys + ["_rank"], kind="stable")
    others_text = (others["source"].map(source_label) + " " + others[measure].map(_measure_text))
    listed = others_text.groupby([others["segment"], others["lag_bucket"]]).agg(", ".join)
    at = pd.MultiIndex.from_frame(mine[keys])
    mine["equal_share"] = 1.0 / mine["n_sources"]
    mine["basis_label"] = mine["basis"].map(lambda b: label(WEIGHT_BASES, b))
    mine["why"] = [
        _why(scheme=scheme, measure=measure, basis=str(basis), yours=float(value), others=str(other or ""),
             psi=float(psi) if pd.notna(psi) else np.nan, cycles=int(cycles) if pd.notna(cycles) else 0,
             share=float(weight) / float(equal) if equal else np.nan)
        for basis, value, other, psi, cycles, weight, equal in zip(
            mine["basis"], mine[measure], listed.reindex(at).to_numpy(), mine["psi"], mine["n_cycles"],
            mine["weight"], mine["equal_share"])
    ]  # a handful of rows: one per family and lag bucket
    return mine[columns].reset_index(drop=True)


def _measure_text(value) -> str:
    return format_number(float(value), digits=0) if pd.notna(value) else "not measured"


def _why(*, scheme: str, measure: str, basis: str, yours: float, others: str, psi: float, cycles: int,
         share: float) -> str:
    if scheme == "equal" or basis == "equal":
        if scheme == "equal":
            return "The run weighs every source the same."
        return "Too little history, even for all segments together, so every source counted the same."
    what = "mean absolute error" if measure == "mad" else "mean squared error"
    pooled = ("Too little history of your own here, so the errors of all segments together were used. "
              if basis == "all" else "")
    if scheme == "best":
        rule = f"All weight goes to the source with the smallest past {what}"
    else:
        rule = f"Each source counts in inverse proportion to its past {what}"
    compared = f": yours {_measure_text(yours)}" + (f", {others}" if others else "")
    pulled = ""
    if scheme == "shrunk_mse" and np.isfinite(psi):
        pulled = (f"; then pulled toward equal weights by ψ = {psi:.2f} "
                  f"({cycles} cycle{'s' if cycles != 1 else ''} of history)")
    # Under an inverse-error rule a weight above equal means past errors below the others' (Bates & Granger 1969).
    if not np.isfinite(share) or abs(share - 1) <= NEAR_EQUAL:
        verdict = "About an equal share. "
    elif share > 1:
        verdict = "More than an equal share, because your past errors were smaller. "
    else:
        verdict = "Less than an equal share, because your past errors were larger. "
    return f"{verdict}{pooled}{rule}{compared}{pulled}."


def scheme_label(scheme: str) -> str:
    """The run's weighting scheme as the vocabulary names it."""
    return label(WEIGHT_SCHEMES, scheme)


__all__ = ["TrackRecord", "pool_groups", "describe_bucket", "explain_weights", "scheme_label", "POOLED_COLUMNS"]
