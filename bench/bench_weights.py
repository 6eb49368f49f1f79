"""Benchmark: consensus accuracy of each weighting scheme on simulated sources.

A fixed-seed simulation of our own.  Every cell has a true demand level μ;
the month's actual is μ·(1 + ε), ε ~ N(0, τ²) (demand noise no source can
foresee).  Source s forecasts μ·(1 + b_s + η_s), η_s ~ N(0, (σ_s·g_lag)²),
independent between sources, g_lag = 1 + 0.1·(lag − 1).  For each of the
last ``EVAL_CYCLES`` cycles, weights are estimated from the 24 earlier cycles'
errors (window 12, as in production), the sources are combined, and the
consensus is scored by WAPE against the actuals.

Compared: every scheme, each single source, equal weights, and the
"known-variance" weights w_s ∝ 1 / (σ_s² g_lag² + b_s²) — inverse of each
source's own true MSE per lag (the part of the error that is not the
shared demand noise), what Bates–Granger weights would be if the true
figures were known.

Two more things a demand review reads: family and total plans.  Items
belong to 20 families in 2 regions; a scenario may give a source a shared
miss ("shock"): one N(0, s²) draw per source, cycle and family that moves
all of the family's cells together, so errors do not cancel in the totals.
The run's default pipeline ("default run": persistent-bias correction of
:mod:`consensus.methods.bias` and the default weights, as
:func:`consensus.methods.plan.compute_plan` does it) is scored at item ×
location, family × region, family and total against each single source.

Targets (default scheme shrunk_mse): never worse than equal weights by more
than 2 %, within 3 % of the known-variance weights, and at least 5 % better
than the best single source when sources differ in quality (item level);
the default run no worse than the best single source at every level.

Run:  python bench/bench_weights.py            (two to three minutes on 2 cores)
      python bench/bench_weights.py --cells 400 (quicker, noisier)
      python bench/bench_weights.py --scenarios "one biased source" --spec '{"bias": {"shrinkage_cycles": 0}}'
                                                (the default run with settings laid over the default RunSpec)
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

# Run from a source checkout without installing: the package sits one folder up.
sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from consensus.methods.accuracy import forecast_errors
from consensus.methods.combine import combine_sources
from consensus.methods.weights import SCHEMES, WeightSpec, estimate_weights
from consensus.periods import DEFAULT_LAG_BUCKETS, lag_bucket_labels, month_index, month_names

SOURCES = ("sales", "marketing", "dc", "stat")
HORIZON = 6
HISTORY_CYCLES = 24
EVAL_CYCLES = 6
DEMAND_NOISE = 0.05

#: (name, σ per source, bias per source as a fraction of demand (+ = forecasts high), shared family shock per source)
SCENARIOS = (
    ("equal quality", (0.15, 0.15, 0.15, 0.15), (0.0, 0.0, 0.0, 0.0), (0.0, 0.0, 0.0, 0.0)),
    ("differing quality", (0.08, 0.15, 0.25, 0.40), (0.0, 0.0, 0.0, 0.0), (0.0, 0.0, 0.0, 0.0)),
    ("one biased source", (0.10, 0.12, 0.15, 0.20), (0.0, 0.15, 0.0, 0.0), (0.0, 0.0, 0.0, 0.0)),
    ("sales biased at the total", (0.12, 0.20, 0.25, 0.18), (-0.13, 0.0, 0.0, 0.0), (0.02, 0.03, 0.03, 0.03)),
    ("families miss together", (0.20, 0.20, 0.25, 0.20), (0.0, 0.0, 0.0, 0.0), (0.04, 0.06, 0.02, 0.05)),
)
LEVEL_KEYS = {"item × location": ["item", "location"], "family × region": ["family", "region"],
              "family": ["family"], "total": []}


def simulate(sigmas, biases, shocks=(0.0, 0.0, 0.0, 0.0), *, n_cells: int, seed: int):
    rng = np.random.default_rng(seed)
    n_items = max(1, n_cells // 4)
    items = pd.DataFrame({"item": [f"I{k:04d}" for k in range(n_items)],
                          "family": [f"F{k % 20:02d}" for k in range(n_items)], "unit_price": 1.0})
    locations = pd.DataFrame({"location": ["L1", "L2", "L3", "L4"], "region": ["R1", "R1", "R2", "R2"]})
    cells = pd.MultiIndex.from_product([items["item"], locations["location"]], names=["item", "location"])
    cells = cells.to_frame(index=False).iloc[:n_cells]
    mu = rng.gamma(2.0, 50.0, size=len(cells)) + 5.0

    first_cycle = month_index("2024-01")
    n_cycles = HISTORY_CYCLES + EVAL_CYCLES
    months = np.arange(first_cycle, first_cycle + n_cycles + HORIZON + 1)
    actual_q = mu[:, None] * (1 + rng.normal(0, DEMAND_NOISE, size=(len(cells), len(months))))
    actuals = pd.DataFrame({
        "item": np.repeat(cells["item"].to_numpy(), len(months)),
        "location": np.repeat(cells["location"].to_numpy(), len(months)),
        "period": np.tile(month_names(months), len(cells)),
        "quantity": np.maximum(0.0, actual_q.ravel()),
    })
    cycles = np.arange(first_cycle, first_cycle + n_cycles)
    lag_grid = np.arange(1, HORIZON + 1)
    c_idx, l_idx, h_idx = np.meshgrid(np.arange(len(cells)), cycles, lag_grid, indexing="ij")
    c_idx, l_idx, h_idx = c_idx.ravel(), l_idx.ravel(), h_idx.ravel()
    growth = 1 + 0.1 * (h_idx - 1)
    family_code = pd.factorize(cells["item"].map(items.set_index("item")["family"]), sort=True)[0][c_idx]
    n_families = int(family_code.max()) + 1 if len(family_code) else 1
    frames = []
    for source, sigma, b, shock in zip(SOURCES, sigmas, biases, shocks):
        noise = rng.normal(0, 1, size=c_idx.size) * sigma * growth
        if shock:  # one miss per cycle and family, shared by the family's cells
            shared = rng.normal(0, shock, size=(len(cycles), n_families))
            noise = noise + shared[l_idx - first_cycle, family_code]
        frames.append(pd.DataFrame({
            "source": source,
            "cycle_m": l_idx,
            "item": cells["item"].to_numpy()[c_idx],
            "location": cells["location"].to_numpy()[c_idx],
            "period_m": l_idx + h_idx,
            "lag": h_idx,
            "quantity": np.maximum(0.0, mu[c_idx] * (1 + b + noise)),
        }))
    forecasts = pd.concat(frames, ignore_index=True)
    names = dict(zip(months, month_names(months)))
    forecasts["cycle"] = forecasts["cycle_m"].map(names)
    forecasts["period"] = forecasts["period_m"].map(names)
    return items, locations, actuals, forecasts, cycles[HISTORY_CYCLES:]


def known_variance_weights(sigmas, biases) -> pd.DataFrame:
    rows = []
    for label, first, last in DEFAULT_LAG_BUCKETS:
        lags = np.arange(first, (last or HORIZON) + 1)
        lags = lags[lags <= HORIZON] if lags.size else lags
        g2 = np.mean((1 + 0.1 * (lags - 1)) ** 2) if lags.size else 1.0
        true_mse = np.array(sigmas) ** 2 * g2 + np.array(biases) ** 2
        w = (1 / true_mse) / (1 / true_mse).sum()
        for source, weight in zip(SOURCES, w):
            rows.append(("all", label, source, weight, weight, 1.0, 0, 0, np.nan, np.nan, 0.0, "segment", "known"))
    return pd.DataFrame(rows, columns=["segment", "lag_bucket", "source", "weight", "raw_weight", "psi", "n_cycles",
                                       "n_errors", "mad", "mse", "mean_error", "basis", "note"])


def wape(frame: pd.DataFrame, column: str) -> float:
    return 100.0 * float((frame["actual"] - frame[column]).abs().sum() / frame["actual"].sum())


def level_wape(frame: pd.DataFrame, keys: list[str], column: str = "consensus") -> float:
    """WAPE % of group totals per cycle and month (the errors of a level's own numbers)."""
    summed = frame.groupby(["cycle", "period", *keys], sort=False)[[column, "actual"]].sum()
    return 100.0 * float((summed["actual"] - summed[column]).abs().sum() / summed["actual"].sum())


def check_replayable(spec) -> None:
    """Refuse settings this bench does not replay (it has no published plans, so no reconciliation)."""
    from consensus.methods.plan import RunSpec

    default = RunSpec()
    if spec.reconciliation != "bottom_up" or spec.weights_from != "cells":
        raise SystemExit("bench_weights replays persistent-bias correction and cell weights only: "
                         "leave reconciliation and weights_from at their defaults "
                         f"({default.reconciliation!r}, {default.weights_from!r}); bench_backtest.py replays any spec")


def default_run(aligned: pd.DataFrame, errors: pd.DataFrame, *, cycle: str, items, locations,
                spec=None) -> pd.DataFrame:
    """The consensus the run's settings give (the default RunSpec unless ``spec``): persistent bias corrected,
    then the weights."""
    from consensus.methods.bias import cell_sums_from_errors, correct_sources, persistent_bias
    from consensus.methods.plan import RunSpec
    from consensus.methods.weights import assign_segments

    spec = spec or RunSpec()
    check_replayable(spec)
    known = errors[errors["period"] <= cycle]
    segment_of = assign_segments(known, segment=spec.weights.segment, items=items, locations=locations)
    sums = cell_sums_from_errors(known, segment_of=segment_of)
    segments = sorted(items["family"].unique())
    bias = persistent_bias(sums, cycle=cycle, window_cycles=spec.weights.window_cycles, segments=segments,
                           sources=SOURCES, spec=spec.bias)
    weights = estimate_weights(errors, cycle=cycle, items=items, locations=locations, spec=spec.weights,
                               sources=SOURCES)
    rows = correct_sources(aligned, bias, segment_of=assign_segments(aligned, segment=spec.weights.segment,
                                                                      items=items, locations=locations))
    combo = combine_sources(rows.drop(columns="bias_factor"), weights, items=items, spec=spec.weights)
    return combo.consensus[["item", "location", "period", "consensus"]]


def run_scenario(name, sigmas, biases, shocks=(0.0, 0.0, 0.0, 0.0), *, n_cells: int, seed: int,
                 timings: dict, run_spec=None) -> tuple[dict[str, float], pd.DataFrame]:
    items, locations, actuals, forecasts, eval_cycles = simulate(sigmas, biases, shocks, n_cells=n_cells, seed=seed)
    started = time.perf_counter()
    errors = forecast_errors(forecasts, actuals)
    timings.setdefault("forecast_errors", []).append((len(forecasts), time.perf_counter() - started))
    actual_lookup = actuals.rename(columns={"quantity": "actual"})
    results: dict[str, list[pd.DataFrame]] = {}
    oracle = known_variance_weights(sigmas, biases)
    for cycle_m in eval_cycles:
        cycle = month_names([cycle_m])[0]
        aligned = forecasts[forecasts["cycle_m"] == cycle_m][["source", "item", "location", "period", "lag", "quantity"]]
        truth = aligned.drop_duplicates(["item", "location", "period"])[["item", "location", "period"]].merge(
            actual_lookup, on=["item", "location", "period"])
        for scheme in SCHEMES:
            spec = WeightSpec(scheme=scheme)
            started = time.perf_counter()
            weights = estimate_weights(errors, cycle=cycle, items=items, locations=locations, spec=spec,
                                       sources=SOURCES)
            mid = time.perf_counter()
            combo = combine_sources(aligned, weights, items=items, spec=spec)
            done = time.perf_counter()
            if scheme == "shrunk_mse":
                timings.setdefault("estimate_weights", []).append((len(errors), mid - started))
                timings.setdefault("combine_sources", []).append((len(aligned), done - mid))
            results.setdefault(scheme, []).append(
                combo.consensus[["item", "location", "period", "consensus"]].merge(truth, on=["item", "location", "period"]))
        combo = combine_sources(aligned, oracle, items=items, spec=WeightSpec(scheme="inverse_mse", segment="all"))
        results.setdefault("known variances", []).append(
            combo.consensus[["item", "location", "period", "consensus"]].merge(truth, on=["item", "location", "period"]))
        results.setdefault("default run", []).append(
            default_run(aligned, errors, cycle=cycle, items=items, locations=locations, spec=run_spec)
            .merge(truth, on=["item", "location", "period"]).assign(cycle=cycle))
        for source in SOURCES:
            single = aligned[aligned["source"] == source].rename(columns={"quantity": "consensus"})
            results.setdefault(f"single: {source}", []).append(
                single[["item", "location", "period", "consensus"]].merge(truth, on=["item", "location", "period"])
                .assign(cycle=cycle))
    item_wape = {method: wape(pd.concat(frames), "consensus") for method, frames in results.items()}
    family = items.set_index("item")["family"]
    region = locations.set_index("location")["region"]
    levels = {}
    for method in ["default run", *[f"single: {s}" for s in SOURCES]]:
        frame = pd.concat(results[method], ignore_index=True)
        frame = frame.assign(family=frame["item"].map(family), region=frame["location"].map(region))
        levels[method] = {level: level_wape(frame, keys) for level, keys in LEVEL_KEYS.items()}
    return item_wape, pd.DataFrame(levels).T


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cells", type=int, default=800, help="item × location cells (default 800)")
    parser.add_argument("--seed", type=int, default=20260101)
    parser.add_argument("--scenarios", nargs="*", default=None, metavar="NAME",
                        help="only these scenarios (each keeps its own seed): " + "; ".join(s[0] for s in SCENARIOS))
    parser.add_argument("--spec", default=None, metavar="JSON",
                        help='settings over the default RunSpec for the default run, e.g. \'{"bias": '
                             '{"shrinkage_cycles": 0}}\'')
    args = parser.parse_args()
    names = [s[0] for s in SCENARIOS]
    unknown = [n for n in (args.scenarios or []) if n not in names]
    if unknown:
        parser.error(f"unknown scenario(s) {unknown}; choose from {names}")
    from bench_backtest import spec_over_default

    spec = spec_over_default(json.loads(args.spec)) if args.spec else None
    if spec is not None:
        check_replayable(spec)
        print(f"default run with {args.spec} over the default settings")
    timings: dict[str, list] = {}
    table, by_level = {}, {}
    for k, (name, sigmas, biases, shocks) in enumerate(SCENARIOS):  # seeds follow the full list, so a subset
        if args.scenarios and name not in args.scenarios:           # draws the same numbers
            continue
        table[name], by_level[name] = run_scenario(name, sigmas, biases, shocks, n_cells=args.cells,
                                                   seed=args.seed + k, timings=timings, run_spec=spec)
    frame = pd.DataFrame(table)
    print(f"Consensus WAPE % over the last {EVAL_CYCLES} cycles, {args.cells} cells, lags 1–{HORIZON}, "
          f"weights from a 12-cycle window (seed {args.seed})\n")
    print(frame.round(2).to_string())
    print("\nDefault scheme (shrunk_mse) against the targets:")
    checks = []
    for name in frame.columns:
        col = frame[name]
        best_single = col[[f"single: {s}" for s in SOURCES]].min()
        vs_equal = 100 * (col["shrunk_mse"] / col["equal"] - 1)
        vs_known = 100 * (col["shrunk_mse"] / col["known variances"] - 1)
        vs_best = 100 * (1 - col["shrunk_mse"] / best_single)
        differs = name != "equal quality"
        checks.append({
            "scenario": name,
            "vs equal %": round(vs_equal, 2), "ok (≤ +2)": vs_equal <= 2,
            "vs known % ": round(vs_known, 2), "ok (≤ +3)": vs_known <= 3,
            "better than best single %": round(vs_best, 2),
            "ok (≥ 5 when quality differs)": (vs_best >= 5) if differs else "n/a",
        })
    print(pd.DataFrame(checks).to_string(index=False))
    print("\nWAPE % by level: the run's default settings against each single source (group totals per cycle "
          "and month):")
    verdicts = []
    for name, levels in by_level.items():
        print(f"\n{name}")
        print(levels.round(2).to_string())
        singles = levels.drop(index="default run")
        for level in levels.columns:
            gap = levels.loc["default run", level] - singles[level].min()
            if gap > 1e-9:
                verdicts.append(f"{name}, {level}: {gap:+.2f} points behind {singles[level].idxmin()}")
    print("\ndefault run worse than the best single source:", verdicts or "nowhere")
    print("\nSpeed (median over calls):")
    speed = [{"step": step, "rows in": int(np.median([r for r, _ in runs])),
              "seconds": round(float(np.median([t for _, t in runs])), 3)} for step, runs in timings.items()]
    print(pd.DataFrame(speed).to_string(index=False))


if __name__ == "__main__":
    main()
