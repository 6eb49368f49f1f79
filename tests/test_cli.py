"""The command line: every command explains itself, appears in the README, and turns every error into a clear exit."""

from __future__ import annotations

import json
import re
import shutil
from pathlib import Path

import pandas as pd
import pytest
from sqlalchemy import select
from typer.main import get_command
from typer.testing import CliRunner

from consensus.cli import app, run_cli
from consensus.store.db import get_engine, session_scope
from consensus.store.models import Submission

DATA = Path(__file__).parent / "data"
runner = CliRunner()
ROOT = Path(__file__).parent.parent


def _commands():
    group = get_command(app)
    for name, command in group.commands.items():
        if getattr(command, "hidden", False):
            continue
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
def test_every_option_has_help_and_a_meaningful_placeholder(name):
    for param in COMMANDS[name].params:
        if param.name == "help":
            continue
        assert getattr(param, "help", None), f"{name}: {param.name} has no help text"
        if not getattr(param, "is_flag", False):
            assert param.metavar, f"{name}: {param.name} has no placeholder"
    shown = runner.invoke(app, [*name.split(), "--help"], terminal_width=100).output
    for generic in ("<str>", "{", " TEXT", " INTEGER", " FLOAT", " PATH"):
        assert generic not in shown, f"{name} --help shows {generic.strip()!r}"


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
        assert runner.invoke(app, ["--db", url, "master", str(DATA / "good" / f"{kind}.csv"), "--kind", kind]
                             ).exit_code == 0
    assert runner.invoke(app, ["--db", url, "cycle", "open", "2026-11", "--allow-missing-history",
                               "--due", "2026-11-20"]).exit_code == 0
    yield url
    get_engine.cache_clear()


def test_submit_accepts_then_status_shows_it(cli_store):
    result = runner.invoke(app, ["--db", cli_store, "submit", str(DATA / "good" / "forecast.csv"), "--cycle",
                                 "2026-11", "--source", "dc", "--by", "R. Tester"])
    assert result.exit_code == 0 and "accepted as #" in result.output
    status = runner.invoke(app, ["--db", cli_store, "status", "--cycle", "2026-11", "--format", "csv"])
    states = pd.read_csv(__import__("io").StringIO(status.output))["state"]
    assert status.exit_code == 0 and {"received", "not_received"} <= set(states)


def test_broken_file_exits_2_names_row_and_column_and_changes_nothing(cli_store):
    def accepted():
        with session_scope(cli_store) as s:
            return len(s.execute(select(Submission.id).where(Submission.status == "accepted")).all())

    before = accepted()
    result = runner.invoke(app, ["--db", cli_store, "submit", str(DATA / "bad" / "forecast_negative.csv"),
                                 "--cycle", "2026-11", "--source", "dc"])
    assert result.exit_code == 2
    assert re.search(r"forecast_negative\.csv, row \d+, column 'quantity'", result.output)
    assert "nothing else changed" in result.output
    assert accepted() == before
    with session_scope(cli_store) as s:
        assert s.execute(select(Submission.status).order_by(Submission.id.desc())).first()[0] == "rejected"


def test_library_errors_become_one_line_and_exit_1(cli_store):
    result = runner.invoke(app, ["--db", cli_store, "run", "--cycle", "2031-01"])
    assert result.exit_code == 1 and "error: cycle 2031-01 is not open" in result.output
    bad_scheme = runner.invoke(app, ["--db", cli_store, "run", "--cycle", "2026-11", "--scheme", "magic"])
    assert bad_scheme.exit_code == 1 and "scheme must be one of" in bad_scheme.output


def test_submit_folder_gives_one_line_per_file_and_a_summary(cli_store, tmp_path):
    folder = tmp_path / "returns"
    folder.mkdir()
    shutil.copy(DATA / "good" / "forecast.csv", folder / "a.csv")
    shutil.copy(DATA / "bad" / "forecast_negative.csv", folder / "b.csv")
    (folder / "c.xlsx").write_bytes(b"PK\x03\x04 not really a workbook")
    result = runner.invoke(app, ["--db", cli_store, "submit", str(folder), "--cycle", "2026-11", "--source", "dc"])
    assert result.exit_code == 2  # a file was refused
    assert "a.csv: accepted" in result.output and "b.csv: rejected" in result.output
    assert "3 file(s)" in result.output


def test_template_writes_every_key_and_month(cli_store, tmp_path):
    out = tmp_path / "north.csv"
    result = runner.invoke(app, ["--db", cli_store, "template", "--cycle", "2026-11", "--source", "sales",
                                 "--grain", "family,region", "--region", "NORTH", "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert "3 rows × 18 months: 54 cells to fill in" in result.output  # 3 families × 1 region
    frame = pd.read_csv(out, encoding="utf-8-sig", dtype=str)
    assert list(frame.columns[:3]) == ["family", "region", "line"] and frame.columns[-1] == "note"
    to_fill = frame[frame["line"] == "Your forecast"]
    assert len(to_fill) == 3 and to_fill.iloc[:, 3:].isna().all().all()
    assert frame["line"].str.startswith(("Your forecast", "Reference:")).all()
    long = runner.invoke(app, ["--db", cli_store, "template", "--cycle", "2026-11", "--source", "sales", "--grain",
                               "family,region", "--region", "NORTH", "--layout", "long", "--out", str(out)])
    assert long.exit_code == 0, long.output
    frame = pd.read_csv(out, encoding="utf-8-sig")
    assert list(frame.columns[:4]) == ["family", "region", "period", "quantity"]
    assert len(frame) == 3 * 1 * 18 and frame["quantity"].isna().all()  # the long layout of earlier versions


@pytest.mark.parametrize("fmt", ["csv", "json"])
def test_listings_print_csv_and_json(cli_store, fmt):
    for args in (["cycle", "list"], ["status", "--cycle", "2026-11"], ["settings", "list"]):
        result = runner.invoke(app, ["--db", cli_store, *args, "--format", fmt])
        assert result.exit_code == 0, (args, result.output)
        if fmt == "json":
            assert isinstance(json.loads(result.output), list)
        else:
            assert pd.read_csv(__import__("io").StringIO(result.output)).shape[1] >= 2


def test_tables_fit_80_columns(cli_store):
    runner.invoke(app, ["--db", cli_store, "submit", str(DATA / "good" / "forecast.csv"), "--cycle", "2026-11",
                        "--source", "dc", "--by", "R. Tester"])
    for args in (["cycle", "list"], ["status", "--cycle", "2026-11"], ["settings", "list"]):
        result = runner.invoke(app, ["--db", cli_store, *args], terminal_width=80)
        widest = max(len(line) for line in result.output.splitlines())
        assert widest <= 80, (args, widest)


# Every command with arguments that cannot work: one or two plain lines, exit 1 (2 for a rejected file), no traceback.
BROKEN = [
    ["cycle", "open", "2026-13"],
    ["cycle", "open", "2026-11", "--horizon", "abc"],
    ["cycle", "open", "2026-11", "--due", "soon"],
    ["cycle", "reopen", "2026-11", "--reason", "x", "--by", "y"],
    ["cycle", "list", "--format", "xml"],
    ["open-past", "--from", "2026-13", "--to", "2026-14"],
    ["backcast", "--from", "2026-13", "--to", "2026-14"],
    ["master", "missing.csv", "--kind", "items"],
    ["master", "{good}/items.csv", "--kind", "people"],
    ["actuals", "missing.csv"],
    ["submit", "missing.csv", "--cycle", "2026-11", "--source", "dc"],
    ["submit", "{good}/forecast.csv", "--cycle", "2026-11", "--source", "dc", "--scope", "region NOWHERE"],
    ["template", "--cycle", "2026-11", "--source", "sales", "--out", "{tmp}", "--grain", "family,region"],
    ["template", "--cycle", "2026-11", "--source", "sales", "--out", "{tmp}/t.xlsx", "--grain", "colour"],
    ["template", "--cycle", "2026-11", "--source", "sales", "--out", "{tmp}/t.xlsx", "--layout", "tall"],
    ["status", "--cycle", "nope"],
    ["run", "--cycle", "2026-11", "--bands", "eighty"],
    ["run", "--cycle", "2026-11", "--jobs", "0"],
    ["run", "--cycle", "2026-11", "--window", "-3"],
    ["explain", "--cycle", "2026-11", "--item", "ZZZ", "--location", "L1", "--period", "2027-01"],
    ["scorecard", "--cycle", "2026-11", "--level", "planet"],
    ["decide", "--cycle", "2026-11", "--period", "2027-01", "--item", "A100", "--set", "nan", "--reason", "r",
     "--by", "b"],
    ["decide", "--cycle", "2026-11", "--period", "2027-01", "--item", "A100", "--delta", "inf", "--reason", "r",
     "--by", "b"],
    ["decide", "--cycle", "2026-11", "--period", "2027-01", "--item", "A100", "--pct", "-500", "--reason", "r",
     "--by", "b"],
    ["decide", "--withdraw", "999", "--reason", "r", "--by", "b"],
    ["decisions", "--cycle", "2031-01"],
    ["publish", "--cycle", "2026-11", "--by", "b"],
    ["export", "--cycle", "2026-11", "--out", "{tmp}"],
    ["export", "--cycle", "2026-11", "--out", "{tmp}/no/such/folder/c.csv"],
    ["components", "--cycle", "2026-11", "--out", "{tmp}"],
    ["pack", "--cycle", "2026-11", "--out", "{tmp}"],
    ["verify", "--cycle", "2026-11"],
    ["settings", "set", "limit.max_quantity", "lots"],
    ["settings", "set", "nosuch", "1"],
    ["--db", "sqlite:///{tmp}/no/such/folder/x.db", "cycle", "list"],
    ["--db", "carrier-pigeon://x", "cycle", "list"],
    ["--db", "postgresql+psycopg://nobody@127.0.0.1:9/none", "cycle", "list"],
    ["--db", "sqlite:///{tmp}", "cycle", "list"],  # a folder, not a file
    ["--db", "sqlite:///{good}/items.csv", "cycle", "list"],  # a file that is not a store
    ["--db", "sqlite:///{good}/items.csv", "store", "upgrade"],
    ["cycle", "open", "2026-12"],  # no order history loaded: refused, saying how to go on
    ["decide", "--cycle", "2026-11", "--period", "2027-01", "--item", "A100", "--set", "1e308", "--reason", "r",
     "--by", "b"],
]


@pytest.mark.slow  # every command once: the fast tier keeps the others
@pytest.mark.parametrize("args", BROKEN, ids=[" ".join(a)[:60] for a in BROKEN])
def test_broken_arguments_give_a_plain_message_and_no_traceback(cli_store, tmp_path, capsys, args):
    filled = [a.replace("{good}", str(DATA / "good")).replace("{tmp}", str(tmp_path)) for a in args]
    if filled[0] != "--db":
        filled = ["--db", cli_store, *filled]
    code = run_cli(filled)
    out = capsys.readouterr()
    text = out.out + out.err
    assert code in (1, 2), (code, text)
    assert "Traceback" not in text and "Error:" not in text.replace("error:", "")
    assert "unexpected problem" not in text, text  # the last line of defence is a crash too, told politely
    lines = [line for line in out.err.splitlines() if line.strip()]
    assert lines and lines[0].startswith(("error:", "Usage")) or code == 2, text
    assert len(lines) <= 3 or code == 2, text


# Output paths that cannot work, on a store that has a run to write (the list above stops earlier: no run yet).
BROKEN_OUT = [
    (["export", "--out", "{tmp}"], "is a folder"),
    (["export", "--out", "{tmp}/"], "is a folder"),
    (["export", "--out", "{tmp}/no/such/folder/c.csv"], "the folder {tmp}/no/such/folder does not exist"),
    (["components", "--out", "{tmp}"], "is a folder"),
    (["components", "--out", "{tmp}/no/such/folder/c.csv"], "does not exist"),
    (["pack", "--out", "{tmp}"], "is a folder"),
    (["pack", "--out", "{tmp}/no/such/folder/p.pdf"], "the folder {tmp}/no/such/folder does not exist"),
    (["pack", "--out", "{tmp}/p.pdf", "--html", "{tmp}/no/such/folder/p.html"], "does not exist"),
]


@pytest.fixture(scope="module")
def run_store(tmp_path_factory):
    """The small company of tests/data/month_end with a run of its cycle."""
    from small_company import load_company, ok

    url = f"sqlite:///{tmp_path_factory.mktemp('run_store') / 'store.db'}"
    get_engine.cache_clear()
    load_company(url)
    ok(url, "run", "--cycle", "2026-10", "--jobs", "1")
    return url


@pytest.mark.slow
@pytest.mark.parametrize("args, words", BROKEN_OUT, ids=[" ".join(a)[:50] for a, _ in BROKEN_OUT])
def test_an_output_path_that_cannot_work_is_refused_in_one_line_and_nothing_is_written(run_store, tmp_path, capsys,
                                                                                       args, words):
    """Finding of a month end: export or pack --out pointing at a folder or into a missing folder gave tracebacks."""
    filled = [a.replace("{tmp}", str(tmp_path)) for a in args]
    before = sorted(tmp_path.rglob("*"))
    code = run_cli(["--db", run_store, filled[0], "--cycle", "2026-10", *filled[1:]])
    err = capsys.readouterr().err
    assert code == 1 and err.startswith("error: ") and words.replace("{tmp}", str(tmp_path)) in err, err
    assert len(err.strip().splitlines()) == 1 and "unexpected problem" not in err
    assert sorted(tmp_path.rglob("*")) == before  # not a file, not a folder, not a temporary left behind


def test_narrow_tables_name_sources_short_with_a_legend_of_the_full_names():
    """Scorecard and status print the registry's short names and one legend line (vocabulary.SOURCES)."""
    from consensus.cli import _short_sources
    from consensus.vocabulary import source_label, source_short

    keys = ["dc", "consensus", None, "dc", "sales"]
    short, legend = _short_sources(keys)
    assert short == [source_short("dc"), source_short("consensus"), "", source_short("dc"), source_short("sales")]
    differing = [k for k in ("consensus", "dc", "sales") if source_short(k) != source_label(k)]
    assert legend.startswith("Sources: ") and legend.count(" = ") == len(differing)
    for k in differing:
        assert f"{source_short(k)} = {source_label(k)}" in legend
    assert _short_sources(["sales"]) == ([source_short("sales")], "" if source_short("sales") == source_label("sales")
                                         else f"Sources: {source_short('sales')} = {source_label('sales')}")
