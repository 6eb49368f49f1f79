"""Typed errors of the library; the CLI turns each into a one-line message."""

from __future__ import annotations

from dataclasses import dataclass, field


class ConsensusError(Exception):
    """Base of every error the library raises on purpose."""


class NotFound(ConsensusError):
    """A cycle, item, run or file that the caller named does not exist."""


class InvalidSpec(ConsensusError):
    """A run setting is outside its allowed set or range."""


class CycleStateError(ConsensusError):
    """The cycle is not in a state that allows the step (e.g. publishing twice)."""


class StoreError(ConsensusError):
    """The store cannot be opened or used: a bad URL, an unreachable server, a schema from another release."""


class OutputNotWritable(ConsensusError):
    """An output path names a folder, a folder that does not exist, or a place the tool may not write."""


@dataclass(frozen=True)
class Problem:
    """One thing wrong with one cell of an input file, as the user sees it.

    ``cell`` names the spreadsheet cell ("F7") when one cell of a wide
    layout holds the problem, and ``about`` says what that cell stands for
    ("family DRIP-KITS × region NORTH, 2027-05"); a problem with a cell reads
    "north.xlsx, cell F7 (…)", one without reads "north.xlsx, row 7, column …".
    """

    file: str
    row: int | None  # spreadsheet row number (header is row 1); None for file-level problems
    column: str | None
    value: str | None
    expected: str
    cell: str | None = None
    about: str | None = None

    def __str__(self) -> str:
        where = self.file
        if self.cell:
            where += f", cell {self.cell}"
        elif self.row is not None:
            where += f", row {self.row}"
        if self.about:
            where += f" ({self.about})"
        if self.column and not self.cell:
            where += f", column '{self.column}'"
        got = f": got {self.value!r}" if self.value is not None else ""
        return f"{where}{got}; expected {self.expected}"


@dataclass
class InputRejected(ConsensusError):
    """An input file failed its checks; nothing from it was written."""

    file: str
    problems: list[Problem] = field(default_factory=list)
    total_problems: int = 0  # may exceed len(problems) when the list was capped
    submission_id: int | None = None  # where the rejected file is kept, if stored

    def __post_init__(self) -> None:
        super().__init__(self.summary())
        if not self.total_problems:
            self.total_problems = len(self.problems)

    def summary(self, limit: int = 20) -> str:
        lines = [f"{self.file}: rejected, {self.total_problems or len(self.problems)} problem(s)"]
        lines += [f"  - {p}" for p in self.problems[:limit]]
        hidden = (self.total_problems or len(self.problems)) - min(limit, len(self.problems))
        if hidden > 0:
            lines.append(f"  … and {hidden} more")
        return "\n".join(lines)
