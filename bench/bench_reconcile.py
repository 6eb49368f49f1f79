"""Benchmark: reconcile 20,000 bottom series × 18 months with every method; prints time and peak memory.

Invented shape: 100 families × 20 items = 2,000 items, stocked at 10 locations in
3 regions, so 20,000 item × location series and, with every crossed level,
29,414 nodes.  Base forecasts are noisy, incoherent versions of a synthetic
truth; residuals are 24 months of synthetic one-step errors (fixed seed)
with a shared component, so MinT's shrinkage has something to shrink.

Target: each method under 30 s and the process under 4 GB on 2 cores.
Peak memory per method is traced with tracemalloc (numpy and scipy buffers
report to it); the process's peak resident set is printed at the end.

Run:  python bench/bench_reconcile.py
"""

from __future__ import annotations

import argparse
import resource
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from consensus.methods.reconcile import METHODS, is_coherent, reconcile, summing_matrix  # noqa: E402

N_FAMILIES, ITEMS_PER_FAMILY = 100, 20
REGIONS = {"NORTH": 4, "SOUTH": 3, "WEST": 3}
HORIZON_MONTHS, RESIDUAL_MONTHS = 18, 24
SEED = 20261


def build_problem():
    rng = np.random.default_rng(SEED)
    items = pd.DataFrame({"item": [f"F{f:03d}-I{i:02d}" for f in range(N_FAMILIES) for i in range(ITEMS_PER_FAMILY)],
                          "family": [f"F{f:03d}" for f in range(N_FAMILIES) for _ in range(ITEMS_PER_FAMILY)]})
    locations = pd.DataFrame({"location": [f"{r}-DC{j}" for r, n in REGIONS.items() for j in range(n)],
                              "region": [r for r, n in REGIONS.items() for _ in range(n)]})
    bottom = items[["item"]].merge(locations[["location"]], how="cross")
    started = time.perf_counter()
    S, nodes = summing_matrix(bottom, items=items, locations=locations)
    build_seconds = time.perf_counter() - started
    n_nodes, n_bottom = S.shape
    level = rng.gamma(1.5, 40.0, size=(n_bottom, 1))
    season = 1 + 0.2 * np.sin(2 * np.pi * np.arange(HORIZON_MONTHS) / 12)
    truth = S @ (level * season[None, :])
    scale = np.sqrt(np.asarray(S.sum(axis=1)))  # error grows with the node's size
    base = truth + rng.normal(0, 1, size=truth.shape) * scale * 8.0
    shared = rng.normal(0, 1, size=(1, RESIDUAL_MONTHS))
    residuals = (rng.normal(0, 1, size=(n_nodes, RESIDUAL_MONTHS)) + 0.5 * shared) * scale * 8.0
    history = (level * rng.gamma(8.0, 1 / 8.0, size=(n_bottom, RESIDUAL_MONTHS)))
    return S, nodes, base, residuals, history, truth, build_seconds


def main() -> None:
    argparse.ArgumentParser(description=__doc__.splitlines()[0],
                            formatter_class=argparse.RawDescriptionHelpFormatter).parse_args()
    S, nodes, base, residuals, history, truth, build_seconds = build_problem()
    print(f"hierarchy: {S.shape[1]:,} bottom series, {S.shape[0]:,} nodes, {HORIZON_MONTHS} months; "
          f"summing matrix built in {build_seconds:.2f} s")
    print(f"{'method':<20}{'seconds':>10}{'peak MB':>10}{'coherent':>10}{'RMSE all nodes':>16}")
    print(f"{'base (unreconciled)':<20}{'':>10}{'':>10}{str(is_coherent(base, S)):>10}"
          f"{np.sqrt(np.mean((base - truth) ** 2)):>16,.1f}")
    for method in METHODS:
        tracemalloc.start()
        started = time.perf_counter()
        out = reconcile(base, S, method=method, residuals=residuals, history=history)
        seconds = time.perf_counter() - started
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        print(f"{method:<20}{seconds:>10.2f}{peak / 2**20:>10.0f}{str(is_coherent(out, S)):>10}"
              f"{np.sqrt(np.mean((out - truth) ** 2)):>16,.1f}")
    peak_rss_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # kilobytes on Linux
    print(f"process peak resident memory: {peak_rss_mb:,.0f} MB (target 4,096 MB); target 30 s per method")


if __name__ == "__main__":
    main()
