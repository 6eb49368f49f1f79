"""Write every file the tool produces safely: atomically, and with spreadsheet formulas defused.

Two dangers, one module, so that no writer of the tool has to remember either:

* **Torn files.**  A file written straight over its target is left truncated
  when the process dies mid-write (kill -9, a full disk, power loss): the
  previous file is gone and the new one unreadable.  :func:`atomic_target`
  writes to a temporary file in the target's own folder, flushes it to disk
  (``fsync``) and renames it over the target with :func:`os.replace`, which
  POSIX ``rename(2)`` makes atomic within one file system: anyone opening the
  path sees the old file or the complete new one, never a part.  A process
  killed with SIGKILL cannot clean up after itself, so a hidden
  ``.<name>.<random>.tmp`` file may be left next to the target; the target is
  intact.
* **Formula injection.**  Spreadsheet programs run a cell as a formula when its
  text starts with ``=``, ``+``, ``-`` or ``@``, and some also after a tab or a
  carriage return (OWASP, "CSV Injection": the cells to neutralise and the
  single-quote prefix are both from that page).  Free text that users typed
  (notes, descriptions, names) is kept as received in the store and escaped on
  the way out: in CSV with a leading single quote, which spreadsheets take as
  "this is text"; in XLSX as a text cell with the ``quotePrefix`` style
  (ECMA-376 Part 1, §18.8.45 ``xf``: the cell is shown and kept as text, the
  quote itself is not stored), never as a formula.  Codes (items, locations,
  families …) that look like formulas are refused at intake instead
  (:mod:`consensus.intake.checks`), because a code must read back unchanged.

Round trip.  A CSV template carries ``'=text`` for a note ``=text``; the
checks remove that one leading quote again from free-text columns
(:func:`unescape_formula_text`), so a returned template reads back to the
original text.  The one text that does not survive is free text that itself
starts with a quote followed by a formula character: it loses that quote.  An
XLSX template needs no unescaping: the cell holds the text itself.
"""

from __future__ import annotations

import os
import secrets
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import pandas as pd

from consensus.errors import OutputNotWritable

#: First characters that make a spreadsheet run a cell as a formula (OWASP, "CSV Injection").
FORMULA_TRIGGERS: tuple[str, ...] = ("=", "+", "-", "@", "\t", "\r")
#: The prefix that makes a spreadsheet take a cell as text (OWASP, "CSV Injection").
TEXT_PREFIX = "'"


# --------------------------------------------------------------------------- formula text


def looks_like_formula(values: pd.Series) -> np.ndarray:
    """Which cells are text that a spreadsheet would run as a formula (first character in FORMULA_TRIGGERS).

    Cells that are not text (numbers, missing values) are never formulas:
    ``-3.5`` written as a number is a number to every spreadsheet.
    """
    values = pd.Series(values)
    if len(values) == 0:
        return np.zeros(0, dtype=bool)
    if not (pd.api.types.is_object_dtype(values) or pd.api.types.is_string_dtype(values)):
        return np.zeros(len(values), dtype=bool)
    # .str gives NaN for elements that are not strings, so numbers in an object column stay numbers.
    first = values.astype("object").str[:1]
    return first.isin(FORMULA_TRIGGERS).to_numpy(dtype=bool)


def escape_formula_text(values: pd.Series) -> pd.Series:
    """Prefix a single quote to every text cell that a spreadsheet would run as a formula (OWASP, "CSV Injection")."""
    values = pd.Series(values)
    risky = looks_like_formula(values)
    if not risky.any():
        return values
    escaped = values.astype("object").copy()
    escaped[risky] = TEXT_PREFIX + values[risky].astype(str)
    return escaped


def unescape_formula_text(values: pd.Series) -> pd.Series:
    """Undo :func:`escape_formula_text`: drop one leading quote that stands before a formula character."""
    values = pd.Series(values)
    if len(values) == 0 or not (pd.api.types.is_object_dtype(values) or pd.api.types.is_string_dtype(values)):
        return values
    text = values.astype("object")
    quoted = (text.str[:1] == TEXT_PREFIX).fillna(False).to_numpy(dtype=bool)
    escaped = quoted & text.str[1:2].isin(FORMULA_TRIGGERS).to_numpy(dtype=bool)
    if not escaped.any():
        return values
    out = values.copy()
    out[escaped] = text[escaped].str[1:]
    return out


def escape_text_columns(frame: pd.DataFrame) -> pd.DataFrame:
    """A copy of ``frame`` whose header and text cells are escaped for spreadsheets; numbers stay numbers."""
    out = frame.copy()
    for column in out.columns:
        if looks_like_formula(out[column]).any():
            out[column] = escape_formula_text(out[column])
    out.columns = escape_formula_text(pd.Series([str(c) for c in out.columns], dtype="object")).tolist()
    return out


# --------------------------------------------------------------------------- paths


def check_output_path(path: str | os.PathLike) -> Path:
    """The file an output will be written to, or :class:`OutputNotWritable` saying why it cannot be.

    Refused: an empty path, a path that names a folder (or ends with a
    separator), a folder that does not exist, a parent that is a file, and an
    existing target that is not a regular file (a device or a pipe cannot be
    replaced atomically).  A symbolic link is followed, so the file it points
    to is the one replaced and the link stays.  Folders are never created: a
    mistyped folder should be an error, not a new folder.
    """
    text = os.fspath(path)
    if not str(text).strip():
        raise OutputNotWritable("an output file name is needed; got an empty path")
    separators = tuple(s for s in (os.sep, os.altsep) if s)
    if str(text).endswith(separators):
        raise OutputNotWritable(f"{text} names a folder; give a file name inside it")
    given = Path(text)
    if given.is_dir():
        raise OutputNotWritable(f"{given} is a folder; give a file name inside it (e.g. {given / 'out'}.csv)")
    target = Path(os.path.realpath(given))
    folder = target.parent
    if not folder.exists():
        raise OutputNotWritable(f"cannot write {given}: the folder {given.parent} does not exist")
    if not folder.is_dir():
        raise OutputNotWritable(f"cannot write {given}: {given.parent} is a file, not a folder")
    if target.exists() and not target.is_file():
        raise OutputNotWritable(f"cannot write {given}: it exists and is not a regular file")
    return target


@contextmanager
def atomic_target(path: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path to write in full; on success it replaces ``path`` in one step.

    The temporary file is created (empty, with the usual permissions) in the
    target's folder, so the final :func:`os.replace` never crosses file
    systems.  After the body returns, the file is flushed to disk, given the
    old target's permission bits when there was one, renamed over the target,
    and the folder entry flushed too (POSIX ``fsync`` of the directory).  If
    the body raises, the temporary file is removed and the target is left as
    it was.  ``OSError`` from writing (disk full, permission) becomes
    :class:`OutputNotWritable` naming the target.
    """
    target = check_output_path(path)
    temp = _create_temp(target)
    try:
        yield temp
        _fsync_file(temp)
        if target.exists():
            os.chmod(temp, target.stat().st_mode & 0o777)
        os.replace(temp, target)
    except BaseException as error:
        try:
            temp.unlink()
        except FileNotFoundError:
            pass
        if isinstance(error, OSError):
            raise OutputNotWritable(f"could not write {target}: {error.strerror or error}") from error
        raise
    _fsync_folder(target.parent)


def _create_temp(target: Path) -> Path:
    """An empty, new file beside ``target``; mode 0o666 so the umask gives it the permissions of any new file."""
    flags = os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_CLOEXEC", 0)
    for _ in range(100):
        temp = target.with_name(f".{target.name}.{secrets.token_hex(6)}.tmp")
        try:
            os.close(os.open(temp, flags, 0o666))
            return temp
        except FileExistsError:
            continue
        except OSError as error:
            raise OutputNotWritable(f"cannot write {target}: {error.strerror or error}") from error
    raise OutputNotWritable(f"cannot write {target}: no free temporary name in {target.parent}")


def _fsync_file(path: Path) -> None:
    descriptor = os.open(path, os.O_RDONLY)
    try:
        os.fsync(descriptor)
    finally:
        os.close(descriptor)


def _fsync_folder(folder: Path) -> None:
    """Flush the rename itself to disk; folders cannot be opened this way on every platform, which is harmless."""
    try:
        descriptor = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(descriptor)
    except OSError:
        pass
    finally:
        os.close(descriptor)


# --------------------------------------------------------------------------- writers


def write_csv(
    frame: pd.DataFrame,
    path: str | os.PathLike,
    *,
    float_format: str | None = None,
    encoding: str = "utf-8",
    lineterminator: str = "\n",
) -> Path:
    """Write ``frame`` (without its index) as CSV, text cells escaped for spreadsheets, atomically.

    Text cells and header names that start with a formula character get a
    leading single quote (:func:`escape_text_columns`); numeric columns are
    written as numbers with ``float_format``.  Returns the path written.
    """
    safe = escape_text_columns(frame)
    with atomic_target(path) as temp:
        safe.to_csv(temp, index=False, float_format=float_format, encoding=encoding, lineterminator=lineterminator)
    return Path(path)


def write_text(text: str, path: str | os.PathLike, *, encoding: str = "utf-8") -> Path:
    """Write a text file (an HTML page, a report) atomically; returns the path written."""
    with atomic_target(path) as temp:
        temp.write_text(text, encoding=encoding)
    return Path(path)


def mark_formula_text_as_text(workbook) -> int:
    """Store every text cell of an openpyxl workbook that starts with a formula character as text, not a formula.

    openpyxl takes any string assigned to a cell that starts with "=" as a
    formula (data type "f"), and a spreadsheet opening the file would run it.
    The tool writes no formulas, so every such cell is set back to a string
    cell (data type "s") with the ``quotePrefix`` style (ECMA-376 Part 1,
    §18.8.45), which spreadsheet programs show as text and keep as text when
    the cell is edited.  Cells starting with "+", "-", "@", tab or carriage
    return, which openpyxl already stores as strings, get ``quotePrefix`` too.
    Returns how many cells were marked.
    """
    marked = 0
    for sheet in workbook.worksheets:
        for row in sheet.iter_rows():
            for cell in row:
                value = cell.value
                if isinstance(value, str) and value[:1] in FORMULA_TRIGGERS:
                    cell.data_type = "s"
                    cell.quotePrefix = True
                    marked += 1
    return marked


def save_workbook(workbook, path: str | os.PathLike) -> Path:
    """Save an openpyxl workbook atomically, with formula-like text stored as text cells; returns the path."""
    mark_formula_text_as_text(workbook)
    with atomic_target(path) as temp:
        workbook.save(temp)
    return Path(path)
