"""Reconcile a run's consensus across the item × location hierarchy, with base forecasts made at every level.

The combination (:mod:`consensus.methods.combine`) works at planning grain,
item × location × month, after family or region numbers were split down by
historical mix; summing that is bottom-up.  Here every upper node of the
hierarchy (:func:`consensus.methods.reconcile.summing_matrix`: item → family →
all crossed with location → region → all) gets a base forecast of its own,
made the same way as the planning-grain consensus but at the node's grain:

* each source's number for a node is the sum of its cells there, where a
  source that is missing from some of the node's cells has the cell
  consensus stand in for them (the rule of
  :func:`consensus.methods.combine.family_disagreement`); a source with no cell
  in the node that month is not in the node's combination;
* each source's weight for a node is estimated by
  :func:`consensus.methods.weights.estimate_weights` from its past errors
  summed to the same level (forecast and actual summed over the cells it
  covered), so sales, who plan family × region, are judged on their family ×
  region totals and not on the mix split that made their item numbers.

Why every level, not only family × region: MinT uses the covariance of the
base errors of all nodes, and a node whose base is just the sum of its cells
carries no information a projection could use.  The bottom base is the
planning-grain consensus as combined.

Methods (:data:`RECONCILIATION_METHODS`), all per month, all months at once:

* ``bottom_up``: the planning-grain consensus unchanged; totals are sums.
* ``top_down_hist_avg`` / ``top_down_prop_avg``: the total node's base split
  down by historical proportions of the last ``history_months`` months of
  actuals, average of proportions or proportion of averages (Gross & Sohl,
  1990, J. Forecasting 9:233–254, methods A and F).
* ``mint_shrink``: ỹ = S(S′W⁻¹S)⁻¹S′W⁻¹ŷ with W the Schäfer–Strimmer shrunk
  covariance of the base errors (Wickramasuriya, Athanasopoulos & Hyndman,
  2019, JASA 114:804–819), one W per lag bucket.  The base errors are
  in-sample: for each past cycle of the weight window and each node, the
  sources' node-level errors combined with the node's current weights,
  e_node = Σ_i w_i (e_i − b_i) / Σ_i w_i over the sources present (b_i the
  bias correction when the spec applies one).  One sample is one (cycle,
  period) pair; a node with no scored error in a sample counts 0 there (a
  node with no scored history at all, a new item, is then read as nearly
  certain: its plan stays as combined and its family absorbs the rest).
  The run's own past consensus errors are not used, because they are errors
  of the summed bottom, not of each node's own base.

Negative results are clipped to 0 and the hierarchy rebuilt from the clipped
bottom (:func:`consensus.methods.reconcile.reconcile`), so the output stays
coherent.  The reconciled bottom replaces ``consensus``; the combined number
is kept as ``before_reconciliation`` with ``reconciliation_adjustment`` =
reconciled − combined and a per-cell ``reconciliation_note``, so each number
still reads as "contributions of the sources + the reconciliation's move".

The default method is chosen by backtest (bench/bench_backtest.py); the
figures are in the closing notes of the issues that set it, not in the run.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from consensus import periods
from consensus.errors import InvalidSpec
from consensus.methods import reconcile as hierarchy
from consensus.methods.combine import combine_sources
from consensus.methods.weights import WeightSpec, assign_segments, estimate_weights

RECONCILIATION_METHODS = ("bottom_up", "top_down_hist_avg", "top_down_prop_avg", "mint_shrink")
DEFAULT_RECONCILIATION = "bottom_up"
CELL = ["item", "location", "period"]
NODE_FRAME_COLUMNS = ["level", "family", "region", "item", "location", "period", "base", "reconciled"]
ADJUSTMENT_COLUMNS = ["item", "location", "period", "before_reconciliation", "reconciliation_adjustment",
                      "reconciliation_note"]

_ALL = "all"
#: Changes smaller than this many units are rounding, not a reconciliation move.
_UNCHANGED_UNITS = 1e-9


@dataclass(frozen=True)
class ReconciledHierarchy:
    """The result of :func:`reconcile_hierarchy`.

    consensus: the input table with ``consensus`` reconciled and the columns
    before_reconciliation, reconciliation_adjustment, reconciliation_note;
    nodes: [level, family, region, item, location, period, base, reconciled],
    one row per node and month, so coherence can be checked and base forecasts
    read; notes: JSON-safe method notes for the run.
    """

    consensus: pd.DataFrame
    nodes: pd.DataFrame
    notes: dict


def reconcile_consensus(table: pd.DataFrame, current: pd.DataFrame, errors: pd.DataFrame, *, items: pd.DataFrame,
                        locations: pd.DataFrame, method: str, weight_spec: WeightSpec, cycle: str,
                        actuals: pd.DataFrame | None = None, history_months: int = 12
                        ) -> tuple[pd.DataFrame, dict]:
    """The run's consensus table reconciled by ``method``, and the notes to store with the run.

    See :func:`reconcile_hierarchy` (this returns its ``consensus`` and ``notes``).
    """
    result = reconcile_hierarchy(table, current, errors, items=items, locations=locations, method=method,
                                 weight_spec=weight_spec, cycle=cycle, actuals=actuals,
                                 history_months=history_months)
    return result.consensus, result.notes


def reconcile_hierarchy(table: pd.DataFrame, current: pd.DataFrame, errors: pd.DataFrame, *, items: pd.DataFrame,
                        locations: pd.DataFrame, method: str, weight_spec: WeightSpec, cycle: str,
                        actuals: pd.DataFrame | None = None, history_months: int = 12) -> ReconciledHierarchy:
    """Base forecasts at every node of the hierarchy, reconciled by ``method``; formulas in the module docstring.

    table: the combined consensus at planning grain (``Combination.consensus``);
    current: the cycle's aligned sources [source, cycle, item, location,
    period, lag, quantity]; errors: past errors
    (:func:`consensus.methods.accuracy.forecast_errors`); actuals: order
    history [item, location, period, quantity], needed by the top-down
    methods (only months ≤ ``cycle`` are used).
    """
    if method not in RECONCILIATION_METHODS:
        raise InvalidSpec(f"reconciliation must be one of {', '.join(RECONCILIATION_METHODS)}, got {method!r}")
    if not isinstance(weight_spec, WeightSpec):
        raise InvalidSpec("weight_spec must be a WeightSpec")
    if not isinstance(history_months, (int, np.integer)) or history_months < 1:
        raise InvalidSpec(f"history_months must be a whole number ≥ 1, got {history_months!r}")
    table = table.reset_index(drop=True)
    notes: dict = {"method": method, "default": DEFAULT_RECONCILIATION}
    bottom_keys = table[["item", "location"]].drop_duplicates().sort_values(["item", "location"], kind="mergesort")
    S, node_labels = hierarchy.summing_matrix(bottom_keys, items=items, locations=locations)
    months = sorted(table["period"].astype(str).unique())
    bottom_base = _bottom_matrix(table, bottom_keys, months)

    if method == "bottom_up":
        # No upper base is needed: the sums of the cells are the answer, exactly.
        base = S @ bottom_base
        reconciled_bottom = bottom_base
        notes["text"] = ("bottom_up: the plan is made at item × location × month and every total is the sum "
                         "of its cells.")
    else:
        level_bases = _level_bases(table, current, errors, items=items, locations=locations, spec=weight_spec,
                                   cycle=cycle, with_residuals=method == "mint_shrink")
        base = _base_matrix(node_labels, bottom_base, months, level_bases)
        if method == "mint_shrink":
            full, mint_notes = _reconcile_mint(base, S, node_labels, months, level_bases, cycle=cycle)
            notes.update(mint_notes)
        else:
            history = _history_matrix(actuals, bottom_keys, cycle=cycle, months=history_months, method=method)
            full = hierarchy.reconcile(base, S, method=method, history=history, nonnegative=True)
            split = ("average of monthly proportions" if method == "top_down_hist_avg"
                     else "proportion of average demand")
            notes["text"] = (f"{method}: the total's own combination of the sources, split to cells by the "
                             f"{split} over the last {history_months} months (Gross & Sohl, 1990).")
        reconciled_bottom = full[-S.shape[1]:]
        notes["base_levels"] = sorted(level_bases)
        notes["base_rule"] = ("each upper node's base combines the sources summed to it, weighted by their "
                              "errors summed to its level; a source missing from some cells of a node has the "
                              "cell consensus stand in for them")
    full = S @ reconciled_bottom
    notes["coherent"] = bool(hierarchy.is_coherent(full, S))
    out = _write_back(table, bottom_keys, months, reconciled_bottom, method)
    changed = out["reconciliation_adjustment"].abs() > _UNCHANGED_UNITS
    notes["cells_changed"] = int(changed.sum())
    notes["total_absolute_adjustment"] = float(out["reconciliation_adjustment"].abs().sum())
    notes["total_before"] = float(out["before_reconciliation"].sum())
    notes["total_after"] = float(out["consensus"].sum())
    nodes = _node_frame(node_labels, months, base, full)
    return ReconciledHierarchy(out, nodes, notes)


def _bottom_matrix(table: pd.DataFrame, bottom_keys: pd.DataFrame, months: list[str]) -> np.ndarray:
    """Consensus as bottom series × months in the order of S (a cell the table lacks counts 0)."""
    wide = table.pivot_table(index=["item", "location"], columns="period", values="consensus", aggfunc="sum",
                             sort=True)
    index = pd.MultiIndex.from_frame(bottom_keys)
    return wide.reindex(index=index, columns=months).fillna(0.0).to_numpy(float)


def _attach_hierarchy(frame: pd.DataFrame, items: pd.DataFrame, locations: pd.DataFrame) -> pd.DataFrame:
    family = items.drop_duplicates("item").set_index("item")["family"]
    region = locations.drop_duplicates("location").set_index("location")["region"]
    return frame.assign(family=frame["item"].map(family).fillna("(unknown family)").astype(object),
                        region=frame["location"].map(region).fillna("(unknown region)").astype(object))


def _node_keys(frame: pd.DataFrame, level: tuple[str, str]) -> tuple[np.ndarray, np.ndarray]:
    """Each row's node at ``level`` as (item-side key, location-side key); "all" on a summed side."""
    item_side, location_side = level
    node_item = (frame[item_side].astype(object).to_numpy() if item_side != _ALL
                 else np.full(len(frame), _ALL, dtype=object))
    node_location = (frame[location_side].astype(object).to_numpy() if location_side != _ALL
                     else np.full(len(frame), _ALL, dtype=object))
    return node_item, node_location


def _level_masters(frame: pd.DataFrame, level: tuple[str, str]) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Masters in which a level's nodes are the 'items' and 'locations', so weights and combination run unchanged."""
    item_side, location_side = level
    pairs = frame[["family", "region"]].assign(_i=frame["_node_item"], _l=frame["_node_location"])
    level_items = pairs[["_i", "family"]].drop_duplicates("_i").rename(columns={"_i": "item"})
    if item_side == _ALL:
        level_items = level_items.assign(family=_ALL)
    level_locations = pairs[["_l", "region"]].drop_duplicates("_l").rename(columns={"_l": "location"})
    if location_side == _ALL:
        level_locations = level_locations.assign(region=_ALL)
    return level_items.reset_index(drop=True), level_locations.reset_index(drop=True)


def _with_node_keys(frame: pd.DataFrame, level) -> pd.DataFrame:
    node_item, node_location = _node_keys(frame, level)
    return frame.assign(_node_item=node_item, _node_location=node_location)


def _source_node_sums(current: pd.DataFrame, cells: pd.DataFrame) -> pd.DataFrame:
    """Each source's number per node × month: its cells, plus the consensus of the node's cells it lacks."""
    node_cols = ["_node_item", "_node_location", "period"]
    node_consensus = cells.groupby(node_cols, sort=True)["consensus"].sum().rename("_node_consensus")
    rows = current.merge(cells[CELL + ["consensus"]], on=CELL, how="inner")
    summed = rows.groupby(["source", *node_cols, "lag"], sort=True).agg(
        quantity=("quantity", "sum"), _covered=("consensus", "sum")).reset_index()
    summed = summed.join(node_consensus, on=node_cols)
    summed["quantity"] = summed["quantity"] + (summed["_node_consensus"] - summed["_covered"])
    return summed.rename(columns={"_node_item": "item", "_node_location": "location"})[
        ["source", "item", "location", "period", "lag", "quantity"]]


def _level_errors(errors: pd.DataFrame) -> pd.DataFrame:
    """Past errors summed to the level: forecast and actual over the cells each source covered."""
    keys = ["source", "cycle", "_node_item", "_node_location", "period", "lag"]
    summed = errors.groupby(keys, sort=True)[["forecast", "actual"]].sum().reset_index()
    summed["error"] = summed["actual"] - summed["forecast"]
    summed["lag_bucket"] = periods.lag_bucket_labels(summed["lag"].to_numpy())
    return summed.rename(columns={"_node_item": "item", "_node_location": "location"})


def _combined_residuals(level_errors: pd.DataFrame, weights: pd.DataFrame, *, spec: WeightSpec,
                        level_items: pd.DataFrame, level_locations: pd.DataFrame) -> pd.DataFrame:
    """In-sample error of the node's combination per past (cycle, period): Σ w_i (e_i − b_i) / Σ w_i."""
    frame = level_errors.assign(segment=assign_segments(level_errors, segment=spec.segment, items=level_items,
                                                        locations=level_locations))
    frame = frame.merge(weights[["segment", "lag_bucket", "source", "weight", "psi", "mean_error"]],
                        on=["segment", "lag_bucket", "source"], how="inner")
    correction = (frame["psi"].fillna(0.0) * frame["mean_error"].fillna(0.0)) if spec.bias_correction else 0.0
    frame = frame.assign(_we=frame["weight"] * (frame["error"] - correction))
    grouped = frame.groupby(["cycle", "item", "location", "period", "lag_bucket"], sort=True)
    out = pd.DataFrame({"_we": grouped["_we"].sum(), "_w": grouped["weight"].sum()}).reset_index()
    out["residual"] = np.where(out["_w"] > 0, out["_we"] / out["_w"].where(out["_w"] > 0, 1.0), 0.0)
    return out.drop(columns=["_we", "_w"])


def _level_bases(table: pd.DataFrame, current: pd.DataFrame, errors: pd.DataFrame, *, items, locations,
                 spec: WeightSpec, cycle: str, with_residuals: bool) -> dict:
    """Per level: its own combination of the sources, and (for MinT) the in-sample residuals of its nodes."""
    cells = _attach_hierarchy(table[CELL + ["consensus"]].astype({"item": object, "location": object,
                                                                  "period": object}), items, locations)
    sources = sorted(current["source"].unique())
    now = periods.month_index(cycle)
    cycle_idx = periods.month_indexes(errors["cycle"]) if len(errors) else np.empty(0, dtype=int)
    period_idx = periods.month_indexes(errors["period"]) if len(errors) else np.empty(0, dtype=int)
    window = (cycle_idx >= now - spec.window_cycles) & (cycle_idx <= now - 1) & (period_idx <= now)
    past = errors.loc[window & errors["source"].isin(sources).to_numpy(),
                      ["source", "cycle", "item", "location", "period", "lag", "forecast", "actual"]]
    past = _attach_hierarchy(past.astype({"item": object, "location": object}), items, locations)
    present = _attach_hierarchy(current[["source", "item", "location", "period", "lag", "quantity"]]
                                .astype({"item": object, "location": object, "period": object}), items, locations)
    out = {}
    for level in hierarchy.DEFAULT_LEVELS:
        level_cells = _with_node_keys(cells, level)
        level_items, level_locations = _level_masters(level_cells, level)
        level_errors = _level_errors(_with_node_keys(past, level))
        level_sources = _source_node_sums(_with_node_keys(present, level), level_cells)
        names = sorted(level_sources["source"].unique())
        weights = estimate_weights(level_errors, cycle=cycle, items=level_items, locations=level_locations,
                                   spec=spec, sources=names)
        combined = combine_sources(level_sources, weights, items=level_items, locations=level_locations, spec=spec,
                                   audit=False)
        entry = {"base": combined.consensus[["item", "location", "period", "consensus"]]}
        if with_residuals:
            entry["residuals"] = _combined_residuals(level_errors, weights, spec=spec, level_items=level_items,
                                                     level_locations=level_locations)
        out[f"{level[0]}×{level[1]}"] = entry
    return out


def _node_positions(node_labels: pd.DataFrame) -> pd.DataFrame:
    """Row of S of each node, with the node's (item-side, location-side) keys as the level frames name them."""
    frame = node_labels.reset_index(drop=True).assign(_row=np.arange(len(node_labels)))
    item_side = frame["level"].str.split("×").str[0]
    location_side = frame["level"].str.split("×").str[1]
    node_item = np.where(item_side == "item", frame["item"], np.where(item_side == "family", frame["family"], _ALL))
    node_location = np.where(location_side == "location", frame["location"],
                             np.where(location_side == "region", frame["region"], _ALL))
    return pd.DataFrame({"level": frame["level"].astype(object), "item": node_item.astype(object),
                         "location": node_location.astype(object), "_row": frame["_row"]})


def _base_matrix(node_labels: pd.DataFrame, bottom_base: np.ndarray, months: list[str],
                 level_bases: dict) -> np.ndarray:
    """Base forecasts nodes × months: each upper node its level's combination, the bottom the combined consensus."""
    n_bottom = bottom_base.shape[0]
    n_nodes = len(node_labels)
    base = np.zeros((n_nodes, len(months)))
    base[-n_bottom:] = bottom_base
    positions = _node_positions(node_labels)
    month_of = {m: k for k, m in enumerate(months)}
    upper = positions.iloc[: n_nodes - n_bottom]
    for level, entry in level_bases.items():
        if level == "item×location":
            continue
        rows = upper[upper["level"] == level]
        found = entry["base"].merge(rows, on=["item", "location"], how="inner")
        column = found["period"].map(month_of)
        keep = column.notna().to_numpy()
        base[found["_row"].to_numpy()[keep], column.to_numpy()[keep].astype(int)] = found["consensus"].to_numpy()[keep]
    return base


def _reconcile_mint(base: np.ndarray, S, node_labels: pd.DataFrame, months: list[str], level_bases: dict, *,
                    cycle: str) -> tuple[np.ndarray, dict]:
    """MinT shrink per lag bucket, W from the nodes' in-sample combined residuals; bottom-up where there are none."""
    positions = _node_positions(node_labels)
    residuals = pd.concat([entry["residuals"].assign(level=level) for level, entry in level_bases.items()],
                          ignore_index=True)
    residuals = residuals.merge(positions, on=["level", "item", "location"], how="inner")
    month_lags = periods.month_indexes(pd.Series(months)) - periods.month_index(cycle)
    buckets = periods.lag_bucket_labels(month_lags)
    full = S @ base[-S.shape[1]:]
    details = {}
    for bucket in dict.fromkeys(buckets):
        columns = np.flatnonzero(buckets == bucket)
        sample = residuals[residuals["lag_bucket"] == bucket]
        sample_id = pd.MultiIndex.from_frame(sample[["cycle", "period"]]).factorize()[0] if len(sample) else []
        n_samples = int(np.max(sample_id)) + 1 if len(sample) else 0
        if n_samples < 2:
            details[bucket] = {"samples": n_samples, "note": "fewer than 2 past samples: bottom-up"}
            continue
        matrix = np.zeros((len(base), n_samples))
        matrix[sample["_row"].to_numpy(), sample_id] = sample["residual"].to_numpy(float)
        lam = hierarchy.shrinkage_intensity(matrix)
        full[:, columns] = hierarchy.reconcile(base[:, columns], S, method="mint_shrink", residuals=matrix,
                                               nonnegative=True)
        details[bucket] = {"samples": n_samples, "lambda": round(float(lam), 4),
                           "nodes_without_history": int(np.sum(~matrix.any(axis=1)))}
    text = ("mint_shrink: every level's own combination of the sources reconciled by MinT with the Schäfer–"
            "Strimmer shrunk covariance of their in-sample combined errors, one covariance per lag bucket "
            "(Wickramasuriya, Athanasopoulos & Hyndman, 2019); negatives clipped and rebuilt bottom-up.")
    return full, {"text": text, "by_lag_bucket": details}


def _history_matrix(actuals: pd.DataFrame | None, bottom_keys: pd.DataFrame, *, cycle: str, months: int,
                    method: str) -> np.ndarray:
    """Bottom × months of actual demand over the ``months`` months up to the cycle (no row = 0 demand)."""
    if actuals is None:
        raise InvalidSpec(f"{method} needs the order history (actuals) to split the total")
    span = [periods.shift_month(cycle, -k) for k in range(months - 1, -1, -1)]
    recent = actuals[actuals["period"].astype(str).isin(span)]
    wide = recent.pivot_table(index=["item", "location"], columns="period", values="quantity", aggfunc="sum")
    return wide.reindex(index=pd.MultiIndex.from_frame(bottom_keys), columns=span).fillna(0.0).to_numpy(float)


def _write_back(table: pd.DataFrame, bottom_keys: pd.DataFrame, months: list[str], reconciled_bottom: np.ndarray,
                method: str) -> pd.DataFrame:
    """The table with the reconciled consensus, the combined number kept and the move explained per cell."""
    index = pd.MultiIndex.from_frame(bottom_keys)
    row = index.get_indexer(pd.MultiIndex.from_frame(table[["item", "location"]]))
    column = pd.Index(months).get_indexer(table["period"].astype(str))
    after = reconciled_bottom[row, column]
    before = table["consensus"].to_numpy(float)
    if method == "bottom_up":
        after = before  # exactly the combined numbers, not a round trip through arrays
    adjustment = after - before
    moved = np.abs(adjustment) > _UNCHANGED_UNITS
    note = np.where(moved, method + " moved this cell " + pd.Series(adjustment).map("{:+,.1f}".format).to_numpy()
                    + " units (from " + pd.Series(before).map("{:,.1f}".format).to_numpy()
                    + ") so that it agrees with the family, region and total plans", "")
    return table.assign(consensus=after, before_reconciliation=before, reconciliation_adjustment=adjustment,
                        reconciliation_note=note.astype(object))


def _node_frame(node_labels: pd.DataFrame, months: list[str], base: np.ndarray, full: np.ndarray) -> pd.DataFrame:
    n_nodes, n_months = base.shape
    labels = node_labels.loc[np.repeat(np.arange(n_nodes), n_months)].reset_index(drop=True)
    return labels.assign(period=np.tile(np.array(months, dtype=object), n_nodes), base=base.ravel(),
                         reconciled=full.ravel())[NODE_FRAME_COLUMNS]
