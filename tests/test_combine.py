"""The combination of sources and its audit trail."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from consensus.errors import InvalidSpec
from consensus.methods.combine import combine_sources, family_disagreement
from consensus.methods.weights import WeightSpec, estimate_weights
from consensus.periods import DEFAULT_LAG_BUCKETS, shift_month

ITEMS = pd.DataFrame({"item": ["A", "B", "C"], "family": ["F1", "F1", "F2"], "unit_price": [1.0, 1.0, 1.0]})
LOCATIONS = pd.DataFrame({"location": ["L1", "L2"], "region": ["North", "South"]})
SOURCES = ["dc", "marketing", "sales", "stat"]
BUCKETS = [label for label, _, _ in DEFAULT_LAG_BUCKETS]


def weight_table(weight_by_source: dict[str, float], *, mean_error=None, psi=1.0, segments=("F1", "F2")):
    """A hand-made weight table with the columns estimate_weights returns."""
    rows = []
    for seg in segments:
        for bucket in BUCKETS:
            for source, w in weight_by_source.items():
                me = 0.0 if mean_error is None else mean_error[source]
                rows.append((seg, bucket, source, w, w, psi, 12, 100, 1.0, 1.0, me, "segment", f"note {source}"))
    return pd.DataFrame(rows, columns=["segment", "lag_bucket", "source", "weight", "raw_weight", "psi", "n_cycles",
                                       "n_errors", "mad", "mse", "mean_error", "basis", "note"])


def aligned_frame(values: dict[tuple[str, str, str, int], dict[str, float]]) -> pd.DataFrame:
    rows = [(s, i, l, p, lag, q) for (i, l, p, lag), by_source in values.items() for s, q in by_source.items()]
    return pd.DataFrame(rows, columns=["source", "item", "location", "period", "lag", "quantity"])


SPEC = WeightSpec(scheme="inverse_mse")


def test_weighted_sum_and_contributions_add_up():
    weights = weight_table({"sales": 0.5, "stat": 0.3, "dc": 0.2})
    aligned = aligned_frame({("A", "L1", "2026-02", 1): {"sales": 100.0, "stat": 80.0, "dc": 130.0}})
    combo = combine_sources(aligned, weights, items=ITEMS, spec=SPEC)
    # Hand check: 0.5·100 + 0.3·80 + 0.2·130 = 100.
    row = combo.consensus.iloc[0]
    assert row["consensus"] == pytest.approx(100.0)
    assert row["spread"] == 50.0 and row["spread_ratio"] == pytest.approx(0.5) and not row["flagged"]
    assert combo.contributions["contribution"].sum() == pytest.approx(100.0)
    assert set(combo.contributions["weight_basis"]) == {"segment"}
    assert row["segment"] == "F1" and row["lag_bucket"] == "1" and row["n_sources"] == 3


def test_missing_source_renormalises_and_says_so():
    weights = weight_table({"sales": 0.5, "stat": 0.3, "dc": 0.2})
    aligned = aligned_frame({("A", "L1", "2026-03", 2): {"sales": 100.0, "stat": 60.0}})
    combo = combine_sources(aligned, weights, items=ITEMS, spec=SPEC)
    row = combo.consensus.iloc[0]
    # 0.5/0.8 · 100 + 0.3/0.8 · 60 = 62.5 + 22.5 = 85.
    assert row["consensus"] == pytest.approx(85.0)
    assert row["renormalised"] and row["missing_sources"] == "dc"
    assert combo.contributions["weight"].sum() == pytest.approx(1.0)
    assert combo.contributions["note"].str.contains("missing: dc").all()


def test_best_source_missing_falls_back_to_equal_among_present():
    weights = weight_table({"sales": 1.0, "stat": 0.0, "dc": 0.0})
    aligned = aligned_frame({("A", "L1", "2026-03", 2): {"stat": 60.0, "dc": 80.0}})
    combo = combine_sources(aligned, weights, items=ITEMS, spec=SPEC)
    assert combo.consensus["consensus"].iloc[0] == pytest.approx(70.0)
    assert combo.contributions["note"].str.contains("equal weights").all()


def test_bias_correction_adds_shrunk_mean_error():
    weights = weight_table({"sales": 0.5, "stat": 0.5}, mean_error={"sales": -10.0, "stat": 4.0}, psi=0.5)
    aligned = aligned_frame({("C", "L2", "2026-02", 1): {"sales": 100.0, "stat": 90.0}})
    spec = WeightSpec(scheme="inverse_mse", bias_correction=True)
    combo = combine_sources(aligned, weights, items=ITEMS, spec=spec)
    # sales over-forecasts by 10 (e = actual − forecast = −10): 100 − 5; stat 90 + 2 -> mean 93.5.
    assert combo.consensus["consensus"].iloc[0] == pytest.approx(93.5)
    corrections = combo.contributions.set_index("source")["bias_correction"]
    assert corrections["sales"] == pytest.approx(-5.0) and corrections["stat"] == pytest.approx(2.0)
    # Off by default: plain mean 95.
    plain = combine_sources(aligned, weights, items=ITEMS, spec=SPEC)
    assert plain.consensus["consensus"].iloc[0] == pytest.approx(95.0)
    assert (plain.contributions["bias_correction"] == 0).all()


def test_bias_correction_never_takes_a_source_below_zero():
    weights = weight_table({"sales": 0.5, "stat": 0.5}, mean_error={"sales": -50.0, "stat": 0.0})
    aligned = aligned_frame({("A", "L1", "2026-02", 1): {"sales": 20.0, "stat": 10.0}})
    combo = combine_sources(aligned, weights, items=ITEMS, spec=WeightSpec(bias_correction=True))
    assert combo.consensus["consensus"].iloc[0] == pytest.approx(5.0)


def test_zero_consensus_spread_ratio_and_threshold_keyword():
    weights = weight_table({"sales": 1.0, "stat": 0.0})
    aligned = aligned_frame({
        ("A", "L1", "2026-02", 1): {"sales": 0.0, "stat": 10.0},
        ("B", "L1", "2026-02", 1): {"sales": 0.0, "stat": 0.0},
        ("C", "L2", "2026-02", 1): {"sales": 10.0, "stat": 13.0},
    })
    spec = replace(SPEC, disagreement_min_units=0.0)  # no materiality floor: the ratio alone decides here
    cons = combine_sources(aligned, weights, items=ITEMS, spec=spec, threshold=0.2).consensus.set_index("item")
    assert np.isinf(cons.loc["A", "spread_ratio"]) and cons.loc["A", "flagged"]
    assert cons.loc["B", "spread_ratio"] == 0.0 and not cons.loc["B", "flagged"]
    assert cons.loc["C", "spread_ratio"] == pytest.approx(0.3) and cons.loc["C", "flagged"]


def test_small_spreads_are_not_flagged_however_large_the_ratio():
    weights = weight_table({"sales": 0.5, "stat": 0.5})
    aligned = aligned_frame({
        ("A", "L1", "2026-02", 1): {"sales": 2.0, "stat": 9.0},  # ratio 1.27 but 7 units apart
        ("C", "L2", "2026-02", 1): {"sales": 20.0, "stat": 45.0},  # ratio 0.77 and 25 units apart
    })
    cons = combine_sources(aligned, weights, items=ITEMS, spec=SPEC).consensus.set_index("item")
    assert cons.loc["A", "spread_ratio"] > 0.5 and not cons.loc["A", "flagged"]
    assert cons.loc["C", "flagged"]


def test_unweighted_source_and_duplicates_are_rejected():
    weights = weight_table({"sales": 1.0})
    with pytest.raises(InvalidSpec, match="no weight for source 'stat'"):
        combine_sources(aligned_frame({("A", "L1", "2026-02", 1): {"stat": 1.0}}), weights, items=ITEMS, spec=SPEC)
    dup = pd.concat([aligned_frame({("A", "L1", "2026-02", 1): {"sales": 1.0}})] * 2)
    with pytest.raises(InvalidSpec, match="duplicate"):
        combine_sources(dup, weights, items=ITEMS, spec=SPEC)


def test_family_disagreement_uses_consensus_where_a_source_is_missing():
    weights = weight_table({"sales": 0.5, "stat": 0.5})
    aligned = aligned_frame({
        ("A", "L1", "2026-02", 1): {"sales": 100.0, "stat": 60.0},
        ("B", "L1", "2026-02", 1): {"sales": 50.0},
    })
    combo = combine_sources(aligned, weights, items=ITEMS, spec=SPEC)
    fam = family_disagreement(combo, ITEMS).set_index("family").loc["F1"]
    # Consensus 80 + 50 = 130; sales total 150, stat total 60 + 50 (consensus stands in) = 110.
    assert fam["consensus"] == pytest.approx(130.0)
    assert fam["source_max"] == pytest.approx(150.0) and fam["source_min"] == pytest.approx(110.0)
    assert fam["spread_ratio"] == pytest.approx(40 / 130) and fam["n_cells"] == 2


def test_end_to_end_with_estimated_weights_and_region_segment():
    rng = np.random.default_rng(3)
    rows = []
    for cycle_no in range(12):
        cycle = f"2025-{cycle_no + 1:02d}"
        for source, sd in (("sales", 2.0), ("stat", 6.0)):
            for loc in ("L1", "L2"):
                rows.append((source, cycle, "A", loc, shift_month(cycle, 1), 1, rng.normal(0, sd)))
    errors = pd.DataFrame(rows, columns=["source", "cycle", "item", "location", "period", "lag", "error"])
    errors["lag_bucket"] = "1"
    spec = WeightSpec(scheme="inverse_mse", segment="region")
    weights = estimate_weights(errors, cycle="2026-01", items=ITEMS, locations=LOCATIONS, spec=spec,
                               sources=["sales", "stat"])
    aligned = aligned_frame({("A", "L1", "2026-02", 1): {"sales": 100.0, "stat": 120.0}})
    with pytest.raises(InvalidSpec, match="locations"):
        combine_sources(aligned, weights, items=ITEMS, spec=spec)
    combo = combine_sources(aligned, weights, items=ITEMS, spec=spec, locations=LOCATIONS)
    w = weights[(weights["segment"] == "North") & (weights["lag_bucket"] == "1")].set_index("source")["weight"]
    assert combo.consensus["consensus"].iloc[0] == pytest.approx(100 * w["sales"] + 120 * w["stat"])
    assert combo.consensus["segment"].iloc[0] == "North"
    assert w["sales"] > w["stat"]


# ---------------------------------------------------------------- properties

cell_values = st.lists(
    st.lists(st.one_of(st.none(), st.floats(min_value=0, max_value=1e4, allow_nan=False)), min_size=4, max_size=4),
    min_size=1, max_size=12,
)
raw_weights = st.lists(st.floats(min_value=0, max_value=1, allow_nan=False), min_size=4, max_size=4)


def _random_case(values, weight_list):
    total = sum(weight_list)
    normalised = [w / total for w in weight_list] if total > 0 else [0.25] * 4
    weights = weight_table(dict(zip(SOURCES, normalised)))
    cells = {}
    for k, row in enumerate(values):
        item = "ABC"[k % 3]
        present = {s: v for s, v in zip(SOURCES, row) if v is not None}
        if present:
            cells[(item, "L1", f"2026-{k // 3 + 2:02d}", k // 3 + 1)] = present
    return weights, cells


@pytest.mark.slow
@settings(max_examples=30, deadline=None)
@given(cell_values, raw_weights)
def test_consensus_lies_between_the_sources_without_bias_correction(values, weight_list):
    weights, cells = _random_case(values, weight_list)
    if not cells:
        return
    combo = combine_sources(aligned_frame(cells), weights, items=ITEMS, spec=SPEC)
    bounds = combo.contributions.groupby(["item", "location", "period"])["value"].agg(["min", "max"])
    joined = combo.consensus.set_index(["item", "location", "period"]).join(bounds)
    tolerance = 1e-9 * np.maximum(1.0, joined["max"])
    assert (joined["consensus"] >= joined["min"] - tolerance).all()
    assert (joined["consensus"] <= joined["max"] + tolerance).all()
    sums = combo.contributions.groupby(["item", "location", "period"])["weight"].sum()
    np.testing.assert_allclose(sums, 1.0, atol=1e-12)


@pytest.mark.slow
@settings(max_examples=30, deadline=None)
@given(cell_values, raw_weights, st.randoms(use_true_random=False))
def test_permuting_input_rows_changes_nothing(values, weight_list, random):
    weights, cells = _random_case(values, weight_list)
    if not cells:
        return
    aligned = aligned_frame(cells)
    order = list(range(len(aligned)))
    random.shuffle(order)
    first = combine_sources(aligned, weights, items=ITEMS, spec=SPEC)
    second = combine_sources(aligned.iloc[order], weights.sample(frac=1.0, random_state=1), items=ITEMS, spec=SPEC)
    # Same numbers to the last digit, not merely close.
    pd.testing.assert_frame_equal(first.consensus, second.consensus, check_exact=True)
    pd.testing.assert_frame_equal(first.contributions, second.contributions, check_exact=True)
