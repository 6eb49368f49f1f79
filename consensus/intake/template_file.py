"""Write the fill-in file a submitter receives for a cycle.

An XLSX template carries its own source, cycle and scope in a hidden
``_consensus`` sheet of key/value rows, so a returned file can be submitted
without flags; :func:`consensus.intake.reader.read_table` gives those rows
back as ``meta``.  A CSV template is the frame only: CSV has nowhere to keep
the meta, so a CSV template must be submitted with its source and cycle given
as flags.

Both are written through :mod:`consensus.outputs`: atomically (a template
being rewritten is never left half-written) and with text a spreadsheet would
run as a formula escaped: in CSV with a leading single quote, which the
checks remove again from free-text columns; in XLSX as text cells with the
``quotePrefix`` style, so the file holds the text itself and reads back
unchanged.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
import pandas as pd

from consensus.errors import InvalidSpec
from consensus.intake.reader import META_SHEET
from consensus.outputs import check_output_path, save_workbook, write_csv

TEMPLATE_SHEET = "forecast"
TEMPLATE_FORMATS = (".xlsx", ".csv")
QUANTITY_COLUMN = "quantity"
REFERENCE_COLUMN = "last_consensus"
META_ORDER = ("source", "cycle", "scope", "grain", "generated_at")
MIN_WIDTH, MAX_WIDTH = 8, 40


def write_template(path: Path, frame: pd.DataFrame, *, meta: dict[str, str]) -> Path:
    """Write ``frame`` as a fill-in template (.xlsx or .csv) and return the path.

    The ``quantity`` column is always written empty (added when the frame
    lacks one): the template asks for numbers, it does not suggest them.  A
    ``last_consensus`` column, when present, is kept as a visibly separate
    reference that the checks ignore.  ``meta`` is written to the hidden
    ``_consensus`` sheet of an XLSX file (with ``generated_at`` added in UTC
    when missing); a CSV template cannot carry it.  The file is written
    atomically and text that a spreadsheet would run as a formula is stored
    as text (see the module docstring); a ``path`` that is a folder or lies in
    a folder that does not exist raises
    :class:`consensus.errors.OutputNotWritable`.
    """
    path = Path(path)
    check_output_path(path)  # before the work: a folder or a missing folder is named at once
    suffix = path.suffix.lower()
    if suffix not in TEMPLATE_FORMATS:
        raise InvalidSpec(f"template format must be one of {', '.join(TEMPLATE_FORMATS)}; got {path.suffix!r}")
    layout = _template_frame(frame)
    if suffix == ".csv":
        # A byte-order mark lets spreadsheet programs open the UTF-8 file with accents intact.
        write_csv(layout, path, encoding="utf-8-sig", lineterminator="\r\n", float_format="%.15g")
        return path
    _write_xlsx(path, layout, _template_meta(meta))
    return path


def _template_frame(frame: pd.DataFrame) -> pd.DataFrame:
    layout = frame.copy()
    layout.columns = [str(c).strip().lower() for c in layout.columns]
    layout[QUANTITY_COLUMN] = pd.Series(pd.NA, index=layout.index, dtype="object")
    if REFERENCE_COLUMN in layout.columns:
        # The reference sits after the column to fill, so it reads as a hint and not as input.
        order = [c for c in layout.columns if c != REFERENCE_COLUMN] + [REFERENCE_COLUMN]
        layout = layout[order]
    return layout


def _template_meta(meta: dict[str, str]) -> dict[str, str]:
    texts = {str(k).strip(): "" if v is None else str(v) for k, v in meta.items()}
    texts.setdefault("generated_at", dt.datetime.now(dt.timezone.utc).replace(microsecond=0).isoformat())
    ordered = {k: texts[k] for k in META_ORDER if k in texts}
    ordered.update({k: v for k, v in texts.items() if k not in ordered})
    return ordered


def _write_xlsx(path: Path, layout: pd.DataFrame, meta: dict[str, str]) -> None:
    from openpyxl import Workbook
    from openpyxl.comments import Comment
    from openpyxl.styles import Font, PatternFill
    from openpyxl.utils import get_column_letter
    from openpyxl.worksheet.datavalidation import DataValidation

    workbook = Workbook()
    sheet = workbook.active
    sheet.title = TEMPLATE_SHEET
    columns = list(layout.columns)
    sheet.append(columns)
    for values in _cell_rows(layout):
        sheet.append(values)

    bold = Font(bold=True)
    for cell in sheet[1]:
        cell.font = bold
    sheet.freeze_panes = "A2"
    last_row = max(len(layout) + 1, 2)
    for position, column in enumerate(columns, start=1):
        letter = get_column_letter(position)
        lengths = layout[column].astype("string").fillna("").str.len()
        widest = max(len(column), int(lengths.max()) if len(lengths) else 0)
        sheet.column_dimensions[letter].width = min(MAX_WIDTH, max(MIN_WIDTH, widest + 2))
        if column == QUANTITY_COLUMN:
            fill = PatternFill("solid", fgColor="FFF7D6")
            for (cell,) in sheet.iter_rows(min_row=2, max_row=len(layout) + 1, min_col=position, max_col=position):
                cell.fill = fill
            rule = DataValidation(type="decimal", operator="greaterThanOrEqual", formula1="0", allow_blank=True,
                                  showErrorMessage=True, error="A quantity is a number of 0 or more.")
            rule.add(f"{letter}2:{letter}{last_row}")
            sheet.add_data_validation(rule)
        if column == REFERENCE_COLUMN:
            sheet.cell(row=1, column=position).comment = Comment("For reference only; ignored when the file is submitted.", "consensus")
            grey = Font(italic=True, color="808080")
            for (cell,) in sheet.iter_rows(min_row=2, max_row=len(layout) + 1, min_col=position, max_col=position):
                cell.font = grey

    hidden = workbook.create_sheet(META_SHEET)
    hidden.append(["key", "value"])
    for key, value in meta.items():
        hidden.append([key, value])
    hidden.sheet_state = "hidden"
    save_workbook(workbook, path)


def _cell_rows(layout: pd.DataFrame):
    """Rows of plain Python values: text stays text (so "00123" keeps its zeros), missing becomes empty."""
    columns = []
    for column in layout.columns:
        series = layout[column]
        if pd.api.types.is_numeric_dtype(series) and not pd.api.types.is_bool_dtype(series):
            values = series.astype("float64").to_numpy()
            cells = np.where(np.isnan(values), None, values).tolist()
            cells = [int(v) if v is not None and float(v).is_integer() else v for v in cells]
        else:
            cells = [None if pd.isna(v) else str(v) for v in series.astype("object")]
        columns.append(cells)
    return zip(*columns) if columns else iter(())
