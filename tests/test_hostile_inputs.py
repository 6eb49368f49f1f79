"""Hostile and absurd files through the store: refused with a reason, kept as rejected, nothing else changed.

The files are in tests/data/hostile (made by its make_files.py); each stands for one finding of a month
end at a real company.  Before these checks some were accepted (1e308, history from 2099, a forecast
loaded as actuals) and some raised tracebacks (a damaged workbook, an items file without description).
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import pandas as pd
import pytest
from sqlalchemy import func, select

from consensus.errors import InputRejected
from consensus.intake.submission import load_actuals_file, load_master_file, submit_file
from consensus.store import frames
from consensus.store.db import session_scope
from consensus.store.models import CacheEntry, ConsensusRun, Cycle, Decision, Submission

#: The slow tier: every hostile file through the store (the fast tier is pytest -m 'not slow').
pytestmark = pytest.mark.slow

HOSTILE = Path(__file__).parent / "data" / "hostile"
ACCEPTED = {"items_no_description.csv", "locations_no_description.csv"}
# Fixed months that the calendar will one day overtake are tested against fixed limits in test_checks.py.
CALENDAR_BOUND = {"actuals_is_a_forecast.csv"}
REFUSED = sorted(p.name for p in HOSTILE.iterdir()
                 if p.suffix in (".csv", ".xlsx") and p.name not in ACCEPTED | CALENDAR_BOUND)


def _counts(url) -> dict:
    """Records, and what is in force (master data, orders, accepted files), before and after a file."""
    with session_scope(url) as session:
        out = {m.__name__: session.execute(select(func.count()).select_from(m)).scalar_one()
               for m in (Submission, Cycle, Decision, ConsensusRun, CacheEntry)}
        out["accepted"] = session.execute(select(func.count()).select_from(Submission)
                                          .where(Submission.status == "accepted")).scalar_one()
        out["items"] = len(frames.load_items(session))
        out["locations"] = len(frames.load_locations(session))
        out["bom"] = len(frames.load_bom(session))
        out["actuals"] = len(frames.load_actuals(session))
    return out


def _feed(path: Path, url: str, *, kind: str | None = None):
    """Through the store path the file's name says it belongs to (``kind`` for workbooks, which fit any)."""
    kind = kind or path.name.split("_", 1)[0]
    if kind == "actuals":
        return load_actuals_file(path, url=url)
    if kind in ("items", "locations", "bom"):
        return load_master_file(path, kind=kind, url=url)
    return submit_file(path, url=url, source="marketing" if kind == "events" else "sales", cycle="2026-11")


def _assert_refused_and_kept(path: Path, url: str, *, kind: str | None = None) -> InputRejected:
    before = _counts(url)
    with pytest.raises(InputRejected) as caught:
        _feed(path, url, kind=kind)
    assert path.name in str(caught.value) and caught.value.submission_id
    after = _counts(url)
    assert after["Submission"] == before["Submission"] + 1  # only the rejected file itself is kept
    assert {k: v for k, v in after.items() if k != "Submission"} == \
        {k: v for k, v in before.items() if k != "Submission"}
    return caught.value


@pytest.mark.parametrize("name", [n for n in REFUSED if n.endswith(".csv")])
def test_every_hostile_file_is_refused_by_the_store_and_changes_nothing(master_store, name):
    _assert_refused_and_kept(HOSTILE / name, master_store)


@pytest.mark.parametrize("kind", ["forecast", "items", "actuals"])
@pytest.mark.parametrize("name", [n for n in REFUSED if n.endswith(".xlsx")])
def test_a_damaged_workbook_is_refused_by_submit_master_and_actuals(master_store, name, kind):
    error = _assert_refused_and_kept(HOSTILE / name, master_store, kind=kind)
    assert error.problems[0].expected.startswith(("a readable .xlsx workbook", "a visible sheet"))


def test_master_files_without_the_optional_description_load(master_store):
    """They raised IntegrityError: the store's description is not null."""
    load_master_file(HOSTILE / "items_no_description.csv", kind="items", url=master_store)
    load_master_file(HOSTILE / "locations_no_description.csv", kind="locations", url=master_store)
    with session_scope(master_store) as session:
        items, locations = frames.load_items(session), frames.load_locations(session)
    assert items.set_index("item").loc[["A100", "A200"], "description"].tolist() == ["", ""]
    assert locations.set_index("location").loc[["L1", "L2"], "description"].tolist() == ["", ""]


def _months_from_now(*steps: int) -> list[str]:
    today = pd.Period(dt.date.today(), "M")
    return [(today + step).strftime("%Y-%m") for step in steps]


def test_a_forecast_given_to_actuals_is_refused_whole(master_store, tmp_path):
    """A distribution center's monthly forecast has the columns of monthly history; its future months give it away."""
    months = _months_from_now(1, 2, 3, 4)
    path = tmp_path / "dc_forecast.csv"
    pd.DataFrame({"item": "A100", "location": "L1", "period": months, "quantity": [40, 41, 42, 43]}).to_csv(path, index=False)
    error = _assert_refused_and_kept(path, master_store, kind="actuals")
    assert error.problems[0].row is None and "looks like a forecast" in error.problems[0].expected
    assert error.total_problems == 1 + len(months)


def test_history_through_this_month_loads(master_store, tmp_path):
    path = tmp_path / "orders.csv"
    months = _months_from_now(-1, 0)
    pd.DataFrame({"item": "A100", "location": "L1", "period": months, "quantity": [5, 6]}).to_csv(path, index=False)
    load_actuals_file(path, url=master_store)
    with session_scope(master_store) as session:
        assert frames.load_actuals(session)["period"].tolist() == months


def test_two_huge_actuals_cannot_make_an_infinite_total(master_store):
    """Two rows of 1e308 summed to inf in the store; now neither gets in and the stored history stays finite."""
    _assert_refused_and_kept(HOSTILE / "actuals_huge_quantity.csv", master_store)
    with session_scope(master_store) as session:
        assert frames.load_actuals(session)["quantity"].sum() == 0


def test_csv_cell_over_the_field_limit_is_refused_not_a_traceback(master_store, tmp_path):
    path = tmp_path / "forecast_long_note.csv"
    path.write_text("item,location,period,quantity,note\nA100,L1,2026-12,5," + "x" * 200_000 + "\n", encoding="utf-8")
    error = _assert_refused_and_kept(path, master_store)
    assert error.problems[0].row == 2
