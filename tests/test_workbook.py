"""Returned forecast files in the wide and the long layout: the same stored lines, problems named by cell.

The numbers typed in are the outside reference here: every layout must store
exactly those numbers, for exactly those keys and months, and nothing for a
blank cell.  Cells are read back with openpyxl (the reference reader of the
format) and CSV with pandas.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
import openpyxl
import pandas as pd
import pytest

from consensus.errors import InputRejected
from consensus.intake.checks import check_forecast_rows
from consensus.intake.reader import read_table
from consensus.intake.submission import load_actuals_file, submit_file
from consensus.intake.template_file import write_template
from consensus.intake.workbook import check_returned, read_returned_file
from consensus.periods import horizon_months
from consensus.store import blobs
from consensus.store.db import session_scope
from consensus.store.models import Submission
from consensus.workflow.templates import make_template

CYCLE = "2026-11"
MONTHS = horizon_months(CYCLE, 18)
ITEMS = pd.DataFrame({"item": ["A100", "A200", "B100", "C100"], "family": ["FAM1", "FAM1", "FAM2", "FAM3"],
                      "unit_price": [10.0, None, None, 4.5]})
LOCATIONS = pd.DataFrame({"location": ["L1", "L2", "L3"], "region": ["NORTH", "NORTH", "SOUTH"]})
HORIZONS = {CYCLE: MONTHS}
#: What a sales lead types: (family, month) -> units; every other cell of the three rows stays blank.
TYPED = {("FAM1", m): 100 + 10 * i for i, m in enumerate(MONTHS)}
TYPED |= {("FAM2", m): 7.5 for m in MONTHS[:6]}
TYPED |= {("FAM3", MONTHS[0]): 0, ("FAM3", MONTHS[17]): 1234.25}
NOTES = {"FAM2": "=launch moved to spring"}  # formula-like text must come back as typed


def _expected_lines() -> pd.DataFrame:
    rows = [(f, "NORTH", m, float(q), NOTES.get(f)) for (f, m), q in TYPED.items()]
    frame = pd.DataFrame(rows, columns=["family", "region", "period", "quantity", "note"])
    return frame.sort_values(["family", "period"], ignore_index=True)


def _stored_lines(url: str, submission_id: int) -> pd.DataFrame:
    with session_scope(url, write=False) as session:
        sha = session.get(Submission, submission_id).lines_sha256
        lines = blobs.get_frames(session, [sha])[sha]
    return lines


def _comparable(lines: pd.DataFrame) -> pd.DataFrame:
    out = lines[["family", "region", "period", "quantity", "note"]].astype(object)
    out = out.where(pd.notna(out), None)
    out["quantity"] = out["quantity"].astype(float)
    return out.sort_values(["family", "period"], ignore_index=True)


def _wide_positions(sheet) -> tuple[int, dict[str, int], dict[str, int], int]:
    """Header row, month -> column, family -> its row to fill in, and the note column of a wide template sheet."""
    header = next(r for r in sheet.iter_rows() if any(c.value == "line" for c in r))
    columns = {str(c.value): c.column for c in header if c.value is not None}
    line_col = columns["line"]
    rows = {sheet.cell(row=r, column=1).value: r for r in range(header[0].row + 1, sheet.max_row + 1)
            if sheet.cell(row=r, column=line_col).value == "Your forecast"}
    months = {m: columns[m] for m in MONTHS}
    return header[0].row, months, rows, columns["note"]


def _fill_wide_xlsx(path: Path) -> None:
    workbook = openpyxl.load_workbook(path)
    sheet = workbook["forecast"]
    _, months, rows, note = _wide_positions(sheet)
    for (family, month), quantity in TYPED.items():
        sheet.cell(row=rows[family], column=months[month], value=quantity)
    for family, text in NOTES.items():
        cell = sheet.cell(row=rows[family], column=note, value=text)
        cell.data_type = "s"  # typed as text, as a spreadsheet keeps it once the sheet has stored it as text
    workbook.save(path)


def _fill_wide_csv(path: Path) -> None:
    frame = pd.read_csv(path, dtype=str, keep_default_na=False, encoding="utf-8-sig")
    for (family, month), quantity in TYPED.items():
        frame.loc[(frame["family"] == family) & (frame["line"] == "Your forecast"), month] = str(quantity)
    for family, text in NOTES.items():
        frame.loc[(frame["family"] == family) & (frame["line"] == "Your forecast"), "note"] = "'" + text
    frame.to_csv(path, index=False)  # the submitter's spreadsheet saves the CSV again


def _long_frame() -> pd.DataFrame:
    expected = _expected_lines()
    return expected.assign(note=expected["note"].fillna(""))


def _submit(path: Path, url: str, **flags) -> pd.DataFrame:
    outcome = submit_file(path, url=url, **flags)
    assert outcome.status == "accepted", outcome.line()
    return _stored_lines(url, outcome.submission_id)


@pytest.mark.slow
def test_a_filled_workbook_in_each_layout_stores_the_same_lines(master_store, tmp_path):
    expected = _expected_lines()
    flags = {"source": "sales", "cycle": CYCLE, "scope": "region NORTH"}

    wide_xlsx = make_template(CYCLE, source="sales", out=tmp_path / "north.xlsx", grain="family,region",
                              region="NORTH", url=master_store).path
    _fill_wide_xlsx(wide_xlsx)
    from_wide_xlsx = _submit(wide_xlsx, master_store)  # the workbook knows its source, cycle and scope

    wide_csv = make_template(CYCLE, source="sales", out=tmp_path / "north.csv", grain="family,region",
                             region="NORTH", url=master_store).path
    _fill_wide_csv(wide_csv)
    from_wide_csv = _submit(wide_csv, master_store, **flags)

    long_csv = tmp_path / "north_long.csv"
    _long_frame().to_csv(long_csv, index=False)
    from_long_csv = _submit(long_csv, master_store, **flags)

    long_xlsx = write_template(tmp_path / "north_long.xlsx", _long_frame().drop(columns="quantity"),
                               meta={"source": "sales", "cycle": CYCLE, "scope": "region NORTH"})
    workbook = openpyxl.load_workbook(long_xlsx)
    sheet = workbook["forecast"]
    column = [c.value for c in sheet[1]].index("quantity") + 1
    for row, quantity in enumerate(_long_frame()["quantity"], start=2):
        sheet.cell(row=row, column=column, value=quantity)
    workbook.save(long_xlsx)
    from_long_xlsx = _submit(long_xlsx, master_store)

    for stored in (from_wide_xlsx, from_wide_csv, from_long_csv, from_long_xlsx):
        pd.testing.assert_frame_equal(_comparable(stored), _comparable(expected))
    # A wide line keeps the spreadsheet row it was typed in; all the months of one row share it.
    assert from_wide_xlsx.groupby("family")["row"].nunique().eq(1).all()
    assert len(from_wide_xlsx) == len(TYPED) == 18 + 6 + 2  # blank cells are no forecast, not zeros


def _wide_book(tmp_path: Path, name: str = "north.xlsx") -> Path:
    """A filled wide template made without a store (the writer alone), for the reading tests."""
    from consensus.intake.template_file import ReferenceLine, WideTemplate, write_wide_template

    keys = pd.DataFrame({"family": ["FAM1", "FAM2", "FAM3"], "region": ["NORTH"] * 3})
    orders = pd.DataFrame({"family": ["FAM1"], "region": ["NORTH"], "period": [CYCLE], "quantity": [80.0]})
    book = WideTemplate(keys=keys, history_months=(CYCLE,), horizon_months=tuple(MONTHS), frozen_months=(),
                        references=(ReferenceLine("orders", "Reference: orders", orders),),
                        meta={"source": "sales", "cycle": CYCLE, "scope": "region NORTH"}, title="Sales, NORTH")
    path = write_wide_template(tmp_path / name, book)
    _fill_wide_xlsx(path)
    return path


def _check(path: Path, **options):
    returned = read_returned_file(path)
    return returned, check_returned(returned, check_forecast_rows, filename=path.name, items=ITEMS,
                                    locations=LOCATIONS, horizons=HORIZONS, default_cycle=CYCLE, **options)


def _sheet_cell(path: Path, family: str, month: str) -> str:
    sheet = openpyxl.load_workbook(path)["forecast"]
    _, months, rows, _ = _wide_positions(sheet)
    return sheet.cell(row=rows[family], column=months[month]).coordinate


def _set(path: Path, coordinate: str, value) -> None:
    workbook = openpyxl.load_workbook(path)
    workbook["forecast"][coordinate] = value
    workbook.save(path)


def test_a_problem_names_the_spreadsheet_cell_and_what_it_stands_for(tmp_path):
    path = _wide_book(tmp_path)
    text_cell, negative_cell = _sheet_cell(path, "FAM1", "2027-05"), _sheet_cell(path, "FAM2", MONTHS[0])
    _set(path, text_cell, "abc")
    _set(path, negative_cell, -4)
    _, result = _check(path)
    assert [str(p) for p in result.problems] == [
        f"north.xlsx, cell {text_cell} (family FAM1 × region NORTH, 2027-05): got 'abc'; expected a number written "
        "with '.' for decimals and no thousands separators",
        f"north.xlsx, cell {negative_cell} (family FAM2 × region NORTH, {MONTHS[0]}): got '-4'; expected a quantity "
        "of 0 or more",
    ]
    assert result.total_problems == 2 and result.clean.shape[0] == len(TYPED) - 2


def test_a_key_cell_problem_is_listed_once_not_once_per_month(tmp_path):
    path = _wide_book(tmp_path)
    sheet = openpyxl.load_workbook(path)["forecast"]
    _, _, rows, _ = _wide_positions(sheet)
    _set(path, f"A{rows['FAM1']}", "FAM9")
    _, result = _check(path)
    assert [str(p) for p in result.problems] == [
        f"north.xlsx, cell A{rows['FAM1']} (family FAM9 × region NORTH): got 'FAM9'; expected a family code in the "
        "item master"]
    assert result.total_problems == 1


def test_a_repeated_row_is_named_with_the_row_it_repeats(tmp_path):
    path = _wide_book(tmp_path)
    sheet = openpyxl.load_workbook(path)["forecast"]
    _, _, rows, _ = _wide_positions(sheet)
    _set(path, f"A{rows['FAM2']}", "fam1")  # matched ignoring case, as the checks match codes
    _, result = _check(path)
    assert [str(p) for p in result.problems] == [
        f"north.xlsx, cell A{rows['FAM2']} (family fam1 × region NORTH): got 'fam1'; expected one row per family × "
        f"region; the same one is already at row {rows['FAM1']}"]


def test_reference_lines_and_blank_cells_are_never_read(tmp_path):
    path = _wide_book(tmp_path)
    workbook = openpyxl.load_workbook(path)
    sheet = workbook["forecast"]
    _, months, rows, _ = _wide_positions(sheet)
    reference_row = rows["FAM1"] + 1
    assert str(sheet.cell(row=reference_row, column=3).value).startswith("Reference")
    sheet.cell(row=reference_row, column=months[MONTHS[3]], value=999_999)  # typed over a reference by mistake
    workbook.save(path)
    returned, result = _check(path)
    assert result.is_clean
    assert 999_999.0 not in set(result.clean["quantity"])
    assert len(result.clean) == len(TYPED)  # one line per filled cell, none for a blank one
    assert returned.raw.file_format["layout"] == "wide"


def test_frozen_months_take_no_number(tmp_path):
    path = _wide_book(tmp_path)
    cell = _sheet_cell(path, "FAM1", MONTHS[0])
    _, result = _check(path, frozen_months=2)
    first = [str(p) for p in result.problems]
    # FAM1 fills both frozen months, FAM2 both, FAM3 the first: five cells
    assert result.total_problems == 5
    assert first[0] == (f"north.xlsx, cell {cell} (family FAM1 × region NORTH, {MONTHS[0]}): got '100'; expected no "
                        "number here: the first 2 months of the horizon are frozen (setting cycle.frozen_months) "
                        "and keep the plan they have")
    assert _check(path, frozen_months=0)[1].is_clean


def test_a_wide_csv_names_cells_as_a_spreadsheet_shows_the_csv(tmp_path):
    """Opened in a spreadsheet a CSV's first line is row 1 and its first field column A."""
    frame = pd.DataFrame({"family": ["FAM1", "FAM2"], "region": ["NORTH", "NORTH"],
                          MONTHS[0]: ["10", "x"], MONTHS[1]: ["", "5"]})
    path = tmp_path / "made_by_hand.csv"
    frame.to_csv(path, index=False, sep=";")
    _, result = _check(path)
    assert [str(p) for p in result.problems] == [
        f"made_by_hand.csv, cell C3 (family FAM2 × region NORTH, {MONTHS[0]}): got 'x'; expected a number written "
        "with '.' for decimals and no thousands separators"]
    assert result.clean["quantity"].tolist() == [10.0, 5.0]  # the blank cells gave no line; 'x' is refused


def test_month_headers_typed_as_dates_are_months(tmp_path):
    """A spreadsheet turns "2026-12" typed in a header into a date; the first of a month reads as that month."""
    workbook = openpyxl.Workbook()
    sheet = workbook.active
    sheet.append(["family", "region", dt.datetime(2026, 12, 1), dt.datetime(2027, 1, 1)])
    sheet.append(["FAM1", "NORTH", 5, 6])
    path = tmp_path / "dates.xlsx"
    workbook.save(path)
    _, result = _check(path)
    assert result.is_clean and result.clean["period"].tolist() == ["2026-12", "2027-01"]


def test_a_workbook_that_says_wide_without_its_header_is_refused(tmp_path):
    path = _wide_book(tmp_path)
    workbook = openpyxl.load_workbook(path)
    sheet = workbook["forecast"]
    header_row, _, _, _ = _wide_positions(sheet)
    sheet.protection.sheet = False
    sheet.delete_rows(header_row)
    workbook.save(path)
    with pytest.raises(InputRejected, match="a header row with an 'item' or 'family' column and month columns"):
        read_returned_file(path)


def test_a_long_file_reads_exactly_as_before(tmp_path):
    for name in ("forecast.csv", "forecast_mid_month_date.xlsx"):
        source = Path(__file__).parent / "data" / ("good" if name == "forecast.csv" else "bad") / name
        returned = read_returned_file(source)
        plain = read_table(source)
        assert returned.layout == "long" and returned.cells is None
        pd.testing.assert_frame_equal(returned.raw.frame, plain.frame)
        assert returned.raw.rows.tolist() == plain.rows.tolist()


def test_every_problem_of_a_long_file_keeps_its_row_message(tmp_path):
    source = Path(__file__).parent / "data" / "bad" / "forecast_negative.csv"
    returned = read_returned_file(source)
    checked = check_returned(returned, check_forecast_rows, filename=source.name, items=ITEMS, locations=LOCATIONS,
                             horizons=HORIZONS, default_cycle=CYCLE)
    plain = check_forecast_rows(read_table(source), filename=source.name, items=ITEMS, locations=LOCATIONS,
                                horizons=HORIZONS, default_cycle=CYCLE)
    assert [str(p) for p in checked.problems] == [str(p) for p in plain.problems]
    assert all(", row " in str(p) for p in checked.problems)


def _counts(url: str) -> dict[str, int]:
    from sqlalchemy import func, select

    from consensus.store.models import JournalEntry, SubmissionCycle

    with session_scope(url, write=False) as session:
        return {m.__name__: session.execute(select(func.count()).select_from(m)).scalar_one()
                for m in (Submission, SubmissionCycle, JournalEntry)}


def test_a_rejected_workbook_writes_nothing_but_itself(master_store, tmp_path):
    path = make_template(CYCLE, source="sales", out=tmp_path / "north.xlsx", grain="family,region", region="NORTH",
                         url=master_store).path
    _fill_wide_xlsx(path)
    _set(path, _sheet_cell(path, "FAM3", MONTHS[17]), "12,5")
    before = _counts(master_store)
    with pytest.raises(InputRejected) as caught:
        submit_file(path, url=master_store)
    assert f"cell {_sheet_cell(path, 'FAM3', MONTHS[17])} (family FAM3 × region NORTH, {MONTHS[17]}): got '12,5'" \
        in str(caught.value)
    after = _counts(master_store)
    assert after["Submission"] == before["Submission"] + 1 and after["SubmissionCycle"] == before["SubmissionCycle"]
    with session_scope(master_store, write=False) as session:
        kept = session.get(Submission, caught.value.submission_id)
        assert kept.status == "rejected" and any("cell " in r for r in kept.reasons)


def test_a_declared_scope_names_the_cell_of_a_row_outside_it(master_store, tmp_path):
    path = make_template(CYCLE, source="sales", out=tmp_path / "north.xlsx", grain="family,region", region="NORTH",
                         url=master_store).path
    _fill_wide_xlsx(path)
    sheet = openpyxl.load_workbook(path)["forecast"]
    _, _, rows, _ = _wide_positions(sheet)
    _set(path, f"B{rows['FAM2']}", "SOUTH")
    with pytest.raises(InputRejected) as caught:
        submit_file(path, url=master_store)
    problems = [str(p) for p in caught.value.problems]
    assert problems == [f"north.xlsx, cell B{rows['FAM2']} (family FAM2 × region SOUTH): got 'SOUTH'; expected a "
                        "region wholly inside the declared scope (region NORTH)"]


def test_a_workbook_given_as_order_history_is_refused_as_a_template(master_store, tmp_path):
    path = make_template(CYCLE, source="sales", out=tmp_path / "north.xlsx", grain="family,region", region="NORTH",
                         url=master_store).path
    _fill_wide_xlsx(path)
    with pytest.raises(InputRejected, match="it has the column"):
        load_actuals_file(path, url=master_store)


def test_the_frozen_setting_locks_months_and_refuses_them_on_return(master_store, tmp_path):
    from consensus.workflow.settings import set_setting

    set_setting("cycle.frozen_months", "1", url=master_store)
    path = make_template(CYCLE, source="sales", out=tmp_path / "north.xlsx", grain="family,region", region="NORTH",
                         url=master_store).path
    sheet = openpyxl.load_workbook(path)["forecast"]
    _, months, rows, _ = _wide_positions(sheet)
    frozen = sheet.cell(row=rows["FAM1"], column=months[MONTHS[0]])
    opened = sheet.cell(row=rows["FAM1"], column=months[MONTHS[1]])
    assert frozen.protection.locked and opened.protection.locked is False and sheet.protection.sheet
    validated = " ".join(str(v.sqref) for v in sheet.data_validations.dataValidation)
    assert opened.coordinate.rstrip("0123456789") in validated and f"{frozen.coordinate}:" not in validated
    _fill_wide_xlsx(path)  # openpyxl ignores the lock, as a CSV would
    with pytest.raises(InputRejected, match=f"cell {frozen.coordinate} .*the first month of the horizon is frozen"):
        submit_file(path, url=master_store)
    with pytest.raises(Exception, match="whole number from 0 to 60"):
        set_setting("cycle.frozen_months", "1.5", url=master_store)


def test_unknown_columns_of_a_wide_file_are_ignored_with_a_warning(tmp_path):
    frame = pd.DataFrame({"family": ["FAM1"], "region": ["NORTH"], "total": ["99"], MONTHS[0]: ["3"]})
    path = tmp_path / "with_total.csv"
    frame.to_csv(path, index=False)
    _, result = _check(path)
    assert result.is_clean and result.clean["quantity"].tolist() == [3.0]
    assert [str(w) for w in result.warnings] == [
        "with_total.csv, cell C1; expected a key column (item or family, location or region), 'line', 'note' or a "
        "month YYYY-MM; this column is ignored"]


def test_item_by_location_rows_melt_with_their_cells(tmp_path):
    frame = pd.DataFrame({"item": ["A100", "C100"], "location": ["L1", "L3"], MONTHS[2]: ["1.5", ""],
                          MONTHS[3]: ["", "2"]})
    path = tmp_path / "dc.csv"
    frame.to_csv(path, index=False)
    returned, result = _check(path)
    assert result.is_clean
    assert result.clean[["item", "location", "period", "quantity"]].astype(object).values.tolist() == [
        ["A100", "L1", MONTHS[2], 1.5], ["C100", "L3", MONTHS[3], 2.0]]
    assert returned.cells.value_cells.tolist() == ["C2", "D3"]
    assert np.asarray(returned.cells.sheet_rows).tolist() == [2, 3]


def test_a_wide_file_melting_into_more_rows_than_a_long_file_may_have_is_refused(tmp_path):
    """Each filled month cell is a long row; the long layout's row limit holds for them too."""
    from consensus.intake.reader import ReadLimits

    frame = pd.DataFrame({"family": ["FAM1", "FAM2"], "region": ["NORTH"] * 2, MONTHS[0]: ["1", "2"],
                          MONTHS[1]: ["3", "4"]})
    path = tmp_path / "wide.csv"
    frame.to_csv(path, index=False)
    with pytest.raises(InputRejected, match="at most 3 filled month cells .*this one has 4"):
        read_returned_file(path, limits=ReadLimits(max_rows=3))
    assert len(read_returned_file(path, limits=ReadLimits(max_rows=4)).raw.frame) == 4
