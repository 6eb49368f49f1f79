"""The `consensus` command: a thin layer that parses, calls one library function and prints.

Errors come out one way: one or two plain lines saying what is wrong and what
to do, exit code 1, or 2 for a rejected file.  A wrong option gets the same
treatment (exit 1), and an unexpected failure is reported in one line too,
never as a traceback (set ``CONSENSUS_DEBUG=1`` to see one).
"""

from __future__ import annotations


import os
import sys
from pathlib import Path
from typing import Optional

import typer
from rich import box
from rich.console import Console
from rich.table import Table

from consensus.errors import ConsensusError, InputRejected
from consensus.store.db import ENV_VAR

try:  # typer ≥ 0.17 carries its own copy of click
    from typer._click import exceptions as click_errors
except ImportError:  # pragma: no cover - older typer depends on click itself
    from click import exceptions as click_errors

try:  # an argument reads as its placeholder (FILE, YYYY-MM), not {FILE} or "YYYY-MM <str>" (typer ≥ 0.17)
    from typer.core import TyperArgument

    if hasattr(TyperArgument, "_usage_display_name"):
        TyperArgument._usage_display_name = lambda self: self.display_name_raw + ("..." if self.nargs != 1 else "")
    if hasattr(TyperArgument, "display_type_rich"):
        _typed = TyperArgument.display_type_rich
        TyperArgument.display_type_rich = lambda self, ctx: None if self.metavar else _typed(self, ctx)
except ImportError:  # pragma: no cover
    pass

app = typer.Typer(
    help="Monthly demand review: take in every source's forecast, weigh it by its measured accuracy, merge "
         "into one explained consensus, publish the pack.\n\nExample: consensus demo --workdir demo",
    no_args_is_help=True, add_completion=False, rich_markup_mode=None, pretty_exceptions_enable=False,
)
cycle_app = typer.Typer(help="Open, list and reopen planning cycles.\n\nExample: consensus cycle open 2027-03 "
                             "--horizon 18 --due 2027-03-20", no_args_is_help=True)
store_app = typer.Typer(help="Look after the store itself.\n\nExample: consensus store upgrade", no_args_is_help=True)
settings_app = typer.Typer(help="Settings of this store: the company name on the pack, intake limits.\n\n"
                                "Example: consensus settings set company \"Quillmere Garden Systems\"",
                           no_args_is_help=True)
app.add_typer(cycle_app, name="cycle")
app.add_typer(store_app, name="store")
app.add_typer(settings_app, name="settings")
console = Console()
err = Console(stderr=True)

FORMATS = ("table", "csv", "json")

# Options many commands share: defined once, so their spelling and help never drift.
CycleOpt = typer.Option(..., "--cycle", "-c", metavar="YYYY-MM",
                        help="Planning cycle: the month whose orders are the last ones known.")
RevisionOpt = typer.Option(None, "--revision", metavar="N",
                           help="Revision of the cycle (after a reopening); default: the newest.")
FormatOpt = typer.Option("table", "--format", metavar="table|csv|json",
                         help="How to print the listing: a table that fits the terminal, CSV or JSON.")
ByOpt = typer.Option("", "--by", metavar="NAME", help="Who does this (kept in the record).")
OutOpt = typer.Option(..., "--out", "-o", metavar="FILE", help="File to write (written whole or not at all).")


@app.callback()
def main(ctx: typer.Context,
         db: Optional[str] = typer.Option(None, "--db", metavar="URL",
                                          help=f"Store URL (default: ${ENV_VAR}, else sqlite:///consensus.db), e.g. "
                                               "postgresql+psycopg://user@host/db.")) -> None:
    """Choose the store once for every command."""
    ctx.obj = {"url": db}


def _url(ctx: typer.Context) -> str | None:
    return (ctx.obj or {}).get("url")


def _fail(error: Exception) -> None:
    if isinstance(error, InputRejected):
        err.print(error.summary(limit=50), markup=False, highlight=False, soft_wrap=True)
        if error.submission_id:
            err.print(f"The file is kept as rejected submission #{error.submission_id}; nothing else changed.",
                      markup=False)
        raise typer.Exit(2)
    err.print(f"error: {error}", markup=False, highlight=False, soft_wrap=True)
    raise typer.Exit(1)


def _check_format(fmt: str) -> None:
    if fmt not in FORMATS:
        _fail(ConsensusError(f"--format must be one of {', '.join(FORMATS)}, not {fmt!r}"))


def _cell(value) -> str:
    if value is None or (isinstance(value, float) and value != value):
        return ""
    if isinstance(value, bool):
        return "yes" if value else ""
    if isinstance(value, float):
        return f"{value:,.1f}" if abs(value) >= 100 else f"{value:,.2f}"
    return str(value)


def _short_sources(keys) -> tuple[list[str], str]:
    """Sources by their short names, for narrow tables, and the legend of those that differ from the label."""
    from consensus import vocabulary
    from consensus.vocabulary import source_label, source_short

    present = [k for k in dict.fromkeys(keys) if isinstance(k, str)]
    named = [k for k in vocabulary.ordered(present) if source_short(k) != source_label(k)]
    legend = ("Sources: " + ", ".join(f"{source_short(k)} = {source_label(k)}" for k in named)) if named else ""
    return [source_short(k) if isinstance(k, str) else "" for k in keys], legend


def _print_frame(frame, *, title: str | None = None, fmt: str = "table", headers: dict | None = None,
                 legend: str | None = None) -> None:
    """Print a listing: a table that wraps to the terminal (headers from ``headers``), CSV or JSON."""
    if fmt == "csv":
        typer.echo(frame.to_csv(index=False, float_format="%.6g"), nl=False)
        return
    if fmt == "json":
        typer.echo(frame.to_json(orient="records", date_format="iso", indent=1, force_ascii=False))
        return
    table = Table(title=title, show_lines=False, title_justify="left", pad_edge=False, expand=False,
                  box=box.SIMPLE_HEAD, collapse_padding=True)
    for column in frame.columns:
        numeric = frame[column].dtype.kind in "if"
        table.add_column((headers or {}).get(column, str(column)), justify="right" if numeric else "left",
                         overflow="fold")
    for row in frame.itertuples(index=False):
        table.add_row(*[_cell(v) for v in row])
    console.print(table)
    if legend:
        typer.echo(legend)


# --------------------------------------------------------------------------- cycles


@cycle_app.command("open")
def cycle_open(ctx: typer.Context, name: str = typer.Argument(..., metavar="YYYY-MM", help="Cycle month."),
               horizon: int = typer.Option(18, metavar="MONTHS", help="Months planned after the cycle month."),
               due: Optional[str] = typer.Option(None, metavar="YYYY-MM-DD",
                                                 help="When submissions are due; later ones are marked late."),
               allow_missing_history: bool = typer.Option(
                   False, "--allow-missing-history",
                   help="Open even though some months have no orders yet; they are planned as unknown."),
               by: str = ByOpt) -> None:
    """Open a planning cycle (or set its due date); refuses while its months lack order history.

    Example: consensus cycle open 2027-03 --horizon 18 --due 2027-03-20
    """
    from consensus.workflow.cycles import open_cycle
    try:
        c = open_cycle(name, horizon=horizon, due=due, allow_missing_history=allow_missing_history, by=by,
                       url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    typer.echo(f"cycle {c.name} open, horizon {c.horizon} months" + (f", due {c.due}" if c.due else ""))


@cycle_app.command("list")
def cycle_list(ctx: typer.Context, fmt: str = FormatOpt) -> None:
    """List cycles with their horizon, revision, state, due date and who published them.

    Example: consensus cycle list
    """
    from consensus.workflow.cycles import list_cycles
    _check_format(fmt)
    try:
        frame = list_cycles(url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    from consensus.vocabulary import PLAN_STATES, label

    frame = frame.assign(published_at=frame["published_at"].astype(str).str.slice(0, 16).replace(
        {"NaT": "", "None": "", "nan": ""}), status=frame["status"].map(lambda k: label(PLAN_STATES, k)))
    if frame.empty and fmt == "table":
        typer.echo("no cycles yet; open one with 'consensus cycle open YYYY-MM'")
        return
    shown = frame[["name", "horizon", "revision", "status", "due", "published_at", "published_by"]]
    _print_frame(shown, title="Cycles", fmt=fmt, headers={"name": "Cycle", "horizon": "Months", "revision": "Rev",
                                                         "status": "State", "due": "Due", "published_at": "Published",
                                                         "published_by": "By"})


@cycle_app.command("reopen")
def cycle_reopen(ctx: typer.Context, name: str = typer.Argument(..., metavar="YYYY-MM", help="Published cycle."),
                 reason: str = typer.Option(..., "--reason", metavar="REASON", help="Why the plan must change."),
                 by: str = typer.Option(..., "--by", metavar="NAME", help="Who reopens it.")) -> None:
    """Reopen a published cycle as its next revision; the published revision stays readable.

    Example: consensus cycle reopen 2027-03 --reason "DC-N2 corrected its file" --by "A. Planner"
    """
    from consensus.workflow.cycles import reopen_cycle
    try:
        r = reopen_cycle(name, reason=reason, by=by, url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    typer.echo(f"cycle {name} reopened as revision {r.revision}; revision {r.revision - 1} stays published")


@app.command("open-past")
def open_past(ctx: typer.Context,
              first: str = typer.Option(..., "--from", metavar="YYYY-MM", help="First past cycle."),
              last: str = typer.Option(..., "--to", metavar="YYYY-MM", help="Last past cycle."),
              horizon: int = typer.Option(18, metavar="MONTHS", help="Horizon of the cycles opened.")) -> None:
    """Open past cycles with no submissions, so the statistical forecast they would have had builds an accuracy record.

    Example: consensus open-past --from 2026-01 --to 2026-12
    """
    from consensus.workflow.past_cycles import open_past_cycles
    try:
        done = open_past_cycles(first, last, horizon=horizon, url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    opened = [d["cycle"] for d in done if d["opened"]]
    typer.echo(f"{len(opened)} cycle(s) opened, {len(done) - len(opened)} already open; the next run makes "
               "their statistical forecast from the orders known then")


app.command("backcast", hidden=True)(open_past)  # the old name, kept for one release


# --------------------------------------------------------------------------- intake


@app.command()
def master(ctx: typer.Context, file: Path = typer.Argument(..., metavar="FILE", help="CSV or XLSX master file."),
           kind: str = typer.Option(..., "--kind", metavar="items|locations|bom", help="What the file holds."),
           replace: bool = typer.Option(False, "--replace",
                                        help="The file is the whole master: what it leaves out is removed."),
           by: str = ByOpt) -> None:
    """Load master data: items (family, unit price), locations (region) or the bill of material.

    Example: consensus master items.csv --kind items
    """
    from consensus.intake.submission import load_master_file
    try:
        outcome = load_master_file(file, kind=kind, url=_url(ctx), submitted_by=by, replace=replace)
    except ConsensusError as e:
        _fail(e)
    typer.echo(outcome.line())


@app.command()
def actuals(ctx: typer.Context, file: Path = typer.Argument(..., metavar="FILE", help="CSV or XLSX of orders."),
            by: str = ByOpt) -> None:
    """Load customer-order history (daily lines or monthly totals) into monthly buckets.

    Example: consensus actuals orders.csv
    """
    from consensus.intake.submission import load_actuals_file
    try:
        outcome = load_actuals_file(file, url=_url(ctx), submitted_by=by)
    except ConsensusError as e:
        _fail(e)
    typer.echo(outcome.line())


@app.command()
def submit(ctx: typer.Context,
           path: Path = typer.Argument(..., metavar="FILE|FOLDER", help="A CSV/XLSX file, or a folder of them."),
           cycle: Optional[str] = typer.Option(None, "--cycle", "-c", metavar="YYYY-MM",
                                               help="Cycle (a returned template knows it)."),
           source: Optional[str] = typer.Option(None, "--source", "-s", metavar="sales|marketing|dc",
                                                help="Who sent it (a returned template knows it)."),
           by: str = ByOpt,
           scope: Optional[str] = typer.Option(None, "--scope", metavar="SCOPE",
                                               help="What the file answers for: 'all', 'region NAME' or 'location "
                                                    "NAME'; else the places its rows name.")) -> None:
    """Check a returned forecast or events file and record it, or reject it with reasons (kept).

    Example: consensus submit sales_north.xlsx --cycle 2027-03 --source sales --by "A. Planner"
    """
    from consensus.intake.submission import submit_file
    if path.is_dir():
        files = sorted(p for p in path.iterdir() if p.suffix.lower() in (".csv", ".xlsx") and p.is_file())
    else:
        files = [path]
    failed = rejected = 0
    for file in files:
        try:
            typer.echo(submit_file(file, url=_url(ctx), source=source, cycle=cycle, scope=scope,
                                   submitted_by=by).line())
        except InputRejected as e:
            rejected += 1
            if len(files) == 1:
                _fail(e)
            err.print(e.summary(limit=5), markup=False, highlight=False, soft_wrap=True)
        except ConsensusError as e:
            failed += 1
            if len(files) == 1:
                _fail(e)
            err.print(f"{file.name}: {e}", markup=False, highlight=False, soft_wrap=True)
    if len(files) > 1:
        typer.echo(f"{len(files)} file(s): {len(files) - failed - rejected} recorded, {rejected} rejected, "
                   f"{failed} not taken in")
    if rejected:
        raise typer.Exit(2)
    if failed:
        raise typer.Exit(1)


@app.command()
def template(ctx: typer.Context, cycle: str = CycleOpt,
             source: str = typer.Option(..., "--source", "-s", metavar="sales|marketing|dc",
                                        help="Who will fill it in."),
             out: Path = OutOpt,
             grain: str = typer.Option("item,location", metavar="PRODUCT,PLACE",
                                       help="item or family, and location or region."),
             region: Optional[str] = typer.Option(None, metavar="REGION", help="Only this region's keys."),
             location: Optional[str] = typer.Option(None, metavar="LOCATION", help="Only this location's keys."),
             layout: str = typer.Option("wide", metavar="wide|long",
                                        help="wide: a row per key, a column per month, references and a track "
                                             "record; long: a row per key and month (earlier versions)."),
             statistical: str = typer.Option("run", metavar="run|compute",
                                             help="Statistical reference from the cycle's run (run), or computed "
                                                  "now when the cycle has no run yet (compute).")) -> None:
    """Write the fill-in file for a submitter, every key and month ready, references beside them.

    Example: consensus template --cycle 2027-03 --source sales --grain family,region --region NORTH --out north.xlsx
    """
    from consensus.workflow.templates import make_template
    try:
        written = make_template(cycle, source=source, out=out, grain=grain, region=region, location=location,
                                layout=layout, statistical=statistical, url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    typer.echo(written.line())


@app.command()
def status(ctx: typer.Context, cycle: str = CycleOpt, fmt: str = FormatOpt) -> None:
    """Show, for each expected source and scope, the file in force there, or that none came (and late files).

    Example: consensus status --cycle 2027-03
    """
    import pandas as pd

    from consensus.vocabulary import STATE_HEADING, describe_submission_state
    from consensus.workflow.cycles import submission_status
    _check_format(fmt)
    try:
        table = submission_status(cycle, url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    if fmt != "table":
        _print_frame(table.drop(columns=["reasons"]), fmt=fmt)
        return
    when = table["submitted_at"].astype(str).str.slice(0, 10).replace({"NaT": "", "None": "", "nan": ""})
    states = []
    for state, days in zip(table["state"], table["days_late"].astype(object)):
        known = days is not None and days is not pd.NA and days == days
        text = describe_submission_state(state, days_late=days if known else None)
        if state == "not_received" and known and days <= 0:
            text += f" ({-int(days)} days left)" if days < 0 else " (due today)"
        states.append(text)
    short, legend = _short_sources(table["source"])
    shown = table.assign(source=short,
                         state=states, file=table["filename"].fillna("") + table["id"].map(
                             lambda i: "" if i != i else f" #{int(i)}"), when=when)[
        ["source", "scope", "state", "file", "submitted_by", "when"]]
    _print_frame(shown.fillna(""), title=f"Submissions for cycle {cycle}", fmt=fmt,
                 headers={"source": "Source", "scope": "Scope", "state": STATE_HEADING, "file": "File",
                          "submitted_by": "By", "when": "Received"}, legend=legend)
    for row in table[table["state"] == "rejected"].itertuples(index=False):
        reasons = row.reasons if isinstance(row.reasons, list) else []
        typer.echo(f"rejected {row.filename}: " + "; ".join(reasons[:3]) + (" …" if len(reasons) > 3 else ""))


# --------------------------------------------------------------------------- the run


@app.command()
def run(ctx: typer.Context, cycle: str = CycleOpt,
        scheme: str = typer.Option("shrunk_mse", metavar="SCHEME",
                                   help="Weights: equal, inverse_mad, inverse_mse, discounted_mse, best, shrunk_mse."),
        window: int = typer.Option(12, metavar="CYCLES", help="Past cycles of accuracy behind the weights."),
        segment: str = typer.Option("family", metavar="family|item|region|all", help="Weights estimated per ..."),
        bias_correction: bool = typer.Option(False, "--bias-correction/--no-bias-correction",
                                             help="Subtract each source's measured bias (shrunk)."),
        reconciliation: Optional[str] = typer.Option(None, metavar="METHOD",
                                                     help="bottom_up (default), top_down_hist_avg, "
                                                          "top_down_prop_avg or mint_shrink."),
        bands: str = typer.Option("80,95", "--bands", metavar="PCT,PCT", help="Error band levels in percent."),
        jobs: Optional[int] = typer.Option(None, "--jobs", "-j", metavar="N",
                                           help="Processes for the statistical fits (default: the machine's "
                                                "cores); the numbers do not depend on it."),
        by: str = ByOpt) -> None:
    """Compute and store the cycle's consensus: statistical source, alignment, weights, bands, decisions.

    Example: consensus run --cycle 2027-03 --scheme shrunk_mse --jobs 2
    """
    from rich.progress import Progress, SpinnerColumn, TextColumn, TimeElapsedColumn

    from consensus.methods.weights import WeightSpec
    from consensus.workflow.run import RunSpec, run_cycle
    try:
        levels = tuple(float(b) / 100 for b in bands.split(",") if b.strip())
    except ValueError:
        _fail(ConsensusError(f"--bands takes percentages separated by commas, e.g. 80,95; not {bands!r}"))
    if jobs is not None and jobs < 1:
        _fail(ConsensusError("--jobs must be 1 or more"))
    try:
        spec = RunSpec(weights=WeightSpec(scheme=scheme, window_cycles=window, segment=segment,
                                          bias_correction=bias_correction), band_levels=levels,
                       **({"reconciliation": reconciliation} if reconciliation else {}))
        with Progress(SpinnerColumn(), TextColumn("{task.description}"), TimeElapsedColumn(), transient=True,
                      console=err) as bar:
            task = bar.add_task("reading the inputs", total=None)
            summary = run_cycle(cycle, url=_url(ctx), spec=spec, jobs=jobs, by=by,
                                progress=lambda m: bar.update(task, description=m))
    except ConsensusError as e:
        _fail(e)
    typer.echo(summary.line())
    for warning in summary.warnings[:10]:
        typer.echo(f"  note: {warning}")
    if len(summary.warnings) > 10:
        typer.echo(f"  … and {len(summary.warnings) - 10} more notes (see 'consensus explain' and the pack)")


@app.command()
def explain(ctx: typer.Context, cycle: str = CycleOpt,
            item: str = typer.Option(..., "--item", metavar="ITEM", help="Item code."),
            location: str = typer.Option(..., "--location", metavar="LOCATION", help="Location code."),
            period: str = typer.Option(..., "--period", metavar="YYYY-MM", help="Planned month."),
            revision: Optional[int] = RevisionOpt) -> None:
    """Explain one consensus number: sources, weights and why, missing sources, spread, splits, overrides.

    Example: consensus explain --cycle 2027-03 --item DK-100 --location DC-N1 --period 2027-05
    """
    from consensus.workflow.explain import explain_cell
    try:
        typer.echo(explain_cell(cycle, item=item, location=location, period=period, revision=revision,
                                url=_url(ctx)).text)
    except ConsensusError as e:
        _fail(e)


_SCORE_HEADERS = {"source": "Source", "lag_bucket": "Lag", "node_item": "Product", "node_location": "Place",
                  "n": "n", "mad": "MAD", "wape": "WAPE %", "bias_pct": "Bias %", "tracking_signal": "TS",
                  "ts_flag": "!", "mase": "MASE", "mape": "MAPE %", "rmse": "RMSE"}


@app.command()
def scorecard(ctx: typer.Context, cycle: str = CycleOpt,
              level: str = typer.Option("family", metavar="LEVEL",
                                        help="item, family_region, family, region, location or total."),
              revision: Optional[int] = RevisionOpt, fmt: str = FormatOpt) -> None:
    """Accuracy of every source by lag bucket, as the cycle's run measured it: MAD, WAPE, bias, tracking signal, MASE.

    Example: consensus scorecard --cycle 2027-03 --level family --format csv
    """
    from consensus.workflow.scorecard import scorecard_report
    _check_format(fmt)
    try:
        table, uplift = scorecard_report(cycle, level=level, revision=revision, url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    if fmt != "table":
        _print_frame(table, fmt=fmt)
        return
    columns = [c for c in ("source", "lag_bucket", "node_item", "node_location", "n", "mad", "wape", "bias_pct",
                           "tracking_signal", "ts_flag", "mase") if c in table.columns]
    short, sources_legend = _short_sources(table["source"])
    shown = table[columns].assign(source=short)
    if level in ("family", "total"):
        shown = shown.drop(columns=[c for c in ("node_location",) if c in shown])
    if level in ("region", "location", "total"):
        shown = shown.drop(columns=[c for c in ("node_item",) if c in shown])
    _print_frame(shown, title=f"Accuracy known at cycle {cycle}, by {level.replace('_', ' × ')}", fmt=fmt,
                 headers=_SCORE_HEADERS,
                 legend=(sources_legend + "\n" if sources_legend else "")
                 + "TS: tracking signal, Σ error / MAD (! beyond ±4); MASE: error scaled by the seasonal naive "
                   "forecast's (below 1 beats it); error = actual − forecast.")
    if len(uplift):
        _print_frame(uplift[["lag_bucket", "n_cells", "wape_without", "wape_with", "wape_gain"]],
                     title="Marketing's events: statistical forecast without and with them", fmt=fmt,
                     headers={"lag_bucket": "Lag", "n_cells": "Cells", "wape_without": "WAPE without %",
                              "wape_with": "WAPE with %", "wape_gain": "Gain (points)"})


# --------------------------------------------------------------------------- decisions and publication


@app.command()
def decide(ctx: typer.Context,
           cycle: Optional[str] = typer.Option(None, "--cycle", "-c", metavar="YYYY-MM", help="Planning cycle."),
           period: Optional[str] = typer.Option(None, "--period", metavar="YYYY-MM", help="Planned month changed."),
           reason: str = typer.Option(..., "--reason", metavar="REASON", help="Why the meeting changed the number."),
           by: str = typer.Option(..., "--by", metavar="NAME", help="Who decided."),
           item: Optional[str] = typer.Option(None, metavar="ITEM", help="Scope: one item (or use --family)."),
           family: Optional[str] = typer.Option(None, metavar="FAMILY", help="Scope: a product family."),
           location: Optional[str] = typer.Option(None, metavar="LOCATION", help="Only at this location."),
           region: Optional[str] = typer.Option(None, metavar="REGION", help="Only in this region."),
           set_to: Optional[float] = typer.Option(None, "--set", metavar="UNITS", help="New total for the scope."),
           delta: Optional[float] = typer.Option(None, "--delta", metavar="UNITS", help="Units to add (negative cuts)."),
           pct: Optional[float] = typer.Option(None, "--pct", metavar="PERCENT", help="Percent change (≥ -100)."),
           withdraw: Optional[int] = typer.Option(None, "--withdraw", metavar="ID",
                                                  help="Withdraw decision ID instead (kept in the log).")) -> None:
    """Record a meeting decision (an override with reason and author), or withdraw one; the next run applies it.

    Example: consensus decide --cycle 2027-03 --family SPRINKLERS --period 2027-05 --pct 10 --reason "retailer promo" --by "J. Lead"
    """
    from consensus.vocabulary import describe_change
    from consensus.workflow.decisions import record_decision, withdraw_decision
    if withdraw is not None:
        try:
            d = withdraw_decision(withdraw, reason=reason, by=by, url=_url(ctx))
        except ConsensusError as e:
            _fail(e)
        typer.echo(f"decision #{d.id} withdrawn; run 'consensus run --cycle {d.cycle}' to apply the change")
        return
    given = [(k, v) for k, v in (("set", set_to), ("delta", delta), ("pct", pct)) if v is not None]
    if len(given) != 1:
        _fail(ConsensusError("give exactly one of --set, --delta or --pct (or --withdraw ID)"))
    if cycle is None or period is None:
        _fail(ConsensusError("a decision needs --cycle and --period"))
    try:
        d = record_decision(cycle, period=period, amount=given[0][1], kind=given[0][0], reason=reason, author=by,
                            item=item, family=family, location=location, region=region, url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    typer.echo(f"decision #{d.id} recorded ({describe_change(d.kind, d.amount)}); run "
               f"'consensus run --cycle {cycle}' to apply it")


@app.command()
def decisions(ctx: typer.Context, cycle: str = CycleOpt, fmt: str = FormatOpt) -> None:
    """List the cycle's decisions, withdrawn ones included.

    Example: consensus decisions --cycle 2027-03
    """
    from consensus.store.db import session_scope
    from consensus.vocabulary import describe_change
    from consensus.workflow.cycles import get_cycle
    from consensus.workflow.decisions import decision_scope, load_decisions
    _check_format(fmt)
    try:
        with session_scope(_url(ctx), write=False) as session:
            get_cycle(session, cycle)
            frame = load_decisions(session, cycle)
    except ConsensusError as e:
        _fail(e)
    if frame.empty:
        typer.echo(f"cycle {cycle} has no decisions")
        return
    shown = frame.assign(scope=decision_scope(frame),
                         change=[describe_change(k, a) for k, a in zip(frame["kind"], frame["amount"])],
                         state=frame["withdrawn_at"].map(lambda w: "in force" if w is None or w != w else "withdrawn"))
    columns = ["id", "period", "scope", "change", "author", "reason", "state"]
    _print_frame(shown[columns] if fmt == "table" else shown, title=f"Decisions of cycle {cycle}", fmt=fmt,
                 headers={"id": "#", "period": "Month", "scope": "Scope", "change": "Change", "author": "By",
                          "reason": "Reason", "state": "State"})


@app.command()
def publish(ctx: typer.Context, cycle: str = CycleOpt,
            by: str = typer.Option(..., "--by", metavar="NAME", help="Who publishes the plan.")) -> None:
    """Publish the cycle's newest run as the plan of record; the cycle then takes no more changes.

    Example: consensus publish --cycle 2027-03 --by "A. Planner"
    """
    from consensus.workflow.publish import publish_cycle
    try:
        r = publish_cycle(cycle, by=by, url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    typer.echo(f"cycle {cycle} revision {r.revision} published (run #{r.id})")


@app.command()
def export(ctx: typer.Context, cycle: str = CycleOpt, out: Path = OutOpt,
           revision: Optional[int] = RevisionOpt) -> None:
    """Write the consensus with its bands to CSV (draft or published is in every row).

    Example: consensus export --cycle 2027-03 --out consensus.csv
    """
    from consensus.workflow.publish import export_consensus
    try:
        path, state, rows = export_consensus(cycle, out, revision=revision, url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    typer.echo(f"wrote {path}: {rows:,} rows, {state}")


@app.command()
def components(ctx: typer.Context, cycle: str = CycleOpt, out: Path = OutOpt,
               revision: Optional[int] = RevisionOpt) -> None:
    """Write the component demand the run exploded through the bill of material, per month, to CSV.

    Example: consensus components --cycle 2027-03 --out components.csv
    """
    from consensus.workflow.publish import export_components
    try:
        path, rows = export_components(cycle, out, revision=revision, url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    typer.echo(f"wrote {path}: {rows:,} component-months")


@app.command()
def pack(ctx: typer.Context, cycle: str = CycleOpt,
         out: Path = typer.Option(..., "--out", "-o", metavar="FILE.pdf", help="PDF file to write."),
         html: Optional[Path] = typer.Option(None, "--html", metavar="FILE.html", help="Also write the HTML pack."),
         revision: Optional[int] = RevisionOpt) -> None:
    """Render the meeting pack (PDF, and HTML beside it) from the cycle's stored run.

    Example: consensus pack --cycle 2027-03 --out pack.pdf --html pack.html
    """
    from consensus.workflow.meeting_pack import write_pack
    try:
        pdf, page_count = write_pack(cycle, pdf_path=out, html_path=html, revision=revision, url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    typer.echo(f"wrote {pdf} ({page_count} pages)" + (f" and {html}" if html else ""))


@app.command()
def verify(ctx: typer.Context, cycle: str = CycleOpt, revision: Optional[int] = RevisionOpt) -> None:
    """Recompute a published plan from its stored inputs and check the records were not changed outside the tool.

    Example: consensus verify --cycle 2027-03
    """
    from consensus.workflow.verify import verify_cycle
    try:
        report = verify_cycle(cycle, revision=revision, url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    _print_report(report)


def _print_report(report) -> None:
    """A check's lines, and exit code 1 when it found a difference or damage (verify and store check)."""
    for line in report.lines():
        typer.echo(line)
    if not report.ok:
        raise typer.Exit(1)


# --------------------------------------------------------------------------- the store


@store_app.command("upgrade")
def store_upgrade(ctx: typer.Context) -> None:
    """Bring the store's schema up to this release.

    Example: consensus store upgrade
    """
    from consensus.store.db import upgrade_store
    try:
        before, after = upgrade_store(_url(ctx))
    except ConsensusError as e:
        _fail(e)
    typer.echo(f"store schema {before} is current" if before == after else
               f"store schema upgraded from {before} to {after}")


@store_app.command("check")
def store_check(ctx: typer.Context) -> None:
    """Check the whole store: the journal's hash chain, every stored file and frame, the database file itself.

    Example: consensus store check
    """
    from consensus.workflow.verify import check_store
    try:
        report = check_store(url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    _print_report(report)


@settings_app.command("list")
def settings_list(ctx: typer.Context, fmt: str = FormatOpt) -> None:
    """List the store's settings with their values and what each means.

    Example: consensus settings list
    """
    from consensus.workflow.settings import list_settings
    _check_format(fmt)
    try:
        frame = list_settings(url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    _print_frame(frame, title="Settings", fmt=fmt, headers={"key": "Setting", "value": "Value",
                                                            "meaning": "Meaning"})


@settings_app.command("set")
def settings_set(ctx: typer.Context, key: str = typer.Argument(..., metavar="KEY", help="Setting name."),
                 value: str = typer.Argument(..., metavar="VALUE", help="New value.")) -> None:
    """Change one setting of the store.

    Example: consensus settings set company "Quillmere Garden Systems"
    """
    from consensus.workflow.settings import set_setting
    try:
        shown = set_setting(key, value, url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    typer.echo(f"{key} = {shown}")


@app.command()
def demo(workdir: Path = typer.Option(Path("consensus-demo"), "--workdir", "-w", metavar="FOLDER",
                                      help="Folder for the demo store and outputs (made fresh).")) -> None:
    """Run the whole monthly cycle on the bundled sample company: intake, consensus, publish, pack, export.

    Example: consensus demo --workdir demo
    """
    from rich.progress import Progress, SpinnerColumn, TextColumn, TimeElapsedColumn

    from consensus.workflow.demo import run_demo
    try:
        with Progress(SpinnerColumn(), TextColumn("{task.description}"), TimeElapsedColumn(), transient=True,
                      console=err) as bar:
            task = bar.add_task("starting", total=None)
            result = run_demo(workdir, progress=lambda m: bar.update(task, description=m))
    except ConsensusError as e:
        _fail(e)
    for line in result.log:
        typer.echo(line)
    typer.echo("")
    for name, path in result.outputs.items():
        typer.echo(f"{name:<12} {path}")


def run_cli(argv: list[str] | None = None) -> int:
    """The console entry point: usage errors exit 1 in one line; an unexpected failure is one line too."""
    try:
        code = app(args=argv, prog_name="consensus", standalone_mode=False)
    except typer.Exit as done:
        return int(done.exit_code)
    except click_errors.NoArgsIsHelpError as error:
        typer.echo(error.format_message() if hasattr(error, "format_message") else str(error))
        return 0
    except click_errors.UsageError as error:
        hint = f" (see 'consensus {error.ctx.command_path.split(' ', 1)[1]} --help')" if error.ctx and \
            " " in error.ctx.command_path else " (see 'consensus --help')"
        err.print(f"error: {error.format_message()}{hint}", markup=False, highlight=False, soft_wrap=True)
        return 1
    except typer.Abort:
        err.print("stopped", markup=False)
        return 130
    except ConsensusError as error:
        err.print(f"error: {error}", markup=False, highlight=False, soft_wrap=True)
        return 1
    except Exception as error:  # noqa: BLE001 - the last line of defence: never a traceback for a user
        if os.environ.get("CONSENSUS_DEBUG"):
            raise
        err.print(f"error: the command stopped on an unexpected problem ({type(error).__name__}: {error}); "
                  "nothing half-done was kept. Please report it with the command you ran "
                  "(CONSENSUS_DEBUG=1 shows the details).", markup=False, highlight=False, soft_wrap=True)
        return 1
    return int(code or 0)


def entry() -> None:
    sys.exit(run_cli())


if __name__ == "__main__":  # pragma: no cover
    entry()



