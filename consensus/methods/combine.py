"""Merge the sources into one consensus number per cell, keeping why.

For a cell (item × location × period) with sources i present, weights w_i
from :func:`consensus.methods.weights.estimate_weights` for the cell's
segment and lag bucket, and submitted values x_i:

    consensus = Σ_i (w_i / Σ_j w_j) · (x_i + b_i)

where the sum Σ_j runs over the sources present (renormalisation when a
source is missing) and b_i = ψ · mean_error_i is the optional bias
correction (e = actual − forecast, so adding the mean error moves a source
that habitually forecasts low upward), floored so x_i + b_i ≥ 0 because
demand cannot be negative.  Without bias correction the consensus is a
convex combination of the submitted values, so it lies between their
minimum and maximum.  Linear combination with renormalised weights follows
Bates & Granger (1969).

Every term of the sum is kept as a row of ``contributions``, so each
consensus number can be read back as "source × weight (+ correction)".
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from consensus.errors import InvalidSpec
from consensus.methods.weights import WeightSpec, assign_segments
from consensus.periods import lag_bucket_labels

CELL = ["item", "location", "period"]

CONSENSUS_COLUMNS = [
    "item", "location", "period", "lag", "lag_bucket", "segment", "consensus", "n_sources",
    "missing_sources", "renormalised", "spread", "spread_ratio", "flagged",
]
CONTRIBUTION_COLUMNS = [
    "item", "location", "period", "source", "value", "weight", "contribution", "bias_correction",
    "weight_basis", "note",
]


@dataclass(frozen=True)
class Combination:
    """The result of :func:`combine_sources`.

    consensus: [item, location, period, lag, lag_bucket, segment, consensus,
    n_sources, missing_sources, renormalised, spread, spread_ratio, flagged];
    contributions: [item, location, period, source, value, weight,
    contribution, bias_correction, weight_basis, note], one row per cell ×
    source present, whose ``contribution`` column sums to the consensus
    (None when combined with audit=False); weights: the weight table that was used.
    """

    consensus: pd.DataFrame
    contributions: pd.DataFrame | None
    weights: pd.DataFrame


def _spread_ratio(spread: np.ndarray, consensus: np.ndarray) -> np.ndarray:
    """spread / consensus; for a zero consensus 0 when the sources agree, else +inf."""
    spread = np.asarray(spread, float)
    consensus = np.asarray(consensus, float)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        ratio = spread / np.abs(consensus)
    return np.where(consensus == 0, np.where(spread == 0, 0.0, np.inf), ratio)


def combine_sources(
    aligned: pd.DataFrame,
    weights: pd.DataFrame,
    *,
    items: pd.DataFrame,
    spec: WeightSpec,
    bias: pd.DataFrame | None = None,
    locations: pd.DataFrame | None = None,
    threshold: float | None = None,
    audit: bool = True,
) -> Combination:
    """Weighted combination of the aligned sources of one cycle, with its audit.

    aligned: [source, item, location, period, lag, quantity] at planning grain,
    one row per source and cell.  weights: from ``estimate_weights`` with the
    same ``spec`` (segment) — every (segment, lag bucket, source) present in
    ``aligned`` needs a row.  ``locations`` is needed when spec.segment is
    "region".  bias: optional [segment, lag_bucket, source, mean_error, psi]
    to correct with instead of the measured figures in ``weights``; used only
    when spec.bias_correction.  audit=False leaves ``contributions`` None: a
    run stores the sources' values and weights, from which ``explain`` writes
    one cell's terms again, so the run need not hold a row of words per term.

    Disagreement: spread = max − min of the submitted values of a cell,
    spread_ratio = spread / consensus (0 when both are 0, +inf for a zero
    consensus with a spread), flagged when spread_ratio > threshold
    and the spread is at least spec.disagreement_min_units (default 10 units)
    (``threshold`` or spec.disagreement_threshold, default 0.5: sources half
    a plan apart disagree about the level of demand, not about detail — a
    judgement default worth a look in the meeting, common practice rather
    than a published figure).

    Cells are handled by whole-number codes (one per cell, one per source) rather than by grouping on the text
    columns: at a catalogue's size the text keys cost more memory and time than the arithmetic.
    """
    if not isinstance(spec, WeightSpec):
        raise InvalidSpec("spec must be a WeightSpec")
    limit = spec.disagreement_threshold if threshold is None else float(threshold)
    if not limit >= 0:
        raise InvalidSpec(f"threshold must be ≥ 0, got {threshold!r}")
    rows = aligned[["source", "item", "location", "period", "lag", "quantity"]].rename(columns={"quantity": "value"})
    rows = rows.astype({"source": object, "item": object, "location": object, "period": object})
    cell_key = _cell_key(rows)
    source_codes, source_names = pd.factorize(rows["source"], sort=True)
    order = np.lexsort((source_codes, cell_key))
    rows = rows.take(order).reset_index(drop=True)
    cell_key, source_codes = cell_key[order], source_codes[order]
    new_cell = np.empty(len(rows), dtype=bool)
    new_cell[:1] = True
    new_cell[1:] = cell_key[1:] != cell_key[:-1]
    duplicated = ~new_cell
    duplicated[1:] &= source_codes[1:] == source_codes[:-1]
    if duplicated.any():
        first = rows[duplicated].iloc[0]
        raise InvalidSpec(
            f"{int(duplicated.sum())} duplicate source rows at planning grain, e.g. source {first['source']!r} "
            f"for {first['item']} / {first['location']} / {first['period']}"
        )
    cell_id = np.cumsum(new_cell) - 1
    starts = np.flatnonzero(new_cell)
    rows["value"] = rows["value"].astype(float)
    rows["segment"] = assign_segments(rows, segment=spec.segment, items=items, locations=locations)
    rows["lag_bucket"] = lag_bucket_labels(rows["lag"].to_numpy())

    table = weights.astype({"segment": object, "lag_bucket": object, "source": object})
    keys = ["segment", "lag_bucket", "source"]
    at = _positions(table[keys], rows[keys])
    unweighted = at < 0
    if unweighted.any():
        first = rows[unweighted].iloc[0]
        raise InvalidSpec(
            f"no weight for source {first['source']!r} in segment {first['segment']!r}, lag bucket "
            f"{first['lag_bucket']!r}: estimate weights for this cycle's sources and segment '{spec.segment}'"
        )
    weight = table["weight"].to_numpy(dtype=float)[at]
    value = rows["value"].to_numpy()
    by_cell = pd.DataFrame({"weight": weight}).groupby(cell_id, sort=True)["weight"]
    present_weight = by_cell.sum().to_numpy()
    n_present = np.diff(np.append(starts, len(rows)))
    no_weight_left = (present_weight <= 0)[cell_id]
    used_weight = np.where(no_weight_left, 1.0 / n_present[cell_id],
                           weight / np.where(no_weight_left, 1.0, present_weight[cell_id]))

    if spec.bias_correction:
        if bias is not None:
            found = _positions(bias[keys].astype(object), rows[keys])
            mean_error = np.where(found >= 0, bias["mean_error"].to_numpy(dtype=float)[found], np.nan)
            psi = np.where(found >= 0, bias["psi"].to_numpy(dtype=float)[found], np.nan)
        else:
            mean_error, psi = table["mean_error"].to_numpy(dtype=float)[at], table["psi"].to_numpy(dtype=float)[at]
        correction = np.nan_to_num(psi, nan=0.0) * np.nan_to_num(mean_error, nan=0.0)
        correction = np.maximum(correction, -value)
    else:
        correction = np.zeros(len(rows))
    contribution = used_weight * (value + correction)

    lag = rows["lag"].to_numpy()
    first_rows = rows[["item", "location", "period", "lag_bucket", "segment"]].take(starts).reset_index(drop=True)
    cells = first_rows[CELL].assign(
        lag=np.minimum.reduceat(lag, starts) if len(rows) else lag[:0],
        lag_bucket=first_rows["lag_bucket"], segment=first_rows["segment"],
        consensus=pd.Series(contribution).groupby(cell_id, sort=True).sum().to_numpy(),
        n_sources=n_present.astype(np.int64),
        source_min=np.minimum.reduceat(value, starts) if len(rows) else value[:0],
        source_max=np.maximum.reduceat(value, starts) if len(rows) else value[:0],
        present_weight=present_weight,
    )
    cells["missing_sources"] = _missing_sources(table, first_rows, source_codes, source_names, starts)
    cells["renormalised"] = cells["present_weight"] < 1.0 - 1e-9
    cells["spread"] = cells["source_max"] - cells["source_min"]
    cells["spread_ratio"] = _spread_ratio(cells["spread"], cells["consensus"])
    # materiality: a few units' spread on a slow mover is noise, not a question for the meeting
    cells["flagged"] = (cells["spread_ratio"] > limit) & (cells["spread"] >= float(spec.disagreement_min_units))
    contributions = None
    if audit:
        note = pd.Series(table["note"].to_numpy(dtype=object)[at]).astype(str)
        renormalised = cells["renormalised"].to_numpy()[cell_id]
        missing = cells["missing_sources"].to_numpy(dtype=object)[cell_id]
        note = note.where(~renormalised, note + "; renormalised over the sources present (missing: " + missing + ")")
        note = note.where(~no_weight_left, note + "; the sources present had no weight, so equal weights")
        if spec.bias_correction:
            note = note.where(correction == 0, note + "; bias-corrected by ψ × mean error")
        contributions = rows[["item", "location", "period", "source", "value"]].assign(
            weight=used_weight, contribution=contribution, bias_correction=correction,
            weight_basis=table["basis"].to_numpy(dtype=object)[at], note=note.to_numpy(dtype=object))
    return Combination(
        consensus=cells[CONSENSUS_COLUMNS].reset_index(drop=True),
        contributions=contributions,
        weights=weights,
    )


def _cell_key(rows: pd.DataFrame) -> np.ndarray:
    """One whole number per (item, location, period), ordered as the text keys sort."""
    key = np.zeros(len(rows), dtype=np.int64)
    for column in CELL:
        codes, uniques = pd.factorize(rows[column], sort=True)
        key = key * max(len(uniques), 1) + codes
    return key


def _positions(table: pd.DataFrame, wanted: pd.DataFrame) -> np.ndarray:
    """Row of ``table`` holding each row's key (−1 where none); the keys of ``table`` must be unique."""
    index = pd.MultiIndex.from_frame(table)
    if not index.is_unique:
        raise InvalidSpec(f"the weight table has more than one row for some {', '.join(table.columns)}")
    return index.get_indexer(pd.MultiIndex.from_frame(wanted))


def _missing_sources(table: pd.DataFrame, first_rows: pd.DataFrame, source_codes: np.ndarray,
                     source_names: pd.Index, starts: np.ndarray) -> np.ndarray:
    """Per cell, the comma-separated sources that had a weight row for its segment and lag bucket but no value."""
    names = sorted(set(source_names) | set(table["source"]))
    if len(names) > 62:  # one bit per source in a whole number
        raise InvalidSpec(f"{len(names)} sources: at most 62 can be combined")
    if not len(starts):
        return np.empty(0, dtype=object)
    bit = np.left_shift(np.int64(1), np.arange(len(names), dtype=np.int64))
    row_bits = bit[pd.Index(names).get_indexer(source_names)][source_codes]
    present = np.bitwise_or.reduceat(row_bits, starts)
    groups = table[["segment", "lag_bucket"]].assign(_bit=bit[pd.Index(names).get_indexer(table["source"])])
    expected_by = groups.groupby(["segment", "lag_bucket"], sort=False)["_bit"].agg(np.bitwise_or.reduce)
    found = expected_by.index.get_indexer(pd.MultiIndex.from_frame(first_rows[["segment", "lag_bucket"]]))
    expected = np.where(found >= 0, expected_by.to_numpy()[found], 0)
    missing = expected & ~present
    masks, inverse = np.unique(missing, return_inverse=True)
    words = np.array([", ".join(n for n, b in zip(names, bit) if m & b) for m in masks], dtype=object)
    return words[inverse.ravel()]


def family_disagreement(combination: Combination, items: pd.DataFrame, *, threshold: float = 0.5) -> pd.DataFrame:
    """How far the sources' family totals are apart, per family × period.

    Each source's family total sums its values over the family's cells; where
    the source is missing from a cell, the cell's consensus stands in, so the
    totals cover the same cells and differ only where sources really differ.
    spread = max − min of the source totals, spread_ratio = spread / family
    consensus (see :func:`combine_sources`), flagged when above ``threshold``.

    Returns [family, period, consensus, n_cells, n_flagged_cells, source_min,
    source_max, spread, spread_ratio, flagged].
    """
    cons = combination.consensus.merge(items[["item", "family"]].drop_duplicates("item"), on="item", how="left")
    cons["family"] = cons["family"].fillna("(unknown family)")
    contributions = combination.contributions
    if contributions is None:
        raise InvalidSpec("family_disagreement reads the sources' values: combine with audit=True")
    sources = sorted(contributions["source"].unique())
    grid = cons[CELL + ["family", "consensus"]].merge(pd.DataFrame({"source": sources}), how="cross")
    grid = grid.merge(contributions[CELL + ["source", "value"]], on=CELL + ["source"], how="left")
    grid["value"] = grid["value"].fillna(grid["consensus"])
    totals = grid.groupby(["family", "period", "source"], sort=True)["value"].sum()
    by_family = totals.groupby(["family", "period"], sort=True).agg(source_min="min", source_max="max")
    summary = cons.groupby(["family", "period"], sort=True).agg(
        consensus=("consensus", "sum"), n_cells=("consensus", "size"), n_flagged_cells=("flagged", "sum")
    )
    out = summary.join(by_family).reset_index()
    out["n_flagged_cells"] = out["n_flagged_cells"].astype(int)
    out["spread"] = out["source_max"] - out["source_min"]
    out["spread_ratio"] = _spread_ratio(out["spread"], out["consensus"])
    out["flagged"] = out["spread_ratio"] > threshold
    return out[["family", "period", "consensus", "n_cells", "n_flagged_cells", "source_min", "source_max",
                "spread", "spread_ratio", "flagged"]]
