"""Backtest on the sample company: the consensus against every single source at every level, and its bands.

The sample company's inputs are loaded once into a store (intake and the
statistical forecasts of past cycles, as ``consensus demo`` does, without the pack).  Then
each RunSpec asked for replays the 12 past cycles in order straight through
:func:`consensus.methods.plan.compute_plan`, no store in between: each
cycle's result is fed to the later cycles as its published plan
(``CycleInputs.published``), as publishing it in the store would.  The
statistical fits and aligned sources do not depend on the spec, so one
in-memory cache serves every spec.

Each cycle's plan and each source it combined (the ``value_<source>``
columns of the cells) are scored against the order history that came after
the cycle (every lag with an actual, months ≤ the last known month):

* WAPE % = 100 · Σ|A − F| / Σ A at item × location, family × region, family
  and total, group totals per cycle and month (so errors of cells partly
  cancel at the upper levels).  A source is scored on the cells it forecast;
  the consensus beside it on the same cells, so the two compare like for
  like, and the consensus overall on all its cells.
* coverage of the 80 % and 95 % bands (share of actuals inside) and the mean
  Winkler interval score (Winkler 1972; Gneiting & Raftery 2007, eq. 43),
  by level and lag bucket: item × location from the cells' bands, family and
  total from the run's ``level_bands`` part where it has one.

Run:  python bench/bench_backtest.py                         (the default spec, under a minute)
      python bench/bench_backtest.py --specs before default     (the old settings beside the new)
      python bench/bench_backtest.py --specs default --spec 'k2={"bias": {"shrinkage_cycles": 2}}'
                                                                (any setting over the default)
      python bench/bench_backtest.py --quiet --by-lag            (where a miss comes from: level × lag bucket)
      python bench/bench_backtest.py --quiet --score-from 2026-02  (also scored on the later cycles only)
"""

from __future__ import annotations

import argparse
import copy
import json
import sys
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd

# Run from a source checkout without installing: the package sits one folder up.
sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from consensus import periods  # noqa: E402
from consensus.errors import InputRejected  # noqa: E402
from consensus.intake.submission import load_actuals_file, load_master_file, submit_file  # noqa: E402
from consensus.methods import accuracy, intervals  # noqa: E402
from consensus.methods.plan import RunSpec, compute_plan  # noqa: E402
from consensus.resources import sample_inputs_dir  # noqa: E402
from consensus.store import frames  # noqa: E402
from consensus.store.db import get_engine, session_scope  # noqa: E402
from consensus.store.models import Setting  # noqa: E402
from consensus.vocabulary import combined_sources  # noqa: E402
from consensus.workflow.past_cycles import open_past_cycles  # noqa: E402
from consensus.workflow.cycles import open_cycle  # noqa: E402
from consensus.workflow.inputs import PUBLISHED_CELL_COLUMNS, load_plan_inputs  # noqa: E402

LEVELS = ("item", "family_region", "family", "total")
LEVEL_NAMES = {"item": "item × location", "family_region": "family × region", "family": "family", "total": "total"}
BAND_LEVELS = (0.8, 0.95)
COVERAGE_TOLERANCE = 0.05


# --------------------------------------------------------------------------- the store, once


def prepare_store(db_file: Path) -> tuple[list[str], str]:
    """The sample inputs loaded, with past cycles opened, into ``db_file``, no run yet; returns the past cycles' names and url."""
    inputs = sample_inputs_dir()
    manifest = json.loads((inputs / "manifest.json").read_text(encoding="utf-8"))
    url = f"sqlite:///{db_file}"
    done = db_file.with_name(db_file.name + ".done")  # a store left half-made by an interrupted run is rebuilt
    if db_file.exists() and done.exists():
        return list(manifest["past_cycles"]), url
    get_engine.cache_clear()
    for stale in (db_file, db_file.with_name(db_file.name + "-wal"), db_file.with_name(db_file.name + "-shm")):
        stale.unlink(missing_ok=True)
    build = url
    with session_scope(build) as session:
        session.add(Setting(key="company", value=manifest["company"]))
    horizon = int(manifest.get("horizon", 18))
    first = [e for e in manifest["files"] if e["kind"] in ("items", "locations", "bom", "actuals")]
    for entry in first:
        path, by = inputs / entry["path"], entry.get("submitted_by", "")
        if entry["kind"] == "actuals":
            load_actuals_file(path, url=build, submitted_by=by)
        else:
            load_master_file(path, kind=entry["kind"], url=build, submitted_by=by)
    for name in [*manifest["past_cycles"], manifest["current_cycle"]]:
        open_cycle(name, horizon=horizon, url=build)
    for entry in manifest["files"]:
        if entry in first:
            continue
        try:
            submit_file(inputs / entry["path"], url=build, source=entry.get("source"), cycle=entry.get("cycle"),
                        submitted_by=entry.get("submitted_by", ""))
        except InputRejected:
            if entry.get("expect") != "rejected":
                raise
    first_past = manifest["past_cycles"][0]
    open_past_cycles(periods.shift_month(first_past, -12), periods.shift_month(first_past, -1), horizon=horizon,
                     url=build)
    get_engine.cache_clear()
    done.write_text("prepared\n", encoding="utf-8")
    return list(manifest["past_cycles"]), url


class MemoryCache:
    """A :class:`consensus.methods.plan.Cache` in a dict (packed bytes, as the store keeps them), shared by every
    spec of one backtest."""

    def __init__(self):
        self.entries: dict[str, bytes] = {}

    def get(self, key: str) -> bytes | None:
        return self.entries.get(key)

    def put(self, key: str, *, kind: str, cycle: str, content: bytes, durable: bool = True) -> None:
        self.entries[key] = content


def load_cycles(url: str, cycles: list[str]) -> dict:
    """Each cycle's PlanInputs as the store holds them (nothing published yet)."""
    return {name: load_plan_inputs(name, url=url, spec=RunSpec(), require_open=False).inputs for name in cycles}


def replay(loaded: dict, spec: RunSpec, cache: MemoryCache) -> dict[str, dict]:
    """Compute every cycle in order, each result fed to the later cycles as their published plan."""
    published: dict[str, pd.DataFrame] = {}
    results = {}
    for name, inputs in loaded.items():
        past = tuple(replace(c, published=published.get(c.name), published_run=None) for c in inputs.past)
        result = compute_plan(replace(inputs, past=past), spec, cache=cache)
        cells = result.parts["cells"]
        published[name] = cells[[c for c in PUBLISHED_CELL_COLUMNS if c in cells.columns]].copy()
        results[name] = {"parts": result.parts, "notes": result.notes}
    return results


# --------------------------------------------------------------------------- scoring


def _with_hierarchy(frame: pd.DataFrame, items: pd.DataFrame, locations: pd.DataFrame) -> pd.DataFrame:
    family = items.drop_duplicates("item").set_index("item")["family"]
    region = locations.drop_duplicates("location").set_index("location")["region"]
    return frame.assign(family=frame["item"].map(family).fillna("?"), region=frame["location"].map(region)
                        .fillna("?"), all="all")


LEVEL_KEYS = {"item": ["item", "location"], "family_region": ["family", "region"], "family": ["family"],
              "total": ["all"]}


def cell_errors(results: dict, actuals: pd.DataFrame, items, locations) -> pd.DataFrame:
    """[cycle, item, location, period, lag, lag_bucket, actual, consensus, value_<source>…, bands…] of every scored cell."""
    rows = []
    for name, result in results.items():
        cells = result["parts"]["cells"]
        rows.append(cells.assign(cycle=name))
    cells = pd.concat(rows, ignore_index=True)
    scored = accuracy.forecast_errors(cells.rename(columns={"consensus": "quantity"}).assign(source="consensus"),
                                      actuals)
    keep = scored[["cycle", "item", "location", "period", "lag", "lag_bucket", "actual"]]
    out = keep.merge(cells, on=["cycle", "item", "location", "period"], how="left")
    return _with_hierarchy(out, items, locations)


def wape_by_level(errors: pd.DataFrame, sources: list[str]) -> pd.DataFrame:
    """Level × (consensus, each source, consensus on that source's cells) WAPE %."""
    rows = []
    for level in LEVELS:
        keys = ["cycle", "period", *LEVEL_KEYS[level]]
        row = {"level": LEVEL_NAMES[level]}
        g = errors.groupby(keys, sort=False)[["consensus", "actual"]].sum()
        row["consensus"] = 100 * float((g["actual"] - g["consensus"]).abs().sum() / g["actual"].sum())
        for source in sources:
            column = f"value_{source}"
            if column not in errors:
                continue
            mine = errors[errors[column].notna()]
            g = mine.groupby(keys, sort=False)[[column, "consensus", "actual"]].sum()
            row[source] = 100 * float((g["actual"] - g[column]).abs().sum() / g["actual"].sum())
            row[f"consensus on {source}'s cells"] = 100 * float((g["actual"] - g["consensus"]).abs().sum()
                                                                / g["actual"].sum())
        rows.append(row)
    return pd.DataFrame(rows).set_index("level")


def wape_by_lag(errors: pd.DataFrame, sources: list[str]) -> pd.DataFrame:
    """Level × lag bucket × source: the source's WAPE % on its cells beside the consensus on the same cells.

    Says at which lags a miss of :func:`wape_by_level` comes from; a lag bucket is a lag of a cycle, so the
    groups are those of the level table split by lag.
    """
    rows = []
    for bucket, part in errors.groupby("lag_bucket", sort=True):
        table = wape_by_level(part, sources)
        for source in sources:
            if source not in table:
                continue
            for level, row in table.iterrows():
                rows.append({"level": level, "lag bucket": bucket, "source": source, "source WAPE": row[source],
                             "consensus on its cells": row[f"consensus on {source}'s cells"]})
    out = pd.DataFrame(rows)
    out["gap"] = out["consensus on its cells"] - out["source WAPE"]
    order = {name: k for k, name in enumerate(LEVEL_NAMES.values())}
    return out.sort_values(["source", "level", "lag bucket"], key=lambda c: c.map(order) if c.name == "level" else c,
                           kind="mergesort", ignore_index=True)


def misses(table: pd.DataFrame, sources: list[str]) -> list[str]:
    """Where the consensus is worse than a single source on that source's cells (points of WAPE)."""
    out = []
    for level, row in table.iterrows():
        for source in sources:
            if source not in row or pd.isna(row[source]):
                continue
            gap = row[f"consensus on {source}'s cells"] - row[source]
            if gap > 1e-9:
                mine = row[f"consensus on {source}'s cells"]
                out.append(f"{level}: consensus {mine:.2f} % against {source} {row[source]:.2f} % "
                           f"(+{gap:.2f} points)")
    return out


def band_scores(errors: pd.DataFrame, results: dict, actuals: pd.DataFrame, items, locations) -> pd.DataFrame:
    """Coverage and Winkler by level (item × location, family, total) and lag bucket."""
    tables = []
    tables.append(_coverage(errors, "item × location"))
    level_rows = [r["parts"]["level_bands"].assign(cycle=name) for name, r in results.items()
                  if "level_bands" in r["parts"] and len(r["parts"]["level_bands"])]
    if level_rows:
        bands = pd.concat(level_rows, ignore_index=True)
        for level in ("family", "total"):
            mine = bands[bands["level"] == level]
            if mine.empty:
                continue
            observed = _level_actuals(errors, level).drop(columns="lag")
            scored = mine.rename(columns={"node": LEVEL_KEYS[level][0]}).merge(
                observed, on=["cycle", "period", LEVEL_KEYS[level][0]], how="inner")
            tables.append(_coverage(scored, f"{level} (own errors)"))
    for level in ("family", "total"):  # what the pack used to print, for comparison
        tables.append(_coverage(_independence_bands(errors, level), f"{level} (√Σ item deviations²)"))
    return pd.concat(tables, ignore_index=True)


def _level_actuals(errors: pd.DataFrame, level: str) -> pd.DataFrame:
    keys = ["cycle", "period", *LEVEL_KEYS[level]]
    return errors.groupby(keys, sort=True).agg(actual=("actual", "sum"), lag=("lag", "first")).reset_index()


def _independence_bands(errors: pd.DataFrame, level: str) -> pd.DataFrame:
    """The old pack's family band: consensus ± √Σ(item half-width²), as a comparison."""
    keys = ["cycle", "period", *LEVEL_KEYS[level]]
    frame = errors.copy()
    for pct in (80, 95):
        frame[f"_lo{pct}"] = (frame["consensus"] - frame[f"lower_{pct}"]) ** 2
        frame[f"_hi{pct}"] = (frame[f"upper_{pct}"] - frame["consensus"]) ** 2
    g = frame.groupby(keys, sort=True)
    out = g.agg(consensus=("consensus", "sum"), actual=("actual", "sum"), lag=("lag", "first"),
                **{f"_lo{p}": (f"_lo{p}", "sum") for p in (80, 95)},
                **{f"_hi{p}": (f"_hi{p}", "sum") for p in (80, 95)}).reset_index()
    for pct in (80, 95):
        out[f"lower_{pct}"] = np.maximum(out["consensus"] - np.sqrt(out[f"_lo{pct}"]), 0)
        out[f"upper_{pct}"] = out["consensus"] + np.sqrt(out[f"_hi{pct}"])
    return out


def _coverage(frame: pd.DataFrame, level: str) -> pd.DataFrame:
    frame = frame.assign(lag_bucket=periods.lag_bucket_labels(frame["lag"].to_numpy()))
    rows = []
    buckets = [label for label, _, _ in periods.DEFAULT_LAG_BUCKETS]
    for bucket in [*buckets, "all"]:
        group = frame if bucket == "all" else frame[frame["lag_bucket"] == bucket]
        if group.empty:
            continue
        row = {"level": level, "lag bucket": bucket}
        for nominal in BAND_LEVELS:
            pct = int(round(100 * nominal))
            lo, hi, y = group[f"lower_{pct}"], group[f"upper_{pct}"], group["actual"]
            keep = (lo.notna() & hi.notna()).to_numpy()
            row["n"] = int(keep.sum())
            row[f"cover {pct}%"] = round(100 * intervals.interval_coverage(lo[keep], hi[keep], y[keep]), 1) \
                if keep.any() else np.nan
            row[f"winkler {pct}%"] = round(float(np.mean(intervals.winkler_score(lo[keep], hi[keep], y[keep],
                                                                                 level=nominal))), 1) \
                if keep.any() else np.nan
        rows.append(row)
    return pd.DataFrame(rows)


def bands_within_target(table: pd.DataFrame) -> list[str]:
    """Levels whose overall coverage is more than 5 points from nominal (the stored bands; not the old √Σ rows)."""
    out = []
    for _, row in table[(table["lag bucket"] == "all") & ~table["level"].str.contains("√")].iterrows():
        for nominal in BAND_LEVELS:
            pct = int(round(100 * nominal))
            value = row[f"cover {pct}%"]
            if not abs(value - 100 * nominal) <= 100 * COVERAGE_TOLERANCE:
                out.append(f"{row['level']} {pct}%: {value:.1f} %")
    return out


# --------------------------------------------------------------------------- specs


def spec_over_default(overrides: dict) -> RunSpec:
    """The default RunSpec with ``overrides`` (nested dicts for weights and bias) laid over it."""
    data = RunSpec().to_dict()
    for key, value in overrides.items():
        if isinstance(value, dict):
            data[key] = {**data[key], **value}
        else:
            data[key] = value
    return RunSpec.from_dict(data)


def named_specs() -> dict[str, RunSpec]:
    """The specs the command line can ask for by name."""
    from consensus.methods.bias import BiasSpec
    from consensus.methods.weights import WeightSpec

    return {
        "default": RunSpec(),
        # the settings before persistent-bias correction, level bands and size-class item bands
        "before": RunSpec(bias=BiasSpec(mode="off"), weights_from="cells", band_rule="relative"),
        "no_bias": RunSpec(bias=BiasSpec(mode="off")),
        "segment_totals": RunSpec(weights_from="segment_totals"),
        "mint_shrink": RunSpec(reconciliation="mint_shrink"),
        "additive_bias": RunSpec(weights=WeightSpec(bias_correction=True), bias=BiasSpec(mode="off")),
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--workdir", type=Path, default=Path("/tmp/consensus_backtest"))
    parser.add_argument("--specs", nargs="*", default=["default"])
    parser.add_argument("--spec", action="append", default=[], metavar="NAME=JSON",
                        help='a further spec: settings over the default, e.g. x=\'{"weights": {"min_cycles": 2}}\'')
    parser.add_argument("--quiet", action="store_true", help="the WAPE table and the verdicts only")
    parser.add_argument("--by-lag", action="store_true",
                        help="also the WAPE of the consensus against each source by level and lag bucket")
    parser.add_argument("--score-from", metavar="CYCLE",
                        help="also the WAPE table on the cycles from CYCLE on (the first replayed cycles have "
                             "no error record to weigh the sources by)")
    args = parser.parse_args()
    specs = named_specs()
    for text in args.spec:
        name, _, body = text.partition("=")
        specs[name] = spec_over_default(json.loads(body))
        args.specs.append(name)
    unknown = [s for s in args.specs if s not in specs]
    if unknown:
        parser.error(f"unknown spec(s) {unknown}; choose from {sorted(specs)}")
    args.workdir.mkdir(parents=True, exist_ok=True)
    started = time.perf_counter()
    cycles, url = prepare_store(args.workdir / "prepared.db")
    loaded = load_cycles(url, cycles)
    with session_scope(url, write=False) as session:
        actuals = frames.load_actuals(session)
        items, locations = frames.load_items(session), frames.load_locations(session)
    print(f"sample company loaded in {time.perf_counter() - started:.0f} s; past cycles {cycles[0]} … {cycles[-1]}",
          flush=True)
    cache = MemoryCache()
    sources = list(combined_sources())
    for name in args.specs:
        spec = specs[name]
        started = time.perf_counter()
        results = replay(loaded, spec, cache)
        seconds = time.perf_counter() - started
        errors = cell_errors(results, actuals, items, locations)
        table = wape_by_level(errors, sources)
        print(f"\n== spec '{name}' ({seconds:.0f} s for {len(cycles)} cycles): {json.dumps(spec.to_dict())}")
        print("WAPE % by level: the consensus overall; each source on the cells it forecast, and the consensus "
              "on the same cells")
        print(table.round(2).T.to_string())
        print("consensus worse than a single source:", misses(table, sources) or "nowhere")
        if args.score_from:
            later = errors[errors["cycle"] >= args.score_from]
            if later.empty:
                parser.error(f"--score-from {args.score_from}: no replayed cycle from then on "
                             f"({cycles[0]} … {cycles[-1]})")
            table = wape_by_level(later, sources)
            print(f"\nWAPE % by level on the cycles from {args.score_from} on")
            print(table.round(2).T.to_string())
            print("consensus worse than a single source:", misses(table, sources) or "nowhere")
        if args.by_lag:
            print("\nWAPE % by level and lag bucket: each source on its cells, the consensus on the same cells "
                  "(gap > 0: the consensus is behind)")
            print(wape_by_lag(errors, sources).round(2).to_string(index=False))
        bands = band_scores(errors, results, actuals, items, locations)
        if args.quiet:
            print("band levels outside the target:", bands_within_target(bands) or "none")
            continue
        print("\nBand coverage % and mean Winkler score by level and lag bucket "
              f"(target: within {100 * COVERAGE_TOLERANCE:.0f} points of nominal)")
        print(bands.to_string(index=False))
        print("levels outside the target:", bands_within_target(bands) or "none")
    print(f"\nrerun: python bench/bench_backtest.py --workdir {args.workdir} --specs {' '.join(args.specs)}")


if __name__ == "__main__":
    main()
