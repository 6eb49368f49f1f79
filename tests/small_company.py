"""The small invented company of tests/data/month_end, loaded through the command line as a planner would.

Shared by the month-end, fault and concurrency tests: one way to call the
CLI in this process (what a user sees: exit code, standard output, standard
error) and in a child process (so it can be killed), one way to load the
company into a store, and the readings the tests compare: what status says,
the consensus a run stored, and each source's value per cell.
"""

from __future__ import annotations

import contextlib
import io
import os
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

ROOT = Path(__file__).parent.parent
DATA = Path(__file__).parent / "data" / "month_end"
CYCLE = "2026-10"  # orders are known through 2026-10
HORIZON = 12
DC_FILES = {"DC-E1": DATA / "dc_e1.csv", "DC-E2": DATA / "dc_e2.csv", "DC-W1": DATA / "dc_w1.csv"}
#: The catch-all of consensus.cli.run_cli: a crash shown in one line is still a crash.
CRASH = "unexpected problem"
#: How the CLI is started in a child process (the console script's own entry point).
CLI_CHILD = [sys.executable, "-c", "from consensus.cli import entry; entry()"]


@dataclass
class Said:
    """What one command gave the user."""

    code: int
    out: str
    err: str

    @property
    def text(self) -> str:
        return self.out + self.err

    def __str__(self) -> str:
        return f"exit {self.code}\n{self.text}"


def cli(url: str, *args: str) -> Said:
    """Run ``consensus --db URL ARGS…`` in this process, as the console script does."""
    from consensus.cli import run_cli

    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = run_cli(["--db", url, *map(str, args)])
    return Said(code, out.getvalue(), err.getvalue())


def ok(url: str, *args: str) -> Said:
    """Run a command that must succeed."""
    said = cli(url, *args)
    assert said.code == 0, f"consensus {' '.join(map(str, args))}: {said}"
    assert CRASH not in said.text, said
    return said


def child_env() -> dict[str, str]:
    """The environment of a child CLI process: this checkout first on the path."""
    return {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""),
            "COLUMNS": "120"}


def start_child(url: str, *args: str, cwd: Path | None = None) -> subprocess.Popen:
    """Start ``consensus --db URL ARGS…`` as a child process (its output kept)."""
    return subprocess.Popen([*CLI_CHILD, "--db", url, *map(str, args)], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, env=child_env(), cwd=cwd)


def load_company(url: str, *, orders: Path | None = None, dc: bool = True, past: int = 0,
                 due: str | None = None, extra_open: tuple[str, ...] = ()) -> None:
    """Master data, order history, cycle CYCLE open (and ``past`` cycles before it), the DCs' files submitted."""
    ok(url, "master", DATA / "items.csv", "--kind", "items")
    ok(url, "master", DATA / "locations.csv", "--kind", "locations")
    ok(url, "master", DATA / "bom.csv", "--kind", "bom")
    ok(url, "actuals", orders or DATA / "orders.csv")
    ok(url, "cycle", "open", CYCLE, "--horizon", HORIZON, *(("--due", due) if due else ()), *extra_open)
    if past:
        ok(url, "open-past", "--from", shift(CYCLE, -past), "--to", shift(CYCLE, -1), "--horizon", HORIZON)
    if dc:
        for location, path in DC_FILES.items():
            ok(url, "submit", path, "--cycle", CYCLE, "--source", "dc", "--by", f"{location} planner")


def shift(month: str, steps: int) -> str:
    return str(pd.Period(month, "M") + steps)


def exported(url: str, folder: Path, *, revision: int | None = None) -> pd.DataFrame:
    """The cycle's stored consensus as ``consensus export`` writes it, sorted by cell."""
    path = folder / f"export_{len(list(folder.glob('export_*.csv')))}.csv"
    ok(url, "export", "--cycle", CYCLE, "--out", path, *(("--revision", revision) if revision else ()))
    frame = pd.read_csv(path)
    return frame.sort_values(["item", "location", "period"], ignore_index=True)


def plan_numbers(frame: pd.DataFrame) -> pd.DataFrame:
    """The numbers of an export, without the columns that name the run (its id, its state)."""
    return frame.drop(columns=[c for c in ("run_id", "status") if c in frame.columns])


def status_rows(url: str, cycle: str = CYCLE) -> pd.DataFrame:
    """``consensus status --format csv`` as a frame."""
    said = ok(url, "status", "--cycle", cycle, "--format", "csv")
    return pd.read_csv(io.StringIO(said.out))


def dc_values(url: str, cycle: str = CYCLE) -> pd.DataFrame:
    """Each DC cell's value in force now: [item, location, period, quantity], one row per value found."""
    from consensus.workflow.run import sources_in_force

    values = sources_in_force(cycle, url=url)
    return values.loc[values["source"] == "dc", ["item", "location", "period", "quantity"]].reset_index(drop=True)


def file_values(path: Path) -> pd.DataFrame:
    """A DC file's own rows as [item, location, period, quantity]."""
    frame = pd.read_csv(path)
    return frame[["item", "location", "period", "quantity"]].astype({"quantity": float})


def write_variant(source: Path, target: Path, *, factor: float = 1.0, locations: list[str] | None = None) -> Path:
    """A copy of a DC file with quantities scaled (rounded to whole units), perhaps only some locations' rows."""
    frame = pd.read_csv(source)
    if locations is not None:
        frame = frame[frame["location"].isin(locations)]
    frame["quantity"] = (frame["quantity"] * factor).round().astype(int)
    frame.to_csv(target, index=False)
    return target
