"""The consensus run on the demo store: invariants of the combination, the audit, and same inputs → same numbers.

These are properties the weighting and the pure-run issues state (convex
combination, contributions add up, totals add up, a run is a function of the
inputs in force); they hold for any data, so the invented demo company serves
only as input here.
"""

from __future__ import annotations

import re

import shutil

import numpy as np
import pandas as pd
import pytest

from consensus.methods.combine import combine_sources
from consensus.methods.plan import RunSpec
from consensus.store import frames
from consensus.store.db import get_engine, session_scope
from consensus.workflow.explain import explain_cell
from consensus.workflow.inputs import run_parts
from consensus.workflow.publish import latest_run, run_lines

#: The slow tier: it reads the demo store the README's command builds (the fast tier is pytest -m 'not slow').
pytestmark = pytest.mark.slow

CYCLE = "2026-11"


def _current(url):
    with session_scope(url, write=False) as s:
        run = latest_run(s, CYCLE)
        return run, run_lines(s, run), run_parts(s, run)


def _copy(demo_dir, tmp_path, name="copy.db") -> str:
    shutil.copy(demo_dir / "consensus.db", tmp_path / name)
    get_engine.cache_clear()
    return f"sqlite:///{tmp_path / name}"


def test_each_consensus_lies_within_its_sources_and_contributions_add_up(demo_url):
    run, lines, parts = _current(demo_url)
    with session_scope(demo_url, write=False) as s:
        items, locations = frames.load_items(s), frames.load_locations(s)
    values = [c for c in lines.columns if c.startswith("value_")]
    long = lines.melt(id_vars=["item", "location", "period", "lag"], value_vars=values, var_name="source",
                      value_name="quantity").dropna(subset=["quantity"])
    long["source"] = long["source"].str.slice(len("value_"))
    spec = RunSpec.from_dict(run.spec)
    # The run scales a source with a persistent bias by its stored factor before combining (consensus.methods.bias),
    # so the consensus lies within the corrected values.
    from consensus.methods.bias import correct_sources
    from consensus.methods.weights import assign_segments

    long = correct_sources(long, parts["bias"], segment_of=assign_segments(
        long, segment=spec.weights.segment, items=items, locations=locations)).drop(columns="bias_factor")
    again = combine_sources(long, parts["weights"], items=items, locations=locations, spec=spec.weights)
    summed = again.contributions.groupby(["item", "location", "period"]).agg(
        total=("contribution", "sum"), weights=("weight", "sum"), lo=("value", "min"), hi=("value", "max"))
    joined = lines.join(summed, on=["item", "location", "period"])
    np.testing.assert_allclose(joined["total"], joined["combined"], rtol=0, atol=1e-6)  # stored to 1e-6 units
    np.testing.assert_allclose(joined["weights"], 1.0, atol=1e-9)
    assert (joined["combined"] >= joined["lo"] - 1e-6).all() and (joined["combined"] <= joined["hi"] + 1e-6).all()
    untouched = joined["before_override"].isna()
    assert untouched.sum() < len(joined) and untouched.mean() > 0.9  # the demo's decisions changed only their scope


def test_run_stores_its_settings_weights_and_the_inputs_it_read(demo_url):
    run, _, parts = _current(demo_url)
    assert run.spec["weights"]["scheme"] == "shrunk_mse" and run.spec["weights"]["window_cycles"] == 12
    w = parts["weights"]
    np.testing.assert_allclose(w.groupby(["segment", "lag_bucket"])["weight"].sum().to_numpy(), 1.0, atol=1e-9)
    assert w["psi"].between(0, 1).all() and (w["weight"] >= 0).all()
    assert run.inputs and all(len(i["sha256"]) == 64 for i in run.inputs)
    assert run.through_seq > 0 and len(run.inputs_digest) == 64


def test_the_published_plan_recomputes_to_the_last_digit(demo_url):
    from consensus.workflow.verify import verify_cycle

    report = verify_cycle(CYCLE, url=demo_url)
    assert report.ok, report.problems
    assert report.parts >= 10 and report.entries > 0


def test_a_cached_run_and_a_cold_run_give_the_same_parts(demo_url):
    from consensus.workflow.run import compute_cycle

    run, _, stored = _current(demo_url)
    _, cold, _ = compute_cycle(CYCLE, url=demo_url, spec=RunSpec.from_dict(run.spec), through=run.through_seq,
                               use_cache=False, require_open=False, jobs=1)
    _, warm, _ = compute_cycle(CYCLE, url=demo_url, spec=RunSpec.from_dict(run.spec), through=run.through_seq,
                               use_cache=True, require_open=False, jobs=1)
    for name, frame in stored.items():
        pd.testing.assert_frame_equal(frame, cold.parts[name], check_exact=True, obj=name)
        pd.testing.assert_frame_equal(frame, warm.parts[name], check_exact=True, obj=name)


def test_family_and_region_totals_are_sums_of_cells(demo_url, demo_dir):
    export = pd.read_csv(demo_dir / "consensus.csv")
    with session_scope(demo_url, write=False) as s:
        items, locations = frames.load_items(s), frames.load_locations(s)
    cells = export.merge(items[["item", "family"]], on="item").merge(locations, on="location")
    by_family = cells.groupby("family")["consensus"].sum()
    assert abs(by_family.sum() - cells["consensus"].sum()) < 1e-6
    assert set(by_family.index) == set(items["family"])


def test_explain_reads_out_weights_sources_and_splits(demo_url):
    _, lines, _ = _current(demo_url)
    row = lines.iloc[len(lines) // 2]
    text = explain_cell(CYCLE, item=row["item"], location=row["location"], period=row["period"], url=demo_url).text
    assert f"item {row['item']} at {row['location']}" in text
    assert "weight" in text and "MSE" in text and "share" in text
    assert "80% band" in text


def test_explain_trail_adds_up_to_each_sources_value(demo_url):
    """The recomputed trail of a cell gives, per source, the value the run combined (to 1e-6 units)."""
    _, lines, _ = _current(demo_url)
    sales_split = lines[lines["value_sales"].notna() & lines["value_dc"].notna()].iloc[7]
    found = explain_cell(CYCLE, item=sales_split["item"], location=sales_split["location"],
                         period=sales_split["period"], url=demo_url)
    used = found.traces[found.traces["in_force"]].groupby("source")["quantity"].sum()
    for source in ("sales", "dc"):
        assert used[source] == pytest.approx(sales_split[f"value_{source}"], abs=1e-6)


def test_explain_shows_the_meeting_decision(demo_url):
    _, lines, _ = _current(demo_url)
    touched = lines[lines["before_override"].notna()].iloc[0]
    text = explain_cell(CYCLE, item=touched["item"], location=touched["location"], period=touched["period"],
                        url=demo_url).text
    assert "Changed in the meeting" in text and "by " in text
    # The line reads the cell's own move and names each decision's scope (the demo's decisions are on an item
    # over all its locations and on a family × region, so their total is spread in proportion to the plan).
    before, after = float(touched["before_override"]), float(touched["consensus"])
    shown = [f"{x:,.0f}" if abs(x) >= 10 or x == 0 else f"{x:,.1f}" for x in (before, after)]
    assert f"Changed in the meeting from {shown[0]} to {shown[1]} units:" in text
    assert re.search(rf"#\d+ (item {re.escape(touched['item'])}|family \S+ × region \S+), {touched['period']}: "
                     r"(set to|raised by|lowered by) ", text)
    assert "spread over the cells by their shares of the month’s plan" in text


def test_family_decision_spreads_to_items_by_the_consensus_mix(demo_url):
    """The demo's +8% on SPRINKLERS × NORTH in 2027-04: every cell in scope moves by the same factor."""
    _, lines, _ = _current(demo_url)
    with session_scope(demo_url, write=False) as s:
        items, locations = frames.load_items(s), frames.load_locations(s)
    cells = lines.merge(items[["item", "family"]], on="item").merge(locations[["location", "region"]], on="location")
    scope = (cells["family"] == "SPRINKLERS") & (cells["region"] == "NORTH") & (cells["period"] == "2027-04")
    touched = cells[scope & (cells["before_override"] > 0)]
    assert len(touched) > 1
    # the plan is stated to a thousandth of a unit, so each cell is within half of one of 1.08 × its number
    np.testing.assert_allclose(touched["consensus"], touched["before_override"] * 1.08, rtol=0, atol=5e-4)
    assert cells.loc[~scope & (cells["item"] != "TM-HUB-4"), "before_override"].isna().all()


def test_mint_shrink_run_stays_coherent_and_explained(demo_dir, tmp_path):
    from consensus.workflow.cycles import reopen_cycle
    from consensus.workflow.run import run_cycle

    url = _copy(demo_dir, tmp_path, "mint.db")
    reopen_cycle(CYCLE, reason="try MinT", by="R. Tester", url=url)
    summary = run_cycle(CYCLE, url=url, spec=RunSpec(reconciliation="mint_shrink"), jobs=1)
    run, lines, _ = _current(url)
    assert run.id == summary.run_id and run.revision == 2
    assert run.notes["reconciliation"]["method"] == "mint_shrink" and run.notes["reconciliation"]["coherent"]
    plain = lines["before_override"].isna()
    np.testing.assert_allclose(lines.loc[plain, "consensus"],
                               lines.loc[plain, "combined"] + lines.loc[plain, "reconciliation_adjustment"],
                               atol=1e-3)
    assert (lines["consensus"] >= 0).all() and (lines["reconciliation_adjustment"] != 0).any()
    assert ((lines["lower_80"] <= lines["consensus"] + 1e-9) & (lines["consensus"] <= lines["upper_80"] + 1e-9)).all()


def test_band_levels_of_the_spec_are_stored_and_exported(demo_dir, tmp_path):
    from consensus.workflow.cycles import reopen_cycle
    from consensus.workflow.publish import export_consensus
    from consensus.workflow.run import run_cycle

    url = _copy(demo_dir, tmp_path, "bands.db")
    reopen_cycle(CYCLE, reason="other bands", by="R. Tester", url=url)
    run_cycle(CYCLE, url=url, spec=RunSpec(band_levels=(0.5, 0.9)), jobs=1)
    _, lines, _ = _current(url)
    for column in ("lower_50", "upper_50", "lower_90", "upper_90"):
        assert lines[column].notna().mean() > 0.99, column
    assert (lines["lower_90"] <= lines["lower_50"] + 1e-9).all() and (lines["upper_50"] <= lines["upper_90"] + 1e-9).all()
    path, _, _ = export_consensus(CYCLE, tmp_path / "bands.csv", url=url)
    assert {"lower_50", "upper_90"} <= set(pd.read_csv(path).columns)


def test_a_small_smoothing_parameter_is_not_printed_as_zero():
    """A grid fit can settle at α = 0.0001 (a level that hardly moves); '0.00' would read as no smoothing at all."""
    from consensus.workflow.explain import describe_method

    row = pd.Series({"method": "holt_winters_mul", "alpha": 0.0001, "beta": 0.0, "gamma": 0.1171, "phi": 0.995475,
                     "pattern": "smooth", "holdout_wape": 0.2365, "fallback": ""})
    text = describe_method(row)
    assert "(α 0.0001, β 0.00, γ 0.12, φ 1.00)" in text and "holdout WAPE 24%" in text
