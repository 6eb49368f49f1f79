"""Write the small hostile input files of this folder (run from anywhere: python tests/data/hostile/make_files.py).

Each file stands for one finding of a month end at a real company; the codes,
numbers and names are invented.  Large files (zip bombs, over-long CSV cells,
sheets that jump to row two billion) are made by the tests at run time, not
kept here.
"""

from __future__ import annotations

import io
import zipfile
from pathlib import Path

import openpyxl

HERE = Path(__file__).parent


def _workbook_bytes(rows: list[list]) -> bytes:
    workbook = openpyxl.Workbook()
    sheet = workbook.active
    sheet.title = "forecast"
    for row in rows:
        sheet.append(row)
    buffer = io.BytesIO()
    workbook.save(buffer)
    return buffer.getvalue()


def _rewrite(data: bytes, *, drop: set[str] = frozenset(), replace: dict[str, bytes] | None = None) -> bytes:
    """The same zip archive with some parts left out or given other contents."""
    replace = replace or {}
    source = zipfile.ZipFile(io.BytesIO(data))
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED) as out:
        for info in source.infolist():
            if info.filename in drop:
                continue
            out.writestr(info.filename, replace.get(info.filename, source.read(info.filename)))
    return buffer.getvalue()


def main() -> None:
    good = _workbook_bytes([["item", "location", "period", "quantity"], ["A100", "L1", "2026-12", 5]])
    sheet = zipfile.ZipFile(io.BytesIO(good)).read("xl/worksheets/sheet1.xml")
    # A valid zip whose sheet XML stops in the middle of a tag.
    (HERE / "xlsx_broken_xml.xlsx").write_bytes(_rewrite(good, replace={"xl/worksheets/sheet1.xml": sheet[: len(sheet) // 2]}))
    # A valid zip without the workbook part that names the sheets.
    (HERE / "xlsx_no_workbook_part.xlsx").write_bytes(_rewrite(good, drop={"xl/workbook.xml"}))
    # A valid zip whose workbook names a sheet part that is not there.
    (HERE / "xlsx_no_sheet_part.xlsx").write_bytes(_rewrite(good, drop={"xl/worksheets/sheet1.xml"}))
    # A cell reference no spreadsheet has (column beyond XFD).
    (HERE / "xlsx_bad_cell_reference.xlsx").write_bytes(
        _rewrite(good, replace={"xl/worksheets/sheet1.xml": sheet.replace(b'r="A2"', b'r="ZZZZ2"')}))

    texts = {
        # A quantity of 1e308 is finite; two of them are not.
        "forecast_huge_quantity.csv": "item,location,period,quantity\nA100,L1,2026-12,1e308\nA100,L2,2026-12,1000000001\n"
                                      "A200,L1,2026-12,1000000000\n",
        "actuals_huge_quantity.csv": "item,location,date,quantity\nA100,L1,2026-10-03,1e308\nA100,L1,2026-10-04,1e308\n",
        # Order history from the future and from a spreadsheet's zero date.
        "actuals_far_dates.csv": "item,location,date,quantity\nA100,L1,2099-01-15,5\nA100,L1,1900-01-01,3\n"
                                 "A100,L1,2026-10-03,7\n",
        # A distribution center's monthly forecast: the very columns of monthly history, months ahead.
        "actuals_is_a_forecast.csv": "item,location,period,quantity\nA100,L1,2027-01,40\nA100,L1,2027-02,41\n"
                                     "A100,L1,2027-03,42\nA100,L1,2026-10,39\n",
        # A forecast with its cycle column, given to the actuals load.
        "actuals_with_cycle_column.csv": "cycle,item,location,period,quantity\n2026-11,A100,L1,2026-10,40\n",
        # Codes and free text a spreadsheet would run as formulas.
        "forecast_formula_codes.csv": "item,location,period,quantity,note\n=HYPERLINK(\"http://x.invalid\"),L1,2026-12,5,\n"
                                      "A100,+L1,2026-12,5,\nA100,L1,2027-01,5,=1+1\nA200,L1,2026-12,5,'=2+2\n",
        "items_formula_codes.csv": "item,family,unit_price,description\n@A1,FAM1,10,plain\nA2,-FAM,10,=cmd|' /C calc'!A0\n",
        "bom_formula_codes.csv": "parent,component,qty_per,lead_time_months\n=A,B,1,0\nA,+B,1,0\n",
        "events_formula_name.csv": "event,item,start,end,uplift_pct\n=Spring promo,A100,2027-01,2027-02,10\n",
        # The optional description column left out (the store's column is not null).
        "items_no_description.csv": "item,family,unit_price\nA100,FAM1,10\nA200,FAM1,\n",
        "locations_no_description.csv": "location,region\nL1,NORTH\nL2,SOUTH\n",
        # Numbers past their kind's limit in master data and events.
        "items_huge_price.csv": "item,family,unit_price\nA100,FAM1,1e308\n",
        "bom_huge_numbers.csv": "parent,component,qty_per,lead_time_months\nA,B,1e308,0\nA,C,1,1000000\n",
        "events_huge_effects.csv": "event,item,start,end,uplift_pct,units\nBig,A100,2027-01,2027-02,1e308,\n"
                                   "Loss,A200,2027-01,2027-02,,-1e308\nForever,C100,1900-01,2099-12,10,\n",
    }
    for name, text in texts.items():
        (HERE / name).write_text(text, encoding="utf-8", newline="")


if __name__ == "__main__":
    main()
