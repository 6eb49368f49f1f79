"""Read an input file (CSV or XLSX) into a table of text cells, or refuse it.

Reading never guesses silently: a file is decoded as UTF-8 (with or without a
byte-order mark) or, failing that, as Windows-1252; anything else is refused
with the reason and the byte offset.  The delimiter of a CSV file (comma or
semicolon) is taken from its header line.  Every cell comes back as stripped
text, exactly as the user typed or sees it, with its spreadsheet row number,
so that the checks can name the row and column of every problem.

Hostile files are refused before they cost much (:class:`ReadLimits`): an
XLSX file's declared unpacked size is checked from the zip directory before
any part is inflated, rows and cells are counted while the sheet streams in,
and a damaged workbook or an over-long CSV cell becomes a refusal naming the
file (and the row, where there is one), never a traceback.

Reading does no database work and writes nothing.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import zipfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from consensus.errors import InputRejected, InvalidSpec, Problem

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
META_MAX_ROWS = 1_000
#: Parts smaller than this unpacked are not held to the compression ratio (a theme or style part may be very regular).
RATIO_FLOOR_BYTES = 1_000_000


@dataclass(frozen=True)
class ReadLimits:
    """How large an input file may be before it is refused unread; every limit a positive whole number.

    Defaults admit a real file of 100,000 item × location series over an
    18-month horizon, 1.8 million rows in the long layout, and little more:

    * ``max_rows`` 2,000,000 physical sheet rows (empty ones included, since
      reading them costs time too): the 1.8 million rows plus headroom.  It is
      above a spreadsheet program's own sheet limit of 1,048,576 rows (from
      memory: Excel's published specifications), so it refuses only sheets no
      spreadsheet made.
    * ``max_inflated_bytes`` 1,000,000,000 bytes unpacked, summed over the
      workbook's parts as the zip directory declares them: this tool's own
      filled-in template unpacks to about 265 bytes a row (measured with
      bench/bench_intake.py), 530 MB for 2,000,000 rows.  Python's zipfile
      never inflates a part beyond its declared size (a part that lies fails
      its CRC check and is refused as damaged), so the declared sizes bound the
      work.
    * ``max_columns`` 256 used columns in any row: every input kind has at most
      11 known columns; a cell far to the right makes each row a long tuple.
    * ``max_cells`` 20,000,000 filled cells kept: 2,000,000 rows of 10 columns.
      Read cells are Python objects, so this, not the file size, bounds memory.
    * ``max_compression_ratio`` 100 for any part that unpacks to more than
      ``RATIO_FLOOR_BYTES`` (1 MB): sheets compress about 10–15 to 1 (measured
      with bench/bench_intake.py on this tool's filled template, and by hand on
      a sheet of 100,000 identical rows, whose cell references still differ),
      while a bomb of one row repeated reaches 258 to 1 in the bench (deflate's
      ceiling is about 1,032 to 1, from memory of zlib's technical notes).
      This is what stops a small file that unpacks to hundreds of MB below
      the size cap: the bench's 0.8 MB file unpacking to 200 MB is refused in
      0.06 s, where reading it took 74 s and 900 MB.
    * ``max_parts`` 10,000 entries in the zip archive (a workbook has tens).
    """

    max_inflated_bytes: int = 1_000_000_000
    max_rows: int = 2_000_000
    max_columns: int = 256
    max_cells: int = 20_000_000
    max_compression_ratio: int = 100
    max_parts: int = 10_000

    def __post_init__(self) -> None:
        for name in ("max_inflated_bytes", "max_rows", "max_columns", "max_cells", "max_compression_ratio",
                     "max_parts"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise InvalidSpec(f"{name} must be a whole number of at least 1; got {value!r}")


DEFAULT_READ_LIMITS = ReadLimits()


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
    ``header_row`` is the header's row number and ``column_positions[j]``
    the spreadsheet column (1 = A) of ``frame``'s column ``j``, so a cell can
    be named.
    """

    frame: pd.DataFrame
    rows: np.ndarray
    columns_seen: tuple[str, ...]
    file_format: dict
    meta: dict = field(default_factory=dict)
    file: str = ""
    header_row: int = 1
    column_positions: tuple[int, ...] = ()


@dataclass(frozen=True)
class SheetRows:
    """The filled rows of one workbook sheet as the cells' values, before any row is taken as the header.

    ``rows[i]`` holds the values of sheet row ``numbers[i]``, cut after its
    last filled cell; fully empty rows are left out and ``rows[0]`` (the
    first filled row, padded to the widest row) is where :func:`read_table`
    takes the header from.  ``sheet`` is the sheet read, ``meta`` the
    key/value rows of the hidden ``_consensus`` sheet.
    """

    file: str
    sheet: str
    rows: list[tuple]
    numbers: list[int]
    meta: dict = field(default_factory=dict)


def read_table(path: Path, *, sheet: str | None = None, limits: ReadLimits = DEFAULT_READ_LIMITS) -> RawTable:
    """Read a CSV or XLSX input file into a :class:`RawTable`.

    Raises :class:`consensus.errors.InputRejected` naming the file (and the
    rows, where it can) when the file cannot be read unambiguously: unknown
    encoding, UTF-16 or binary content, an ambiguous or inconsistent
    delimiter, a CSV cell longer than the csv module's field limit, a damaged
    workbook, a workbook beyond ``limits``, a missing or empty sheet, no
    header or no data rows.
    """
    path = Path(path)
    name = path.name
    try:
        with path.open("rb") as handle:
            magic = handle.read(4)
        if magic != ZIP_MAGIC:
            data = path.read_bytes()
    except OSError as exc:
        _refuse(name, f"a readable file ({exc.strerror or exc})")
    if magic == ZIP_MAGIC:
        return _read_xlsx(path, name, sheet=sheet, limits=limits)
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
    records = _csv_records(text, name, delimiter)
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


def _csv_records(text: str, name: str, delimiter: str) -> list[list[str]]:
    """Every CSV record; a record the csv module cannot take is refused with its row number.

    The csv module refuses a field longer than ``csv.field_size_limit()``
    (131,072 characters unless raised: Python's csv documentation); no input
    cell is legitimately that long, so the limit is kept and reported, with
    the record where it happened (an unclosed quote makes one field swallow
    the rest of the file, which is the usual cause).
    """
    records: list[list[str]] = []
    parser = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter)
    try:
        records.extend(parser)
    except csv.Error as exc:
        row = len(records) + 1
        raise InputRejected(file=name, problems=[Problem(name, row, None, None, _csv_error_text(exc))]) from None
    return records


def _csv_error_text(exc: csv.Error) -> str:
    if "field larger than field limit" in str(exc):
        return (f"cells of at most {csv.field_size_limit():,} characters (the csv module's field limit); "
                "this row has a longer one, often a quote (\") that is opened and never closed")
    return f"a well-formed CSV row ({exc})"


def _header_delimiter(text: str, name: str) -> str:
    for number, line in enumerate(text.splitlines(), start=1):
        if line.strip(" \t,;"):
            try:
                return detect_delimiter(line, filename=name)
            except csv.Error as exc:  # the header itself holds a field over the csv module's limit
                raise InputRejected(file=name, problems=[Problem(name, number, None, None, _csv_error_text(exc))]) from None
    return ","


# ---------------------------------------------------------------------------
# XLSX


def _read_xlsx(path: Path, name: str, *, sheet: str | None, limits: ReadLimits) -> RawTable:
    return table_from_rows(read_xlsx_rows(path, sheet=sheet, limits=limits))


def read_xlsx_rows(path: Path, *, sheet: str | None = None, limits: ReadLimits = DEFAULT_READ_LIMITS) -> SheetRows:
    """Read the filled rows of a workbook's sheet (the first visible one unless named) with every check of :func:`read_table`.

    The archive is checked against ``limits`` before anything is inflated and
    rows are counted as they stream in; a damaged workbook, a missing or
    empty sheet, or a sheet with a header only is refused as by
    :func:`read_table`.
    """
    import openpyxl  # imported here so CSV-only use does not pay for it

    path = Path(path)
    name = path.name
    _check_archive(path, name, limits)
    try:
        workbook = openpyxl.load_workbook(path, read_only=True, data_only=True)
    except Exception as exc:  # openpyxl raises many types for a damaged archive
        _refuse_damaged(name, exc)
    try:
        # A read-only workbook parses its sheets lazily, so damaged XML surfaces here, while rows stream in.
        worksheet = _pick_sheet(workbook, name, sheet)
        others = [ws.title for ws in workbook.worksheets if ws.title not in (worksheet.title, META_SHEET)]
        header_cells, header_row, data_rows, data_numbers = _sheet_cells(worksheet, name, others=others, limits=limits)
        meta = _read_meta(workbook, name)
        title = worksheet.title
    except (InputRejected, MemoryError):
        raise
    except Exception as exc:  # XML, zip, KeyError for a missing part, ValueError for a bad cell reference …
        _refuse_damaged(name, exc)
    finally:
        workbook.close()
    return SheetRows(file=name, sheet=title, rows=[header_cells, *data_rows], numbers=[header_row, *data_numbers],
                     meta=meta)


def table_from_rows(sheet_rows: SheetRows) -> RawTable:
    """A :class:`RawTable` of a sheet's rows, the first filled row taken as the header (what :func:`read_table` does)."""
    header_cells, header_row = sheet_rows.rows[0], sheet_rows.numbers[0]
    header_texts = [cell_text(v, column="") for v in header_cells]
    columns = [normalise_column(h) for h in header_texts]
    width = len(header_texts)
    cells = pd.DataFrame(
        [[cell_text(v, column=c) for v, c in zip(row + (None,) * (width - len(row)), columns)]
         for row in sheet_rows.rows[1:]],
        dtype="str",
    )
    file_format = {"kind": "xlsx", "encoding": None, "delimiter": None, "sheet": sheet_rows.sheet}
    return _assemble(sheet_rows.file, header_texts, header_row, cells, np.asarray(sheet_rows.numbers[1:], dtype=int),
                     file_format, meta=sheet_rows.meta)


def _check_archive(path: Path, name: str, limits: ReadLimits) -> None:
    """Refuse a workbook whose zip directory declares too many parts or too many unpacked bytes; nothing is inflated."""
    try:
        with zipfile.ZipFile(path) as archive:
            parts = archive.infolist()
    except (zipfile.BadZipFile, zipfile.LargeZipFile, OSError, ValueError, EOFError) as exc:
        _refuse(name, f"a readable .xlsx workbook; its zip archive is damaged ({type(exc).__name__}: {exc})")
    if len(parts) > limits.max_parts:
        _refuse(name, f"an .xlsx workbook of at most {limits.max_parts:,} parts; this archive holds {len(parts):,}")
    for part in parts:
        if part.file_size > RATIO_FLOOR_BYTES and part.file_size > limits.max_compression_ratio * max(part.compress_size, 1):
            _refuse(
                name,
                f"an .xlsx workbook whose parts compress at most {limits.max_compression_ratio} to 1; {part.filename} "
                f"unpacks from {part.compress_size:,} to {part.file_size:,} bytes "
                f"({part.file_size / max(part.compress_size, 1):,.0f} to 1), which is a compressed bomb, not a sheet",
            )
    inflated = sum(part.file_size for part in parts)
    if inflated > limits.max_inflated_bytes:
        largest = max(parts, key=lambda part: part.file_size)
        _refuse(
            name,
            f"an .xlsx workbook that unpacks to at most {limits.max_inflated_bytes:,} bytes; this one declares "
            f"{inflated:,} bytes ({largest.filename} alone {largest.file_size:,}) from {path.stat().st_size:,} on disk, "
            "which is a padded sheet or a compressed bomb (save the data as CSV, or split it)",
        )


def _refuse_damaged(name: str, exc: Exception):
    detail = str(exc).strip().splitlines()[0][:200] if str(exc).strip() else ""
    _refuse(name, "a readable .xlsx workbook; its contents are damaged "
                  f"({type(exc).__name__}{': ' + detail if detail else ''}); save it again from the spreadsheet")


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


def _sheet_cells(worksheet, name: str, *, others: list[str], limits: ReadLimits = DEFAULT_READ_LIMITS,
                 ) -> tuple[tuple, int, list[tuple], list[int]]:
    """Header cells, header row number, data rows and their row numbers; fully empty rows skipped.

    Rows are counted as they stream in, empty ones included (a sheet can
    jump to row 2,000,000,000, which openpyxl fills with empty rows), and
    the read stops at the first row beyond ``limits``.  Each kept row is cut
    after its last filled cell, so a stray cell far to the right costs one
    long row, not a long copy of every row.
    """
    worksheet.reset_dimensions()  # some writers store a wrong used-range; read every row
    where = f"sheet {worksheet.title!r}"
    header = None
    header_row = 0
    rows: list[tuple] = []
    numbers: list[int] = []
    cells = 0
    for number, values in enumerate(worksheet.iter_rows(values_only=True), start=1):
        if number > limits.max_rows:
            _refuse(name, f"at most {limits.max_rows:,} rows in {where}; it goes on past row {limits.max_rows:,} "
                          "(save the data as CSV, or split it)")
        width = len(values)
        while width and (values[width - 1] is None or not str(values[width - 1]).strip()):
            width -= 1
        if width == 0:
            continue
        if width > limits.max_columns:
            raise InputRejected(file=name, problems=[Problem(
                name, number, f"#{width}", None,
                f"at most {limits.max_columns:,} used columns in {where}; this row has a value in column #{width}")])
        cells += width
        if cells > limits.max_cells:
            _refuse(name, f"at most {limits.max_cells:,} filled cells in {where}; row {number:,} goes past that "
                          "(save the data as CSV, or split it)")
        values = tuple(values[:width])
        if header is None:
            header, header_row = values, number
        else:
            rows.append(values)
            numbers.append(number)
    hint = f" (the workbook also has {', '.join(map(repr, others))}: name the sheet to read)" if others else ""
    if header is None:
        _refuse(name, f"a header row and data rows in {where}; the sheet is empty{hint}")
    if not rows:
        _refuse(name, f"at least one data row below the header in {where}; it has a header only{hint}")
    # Rows are already cut after their last filled cell, so trailing formatting never becomes a column.
    used = max(len(header), max(map(len, rows)))
    header = header + (None,) * (used - len(header))
    return header, header_row, rows, numbers


def _read_meta(workbook, name: str) -> dict[str, str]:
    if META_SHEET not in workbook.sheetnames:
        return {}
    meta = {}
    for number, values in enumerate(workbook[META_SHEET].iter_rows(values_only=True), start=1):
        if number > META_MAX_ROWS:
            _refuse(name, f"a {META_SHEET!r} sheet of at most {META_MAX_ROWS:,} rows (a template's own holds a few keys)")
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
        header_row=int(header_row),
        column_positions=tuple(p + 1 for p in keep),
    )


def _refuse(filename: str, expected: str):
    raise InputRejected(file=filename, problems=[Problem(filename, None, None, None, expected)])
