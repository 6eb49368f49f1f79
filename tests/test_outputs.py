"""Output files: formula text escaped (OWASP), text cells in XLSX (ECMA-376), atomic replacement, clear path errors."""

from __future__ import annotations

import csv
import errno
import hashlib
import os
import signal
import stat
import subprocess
import sys
import textwrap
import time
import zipfile
from pathlib import Path

import numpy as np
import openpyxl
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from consensus.errors import ConsensusError, OutputNotWritable
from consensus.outputs import (
    FORMULA_TRIGGERS,
    atomic_target,
    check_output_path,
    escape_formula_text,
    escape_text_columns,
    looks_like_formula,
    save_workbook,
    unescape_formula_text,
    write_csv,
    write_text,
)

ROOT = Path(__file__).parent.parent

# ---- escaping: OWASP "CSV Injection" ---------------------------------------------------------------------
# OWASP's CSV Injection page: cells beginning with "=", "+", "-", "@", tab (0x09) or carriage return (0x0D)
# are run as formulas by spreadsheet programs; prepend a single quote so the cell is read as text.
OWASP_CASES = [
    ("=1+1", "'=1+1"),
    ("+41 22 000", "'+41 22 000"),
    ("-2+3+cmd|' /C calc'!A0", "'-2+3+cmd|' /C calc'!A0"),
    ("@SUM(A1:A9)", "'@SUM(A1:A9)"),
    ("\t=1+1", "'\t=1+1"),
    ("\r=1+1", "'\r=1+1"),
    ("plain", "plain"),
    ("a=b", "a=b"),  # only the first character matters
    ("", ""),
    ("'=already", "'=already"),  # a quote first is text already: escaping twice changes nothing
]


def test_formula_text_is_escaped_with_a_single_quote_as_owasp_advises():
    values = pd.Series([given for given, _ in OWASP_CASES], dtype="object")
    assert escape_formula_text(values).tolist() == [wanted for _, wanted in OWASP_CASES]
    assert set(FORMULA_TRIGGERS) == {"=", "+", "-", "@", "\t", "\r"}  # the OWASP list, no more, no less


def test_numbers_and_missing_cells_are_never_escaped():
    """A negative number is a number to every spreadsheet (common practice); only text can be a formula."""
    numbers = pd.Series([-3.5, 0.0, np.nan])
    assert not looks_like_formula(numbers).any()
    mixed = pd.Series([-1, "-1", None, np.nan, "=x"], dtype="object")
    assert looks_like_formula(mixed).tolist() == [False, True, False, False, True]
    assert escape_formula_text(mixed).tolist()[:2] == [-1, "'-1"]


@settings(max_examples=100, deadline=None)
@given(text=st.text(alphabet=st.sampled_from(list("=+-@'\t\rab1 ")), max_size=6))
def test_unescape_inverts_escape_for_all_text_but_a_quoted_formula(text):
    """The round trip is lossless except for text that itself starts with a quote before a formula character."""
    back = unescape_formula_text(escape_formula_text(pd.Series([text], dtype="object"))).iloc[0]
    starts_quoted_formula = text[:1] == "'" and text[1:2] in FORMULA_TRIGGERS
    assert back == (text[1:] if starts_quoted_formula else text)


def test_escape_text_columns_leaves_numbers_and_escapes_the_header():
    frame = pd.DataFrame({"item": ["=A", "B"], "quantity": [-1.0, 2.0], "=total": ["x", "@y"]})
    safe = escape_text_columns(frame)
    assert list(safe.columns) == ["item", "quantity", "'=total"]
    assert safe["item"].tolist() == ["'=A", "B"] and safe["quantity"].tolist() == [-1.0, 2.0]
    assert frame["item"].tolist() == ["=A", "B"]  # the caller's frame is not changed


def test_write_csv_escapes_text_cells_as_read_by_pythons_csv_module(tmp_path):
    frame = pd.DataFrame({"item": ["A1", "=HYPERLINK(\"http://x.invalid\")"], "note": ["@home", "fine"],
                          "consensus": [-12.5, 3.0]})
    path = write_csv(frame, tmp_path / "out.csv", float_format="%.3f")
    rows = list(csv.reader(path.open(encoding="utf-8", newline="")))
    assert rows == [["item", "note", "consensus"], ["A1", "'@home", "-12.500"],
                    ["'=HYPERLINK(\"http://x.invalid\")", "fine", "3.000"]]


# ---- XLSX cells: text, never formulas (ECMA-376 SpreadsheetML) ---------------------------------------


def test_saved_workbook_keeps_formula_text_as_text_cells(tmp_path):
    """openpyxl (the reference reader) must see data type 's', the text unchanged and quotePrefix set.

    In SpreadsheetML a formula is an <f> element of the cell (ECMA-376 Part 1, §18.3.1.40); text is a
    string cell, and quotePrefix (§18.8.45) keeps it text when it is edited.
    """
    workbook = openpyxl.Workbook()
    sheet = workbook.active
    texts = [given for given, _ in OWASP_CASES if given]
    sheet.append(texts)
    assert sheet["A1"].data_type == "f"  # what openpyxl itself makes of "=1+1": the finding
    path = save_workbook(workbook, tmp_path / "book.xlsx")
    cells = list(openpyxl.load_workbook(path).active[1])
    assert [c.value for c in cells] == texts
    assert {c.data_type for c in cells} == {"s"}
    risky = [c.quotePrefix for c, text in zip(cells, texts) if text[:1] in FORMULA_TRIGGERS]
    assert risky and all(risky)
    sheet_xml = zipfile.ZipFile(path).read("xl/worksheets/sheet1.xml")
    assert b"<f>" not in sheet_xml and b"<f " not in sheet_xml


# ---- paths -----------------------------------------------------------------------------------------------


def test_output_path_errors_are_clear(tmp_path):
    (tmp_path / "a_file").write_text("x")
    cases = {
        str(tmp_path): "is a folder",
        str(tmp_path) + os.sep: "names a folder",
        str(tmp_path / "missing" / "pack.pdf"): "does not exist",
        str(tmp_path / "a_file" / "pack.pdf"): "is a file, not a folder",
        "": "empty path",
    }
    for path, words in cases.items():
        with pytest.raises(OutputNotWritable, match=words):
            check_output_path(path)
    assert issubclass(OutputNotWritable, ConsensusError)  # the CLI prints it as one line
    if Path("/dev/null").exists():
        with pytest.raises(OutputNotWritable, match="not a regular file"):
            check_output_path("/dev/null")


def test_writing_into_a_folder_raises_before_anything_is_made(tmp_path):
    with pytest.raises(OutputNotWritable):
        write_csv(pd.DataFrame({"a": [1]}), tmp_path)
    with pytest.raises(OutputNotWritable):
        write_text("x", tmp_path / "nowhere" / "x.html")
    assert list(tmp_path.iterdir()) == []


def test_a_symbolic_link_is_followed_and_stays_a_link(tmp_path):
    real = tmp_path / "real.csv"
    real.write_text("old")
    link = tmp_path / "link.csv"
    link.symlink_to(real)
    write_text("new", link)
    assert link.is_symlink() and real.read_text() == "new"


# ---- atomic replacement --------------------------------------------------------------------------------


def test_failed_write_leaves_the_old_file_and_no_temporary(tmp_path):
    target = tmp_path / "export.csv"
    target.write_text("old contents")
    with pytest.raises(RuntimeError):
        with atomic_target(target) as temp:
            temp.write_text("half")
            raise RuntimeError("writer failed")
    assert target.read_text() == "old contents"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["export.csv"]


def test_disk_errors_while_writing_become_a_clear_error(tmp_path):
    target = tmp_path / "export.csv"
    with pytest.raises(OutputNotWritable, match="No space left on device"):
        with atomic_target(target):
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
    assert list(tmp_path.iterdir()) == []


def test_replaced_file_keeps_its_permissions_and_new_files_get_the_usual_ones(tmp_path):
    target = tmp_path / "pack.html"
    target.write_text("old")
    target.chmod(0o640)
    write_text("new", target)
    assert stat.S_IMODE(target.stat().st_mode) == 0o640
    fresh = write_text("x", tmp_path / "fresh.html")
    plain = tmp_path / "plain.html"
    plain.write_text("x")  # what open() gives a new file under this umask (POSIX creat semantics)
    assert stat.S_IMODE(fresh.stat().st_mode) == stat.S_IMODE(plain.stat().st_mode)


CHILD = textwrap.dedent(
    """
    import sys, time
    from pathlib import Path
    from consensus.outputs import atomic_target

    target, mode = Path(sys.argv[1]), sys.argv[2]
    chunk = b"new line of the replacement file\\n" * 8192  # 270 KB
    def write(path):
        with open(path, "wb") as handle:
            for number in range(40):  # about 11 MB in all
                handle.write(chunk)
                handle.flush()
                if number == 2:
                    print("writing", flush=True)
                time.sleep(0.01)
    if mode == "atomic":
        with atomic_target(target) as temp:
            write(temp)
    else:
        write(target)  # straight over the target, as the pack did
    print("done", flush=True)
    """
)
NEW_SIZE = len(b"new line of the replacement file\n") * 8192 * 40


def _write_in_child(target: Path, mode: str, kill_after: float | None) -> int:
    """Run the writer in a child process; kill it with SIGKILL ``kill_after`` seconds after it starts writing."""
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    child = subprocess.Popen([sys.executable, "-c", CHILD, str(target), mode], stdout=subprocess.PIPE, env=env)
    assert child.stdout.readline().strip() == b"writing"
    if kill_after is None:
        return child.wait(timeout=120)
    time.sleep(kill_after)
    child.send_signal(signal.SIGKILL)
    return child.wait(timeout=120)


def _old_file(target: Path) -> str:
    target.write_bytes(b"the previous pack, complete\n" * 1000)
    return hashlib.sha256(target.read_bytes()).hexdigest()


@pytest.mark.slow
@pytest.mark.parametrize("kill_after", [0.0, 0.05, 0.2])
def test_kill_9_mid_write_leaves_the_old_file_or_the_complete_new_one(tmp_path, kill_after):
    target = tmp_path / "pack.pdf"
    old = _old_file(target)
    assert _write_in_child(target, "atomic", kill_after) == -signal.SIGKILL  # killed, not finished
    data = target.read_bytes()
    assert hashlib.sha256(data).hexdigest() == old or data == b"new line of the replacement file\n" * 8192 * 40
    # SIGKILL allows no clean-up: at most one hidden temporary is left beside the intact target.
    left = [p.name for p in tmp_path.iterdir() if p != target]
    assert all(name.startswith(".pack.pdf.") and name.endswith(".tmp") for name in left) and len(left) <= 1


def test_kill_9_mid_write_truncates_a_file_written_straight_over_its_target(tmp_path):
    """Control for the test above: the same kill against a direct write does leave a torn file."""
    target = tmp_path / "pack.pdf"
    old = _old_file(target)
    assert _write_in_child(target, "direct", 0.05) == -signal.SIGKILL
    data = target.read_bytes()
    assert hashlib.sha256(data).hexdigest() != old and 0 < len(data) < NEW_SIZE


@pytest.mark.slow
def test_uninterrupted_child_replaces_the_file_in_full(tmp_path):
    target = tmp_path / "pack.pdf"
    _old_file(target)
    assert _write_in_child(target, "atomic", None) == 0
    assert target.stat().st_size == NEW_SIZE
    assert [p.name for p in tmp_path.iterdir()] == ["pack.pdf"]
