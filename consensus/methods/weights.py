"""Source weights from measured accuracy: the spec, the estimate and Bates–Granger.

Each source's weight for a segment (family, item, region or all) and lag
bucket comes from its errors in the trailing window of past cycles.  The
schemes, for N sources with errors e (e = actual − forecast):

* ``equal``          w_i = 1/N;
* ``inverse_mad``    w_i ∝ 1 / MAD_i;
* ``inverse_mse``    w_i ∝ 1 / MSE_i (Bates & Granger 1969, "The combination
  of forecasts", Operational Research Quarterly 20, with the correlations
  between sources set to zero);
* ``discounted_mse`` w_i ∝ 1 / (Σ_t δ^age_t e_t² / Σ_t δ^age_t), age in cycles
  before the newest cycle of the window (Bates & Granger 1969; Stock &
  Watson 2004, "Combination forecasts of output growth in a seven-country
  data set", J. Forecasting 23);
* ``best``           all weight on the lowest MSE (ties share it);
* ``shrunk_mse``     w_i = ψ·ŵ_i + (1 − ψ)/N, ŵ the inverse-MSE weights
  (shrinkage toward equal weights in the style of Stock & Watson 2004).

ψ, our history-confidence factor, is ψ = n / (n + κ) where n is the number of
past cycles behind the weights (the fewest any source has) and κ =
``spec.shrinkage_cycles``.  Why this form: the equal-weight "forecast
combination puzzle" (equal weights are hard to beat because estimated
weights are noisy) argues for leaning on equal weights when history is
short, and the estimate's noise falls with the number of cycles rather than
the number of error rows, because errors in one cycle share the same review
and the same market shocks.  n/(n + κ) rises smoothly from 0, never claims
full certainty, and reads as "κ cycles' worth of prior belief in equal
weights".  κ = 1 by default (ψ = 0.75 at the 3-cycle minimum, 0.92 at a full
12-cycle window): in bench/bench_weights.py κ = 2 left the consensus 3.8 %
behind the known-variance weights when sources differ in quality, κ = 1
about 1.7 %, while costing < 0.3 % against equal weights when the sources
are equally good.  Stock & Watson's own ψ = max(0, 1 − κN/(T − h − N)) was built
for regression weights on long macro series and is zero for the short
windows planners keep.  ψ also scales the bias correction in
:mod:`consensus.methods.combine`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from consensus.errors import InvalidSpec
from consensus.methods.accuracy import month_indexes_factorized
from consensus.periods import DEFAULT_LAG_BUCKETS, month_index

SCHEMES = ("equal", "inverse_mad", "inverse_mse", "discounted_mse", "best", "shrunk_mse")
SEGMENTS = ("family", "item", "region", "all")

#: Label of the one segment that pools everything.
ALL_SEGMENTS = "all"

WEIGHT_COLUMNS = [
    "segment", "lag_bucket", "source", "weight", "raw_weight", "psi", "n_cycles", "n_errors",
    "mad", "mse", "mean_error", "basis", "note",
]


@dataclass(frozen=True)
class WeightSpec:
    """How source weights are estimated; checked on construction.

    scheme: one of :data:`SCHEMES`; window_cycles: how many past cycles count;
    segment: one of :data:`SEGMENTS`, the grouping weights are estimated for;
    discount: δ of ``discounted_mse`` (0 < δ ≤ 1); min_cycles: fewer past
    cycles than this for any source and the segment falls back (segment →
    all → equal); bias_correction: add each source's shrunk mean error in
    the combination; shrinkage_cycles: κ of ψ = n/(n + κ); disagreement_min_units:
    a cell's spread must also reach this many units to be flagged; disagreement_threshold:
    spread/consensus above which a cell is flagged in the combination.
    """

    scheme: str = "shrunk_mse"
    window_cycles: int = 12
    segment: str = "family"
    discount: float = 0.8
    min_cycles: int = 3
    bias_correction: bool = False
    shrinkage_cycles: float = 1.0
    disagreement_threshold: float = 0.5
    disagreement_min_units: float = 10.0

    def __post_init__(self) -> None:
        if self.scheme not in SCHEMES:
            raise InvalidSpec(f"scheme must be one of {list(SCHEMES)}, got {self.scheme!r}")
        if self.segment not in SEGMENTS:
            raise InvalidSpec(f"segment must be one of {list(SEGMENTS)}, got {self.segment!r}")
        if not _is_whole(self.window_cycles) or self.window_cycles < 1:
            raise InvalidSpec(f"window_cycles must be a whole number ≥ 1, got {self.window_cycles!r}")
        if not _is_whole(self.min_cycles) or not 1 <= self.min_cycles <= self.window_cycles:
            raise InvalidSpec(f"min_cycles must be a whole number from 1 to window_cycles, got {self.min_cycles!r}")
        if not 0 < float(self.discount) <= 1:
            raise InvalidSpec(f"discount must be in (0, 1], got {self.discount!r}")
        if not float(self.shrinkage_cycles) >= 0:
            raise InvalidSpec(f"shrinkage_cycles must be ≥ 0, got {self.shrinkage_cycles!r}")
        if not float(self.disagreement_threshold) >= 0:
            raise InvalidSpec(f"disagreement_threshold must be ≥ 0, got {self.disagreement_threshold!r}")
        if not float(self.disagreement_min_units) >= 0:
            raise InvalidSpec(f"disagreement_min_units must be ≥ 0, got {self.disagreement_min_units!r}")
        if not isinstance(self.bias_correction, (bool, np.bool_)):
            raise InvalidSpec(f"bias_correction must be True or False, got {self.bias_correction!r}")


def _is_whole(value) -> bool:
    return isinstance(value, (int, np.integer)) and not isinstance(value, bool)


def bates_granger_pair(sigma1: float, sigma2: float, rho: float) -> tuple[float, float]:
    """Weight of forecast 1 and the variance of the combination of two forecasts.

    Bates & Granger (1969): with error standard deviations σ1, σ2 and error
    correlation ρ, the variance-minimising weight on forecast 1 is
    w1 = (σ2² − ρσ1σ2) / (σ1² + σ2² − 2ρσ1σ2), and the combined variance is
    σc² = σ1²σ2²(1 − ρ²) / (σ1² + σ2² − 2ρσ1σ2).
    """
    if sigma1 < 0 or sigma2 < 0 or not -1 <= rho <= 1:
        raise InvalidSpec("standard deviations must be ≥ 0 and the correlation within [−1, 1]")
    v1, v2, c = sigma1 ** 2, sigma2 ** 2, rho * sigma1 * sigma2
    denominator = v1 + v2 - 2 * c
    if denominator == 0:
        # Identical errors: any split gives the same variance; split evenly.
        return 0.5, v1
    w1 = (v2 - c) / denominator
    return float(w1), float(v1 * v2 * (1 - rho ** 2) / denominator)


def assign_segments(frame: pd.DataFrame, *, segment: str, items: pd.DataFrame | None,
                    locations: pd.DataFrame | None) -> np.ndarray:
    """The segment label of each row (its family, item, region, or "all")."""
    if segment not in SEGMENTS:
        raise InvalidSpec(f"segment must be one of {list(SEGMENTS)}, got {segment!r}")
    if segment == "all":
        return np.full(len(frame), ALL_SEGMENTS, dtype=object)
    if segment == "item":
        return frame["item"].astype(object).to_numpy()
    if segment == "family":
        if items is None:
            raise InvalidSpec("segment 'family' needs the items master")
        mapping = items.drop_duplicates("item").set_index("item")["family"]
        return frame["item"].map(mapping).fillna("(unknown family)").astype(object).to_numpy()
    if locations is None:
        raise InvalidSpec("segment 'region' needs the locations master")
    mapping = locations.drop_duplicates("location").set_index("location")["region"]
    return frame["location"].map(mapping).fillna("(unknown region)").astype(object).to_numpy()


def _segments_of_master(segment: str, items: pd.DataFrame, locations: pd.DataFrame, seen: np.ndarray) -> list:
    if segment == "all":
        labels = [ALL_SEGMENTS]
    elif segment == "item":
        labels = list(items["item"].astype(object))
    elif segment == "family":
        labels = list(items["family"].astype(object))
    else:
        labels = list(locations["region"].astype(object))
    return sorted(set(labels) | set(seen))


#: Columns of the per-cycle error sums weights are estimated from (see :func:`error_sums`).
SUM_COLUMNS = ["segment", "lag_bucket", "source", "cycle", "n", "sum_abs", "sum_sq", "sum_err"]


def error_sums(errors: pd.DataFrame, *, segment: str, items: pd.DataFrame | None,
               locations: pd.DataFrame | None) -> pd.DataFrame:
    """Per (segment, lag bucket, source, cycle): n, Σ|e|, Σe², Σe of a cell-level error table.

    This is all a weight needs from the past, so a long history can be kept
    as these sums instead of one row per error (``forecast_errors`` gives the
    cell-level table).  Rows are summed in a fixed order, so the sums do not
    depend on the order of ``errors``.
    """
    frame = errors.sort_values(["source", "cycle", "item", "location", "period"], kind="mergesort")
    e = frame["error"].astype(float)
    parts = pd.DataFrame({
        "segment": assign_segments(frame, segment=segment, items=items, locations=locations),
        "lag_bucket": frame["lag_bucket"].astype(object).to_numpy(), "source": frame["source"].astype(object).to_numpy(),
        "cycle": frame["cycle"].astype(object).to_numpy(), "n": 1, "sum_abs": e.abs().to_numpy(),
        "sum_sq": (e * e).to_numpy(), "sum_err": e.to_numpy()})
    if parts.empty:
        return pd.DataFrame({c: pd.Series(dtype=object if c in SUM_COLUMNS[:4] else float) for c in SUM_COLUMNS})
    return parts.groupby(SUM_COLUMNS[:4], sort=True).sum().reset_index()[SUM_COLUMNS]


def _error_statistics(window: pd.DataFrame, keys: list[str]) -> pd.DataFrame:
    """Per key: cycles, errors, MAD, MSE, mean error and discounted MSE from per-cycle sums."""
    parts = window.assign(discounted_sq=window["discount_weight"] * window["sum_sq"],
                          discounted_n=window["discount_weight"] * window["n"],
                          has=(window["n"] > 0).astype(int))
    grouped = parts.groupby(keys, sort=True)
    totals = grouped[["n", "sum_abs", "sum_sq", "sum_err", "discounted_sq", "discounted_n", "has"]].sum()
    stats = pd.DataFrame({
        "n_cycles": totals["has"],
        "n_errors": totals["n"],
        "mad": totals["sum_abs"] / totals["n"],
        "mse": totals["sum_sq"] / totals["n"],
        "mean_error": totals["sum_err"] / totals["n"],
        "discounted_mse": totals["discounted_sq"] / totals["discounted_n"],
    })
    return stats.reset_index()


def _normalise_inverse(score: pd.Series, group: pd.Series) -> pd.Series:
    """w ∝ 1/score within each group; a zero score takes all weight (shared).

    Computed as min/score, which is in (0, 1]: 1/score overflows for
    subnormal scores and would turn a near-perfect source's weight into NaN.
    """
    score = score.astype(float)
    is_zero = score <= 0
    group_has_zero = is_zero.groupby(group).transform("any")
    smallest = score.where(~is_zero).groupby(group).transform("min")
    with np.errstate(divide="ignore", invalid="ignore"):
        inverse = np.where(group_has_zero, is_zero.astype(float), smallest / score.where(~is_zero, np.nan))
    inverse = pd.Series(inverse, index=score.index)
    return inverse / inverse.groupby(group).transform("sum")


def estimate_weights(
    errors: pd.DataFrame,
    *,
    cycle: str,
    items: pd.DataFrame,
    locations: pd.DataFrame,
    spec: WeightSpec,
    sources,
) -> pd.DataFrame:
    """Weights of ``sources`` for cycle ``cycle`` per (segment, lag bucket), from a cell-level error table.

    ``errors`` is :func:`consensus.methods.accuracy.forecast_errors`' table;
    see :func:`estimate_weights_from_sums` for the rule (this sums the errors
    per cycle first, with :func:`error_sums`).
    """
    if not isinstance(spec, WeightSpec):
        raise InvalidSpec("spec must be a WeightSpec")
    known = month_indexes_factorized(errors["period"]) <= month_index(cycle)  # actuals known at the cycle
    sums = error_sums(errors[known & errors["source"].isin([str(s) for s in sources]).to_numpy()],
                      segment=spec.segment, items=items, locations=locations)
    return estimate_weights_from_sums(sums, cycle=cycle, segments=_segments_of_master(spec.segment, items, locations,
                                                                                      sums["segment"].unique()),
                                      spec=spec, sources=sources)


def estimate_weights_from_sums(
    sums: pd.DataFrame,
    *,
    cycle: str,
    segments,
    spec: WeightSpec,
    sources,
) -> pd.DataFrame:
    """Weights of ``sources`` for cycle ``cycle`` per (segment, lag bucket), from per-cycle error sums.

    ``sums``: [segment, lag_bucket, source, cycle, n, sum_abs, sum_sq,
    sum_err] (:func:`error_sums`).  Uses only cycles C − window … C − 1 (the
    sums must hold only errors of periods ≤ C, so every actual used was known
    when cycle C was planned).  A (segment, lag bucket) where some source has
    fewer than ``min_cycles`` cycles of errors falls back to the errors of all
    segments pooled, and failing that to equal weights; ``basis`` says which
    ("segment", "all", "equal") and ``note`` says why.  Weights are ≥ 0 and
    sum to 1 per (segment, lag bucket); every segment in ``segments`` × every
    lag bucket × every source gets a row.  Formulas and sources: module docstring.

    Returns [segment, lag_bucket, source, weight, raw_weight, psi, n_cycles,
    n_errors, mad, mse, mean_error, basis, note]; mad/mse/mean_error/n_* are
    those of the basis used (of the segment's own history when equal).
    """
    if not isinstance(spec, WeightSpec):
        raise InvalidSpec("spec must be a WeightSpec")
    sources = sorted(dict.fromkeys(str(s) for s in sources))
    if not sources:
        raise InvalidSpec("at least one source is needed to estimate weights")
    current = month_index(cycle)
    frame = sums[sums["source"].isin(sources)]
    cycle_idx = month_indexes_factorized(frame["cycle"])
    in_window = (cycle_idx >= current - spec.window_cycles) & (cycle_idx <= current - 1)
    window = frame[in_window].assign(
        discount_weight=float(spec.discount) ** (current - 1 - cycle_idx[in_window]).astype(float))
    window = window.sort_values(["segment", "lag_bucket", "source", "cycle"], kind="mergesort")
    keys = ["segment", "lag_bucket", "source"]
    own = _error_statistics(window, keys)
    pooled = _error_statistics(window, ["lag_bucket", "source"])

    buckets = [label for label, _, _ in DEFAULT_LAG_BUCKETS]
    segments = sorted(set(segments) | set(window["segment"].unique()))
    grid = pd.MultiIndex.from_product([segments, buckets, sources], names=keys).to_frame(index=False)
    stat_cols = ["n_cycles", "n_errors", "mad", "mse", "mean_error", "discounted_mse"]
    table = grid.merge(own, on=keys, how="left").merge(
        pooled.rename(columns={c: f"pooled_{c}" for c in stat_cols}), on=["lag_bucket", "source"], how="left"
    )
    for col in ("n_cycles", "n_errors"):
        table[col] = table[col].fillna(0).astype(int)
        table[f"pooled_{col}"] = table[f"pooled_{col}"].fillna(0).astype(int)

    cell = [table["segment"], table["lag_bucket"]]
    own_fewest = table.groupby(cell)["n_cycles"].transform("min")
    pooled_fewest = table.groupby(cell)["pooled_n_cycles"].transform("min")
    basis = np.where(own_fewest >= spec.min_cycles, "segment",
                     np.where(pooled_fewest >= spec.min_cycles, "all", "equal"))
    table["basis"] = basis
    use_pooled = table["basis"] == "all"
    for col in stat_cols:
        table[col] = table[col].where(~use_pooled, table[f"pooled_{col}"])
    table["n_cycles"] = table["n_cycles"].astype(int)
    table["n_errors"] = table["n_errors"].astype(int)
    fewest = np.where(use_pooled, pooled_fewest, own_fewest)
    kappa = float(spec.shrinkage_cycles)
    psi = np.where(table["basis"] == "equal", 0.0, fewest / (fewest + kappa) if kappa > 0 else 1.0)
    table["psi"] = psi

    n_sources = len(sources)
    group_id = table["segment"].astype(str) + "\x1f" + table["lag_bucket"].astype(str)
    if spec.scheme == "equal":
        raw = pd.Series(1.0 / n_sources, index=table.index)
    elif spec.scheme == "best":
        lowest = table["mse"].groupby(group_id).transform("min")
        is_best = (table["mse"] == lowest).astype(float)
        raw = is_best / is_best.groupby(group_id).transform("sum")
    else:
        score_col = {"inverse_mad": "mad", "inverse_mse": "mse", "discounted_mse": "discounted_mse",
                     "shrunk_mse": "mse"}[spec.scheme]
        raw = _normalise_inverse(table[score_col], group_id)
    is_equal_basis = (table["basis"] == "equal").to_numpy()
    raw = raw.where(~is_equal_basis, 1.0 / n_sources).fillna(1.0 / n_sources)
    if spec.scheme == "shrunk_mse":
        weight = table["psi"] * raw + (1.0 - table["psi"]) / n_sources
    else:
        weight = raw
    table["raw_weight"] = raw.to_numpy()
    table["weight"] = (weight / weight.groupby(group_id).transform("sum")).to_numpy()
    table["note"] = _explain(table, spec, own_fewest.to_numpy(), pooled_fewest.to_numpy())
    return table[WEIGHT_COLUMNS].sort_values(keys, kind="mergesort").reset_index(drop=True)


def _explain(table: pd.DataFrame, spec: WeightSpec, own_fewest: np.ndarray, pooled_fewest: np.ndarray) -> np.ndarray:
    """One sentence per row saying where the weight came from."""
    scheme_text = {
        "equal": "equal weights (scheme 'equal')",
        "inverse_mad": "inverse-MAD weights",
        "inverse_mse": "inverse-MSE weights (Bates–Granger)",
        "discounted_mse": f"discounted inverse-MSE weights (δ = {spec.discount:g})",
        "best": "all weight on the lowest-MSE source",
        "shrunk_mse": "inverse-MSE weights shrunk toward equal",
    }[spec.scheme]
    segment_name = table["segment"].astype(str)
    bucket = table["lag_bucket"].astype(str)
    own_n = pd.Series(own_fewest, index=table.index).astype(int).astype(str)
    pooled_n = pd.Series(pooled_fewest, index=table.index).astype(int).astype(str)
    psi_text = table["psi"].map(lambda p: f"{p:.2f}")
    shrink = f" with ψ = " + psi_text if spec.scheme == "shrunk_mse" else pd.Series("", index=table.index)
    where = spec.segment + " " + segment_name + ", lag " + bucket
    own_text = where + ": " + scheme_text + shrink + " from " + own_n + " cycles of own history"
    fell_text = (where + ": only " + own_n + f" cycle(s) of history for some source (< {spec.min_cycles}); "
                 + scheme_text + shrink + " from all segments pooled (" + pooled_n + " cycles)")
    equal_text = (where + ": only " + pooled_n + f" cycle(s) of history even pooled (< {spec.min_cycles}); "
                  "equal weights")
    basis = table["basis"]
    note = np.where(basis == "segment", own_text, np.where(basis == "all", fell_text, equal_text))
    if spec.segment == "all":
        note = np.where(basis == "segment", note, equal_text)
    if spec.scheme == "equal":
        history = np.where(basis == "equal", "; too little history for bias figures",
                           np.where(basis == "all", "; bias figures from all segments pooled",
                                    "; bias figures from own history"))
        note = (where + ": " + scheme_text + history).to_numpy()
    return note.astype(object)
