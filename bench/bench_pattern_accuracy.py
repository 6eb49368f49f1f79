"""Accuracy by demand pattern on the demo: the DCs' submitted forecasts scored apart for each pattern.

The demo's DC forecasts (sample_inputs/past/dc_history.csv, 12 cycles) are
paired with the order history (:func:`consensus.methods.accuracy.
forecast_errors`), each item × DC is classed by the Syntetos–Boylan–Croston
pattern of its history up to the first cycle
(:func:`consensus.methods.demand_pattern.classify_demand`), and
:func:`consensus.methods.accuracy.accuracy_by_pattern` reports WAPE, MASE
(one-step naive scale on the same history, Hyndman & Koehler 2006) and bias
per pattern and lag bucket.  Also times the scoring on 20,000 series × 12
cycles × 18 lags of invented errors, against the item scorecard
(:func:`consensus.methods.accuracy.accuracy_table`) on the same errors.

Run:  python bench/bench_pattern_accuracy.py
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from consensus.methods import accuracy  # noqa: E402
from consensus.methods.demand_pattern import classify_demand  # noqa: E402
from consensus.methods.statistical import build_demand_matrix  # noqa: E402
from consensus.periods import lag_bucket_labels  # noqa: E402
from consensus.resources import sample_inputs_dir  # noqa: E402


def demo_table() -> pd.DataFrame:
    inputs = sample_inputs_dir()
    forecasts = pd.read_csv(inputs / "past" / "dc_history.csv", dtype={"cycle": str, "period": str})
    orders = pd.read_csv(inputs / "history" / "orders.csv", dtype={"date": str})
    orders["period"] = orders["date"].str[:7]
    actuals = orders.groupby(["item", "location", "period"], as_index=False)["quantity"].sum()
    first_cycle = forecasts["cycle"].min()
    history = actuals[actuals["period"] <= first_cycle]
    matrix = build_demand_matrix(history, cycle=first_cycle)
    patterns = matrix.keys.assign(pattern=classify_demand(matrix.y, matrix.start))
    errors = accuracy.forecast_errors(forecasts.assign(source="dc"), actuals)
    return accuracy.accuracy_by_pattern(errors, patterns, history, by=("source",))


def timing(n_series: int = 20_000, seed: int = 3) -> tuple[int, float]:
    rng = np.random.default_rng(seed)
    items = np.array([f"IT-{i:05d}" for i in range(n_series)])
    n = n_series * 12 * 18
    cycles = np.repeat([f"2025-{m:02d}" for m in range(1, 13)], 18)
    periods = [f"{2025 + (m + lag) // 12}-{(m + lag) % 12 + 1:02d}" for m in range(12) for lag in range(1, 19)]
    errors = pd.DataFrame({"source": "dc", "cycle": np.tile(cycles, n_series), "item": np.repeat(items, 12 * 18),
                           "location": "DC-1", "period": np.tile(periods, n_series),
                           "lag_bucket": np.tile(lag_bucket_labels(np.arange(1, 19)), n_series * 12),
                           "forecast": rng.gamma(2, 10, n), "actual": rng.poisson(20, n).astype(float)})
    months = [f"{2022 + m // 12}-{m % 12 + 1:02d}" for m in range(36)]
    history = pd.DataFrame({"item": np.repeat(items, 36), "location": "DC-1", "period": np.tile(months, n_series),
                            "quantity": rng.poisson(20, n_series * 36).astype(float)})
    patterns = pd.DataFrame({"item": items, "location": "DC-1",
                             "pattern": rng.choice(["smooth", "erratic", "intermittent", "lumpy"], n_series)})
    started = time.perf_counter()
    accuracy.accuracy_by_pattern(errors, patterns, history)
    seconds = time.perf_counter() - started
    started = time.perf_counter()  # the item scorecard on the same errors, as a yardstick in the same process
    accuracy.accuracy_table(errors, level="item", items=pd.DataFrame(columns=["item", "family"]),
                            locations=pd.DataFrame(columns=["location", "region"]))
    return n, seconds, time.perf_counter() - started


def main() -> None:
    argparse.ArgumentParser(description=__doc__.splitlines()[0],
                            formatter_class=argparse.RawDescriptionHelpFormatter).parse_args()
    print("DC forecasts of the demo by demand pattern (WAPE and bias in %, MASE against the one-step naive):")
    print(demo_table().round(2).to_string(index=False))
    n, seconds, reference = timing()
    print(f"\nscoring {n:,} errors of 20,000 series by source, lag bucket and pattern: {seconds:.1f} s; "
          f"accuracy_table at item level on the same errors: {reference:.1f} s (ratio {seconds / reference:.2f})")
    print("\nrerun: python bench/bench_pattern_accuracy.py")


if __name__ == "__main__":
    main()
