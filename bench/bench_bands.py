"""Error bands by level on the demo: the run's stored bands, and bands read off each level's own errors.

The sample company's 12 past cycles are replayed in order with the default
run specification, each plan fed to later cycles as published, exactly as
bench/bench_backtest.py does (its prepare_store, load_cycles and replay).
Then:

1. The stored item × location bands (rule "relative", one relative-error
   distribution per lag bucket) scored against the order history that came
   after each cycle: overall, on the cells with an order row only (what the
   pack's coverage table scores), and by forecast-size quintile.
2. Family and total bands as the pack makes them today, √Σ(item deviation²)
   of the stored item bands (independent errors), scored the same way.
3. A rolling origin on the published consensus's own errors
   (:func:`consensus.methods.intervals.backtest_bands_by_level`): each
   level's bands from that level's past errors, rule "relative" against
   "relative_by_size" and the MAD fallback of sparse groups with normal
   against Student t quantiles, coverage and mean Winkler score by level and lag
   bucket, and the item coverage by forecast-size quintile.

Target (the project's issue): 80 % and 95 % coverage within 5 points of
nominal at item × location, family and total.

Run:  python bench/bench_bands.py                      (about 1 minute on 2 cores)
      python bench/bench_bands.py --workdir /tmp/consensus_bands
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_backtest import MemoryCache, load_cycles, prepare_store, replay  # noqa: E402
from consensus.methods import accuracy, intervals  # noqa: E402
from consensus.methods.plan import RunSpec  # noqa: E402
from consensus.store import frames  # noqa: E402
from consensus.store.db import session_scope  # noqa: E402

NOMINALS = (0.8, 0.95)
#: (rule, few_errors) settings compared; the first is what the run uses today.
SETTINGS = (("relative", "normal"), ("relative_by_size", "normal"), ("relative", "student_t"),
            ("relative_by_size", "student_t"))
TOLERANCE = 0.05


def coverage(frame: pd.DataFrame, pct: int) -> float:
    return intervals.interval_coverage(frame[f"lower_{pct}"], frame[f"upper_{pct}"], frame["actual"])


def stored_item_table(banded: pd.DataFrame) -> pd.DataFrame:
    """Coverage of the stored item bands: all scored cells, cells with an order row, by size quintile."""
    rows = [("all scored cells", banded), ("cells with an order row", banded[banded["actual"] > 0])]
    size = pd.qcut(banded["forecast"], 5)
    rows += [(f"forecast {interval.left:.0f}–{interval.right:.0f}", group)
             for interval, group in banded.groupby(size, observed=True)]
    return pd.DataFrame([{"cells": name, "n": len(group),
                          "zero actual %": round(100 * float((group["actual"] == 0).mean()), 1),
                          **{f"cover {p}%": round(100 * coverage(group, p), 1) for p in (80, 95)}}
                         for name, group in rows])


def independence_table(banded: pd.DataFrame, items: pd.DataFrame) -> pd.DataFrame:
    """Family and total bands as √Σ(item deviation²) of the stored item bands, scored."""
    frame = banded.merge(items[["item", "family"]], on="item")
    for p in (80, 95):
        frame[f"dlo{p}"] = (frame["forecast"] - frame[f"lower_{p}"]) ** 2
        frame[f"dhi{p}"] = (frame[f"upper_{p}"] - frame["forecast"]) ** 2
    rows = []
    for level, keys in (("family", ["family"]), ("total", [])):
        columns = ["forecast", "actual", "dlo80", "dhi80", "dlo95", "dhi95"]
        summed = frame.groupby(["cycle", "period", *keys], as_index=False)[columns].sum()
        row = {"level": level, "n": len(summed)}
        for p in (80, 95):
            lo = summed["forecast"] - np.sqrt(summed[f"dlo{p}"])
            hi = summed["forecast"] + np.sqrt(summed[f"dhi{p}"])
            row[f"cover {p}%"] = round(100 * intervals.interval_coverage(lo, hi, summed["actual"]), 1)
        rows.append(row)
    return pd.DataFrame(rows)


def wide(table: pd.DataFrame) -> pd.DataFrame:
    """One row per level and lag bucket: n, coverage and Winkler score at each nominal level."""
    out = table.assign(cover=lambda d: (100 * d["coverage"]).round(1), winkler=lambda d: d["mean_winkler"].round(1),
                       pct=lambda d: (100 * d["nominal"]).round().astype(int))
    pivot = out.pivot_table(index=["level", "lag_bucket"], columns="pct", values=["cover", "winkler"], sort=False)
    pivot.columns = [f"{name} {pct}%" for name, pct in pivot.columns]
    n = out[out["nominal"] == NOMINALS[0]].set_index(["level", "lag_bucket"])["n"]
    return pivot.join(n).reset_index()[["level", "lag_bucket", "n", "cover 80%", "winkler 80%", "cover 95%",
                                        "winkler 95%"]]


def within_target(table: pd.DataFrame) -> bool:
    overall = table[table["lag_bucket"] == "all"]
    return bool((overall["coverage_gap"].abs() <= TOLERANCE).all())


def size_table(errors: pd.DataFrame) -> pd.DataFrame:
    """Item coverage by forecast-size quintile under each rule (rolling origin)."""
    rows = []
    for rule in intervals.BAND_RULES:
        banded = intervals.rolling_origin_bands(errors, levels=NOMINALS, rule=rule)
        size = pd.qcut(banded["forecast"], 5)
        for interval, group in banded.groupby(size, observed=True):
            rows.append({"rule": rule, "forecast": f"{interval.left:.0f}–{interval.right:.0f}", "n": len(group),
                         **{f"cover {p}%": round(100 * coverage(group, p), 1) for p in (80, 95)}})
    return pd.DataFrame(rows)


def published_lines(results: dict) -> pd.DataFrame:
    """[cycle, item, location, period, consensus, lower_80 … upper_95] of every replayed cycle's plan."""
    keep = ["item", "location", "period", "consensus", "lower_80", "upper_80", "lower_95", "upper_95"]
    return pd.concat([result["parts"]["cells"][keep].assign(cycle=name) for name, result in results.items()],
                     ignore_index=True)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--workdir", type=Path, default=Path("/tmp/consensus_bands"))
    args = parser.parse_args()
    args.workdir.mkdir(parents=True, exist_ok=True)
    started = time.perf_counter()
    cycles, url = prepare_store(args.workdir / "prepared.db")
    results = replay(load_cycles(url, cycles), RunSpec(), MemoryCache())
    lines = published_lines(results)
    with session_scope(url, write=False) as session:
        actuals = frames.load_actuals(session)
        items, locations = frames.load_items(session), frames.load_locations(session)
    actuals = actuals[actuals["quantity"].notna()]
    print(f"sample company prepared and {len(cycles)} cycles replayed in {time.perf_counter() - started:.0f} s "
          "(default run specification)\n")

    errors = accuracy.forecast_errors(lines.rename(columns={"consensus": "quantity"}).assign(source="consensus"),
                                      actuals)
    banded = errors.merge(lines.drop(columns="consensus"), on=["cycle", "item", "location", "period"], how="left")
    print("1. Stored item × location bands (rule 'relative'), scored on the demand that came:")
    print(stored_item_table(banded).to_string(index=False))
    print("\n2. Family and total bands as √Σ(item deviation²) of the stored item bands (independence):")
    print(independence_table(banded, items).to_string(index=False))

    print("\n3. Rolling origin on the published consensus's own errors, each level's bands from its own errors "
          f"(target: within {100 * TOLERANCE:.0f} points of nominal):")
    for rule, few_errors in SETTINGS:
        table = intervals.backtest_bands_by_level(errors, items=items, locations=locations, levels=NOMINALS, rule=rule,
                                                  few_errors=few_errors)
        print(f"\nrule '{rule}', few errors '{few_errors}':")
        print(wide(table).to_string(index=False))
        print("every level within target:", within_target(table))
    print("\nItem coverage by forecast-size quintile, rolling origin:")
    print(size_table(errors).to_string(index=False))
    print(f"\nrerun: python bench/bench_bands.py --workdir {args.workdir}")


if __name__ == "__main__":
    main()
