"""The intake transaction on SQLite and PostgreSQL: accepted, unchanged, replacing, reinstated and rejected files.

The rules come from the foundation issue and the month-end issue; the broken
files are the intake checks' own (tests/data/bad), each fed through the whole
store path to show nothing changes but the rejected file being kept.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest
from sqlalchemy import func, select

from consensus.errors import CycleStateError, InputRejected
from consensus.intake.submission import submit_file
from consensus.store import blobs
from consensus.store.db import session_scope
from consensus.store.models import Blob, CacheEntry, ConsensusRun, Cycle, Decision, JournalEntry, Setting, Submission
from consensus.workflow.run import sources_in_force

DATA = Path(__file__).parent / "data"
BAD_FORECASTS = sorted(p.name for p in (DATA / "bad").glob("forecast_*.csv"))
OTHER_BAD = sorted(p.name for p in (DATA / "bad").iterdir() if not p.name.startswith("forecast_"))


def fast_first(names, n_fast: int = 2):
    """The first files in the fast tier, the rest in the full suite (each is a whole store import)."""
    return [name if k < n_fast else pytest.param(name, marks=pytest.mark.slow) for k, name in enumerate(names)]


def counts(url) -> dict:
    """Rows of every table: what a rejected file may change (Submission, Blob, JournalEntry) and what it may not."""
    with session_scope(url) as s:
        return {m.__name__: s.execute(select(func.count()).select_from(m)).scalar_one()
                for m in (Submission, Blob, JournalEntry, Cycle, Decision, ConsensusRun, CacheEntry, Setting)}


def accepted(url) -> int:
    with session_scope(url) as s:
        return s.execute(select(func.count()).select_from(Submission).where(Submission.status == "accepted")
                         .where(Submission.kind == "forecast")
                         ).scalar_one()


def test_accepted_file_is_stored_with_its_bytes_and_lines(master_store):
    outcome = submit_file(DATA / "good" / "forecast.csv", url=master_store, source="dc", cycle="2026-11",
                          submitted_by="R. Tester")
    assert outcome.status == "accepted" and outcome.rows == 5
    with session_scope(master_store) as s:
        sub = s.get(Submission, outcome.submission_id)
        assert blobs.get_file(s, sub.sha256) == (DATA / "good" / "forecast.csv").read_bytes()
        assert len(blobs.get_frame(s, sub.lines_sha256)) == 5
        assert sub.submitted_by == "R. Tester" and sub.seq is not None


def test_same_file_again_changes_nothing_and_says_so(master_store):
    first = submit_file(DATA / "good" / "forecast.csv", url=master_store, source="dc", cycle="2026-11")
    before = counts(master_store)
    again = submit_file(DATA / "good" / "forecast.csv", url=master_store, source="dc", cycle="2026-11")
    assert again.status == "unchanged" and again.submission_id == first.submission_id
    assert "already in force" in again.line()
    assert counts(master_store) == before


def _changed_copy(tmp_path, name: str, old: str, new: str) -> Path:
    path = tmp_path / name
    path.write_text((DATA / "good" / "forecast.csv").read_text().replace(old, new))
    return path


def test_a_new_version_replaces_the_cells_it_covers_and_the_old_one_stays_stored(master_store, tmp_path):
    first = submit_file(DATA / "good" / "forecast.csv", url=master_store, source="dc", cycle="2026-11")
    second = submit_file(_changed_copy(tmp_path, "v2.csv", "120", "125"), url=master_store, source="dc",
                         cycle="2026-11")
    assert second.status == "accepted" and first.submission_id in second.takes_over
    dc = sources_in_force("2026-11", url=master_store)
    cell = dc[(dc["source"] == "dc") & (dc["item"] == "A100") & (dc["location"] == "L1")
              & (dc["period"] == "2026-12")]
    assert cell["quantity"].tolist() == [125.0]  # one value per cell: never added up across files
    assert accepted(master_store) == 2  # both files stay stored


def test_going_back_to_an_earlier_version_makes_it_current_again(master_store, tmp_path):
    a = submit_file(DATA / "good" / "forecast.csv", url=master_store, source="dc", cycle="2026-11")
    submit_file(_changed_copy(tmp_path, "b.csv", "120", "125"), url=master_store, source="dc", cycle="2026-11")
    again = submit_file(DATA / "good" / "forecast.csv", url=master_store, source="dc", cycle="2026-11")
    assert again.status == "accepted" and again.reinstates == a.submission_id
    assert "in force again" in again.line()
    dc = sources_in_force("2026-11", url=master_store)
    cell = dc[(dc["source"] == "dc") & (dc["item"] == "A100") & (dc["period"] == "2026-12")]
    assert cell["quantity"].tolist() == [120.0]


def test_the_same_bytes_for_another_cycle_are_a_new_submission(master_store, tmp_path):
    from consensus.workflow.cycles import open_cycle

    open_cycle("2026-12", url=master_store, allow_missing_history=True)
    path = _changed_copy(tmp_path, "both.csv", "2026-12", "2027-12")  # a file valid for both cycles
    for_november = submit_file(path, url=master_store, source="dc", cycle="2026-11")
    for_december = submit_file(path, url=master_store, source="dc", cycle="2026-12")
    assert for_november.status == for_december.status == "accepted"
    assert for_december.submission_id != for_november.submission_id and for_december.reinstates is None


@pytest.mark.parametrize("name", fast_first(BAD_FORECASTS))
def test_rejected_file_changes_nothing_and_is_kept(master_store, name):
    submit_file(DATA / "good" / "forecast.csv", url=master_store, source="dc", cycle="2026-11")
    before = counts(master_store)
    with pytest.raises(InputRejected) as caught:
        # files about the cycle column are bulk files: no --cycle flag
        submit_file(DATA / "bad" / name, url=master_store, source="sales",
                    cycle=None if "cycle" in name else "2026-11")
    error = caught.value
    assert error.file == name and error.problems
    assert name in str(error.problems[0])
    after = counts(master_store)
    assert after["Submission"] == before["Submission"] + 1 and after["JournalEntry"] == before["JournalEntry"] + 1
    assert {k: v for k, v in after.items() if k not in ("Submission", "Blob", "JournalEntry")} == \
        {k: v for k, v in before.items() if k not in ("Submission", "Blob", "JournalEntry")}
    with session_scope(master_store) as s:
        kept = s.get(Submission, error.submission_id)
        assert kept.status == "rejected" and kept.reasons
        assert blobs.get_file(s, kept.sha256) == (DATA / "bad" / name).read_bytes()


def test_row_and_column_are_named(master_store):
    with pytest.raises(InputRejected) as caught:
        submit_file(DATA / "bad" / "forecast_unknown_item.csv", url=master_store, source="dc", cycle="2026-11")
    text = str(caught.value)
    assert "forecast_unknown_item.csv" in text and "row 3" in text and "'item'" in text and "ZZ9" in text


def test_flags_must_agree_with_template_meta(master_store, tmp_path):
    from consensus.workflow.templates import make_template

    path = make_template("2026-11", source="sales", out=tmp_path / "t.xlsx", grain="family,region",
                         region="NORTH", url=master_store).path
    with pytest.raises(InputRejected) as caught:
        submit_file(path, url=master_store, source="dc")
    assert "agree" in str(caught.value)


def test_unknown_source_is_refused(master_store):
    with pytest.raises(InputRejected, match="--source"):
        submit_file(DATA / "good" / "forecast.csv", url=master_store, source="finance", cycle="2026-11")


def test_master_data_must_come_first(store_url):
    from consensus.workflow.cycles import open_cycle

    open_cycle("2026-11", url=store_url, allow_missing_history=True)
    with pytest.raises(InputRejected, match="master data"):
        submit_file(DATA / "good" / "forecast.csv", url=store_url, source="dc", cycle="2026-11")


def test_folder_of_templates_submits_without_flags(master_store, tmp_path):
    from openpyxl import load_workbook

    from consensus.workflow.templates import make_template

    folder = tmp_path / "returns"
    folder.mkdir()
    written = make_template("2026-11", source="sales", out=folder / "north.xlsx", grain="family,region",
                            region="NORTH", url=master_store)
    wb = load_workbook(written.path)
    ws = wb["forecast"]
    header = next(r for r in ws.iter_rows() if any(c.value == "line" for c in r))
    months = {c.column for c in header if c.value and str(c.value)[:2] == "20"}
    filled = 0
    for row in ws.iter_rows(min_row=header[0].row + 1):  # every unlocked month cell is one to fill in
        for cell in row:
            if cell.protection.locked is False and cell.column in months:
                cell.value = 10
                filled += 1
    wb.save(written.path)
    outcome = submit_file(written.path, url=master_store)
    assert outcome.status == "accepted" and outcome.source == "sales" and outcome.scope == "region NORTH"
    assert outcome.rows == written.cells == filled == 3 * 18  # families FAM1, FAM2, FAM3 × region NORTH × 18 months


def _submit_any(path, url):
    """Feed a file through the store path its name says it belongs to."""
    from consensus.intake.submission import load_actuals_file, load_master_file

    kind = path.name.split("_", 1)[0]
    if kind == "actuals":
        return load_actuals_file(path, url=url)
    if kind in ("items", "locations", "bom"):
        return load_master_file(path, kind=kind, url=url)
    return submit_file(path, url=url, source="marketing" if kind == "events" else "sales",
                       cycle=None if "cycle" in path.name else "2026-11")


@pytest.mark.parametrize("name", fast_first(OTHER_BAD))
def test_every_broken_file_is_refused_by_the_store_and_changes_nothing(master_store, name):
    before = counts(master_store)
    with pytest.raises(InputRejected) as caught:
        _submit_any(DATA / "bad" / name, master_store)
    assert name in str(caught.value) and caught.value.submission_id
    after = counts(master_store)
    assert after["Submission"] == before["Submission"] + 1  # only the rejected file itself is kept
    assert {k: v for k, v in after.items() if k not in ("Submission", "Blob", "JournalEntry")} == \
        {k: v for k, v in before.items() if k not in ("Submission", "Blob", "JournalEntry")}


def test_a_published_cycle_takes_no_more_files_and_says_how_to_reopen(master_store):
    from consensus.workflow.publish import publish_cycle
    from consensus.workflow.run import run_cycle

    submit_file(DATA / "good" / "forecast.csv", url=master_store, source="dc", cycle="2026-11")
    run_cycle("2026-11", url=master_store, jobs=1)
    publish_cycle("2026-11", by="A. Lead", url=master_store)
    before = counts(master_store)
    with pytest.raises(CycleStateError, match="cycle reopen 2026-11"):
        submit_file(DATA / "good" / "forecast.csv", url=master_store, source="sales", cycle="2026-11")
    assert counts(master_store) == before


@pytest.mark.slow
def test_small_cycle_end_to_end_on_this_store(master_store, tmp_path):
    """Actuals, a forecast, a run, publish and export on the store under test (SQLite or PostgreSQL)."""
    from consensus.intake.submission import load_actuals_file
    from consensus.workflow.publish import export_consensus, publish_cycle
    from consensus.workflow.run import run_cycle

    load_actuals_file(DATA / "good" / "actuals_monthly.csv", url=master_store)
    submit_file(DATA / "good" / "forecast.csv", url=master_store, source="dc", cycle="2026-11")
    summary = run_cycle("2026-11", url=master_store, jobs=1)
    assert summary.cells > 0
    publish_cycle("2026-11", by="A. Lead", url=master_store)
    path, state, rows = export_consensus("2026-11", tmp_path / "c.csv", url=master_store)
    frame = pd.read_csv(path)
    assert state == "published" and rows == len(frame) == summary.cells
    assert abs(frame["consensus"].sum() - summary.total) <= 0.0005 * rows  # the export rounds to 3 decimals
