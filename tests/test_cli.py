"""The command line: every command explains itself, appears in the README, and turns errors into clear exits."""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import pytest
from sqlalchemy import func, select
from typer.main import get_command
from typer.testing import CliRunner

from consensus.cli import app
from consensus.store.db import get_engine, session_scope
from consensus.store.models import ForecastLine, Submission
from tests.conftest import DATA

runner = CliRunner()
ROOT = Path(__file__).parent.parent


def _commands():
    group = get_command(app)
    for name, command in group.commands.items():
        if hasattr(command, "commands"):
            for sub_name, sub in command.commands.items():
                yield f"{name} {sub_name}", sub
        else:
            yield name, command


COMMANDS = dict(_commands())


@pytest.mark.parametrize("name", sorted(COMMANDS))
def test_every_command_has_help_with_an_example(name):
    result = runner.invoke(app, [*name.split(), "--help"])
    assert result.exit_code == 0, result.output
    assert "Example:" in result.output and f"consensus {name}" in result.output


@pytest.mark.parametrize("name", sorted(COMMANDS))
def test_every_command_is_in_the_readme(name):
    assert f"consensus {name}" in (ROOT / "README.md").read_text(encoding="utf-8")


def test_top_level_help_names_the_job_and_an_example():
    result = runner.invoke(app, ["--help"])
    assert result.exit_code == 0 and "Example: consensus demo" in result.output


@pytest.fixture
def cli_store(tmp_path):
    url = f"sqlite:///{tmp_path / 'cli.db'}"
    get_engine.cache_clear()
    for kind in ("items", "locations"):
        assert runner.invoke(app, ["--db", url, "master", str(DATA / "good" / f"{kind}.csv"), "--kind", kind]).exit_code == 0
    assert runner.invoke(app, ["--db", url, "cycle", "open", "2026-11"]).exit_code == 0
    yield url
    get_engine.cache_clear()


def test_submit_accepts_then_status_shows_it(cli_store):
    result = runner.invoke(app, ["--db", cli_store, "submit", str(DATA / "good" / "forecast.csv"), "--cycle",
                                 "2026-11", "--source", "dc", "--by", "R. Tester"])
    assert result.exit_code == 0 and "accepted as #" in result.output
    status = runner.invoke(app, ["--db", cli_store, "status", "--cycle", "2026-11"])
    assert status.exit_code == 0 and "submitted" in status.output and "missing" in status.output


def test_broken_file_exits_2_names_row_and_column_and_changes_nothing(cli_store):
    def line_count():
        with session_scope(cli_store) as s:
            return s.execute(select(func.count()).select_from(ForecastLine)).scalar_one()

    before = line_count()
    result = runner.invoke(app, ["--db", cli_store, "submit", str(DATA / "bad" / "forecast_negative.csv"),
                                 "--cycle", "2026-11", "--source", "dc"])
    assert result.exit_code == 2
    assert re.search(r"forecast_negative\.csv, row \d+, column 'quantity'", result.output)
    assert "nothing else changed" in result.output
    assert line_count() == before
    with session_scope(cli_store) as s:
        assert s.execute(select(Submission.status).order_by(Submission.id.desc())).first()[0] == "rejected"


def test_library_errors_become_one_line_and_exit_1(cli_store):
    result = runner.invoke(app, ["--db", cli_store, "run", "--cycle", "2031-01"])
    assert result.exit_code == 1 and "error: cycle 2031-01 is not open" in result.output
    bad_scheme = runner.invoke(app, ["--db", cli_store, "run", "--cycle", "2026-11", "--scheme", "magic"])
    assert bad_scheme.exit_code == 1 and "scheme must be one of" in bad_scheme.output


def test_submit_folder_gives_one_line_per_file(cli_store, tmp_path):
    folder = tmp_path / "returns"
    folder.mkdir()
    shutil.copy(DATA / "good" / "forecast.csv", folder / "a.csv")
    shutil.copy(DATA / "bad" / "forecast_negative.csv", folder / "b.csv")
    result = runner.invoke(app, ["--db", cli_store, "submit", str(folder), "--cycle", "2026-11", "--source", "dc"])
    assert result.exit_code == 2  # one file was refused
    assert "a.csv: accepted" in result.output and "b.csv: rejected" in result.output


def test_template_writes_every_key_and_month(cli_store, tmp_path):
    out = tmp_path / "north.csv"
    result = runner.invoke(app, ["--db", cli_store, "template", "--cycle", "2026-11", "--source", "sales",
                                 "--grain", "family,region", "--region", "NORTH", "--out", str(out)])
    assert result.exit_code == 0, result.output
    import pandas as pd
    frame = pd.read_csv(out, encoding="utf-8-sig")
    assert list(frame.columns[:4]) == ["family", "region", "period", "quantity"]
    assert len(frame) == 3 * 1 * 18 and frame["quantity"].isna().all()  # 3 families × 1 region × 18 months
