"""The `consensus` command: a thin layer that parses, calls one library function and prints."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer
from rich.console import Console
from rich.table import Table

from consensus.errors import ConsensusError, InputRejected
from consensus.store.db import ENV_VAR

app = typer.Typer(
    help="Monthly demand review: take in every source's forecast, weigh it by its measured accuracy, merge "
         "into one explained consensus, publish the pack.\n\nExample: consensus demo --workdir demo",
    no_args_is_help=True, add_completion=False, rich_markup_mode=None, pretty_exceptions_show_locals=False,
)
cycle_app = typer.Typer(help="Open and list planning cycles.\n\nExample: consensus cycle open 2027-03 --horizon 18",
                        no_args_is_help=True)
app.add_typer(cycle_app, name="cycle")
console = Console()
err = Console(stderr=True)

CycleOpt = typer.Option(..., "--cycle", "-c", help="Planning cycle, YYYY-MM (order history known through it).")


@app.callback()
def main(ctx: typer.Context,
         db: Optional[str] = typer.Option(None, "--db", help=f"Database URL (default: ${ENV_VAR}, else "
                                                             "sqlite:///consensus.db).")) -> None:
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


def _print_frame(frame, title: str | None = None, fmt: str = "table") -> None:
    if fmt == "csv":
        typer.echo(frame.to_csv(index=False, float_format="%.4g"), nl=False)
        return
    table = Table(title=title, show_lines=False)
    for column in frame.columns:
        numeric = frame[column].dtype.kind in "if"
        table.add_column(str(column), justify="right" if numeric else "left")
    for row in frame.itertuples(index=False):
        table.add_row(*[(f"{v:,.2f}" if isinstance(v, float) else ("" if v is None else str(v))) for v in row])
    console.print(table)


@cycle_app.command("open")
def cycle_open(ctx: typer.Context, name: str = typer.Argument(..., help="Cycle month, YYYY-MM."),
               horizon: int = typer.Option(18, help="Months planned after the cycle month.")) -> None:
    """Open a planning cycle (past cycles too, to load their submissions).

    Example: consensus cycle open 2027-03 --horizon 18
    """
    from consensus.workflow.cycles import open_cycle
    try:
        c = open_cycle(name, horizon=horizon, url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    typer.echo(f"cycle {c.name} open, horizon {c.horizon} months")


@cycle_app.command("list")
def cycle_list(ctx: typer.Context) -> None:
    """List cycles with their status.

    Example: consensus cycle list
    """
    from consensus.workflow.cycles import list_cycles
    _print_frame(list_cycles(url=_url(ctx)), "Cycles")


@app.command()
def master(ctx: typer.Context, file: Path = typer.Argument(..., exists=True, dir_okay=False),
           kind: str = typer.Option(..., "--kind", help="items, locations or bom."),
           by: str = typer.Option("", "--by", help="Who supplied the file.")) -> None:
    """Load master data: items (family, unit price), locations (region) or the bill of material.

    Example: consensus master items.csv --kind items
    """
    from consensus.intake.submission import load_master_file
    try:
        outcome = load_master_file(file, kind=kind, url=_url(ctx), submitted_by=by)
    except ConsensusError as e:
        _fail(e)
    typer.echo(outcome.line())


@app.command()
def actuals(ctx: typer.Context, file: Path = typer.Argument(..., exists=True, dir_okay=False),
            by: str = typer.Option("", "--by", help="Who supplied the file.")) -> None:
    """Load customer-order history (daily lines or monthly totals) into monthly buckets.

    Example: consensus actuals orders.csv
    """
    from consensus.intake.submission import load_actuals_file
    try:
        outcome = load_actuals_file(file, url=_url(ctx), submitted_by=by)
    except ConsensusError as e:
        _fail(e)
    typer.echo(f"{outcome.line()}: {outcome.message}")


@app.command()
def submit(ctx: typer.Context,
           path: Path = typer.Argument(..., exists=True, help="A CSV/XLSX file, or a folder of them."),
           cycle: Optional[str] = typer.Option(None, "--cycle", "-c", help="Cycle, YYYY-MM (a template knows it)."),
           source: Optional[str] = typer.Option(None, "--source", "-s", help="sales, marketing or dc."),
           by: str = typer.Option("", "--by", help="Who submits."),
           scope: Optional[str] = typer.Option(None, "--scope", help="e.g. 'region NORTH'; else from the file.")) -> None:
    """Check a returned forecast or events file and store it in one transaction, or reject it with reasons.

    Example: consensus submit sales_north.xlsx --cycle 2027-03 --source sales --by "A. Planner"
    """
    from consensus.intake.submission import submit_file
    files = sorted(p for p in path.iterdir() if p.suffix.lower() in (".csv", ".xlsx")) if path.is_dir() else [path]
    failed = 0
    for file in files:
        try:
            typer.echo(submit_file(file, url=_url(ctx), source=source, cycle=cycle, scope=scope,
                                   submitted_by=by).line())
        except InputRejected as e:
            failed += 1
            if len(files) == 1:
                _fail(e)
            err.print(e.summary(limit=5), markup=False, highlight=False, soft_wrap=True)
        except ConsensusError as e:
            _fail(e)
    if failed:
        raise typer.Exit(2)


@app.command()
def template(ctx: typer.Context, cycle: str = CycleOpt,
             source: str = typer.Option(..., "--source", "-s", help="Who will fill it in: sales, marketing or dc."),
             out: Path = typer.Option(..., "--out", "-o", help="File to write, .xlsx or .csv."),
             grain: str = typer.Option("item,location", help="item or family, and location or region."),
             region: Optional[str] = typer.Option(None, help="Only this region's keys."),
             location: Optional[str] = typer.Option(None, help="Only this location's keys.")) -> None:
    """Write the fill-in file for a submitter, every key and month pre-filled, last consensus for reference.

    Example: consensus template --cycle 2027-03 --source sales --grain family,region --region NORTH --out north.xlsx
    """
    from consensus.workflow.templates import make_template
    try:
        written, rows = make_template(cycle, source=source, out=out, grain=grain, region=region, location=location,
                                      url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    typer.echo(f"wrote {written} ({rows:,} rows to fill in)")


@app.command()
def status(ctx: typer.Context, cycle: str = CycleOpt) -> None:
    """Show, for each expected source and scope, what was submitted (when, by whom, rows) or that it is missing.

    Example: consensus status --cycle 2027-03
    """
    from consensus.workflow.cycles import submission_status
    try:
        table = submission_status(cycle, url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    table = table.assign(when=table["submitted_at"].astype(str).str.slice(0, 16).replace("NaT", ""),
                         rows=table["row_count"].map(lambda n: "" if n != n else f"{int(n):,}"))
    columns = ["source", "scope", "state", "filename", "submitted_by", "when", "rows"]
    _print_frame(table[columns].fillna("").astype(str), f"Submissions for cycle {cycle}")
    for row in table[table["state"] == "rejected"].itertuples(index=False):
        reasons = row.reasons if isinstance(row.reasons, list) else []
        typer.echo(f"rejected {row.filename}: " + "; ".join(reasons[:3]) + (" …" if len(reasons) > 3 else ""))


@app.command()
def run(ctx: typer.Context, cycle: str = CycleOpt,
        scheme: str = typer.Option("shrunk_mse", help="equal, inverse_mad, inverse_mse, discounted_mse, best, "
                                                      "shrunk_mse."),
        window: int = typer.Option(12, help="Trailing cycles of accuracy history used for the weights."),
        segment: str = typer.Option("family", help="Weights per family, item, region or all."),
        bias_correction: bool = typer.Option(False, help="Subtract each source's measured bias (shrunk)."),
        reconciliation: Optional[str] = typer.Option(None, help="bottom_up (default), top_down_hist_avg, "
                                                                 "top_down_prop_avg or mint_shrink.")) -> None:
    """Compute and store the cycle's consensus (statistical source, alignment, weights, bands, audit).

    Example: consensus run --cycle 2027-03 --scheme shrunk_mse
    """
    from rich.progress import Progress, SpinnerColumn, TextColumn

    from consensus.methods.weights import WeightSpec
    from consensus.workflow.run import RunSpec, run_cycle
    try:
        spec = RunSpec(weights=WeightSpec(scheme=scheme, window_cycles=window, segment=segment,
                                          bias_correction=bias_correction),
                       **({"reconciliation": reconciliation} if reconciliation else {}))
        with Progress(SpinnerColumn(), TextColumn("{task.description}"), transient=True, console=err) as bar:
            task = bar.add_task("starting", total=None)
            summary = run_cycle(cycle, url=_url(ctx), spec=spec, progress=lambda m: bar.update(task, description=m))
    except ConsensusError as e:
        _fail(e)
    typer.echo(summary.line())
    for warning in summary.warnings[:10]:
        typer.echo(f"  note: {warning}")


@app.command()
def backcast(ctx: typer.Context, first: str = typer.Option(..., "--from", help="First cycle, YYYY-MM."),
             last: str = typer.Option(..., "--to", help="Last cycle, YYYY-MM."),
             horizon: int = typer.Option(18, help="Horizon for cycles that are not open yet.")) -> None:
    """Make the statistical forecast each past cycle would have had, from the data known then.

    Example: consensus backcast --from 2026-01 --to 2026-12
    """
    from consensus.workflow.backcast import backcast_cycles
    try:
        done = backcast_cycles(first, last, horizon=horizon, url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    for row in done:
        typer.echo(f"{row['cycle']}: {'made' if row['made'] else 'up to date'}")


@app.command()
def explain(ctx: typer.Context, cycle: str = CycleOpt, item: str = typer.Option(..., "--item"),
            location: str = typer.Option(..., "--location"), period: str = typer.Option(..., "--period")) -> None:
    """Explain one consensus number: sources, weights and why, missing sources, spread, splits, overrides.

    Example: consensus explain --cycle 2027-03 --item DK-100 --location DC-N1 --period 2027-05
    """
    from consensus.workflow.explain import explain_cell
    try:
        typer.echo(explain_cell(cycle, item=item, location=location, period=period, url=_url(ctx)).text)
    except ConsensusError as e:
        _fail(e)


@app.command()
def scorecard(ctx: typer.Context, cycle: str = CycleOpt,
              level: str = typer.Option("family", help="item, family, location, region or total."),
              format: str = typer.Option("table", "--format", help="table or csv.")) -> None:
    """Accuracy of every source by lag bucket: MAD, MSE, RMSE, MAPE, WAPE, bias, tracking signal, MASE.

    Example: consensus scorecard --cycle 2027-03 --level family --format csv
    """
    from consensus.workflow.scorecard import scorecard_report
    if format not in ("table", "csv"):
        _fail(ConsensusError("--format must be table or csv"))
    try:
        table, uplift = scorecard_report(cycle, level=level, url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    _print_frame(table, f"Accuracy known at cycle {cycle}, by {level} (MAPE, WAPE, bias_pct in %)", fmt=format)
    if format == "table" and not uplift.empty:
        _print_frame(uplift, "Marketing events: statistical forecast with and without the uplifts")


@app.command()
def decide(ctx: typer.Context, cycle: str = CycleOpt, period: str = typer.Option(..., "--period"),
           reason: str = typer.Option(..., "--reason", help="Why the meeting changed the number."),
           by: str = typer.Option(..., "--by", help="Who decided."),
           item: Optional[str] = typer.Option(None), family: Optional[str] = typer.Option(None),
           location: Optional[str] = typer.Option(None), region: Optional[str] = typer.Option(None),
           set_to: Optional[float] = typer.Option(None, "--set", help="New total for the scope, units."),
           delta: Optional[float] = typer.Option(None, "--delta", help="Units to add (negative to cut)."),
           pct: Optional[float] = typer.Option(None, "--pct", help="Percent change.")) -> None:
    """Record a meeting decision (an override with reason and author); it applies at the next run.

    Example: consensus decide --cycle 2027-03 --family SPRINKLERS --period 2027-05 --pct 10 --reason "retailer promo" --by "J. Lead"
    """
    from consensus.workflow.decisions import record_decision
    given = [(k, v) for k, v in (("set", set_to), ("delta", delta), ("pct", pct)) if v is not None]
    if len(given) != 1:
        _fail(ConsensusError("give exactly one of --set, --delta or --pct"))
    try:
        d = record_decision(cycle, period=period, amount=given[0][1], kind=given[0][0], reason=reason, author=by,
                            item=item, family=family, location=location, region=region, url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    typer.echo(f"decision #{d.id} recorded; run 'consensus run --cycle {cycle}' to apply it")


@app.command()
def publish(ctx: typer.Context, cycle: str = CycleOpt) -> None:
    """Publish the cycle's newest consensus run as the plan of record.

    Example: consensus publish --cycle 2027-03
    """
    from consensus.workflow.publish import publish_cycle
    try:
        r = publish_cycle(cycle, url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    typer.echo(f"cycle {cycle} published (run #{r.id})")


@app.command()
def export(ctx: typer.Context, cycle: str = CycleOpt, out: Path = typer.Option(..., "--out", "-o")) -> None:
    """Write the consensus with its 80%/95% bands to CSV (the status, draft or published, is in every row).

    Example: consensus export --cycle 2027-03 --out consensus.csv
    """
    from consensus.workflow.publish import export_consensus
    try:
        path, state, rows = export_consensus(cycle, out, url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    typer.echo(f"wrote {path}: {rows:,} rows, {state}")


@app.command()
def components(ctx: typer.Context, cycle: str = CycleOpt, out: Path = typer.Option(..., "--out", "-o")) -> None:
    """Explode the consensus through the bill of material: component demand per month for supply planning.

    Example: consensus components --cycle 2027-03 --out components.csv
    """
    from consensus.workflow.publish import export_components
    try:
        path, rows = export_components(cycle, out, url=_url(ctx))
    except (ConsensusError, ValueError) as e:
        _fail(e)
    typer.echo(f"wrote {path}: {rows:,} component-months")


@app.command()
def pack(ctx: typer.Context, cycle: str = CycleOpt, out: Path = typer.Option(..., "--out", "-o", help="PDF file."),
         html: Optional[Path] = typer.Option(None, "--html", help="Also write the HTML pack here.")) -> None:
    """Render the meeting pack (PDF, and HTML beside it) for the cycle.

    Example: consensus pack --cycle 2027-03 --out pack.pdf --html pack.html
    """
    from consensus.workflow.meeting_pack import write_pack
    try:
        pdf, page_count = write_pack(cycle, pdf_path=out, html_path=html, url=_url(ctx))
    except ConsensusError as e:
        _fail(e)
    typer.echo(f"wrote {pdf} ({page_count} pages)" + (f" and {html}" if html else ""))


@app.command()
def demo(workdir: Path = typer.Option(Path("consensus-demo"), "--workdir", "-w",
                                      help="Folder for the demo store and outputs (made fresh).")) -> None:
    """Run the whole monthly cycle on the bundled sample company: intake, consensus, pack, publish, export.

    Example: consensus demo --workdir demo
    """
    from rich.progress import Progress, SpinnerColumn, TextColumn

    from consensus.workflow.demo import run_demo
    try:
        with Progress(SpinnerColumn(), TextColumn("{task.description}"), transient=True, console=err) as bar:
            task = bar.add_task("starting", total=None)
            result = run_demo(workdir, progress=lambda m: bar.update(task, description=m))
    except ConsensusError as e:
        _fail(e)
    for line in result.log:
        typer.echo(line)
    typer.echo("")
    for name, path in result.outputs.items():
        typer.echo(f"{name:<12} {path}")


if __name__ == "__main__":  # pragma: no cover
    app()
