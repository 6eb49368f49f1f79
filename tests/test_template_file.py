"""Fill-in templates: layout, hidden meta sheet, and the round trip through read and check."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import openpyxl
import pandas as pd
import pytest

from consensus.errors import InvalidSpec, OutputNotWritable
from consensus.intake.checks import check_forecast_rows, detect_file_kind
from consensus.intake.reader import read_table
from consensus.intake.template_file import write_template
from consensus.periods import horizon_months

ITEMS = pd.DataFrame({"item": ["A100", "00123"], "family": ["FAM1", "FAM1"], "unit_price": [10.0, 2.0]})
LOCATIONS = pd.DataFrame({"location": ["L1", "L2"], "region": ["NORTH", "NORTH"]})
CYCLE = "2026-11"
HORIZONS = {CYCLE: horizon_months(CYCLE, 18)}
META = {"source": "sales", "cycle": CYCLE, "scope": "region NORTH", "grain": "item-location-month",
        "generated_at": "2026-11-30T08:00:00+00:00"}


def _scope_frame() -> pd.DataFrame:
    months = HORIZONS[CYCLE][:3]
    frame = pd.DataFrame(
        [(item, location, month) for item in ITEMS["item"] for location in LOCATIONS["location"] for month in months],
        columns=["item", "location", "period"],
    )
    frame["last_consensus"] = np.where(frame.index % 4 == 0, np.nan, frame.index * 1.5)
    frame["quantity"] = 99.0  # a template never suggests the number to fill in
    return frame


def test_xlsx_template_layout(tmp_path):
    path = write_template(tmp_path / "sales_north.xlsx", _scope_frame(), meta=META)
    workbook = openpyxl.load_workbook(path)
    sheet = workbook["forecast"]
    header = [c.value for c in sheet[1]]
    assert header == ["item", "location", "period", "quantity", "last_consensus"]
    assert all(c.font.bold for c in sheet[1])
    assert sheet.freeze_panes == "A2"
    assert all(sheet.cell(row=r, column=4).value is None for r in range(2, sheet.max_row + 1))
    assert sheet.cell(row=2, column=1).value == "A100" and sheet.cell(row=8, column=1).value == "00123"
    assert sheet.cell(row=3, column=5).value == 1.5 and sheet.cell(row=2, column=5).value is None
    assert sheet.cell(row=1, column=5).comment is not None
    assert all(sheet.column_dimensions[letter].width >= 8 for letter in "ABCDE")
    hidden = workbook["_consensus"]
    assert hidden.sheet_state == "hidden"
    assert {r[0]: r[1] for r in hidden.iter_rows(min_row=2, values_only=True)} == META
    assert workbook.sheetnames == ["forecast", "_consensus"]


def test_filled_xlsx_template_round_trips_through_read_and_check(tmp_path):
    path = write_template(tmp_path / "sales_north.xlsx", _scope_frame(), meta=META)
    workbook = openpyxl.load_workbook(path)
    sheet = workbook["forecast"]
    for row in range(2, sheet.max_row + 1):
        sheet.cell(row=row, column=4).value = (row - 2) * 10  # a submitter types whole numbers
    workbook.save(path)

    raw = read_table(path)
    assert raw.meta == META
    assert raw.file_format["sheet"] == "forecast"
    assert raw.rows.tolist() == list(range(2, 14))
    assert raw.frame["item"].tolist()[6] == "00123"  # leading zeros survive as text
    assert raw.frame["quantity"].tolist()[:3] == ["0", "10", "20"]
    assert detect_file_kind(raw) == "forecast"

    result = check_forecast_rows(raw, filename=path.name, items=ITEMS, locations=LOCATIONS, horizons=HORIZONS,
                                 default_cycle=raw.meta["cycle"])
    assert result.is_clean and result.warnings == []  # last_consensus is a reference column, ignored quietly
    assert result.clean["quantity"].tolist() == [10.0 * i for i in range(12)]
    assert set(result.clean["period"]) == set(HORIZONS[CYCLE][:3])


def test_unfilled_template_is_not_taken_as_zeros(tmp_path):
    path = write_template(tmp_path / "blank.xlsx", _scope_frame(), meta=META)
    result = check_forecast_rows(read_table(path), filename="blank.xlsx", items=ITEMS, locations=LOCATIONS,
                                 horizons=HORIZONS, default_cycle=CYCLE)
    assert result.total_problems == 12
    assert str(result.problems[0]).startswith("blank.xlsx, row 2, column 'quantity': got ''")


def test_generated_at_is_added_when_missing(tmp_path):
    path = write_template(tmp_path / "t.xlsx", _scope_frame(), meta={"source": "dc", "cycle": CYCLE})
    meta = read_table(path).meta
    assert list(meta) == ["source", "cycle", "generated_at"]
    assert pd.Timestamp(meta["generated_at"]).tz is not None


def test_csv_template_carries_the_frame_only(tmp_path):
    path = write_template(tmp_path / "sales_north.csv", _scope_frame(), meta=META)
    assert path.read_bytes().startswith(b"\xef\xbb\xbfitem,location,period,quantity,last_consensus\r\n")
    raw = read_table(path)
    assert raw.meta == {}  # CSV has nowhere to keep it: submit with source and cycle flags
    assert raw.frame["quantity"].eq("").all()
    assert raw.frame["last_consensus"].tolist()[:3] == ["", "1.5", "3"]
    assert raw.frame["item"].tolist()[6] == "00123"


def test_template_format_is_a_closed_set(tmp_path):
    with pytest.raises(InvalidSpec, match="template format"):
        write_template(tmp_path / "t.ods", _scope_frame(), meta=META)


def test_template_without_quantity_column_gets_one(tmp_path):
    frame = _scope_frame().drop(columns=["quantity", "last_consensus"])
    path = write_template(tmp_path / "t.xlsx", frame, meta=META)
    assert list(read_table(path).frame.columns) == ["item", "location", "period", "quantity"]


def test_returned_template_path_is_the_one_given(tmp_path):
    target = tmp_path / "nested.xlsx"
    assert write_template(target, _scope_frame(), meta=META) == Path(target)


# ---- formula text and safe writing -------------------------------------------------------------------
# Notes a submitter or planner might type; each starts with a character a spreadsheet runs as a formula
# (OWASP, "CSV Injection": "=", "+", "-", "@", tab, carriage return).
FORMULA_NOTES = ["=HYPERLINK(\"http://x.invalid\",\"open\")", "+41 22 000 00 00", "-5% after the price rise",
                 "@team please check", "plain note"]


def _frame_with_notes() -> pd.DataFrame:
    frame = _scope_frame().drop(columns=["quantity"]).head(len(FORMULA_NOTES)).copy()
    frame["note"] = FORMULA_NOTES
    return frame


def _fill_quantities(path: Path) -> None:
    workbook = openpyxl.load_workbook(path)
    sheet = workbook["forecast"]
    column = [c.value for c in sheet[1]].index("quantity") + 1
    for row in range(2, sheet.max_row + 1):
        sheet.cell(row=row, column=column).value = row
    workbook.save(path)


def test_xlsx_template_stores_formula_text_as_text_cells(tmp_path):
    """Read with openpyxl, the reference reader: every note is a string cell (data type 's'), never 'f'."""
    path = write_template(tmp_path / "t.xlsx", _frame_with_notes(), meta={**META, "scope": "=region NORTH"})
    workbook = openpyxl.load_workbook(path)
    sheet = workbook["forecast"]
    column = [c.value for c in sheet[1]].index("note") + 1
    cells = [sheet.cell(row=r, column=column) for r in range(2, 2 + len(FORMULA_NOTES))]
    assert [c.value for c in cells] == FORMULA_NOTES
    assert [c.data_type for c in cells] == ["s"] * len(FORMULA_NOTES)
    assert [bool(c.quotePrefix) for c in cells] == [True, True, True, True, False]
    meta_cell = next(r[1] for r in workbook["_consensus"].iter_rows(min_row=2) if r[0].value == "scope")
    assert meta_cell.data_type == "s" and meta_cell.value == "=region NORTH"


def test_returned_xlsx_template_reads_back_the_original_notes(tmp_path):
    path = write_template(tmp_path / "t.xlsx", _frame_with_notes(), meta=META)
    _fill_quantities(path)  # the submitter's spreadsheet saves the file again
    raw = read_table(path)
    result = check_forecast_rows(raw, filename=path.name, items=ITEMS, locations=LOCATIONS, horizons=HORIZONS,
                                 default_cycle=CYCLE)
    assert result.is_clean, [str(p) for p in result.problems]
    assert result.clean["note"].tolist() == FORMULA_NOTES


def test_csv_template_escapes_formula_text_and_reads_back_the_original(tmp_path):
    path = write_template(tmp_path / "t.csv", _frame_with_notes(), meta=META)
    text = path.read_text(encoding="utf-8-sig")
    assert "'=HYPERLINK" in text and "'+41 22" in text and "'-5% after" in text and "'@team" in text
    assert ",plain note" in text  # text that is no formula is written as it is
    frame = pd.read_csv(path, dtype=str, keep_default_na=False)
    frame["quantity"] = "7"
    frame.to_csv(path, index=False)  # the submitter fills in the numbers
    result = check_forecast_rows(read_table(path), filename=path.name, items=ITEMS, locations=LOCATIONS,
                                 horizons=HORIZONS, default_cycle=CYCLE)
    assert result.is_clean, [str(p) for p in result.problems]
    assert result.clean["note"].tolist() == FORMULA_NOTES  # the quote the tool added is removed again


def test_template_into_a_folder_or_a_missing_folder_is_a_clear_error(tmp_path):
    for target in (tmp_path, tmp_path / "no_such_folder" / "t.xlsx", tmp_path / "no_such_folder" / "t.csv"):
        with pytest.raises(OutputNotWritable):
            write_template(target, _scope_frame(), meta=META)


def test_a_template_that_fails_to_save_leaves_the_previous_one(tmp_path, monkeypatch):
    path = write_template(tmp_path / "t.xlsx", _scope_frame(), meta=META)
    before = path.read_bytes()

    def broken_save(self, filename):
        Path(filename).write_bytes(b"PK\x03\x04 half a workbook")
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(openpyxl.Workbook, "save", broken_save)
    with pytest.raises(OutputNotWritable, match="No space left on device"):
        write_template(path, _scope_frame(), meta=META)
    assert path.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["t.xlsx"]


# ---- the wide layout ---------------------------------------------------------------------------------
# Read back with openpyxl, the reference reader of the format: what is locked, what may be typed, what is checked.
from consensus.intake.template_file import ReferenceLine, WideTemplate, wide_grid, write_wide_template  # noqa: E402

WIDE_HORIZON = tuple(HORIZONS[CYCLE][:6])
WIDE_KEYS = pd.DataFrame({"family": ["FAM1", "FAM2"], "region": ["NORTH", "NORTH"]})


def _wide_book(**changes) -> WideTemplate:
    orders = pd.DataFrame({"family": ["FAM1", "FAM1", "FAM2"], "region": ["NORTH"] * 3,
                           "period": ["2026-10", "2026-11", "2026-11"], "quantity": [40.0, 44.4, 9.0]})
    last_year = pd.DataFrame({"family": ["FAM1"], "region": ["NORTH"], "period": [WIDE_HORIZON[0]],
                              "quantity": [31.0]})
    consensus = pd.DataFrame({"family": ["FAM2"] * 2, "region": ["NORTH"] * 2, "period": list(WIDE_HORIZON[:2]),
                              "quantity": [12.6, 13.4]})
    values = dict(keys=WIDE_KEYS, history_months=("2026-10", "2026-11"), horizon_months=WIDE_HORIZON,
                  frozen_months=WIDE_HORIZON[:1],
                  references=(ReferenceLine("orders", "Reference: orders", orders),
                              ReferenceLine("orders_last_year", "Reference: orders a year earlier", last_year),
                              ReferenceLine("last_consensus", "Reference: last consensus (cycle 2026-10)", consensus),
                              ReferenceLine("statistical", "Reference: statistical forecast (not yet computed)",
                                            orders.iloc[0:0])),
                  meta={"source": "sales", "cycle": CYCLE, "scope": "region NORTH",
                        "generated_at": "2026-11-30T08:00:00+00:00"},
                  title="Sales forecast, cycle 2026-11, region NORTH", notes=("Type in the yellow cells.",))
    values.update(changes)
    return WideTemplate(**values)


def _header(sheet) -> tuple[int, list]:
    row = next(r for r in sheet.iter_rows() if any(c.value == "line" for c in r))
    return row[0].row, [c.value for c in row]


def test_wide_xlsx_shows_references_under_each_row_and_locks_all_but_the_cells_to_fill(tmp_path):
    path = write_wide_template(tmp_path / "north.xlsx", _wide_book())
    workbook = openpyxl.load_workbook(path)
    assert workbook.sheetnames == ["forecast", "Your track record", "_consensus"]
    sheet = workbook["forecast"]
    assert sheet["A1"].value == "Sales forecast, cycle 2026-11, region NORTH" and sheet["A1"].font.bold
    header_row, header = _header(sheet)
    assert header == ["family", "region", "line", "2026-10", "2026-11", *WIDE_HORIZON, "note"]
    lines = [sheet.cell(row=r, column=3).value for r in range(header_row + 1, sheet.max_row + 1)]
    assert lines == ["Your forecast", "Reference: orders", "Reference: orders a year earlier",
                     "Reference: last consensus (cycle 2026-10)",
                     "Reference: statistical forecast (not yet computed)"] * 2
    first, second = header_row + 1, header_row + 6
    assert [sheet.cell(row=first + 1, column=c).value for c in (4, 5)] == [40, 44]  # whole units
    assert sheet.cell(row=first + 2, column=6).value == 31  # a year before the first planned month
    assert [sheet.cell(row=second + 3, column=c).value for c in (6, 7)] == [13, 13]
    assert all(sheet.cell(row=first + 4, column=c).value is None for c in range(4, 12))

    assert sheet.protection.sheet
    unlocked = {c.coordinate for row in sheet.iter_rows() for c in row if c.protection.locked is False}
    letters = "GHIJK"  # the five open months; the frozen first month (F) and the history (D, E) stay locked
    assert unlocked == {f"{x}{r}" for r in (first, second) for x in [*letters, "L"]}
    assert all(sheet[f"{x}{first}"].fill.fgColor.rgb.endswith("FFF2CC") for x in letters)
    rules = sheet.data_validations.dataValidation
    assert len(rules) == 1 and rules[0].type == "decimal" and rules[0].operator == "greaterThanOrEqual"
    assert rules[0].formula1 == "0" and rules[0].allow_blank
    assert str(rules[0].sqref) == f"G{first}:K{first} G{second}:K{second}"
    assert sheet.freeze_panes == f"D{first}"
    band = {sheet.cell(row=header_row - 1, column=c).value for c in range(1, 13)}
    assert {"Reference: orders, last 12 months", "Frozen: shown, not open to change"} <= band
    meta = {r[0]: r[1] for r in workbook["_consensus"].iter_rows(min_row=2, values_only=True)}
    assert meta["layout"] == "wide" and meta["frozen_months"] == "1" and meta["scope"] == "region NORTH"
    assert workbook["_consensus"].sheet_state == "hidden"


def test_wide_csv_is_the_same_table_without_title_or_locks(tmp_path):
    path = write_wide_template(tmp_path / "north.csv", _wide_book())
    frame = pd.read_csv(path, dtype=str, keep_default_na=False, encoding="utf-8-sig")
    assert list(frame.columns) == ["family", "region", "line", "2026-10", "2026-11", *WIDE_HORIZON, "note"]
    assert frame["line"].tolist()[:2] == ["Your forecast", "Reference: orders"]
    assert frame.loc[frame["line"] == "Your forecast", list(WIDE_HORIZON)].eq("").all().all()
    assert frame.loc[1, "2026-11"] == "44"


def test_wide_grid_keeps_each_key_with_its_own_references():
    grid = wide_grid(_wide_book())
    assert grid["_line"].tolist()[:5] == ["forecast", "orders", "orders_last_year", "last_consensus", "statistical"]
    assert (grid.groupby("family")["_line"].size() == 5).all()
    assert grid.loc[(grid["family"] == "FAM2") & (grid["_line"] == "orders"), "2026-11"].tolist() == [9.0]


def test_wide_template_writes_formula_like_text_as_text(tmp_path):
    path = write_wide_template(tmp_path / "t.xlsx", _wide_book(title="=HYPERLINK(\"http://x.invalid\")",
                                                               meta={"source": "sales", "cycle": CYCLE,
                                                                     "scope": "=region NORTH"}))
    workbook = openpyxl.load_workbook(path)
    assert workbook["forecast"]["A1"].data_type == "s" and workbook["forecast"]["A1"].quotePrefix
    assert workbook["Your track record"]["A1"].data_type == "s"


def test_track_record_sheet_says_when_there_is_none(tmp_path):
    path = write_wide_template(tmp_path / "t.xlsx", _wide_book(track_record_missing="No run yet."))
    sheet = openpyxl.load_workbook(path)["Your track record"]
    assert sheet["A1"].value == "Your track record: Sales, region NORTH" and sheet["A2"].value == "No run yet."
    assert sheet.protection.sheet
