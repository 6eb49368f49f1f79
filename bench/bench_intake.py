"""Benchmark: what hostile input files cost to refuse, what a real one costs to read, what safe writing costs.

Three tables; each reading case runs in a fresh child process so that its
time and peak resident memory (``VmHWM`` of /proc/self/status, Linux) are its own:

1. XLSX sizes: how many bytes a row of this tool's own filled-in template
   unpacks to and how well the sheet compresses, scaled to 2,000,000 rows.
   The defaults of ``consensus.intake.reader.ReadLimits`` are chosen from it.
2. Reading: a real template of ``--rows`` rows; a compressed bomb (a small file
   whose sheet unpacks to hundreds of MB) with the default limits and with the
   size and ratio caps lifted (the reader before the limits read it in full);
   a sheet that jumps to row 2,000,000,000.
3. Writing ``--export-rows`` rows of an export: pandas' ``to_csv`` straight
   over the target against ``consensus.outputs.write_csv`` (formula text
   escaped, temporary file, fsync, rename), as a ratio in one process.

Targets: a bomb is refused in under a second and 200 MB; the real file reads
as before; safe writing costs under 1.5 times a plain ``to_csv``.

Run:  python bench/bench_intake.py  [--rows 100000] [--bomb-mb 200] [--export-rows 500000]
"""

from __future__ import annotations

import argparse
import io
import json
import os
import subprocess
import sys
import tempfile
import time
import zipfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

SHEET = "xl/worksheets/sheet1.xml"

CHILD = """
import json, sys, time
from consensus.errors import InputRejected
from consensus.intake.reader import ReadLimits, read_table
path, lifted = sys.argv[1], sys.argv[2] == "lifted"
limits = ReadLimits(max_inflated_bytes=10**12, max_compression_ratio=10**6) if lifted else ReadLimits()
started = time.perf_counter()
try:
    outcome = f"read {len(read_table(path, limits=limits).frame):,} rows"
except InputRejected as error:
    outcome = "refused: " + error.problems[0].expected[:60]
seconds = time.perf_counter() - started
# VmHWM, not ru_maxrss: Linux keeps ru_maxrss across exec, so it would report the parent's peak.
peak_kb = next(int(line.split()[1]) for line in open("/proc/self/status") if line.startswith("VmHWM:"))
print(json.dumps({"seconds": seconds, "peak_mb": peak_kb / 1024, "outcome": outcome}))
"""


def write_template_file(path: Path, rows: int) -> None:
    """This tool's own template of ``rows`` item × location × month rows, filled in as a submitter would."""
    import numpy as np
    import openpyxl
    import pandas as pd

    from consensus.intake.template_file import write_template

    frame = pd.DataFrame({"item": [f"KIT-{i % 5000:05d}" for i in range(rows)],
                          "location": [f"DC-{i % 20:02d}" for i in range(rows)],
                          "period": [f"2027-{1 + i % 12:02d}" for i in range(rows)],
                          "last_consensus": np.arange(rows) % 997 * 1.0, "note": ""})
    write_template(path, frame, meta={"source": "dc", "cycle": "2026-12"})
    workbook = openpyxl.load_workbook(path)
    sheet = workbook["forecast"]
    column = [c.value for c in sheet[1]].index("quantity") + 1
    for row in range(2, rows + 2):
        sheet.cell(row=row, column=column).value = row % 113
    workbook.save(path)


def write_bomb(path: Path, unpacked_mb: int) -> None:
    """A workbook whose one sheet is the same row over and over: a few hundred KB that unpack to ``unpacked_mb``."""
    row = b'<row><c t="inlineStr"><is><t>KIT-00001</t></is></c><c t="inlineStr"><is><t>DC-01</t></is></c>' \
          b'<c t="inlineStr"><is><t>2027-01</t></is></c><c><v>5</v></c></row>'
    header = b'<row><c t="inlineStr"><is><t>item</t></is></c><c t="inlineStr"><is><t>location</t></is></c>' \
             b'<c t="inlineStr"><is><t>period</t></is></c><c t="inlineStr"><is><t>quantity</t></is></c></row>'
    base = _small_workbook()
    source = zipfile.ZipFile(io.BytesIO(base))
    with zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED) as out:
        for info in source.infolist():
            if info.filename != SHEET:
                out.writestr(info.filename, source.read(info.filename))
        with out.open(SHEET, "w", force_zip64=True) as sheet:
            sheet.write(b'<worksheet xmlns="http://schemas.openxmlformats.org/spreadsheetml/2006/main"><sheetData>')
            sheet.write(header)
            block = row * 10_000
            for _ in range(unpacked_mb * 1_000_000 // len(block)):
                sheet.write(block)
            sheet.write(b"</sheetData></worksheet>")


def write_row_jump(path: Path) -> None:
    base = _small_workbook()
    source = zipfile.ZipFile(io.BytesIO(base))
    with zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED) as out:
        for info in source.infolist():
            data = source.read(info.filename)
            if info.filename == SHEET:
                data = data.replace(b'r="2"', b'r="2000000000"').replace(b'2"', b'2000000000"')
            out.writestr(info.filename, data)


def _small_workbook() -> bytes:
    import openpyxl

    workbook = openpyxl.Workbook()
    workbook.active.title = "forecast"
    workbook.active.append(["item", "location", "period", "quantity"])
    workbook.active.append(["KIT-00001", "DC-01", "2027-01", 5])
    buffer = io.BytesIO()
    workbook.save(buffer)
    return buffer.getvalue()


def measure_read(path: Path, *, lifted: bool = False) -> dict:
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    done = subprocess.run([sys.executable, "-c", CHILD, str(path), "lifted" if lifted else "default"],
                          capture_output=True, text=True, env=env, timeout=1800, check=True)
    return json.loads(done.stdout.strip().splitlines()[-1])


def sizes(path: Path, rows: int) -> tuple[int, int, int]:
    parts = zipfile.ZipFile(path).infolist()
    sheet = next(p for p in parts if p.filename == SHEET)
    return sum(p.file_size for p in parts), sheet.file_size, sheet.compress_size


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--rows", type=int, default=100_000, help="rows of the real template (default 100,000)")
    parser.add_argument("--bomb-mb", type=int, default=200, help="unpacked size of the bomb's sheet in MB")
    parser.add_argument("--export-rows", type=int, default=500_000)
    args = parser.parse_args()
    print(f"load average at start: {os.getloadavg()[0]:.2f} (2 shared cores; re-run when busy)")

    with tempfile.TemporaryDirectory(prefix="bench-intake-") as folder:
        folder = Path(folder)
        real, bomb, jump = folder / "template.xlsx", folder / "bomb.xlsx", folder / "jump.xlsx"
        write_template_file(real, args.rows)
        write_bomb(bomb, args.bomb_mb)
        write_row_jump(jump)

        print("\n1. XLSX sizes")
        print(f"{'file':<28}{'on disk':>14}{'unpacked':>16}{'bytes/row':>11}{'sheet ratio':>13}{'at 2,000,000 rows':>20}")
        for label, path, rows in (("template, filled", real, args.rows), ("bomb (one row repeated)", bomb, None)):
            total, sheet, packed = sizes(path, rows)
            per_row = f"{total / rows:,.0f}" if rows else "–"
            scaled = f"{total / rows * 2_000_000 / 1e6:,.0f} MB" if rows else "–"
            print(f"{label:<28}{path.stat().st_size:>14,}{total:>16,}{per_row:>11}{sheet / packed:>12,.0f}:1{scaled:>20}")

        print("\n2. Reading (each in a fresh process)")
        print(f"{'case':<44}{'seconds':>9}{'peak MB':>9}  outcome")
        cases = [(f"real template, {args.rows:,} rows", real, False),
                 (f"bomb {bomb.stat().st_size / 1e6:.1f} MB -> {args.bomb_mb} MB, default limits", bomb, False),
                 ("bomb, size and ratio caps lifted", bomb, True),
                 ("sheet jumping to row 2,000,000,000", jump, False)]
        for label, path, lifted in cases:
            result = measure_read(path, lifted=lifted)
            print(f"{label:<44}{result['seconds']:>9.2f}{result['peak_mb']:>9.0f}  {result['outcome']}")

    print("\n3. Writing an export (same process)")
    import numpy as np
    import pandas as pd

    from consensus.outputs import write_csv

    n = args.export_rows
    rng = np.random.default_rng(7)
    frame = pd.DataFrame({"cycle": "2026-11", "item": [f"KIT-{i % 5000:05d}" for i in range(n)],
                          "location": [f"DC-{i % 20:02d}" for i in range(n)],
                          "period": [f"2027-{1 + i % 12:02d}" for i in range(n)],
                          "consensus": rng.gamma(2.0, 50.0, n), "low_80": rng.gamma(2.0, 40.0, n),
                          "high_80": rng.gamma(2.0, 60.0, n), "status": "draft"})
    frame.loc[::1000, "item"] = "=HYPERLINK(\"http://x.invalid\")"  # a few cells that need escaping
    with tempfile.TemporaryDirectory(prefix="bench-export-") as folder:
        target = Path(folder) / "consensus.csv"
        timings = {"pandas to_csv": [], "outputs.write_csv": []}
        for _ in range(3):
            started = time.perf_counter()
            frame.to_csv(target, index=False, float_format="%.3f")
            timings["pandas to_csv"].append(time.perf_counter() - started)
            started = time.perf_counter()
            write_csv(frame, target, float_format="%.3f")
            timings["outputs.write_csv"].append(time.perf_counter() - started)
    plain = min(timings["pandas to_csv"])
    print(f"{'writer':<22}{'best of 3 s':>12}{'ratio':>8}   ({n:,} rows)")
    for label, values in timings.items():
        print(f"{label:<22}{min(values):>12.2f}{min(values) / plain:>8.2f}")


if __name__ == "__main__":
    main()
