"""The scorecards a run stores: every source's accuracy at every level, by lag bucket, from its history summary.

Reads :class:`consensus.methods.history.HistorySummary` and gives the tables
that ``consensus scorecard`` and the pack print, so neither ever measures
again.  Measures are those of :mod:`consensus.methods.accuracy` (MAD, MSE,
RMSE, MAPE, WAPE, bias, bias %, tracking signal, MASE), computed from sums:

* item × location: every cell's error pooled; the tracking signal is the
  mean of each series' own signal (one running sum over thousands of series
  would grow with their number); MASE is the mean scaled error, each error
  divided by its series' in-sample seasonal naive MAE (Hyndman & Koehler 2006);
* family × region, family, region, location, total: each group's forecast is
  the sum of its cells, scored against the sum of their orders; pooled rows
  pool those group errors, with the mean of the groups' signals;
* by demand pattern (smooth, erratic, intermittent, lumpy): item × location
  errors of the series of each pattern, so slow items are read against their
  own scale rather than a WAPE that is usually above 100% for them.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from consensus.methods.accuracy import TRACKING_SIGNAL_LIMIT, _measures_from_sums, seasonal_naive_scale
from consensus.methods.history import UPPER_LEVELS, HistorySummary
from consensus.periods import lag_bucket_labels

MEASURE_COLUMNS = ["n", "n_zero_actual", "mad", "mse", "rmse", "mape", "wape", "bias", "bias_pct", "tracking_signal",
                   "ts_flag", "mase"]
#: The levels every scorecard reports, finest first.
LEVELS = ("item", "family_region", "family", "region", "location", "total")
_LEVEL_KEYS = {"family_region": ("family", "region"), "family": ("family",), "region": ("region",),
               "location": ("location",), "total": ()}


def _measures(sums: pd.DataFrame) -> pd.DataFrame:
    frame = sums.assign(n_zero_actual=sums["n_zero"], n_nonzero=sums["n"] - sums["n_zero"])
    return _measures_from_sums(frame)


def _item_level(summary: HistorySummary) -> pd.DataFrame:
    sums = summary.cell_sums
    if sums.empty:
        return pd.DataFrame(columns=["level", "source", "lag_bucket", *MEASURE_COLUMNS])
    pooled = sums.groupby(["source", "lag_bucket"], sort=True)[
        ["n", "n_zero", "sum_abs", "sum_sq", "sum_err", "sum_actual", "sum_ape", "sum_scaled", "n_scaled"]].sum()
    table = _measures(pooled).reset_index()
    scaled = pooled.reset_index()
    table["mase"] = np.where(scaled["n_scaled"] > 0, scaled["sum_scaled"] / scaled["n_scaled"].where(
        scaled["n_scaled"] > 0, 1), np.nan)
    signals = summary.cell_signals.set_index(["source", "lag_bucket"])["mean_tracking_signal"]
    keys = pd.MultiIndex.from_frame(table[["source", "lag_bucket"]])
    table["tracking_signal"] = signals.reindex(keys).to_numpy()
    table["ts_flag"] = np.abs(table["tracking_signal"]) > TRACKING_SIGNAL_LIMIT
    return table.assign(level="item")[["level", "source", "lag_bucket", *MEASURE_COLUMNS]]


def _node_scale(actuals: pd.DataFrame, level: str, items: pd.DataFrame, locations: pd.DataFrame) -> pd.DataFrame:
    """Each node's MASE scale, keyed like the node errors (node_item, node_location)."""
    keys = _LEVEL_KEYS[level]
    scale = seasonal_naive_scale(actuals, level=level, items=items, locations=locations)
    item_side, location_side = UPPER_LEVELS[level]
    node_item = scale[item_side] if item_side != "all" else pd.Series("all", index=scale.index)
    node_location = scale[location_side] if location_side != "all" else pd.Series("all", index=scale.index)
    if not keys:
        node_item = pd.Series(["all"] * len(scale))
        node_location = pd.Series(["all"] * len(scale))
    return pd.DataFrame({"node_item": node_item.astype(object).to_numpy(),
                         "node_location": node_location.astype(object).to_numpy(),
                         "scale": scale["scale"].to_numpy(float)})


def _upper_levels(summary: HistorySummary, *, items, locations, actuals) -> tuple[pd.DataFrame, pd.DataFrame]:
    nodes = summary.node_errors
    group_rows, pooled_rows = [], []
    if nodes.empty:
        return (pd.DataFrame(columns=["level", "source", "lag_bucket", "node_item", "node_location",
                                      *MEASURE_COLUMNS, "sum_actual"]),
                pd.DataFrame(columns=["level", "source", "lag_bucket", *MEASURE_COLUMNS]))
    for level, frame in nodes.groupby("level", sort=False):
        e = frame["actual"].to_numpy(float) - frame["forecast"].to_numpy(float)
        a = frame["actual"].to_numpy(float)
        scale = frame[["node_item", "node_location"]].merge(_node_scale(actuals, level, items, locations),
                                                            on=["node_item", "node_location"], how="left")["scale"]
        scale = scale.to_numpy(float)
        ok = np.isfinite(scale) & (scale > 0)
        nonzero = a != 0
        parts = pd.DataFrame({
            "source": frame["source"].to_numpy(), "lag_bucket": lag_bucket_labels(frame["lag"].to_numpy()),
            "node_item": frame["node_item"].to_numpy(), "node_location": frame["node_location"].to_numpy(),
            "n": 1, "n_zero": (~nonzero).astype(int), "sum_abs": np.abs(e), "sum_sq": e * e, "sum_err": e,
            "sum_actual": a, "sum_ape": np.where(nonzero, np.abs(e) / np.where(nonzero, np.abs(a), 1.0), 0.0),
            "sum_scaled": np.where(ok, np.abs(e) / np.where(ok, scale, 1.0), 0.0), "n_scaled": ok.astype(int)})
        keys = ["source", "lag_bucket", "node_item", "node_location"]
        sums = parts.groupby(keys, sort=True)[["n", "n_zero", "sum_abs", "sum_sq", "sum_err", "sum_actual",
                                              "sum_ape", "sum_scaled", "n_scaled"]].sum()
        groups = _measures(sums).reset_index()
        flat = sums.reset_index()
        groups["sum_actual"] = flat["sum_actual"].to_numpy()  # so pooling groups never has to recover it
        groups["mase"] = np.where(flat["n_scaled"] > 0, flat["sum_scaled"] / flat["n_scaled"].where(
            flat["n_scaled"] > 0, 1), np.nan)
        group_rows.append(groups.assign(level=level))
        pooled_sums = sums.groupby(["source", "lag_bucket"], sort=True).sum()
        pooled = _measures(pooled_sums).reset_index()
        flat_pooled = pooled_sums.reset_index()
        pooled["mase"] = np.where(flat_pooled["n_scaled"] > 0, flat_pooled["sum_scaled"] /
                                  flat_pooled["n_scaled"].where(flat_pooled["n_scaled"] > 0, 1), np.nan)
        mean_signal = groups.groupby(["source", "lag_bucket"], sort=True)["tracking_signal"].mean()
        pooled["tracking_signal"] = mean_signal.reindex(pd.MultiIndex.from_frame(
            pooled[["source", "lag_bucket"]])).to_numpy()
        pooled["ts_flag"] = np.abs(pooled["tracking_signal"]) > TRACKING_SIGNAL_LIMIT
        pooled_rows.append(pooled.assign(level=level))
    groups = pd.concat(group_rows, ignore_index=True)[["level", "source", "lag_bucket", "node_item", "node_location",
                                                        *MEASURE_COLUMNS, "sum_actual"]]
    pooled = pd.concat(pooled_rows, ignore_index=True)[["level", "source", "lag_bucket", *MEASURE_COLUMNS]]
    return groups, pooled


def _history(summary: HistorySummary) -> pd.DataFrame:
    """WAPE and bias % of each source in each past cycle, at item × location and at the upper levels."""
    rows = []
    cells = summary.history
    if len(cells):
        item = cells.groupby(["source", "cycle"], sort=True)[["sum_abs", "sum_err", "sum_actual"]].sum().reset_index()
        rows.append(item.assign(level="item"))
    nodes = summary.node_errors
    if len(nodes):
        e = nodes["actual"] - nodes["forecast"]
        upper = nodes.assign(sum_abs=e.abs(), sum_err=e, sum_actual=nodes["actual"]).groupby(
            ["level", "source", "cycle"], sort=True)[["sum_abs", "sum_err", "sum_actual"]].sum().reset_index()
        rows.append(upper)
    if not rows:
        return pd.DataFrame(columns=["level", "source", "cycle", "wape", "bias_pct"])
    out = pd.concat(rows, ignore_index=True)
    positive = out["sum_actual"].where(out["sum_actual"] > 0)
    out["wape"] = 100 * out["sum_abs"] / positive
    out["bias_pct"] = 100 * out["sum_err"] / positive
    return out[["level", "source", "cycle", "wape", "bias_pct"]]


def _patterns(summary: HistorySummary) -> pd.DataFrame:
    sums = summary.pattern_sums
    if sums.empty:
        return pd.DataFrame(columns=["pattern", "source", "lag_bucket", "n", "wape", "mase", "bias_pct"])
    rows = []
    for by in (["pattern", "source", "lag_bucket"], ["pattern", "source"]):
        grouped = sums.groupby(by, sort=True)[["n", "sum_abs", "sum_err", "sum_actual", "sum_scaled", "n_scaled"]].sum()
        grouped = grouped.reset_index()
        if "lag_bucket" not in by:
            grouped["lag_bucket"] = "all"
        rows.append(grouped)
    out = pd.concat(rows, ignore_index=True)
    positive = out["sum_actual"].where(out["sum_actual"] > 0)
    out["wape"] = 100 * out["sum_abs"] / positive
    out["bias_pct"] = 100 * out["sum_err"] / positive
    out["mase"] = out["sum_scaled"] / out["n_scaled"].where(out["n_scaled"] > 0)
    return out[["pattern", "source", "lag_bucket", "n", "wape", "mase", "bias_pct"]]


def _fva(summary: HistorySummary) -> pd.DataFrame:
    fva = summary.fva
    if fva.empty:
        return pd.DataFrame(columns=["step", "wape", "n"])
    from consensus.methods.history import FVA_STEPS

    out = fva.groupby("step", sort=False)[["sum_abs", "sum_actual", "n"]].sum()
    out["wape"] = 100 * out["sum_abs"] / out["sum_actual"].where(out["sum_actual"] > 0)
    out = out.reindex([s for s in FVA_STEPS if s in out.index])
    return out.reset_index()[["step", "wape", "n"]]


def _uplift(summary: HistorySummary) -> pd.DataFrame:
    """Did marketing's events make the statistical forecast better?  Gains are without − with (positive helps)."""
    frame = summary.uplift
    columns = ["lag_bucket", "n_cells", "mad_without", "mad_with", "mad_gain", "wape_without", "wape_with",
               "wape_gain", "value_added"]
    if frame.empty:
        return pd.DataFrame(columns=columns)
    from consensus.methods.history import BUCKETS

    labelled = frame.assign(lag_bucket=np.asarray(BUCKETS, dtype=object)[frame["bucket"].to_numpy(int)])
    both = pd.concat([labelled, labelled.assign(lag_bucket="all")], ignore_index=True)
    grouped = both.groupby("lag_bucket", sort=True)
    out = pd.DataFrame({"n_cells": grouped.size(), "mad_without": grouped["abs_without"].mean(),
                        "mad_with": grouped["abs_with"].mean(), "sum_without": grouped["abs_without"].sum(),
                        "sum_with": grouped["abs_with"].sum(), "sum_actual": grouped["actual"].sum()})
    out["mad_gain"] = out["mad_without"] - out["mad_with"]
    positive = out["sum_actual"].where(out["sum_actual"] != 0)
    out["wape_without"] = 100 * out["sum_without"] / positive
    out["wape_with"] = 100 * out["sum_with"] / positive
    out["wape_gain"] = out["wape_without"] - out["wape_with"]
    out["value_added"] = out["mad_gain"] > 0
    return out.reset_index()[columns]


def _coverage(summary: HistorySummary) -> pd.DataFrame:
    frame = summary.coverage
    columns = ["level", "lag_bucket", "nominal", "coverage", "winkler", "n"]
    if frame.empty:
        return pd.DataFrame(columns=columns)
    both = pd.concat([frame, frame.assign(lag_bucket="all")], ignore_index=True)
    grouped = both.groupby(["level", "lag_bucket", "nominal"], sort=True)
    out = pd.DataFrame({"coverage": grouped["hit"].mean(), "winkler": grouped["winkler"].mean(),
                        "n": grouped["n"].sum()}).reset_index()
    return out[columns]


def scorecards(summary: HistorySummary, *, items: pd.DataFrame, locations: pd.DataFrame,
               actuals: pd.DataFrame) -> dict[str, pd.DataFrame]:
    """Every table a run stores about the past: accuracy by level and group, history, patterns, FVA, coverage."""
    groups, pooled_upper = _upper_levels(summary, items=items, locations=locations,
                                         actuals=actuals[actuals["quantity"].notna()])
    pooled = pd.concat([_item_level(summary), pooled_upper], ignore_index=True)
    pooled["ts_flag"] = pooled["ts_flag"].astype(bool)
    groups["ts_flag"] = groups["ts_flag"].astype(bool)
    return {"accuracy": pooled, "accuracy_groups": groups, "accuracy_history": _history(summary),
            "accuracy_patterns": _patterns(summary), "fva": _fva(summary), "uplift": _uplift(summary),
            "band_coverage": _coverage(summary)}
