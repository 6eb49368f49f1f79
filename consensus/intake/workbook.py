"""Read a returned forecast file in either layout: wide (one row per key, one column per month) or long.

The wide layout is the one :func:`consensus.intake.template_file.write_wide_template`
writes: a row per family × region (or item × location), a column per month
named ``YYYY-MM``, an optional ``line`` column that labels each row, and an
optional ``note`` column.  A returned file is read in this layout when its
hidden sheet says ``layout: wide``, or when its header row holds an ``item``
or ``family`` column and month columns but no ``period`` or ``week`` column;
anything else is read as the long layout, exactly as
:func:`consensus.intake.reader.read_table` reads it.  In an XLSX file the
header may sit below a few title rows (it is looked for in the first
:data:`HEADER_SEARCH_ROWS` filled rows); in CSV it is the first line.

A wide file is melted into the long rows the checks take
(:func:`consensus.intake.checks.check_forecast_rows`), one per filled month
cell, and each long row keeps the spreadsheet cell it came from, so every
problem names that cell: "north.xlsx, cell F7 (family DRIP-KITS × region
NORTH, 2027-05): got 'abc'; expected a quantity of 0 or more".  The rules of
the layout, on top of the checks:

* rows whose ``line`` starts with "Reference" are references (orders, last
  consensus, statistical forecast) and are never read;
* a blank month cell means "no forecast" and gives no line (not a zero);
* the note of a row goes with every month filled in that row;
* each key may have one row; a month column may appear once;
* a month frozen by the store's setting ``cycle.frozen_months`` takes no
  number (the template locks those cells; a CSV cannot; the checks refuse
  it in a long file too).

The checks number the long rows 1, 2, … (one per filled cell) instead of
spreadsheet rows; :func:`check_returned` turns every problem back into the
cell it came from and collapses the copies a key cell's problem has in each
month, and :func:`with_sheet_rows` gives the checked lines their spreadsheet
rows back before they are stored.
"""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
import pandas as pd

from consensus import periods
from consensus.errors import InputRejected, Problem
from consensus.intake import reader
from consensus.intake.checks import CheckResult
from consensus.intake.reader import DEFAULT_READ_LIMITS, RawTable, ReadLimits, cell_text, normalise_column
from consensus.vocabulary import REFERENCE_LINE_PREFIX

LAYOUT_KEY = "layout"
WIDE, LONG = "wide", "long"
LINE_COLUMN = "line"
NOTE_COLUMN = "note"
PRODUCT_COLUMNS = ("item", "family")
PLACE_COLUMNS = ("location", "region")
#: Columns of a wide row carried to every long row it gives (the keys, and a cycle for bulk files).
CARRIED_COLUMNS = ("cycle", *PRODUCT_COLUMNS, *PLACE_COLUMNS)
#: A header that looks like a month: a month column (a malformed month such as 2027-13 is reported by the checks).
MONTH_HEADER = re.compile(r"^\d{4}-\d{2}$")
#: How many filled rows an XLSX header may sit below (a title and a few lines of instructions).
HEADER_SEARCH_ROWS = 12
#: Problems the checks may list before the copies of a key cell's problem are collapsed.
CHECK_PROBLEM_CAP = 100_000
MAX_LISTED_PROBLEMS = 50


@dataclass(frozen=True)
class CellMap:
    """Where each long row of a wide file came from: its spreadsheet row and cell, and what the cell stands for.

    Arrays are aligned with the long rows (long row ``i`` is numbered
    ``i + 1`` in the checks).  ``key_cells[column][i]`` is the cell of that
    key column in the row; ``about[i]`` reads "family DRIP-KITS × region
    NORTH, 2027-05", ``row_about[i]`` the same without the month.
    """

    sheet_rows: np.ndarray
    value_cells: np.ndarray
    about: np.ndarray
    row_about: np.ndarray
    key_cells: dict[str, np.ndarray]
    header_cells: np.ndarray


@dataclass(frozen=True)
class ReturnedFile:
    """A returned forecast file read in its layout, as the long rows the checks take.

    ``raw`` is the long table (for a wide file its ``rows`` number the
    filled cells 1, 2, …); ``cells`` says where each came from (None for a
    long file); ``problems`` are the wide layout's own (a repeated key, a
    repeated month column, a value under no header); ``warnings`` name the
    columns ignored.
    """

    raw: RawTable
    layout: str
    cells: CellMap | None = None
    problems: list[Problem] = field(default_factory=list)
    warnings: list[Problem] = field(default_factory=list)


def read_returned_file(path: Path | str, *, limits: ReadLimits = DEFAULT_READ_LIMITS,
                       only_templates: bool = False) -> ReturnedFile:
    """Read a returned forecast file (CSV or XLSX) in the wide or the long layout.

    Refuses what :func:`consensus.intake.reader.read_table` refuses, with the
    same messages; a long file comes back exactly as ``read_table`` reads it.
    With ``only_templates`` a file is read as wide only when its hidden sheet
    says so (a load that takes no forecasts reads everything else as it
    always has, and refuses a template by its meta).
    """
    path = Path(path)
    try:
        with path.open("rb") as handle:
            is_zip = handle.read(4) == reader.ZIP_MAGIC
    except OSError:
        is_zip = False  # read_table names the problem
    if not is_zip:
        raw = reader.read_table(path, limits=limits)
        if not only_templates and _is_wide(list(raw.frame.columns), raw.meta):
            return _melt_table(raw, limits)
        return ReturnedFile(raw=raw, layout=LONG)
    sheet = reader.read_xlsx_rows(path, limits=limits)
    said_wide = str(sheet.meta.get(LAYOUT_KEY, "")).strip().lower() == WIDE
    header_at = _find_header(sheet) if said_wide or not only_templates else None
    if header_at is None:
        if said_wide:
            raise InputRejected(file=sheet.file, problems=[Problem(
                sheet.file, None, None, None,
                f"a header row with an 'item' or 'family' column and month columns (YYYY-MM) in the first "
                f"{HEADER_SEARCH_ROWS} rows of sheet {sheet.sheet!r}, as the template has it")])
        return ReturnedFile(raw=reader.table_from_rows(sheet), layout=LONG)
    return _melt_sheet(sheet, header_at, limits)


# ---------------------------------------------------------------------------
# which layout


def _header_names(values) -> list[str]:
    return [normalise_column(cell_text(v, column="period")) for v in values]


def _is_wide(columns: list[str], meta: dict) -> bool:
    said = str(meta.get(LAYOUT_KEY, "")).strip().lower()
    if said in (WIDE, LONG):
        return said == WIDE
    names = set(columns)
    has_months = any(MONTH_HEADER.match(c) for c in columns)
    return has_months and bool(names & set(PRODUCT_COLUMNS)) and not names & {"period", "week"}


def _find_header(sheet: reader.SheetRows) -> int | None:
    """Position in ``sheet.rows`` of the wide header row, or None when the sheet is in the long layout."""
    said = str(sheet.meta.get(LAYOUT_KEY, "")).strip().lower()
    if said == LONG:
        return None
    for position, values in enumerate(sheet.rows[:HEADER_SEARCH_ROWS]):
        names = _header_names(values)
        if set(names) & set(PRODUCT_COLUMNS) and any(MONTH_HEADER.match(n) for n in names):
            return position if _is_wide(names, sheet.meta) else None
    return None


# ---------------------------------------------------------------------------
# melting


def _melt_sheet(sheet: reader.SheetRows, header_at: int, limits: ReadLimits) -> ReturnedFile:
    header = list(sheet.rows[header_at])
    body = sheet.rows[header_at + 1:]
    numbers = np.asarray(sheet.numbers[header_at + 1:], dtype=int)
    width = max([len(header), *map(len, body)]) if body else len(header)
    header += [None] * (width - len(header))
    names = _header_names(header)
    texts = [[cell_text(v, column="quantity" if MONTH_HEADER.match(c) else c)
              for v, c in zip(row + (None,) * (width - len(row)), names)] for row in body]
    frame = pd.DataFrame(texts, columns=range(width), dtype="str") if texts else pd.DataFrame(columns=range(width))
    file_format = {"kind": "xlsx", "encoding": None, "delimiter": None, "sheet": sheet.sheet}
    return _melt(sheet.file, frame.fillna(""), names, [cell_text(v, column="period") for v in header],
                 positions=list(range(1, width + 1)), rows=numbers, header_row=int(sheet.numbers[header_at]),
                 file_format=file_format, meta=sheet.meta, limits=limits)


def _melt_table(raw: RawTable, limits: ReadLimits) -> ReturnedFile:
    frame = raw.frame.copy()
    names = list(frame.columns)
    frame.columns = range(len(names))
    positions = list(raw.column_positions) or list(range(1, len(names) + 1))
    return _melt(raw.file, frame, names, list(raw.columns_seen), positions=positions, rows=np.asarray(raw.rows),
                 header_row=raw.header_row, file_format=dict(raw.file_format), meta=raw.meta, limits=limits)


def _melt(file: str, frame: pd.DataFrame, names: list[str], header_texts: list[str], *, positions: list[int],
          rows: np.ndarray, header_row: int, file_format: dict, meta: dict, limits: ReadLimits) -> ReturnedFile:
    """One long row per filled month cell of the rows to read, with the cell each came from.

    The long rows are held to ``limits.max_rows``, the long layout's own
    bound: a wide sheet within the cell limits could otherwise melt into
    many times the rows a long file may have.
    """
    from openpyxl.utils import get_column_letter

    letters = [get_column_letter(p) for p in positions]
    problems: list[Problem] = []
    warnings: list[Problem] = []
    month_at, seen = [], {}
    for j, name in enumerate(names):
        if MONTH_HEADER.match(name):
            if name in seen:
                problems.append(Problem(file, header_row, name, header_texts[j],
                                        f"each month once; {name} is also the header of cell "
                                        f"{letters[seen[name]]}{header_row}", cell=f"{letters[j]}{header_row}"))
            else:
                seen[name] = j
                month_at.append(j)
        elif name == "":
            filled = np.flatnonzero((frame[j] != "").to_numpy())
            if filled.size:
                first = int(filled[0])
                problems.append(Problem(file, int(rows[first]), None, str(frame[j].iloc[first]),
                                        "a column name in the header above this value",
                                        cell=f"{letters[j]}{int(rows[first])}"))
        elif name not in (*CARRIED_COLUMNS, LINE_COLUMN, NOTE_COLUMN):
            warnings.append(Problem(file, header_row, name, None,
                                    "a key column (item or family, location or region), 'line', 'note' or a "
                                    "month YYYY-MM; this column is ignored", cell=f"{letters[j]}{header_row}"))
    column_of = {}
    for j, name in enumerate(names):
        if name in (*CARRIED_COLUMNS, LINE_COLUMN, NOTE_COLUMN):
            column_of.setdefault(name, j)
    if not set(column_of) & set(PRODUCT_COLUMNS):
        raise InputRejected(file=file, problems=[Problem(
            file, header_row, None, None, "a column 'item' or 'family' beside the month columns")])

    line = frame[column_of[LINE_COLUMN]] if LINE_COLUMN in column_of else pd.Series("", index=frame.index)
    is_reference = line.str.strip().str.lower().str.startswith(REFERENCE_LINE_PREFIX.lower()).to_numpy()
    keys = [c for c in CARRIED_COLUMNS if c in column_of]
    key_text = {c: frame[column_of[c]] for c in keys}
    row_about = _describe_keys(key_text, keys, frame.index)
    repeated = _repeated_keys(problems, file, key_text, keys, ~is_reference, rows, letters, column_of, row_about)

    values = frame[month_at].to_numpy(dtype=object) if month_at else np.empty((len(frame), 0), dtype=object)
    filled = (values != "") & ~(is_reference | repeated)[:, None]
    if int(filled.sum()) > limits.max_rows:
        raise InputRejected(file=file, problems=[Problem(
            file, None, None, None, f"at most {limits.max_rows:,} filled month cells (the rows a long file may have); "
                                    f"this one has {int(filled.sum()):,} (split it, by region or location)")])
    at_row, at_month = np.nonzero(filled)  # row-major: the sheet's order, row by row, month by month
    months = np.asarray([names[j] for j in month_at], dtype=object)
    month_letters = np.asarray([letters[j] for j in month_at], dtype=object)
    sheet_rows = rows[at_row]
    long = {c: key_text[c].to_numpy(dtype=object)[at_row] for c in keys}
    long["period"] = months[at_month]
    long["quantity"] = values[at_row, at_month]
    if NOTE_COLUMN in column_of:
        long[NOTE_COLUMN] = frame[column_of[NOTE_COLUMN]].to_numpy(dtype=object)[at_row]
    melted = pd.DataFrame(long, columns=[*keys, "period", "quantity", *([NOTE_COLUMN] if NOTE_COLUMN in column_of
                                                                          else [])]).astype("str")
    row_text = sheet_rows.astype(str)
    about_rows = row_about.to_numpy(dtype=object)[at_row]
    cells = CellMap(
        sheet_rows=sheet_rows,
        value_cells=(month_letters[at_month] + row_text).astype(object),
        about=np.where(about_rows == "", months[at_month], about_rows + ", " + months[at_month]).astype(object),
        row_about=about_rows,
        key_cells={c: np.full(len(at_row), letters[column_of[c]], dtype=object) + row_text
                   for c in (*keys, *([NOTE_COLUMN] if NOTE_COLUMN in column_of else []))},
        header_cells=(month_letters[at_month] + str(header_row)).astype(object),
    )
    if not len(melted) and not problems:
        problems.append(Problem(file, None, None, None,
                                "at least one number in the month cells of the rows to fill in; every one is blank "
                                "(a blank cell means no forecast)"))
    file_format = {**file_format, "layout": WIDE, "header_row": header_row}
    raw = RawTable(frame=melted, rows=np.arange(1, len(melted) + 1), columns_seen=tuple(melted.columns),
                   file_format=file_format, meta=meta, file=file, header_row=header_row)
    return ReturnedFile(raw=raw, layout=WIDE, cells=cells, problems=problems, warnings=warnings)


def _describe_keys(key_text: dict[str, pd.Series], keys: list[str], index: pd.Index) -> pd.Series:
    """Each row's keys in words: "family DRIP-KITS × region NORTH" (blank keys left out)."""
    words = pd.Series("", index=index, dtype="str")
    for column in keys:
        if column == "cycle":
            continue
        text = key_text[column]
        part = (column + " " + text).where(text != "", "")
        words = words + np.where((words != "") & (part != ""), " × ", "") + part
    return words.astype("str")


def _repeated_keys(problems: list[Problem], file: str, key_text: dict[str, pd.Series], keys: list[str],
                   readable: np.ndarray, rows: np.ndarray, letters: list[str], column_of: dict,
                   row_about: pd.Series) -> np.ndarray:
    """Rows that repeat an earlier row's key (codes compared ignoring case, as the checks match them), as problems.

    Returns the mask of those rows, which are then not read: the problem is
    the row, not each of its months.
    """
    repeated = np.zeros(len(readable), dtype=bool)
    if not readable.any():
        return repeated
    folded = pd.Series("", index=row_about.index, dtype="str")
    for column in keys:
        folded = folded + "|" + key_text[column].str.strip().str.lower()
    positions = np.flatnonzero(readable)
    again = folded.iloc[positions].duplicated(keep="first").to_numpy()
    if not again.any():
        return repeated
    repeated[positions[again]] = True
    first_row = pd.Series(rows[positions]).groupby(folded.iloc[positions].to_numpy(), sort=False).transform("first")
    named = [c for c in keys if c != "cycle" and (key_text[c].iloc[positions] != "").any()]
    shown = next((c for c in named if c in PRODUCT_COLUMNS), named[0] if named else keys[0])
    what = " × ".join(named) or "key"
    for at in np.flatnonzero(again)[:MAX_LISTED_PROBLEMS]:
        position = int(positions[at])
        row = int(rows[position])
        problems.append(Problem(file, row, shown, str(key_text[shown].iloc[position]),
                                f"one row per {what}; the same one is already at row {int(first_row.iloc[at])}",
                                cell=f"{letters[column_of[shown]]}{row}", about=str(row_about.iloc[position]) or None))
    return repeated


# ---------------------------------------------------------------------------
# checking, with problems named by cell


def check_returned(returned: ReturnedFile, check: Callable[..., CheckResult], **options) -> CheckResult:
    """Run ``check`` (e.g. :func:`consensus.intake.checks.check_forecast_rows`) on a returned file's long rows.

    A long file is checked as it is.  For a wide file the layout's own
    problems and those of the checks are listed together, each naming its
    cell, a key cell's problem once rather than once per month (the frozen
    months are the checks' rule, the same for both layouts).  The total counts every problem after collapsing; when the
    checks found more than :data:`CHECK_PROBLEM_CAP`, the ones beyond it are
    counted as they come.
    """
    if returned.cells is None:
        return check(returned.raw, **options)
    limit = options.pop("max_problems", MAX_LISTED_PROBLEMS)
    result = check(returned.raw, max_problems=CHECK_PROBLEM_CAP, **options)
    found = [p for p in result.problems
             if not (returned.problems and p.row is None and "at least one data row" in p.expected)]
    named = _name_problems(found, returned.cells)
    problems = [*returned.problems, *named]
    total = len(problems) + max(0, result.total_problems - len(result.problems))
    warnings = [*returned.warnings, *_name_problems(result.warnings, returned.cells)]
    return CheckResult(result.clean, problems[:limit], total, warnings[:limit])


def name_problem_cells(problems: list[Problem], returned: ReturnedFile) -> list[Problem]:
    """Problems found on the checked long rows (e.g. rows outside a declared scope), named by cell for a wide file."""
    if returned.cells is None:
        return problems
    return _name_problems(problems, returned.cells)


def with_sheet_rows(clean: pd.DataFrame, returned: ReturnedFile) -> pd.DataFrame:
    """Checked lines with ``row`` as the spreadsheet row each came from (a wide row gives one line per month)."""
    if returned.cells is None or "row" not in clean.columns:
        return clean
    out = clean.copy()
    out["row"] = returned.cells.sheet_rows[out["row"].to_numpy(dtype=int) - 1]
    return out


_AT_ROW = re.compile(r"(already at row )(\d+)")


def _name_problems(problems: list[Problem], cells: CellMap) -> list[Problem]:
    out, seen = [], set()
    count = len(cells.sheet_rows)
    for p in problems:
        if p.row is None or not 1 <= p.row <= count:
            named = p
        else:
            i = p.row - 1
            column = p.column or ""
            expected = _AT_ROW.sub(lambda m: m.group(1) + _sheet_row(cells, int(m.group(2))), p.expected)
            if column in ("quantity", "value", "period", "week"):
                named = replace(p, row=int(cells.sheet_rows[i]), cell=str(cells.value_cells[i]),
                                about=str(cells.about[i]), expected=expected)
            elif column in cells.key_cells:
                named = replace(p, row=int(cells.sheet_rows[i]), cell=str(cells.key_cells[column][i]),
                                about=str(cells.row_about[i]) or None, expected=expected)
            elif column == "cycle":  # the cycle came from the file's own sheet or a flag, not from a cell
                named = replace(p, row=None, column=None, expected=expected)
            else:
                named = replace(p, row=int(cells.sheet_rows[i]), about=str(cells.row_about[i]) or None,
                                expected=expected)
        key = (named.cell, named.row if named.cell is None else None, named.column, named.value, named.expected)
        if key in seen:
            continue  # the same problem of a key cell, found once for every month of its row
        seen.add(key)
        out.append(named)
    return out


def _sheet_row(cells: CellMap, long_row: int) -> str:
    if 1 <= long_row <= len(cells.sheet_rows):
        return str(int(cells.sheet_rows[long_row - 1]))
    return str(long_row)


__all__ = ["ReturnedFile", "CellMap", "read_returned_file", "check_returned", "name_problem_cells",
           "with_sheet_rows", "LAYOUT_KEY", "WIDE", "LONG", "LINE_COLUMN", "NOTE_COLUMN"]
