"""Fixed-width text tables: many rows of numbers as one line of monospaced text each.

WeasyPrint lays out and paints every table cell as its own box, about a
millisecond and a half each; a family page's month table alone has 180 cells.
Printed in a monospaced face, a row padded column by column is one text run
whose columns still line up, because every character has the same advance.
The header stays an HTML row whose ``<col>`` widths are given in ``ch`` (the
advance of "0" in the table's own monospaced face), so labels sit exactly over
their columns while they keep the proportional face.

Columns are aligned left or right.  A gap of blank characters separates
columns; it sits on the side away from the alignment edge (after a left
column, before a right one), so each header edge coincides with its column's
text edge.  Where a right-aligned column is followed by a left-aligned one,
a spacer column of ``gap`` characters is inserted.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import pandas as pd

from consensus.errors import InvalidSpec

ALIGNMENTS = ("left", "right")


@dataclass(frozen=True)
class GridColumn:
    """One column of a fixed-width text table."""

    label: str
    align: str = "right"
    css_class: str = ""
    min_width: int = 0  # characters, so a short column still has room for its label


@dataclass(frozen=True)
class TextGrid:
    """A fixed-width table: header cells with their widths in characters, and one text line per row."""

    columns: tuple[dict, ...]  # label, width (characters, gap included), align, css_class; label None for a spacer
    lines: tuple[str, ...]
    width: int  # characters per line


def lay_out_text_grid(values: pd.DataFrame, columns: Sequence[GridColumn], *, gap: int = 2) -> TextGrid:
    """Pad each column of ``values`` (text) to its widest entry and join each row into one line.

    Column ``j`` is ``w_j = max(len(text), min_width)`` characters plus the gap
    on its non-aligned side; a line is the concatenation of its padded fields,
    so every line has the same length ``Σ w_j``.
    """
    if values.shape[1] != len(columns):
        raise InvalidSpec(f"text grid has {values.shape[1]} value columns but {len(columns)} column specs")
    if gap < 0:
        raise InvalidSpec(f"gap must be zero or more characters, got {gap!r}")
    for column in columns:
        if column.align not in ALIGNMENTS:
            raise InvalidSpec(f"column alignment must be one of {ALIGNMENTS}, got {column.align!r}")
    header: list[dict] = []
    pieces: list[pd.Series] = []
    last = len(columns) - 1
    for j, column in enumerate(columns):
        text = values.iloc[:, j].fillna("").astype(str)
        width = max(int(text.str.len().max()) if len(text) else 0, column.min_width)
        if column.align == "left":
            if j > 0 and columns[j - 1].align == "right" and gap:
                header.append({"label": None, "width": gap, "align": "left", "css_class": ""})
                pieces.append(pd.Series(" " * gap, index=values.index))
            trailing = gap if j < last else 0
            pieces.append(text.str.ljust(width + trailing))
            header.append({"label": column.label, "width": width + trailing, "align": "left",
                           "css_class": column.css_class})
        else:
            # A left column before already ends in its gap.
            leading = gap if j > 0 and columns[j - 1].align == "right" else 0
            pieces.append(text.str.rjust(width + leading))
            header.append({"label": column.label, "width": width + leading, "align": "right",
                           "css_class": column.css_class})
    if pieces:
        lines = pieces[0]
        for piece in pieces[1:]:
            lines = lines + piece
        lines = lines.str.rstrip()
    else:
        lines = pd.Series([], dtype=object)
    total = sum(c["width"] for c in header)
    return TextGrid(columns=tuple(header), lines=tuple(lines.tolist()), width=total)
