"""Reading input files: encodings, delimiters, sheets, cell text and refusals."""

from __future__ import annotations

import csv
import datetime as dt
import io
import zipfile
from pathlib import Path

import numpy as np
import openpyxl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from consensus.errors import InputRejected, InvalidSpec
from consensus.intake.reader import KNOWN_COLUMNS, ReadLimits, cell_text, detect_delimiter, read_table

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


@settings(max_examples=30, deadline=None)
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


@settings(max_examples=30, deadline=None)
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


# ---- hostile files: damaged workbooks, bombs, caps -------------------------------------------------------
HOSTILE = DATA / "hostile"


def _workbook(rows: list[list]) -> bytes:
    workbook = openpyxl.Workbook()
    sheet = workbook.active
    sheet.title = "forecast"
    for row in rows:
        sheet.append(row)
    buffer = io.BytesIO()
    workbook.save(buffer)
    return buffer.getvalue()


def _with_part(data: bytes, name: str, content: bytes) -> bytes:
    source = zipfile.ZipFile(io.BytesIO(data))
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED) as out:
        for info in source.infolist():
            out.writestr(info.filename, content if info.filename == name else source.read(info.filename))
    return buffer.getvalue()


SMALL = [["item", "location", "period", "quantity"], ["A100", "L1", "2026-12", 5]]
SHEET = "xl/worksheets/sheet1.xml"


@pytest.mark.parametrize("name, words", [
    ("xlsx_broken_xml.xlsx", "its contents are damaged (ParseError"),
    ("xlsx_no_workbook_part.xlsx", "its contents are damaged (KeyError"),
    ("xlsx_no_sheet_part.xlsx", "a visible sheet with data"),
    ("xlsx_bad_cell_reference.xlsx", "its contents are damaged (ValueError"),
])
def test_damaged_workbook_is_refused_by_name_not_with_a_traceback(name, words):
    """Valid zip archives with broken XML, a missing part or an impossible cell reference (ECMA-376 ends at XFD)."""
    with pytest.raises(InputRejected) as caught:
        read_table(HOSTILE / name)
    assert caught.value.file == name
    assert words in str(caught.value)


def test_every_hostile_workbook_has_an_expectation():
    tested = {"xlsx_broken_xml.xlsx", "xlsx_no_workbook_part.xlsx", "xlsx_no_sheet_part.xlsx",
              "xlsx_bad_cell_reference.xlsx"}
    assert {p.name for p in HOSTILE.glob("*.xlsx")} == tested


def test_compressed_bomb_is_refused_from_the_zip_directory_before_any_xml_is_parsed(tmp_path, monkeypatch):
    """A sheet of repeated rows compresses about 1,000 to 1 (deflate's ceiling, from memory); real sheets 11-15."""
    row = b"<row><c t=\"inlineStr\"><is><t>A100</t></is></c></row>"
    body = b"<worksheet xmlns=\"http://schemas.openxmlformats.org/spreadsheetml/2006/main\"><sheetData>"
    bomb = _with_part(_workbook(SMALL), SHEET, body + row * 400_000 + b"</sheetData></worksheet>")
    path = tmp_path / "bomb.xlsx"
    path.write_bytes(bomb)
    declared = zipfile.ZipFile(path).getinfo(SHEET)
    assert declared.file_size > 100 * declared.compress_size > 100 * 100  # 20 MB from a few KB
    monkeypatch.setattr(openpyxl, "load_workbook", lambda *a, **k: pytest.fail("the bomb was opened"))
    with pytest.raises(InputRejected, match="compress at most 100 to 1; xl/worksheets/sheet1.xml unpacks"):
        read_table(path)


@pytest.mark.slow
def test_declared_unpacked_size_is_capped(tmp_path):
    rows = [SMALL[0]] + [[f"A{i:05d}", "L1", "2026-12", i] for i in range(20_000)]
    path = tmp_path / "big.xlsx"
    path.write_bytes(_workbook(rows))
    unpacked = sum(p.file_size for p in zipfile.ZipFile(path).infolist())
    with pytest.raises(InputRejected, match=f"unpacks to at most 1,000,000 bytes; this one declares {unpacked:,} bytes"):
        read_table(path, limits=ReadLimits(max_inflated_bytes=1_000_000))
    assert len(read_table(path, limits=ReadLimits(max_inflated_bytes=unpacked)).frame) == 20_000


def test_a_part_that_lies_about_its_size_is_not_inflated_past_it(tmp_path):
    """Python's zipfile stops a part at its declared size and checks its CRC-32 (zipfile documentation)."""
    data = bytearray(_workbook([SMALL[0]] + [["A100", "L1", "2026-12", i] for i in range(2_000)]))
    entry, at = -1, 0
    while True:  # the central-directory entry of the sheet part
        at = data.find(b"PK\x01\x02", at + 1)
        name_length = int.from_bytes(data[at + 28:at + 30], "little")
        if data[at + 46:at + 46 + name_length] == SHEET.encode():
            entry = at
            break
    data[entry + 24:entry + 28] = (200).to_bytes(4, "little")  # uncompressed size: 200 bytes
    path = tmp_path / "liar.xlsx"
    path.write_bytes(bytes(data))
    assert zipfile.ZipFile(path).getinfo(SHEET).file_size == 200
    with pytest.raises(InputRejected, match="liar.xlsx; expected a readable .xlsx workbook; its contents are damaged"):
        read_table(path)


def test_a_sheet_that_jumps_to_row_two_billion_stops_at_the_row_cap(tmp_path):
    """openpyxl fills the rows a sheet skips with empty ones; counting them stops the read at once."""
    good = _workbook(SMALL)
    sheet = zipfile.ZipFile(io.BytesIO(good)).read(SHEET)
    path = tmp_path / "jump.xlsx"
    path.write_bytes(_with_part(good, SHEET, sheet.replace(b'r="2"', b'r="2000000000"').replace(b'2"', b'2000000000"')))
    with pytest.raises(InputRejected, match="at most 2,000,000 rows in sheet 'forecast'"):
        read_table(path)


def test_rows_columns_and_cells_are_capped_with_the_row_named(tmp_path):
    rows = [SMALL[0]] + [["A100", "L1", "2026-12", i] for i in range(10)]
    path = tmp_path / "ten.xlsx"
    path.write_bytes(_workbook(rows))
    with pytest.raises(InputRejected, match="at most 5 rows"):
        read_table(path, limits=ReadLimits(max_rows=5))
    with pytest.raises(InputRejected, match="at most 20 filled cells in sheet 'forecast'; row 6 goes past"):  # header and rows 2-5 fill 20
        read_table(path, limits=ReadLimits(max_cells=20))
    assert len(read_table(path, limits=ReadLimits(max_rows=11, max_cells=44)).frame) == 10

    wide = _workbook(SMALL)
    sheet = zipfile.ZipFile(io.BytesIO(wide)).read(SHEET)
    far = b'<c r="ZZZ2" t="n"><v>1</v></c></row></sheetData>'  # column 18,278, the last openpyxl knows
    path = tmp_path / "wide.xlsx"
    path.write_bytes(_with_part(wide, SHEET, sheet.replace(b"</row></sheetData>", far)))
    with pytest.raises(InputRejected) as caught:
        read_table(path)
    assert "wide.xlsx, row 2, column '#18278'; expected at most 256 used columns" in str(caught.value)


def test_trailing_empty_cells_are_not_columns(tmp_path):
    """Formatting far to the right (empty values) is cut off row by row, so it neither counts nor costs."""
    workbook = openpyxl.Workbook()
    sheet = workbook.active
    for row in SMALL:
        sheet.append(row)
    sheet.cell(row=2, column=1000).value = "   "
    sheet.cell(row=3, column=300).value = None
    sheet.cell(row=3, column=300).font = openpyxl.styles.Font(bold=True)
    path = tmp_path / "formatted.xlsx"
    workbook.save(path)
    assert list(read_table(path).frame.columns) == ["item", "location", "period", "quantity"]


def test_a_template_sheet_of_many_rows_is_refused(tmp_path):
    workbook = openpyxl.Workbook()
    workbook.active.append(SMALL[0])
    workbook.active.append(SMALL[1])
    meta = workbook.create_sheet("_consensus")
    for number in range(1_500):
        meta.append([f"key{number}", "value"])
    path = tmp_path / "meta.xlsx"
    workbook.save(path)
    with pytest.raises(InputRejected, match="'_consensus' sheet of at most 1,000 rows"):
        read_table(path)


def test_csv_cell_over_the_csv_modules_field_limit_names_the_row(tmp_path):
    """Python's csv module refuses a field longer than csv.field_size_limit() (131,072 by default)."""
    limit = csv.field_size_limit()
    path = tmp_path / "long.csv"
    path.write_text("item,location,period,quantity,note\nA100,L1,2026-12,5,ok\n"
                    f"A100,L2,2026-12,5,{'x' * (limit + 1)}\n", encoding="utf-8")
    with pytest.raises(InputRejected) as caught:
        read_table(path)
    assert f"long.csv, row 3; expected cells of at most {limit:,} characters" in str(caught.value)
    ok = tmp_path / "at_limit.csv"
    ok.write_text(f"item,note\nA100,{'x' * limit}\n", encoding="utf-8")
    assert len(read_table(ok).frame.loc[0, "note"]) == limit


def test_over_long_header_cell_is_refused_at_row_one(tmp_path):
    path = tmp_path / "long_header.csv"
    path.write_text("item," + "x" * (csv.field_size_limit() + 1) + "\nA100,1\n", encoding="utf-8")
    with pytest.raises(InputRejected, match="long_header.csv, row 1; expected cells of at most"):
        read_table(path)


def test_unclosed_quote_is_reported_at_its_row(tmp_path):
    path = tmp_path / "quote.csv"
    rows = "".join(f"A{i},L1,2026-12,{i}\n" for i in range(20_000))
    path.write_text('item,location,period,quantity\nA1,L1,2026-12,"5\n' + rows, encoding="utf-8")
    with pytest.raises(InputRejected, match="quote.csv, row 2; expected cells of at most .* opened and never closed"):
        read_table(path)


@pytest.mark.parametrize("options", [{"max_rows": 0}, {"max_inflated_bytes": -1}, {"max_columns": 2.5},
                                     {"max_cells": True}, {"max_compression_ratio": "100"}])
def test_read_limits_are_checked_when_made(options):
    with pytest.raises(InvalidSpec):
        ReadLimits(**options)
