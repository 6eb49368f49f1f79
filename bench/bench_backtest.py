"""Backtest on the demo: consensus WAPE per reconciliation method, and how well the error bands cover.

Part 1, the demo store.  The bundled demo inputs are loaded once (intake and
the statistical backcast, as ``consensus demo`` does); then, for each
reconciliation method, a copy of that store runs and publishes the 12 past
cycles in order, as the demo does, with ``RunSpec(reconciliation=method)``.
Each published consensus is scored against the order history that came in
after its cycle (nothing the run could have seen):

* WAPE % = 100 · Σ|actual − consensus| / Σ actual at item × location,
  family × region, family and total (group totals per cycle and month are
  scored, so errors of cells partly cancel at the upper levels);
* coverage of the stored 80 % and 95 % bands (share of actuals inside) and
  the mean Winkler interval score (Winkler 1972; Gneiting & Raftery 2007,
  eq. 43), by lag bucket and overall.  Target: coverage within 5 points of
  nominal.

Part 2, a synthetic benchmark (fixed seed) built only from the library's pure
methods: the simulated sources of bench/bench_weights.py ("differing
quality"), weights and combination for every cycle from a 12-cycle window,
then the bands' rolling-origin check (:func:`consensus.methods.intervals.
backtest_bands`) of the consensus's own errors, by lag bucket.

Run:  python bench/bench_backtest.py                  (about 5 minutes on 2 cores)
      python bench/bench_backtest.py --skip-demo      (synthetic part only, ~1 minute)
      python bench/bench_backtest.py --methods bottom_up mint_shrink
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np
import pandas as pd
from sqlalchemy import select

# Run from a source checkout without installing: the package sits one folder up.
sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from consensus import periods  # noqa: E402
from consensus.errors import InputRejected  # noqa: E402
from consensus.intake.submission import load_actuals_file, load_master_file, submit_file  # noqa: E402
from consensus.methods import accuracy, intervals  # noqa: E402
from consensus.methods.combine import combine_sources  # noqa: E402
from consensus.methods.weights import WeightSpec, estimate_weights  # noqa: E402
from consensus.resources import sample_inputs_dir  # noqa: E402
from consensus.store import frames  # noqa: E402
from consensus.store.db import get_engine, session_scope  # noqa: E402
from consensus.store.models import ConsensusLine, ConsensusRun, Setting  # noqa: E402
from consensus.workflow.backcast import backcast_cycles  # noqa: E402
from consensus.workflow.cycles import open_cycle  # noqa: E402
from consensus.workflow.publish import publish_cycle  # noqa: E402
from consensus.methods.reconciliation import DEFAULT_RECONCILIATION, RECONCILIATION_METHODS  # noqa: E402
from consensus.workflow.run import RunSpec, run_cycle  # noqa: E402

LEVELS = ("item", "family_region", "family", "total")
LEVEL_NAMES = {"item": "item × location", "family_region": "family × region", "family": "family", "total": "total"}
BAND_LEVELS = (0.8, 0.95)
COVERAGE_TOLERANCE = 0.05


def prepare_store(db_file: Path) -> list[str]:
    """The demo inputs loaded and backcast into ``db_file``, no consensus run yet; returns the past cycles."""
    inputs = sample_inputs_dir()
    manifest = json.loads((inputs / "manifest.json").read_text(encoding="utf-8"))
    if db_file.exists():
        db_file.unlink()
    url = f"sqlite:///{db_file}"
    get_engine.cache_clear()
    with session_scope(url) as session:
        session.add(Setting(key="company", value=manifest["company"]))
    horizon = int(manifest.get("horizon", 18))
    for name in [*manifest["past_cycles"], manifest["current_cycle"]]:
        open_cycle(name, horizon=horizon, url=url)
    for entry in manifest["files"]:
        path = inputs / entry["path"]
        kind, by = entry["kind"], entry.get("submitted_by", "")
        if kind in ("items", "locations", "bom"):
            load_master_file(path, kind=kind, url=url, submitted_by=by)
        elif kind == "actuals":
            load_actuals_file(path, url=url, submitted_by=by)
        else:
            try:
                submit_file(path, url=url, source=entry.get("source"), cycle=entry.get("cycle"), submitted_by=by)
            except InputRejected:
                if entry.get("expect") != "rejected":
                    raise
    first_past = manifest["past_cycles"][0]
    backcast_cycles(periods.shift_month(first_past, -12), periods.shift_month(first_past, -1), horizon=horizon,
                    url=url)
    get_engine.cache_clear()
    return list(manifest["past_cycles"])


def run_method(base: str, target: str, method: str, cycles: list[str]) -> tuple[str, float]:
    """Copy the prepared store and run + publish each past cycle in order with ``method``."""
    shutil.copyfile(base, target)
    get_engine.cache_clear()
    url = f"sqlite:///{target}"
    started = time.perf_counter()
    for name in cycles:
        run_cycle(name, url=url, spec=RunSpec(reconciliation=method))
        publish_cycle(name, url=url)
    get_engine.cache_clear()
    return method, time.perf_counter() - started


def published_lines(db_file: str) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """Every published run's consensus and bands as [cycle, item, location, period, consensus, bands…]."""
    get_engine.cache_clear()
    with session_scope(f"sqlite:///{db_file}") as session:
        cr, cl = ConsensusRun.__table__, ConsensusLine.__table__
        columns = ["cycle", "item", "location", "period", "consensus", "lower_80", "upper_80", "lower_95", "upper_95"]
        lines = frames.read_frame(session, select(cr.c.cycle, cl.c.item, cl.c.location, cl.c.period, cl.c.consensus,
                                                  cl.c.lower_80, cl.c.upper_80, cl.c.lower_95, cl.c.upper_95)
                                  .join(cr, cr.c.id == cl.c.run_id).where(cr.c.status == "published"), columns)
        actuals = frames.load_actuals(session)
        items, locations = frames.load_items(session), frames.load_locations(session)
    get_engine.cache_clear()
    return lines, actuals, items, locations


def score_levels(lines: pd.DataFrame, actuals: pd.DataFrame, items, locations,
                 method: str) -> tuple[dict, pd.DataFrame]:
    """WAPE % per level, and the cell errors with their bands."""
    forecasts = lines.rename(columns={"consensus": "quantity"}).assign(source=method)
    errors = accuracy.forecast_errors(forecasts, actuals)
    total_actual = float(errors["actual"].sum())
    wape = {}
    for level in LEVELS:
        table = accuracy.accuracy_table(errors, level=level, items=items, locations=locations, by=("source",))
        # Σ over groups of Σ|group error| = Σ (MAD · n); over the same actuals, so levels compare.
        wape[LEVEL_NAMES[level]] = 100 * float((table["mad"] * table["n"]).sum()) / total_actual
    banded = errors.merge(lines.drop(columns="consensus"), on=["cycle", "item", "location", "period"], how="left")
    return wape, banded


def per_cycle_wape(banded: pd.DataFrame, items, locations) -> pd.DataFrame:
    """WAPE % of each cycle's consensus per level (cycles × levels), for paired comparisons."""
    per_cycle_actual = banded.groupby("cycle")["actual"].sum()
    out = {}
    for level in LEVELS:
        table = accuracy.accuracy_table(banded, level=level, items=items, locations=locations, by=("source", "cycle"))
        out[LEVEL_NAMES[level]] = 100 * (table["mad"] * table["n"]).groupby(table["cycle"]).sum() / per_cycle_actual
    return pd.DataFrame(out)


def paired_against_default(per_cycle: dict) -> pd.DataFrame:
    """Each method minus the default, per cycle: mean ± standard error, and in how many cycles it was better/worse."""
    rows = []
    base = per_cycle[DEFAULT_RECONCILIATION]
    for method, table in per_cycle.items():
        if method == DEFAULT_RECONCILIATION:
            continue
        for level in table.columns:
            d = (table[level] - base[level]).dropna()
            rows.append({"method": method, "level": level, "mean diff (points)": round(float(d.mean()), 3),
                         "std error": round(float(d.std(ddof=1) / np.sqrt(len(d))), 3) if len(d) > 1 else np.nan,
                         "better": int((d < -1e-9).sum()), "worse": int((d > 1e-9).sum()),
                         "same": int((d.abs() <= 1e-9).sum())})
    return pd.DataFrame(rows)


def coverage_table(banded: pd.DataFrame) -> pd.DataFrame:
    """Coverage and mean Winkler score per lag bucket and overall, at each band level."""
    rows = []
    groups = [(bucket, banded[banded["lag_bucket"] == bucket]) for bucket in
              [label for label, _, _ in periods.DEFAULT_LAG_BUCKETS]] + [("all", banded)]
    for bucket, group in groups:
        row = {"lag bucket": bucket}
        for level in BAND_LEVELS:
            pct = int(round(100 * level))
            lo, hi, y = group[f"lower_{pct}"], group[f"upper_{pct}"], group["actual"]
            keep = lo.notna() & hi.notna()
            row["n"] = int(keep.sum())
            row[f"cover {pct}%"] = round(100 * intervals.interval_coverage(lo[keep], hi[keep], y[keep]), 1)
            scores = intervals.winkler_score(lo[keep], hi[keep], y[keep], level=level)
            row[f"winkler {pct}%"] = round(float(np.mean(scores)), 1) if keep.any() else np.nan
        rows.append(row)
    return pd.DataFrame(rows)


def within_target(table: pd.DataFrame) -> bool:
    overall = table[table["lag bucket"] == "all"].iloc[0]
    return all(abs(overall[f"cover {int(round(100 * level))}%"] - 100 * level) <= 100 * COVERAGE_TOLERANCE
               for level in BAND_LEVELS)


def demo_backtest(workdir: Path, methods: list[str]) -> None:
    workdir.mkdir(parents=True, exist_ok=True)
    base = workdir / "prepared.db"
    started = time.perf_counter()
    cycles = prepare_store(base)
    print(f"demo inputs loaded and backcast in {time.perf_counter() - started:.0f} s; past cycles "
          f"{cycles[0]} … {cycles[-1]}; methods {', '.join(methods)}\n", flush=True)
    targets = {m: str(workdir / f"backtest_{m}.db") for m in methods}
    with ProcessPoolExecutor(max_workers=2) as pool:
        futures = [pool.submit(run_method, str(base), targets[m], m, cycles) for m in methods]
        timings = dict(f.result() for f in futures)
    wape_rows, coverage, per_cycle = {}, {}, {}
    for method in methods:
        lines, actuals, items, locations = published_lines(targets[method])
        wape_rows[method], banded = score_levels(lines, actuals, items, locations, method)
        coverage[method] = coverage_table(banded)
        per_cycle[method] = per_cycle_wape(banded, items, locations)
    wape = pd.DataFrame(wape_rows).T
    wape["seconds for 12 runs"] = [round(timings[m], 0) for m in wape.index]
    print("Consensus WAPE % on the demo's 12 past cycles (every lag with an actual), by level:")
    print(wape.round(2).to_string())
    best = wape["item × location"].idxmin()
    gap = 100 * (wape.loc[DEFAULT_RECONCILIATION, "item × location"] / wape.loc[best, "item × location"] - 1) \
        if DEFAULT_RECONCILIATION in wape.index else float("nan")
    print(f"\nbest at item × location: {best}; default {DEFAULT_RECONCILIATION} is {gap:.1f} % behind it "
          "(the default stays bottom_up unless another method wins by more than noise, ~2 %)")
    if DEFAULT_RECONCILIATION in per_cycle and len(per_cycle) > 1:
        print(f"\nPaired per cycle, method minus {DEFAULT_RECONCILIATION} (WAPE points; negative = better):")
        print(paired_against_default(per_cycle).to_string(index=False))
    for method in methods:
        print(f"\nBand coverage and Winkler score of the stored bands, {method} "
              f"(target: coverage within {100 * COVERAGE_TOLERANCE:.0f} points of nominal):")
        table = coverage[method]
        print(table.to_string(index=False))
        print("overall within target:", within_target(table))
    print(f"\nrerun: python bench/bench_backtest.py --workdir {workdir} --methods {' '.join(methods)}")


def synthetic_backtest(*, n_cells: int, seed: int) -> None:
    """Bands of a combined consensus on simulated sources, checked by rolling origin."""
    from bench_weights import HISTORY_CYCLES, SCENARIOS, SOURCES, simulate

    name, sigmas, biases = SCENARIOS[1]
    items, locations, actuals, forecasts, _ = simulate(sigmas, biases, n_cells=n_cells, seed=seed)
    errors = accuracy.forecast_errors(forecasts, actuals)
    spec = WeightSpec()
    consensus = []
    cycle_months = sorted(forecasts["cycle_m"].unique())
    for cycle_m in cycle_months[12:]:
        cycle = periods.month_name(cycle_m)
        aligned = forecasts[forecasts["cycle_m"] == cycle_m][["source", "item", "location", "period", "lag",
                                                             "quantity"]]
        weights = estimate_weights(errors, cycle=cycle, items=items, locations=locations, spec=spec, sources=SOURCES)
        combo = combine_sources(aligned, weights, items=items, locations=locations, spec=spec)
        consensus.append(combo.consensus[["item", "location", "period", "consensus"]].assign(cycle=cycle))
    table = pd.concat(consensus, ignore_index=True)
    own = accuracy.forecast_errors(table.rename(columns={"consensus": "quantity"}).assign(source="consensus"),
                                   actuals)
    first_test = periods.month_name(cycle_months[HISTORY_CYCLES - 6])
    rows = []
    for label, first, last in [*periods.DEFAULT_LAG_BUCKETS, ("all", 1, None)]:
        subset = own if label == "all" else own[own["lag_bucket"] == label]
        if subset.empty:
            continue
        result = intervals.backtest_bands(subset, levels=BAND_LEVELS, first_test_cycle=first_test)
        row = {"lag bucket": label}
        for r in result.itertuples(index=False):
            pct = int(round(100 * r.level))
            row["n"] = r.n
            row[f"cover {pct}%"] = round(100 * r.coverage, 1)
            row[f"winkler {pct}%"] = round(r.mean_winkler, 1)
        rows.append(row)
    out = pd.DataFrame(rows)
    print(f"\nSynthetic benchmark ({name}, {n_cells} cells, seed {seed}): consensus bands by rolling origin from "
          f"{first_test}, bands per lag bucket from the consensus's own past errors")
    print(out.to_string(index=False))
    print("overall within target:", within_target(out))
    print(f"rerun: python bench/bench_backtest.py --skip-demo --cells {n_cells} --seed {seed}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--workdir", type=Path, default=Path("/tmp/consensus_backtest"))
    parser.add_argument("--methods", nargs="+", default=list(RECONCILIATION_METHODS), choices=RECONCILIATION_METHODS)
    parser.add_argument("--skip-demo", action="store_true")
    parser.add_argument("--cells", type=int, default=800)
    parser.add_argument("--seed", type=int, default=20260101)
    args = parser.parse_args()
    if not args.skip_demo:
        demo_backtest(args.workdir, args.methods)
    synthetic_backtest(n_cells=args.cells, seed=args.seed)


if __name__ == "__main__":
    main()
