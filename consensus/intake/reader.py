"""Read an input file (CSV or XLSX) into a table of text cells, or refuse it.

Reading never guesses silently: a file is decoded as UTF-8 (with or without a
byte-order mark) or, failing that, as Windows-1252; anything else is refused
with the reason and the byte offset.  The delimiter of a CSV file (comma or
semicolon) is taken from its header line.  Every cell comes back as stripped
text, exactly as the user typed or sees it, with its spreadsheet row number,
so that the checks can name the row and column of every problem.

Reading does no database work and writes nothing.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from consensus.errors import InputRejected, Problem

#: Every column name any input kind uses; the delimiter of a CSV file is the
#: one whose header split yields the most of these.
KNOWN_COLUMNS: frozenset[str] = frozenset(
    {
        "item", "family", "location", "region", "period", "week", "quantity", "value",
        "note", "cycle", "last_consensus", "event", "start", "end", "uplift_pct", "units",
        "date", "unit_price", "description", "parent", "component", "qty_per",
        "lead_time_months",
    }
)

#: Columns whose spreadsheet dates mean a month ("YYYY-MM"); other dates become "YYYY-MM-DD".
MONTH_COLUMNS: frozenset[str] = frozenset({"period", "start", "end", "cycle"})

#: Name of the hidden sheet in which a template carries its own source, cycle and scope.
META_SHEET = "_consensus"

DELIMITERS = (",", ";")
XLSX_SUFFIXES = frozenset({".xlsx", ".xlsm"})
ZIP_MAGIC = b"PK\x03\x04"
OLE_MAGIC = b"\xd0\xcf\x11\xe0"  # legacy .xls and other compound documents
MAX_LISTED_PROBLEMS = 50


@dataclass(frozen=True)
class RawTable:
    """The cells of one input file as text, with where each row sits in the file.

    ``frame`` has one column per header (names lower-cased and stripped), every
    cell a stripped string ("" when empty); fully empty rows are left out.
    ``rows[i]`` is the spreadsheet row number of ``frame.iloc[i]`` as the user
    sees it (the first line of the file is row 1).  ``columns_seen`` keeps the
    header texts as written.  ``file_format`` says how the file was read:
    ``kind`` ("csv" | "xlsx"), ``encoding``, ``delimiter`` and ``sheet``.
    ``meta`` holds the key/value rows of a hidden ``_consensus`` sheet.
    """

    frame: pd.DataFrame
    rows: np.ndarray
    columns_seen: tuple[str, ...]
    file_format: dict
    meta: dict = field(default_factory=dict)
    file: str = ""


def read_table(path: Path, *, sheet: str | None = None) -> RawTable:
    """Read a CSV or XLSX input file into a :class:`RawTable`.

    Raises :class:`consensus.errors.InputRejected` naming the file (and the
    rows, where it can) when the file cannot be read unambiguously: unknown
    encoding, UTF-16 or binary content, an ambiguous or inconsistent
    delimiter, a missing or empty sheet, no header or no data rows.
    """
    path = Path(path)
    name = path.name
    try:
        data = path.read_bytes()
    except OSError as exc:
        _refuse(name, f"a readable file ({exc.strerror or exc})")
    if data[:4] == ZIP_MAGIC:
        return _read_xlsx(path, name, sheet=sheet)
    if path.suffix.lower() in XLSX_SUFFIXES:
        _refuse(name, "an .xlsx workbook, but the file is not one (save it again from the spreadsheet as .xlsx)")
    if data[:4] == OLE_MAGIC:
        _refuse(name, "CSV or .xlsx; this looks like a legacy .xls workbook (save it as .xlsx or CSV UTF-8)")
    if sheet is not None:
        _refuse(name, f"a workbook with a sheet named {sheet!r}, but this is a CSV file")
    return _read_csv(data, name)


# ---------------------------------------------------------------------------
# CSV


def decode_text(data: bytes, *, filename: str) -> tuple[str, str]:
    """Decode file bytes as UTF-8 (BOM optional) or Windows-1252; return (text, encoding).

    UTF-8 is tried first and strictly: a Windows-1252 file with accented
    letters is almost never valid UTF-8, while the reverse guess would turn
    "é" into "Ã©" without any error.  Bytes 0x81, 0x8D, 0x8F, 0x90 and 0x9D
    are undefined in Windows-1252 (Microsoft's published code page table),
    so a file containing them is refused rather than read as something else.
    One ambiguity is left, as with any detector: Windows-1252 text whose
    accented characters happen to form valid UTF-8 sequences (for example
    "Ã©") is read as UTF-8.  Such runs are rare in real text.
    """
    if data[:2] in (b"\xff\xfe", b"\xfe\xff"):
        _refuse(filename, "UTF-8 or Windows-1252 text; this file is UTF-16 (save it as CSV UTF-8)")
    nul_at = data.find(b"\x00")
    if nul_at >= 0:
        _refuse(
            filename,
            f"UTF-8 or Windows-1252 text; found a NUL byte at offset {nul_at}, "
            "so the file is UTF-16 or binary (save it as CSV UTF-8)",
        )
    try:
        text = data.decode("utf-8-sig")
        return text, ("utf-8-sig" if data[:3] == b"\xef\xbb\xbf" else "utf-8")
    except UnicodeDecodeError as utf8_error:
        try:
            return data.decode("cp1252"), "cp1252"
        except UnicodeDecodeError as cp_error:
            bad = data[cp_error.start]
            _refuse(
                filename,
                f"UTF-8 or Windows-1252 text; it is not UTF-8 (byte 0x{data[utf8_error.start]:02X} at offset "
                f"{utf8_error.start}) and not Windows-1252 (byte 0x{bad:02X} at offset {cp_error.start} "
                "is undefined there); save the file as CSV UTF-8",
            )


def detect_delimiter(header_line: str, *, filename: str) -> str:
    """Choose "," or ";" from the header line.

    The winner is the split that yields more known column names; when neither
    split yields any, the one with more fields.  A header that splits into the
    same number of fields, or the same number of known names, both ways is
    ambiguous and refused.
    """
    scores = {}
    for delimiter in DELIMITERS:
        fields = next(csv.reader([header_line], delimiter=delimiter), [])
        known = sum(normalise_column(f) in KNOWN_COLUMNS for f in fields)
        scores[delimiter] = (known, len(fields))
    comma, semicolon = scores[","], scores[";"]
    if comma[0] != semicolon[0]:
        return "," if comma[0] > semicolon[0] else ";"
    if comma[1] != semicolon[1]:
        return "," if comma[1] > semicolon[1] else ";"
    if comma[1] == 1:
        return ","  # a single column splits the same way under both
    raise InputRejected(
        file=filename,
        problems=[Problem(filename, 1, None, header_line, "a header separated by commas or by semicolons, not both")],
    )


def _read_csv(data: bytes, name: str) -> RawTable:
    text, encoding = decode_text(data, filename=name)
    if not text.strip():
        _refuse(name, "a header row and at least one data row; the file is empty")
    delimiter = _header_delimiter(text, name)
    records = list(csv.reader(io.StringIO(text, newline=""), delimiter=delimiter))
    # Spreadsheet programs show one CSV record per row, blank lines included.
    row_numbers = np.arange(1, len(records) + 1)
    widths = np.fromiter((len(r) for r in records), dtype=int, count=len(records))
    blank = np.fromiter((not any(c.strip() for c in r) for r in records), dtype=bool, count=len(records))
    header_at = int(np.argmax(~blank))
    header = records[header_at]
    body = np.flatnonzero(~blank)
    body = body[body > header_at]
    if body.size == 0:
        _refuse(name, "at least one data row below the header; the file has a header only")
    ragged = body[widths[body] != len(header)]
    if ragged.size:
        problems = [
            Problem(name, int(row_numbers[i]), None, None, f"{len(header)} fields like the header, found {widths[i]}")
            for i in ragged[:MAX_LISTED_PROBLEMS]
        ]
        raise InputRejected(file=name, problems=problems, total_problems=int(ragged.size))
    cells = pd.DataFrame([records[i] for i in body], dtype="str")
    file_format = {"kind": "csv", "encoding": encoding, "delimiter": delimiter, "sheet": None}
    return _assemble(name, header, int(row_numbers[header_at]), cells, row_numbers[body], file_format, meta={})


def _header_delimiter(text: str, name: str) -> str:
    for line in text.splitlines():
        if line.strip(" \t,;"):
            return detect_delimiter(line, filename=name)
    return ","


# ---------------------------------------------------------------------------
# XLSX


def _read_xlsx(path: Path, name: str, *, sheet: str | None) -> RawTable:
    import openpyxl  # imported here so CSV-only use does not pay for it

    try:
        workbook = openpyxl.load_workbook(path, read_only=True, data_only=True)
    except Exception as exc:  # openpyxl raises many types for a damaged archive
        _refuse(name, f"a readable .xlsx workbook ({type(exc).__name__}: {exc})")
    try:
        worksheet = _pick_sheet(workbook, name, sheet)
        others = [ws.title for ws in workbook.worksheets if ws.title not in (worksheet.title, META_SHEET)]
        header_cells, header_row, data_rows, data_numbers = _sheet_cells(worksheet, name, others=others)
        meta = _read_meta(workbook)
    finally:
        workbook.close()
    header_texts = [cell_text(v, column="") for v in header_cells]
    columns = [normalise_column(h) for h in header_texts]
    width = len(header_texts)
    cells = pd.DataFrame(
        [[cell_text(v, column=c) for v, c in zip(row + (None,) * (width - len(row)), columns)] for row in data_rows],
        dtype="str",
    )
    file_format = {"kind": "xlsx", "encoding": None, "delimiter": None, "sheet": worksheet.title}
    return _assemble(name, header_texts, header_row, cells, np.asarray(data_numbers, dtype=int), file_format, meta=meta)


def _pick_sheet(workbook, name: str, sheet: str | None):
    data_sheets = [ws for ws in workbook.worksheets if ws.title != META_SHEET]
    if sheet is not None:
        exact = [ws for ws in data_sheets if ws.title == sheet]
        loose = [ws for ws in data_sheets if ws.title.strip().lower() == sheet.strip().lower()]
        chosen = exact or (loose if len(loose) == 1 else [])
        if not chosen:
            names = ", ".join(repr(ws.title) for ws in data_sheets) or "none"
            _refuse(name, f"a sheet named {sheet!r}; the workbook has {names}")
        return chosen[0]
    visible = [ws for ws in data_sheets if getattr(ws, "sheet_state", "visible") == "visible"]
    if not visible:
        _refuse(name, "a visible sheet with data; the workbook has none")
    return visible[0]


def _sheet_cells(worksheet, name: str, *, others: list[str]) -> tuple[tuple, int, list[tuple], list[int]]:
    """Header cells, header row number, data rows and their row numbers; fully empty rows skipped."""
    worksheet.reset_dimensions()  # some writers store a wrong used-range; read every row
    header = None
    header_row = 0
    rows: list[tuple] = []
    numbers: list[int] = []
    for number, values in enumerate(worksheet.iter_rows(values_only=True), start=1):
        if not any(v is not None and str(v).strip() for v in values):
            continue
        if header is None:
            header, header_row = values, number
        else:
            rows.append(values)
            numbers.append(number)
    where = f"sheet {worksheet.title!r}"
    hint = f" (the workbook also has {', '.join(map(repr, others))}: name the sheet to read)" if others else ""
    if header is None:
        _refuse(name, f"a header row and data rows in {where}; the sheet is empty{hint}")
    if not rows:
        _refuse(name, f"at least one data row below the header in {where}; it has a header only{hint}")
    # Trailing cells that are empty in the header and every row are formatting, not columns.
    used = max(len(header), *(len(r) for r in rows))
    while used > 0 and (header[used - 1] if used <= len(header) else None) is None and all(
        len(r) < used or r[used - 1] is None or not str(r[used - 1]).strip() for r in rows
    ):
        used -= 1
    header = tuple(header[:used]) + (None,) * max(0, used - len(header))
    return header, header_row, [tuple(r[:used]) for r in rows], numbers


def _read_meta(workbook) -> dict[str, str]:
    if META_SHEET not in workbook.sheetnames:
        return {}
    meta = {}
    for values in workbook[META_SHEET].iter_rows(values_only=True):
        if len(values) < 2 or values[0] is None:
            continue
        key = str(values[0]).strip()
        if key and key.lower() != "key":
            meta[key] = cell_text(values[1], column="")
    return meta


def cell_text(value, *, column: str) -> str:
    """A spreadsheet cell's value as the text the user sees.

    Whole-number floats lose their ".0" ("12", not "12.0"); other floats use
    15 significant digits, the precision a spreadsheet displays.  Dates become
    "YYYY-MM" in month columns (period, start, end, cycle) when they fall on
    the first of a month, and "YYYY-MM-DD" otherwise, so a mid-month date in
    a month column is reported by the checks instead of being truncated.
    """
    if value is None:
        return ""
    if isinstance(value, bool):
        return "TRUE" if value else "FALSE"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if np.isfinite(value) and value.is_integer() and abs(value) < 1e15:
            return str(int(value))
        return f"{value:.15g}"
    if isinstance(value, dt.datetime):
        value = value.date() if value.time() == dt.time(0) else value
    if isinstance(value, dt.datetime):
        return value.isoformat(sep=" ")
    if isinstance(value, dt.date):
        if column in MONTH_COLUMNS and value.day == 1:
            return f"{value.year:04d}-{value.month:02d}"
        return value.isoformat()
    return str(value).strip()


# ---------------------------------------------------------------------------
# shared


def normalise_column(text) -> str:
    """A header text as a column name: stripped and lower-cased (BOM and NBSP removed)."""
    return str(text if text is not None else "").replace("\ufeff", "").replace("\xa0", " ").strip().lower()


def _assemble(name, header, header_row: int, cells: pd.DataFrame, row_numbers, file_format, *, meta) -> RawTable:
    header_texts = [str(h if h is not None else "") for h in header]
    columns = [normalise_column(h) for h in header_texts]
    cells = cells.reindex(columns=range(len(columns))).fillna("")
    cells = cells.apply(lambda col: col.str.strip())
    problems = []
    keep = []
    for position, column in enumerate(columns):
        if column == "":
            filled = cells[position] != ""
            if filled.any():
                first = int(np.flatnonzero(filled.to_numpy())[0])
                problems.append(
                    Problem(name, int(row_numbers[first]), f"#{position + 1}", cells[position].iloc[first],
                            "a column name in the header above this value")
                )
            continue
        keep.append(position)
    seen: dict[str, int] = {}
    for position in keep:
        column = columns[position]
        if column in seen:
            problems.append(
                Problem(name, header_row, column, header_texts[position],
                        f"each column once; '{column}' is also column #{seen[column] + 1}")
            )
        seen.setdefault(column, position)
    if problems:
        raise InputRejected(file=name, problems=problems)
    frame = cells[keep].set_axis([columns[p] for p in keep], axis=1).astype("str")
    frame.index = pd.RangeIndex(len(frame))
    return RawTable(
        frame=frame,
        rows=np.asarray(row_numbers, dtype=int),
        columns_seen=tuple(header_texts[p] for p in keep),
        file_format=file_format,
        meta=meta,
        file=name,
    )


def _refuse(filename: str, expected: str):
    raise InputRejected(file=filename, problems=[Problem(filename, None, None, None, expected)])
