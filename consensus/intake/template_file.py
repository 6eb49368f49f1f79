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

Two layouts.  :func:`write_template` writes the long layout of earlier
versions (one row per key × month).  :func:`write_wide_template` writes the
layout a submitter fills in: one row per key (family × region, or item ×
location) and one column per month of the horizon, with reference lines under
each row (orders of the last 12 months, orders a year earlier, the last
consensus, the statistical forecast), each labelled "Reference: …" and never
read back (:mod:`consensus.intake.workbook`).  In XLSX the key and reference
cells are locked (sheet protection without a password: it keeps references
from being typed over, it is no security), the cells to fill are unlocked,
highlighted and validated as numbers of 0 or more, months frozen by the
cycle's rules are shown but locked, and a second sheet, "Your track record",
gives the submitter's own accuracy, bias and tracking signal by lag bucket
and the weight the consensus gave their forecast.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from consensus.errors import InvalidSpec
from consensus.intake.reader import META_SHEET
from consensus.intake.workbook import LAYOUT_KEY, LINE_COLUMN, NOTE_COLUMN, WIDE
from consensus.methods.track_record import TrackRecord, scheme_label
from consensus.outputs import check_output_path, save_workbook, write_csv
from consensus.vocabulary import (LEVELS, MEASURES, TEMPLATE_LINES, describe_lag_bucket, label, source_label,
                                  term)

TEMPLATE_SHEET = "forecast"
TRACK_RECORD_SHEET = "Your track record"
TEMPLATE_FORMATS = (".xlsx", ".csv")
QUANTITY_COLUMN = "quantity"
REFERENCE_COLUMN = "last_consensus"
META_ORDER = ("source", "cycle", "scope", "grain", "layout", "frozen_months", "generated_at")
MIN_WIDTH, MAX_WIDTH = 8, 40
MONTH_WIDTH = 9
NOTE_WIDTH = 40
SENTENCE_WIDTH = 100


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

    _write_meta_sheet(workbook, meta)
    save_workbook(workbook, path)


def _write_meta_sheet(workbook, meta: dict) -> None:
    """The hidden sheet that tells submit the file's source, cycle and scope, so a returned workbook needs no flags."""
    hidden = workbook.create_sheet(META_SHEET)
    hidden.append(["key", "value"])
    for key, value in meta.items():
        hidden.append([key, value])
    hidden.sheet_state = "hidden"


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


# ---------------------------------------------------------------------------
# the wide layout


@dataclass(frozen=True)
class ReferenceLine:
    """One reference line under every row of a wide template: its label and its values by key and month.

    ``values`` has the template's key columns, ``period`` and ``quantity``;
    a month with no value is left blank.  ``key`` is its entry in
    :data:`consensus.vocabulary.TEMPLATE_LINES`.
    """

    key: str
    label: str
    values: pd.DataFrame


@dataclass(frozen=True)
class WideTemplate:
    """Everything a wide fill-in workbook shows.

    ``keys``: one row per line to fill in, the key columns only (e.g.
    family, region), in the order printed; ``history_months``: the months of
    order history shown (reference columns left of the horizon);
    ``horizon_months``: the cycle's months, the first of them
    ``frozen_months``; ``references``: the lines under each row; ``meta``:
    the hidden sheet's keys; ``title`` and ``notes``: the lines above the
    table; ``track_record``: the second sheet (None prints
    ``track_record_missing`` instead).
    """

    keys: pd.DataFrame
    history_months: tuple[str, ...]
    horizon_months: tuple[str, ...]
    frozen_months: tuple[str, ...]
    references: tuple[ReferenceLine, ...]
    meta: dict
    title: str
    notes: tuple[str, ...] = ()
    track_record: TrackRecord | None = None
    track_record_missing: str = ""


def write_wide_template(path: Path, book: WideTemplate) -> Path:
    """Write a wide fill-in template (.xlsx with protection and a track record, or .csv) and return the path.

    The CSV holds the same table (keys, ``line``, a column per month,
    ``note``) without the title rows, the locks or the second sheet; it is
    read back the same way.  Written atomically through
    :mod:`consensus.outputs`, formula-like text stored as text.
    """
    path = Path(path)
    check_output_path(path)
    suffix = path.suffix.lower()
    if suffix not in TEMPLATE_FORMATS:
        raise InvalidSpec(f"template format must be one of {', '.join(TEMPLATE_FORMATS)}; got {path.suffix!r}")
    grid = wide_grid(book)
    if suffix == ".csv":
        write_csv(grid.drop(columns="_line"), path, encoding="utf-8-sig", lineterminator="\r\n", float_format="%.15g")
        return path
    meta = _template_meta({**book.meta, LAYOUT_KEY: WIDE, "frozen_months": str(len(book.frozen_months))})
    _write_wide_xlsx(path, book, grid, meta)
    return path


def wide_grid(book: WideTemplate) -> pd.DataFrame:
    """The table of a wide template, row by row: keys, ``line``, a column per month, ``note`` (and ``_line``, its key).

    Each key's row to fill in comes first (months blank), then its reference
    lines; reference values are whole units (the references are a guide, and
    whole numbers read faster).
    """
    key_columns = list(book.keys.columns)
    months = [*book.history_months, *book.horizon_months]
    keys = book.keys.reset_index(drop=True).astype(str)
    blocks = [keys.assign(_order=np.arange(len(keys)) * (1 + len(book.references)), _line="forecast",
                          **{LINE_COLUMN: label(TEMPLATE_LINES, "forecast")})]
    for position, reference in enumerate(book.references, start=1):
        values = reference.values
        table = keys.copy()
        if len(values):
            wide = (values.assign(**{c: values[c].astype(str) for c in key_columns})
                    .pivot_table(index=key_columns, columns="period", values="quantity", aggfunc="sum")
                    .reindex(columns=months))
            table = table.merge(wide.reset_index(), on=key_columns, how="left")
        table = table.assign(_order=np.arange(len(keys)) * (1 + len(book.references)) + position,
                             _line=reference.key, **{LINE_COLUMN: reference.label})
        blocks.append(table)
    grid = pd.concat(blocks, ignore_index=True).sort_values("_order", kind="stable").reset_index(drop=True)
    for month in months:
        if month not in grid.columns:
            grid[month] = np.nan
        grid[month] = pd.to_numeric(grid[month], errors="coerce").round(0)
    grid[NOTE_COLUMN] = pd.Series(pd.NA, index=grid.index, dtype="object")
    return grid[[*key_columns, LINE_COLUMN, *months, NOTE_COLUMN, "_line"]]


#: Colours of the wide template: yellow cells to fill in, greys for what is shown but not read.
_FILL_INPUT = "FFF2CC"
_FILL_HEADER_INPUT = "FFE699"
_FILL_LOCKED = "EDEDED"
_FILL_FROZEN = "D0CECE"
_FILL_HEADER = "D9E1F2"
_GREY_TEXT = "595959"


def _write_wide_xlsx(path: Path, book: WideTemplate, grid: pd.DataFrame, meta: dict[str, str]) -> None:
    from openpyxl import Workbook
    from openpyxl.styles import Alignment, Border, Font, PatternFill, Side
    from openpyxl.utils import get_column_letter
    from openpyxl.worksheet.datavalidation import DataValidation

    workbook = Workbook()
    sheet = workbook.active
    sheet.title = TEMPLATE_SHEET
    key_columns = list(book.keys.columns)
    history, horizon, frozen = list(book.history_months), list(book.horizon_months), set(book.frozen_months)
    columns = [*key_columns, LINE_COLUMN, *history, *horizon, NOTE_COLUMN]
    position = {c: i + 1 for i, c in enumerate(columns)}
    letter = {c: get_column_letter(i) for c, i in position.items()}

    solid = lambda colour: PatternFill("solid", fgColor=colour)  # noqa: E731

    sheet.cell(row=1, column=1, value=book.title).font = Font(bold=True, size=14)
    for offset, note in enumerate(book.notes, start=2):
        sheet.cell(row=offset, column=1, value=note).font = Font(italic=True, color=_GREY_TEXT)
    band_row = 2 + len(book.notes)
    header_row = band_row + 1
    first_row = header_row + 1

    bands = [(history, label(TEMPLATE_LINES, "orders") + ", last 12 months", _FILL_LOCKED),
             ([m for m in horizon if m in frozen], "Frozen: shown, not open to change", _FILL_FROZEN),
             ([m for m in horizon if m not in frozen], "Your forecast: units a month (yellow cells)",
              _FILL_HEADER_INPUT),
             ([NOTE_COLUMN], "Your note (optional)", _FILL_HEADER_INPUT)]
    for months, text, colour in bands:
        if not months:
            continue
        start, end = position[months[0]], position[months[-1]]
        cell = sheet.cell(row=band_row, column=start, value=text)
        cell.font, cell.fill = Font(bold=True), solid(colour)
        if end > start:
            sheet.merge_cells(start_row=band_row, start_column=start, end_row=band_row, end_column=end)

    for name in columns:
        cell = sheet.cell(row=header_row, column=position[name], value=name)
        cell.font = Font(bold=True)
        cell.border = Border(bottom=Side(style="medium", color="404040"))
        cell.alignment = Alignment(horizontal="center" if name in history or name in horizon else "left")
        open_input = name == NOTE_COLUMN or (name in horizon and name not in frozen)
        cell.fill = solid(_FILL_HEADER_INPUT if open_input else (_FILL_FROZEN if name in frozen else _FILL_HEADER))

    styles = _cell_styles(workbook)
    month_set = set(history) | set(horizon)
    # Each column's style on the row to fill in and on a reference line, chosen once per column.
    input_kind = ["input_key" if c in key_columns or c == LINE_COLUMN else
                  "input_open" if c == NOTE_COLUMN or (c in horizon and c not in frozen) else
                  "input_frozen" if c in frozen else "input_history" for c in columns]
    reference_kind = ["reference_number" if c in month_set else "reference_text" for c in columns]
    is_month = [c in month_set for c in columns]
    lines = grid["_line"].to_numpy()
    input_rows = []
    last_of_block = np.r_[lines[1:] == "forecast", True]
    for offset, values in enumerate(grid[columns].itertuples(index=False, name=None)):
        # One pass over the rows the sheet shows: a key's block is a handful of rows, a template a few thousand.
        row = first_row + offset
        is_input = lines[offset] == "forecast"
        if is_input:
            input_rows.append(row)
        kinds = input_kind if is_input else reference_kind
        end = "_end" if last_of_block[offset] else ""
        for column, (value, kind, month) in enumerate(zip(values, kinds, is_month), start=1):
            if value is not None and pd.isna(value):
                value = None
            elif month and value is not None:
                value = int(value)
            cell = sheet.cell(row=row, column=column, value=value)
            cell.style = styles[kind + ("" if kind == "input_open" else end)]

    open_months = [m for m in horizon if m not in frozen]
    if open_months and input_rows:
        rule = DataValidation(type="decimal", operator="greaterThanOrEqual", formula1="0", allow_blank=True,
                              showErrorMessage=True, errorTitle="A quantity",
                              error="Type a number of 0 or more (units), or leave the cell blank for no forecast.",
                              showInputMessage=True, promptTitle="Your forecast",
                              prompt="Units this month: 0 or more. Blank means no forecast.")
        for row in input_rows:
            rule.add(f"{letter[open_months[0]]}{row}:{letter[open_months[-1]]}{row}")
        sheet.add_data_validation(rule)

    for name in key_columns:
        widest = max([len(name), *(len(str(v)) for v in book.keys[name].astype(str))])
        sheet.column_dimensions[letter[name]].width = min(MAX_WIDTH, max(MIN_WIDTH, widest + 2))
    widest_line = max(len(str(v)) for v in grid[LINE_COLUMN])
    sheet.column_dimensions[letter[LINE_COLUMN]].width = min(48, max(MIN_WIDTH, widest_line + 2))
    for name in [*history, *horizon]:
        sheet.column_dimensions[letter[name]].width = MONTH_WIDTH
    sheet.column_dimensions[letter[NOTE_COLUMN]].width = NOTE_WIDTH
    if history:  # the order history can be folded away with the outline button above the columns
        sheet.column_dimensions.group(letter[history[0]], letter[history[-1]], outline_level=1, hidden=False)
    sheet.freeze_panes = sheet.cell(row=first_row, column=position[LINE_COLUMN] + 1)
    sheet.print_title_rows = f"{header_row}:{header_row}"
    sheet.page_setup.orientation = "landscape"
    sheet.sheet_properties.pageSetUpPr.fitToPage = True
    sheet.page_setup.fitToWidth, sheet.page_setup.fitToHeight = 1, 0
    _protect(sheet)

    _write_track_record(workbook.create_sheet(TRACK_RECORD_SHEET), book)
    _write_meta_sheet(workbook, meta)
    save_workbook(workbook, path)


def _cell_styles(workbook) -> dict[str, str]:
    """Named styles of the wide sheet, registered once (a style per cell costs openpyxl a lookup, not a new style)."""
    from openpyxl.styles import Border, Font, NamedStyle, PatternFill, Protection, Side

    thin = Side(style="thin", color="BFBFBF")
    boxed = Border(left=thin, right=thin, top=thin, bottom=thin)
    block_end = Border(bottom=Side(style="thin", color="808080"))
    grey = Font(italic=True, color=_GREY_TEXT)
    kinds = {
        "input_key": dict(font=Font(bold=True)),
        "input_open": dict(fill=PatternFill("solid", fgColor=_FILL_INPUT), border=boxed,
                           protection=Protection(locked=False)),
        "input_frozen": dict(fill=PatternFill("solid", fgColor=_FILL_FROZEN)),
        "input_history": dict(fill=PatternFill("solid", fgColor=_FILL_LOCKED)),
        "reference_text": dict(font=grey),
        "reference_number": dict(font=grey, number_format="#,##0"),
    }
    names = {}
    for kind, looks in kinds.items():
        for end in ("", "_end"):
            name = f"consensus {kind}{end}".replace("_", " ")
            style = NamedStyle(name=name, **looks)
            if end and kind != "input_open":
                style.border = block_end
            if name not in workbook.named_styles:
                workbook.add_named_style(style)
            names[kind + end] = name
    return names


def _protect(sheet) -> None:
    """Lock every cell not unlocked; widths and heights stay adjustable (no password: a guard, not security)."""
    sheet.protection.sheet = True
    sheet.protection.formatColumns = False
    sheet.protection.formatRows = False


def _write_track_record(sheet, book: WideTemplate) -> None:
    """The second sheet: the submitter's accuracy by lag bucket, by group, and the weight the consensus gave them."""
    from openpyxl.styles import Alignment, Border, Font, PatternFill, Side

    record = book.track_record
    bold, grey = Font(bold=True), Font(italic=True, color=_GREY_TEXT)
    head_fill = PatternFill("solid", fgColor=_FILL_HEADER)
    head_border = Border(bottom=Side(style="thin", color="404040"))
    wrap = Alignment(wrap_text=True, vertical="top")
    row = 1

    def line(text, font=None):
        nonlocal row
        cell = sheet.cell(row=row, column=1, value=text)
        if font is not None:
            cell.font = font
        row += 1

    def table(headers, rows, formats, sentence_columns=()):
        nonlocal row
        for j, text in enumerate(headers, start=1):
            cell = sheet.cell(row=row, column=j, value=text)
            cell.font, cell.fill, cell.border = bold, head_fill, head_border
        row += 1
        for values in rows:
            for j, value in enumerate(values, start=1):
                if isinstance(value, float) and not np.isfinite(value):
                    value = None
                cell = sheet.cell(row=row, column=j, value=value)
                if formats[j - 1]:
                    cell.number_format = formats[j - 1]
                if j in sentence_columns:
                    cell.alignment = wrap
                else:
                    cell.alignment = Alignment(vertical="top")
            row += 1
        row += 1

    who = source_label(book.meta.get("source", ""))
    scope = str(book.meta.get("scope", "all"))
    line(f"Your track record: {who}, {scope}", Font(bold=True, size=14))
    if record is None:
        line(book.track_record_missing or "No consensus run has measured your forecasts yet.", grey)
        _protect(sheet)
        return
    cycles = record.cycles
    run_words = f"the consensus run of cycle {record.run_cycle} (run #{record.run_id}, {record.run_status})"
    level_words = label(LEVELS, record.level).lower()
    if record.groups.empty:
        line(f"None of your forecasts has been compared with what customers ordered in {run_words} yet.", grey)
        row += 1
    else:
        span = f"{cycles[0]} … {cycles[-1]} ({len(cycles)} cycle{'s' if len(cycles) != 1 else ''})" if cycles \
            else "of its window"
        line(f"How your forecasts compared with what customers actually ordered, as {run_words} measured them over "
             f"the cycles {span}.", grey)
        line("Errors are actual orders minus your forecast: a negative bias means your forecasts ran high.", grey)
        row += 1
        line(f"By how far ahead you forecast, all your groups ({level_words}) together", bold)
        table(["How far ahead", "Lag bucket", "Forecasts scored", "Groups", "WAPE %", "Bias %", "Tracking signal",
               "In plain words"],
              [(describe_lag_bucket(r.lag_bucket), str(r.lag_bucket), int(r.n), int(r.n_groups), float(r.wape),
                float(r.bias_pct), float(r.tracking_signal), r.sentence)
               for r in record.pooled.itertuples(index=False)],
              [None, None, "0", "0", "0.0", "0.0", "0.0", None], sentence_columns=(8,))
        line(f"By group ({level_words}), as the scorecard shows them", bold)
        table(["Product", "Place", "Lag bucket", "Forecasts scored", "WAPE %", "Bias %", "Tracking signal",
               "Steady lean"],
              [(str(r.node_item), str(r.node_location), str(r.lag_bucket), int(r.n), float(r.wape),
                float(r.bias_pct), float(r.tracking_signal), "yes: the misses kept to one side" if bool(r.ts_flag)
                else "") for r in record.groups.itertuples(index=False)],
              [None, None, None, "0", "0.0", "0.0", "0.0", None])

    line(f"The weight the consensus of cycle {record.run_cycle} gave your forecast "
         f"({scheme_label(record.scheme)})", bold)
    weights = record.weights
    if weights.empty:
        line("The run gave your source no weight rows for these groups.", grey)
    else:
        table(["Segment", "How far ahead", "Lag bucket", "Your weight", "Sources weighed", "Equal share", "Based on",
               "Why", "The run's note"],
              [(str(r.segment), describe_lag_bucket(r.lag_bucket), str(r.lag_bucket), float(r.weight),
                int(r.n_sources), float(r.equal_share), str(r.basis_label), str(r.why), str(r.note))
               for r in weights.itertuples(index=False)],
              [None, None, None, "0%", "0", "0%", None, None, None], sentence_columns=(8, 9))

    line("What the measures mean", bold)
    for key in ("wape", "bias_pct", "tracking_signal"):
        found = term(MEASURES, key)
        source = f" ({found.reference})" if found.reference else ""
        line(f"{found.label}: {found.description}{source}.", grey)

    widths = {1: 24, 2: 16, 3: 12, 4: 16, 5: 16, 6: 12, 7: 16, 8: SENTENCE_WIDTH, 9: 70}
    for column, width in widths.items():
        sheet.column_dimensions[chr(64 + column)].width = width
    sheet.freeze_panes = "A2"
    _protect(sheet)
