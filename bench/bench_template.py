"""Benchmark: what a wide fill-in workbook costs to write and to read back, against the long layout of the same keys.

For ``--keys`` item × location keys over an 18-month horizon (each with its
four reference lines, 12 months of order history and a track record left
out), in one process so the ratios compare like with like:

* writing the wide XLSX and the wide CSV (``write_wide_template``) against
  the long XLSX of the same keys × months (``write_template``);
* reading a filled wide XLSX / CSV back to checked lines
  (``read_returned_file`` + ``check_returned`` with the forecast checks)
  against reading and checking the filled long XLSX.

Targets (the intended use is a sales lead's family × region file, tens of
rows): a 200-key workbook writes and reads back in under 2 s each; reading a
wide workbook back costs at most 1.5 times reading the long layout of the
same cells.  Wide XLSX is built in memory by openpyxl (cell styles and
protection), so an item × location template of 100,000 series is a CSV job.

Run:  python bench/bench_template.py  [--keys 200 2000] [--repeat 1]
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

from consensus.intake.checks import check_forecast_rows  # noqa: E402
from consensus.intake.reader import read_table  # noqa: E402
from consensus.intake.template_file import ReferenceLine, WideTemplate, write_template, write_wide_template  # noqa: E402
from consensus.intake.workbook import check_returned, read_returned_file  # noqa: E402
from consensus.periods import horizon_months  # noqa: E402

CYCLE = "2026-11"


def _book(keys: int, seed: int = 1) -> tuple[WideTemplate, pd.DataFrame, pd.DataFrame]:
    rng = np.random.default_rng(seed)
    items = pd.DataFrame({"item": [f"IT{i:06d}" for i in range(keys)], "family": [f"FAM{i % 40:02d}"
                                                                                  for i in range(keys)]})
    locations = pd.DataFrame({"location": ["DC-1"], "region": ["R1"]})
    key_frame = items[["item"]].assign(location="DC-1")
    horizon = horizon_months(CYCLE, 18)
    history = horizon_months("2025-11", 12)  # 2025-12 … 2026-11, the last 12 months of orders

    def values(months):
        grid = key_frame.merge(pd.DataFrame({"period": months}), how="cross")
        return grid.assign(quantity=rng.gamma(2.0, 40.0, len(grid)))
    references = (ReferenceLine("orders", "Reference: orders", values(history)),
                  ReferenceLine("orders_last_year", "Reference: orders a year earlier", values(horizon[:12])),
                  ReferenceLine("last_consensus", "Reference: last consensus", values(horizon[:17])),
                  ReferenceLine("statistical", "Reference: statistical forecast", values(horizon)))
    book = WideTemplate(keys=key_frame, history_months=tuple(history), horizon_months=tuple(horizon),
                        frozen_months=(), references=references,
                        meta={"source": "dc", "cycle": CYCLE, "scope": "location DC-1"}, title="bench")
    return book, items, locations


def _fill_wide(book: WideTemplate, path: Path) -> None:
    """The cells a submitter types, written into the template's input rows (not timed)."""
    if path.suffix == ".csv":
        frame = pd.read_csv(path, dtype=str, keep_default_na=False, encoding="utf-8-sig")
        rows = frame["line"] == "Your forecast"
        for month in book.horizon_months:
            frame.loc[rows, month] = "12"
        frame.to_csv(path, index=False)
        return
    import openpyxl

    workbook = openpyxl.load_workbook(path)
    sheet = workbook["forecast"]
    note_column = sheet.max_column  # the last column; asked once (openpyxl recounts it on every call)
    for row in sheet.iter_rows():
        for cell in row:
            if cell.protection.locked is False and cell.column != note_column:
                cell.value = 12
    workbook.save(path)


def _timed(action, repeat: int) -> float:
    best = float("inf")
    for _ in range(repeat):
        started = time.perf_counter()
        action()
        best = min(best, time.perf_counter() - started)
    return best


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--keys", type=int, nargs="+", default=[200, 2000])
    parser.add_argument("--repeat", type=int, default=1)
    args = parser.parse_args()
    print(f"load average {os.getloadavg()[0]:.1f} (2 cores shared: rerun when busy)")
    print(f"{'keys':>7} {'cells':>8} | {'write wide xlsx':>15} {'wide csv':>9} {'long xlsx':>10} | "
          f"{'read wide xlsx':>14} {'wide csv':>9} {'long xlsx':>10} {'wide/long':>9}")
    for keys in args.keys:
        book, items, locations = _book(keys)
        horizons = {CYCLE: list(book.horizon_months)}
        options = dict(items=items, locations=locations, horizons=horizons, default_cycle=CYCLE)
        with tempfile.TemporaryDirectory() as folder:
            folder = Path(folder)
            wide_xlsx, wide_csv, long_xlsx = folder / "w.xlsx", folder / "w.csv", folder / "l.xlsx"
            long_frame = book.keys.merge(pd.DataFrame({"period": list(book.horizon_months)}), how="cross")
            t_wx = _timed(lambda: write_wide_template(wide_xlsx, book), args.repeat)
            t_wc = _timed(lambda: write_wide_template(wide_csv, book), args.repeat)
            t_lx = _timed(lambda: write_template(long_xlsx, long_frame, meta=book.meta), args.repeat)
            _fill_wide(book, wide_xlsx)
            _fill_wide(book, wide_csv)
            long_filled = long_frame.assign(quantity=12)
            write_template(long_xlsx, long_filled.drop(columns="quantity"), meta=book.meta)
            import openpyxl

            workbook = openpyxl.load_workbook(long_xlsx)
            sheet = workbook["forecast"]
            for row in range(2, sheet.max_row + 1):
                sheet.cell(row=row, column=4, value=12)
            workbook.save(long_xlsx)

            def read_wide(path):
                result = check_returned(read_returned_file(path), check_forecast_rows, filename=path.name,
                                        **options)
                assert result.is_clean and len(result.clean) == keys * 18, result.problems[:3]

            def read_long():
                result = check_forecast_rows(read_table(long_xlsx), filename=long_xlsx.name, **options)
                assert result.is_clean and len(result.clean) == keys * 18, result.problems[:3]

            r_wx = _timed(lambda: read_wide(wide_xlsx), args.repeat)
            r_wc = _timed(lambda: read_wide(wide_csv), args.repeat)
            r_lx = _timed(read_long, args.repeat)
        print(f"{keys:>7,} {keys * 18:>8,} | {t_wx:>13.2f} s {t_wc:>7.2f} s {t_lx:>8.2f} s | "
              f"{r_wx:>12.2f} s {r_wc:>7.2f} s {r_lx:>8.2f} s {r_wx / r_lx:>9.2f}")
    print("targets: 200 keys write and read back under 2 s each; wide read / long read at most 1.5")


if __name__ == "__main__":
    main()
