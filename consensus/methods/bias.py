"""Persistent bias of a source, found by its tracking signal at segment level, and its correction.

A source that habitually forecasts high (sales' optimism) costs little at
item × location, where noise dominates, but its bias adds up in family and
total plans.  Bias is therefore judged where it adds up: on the source's
segment totals (the sum of its cells in a family, per past cycle and
month), which the history summary already keeps as per-cycle sums
(:attr:`consensus.methods.history.HistorySummary.cell_sums`).

For source i and segment g, over the past cycles of the weight window, each
(cycle c, month) gives one segment error E = A − F (A, F the sums over the
cells the source forecast).  The tracking signal is

    TS = Σ E / MAD,   MAD = mean |E|

(Brown 1959; the cumulative-error-over-MAD signal of operations-management
texts, limits ±4 MADs: :data:`consensus.methods.accuracy.TRACKING_SIGNAL_LIMIT`,
common practice).  A bias is *persistent* when |TS| exceeds the limit and
the errors come from at least ``min_cycles`` different past cycles: one bad
month, or one cycle's forecast read at several lags, does not switch a
correction on.

A persistent bias is corrected multiplicatively, per lag bucket b:

    F' = k · F,   k = 1 + ψ (r − 1),   r = Σ A / Σ F over the bucket's errors

(the ratio form suits a bias that is a share of the plan, as optimism is;
the lag bucket's own ratio when it has errors from ``min_cycles`` cycles,
else the ratio over all lags).  ψ = n / (n + κ) is the weights' history
confidence (:mod:`consensus.methods.weights`), n the cycles behind the
ratio, so a short record moves the source only part of the way; r is kept
within [1/``max_ratio``, ``max_ratio``].  Removing a forecast's mean error
before combining it is the intercept correction of Granger & Ramanathan
(1984, "Improved methods of combining forecasts", J. Forecasting 3) in its
simplest, proportional form; Winkler & Makridakis (1983) found combinations
of debiased forecasts more accurate (attributions from memory).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from consensus.errors import InvalidSpec
from consensus.methods.accuracy import TRACKING_SIGNAL_LIMIT, month_indexes_factorized
from consensus.periods import DEFAULT_LAG_BUCKETS, lag_bucket_labels, month_index

BIAS_MODES = ("persistent", "off")
BIAS_COLUMNS = ["segment", "lag_bucket", "source", "tracking_signal", "n_cycles", "n_errors", "persistent",
                "ratio", "psi", "factor", "note"]


@dataclass(frozen=True)
class BiasSpec:
    """When and how a source's bias is corrected.

    mode: "persistent" (correct a source whose segment tracking signal stays
    beyond ``limit`` over at least ``min_cycles`` past cycles) or "off";
    shrinkage_cycles: κ of ψ = n/(n + κ); max_ratio: the ratio A/F is kept
    within [1/max_ratio, max_ratio].
    """

    mode: str = "persistent"
    limit: float = TRACKING_SIGNAL_LIMIT
    min_cycles: int = 3
    window_cycles: int = 6
    shrinkage_cycles: float = 1.0
    max_ratio: float = 2.0
    sources: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        if self.mode not in BIAS_MODES:
            raise InvalidSpec(f"bias mode must be one of {list(BIAS_MODES)}, got {self.mode!r}")
        if not float(self.limit) > 0:
            raise InvalidSpec(f"bias limit must be > 0, got {self.limit!r}")
        if not isinstance(self.min_cycles, int) or isinstance(self.min_cycles, bool) or self.min_cycles < 1:
            raise InvalidSpec(f"bias min_cycles must be a whole number ≥ 1, got {self.min_cycles!r}")
        if not float(self.shrinkage_cycles) >= 0:
            raise InvalidSpec(f"bias shrinkage_cycles must be ≥ 0, got {self.shrinkage_cycles!r}")
        if not isinstance(self.window_cycles, int) or isinstance(self.window_cycles, bool) or \
                self.window_cycles < self.min_cycles:
            raise InvalidSpec(f"bias window_cycles must be a whole number ≥ min_cycles, got {self.window_cycles!r}")
        object.__setattr__(self, "sources", tuple(str(s) for s in self.sources))
        if not float(self.max_ratio) >= 1:
            raise InvalidSpec(f"bias max_ratio must be ≥ 1, got {self.max_ratio!r}")


def cell_sums_from_errors(errors: pd.DataFrame, *, segment_of: np.ndarray) -> pd.DataFrame:
    """[source, cycle, lag, segment, sum_forecast, sum_actual] of a cell-level error table (forecast_errors').

    The same sums the history summary keeps, for callers that hold cell errors.
    """
    frame = pd.DataFrame({"source": errors["source"].astype(object).to_numpy(),
                          "cycle": errors["cycle"].astype(object).to_numpy(), "lag": errors["lag"].to_numpy(int),
                          "segment": np.asarray(segment_of, dtype=object),
                          "sum_forecast": errors["forecast"].to_numpy(float),
                          "sum_actual": errors["actual"].to_numpy(float)})
    return frame.groupby(["source", "cycle", "lag", "segment"], sort=True)[["sum_forecast", "sum_actual"]].sum() \
        .reset_index()


def segment_errors(cell_sums: pd.DataFrame, *, cycle: str, window_cycles: int, sources) -> pd.DataFrame:
    """Each source's segment totals per past cycle and month: [segment, source, cycle, lag, lag_bucket, forecast, actual].

    ``cell_sums``: [source, cycle, lag, segment, sum_forecast, sum_actual, …]
    (one row per source, cycle, lag and segment; a lag of a cycle is one
    month).  Only cycles C − window … C − 1 are kept.
    """
    if cell_sums is None or cell_sums.empty:
        return _segment_totals(pd.DataFrame(columns=["segment", "source", "cycle", "lag", "sum_forecast",
                                                     "sum_actual"]), sources, by=[])
    now = month_index(cycle)
    index = month_indexes_factorized(cell_sums["cycle"])
    return _segment_totals(cell_sums[(index >= now - window_cycles) & (index <= now - 1)], sources, by=[])


def _segment_totals(frame: pd.DataFrame, sources, *, by: list[str]) -> pd.DataFrame:
    columns = [*by, "segment", "source", "cycle", "lag", "lag_bucket", "forecast", "actual"]
    frame = frame[frame["source"].isin([str(s) for s in sources])]
    if frame.empty:
        return pd.DataFrame(columns=columns)
    out = frame.groupby([*by, "segment", "source", "cycle", "lag"], sort=True)[["sum_forecast", "sum_actual"]].sum()
    out = out.reset_index().rename(columns={"sum_forecast": "forecast", "sum_actual": "actual"})
    out["lag_bucket"] = lag_bucket_labels(out["lag"].to_numpy())
    return out[columns]


def _signal(frame: pd.DataFrame, keys: list[str]) -> pd.DataFrame:
    parts = frame.assign(error=frame["actual"] - frame["forecast"])
    parts["abs"] = parts["error"].abs()
    grouped = parts.groupby(keys, sort=True)
    out = pd.DataFrame({"sum_err": grouped["error"].sum(), "sum_abs": grouped["abs"].sum(),
                        "n_errors": grouped.size(), "n_cycles": grouped["cycle"].nunique(),
                        "sum_actual": grouped["actual"].sum(), "sum_forecast": grouped["forecast"].sum()})
    mad = out["sum_abs"] / out["n_errors"]
    out["tracking_signal"] = np.where(mad > 0, out["sum_err"] / mad.where(mad > 0, 1.0), 0.0)
    out["ratio"] = np.where(out["sum_forecast"] > 0, out["sum_actual"] / out["sum_forecast"].where(
        out["sum_forecast"] > 0, 1.0), 1.0)
    return out.reset_index()


def _recent_agreement(errors: pd.DataFrame, cycles: int, by: list[str]) -> pd.DataFrame:
    """Per (segment, source): the sign every one of the newest ``cycles`` cycles' summed errors shares (0 if not)."""
    keys = [*by, "segment", "source"]
    if errors.empty:
        return pd.DataFrame(columns=[*keys, "recent_sign"])
    per_cycle = errors.assign(error=errors["actual"] - errors["forecast"]).groupby(
        [*keys, "cycle"], sort=True)["error"].sum().reset_index()
    newest = per_cycle.groupby(keys, sort=False).tail(cycles)
    signs = np.sign(newest["error"])
    grouped = signs.groupby([newest[k] for k in keys])
    shared = (grouped.min() == grouped.max()) & (grouped.size() >= cycles)
    out = (grouped.first() * shared).rename("recent_sign").reset_index()
    return out


def persistent_bias(cell_sums: pd.DataFrame, *, cycle: str, window_cycles: int, segments, sources,
                    spec: BiasSpec, describe: bool = True) -> pd.DataFrame:
    """The correction factor of every (segment, lag bucket, source): 1 unless the bias is persistent.

    Formulas in the module docstring.  Every segment in ``segments`` × lag
    bucket × source gets a row; ``note`` says in words what was found (left
    empty with ``describe=False``, for a caller that reads only the factors).
    Returns :data:`BIAS_COLUMNS`.
    """
    if not isinstance(spec, BiasSpec):
        raise InvalidSpec("spec must be a BiasSpec")
    sources = sorted(dict.fromkeys(str(s) for s in sources))
    errors = segment_errors(cell_sums, cycle=cycle, window_cycles=min(window_cycles, spec.window_cycles),
                            sources=sources)
    segments = sorted(set(str(s) for s in segments) | set(errors["segment"].astype(str)))
    table = _judge(errors, pd.DataFrame(index=[0]), segments, sources, spec, by=[])
    table["note"] = _describe(table, spec, table["_own"].to_numpy()) if describe else ""
    return table[BIAS_COLUMNS].sort_values(["segment", "lag_bucket", "source"], kind="mergesort",
                                           ignore_index=True)


def _judge(errors: pd.DataFrame, cases: pd.DataFrame, segments: list[str], sources: list[str], spec: BiasSpec, *,
           by: list[str]) -> pd.DataFrame:
    """The bias table of every case (a row of ``cases``, keyed by ``by``) × segment × lag bucket × source.

    ``errors``: :func:`segment_errors` rows, with the ``by`` columns saying which case each belongs to; one
    case and ``by=[]`` is :func:`persistent_bias`, one case per past cycle is :func:`factors_as_known`.
    """
    buckets = [label for label, _, _ in DEFAULT_LAG_BUCKETS]
    grid = pd.MultiIndex.from_product([segments, buckets, sources], names=["segment", "lag_bucket", "source"]) \
        .to_frame(index=False)
    grid = cases[by].merge(grid, how="cross") if by else grid
    pooled = _signal(errors, [*by, "segment", "source"]) if len(errors) else pd.DataFrame(
        columns=[*by, "segment", "source", "tracking_signal", "n_errors", "n_cycles", "ratio"])
    by_bucket = _signal(errors, [*by, "segment", "lag_bucket", "source"]) if len(errors) else pd.DataFrame(
        columns=[*by, "segment", "lag_bucket", "source", "n_cycles", "ratio"])
    table = grid.merge(pooled[[*by, "segment", "source", "tracking_signal", "n_errors", "n_cycles", "ratio"]],
                       on=[*by, "segment", "source"], how="left")
    table = table.merge(by_bucket[[*by, "segment", "lag_bucket", "source", "n_cycles", "ratio"]].rename(
        columns={"n_cycles": "bucket_cycles", "ratio": "bucket_ratio"}), on=[*by, "segment", "lag_bucket", "source"],
        how="left")
    for column in ("n_errors", "n_cycles", "bucket_cycles"):
        table[column] = table[column].fillna(0).astype(int)
    table["tracking_signal"] = table["tracking_signal"].astype(float).fillna(0.0)
    enough = table["n_cycles"] >= spec.min_cycles
    table = table.merge(_recent_agreement(errors, spec.min_cycles, by), on=[*by, "segment", "source"], how="left")
    agrees = np.sign(table["recent_sign"].astype(float).fillna(0.0)) == np.sign(table["tracking_signal"])
    eligible = table["source"].isin(spec.sources) if spec.sources else True
    table["persistent"] = (spec.mode == "persistent") & enough & agrees & eligible & \
        (table["tracking_signal"].abs() > float(spec.limit))
    own = table["bucket_cycles"] >= spec.min_cycles
    ratio = np.where(own, table["bucket_ratio"].astype(float), table["ratio"].astype(float))
    ratio = np.clip(np.nan_to_num(ratio, nan=1.0), 1.0 / float(spec.max_ratio), float(spec.max_ratio))
    n = np.where(own, table["bucket_cycles"], table["n_cycles"]).astype(float)
    kappa = float(spec.shrinkage_cycles)
    psi = n / (n + kappa) if kappa > 0 else np.ones(len(table))
    table["ratio"] = ratio
    table["psi"] = np.where(table["persistent"], psi, 0.0)
    table["factor"] = np.where(table["persistent"], 1.0 + table["psi"] * (ratio - 1.0), 1.0)
    table["_own"] = own
    return table


def _describe(table: pd.DataFrame, spec: BiasSpec, own: np.ndarray) -> np.ndarray:
    ts = table["tracking_signal"].map("{:+.1f}".format)
    cycles = table["n_cycles"].astype(str)
    direction = np.where(table["ratio"] < 1, "high", "low")
    basis = np.where(own, "its lag bucket", "all lags")
    corrected = ("forecast " + pd.Series(direction, index=table.index) + " in every cycle: tracking signal " + ts
                 + f" beyond ±{float(spec.limit):g} over " + cycles + " cycles; scaled by "
                 + table["factor"].map("{:.3f}".format) + " (actual/forecast " + table["ratio"].map("{:.3f}".format)
                 + " over " + pd.Series(basis, index=table.index) + ", ψ " + table["psi"].map("{:.2f}".format) + ")")
    within = "tracking signal " + ts + " over " + cycles + f" cycles, within ±{float(spec.limit):g}: not corrected"
    short = "errors from " + cycles + f" cycle(s), fewer than {spec.min_cycles}: not corrected"
    off = pd.Series("bias correction off", index=table.index)
    enough = table["n_cycles"] >= spec.min_cycles
    note = np.where(table["persistent"], corrected, np.where(enough, within, short))
    return np.where(spec.mode == "off", off, note).astype(object)


def correct_sources(rows: pd.DataFrame, factors: pd.DataFrame, *, segment_of: np.ndarray) -> pd.DataFrame:
    """Rows [source, item, location, period, lag, quantity] with each quantity scaled by its factor.

    ``segment_of``: the segment label of each row (as
    :func:`consensus.methods.weights.assign_segments` gives it).  Adds
    ``bias_factor`` (1 where nothing was corrected).
    """
    keyed = pd.DataFrame({"segment": np.asarray(segment_of, dtype=object),
                          "lag_bucket": lag_bucket_labels(rows["lag"].to_numpy()),
                          "source": rows["source"].astype(object).to_numpy()})
    found = keyed.merge(factors[["segment", "lag_bucket", "source", "factor"]], on=["segment", "lag_bucket", "source"],
                        how="left")["factor"].fillna(1.0).to_numpy(float)
    return rows.assign(quantity=rows["quantity"].to_numpy(float) * found, bias_factor=found)


def factors_as_known(cell_sums: pd.DataFrame, *, cycle: str, window_cycles: int, segments, sources,
                     spec: BiasSpec) -> pd.DataFrame:
    """The factor each past cycle of the window would have applied: [cycle, segment, lag_bucket, source, factor].

    For past cycle c the bias is judged from the errors known at c (months ≤
    c), exactly as a run at c would judge it (:func:`persistent_bias`), so the
    corrected past errors the weights read are out of sample: a correction
    gets no credit for fitting the very errors it is scored on.  All past
    cycles are judged in one pass, each as a case of its own.
    """
    columns = ["cycle", "segment", "lag_bucket", "source", "factor"]
    if cell_sums is None or cell_sums.empty or spec.mode == "off":
        return pd.DataFrame(columns=columns)
    now = month_index(cycle)
    sources = sorted(dict.fromkeys(str(s) for s in sources))
    cycle_index = month_indexes_factorized(cell_sums["cycle"])
    period = cycle_index + cell_sums["lag"].to_numpy(int)
    past = sorted(c for c in set(cell_sums["cycle"].astype(str)) if now - window_cycles <= month_index(c) <= now - 1)
    if not past:
        return pd.DataFrame(columns=columns)
    reach = min(window_cycles, spec.window_cycles)
    rows, cases = [], []
    for name in past:  # one selection per past cycle; the judging below is one vectorised pass
        index = month_index(name)
        mine = (period <= index) & (cycle_index >= index - reach) & (cycle_index <= index - 1)
        rows.append(np.flatnonzero(mine))
        cases.append(np.full(int(mine.sum()), name, dtype=object))
    taken = np.concatenate(rows)
    known = cell_sums.iloc[taken].assign(as_of=np.concatenate(cases))
    errors = _segment_totals(known, sources, by=["as_of"])
    every = sorted(set(str(s) for s in segments) | set(errors["segment"].astype(str)))
    table = _judge(errors, pd.DataFrame({"as_of": past}), every, sources, spec, by=["as_of"])
    table = table[table["persistent"]].rename(columns={"as_of": "cycle"})
    return table.sort_values(columns[:4], kind="mergesort")[columns].reset_index(drop=True)


def segment_weight_sums(cell_sums: pd.DataFrame, factors: pd.DataFrame | None, *, cycle: str, window_cycles: int,
                        sources) -> pd.DataFrame:
    """Per-cycle error sums of each source's segment totals, relative to the segment's actual, for the weights.

    One error per (segment, source, cycle, month): e = (A − k·F) / A with
    k the factor cycle c applied (``factors``: [cycle, segment, lag_bucket,
    source, factor] from :func:`factors_as_known`; 1 where none), so a
    source is weighed by how well its corrected totals hit the segment's
    demand, the number the family plan is read at.  Relative, because
    sources cover different cells of a segment (a DC with a short horizon).
    Returns :data:`consensus.methods.weights.SUM_COLUMNS` for
    :func:`consensus.methods.weights.estimate_weights_from_sums`.
    """
    errors = segment_errors(cell_sums, cycle=cycle, window_cycles=window_cycles, sources=sources)
    columns = ["segment", "lag_bucket", "source", "cycle", "n", "sum_abs", "sum_sq", "sum_err"]
    errors = errors[errors["actual"] > 0]
    if errors.empty:
        return pd.DataFrame({c: pd.Series(dtype=object if c in columns[:4] else float) for c in columns})
    if factors is not None and len(factors):
        k = errors.merge(factors[["cycle", "segment", "lag_bucket", "source", "factor"]],
                         on=["cycle", "segment", "lag_bucket", "source"], how="left")["factor"].fillna(1.0) \
            .to_numpy(float)
    else:
        k = np.ones(len(errors))
    relative = (errors["actual"].to_numpy(float) - k * errors["forecast"].to_numpy(float)) / \
        errors["actual"].to_numpy(float)
    parts = errors[["segment", "lag_bucket", "source", "cycle"]].assign(
        n=1, sum_abs=np.abs(relative), sum_sq=relative * relative, sum_err=relative)
    return parts.groupby(columns[:4], sort=True)[columns[4:]].sum().reset_index()[columns]
