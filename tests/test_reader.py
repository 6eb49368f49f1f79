"""Reading input files: encodings, delimiters, sheets, cell text and refusals."""

from __future__ import annotations

import csv
import datetime as dt
import io
from pathlib import Path

import numpy as np
import openpyxl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from consensus.errors import InputRejected
from consensus.intake.reader import KNOWN_COLUMNS, cell_text, detect_delimiter, read_table

DATA = Path(__file__).parent / "data"
BAD, GOOD = DATA / "bad", DATA / "good"

# Each broken file the reader must refuse: (read_table options, substrings of the refusal).
# Every substring names the file, and the row where there is one.
READ_REFUSALS: dict[str, tuple[dict, list[str]]] = {
    "read_empty.csv": ({}, ["read_empty.csv; expected a header row", "the file is empty"]),
    "read_blank_lines.csv": ({}, ["read_blank_lines.csv; expected", "the file is empty"]),
    "read_header_only.csv": ({}, ["read_header_only.csv; expected at least one data row", "header only"]),
    "read_header_only.xlsx": ({}, ["read_header_only.xlsx; expected at least one data row", "sheet 'forecast'"]),
    "read_empty_sheet.xlsx": ({}, ["read_empty_sheet.xlsx;", "sheet 'forecast'; the sheet is empty"]),
    "read_only_data_sheet_empty.xlsx": ({}, ["read_only_data_sheet_empty.xlsx;", "the sheet is empty"]),
    # UTF-16 with its byte-order mark, and without one (caught by its NUL bytes).
    "read_utf16.csv": ({}, ["read_utf16.csv;", "this file is UTF-16"]),
    "read_utf16_no_bom.csv": ({}, ["read_utf16_no_bom.csv;", "NUL byte at offset 1", "UTF-16 or binary"]),
    # 0x9D is one of the five bytes Windows-1252 leaves undefined (Microsoft's cp1252 table).
    "read_undefined_cp1252.csv": ({}, ["read_undefined_cp1252.csv;", "byte 0x9D at offset 60 is undefined"]),
    "read_ambiguous_delimiter.csv": ({}, ["read_ambiguous_delimiter.csv, row 1: got 'item;location,period'",
                                          "commas or by semicolons"]),
    "read_ragged_rows.csv": ({}, ["read_ragged_rows.csv, row 3; expected 4 fields like the header, found 5",
                                  "read_ragged_rows.csv, row 4; expected 4 fields like the header, found 2"]),
    "read_duplicate_column.csv": ({}, ["read_duplicate_column.csv, row 1, column 'item': got 'Item'; expected each column once"]),
    "read_unnamed_column.csv": ({}, ["read_unnamed_column.csv, row 3, column '#3': got 'oops'",
                                     "a column name in the header"]),
    "read_legacy.xls": ({}, ["read_legacy.xls;", "legacy .xls"]),
    "read_not_a_workbook.xlsx": ({}, ["read_not_a_workbook.xlsx;", "the file is not one"]),
    # Good files read with options that cannot be met.
    "../good/second_sheet.xlsx#missing": ({"sheet": "Budget"}, ["second_sheet.xlsx;", "a sheet named 'Budget'",
                                                                 "'Notes', 'Plan'"]),
    "../good/second_sheet.xlsx#first": ({}, ["second_sheet.xlsx;", "sheet 'Notes'", "header only", "also has 'Plan': name the sheet"]),
    "../good/forecast.csv#sheet": ({"sheet": "forecast"}, ["forecast.csv;", "but this is a CSV file"]),
}


def test_every_broken_read_file_has_an_expectation():
    on_disk = {p.name for p in BAD.glob("read_*")}
    listed = {name for name in READ_REFUSALS if "/" not in name}
    assert on_disk == listed


@pytest.mark.parametrize("name", sorted(READ_REFUSALS))
def test_broken_file_is_refused_with_file_and_row(name):
    options, expected = READ_REFUSALS[name]
    path = BAD / name.split("#")[0]
    with pytest.raises(InputRejected) as caught:
        read_table(path, **options)
    text = str(caught.value)
    assert caught.value.file == path.name
    for part in expected:
        assert part in text
    assert caught.value.problems, "a refusal always carries at least one problem"


def test_utf8_bom_is_read_and_header_normalised():
    table = read_table(GOOD / "utf8_bom.csv")
    assert list(table.frame.columns) == ["item", "location", "period", "quantity", "note"]
    assert table.columns_seen == ("Item", "Location", "Period", "Quantity", "Note")
    assert table.frame.loc[0, "note"] == "café – résumé"
    assert table.file_format == {"kind": "csv", "encoding": "utf-8-sig", "delimiter": ",", "sheet": None}
    assert table.rows.tolist() == [2]


def test_cp1252_file_is_read_right():
    table = read_table(GOOD / "cp1252.csv")
    # 0xE9 is "é" and 0x96 the en dash "–" in Windows-1252 (Microsoft's cp1252 table).
    assert table.frame.loc[0, "note"] == "café – résumé"
    assert table.file_format["encoding"] == "cp1252"


def test_semicolon_csv_with_quoted_semicolon_and_blank_line():
    table = read_table(GOOD / "semicolon.csv")
    assert table.file_format["delimiter"] == ";"
    assert list(table.frame.columns) == ["item", "location", "period", "quantity", "note"]
    assert table.frame["note"].tolist() == ["a; b", ""]
    # The blank third line still counts as a row, as a spreadsheet shows it.
    assert table.rows.tolist() == [2, 4]


def test_xlsx_second_sheet_named_explicitly():
    table = read_table(GOOD / "second_sheet.xlsx", sheet="Plan")
    assert table.file_format == {"kind": "xlsx", "encoding": None, "delimiter": None, "sheet": "Plan"}
    assert table.frame.to_dict("list") == {
        "item": ["A100", "A200"], "location": ["L1", "L2"], "period": ["2026-12", "2027-01"], "quantity": ["5", "7"],
    }
    assert table.rows.tolist() == [2, 3]
    assert read_table(GOOD / "second_sheet.xlsx", sheet=" plan ").file_format["sheet"] == "Plan"


def test_xlsx_cells_read_as_the_user_sees_them():
    table = read_table(GOOD / "cells.xlsx")
    frame = table.frame
    assert frame["item"].tolist() == ["100", "A200", "A300"]  # a number typed as a code keeps no ".0"
    assert frame["period"].tolist() == ["2026-12", "2027-01", "2027-02-14"]  # mid-month date left for the checks
    assert frame["date"].tolist() == ["2026-11-05", "2026-11-30", ""]
    assert frame["quantity"].tolist() == ["12", "0.3", "-3"]  # 0.1+0.2 shown at 15 significant digits
    assert frame["location"].tolist() == ["L1", "L2", ""]
    assert table.rows.tolist() == [2, 4, 5]  # row 3 is empty in the sheet


@pytest.mark.parametrize(
    "value, column, text",
    [
        (12.0, "quantity", "12"),
        (12.5, "quantity", "12.5"),
        (7, "quantity", "7"),
        (True, "note", "TRUE"),
        (dt.datetime(2027, 3, 1), "period", "2027-03"),
        (dt.datetime(2027, 3, 1), "date", "2027-03-01"),
        (dt.datetime(2027, 3, 9), "start", "2027-03-09"),
        (dt.date(2027, 3, 1), "cycle", "2027-03"),
        (dt.datetime(2027, 3, 1, 8, 30), "date", "2027-03-01 08:30:00"),
        (None, "item", ""),
        ("  A1 ", "item", "A1"),
    ],
)
def test_cell_text(value, column, text):
    assert cell_text(value, column=column) == text


def test_meta_sheet_is_read_and_not_taken_for_data(tmp_path):
    workbook = openpyxl.Workbook()
    meta = workbook.active
    meta.title = "_consensus"  # first in the workbook, yet never the data sheet
    meta.append(["key", "value"])
    meta.append(["source", "sales"])
    meta.append(["cycle", "2026-11"])
    meta.sheet_state = "hidden"
    data = workbook.create_sheet("forecast")
    data.append(["Item", "Period", "Quantity"])
    data.append(["A100", "2026-12", 4])
    path = tmp_path / "returned.xlsx"
    workbook.save(path)
    table = read_table(path)
    assert table.meta == {"source": "sales", "cycle": "2026-11"}
    assert table.file_format["sheet"] == "forecast"


def test_hidden_data_sheet_is_skipped_unless_named(tmp_path):
    workbook = openpyxl.Workbook()
    hidden = workbook.active
    hidden.title = "old"
    hidden.append(["item", "quantity"])
    hidden.append(["OLD", 1])
    hidden.sheet_state = "hidden"
    shown = workbook.create_sheet("new")
    shown.append(["item", "quantity"])
    shown.append(["NEW", 2])
    path = tmp_path / "two.xlsx"
    workbook.save(path)
    assert read_table(path).frame["item"].tolist() == ["NEW"]
    assert read_table(path, sheet="old").frame["item"].tolist() == ["OLD"]


def test_delimiter_chosen_by_known_column_names():
    # "quantity" splits to a known name only with ";" although "," gives as many fields.
    assert detect_delimiter("item;period;quantity,units", filename="f.csv") == ";"
    assert detect_delimiter("item,period,quantity;x", filename="f.csv") == ","
    assert detect_delimiter("a;b;c", filename="f.csv") == ";"  # no known names: more fields wins
    assert detect_delimiter("item", filename="f.csv") == ","


def test_every_checked_column_is_known_to_the_reader():
    from consensus.intake import checks

    named = set(checks.FORECAST_COLUMNS) | set(checks.EVENT_COLUMNS) | set(checks.ACTUAL_COLUMNS)
    named |= {c for cols in checks.MASTER_COLUMNS.values() for c in cols}
    assert named <= KNOWN_COLUMNS


def test_ragged_rows_are_all_counted_and_capped(tmp_path):
    lines = ["item,period,quantity"] + [f"A{i},2027-01,1" + (",x" if i % 2 else "") for i in range(200)]
    path = tmp_path / "ragged.csv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    with pytest.raises(InputRejected) as caught:
        read_table(path)
    assert caught.value.total_problems == 100
    assert len(caught.value.problems) == 50
    assert caught.value.problems[0].row == 3  # A1 sits on the third line


def test_large_csv_is_read_whole(tmp_path):
    count = 10_000
    body = "\n".join(f"A{i % 97},L{i % 3},2027-{i % 12 + 1:02d},{i}" for i in range(count))
    path = tmp_path / "big.csv"
    path.write_text("item,location,period,quantity\n" + body + "\n", encoding="utf-8")
    table = read_table(path)
    assert len(table.frame) == count
    assert np.array_equal(table.rows, np.arange(2, count + 2))
    assert table.frame["quantity"].iloc[-1] == str(count - 1)


# ---- property tests -------------------------------------------------------

CELL_TEXT = st.text(
    alphabet=st.characters(blacklist_categories=("Cs", "Cc"), blacklist_characters="\ufeff\x85\u2028\u2029\xa0"),
    max_size=12,
).map(str.strip)


def _write_csv(rows: list[list[str]], *, delimiter: str) -> str:
    buffer = io.StringIO()
    csv.writer(buffer, delimiter=delimiter, lineterminator="\r\n").writerows(rows)
    return buffer.getvalue()


@settings(max_examples=60, deadline=None)
@given(
    cells=st.lists(st.tuples(CELL_TEXT, CELL_TEXT).filter(lambda t: any(t)), min_size=1, max_size=8),
    delimiter=st.sampled_from([",", ";"]),
    bom=st.booleans(),
)
def test_any_utf8_text_round_trips(tmp_path_factory, cells, delimiter, bom):
    """Whatever a csv writer (Python stdlib) puts in a UTF-8 file, the reader gives back cell for cell."""
    rows = [["item", "note"]] + [list(c) for c in cells]
    path = tmp_path_factory.mktemp("utf8") / "any.csv"
    path.write_bytes((b"\xef\xbb\xbf" if bom else b"") + _write_csv(rows, delimiter=delimiter).encode("utf-8"))
    table = read_table(path)
    assert table.frame.values.tolist() == [list(c) for c in cells]
    assert table.file_format["delimiter"] == delimiter


CP1252_EXTRA = [chr(c) for c in range(0xA1, 0x100)] + list("€‚ƒ„…†‡ˆ‰Š‹ŒŽ‘’“”•–—˜™š›œžŸ")


@settings(max_examples=60, deadline=None)
@given(pairs=st.lists(st.tuples(st.sampled_from(CP1252_EXTRA), st.sampled_from("abcXYZ019 -")), min_size=1, max_size=10))
def test_cp1252_text_is_read_right(tmp_path_factory, pairs):
    """Windows-1252 text whose accented characters each stand before an ASCII one.

    Such bytes are never valid UTF-8 (RFC 3629: a byte ≥ 0x80 followed by an
    ASCII byte breaks every multi-byte form), so the reader must fall back
    to Windows-1252 and read the text exactly.
    """
    note = "".join(a + b for a, b in pairs)
    path = tmp_path_factory.mktemp("cp") / "note.csv"
    path.write_bytes(_write_csv([["item", "note"], ["A1", note]], delimiter=",").encode("cp1252"))
    table = read_table(path)
    assert table.file_format["encoding"] == "cp1252"
    assert table.frame.loc[0, "note"] == note.strip()  # cells are stripped of surrounding spaces
