"""The intake transaction: accepted, duplicate, superseded and rejected files, on SQLite and PostgreSQL.

The rules come from the foundation issue; the broken files are the intake checks' own
(tests/data/bad), each fed through the whole store path to show nothing changes.
"""

from __future__ import annotations

import shutil

import pytest
from sqlalchemy import func, select

from consensus.errors import InputRejected
from consensus.intake.submission import submit_file
from consensus.store.db import session_scope
from consensus.store.models import ForecastLine, Submission, SubmissionCycle
from tests.conftest import DATA

BAD_FORECASTS = sorted(p.name for p in (DATA / "bad").glob("forecast_*.csv"))


def counts(url) -> dict:
    with session_scope(url) as s:
        return {
            "lines": s.execute(select(func.count()).select_from(ForecastLine)).scalar_one(),
            "accepted": s.execute(select(func.count()).select_from(Submission)
                                  .where(Submission.status == "accepted")).scalar_one(),
            "rejected": s.execute(select(func.count()).select_from(Submission)
                                  .where(Submission.status == "rejected")).scalar_one(),
        }


def test_accepted_file_is_stored_with_its_bytes_and_lines(master_store):
    outcome = submit_file(DATA / "good" / "forecast.csv", url=master_store, source="dc", cycle="2026-11",
                          submitted_by="R. Tester")
    assert outcome.status == "accepted" and outcome.rows == 5
    with session_scope(master_store) as s:
        sub = s.get(Submission, outcome.submission_id)
        assert sub.content == (DATA / "good" / "forecast.csv").read_bytes()
        assert len(sub.sha256) == 64 and sub.submitted_by == "R. Tester"
    assert counts(master_store)["lines"] == 5


def test_same_file_twice_is_recognised_by_hash(master_store):
    first = submit_file(DATA / "good" / "forecast.csv", url=master_store, source="dc", cycle="2026-11")
    again = submit_file(DATA / "good" / "forecast.csv", url=master_store, source="dc", cycle="2026-11")
    assert again.status == "duplicate" and again.submission_id == first.submission_id
    assert counts(master_store)["lines"] == 5


def test_new_file_supersedes_and_old_stays_visible(master_store, tmp_path):
    first = submit_file(DATA / "good" / "forecast.csv", url=master_store, source="dc", cycle="2026-11")
    changed = tmp_path / "forecast_v2.csv"
    changed.write_text((DATA / "good" / "forecast.csv").read_text().replace("120", "125"))
    second = submit_file(changed, url=master_store, source="dc", cycle="2026-11")
    assert second.superseded == [first.submission_id]
    with session_scope(master_store) as s:
        assert s.get(Submission, first.submission_id).status == "superseded"
        in_force = s.execute(select(SubmissionCycle.submission_id).where(SubmissionCycle.status == "accepted")).all()
        assert [r[0] for r in in_force] == [second.submission_id]
    assert counts(master_store)["lines"] == 10  # both files' lines are kept


@pytest.mark.parametrize("name", BAD_FORECASTS)
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
    assert after["lines"] == before["lines"] and after["accepted"] == before["accepted"]
    assert after["rejected"] == before["rejected"] + 1
    with session_scope(master_store) as s:
        kept = s.get(Submission, error.submission_id)
        assert kept.status == "rejected" and kept.reasons and kept.content == (DATA / "bad" / name).read_bytes()


def test_row_and_column_are_named(master_store):
    with pytest.raises(InputRejected) as caught:
        submit_file(DATA / "bad" / "forecast_unknown_item.csv", url=master_store, source="dc", cycle="2026-11")
    text = str(caught.value)
    assert "forecast_unknown_item.csv" in text and "row 3" in text and "'item'" in text and "ZZ9" in text


def test_flags_must_agree_with_template_meta(master_store, tmp_path):
    from consensus.workflow.templates import make_template

    path, _ = make_template("2026-11", source="sales", out=tmp_path / "t.xlsx", grain="family,region",
                            region="NORTH", url=master_store)
    with pytest.raises(InputRejected) as caught:
        submit_file(path, url=master_store, source="dc")
    assert "agree" in str(caught.value)


def test_unknown_source_is_refused(master_store):
    with pytest.raises(InputRejected, match="--source"):
        submit_file(DATA / "good" / "forecast.csv", url=master_store, source="finance", cycle="2026-11")


def test_master_data_must_come_first(store_url):
    from consensus.workflow.cycles import open_cycle

    open_cycle("2026-11", url=store_url)
    with pytest.raises(InputRejected, match="master data"):
        submit_file(DATA / "good" / "forecast.csv", url=store_url, source="dc", cycle="2026-11")


def test_folder_of_templates_submits_without_flags(master_store, tmp_path):
    from openpyxl import load_workbook

    from consensus.workflow.templates import make_template

    folder = tmp_path / "returns"
    folder.mkdir()
    path, rows = make_template("2026-11", source="sales", out=folder / "north.xlsx", grain="family,region",
                               region="NORTH", url=master_store)
    wb = load_workbook(path)
    ws = wb["forecast"]
    header = [c.value for c in ws[1]]
    qcol = header.index("quantity") + 1
    for r in range(2, ws.max_row + 1):
        ws.cell(row=r, column=qcol, value=10)
    wb.save(path)
    outcome = submit_file(path, url=master_store)
    assert outcome.status == "accepted" and outcome.source == "sales" and outcome.scope == "region NORTH"
    assert outcome.rows == rows


def _all_counts(url) -> dict:
    from consensus.store.models import Actual, BomLine, EventLine, Item, Location

    with session_scope(url) as s:
        return {m.__name__: s.execute(select(func.count()).select_from(m)).scalar_one()
                for m in (ForecastLine, EventLine, Actual, Item, Location, BomLine, Submission)}


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


OTHER_BAD = sorted(p.name for p in (DATA / "bad").iterdir() if not p.name.startswith("forecast_"))


@pytest.mark.parametrize("name", OTHER_BAD)
def test_every_broken_file_is_refused_by_the_store_and_changes_nothing(master_store, name):
    before = _all_counts(master_store)
    with pytest.raises(InputRejected) as caught:
        _submit_any(DATA / "bad" / name, master_store)
    assert name in str(caught.value) and caught.value.submission_id
    after = _all_counts(master_store)
    assert after["Submission"] == before["Submission"] + 1  # only the rejected file itself is kept
    assert {k: v for k, v in after.items() if k != "Submission"} == \
        {k: v for k, v in before.items() if k != "Submission"}


def test_small_cycle_end_to_end_on_this_store(master_store, tmp_path):
    """Actuals, a forecast, a run, publish and export on the store under test (SQLite or PostgreSQL)."""
    import pandas as pd

    from consensus.intake.submission import load_actuals_file
    from consensus.workflow.publish import export_consensus, publish_cycle
    from consensus.workflow.run import run_cycle

    load_actuals_file(DATA / "good" / "actuals_monthly.csv", url=master_store)
    submit_file(DATA / "good" / "forecast.csv", url=master_store, source="dc", cycle="2026-11")
    summary = run_cycle("2026-11", url=master_store)
    assert summary.cells > 0
    publish_cycle("2026-11", url=master_store)
    path, state, rows = export_consensus("2026-11", tmp_path / "c.csv", url=master_store)
    frame = pd.read_csv(path)
    assert state == "published" and rows == len(frame) == summary.cells
    assert abs(frame["consensus"].sum() - summary.total) <= 0.0005 * rows  # the export rounds to 3 decimals
