"""The consensus run on the demo store: invariants of the combination, audit completeness and reproducibility.

These are properties the weighting issue states (convex combination, contributions
add up, same inputs give the same numbers, totals add up); they hold for any data,
so the invented demo company serves only as input here.
"""

from __future__ import annotations

import shutil

import numpy as np
import pandas as pd
from sqlalchemy import select

from consensus.store import frames
from consensus.store.db import get_engine, session_scope
from consensus.store.models import CellSource, ConsensusRun, Cycle, WeightRecord
from consensus.workflow.explain import explain_cell
from consensus.workflow.publish import latest_run, run_lines

CYCLE = "2026-11"


def _current(url):
    with session_scope(url) as s:
        run = latest_run(s, CYCLE)
        lines = run_lines(s, run.id)
        t = CellSource.__table__
        parts = frames.read_frame(s, select(t.c.item, t.c.location, t.c.period, t.c.source, t.c.value, t.c.weight,
                                            t.c.contribution).where(t.c.run_id == run.id))
        return run, lines, parts


def test_each_consensus_lies_within_its_sources_and_contributions_add_up(demo_url):
    run, lines, parts = _current(demo_url)
    cell = ["item", "location", "period"]
    summary = parts.groupby(cell).agg(lo=("value", "min"), hi=("value", "max"), total=("contribution", "sum"),
                                      weights=("weight", "sum")).reset_index()
    joined = lines.merge(summary, on=cell)
    assert len(joined) == len(lines)
    # the combined number, before reconciliation and the meeting's decisions
    computed = joined["before_reconciliation"].fillna(joined["before_override"]).fillna(joined["consensus"])
    untouched = joined["before_override"].isna()
    np.testing.assert_allclose(joined["total"], computed, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(joined["weights"], 1.0, atol=1e-9)
    assert (computed >= joined["lo"] - 1e-9).all() and (computed <= joined["hi"] + 1e-9).all()
    assert untouched.sum() < len(joined)  # the demo's decisions changed some cells ...
    assert untouched.mean() > 0.9  # ... and only those in their scope


def test_run_stores_its_settings_and_weights(demo_url):
    with session_scope(demo_url) as s:
        run = latest_run(s, CYCLE)
        assert run.spec["weights"]["scheme"] == "shrunk_mse" and run.spec["weights"]["window_cycles"] == 12
        w = frames.read_frame(s, select(WeightRecord.__table__).where(WeightRecord.__table__.c.run_id == run.id))
    sums = w.groupby(["segment", "lag_bucket"])["weight"].sum()
    np.testing.assert_allclose(sums.to_numpy(), 1.0, atol=1e-9)
    assert w["psi"].between(0, 1).all() and (w["weight"] >= 0).all()
    assert run.inputs and all(len(i["sha256"]) == 64 for i in run.inputs)


def test_same_inputs_give_the_same_numbers_to_the_last_digit(demo_dir, tmp_path):
    from consensus.workflow.run import run_cycle

    copy = tmp_path / "copy.db"
    shutil.copy(demo_dir / "consensus.db", copy)
    url = f"sqlite:///{copy}"
    get_engine.cache_clear()
    with session_scope(url) as s:  # recompute the published cycle as a fresh draft
        s.get(Cycle, CYCLE).status = "open"
    _, before, _ = _current(url)
    summary = run_cycle(CYCLE, url=url)
    with session_scope(url) as s:
        again = run_lines(s, summary.run_id)
        assert s.get(ConsensusRun, summary.run_id).status == "draft"
    cols = ["item", "location", "period", "consensus", "lower_80", "upper_80", "lower_95", "upper_95"]
    pd.testing.assert_frame_equal(before[cols].reset_index(drop=True), again[cols].reset_index(drop=True),
                                  check_exact=True)


def test_family_and_region_totals_are_sums_of_cells(demo_url, demo_dir):
    export = pd.read_csv(demo_dir / "consensus.csv")
    with session_scope(demo_url) as s:
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


def test_explain_shows_the_meeting_decision(demo_url):
    _, lines, _ = _current(demo_url)
    touched = lines[lines["before_override"].notna()].iloc[0]
    text = explain_cell(CYCLE, item=touched["item"], location=touched["location"], period=touched["period"],
                        url=demo_url).text
    assert "Changed in the meeting" in text and "by " in text


def test_mint_shrink_run_stays_coherent_and_explained(demo_dir, tmp_path):
    from consensus.workflow.run import RunSpec, run_cycle

    copy = tmp_path / "mint.db"
    shutil.copy(demo_dir / "consensus.db", copy)
    url = f"sqlite:///{copy}"
    get_engine.cache_clear()
    summary = run_cycle(CYCLE, url=url, spec=RunSpec(reconciliation="mint_shrink"))
    with session_scope(url) as s:
        lines = run_lines(s, summary.run_id)
        notes = s.get(ConsensusRun, summary.run_id).notes
    assert notes["reconciliation"]["method"] == "mint_shrink" and notes["reconciliation"]["coherent"]
    plain = lines["before_override"].isna()
    np.testing.assert_allclose(lines.loc[plain, "consensus"],
                               lines.loc[plain, "before_reconciliation"] + lines.loc[plain, "reconciliation_adjustment"],
                               atol=1e-6)
    assert (lines["consensus"] >= 0).all() and (lines["reconciliation_adjustment"] != 0).any()
    assert ((lines["lower_80"] <= lines["consensus"] + 1e-9) & (lines["consensus"] <= lines["upper_80"] + 1e-9)).all()


def test_family_decision_spreads_to_items_by_the_consensus_mix(demo_url):
    """The demo's +8% on SPRINKLERS × NORTH in 2027-04: every cell in scope moves by the same factor."""
    _, lines, _ = _current(demo_url)
    with session_scope(demo_url) as s:
        items, locations = frames.load_items(s), frames.load_locations(s)
    cells = lines.merge(items[["item", "family"]], on="item").merge(locations[["location", "region"]], on="location")
    scope = (cells["family"] == "SPRINKLERS") & (cells["region"] == "NORTH") & (cells["period"] == "2027-04")
    touched = cells[scope & (cells["before_override"] > 0)]
    assert len(touched) > 1
    np.testing.assert_allclose(touched["consensus"] / touched["before_override"], 1.08, rtol=1e-9)
    assert cells.loc[~scope & (cells["item"] != "TM-HUB-4"), "before_override"].isna().all()
