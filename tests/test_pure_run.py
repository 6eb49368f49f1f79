"""The run is a pure function of the inputs in force: same final inputs, same numbers; views never write.

The properties come from the pure-run issue: a store that ran, had its master
data changed, then ran again gives exactly the plan of a store that only ran
once with the final inputs; pack, scorecard, explain, export and components
leave every stored row as it was; any number of processes gives the same
digits.  They hold for any data, so the invented demo company and an invented
10,000-series store serve only as inputs.
"""

from __future__ import annotations

import hashlib
import shutil
import sys
from pathlib import Path

import pandas as pd
import pytest
from sqlalchemy import inspect, text

from consensus.intake.submission import load_master_file
from consensus.methods import plan
from consensus.methods.plan import RunSpec
from consensus.store.db import get_engine, session_scope
from consensus.workflow.cycles import reopen_cycle
from consensus.workflow.inputs import run_parts
from consensus.workflow.publish import latest_run
from consensus.workflow.run import compute_cycle, run_cycle

CYCLE = "2026-11"
SAMPLE = Path(__file__).parent.parent / "sample_inputs" / "master"


def _copy(demo_dir, tmp_path, name) -> str:
    shutil.copy(demo_dir / "consensus.db", tmp_path / name)
    get_engine.cache_clear()
    return f"sqlite:///{tmp_path / name}"


def _parts(url) -> dict[str, pd.DataFrame]:
    with session_scope(url, write=False) as s:
        return run_parts(s, latest_run(s, CYCLE))


def _changed(tmp_path, source: str, edit) -> Path:
    frame = pd.read_csv(SAMPLE / source, keep_default_na=False)
    path = tmp_path / f"changed_{source}"
    edit(frame).to_csv(path, index=False)
    return path


def _family_move(frame):
    moved = frame.copy()
    first = moved.index[moved["family"] == moved["family"].iloc[0]][0]
    moved.loc[first, "family"] = sorted(set(moved["family"]) - {moved.loc[first, "family"]})[0]
    return moved


def _region_move(frame):
    moved = frame.copy()
    moved.loc[moved.index[0], "region"] = sorted(set(moved["region"]) - {moved.loc[moved.index[0], "region"]})[0]
    return moved


def _price_change(frame):
    changed = frame.copy()
    priced = pd.to_numeric(changed["unit_price"], errors="coerce").notna()
    changed.loc[priced, "unit_price"] = (pd.to_numeric(changed.loc[priced, "unit_price"]) * 1.3).round(2)
    return changed


def _bom_change(frame):
    changed = frame.copy()
    changed.loc[changed.index[0], "qty_per"] = float(changed.loc[changed.index[0], "qty_per"]) + 1
    return changed


CHANGES = {"family move": ("items.csv", "items", _family_move), "region move": ("locations.csv", "locations",
                                                                               _region_move),
           "price change": ("items.csv", "items", _price_change), "BOM change": ("bom.csv", "bom", _bom_change)}


@pytest.mark.slow
@pytest.mark.parametrize("change", list(CHANGES))
def test_a_store_that_ran_before_a_master_change_plans_like_one_that_ran_once_after_it(demo_dir, tmp_path, change):
    """Store A runs, the master changes, A runs again; store B only runs after the change: same numbers."""
    source, kind, edit = CHANGES[change]
    changed = _changed(tmp_path, source, edit)
    a = _copy(demo_dir, tmp_path, "a.db")
    reopen_cycle(CYCLE, reason="rerun", by="R. Tester", url=a)
    run_cycle(CYCLE, url=a, jobs=1)  # the caches now hold parts made with the old master
    load_master_file(changed, kind=kind, url=a)
    run_cycle(CYCLE, url=a, jobs=1)
    b = _copy(demo_dir, tmp_path, "b.db")
    with session_scope(b) as s:  # store B never ran this revision, and keeps no cached parts
        s.execute(text("DELETE FROM cacheentry"))
    reopen_cycle(CYCLE, reason="rerun", by="R. Tester", url=b)
    load_master_file(changed, kind=kind, url=b)
    run_cycle(CYCLE, url=b, jobs=1)
    first, second = _parts(a), _parts(b)
    assert set(first) == set(second)
    for name in first:
        pd.testing.assert_frame_equal(first[name], second[name], check_exact=True, obj=f"{change}: {name}")
    before = _parts(f"sqlite:///{demo_dir / 'consensus.db'}")
    moved = "components" if kind == "bom" else "cells"
    assert not first[moved].equals(before[moved]), "the change should move the plan"


def _store_state(url) -> dict:
    """Row count and content hash of every table (views must leave both as they were)."""
    engine = get_engine(url)
    state = {}
    with engine.connect() as connection:
        for table in sorted(inspect(engine).get_table_names()):
            rows = connection.execute(text(f"SELECT * FROM {table}")).fetchall()
            digest = hashlib.sha256(repr(sorted(map(repr, rows))).encode()).hexdigest()
            state[table] = (len(rows), digest)
    return state


@pytest.mark.slow
def test_views_leave_the_store_as_it_was(demo_dir, tmp_path):
    from consensus.workflow.explain import explain_cell
    from consensus.workflow.meeting_pack import write_pack
    from consensus.workflow.publish import export_components, export_consensus
    from consensus.workflow.scorecard import scorecard_report
    from consensus.workflow.verify import verify_cycle

    url = _copy(demo_dir, tmp_path, "views.db")
    before = _store_state(url)
    cells = _parts(url)["cells"]
    row = cells.iloc[len(cells) // 3]
    explain_cell(CYCLE, item=row["item"], location=row["location"], period=row["period"], url=url)
    for level in ("item", "family", "total"):
        scorecard_report(CYCLE, level=level, url=url)
    export_consensus(CYCLE, tmp_path / "c.csv", url=url)
    export_components(CYCLE, tmp_path / "k.csv", url=url)
    write_pack(CYCLE, pdf_path=tmp_path / "p.pdf", html_path=tmp_path / "p.html", url=url)
    assert verify_cycle(CYCLE, url=url).ok
    assert _store_state(url) == before


@pytest.mark.slow
def test_any_number_of_processes_gives_the_same_digits_on_the_sample_company(demo_url, monkeypatch):
    monkeypatch.setattr(plan, "PARALLEL_MIN_SERIES", 0)  # spread the sample company's few series too
    with session_scope(demo_url, write=False) as s:
        run = latest_run(s, CYCLE)
    spec = RunSpec.from_dict(run.spec)
    _, one, _ = compute_cycle(CYCLE, url=demo_url, spec=spec, through=run.through_seq, use_cache=False,
                              require_open=False, jobs=1)
    _, four, _ = compute_cycle(CYCLE, url=demo_url, spec=spec, through=run.through_seq, use_cache=False,
                               require_open=False, jobs=4)
    for name in one.parts:
        pd.testing.assert_frame_equal(one.parts[name], four.parts[name], check_exact=True, obj=name)


def _same_parts_whatever(demo_url, monkeypatch, setting: str, values: tuple) -> None:
    """The demo's current run computed afresh with ``plan.<setting>`` at each value: every part, in order, equal."""
    with session_scope(demo_url, write=False) as s:
        run = latest_run(s, CYCLE)
    spec = RunSpec.from_dict(run.spec)
    results = []
    for value in values:
        monkeypatch.setattr(plan, setting, value)
        _, result, _ = compute_cycle(CYCLE, url=demo_url, spec=spec, through=run.through_seq, use_cache=False,
                                     require_open=False, jobs=1)
        results.append(result)
    first, *others = results
    for other in others:
        for name in first.parts:
            pd.testing.assert_frame_equal(first.parts[name], other.parts[name], check_exact=True, obj=name)


@pytest.mark.slow
def test_how_the_statistical_fits_are_grouped_changes_no_digit_and_no_row(demo_url, monkeypatch):
    """The fits' group count is a memory setting: every part, rows in order, is the same for 2 groups as for 64."""
    _same_parts_whatever(demo_url, monkeypatch, "STATISTICAL_GROUPS", (2, 64))


@pytest.mark.slow
def test_how_many_past_cycles_are_scored_in_one_pass_changes_no_digit_and_no_row(demo_url, monkeypatch):
    """A small catalogue's past cycles are scored several at a time: one per pass gives every part of all in one."""
    _same_parts_whatever(demo_url, monkeypatch, "SCORE_PASS_MAX_ROWS", (1, 10**9))  # each cycle alone; all in one


@pytest.mark.slow
def test_past_cycles_kept_in_the_process_memo_give_the_digits_of_cycles_made_afresh(demo_dir, tmp_path):
    """A run that finds its past cycles' scoring frames in memory equals one that made them (and found none)."""
    from consensus.store import cache

    url = _copy(demo_dir, tmp_path, "memo.db")
    with session_scope(url, write=False) as s:
        run = latest_run(s, CYCLE)
    spec = RunSpec.from_dict(run.spec)
    _, fresh, _ = compute_cycle(CYCLE, url=url, spec=spec, through=run.through_seq, use_cache=False,
                                require_open=False, jobs=1)
    cache.MEMO.clear()
    with session_scope(url) as s:  # no kept history summary: the past cycles must be scored again
        s.execute(text("DELETE FROM cacheentry WHERE kind = 'history'"))
    loaded, _, _ = compute_cycle(CYCLE, url=url, spec=spec, through=run.through_seq, require_open=False, jobs=1)
    assert len(cache.MEMO.entries) == len(loaded.inputs.past) > 0  # one frame per past cycle, kept in memory
    _, memo, _ = compute_cycle(CYCLE, url=url, spec=spec, through=run.through_seq, require_open=False, jobs=1)
    for name in fresh.parts:
        pd.testing.assert_frame_equal(fresh.parts[name], memo.parts[name], check_exact=True, obj=name)
    assert fresh.notes["warnings"] == memo.notes["warnings"]


@pytest.mark.slow
def test_any_number_of_processes_gives_the_same_digits_on_ten_thousand_series(tmp_path):
    """An invented store of 10,000 item × location series (bench/scale_store.py), run with 1 and 4 processes."""
    import importlib.util

    spec = importlib.util.spec_from_file_location("scale_store", Path(__file__).parent.parent / "bench" /
                                                  "scale_store.py")
    scale_store = importlib.util.module_from_spec(spec)
    sys.modules["scale_store"] = scale_store  # dataclasses look their module up by name
    spec.loader.exec_module(scale_store)
    url = f"sqlite:///{tmp_path / 'scale.db'}"
    get_engine.cache_clear()
    scale_store.build_store(10_000, url, folder=tmp_path / "files", log=lambda _m: None)
    _, one, _ = compute_cycle(CYCLE, url=url, use_cache=False, jobs=1)
    _, four, _ = compute_cycle(CYCLE, url=url, use_cache=False, jobs=4)
    for name in one.parts:
        pd.testing.assert_frame_equal(one.parts[name], four.parts[name], check_exact=True, obj=name)
