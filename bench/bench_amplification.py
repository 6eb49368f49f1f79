"""Order amplification: the demo's DCs, the Chen et al. bound on simulated policies, and time on a large input.

1. The demo's DC forecasts (sample_inputs/past/dc_history.csv, 12 cycles) and
   order history: :func:`consensus.methods.amplification.measure_amplification`
   per DC (min_months 6, since 12 cycles give 11 months of implied orders).
2. Simulated order-up-to policies with a p-month moving-average forecast and
   lead time L on i.i.d. normal demand (Chen, Drezner, Ryan & Simchi-Levi
   2000): the measured ratio against the bound 1 + 2L/p + 2L²/p², with a
   constant safety stock (the bound is exact) and with z·σ̂ re-estimated each
   cycle (above the bound).
3. Time and peak memory of measure_amplification on 4 DCs × 2,500 items ×
   36 cycles × 18 lags (6.5 million forecast rows).

Run:  python bench/bench_amplification.py
"""

from __future__ import annotations

import argparse
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from consensus.methods.amplification import chen_bound, measure_amplification  # noqa: E402
from consensus.periods import month_index, month_names  # noqa: E402
from consensus.resources import sample_inputs_dir  # noqa: E402


def demo_table() -> pd.DataFrame:
    inputs = sample_inputs_dir()
    forecasts = pd.read_csv(inputs / "past" / "dc_history.csv", dtype={"cycle": str, "period": str})
    orders = pd.read_csv(inputs / "history" / "orders.csv", dtype={"date": str})
    orders["period"] = orders["date"].str[:7]
    actuals = orders.groupby(["item", "location", "period"], as_index=False)["quantity"].sum()
    return measure_amplification(forecasts, actuals, min_months=6)


def simulate(p: int, lead: int, z: float, *, n_items: int = 300, n_months: int = 240, seed: int = 0):
    """i.i.d. N(100, 10²) demand; every lag forecast = p-month mean, plus z·σ̂·√L/L safety stock per lag."""
    rng = np.random.default_rng(seed)
    d = rng.normal(100.0, 10.0, size=(n_items, n_months))
    windows = np.lib.stride_tricks.sliding_window_view(d, p, axis=1)
    per_lag = windows.mean(axis=2) + (z * windows.std(axis=2, ddof=1) * np.sqrt(lead) / lead if p > 1 else 0.0)
    first = month_index("2010-01")
    cycles = np.arange(p - 1, n_months)
    items = np.array([f"IT-{i:04d}" for i in range(n_items)])
    forecasts = pd.concat([pd.DataFrame({"cycle": np.tile(month_names(first + cycles), n_items),
                                         "item": np.repeat(items, len(cycles)), "location": "DC-SIM",
                                         "period": np.tile(month_names(first + cycles + lag), n_items),
                                         "quantity": per_lag.ravel()}) for lag in range(1, lead + 1)],
                          ignore_index=True)
    actuals = pd.DataFrame({"item": np.repeat(items, n_months), "location": "DC-SIM",
                            "period": np.tile(month_names(first + np.arange(n_months)), n_items),
                            "quantity": d.ravel()})
    return forecasts, actuals


def simulation_table() -> pd.DataFrame:
    rows = []
    for p in (3, 6, 12):
        for lead in (1, 2, 3):
            row = {"p": p, "L": lead, "bound": round(chen_bound(p, lead), 3)}
            for z in (0.0, 1.65):
                forecasts, actuals = simulate(p, lead, z, seed=100 * p + lead)
                ratio = measure_amplification(forecasts, actuals, moving_average_months=p,
                                              lead_time_months=lead).iloc[0]["ratio"]
                row[f"ratio z={z:g}"] = round(float(ratio), 3)
            rows.append(row)
    return pd.DataFrame(rows)


def large_input(n_items: int = 2500, n_cycles: int = 36, horizon: int = 18, seed: int = 1):
    rng = np.random.default_rng(seed)
    dcs = [f"DC-{k}" for k in range(4)]
    first = month_index("2024-01")
    cells = pd.MultiIndex.from_product([[f"IT-{i:05d}" for i in range(n_items)], dcs], names=["item", "location"])
    cells = cells.to_frame(index=False)
    n_cells = len(cells)
    cycle = np.repeat(np.arange(n_cycles), horizon)
    lag = np.tile(np.arange(1, horizon + 1), n_cycles)
    forecasts = pd.DataFrame({"item": np.repeat(cells["item"].to_numpy(), n_cycles * horizon),
                              "location": np.repeat(cells["location"].to_numpy(), n_cycles * horizon),
                              "cycle": np.tile(month_names(first + cycle), n_cells),
                              "period": np.tile(month_names(first + cycle + lag), n_cells),
                              "lag": np.tile(lag, n_cells),
                              "quantity": rng.gamma(2.0, 20.0, size=n_cells * n_cycles * horizon)})
    months = n_cycles + horizon
    actuals = pd.DataFrame({"item": np.repeat(cells["item"].to_numpy(), months),
                            "location": np.repeat(cells["location"].to_numpy(), months),
                            "period": np.tile(month_names(first + np.arange(months)), n_cells),
                            "quantity": rng.poisson(40, size=n_cells * months).astype(float)})
    return forecasts, actuals


def main() -> None:
    argparse.ArgumentParser(description=__doc__.splitlines()[0],
                            formatter_class=argparse.RawDescriptionHelpFormatter).parse_args()
    pd.set_option("display.width", 200)
    pd.set_option("display.max_colwidth", 200)
    print("1. Demo DCs (12 cycles of submitted forecasts, L = 1, p = 12, flag at 1.5 × the bound):")
    table = demo_table()
    print(table.drop(columns="explanation").round(3).to_string(index=False))
    for sentence in table["explanation"]:
        print("  ", sentence)
    print("\n2. Simulated order-up-to policies, 300 items × 240 months each (Chen et al. 2000: the ratio equals the "
          "bound with a constant safety stock, exceeds it when σ̂ is re-estimated):")
    print(simulation_table().to_string(index=False))
    forecasts, actuals = large_input()
    tracemalloc.start()
    started = time.perf_counter()
    measure_amplification(forecasts, actuals)
    seconds = time.perf_counter() - started
    peak = tracemalloc.get_traced_memory()[1] / 2**20
    tracemalloc.stop()
    print(f"\n3. {len(forecasts):,} forecast rows, {len(actuals):,} actual rows: {seconds:.1f} s, "
          f"peak traced memory {peak:.0f} MiB")
    print("\nrerun: python bench/bench_amplification.py")


if __name__ == "__main__":
    main()
