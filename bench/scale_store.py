"""An invented store of N item × location series, loaded through the tool's own intake (for bench_scale.py).

The company is made up: items in families of about 100, five distribution
centers in two regions, four years of monthly orders with level, season,
trend and some intermittent items.  Every cycle of a 12-cycle window and the
current one gets the files a planning team would send: sales at family ×
region (optimistic by about 10 %), each DC at item × location (DC-5 weekly),
and marketing events.  Files go through ``consensus.intake.submission`` as a
user's would, so the store is the real thing.  Seeded: same N, same store.
"""

from __future__ import annotations

import io
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from consensus import periods
from consensus.intake.submission import load_actuals_file, load_master_file, submit_file
from consensus.methods.alignment import week_month_shares
from consensus.workflow.cycles import open_cycle

CURRENT = "2026-11"
PAST_CYCLES = 12
HORIZON = 18
HISTORY_MONTHS = 48
LOCATIONS = (("DC-1", "NORTH"), ("DC-2", "NORTH"), ("DC-3", "NORTH"), ("DC-4", "SOUTH"), ("DC-5", "SOUTH"))
WEEKLY_DC = "DC-5"
ITEMS_PER_FAMILY = 100
SALES_BIAS = 1.10


@dataclass(frozen=True)
class Company:
    items: pd.DataFrame
    locations: pd.DataFrame
    truth: np.ndarray  # series × months: expected demand (history and horizon)
    first_month: int
    keys: pd.DataFrame  # item, location per series


def invent_company(n_series: int, *, seed: int = 20261202) -> Company:
    """Items, DCs and the demand level of every series over history and horizon."""
    rng = np.random.default_rng(seed)
    n_items = max(1, n_series // len(LOCATIONS))
    n_families = max(4, int(np.ceil(n_items / ITEMS_PER_FAMILY)))
    item = np.array([f"IT-{i:06d}" for i in range(n_items)], dtype=object)
    family = np.array([f"FAM-{i % n_families:04d}" for i in range(n_items)], dtype=object)
    items = pd.DataFrame({"item": item, "family": family, "unit_price": np.round(rng.uniform(2, 80, n_items), 2),
                          "description": ""})
    locations = pd.DataFrame({"location": [l for l, _ in LOCATIONS], "region": [r for _, r in LOCATIONS],
                              "description": ""})
    keys = items[["item"]].merge(locations[["location"]], how="cross")
    n = len(keys)
    first = periods.month_index(CURRENT) - (HISTORY_MONTHS - 1)
    months = np.arange(HISTORY_MONTHS + HORIZON + 1)
    level = rng.lognormal(mean=3.0, sigma=1.1, size=n)
    phase = rng.uniform(0, 2 * np.pi, n_families)[pd.factorize(np.repeat(family, len(LOCATIONS)))[0]]
    season = 1 + 0.3 * np.sin(2 * np.pi * (months[None, :] + first) / 12 + phase[:, None])
    trend = 1 + rng.normal(0, 0.004, n)[:, None] * months[None, :]
    truth = level[:, None] * season * np.clip(trend, 0.3, None)
    return Company(items=items, locations=locations, truth=truth, first_month=first, keys=keys)


def _month(index) -> str:
    return periods.month_name(int(index))


def _csv_bytes(frame: pd.DataFrame) -> bytes:
    buffer = io.StringIO()
    frame.to_csv(buffer, index=False, float_format="%.2f")
    return buffer.getvalue().encode()


def actuals_frame(company: Company, *, seed: int = 1) -> pd.DataFrame:
    """Monthly orders: Poisson around the truth, with 10 % of series intermittent."""
    rng = np.random.default_rng(seed)
    n = len(company.keys)
    expected = company.truth[:, :HISTORY_MONTHS]
    sparse = rng.random(n) < 0.10
    expected = np.where(sparse[:, None], expected * 0.08, expected)
    orders = rng.poisson(expected)
    rows = pd.DataFrame({"item": np.repeat(company.keys["item"].to_numpy(), HISTORY_MONTHS),
                         "location": np.repeat(company.keys["location"].to_numpy(), HISTORY_MONTHS),
                         "period": np.tile(np.array([_month(company.first_month + m) for m in range(HISTORY_MONTHS)],
                                                    dtype=object), n),
                         "quantity": orders.ravel()})
    return rows[rows["quantity"] > 0]


def cycle_files(company: Company, cycle: str, *, seed: int) -> dict[str, tuple[str, str | None, bytes]]:
    """The files of one cycle: name → (source, scope, bytes)."""
    rng = np.random.default_rng(seed)
    c = periods.month_index(cycle)
    offset = c - company.first_month
    horizon = np.arange(offset + 1, offset + HORIZON + 1)
    months = np.array([_month(company.first_month + m) for m in horizon], dtype=object)
    truth = company.truth[:, horizon]
    keys = company.keys
    files: dict[str, tuple[str, str | None, bytes]] = {}
    dc_values = np.round(truth * rng.lognormal(0, 0.25, truth.shape))
    for location, _ in LOCATIONS:
        mine = (keys["location"] == location).to_numpy()
        items = keys.loc[mine, "item"].to_numpy()
        values = dc_values[mine]
        if location == WEEKLY_DC:
            weeks = pd.Series([f"{y}-W{w:02d}" for y, w in _weeks_of(months)])
            shares = week_month_shares(weeks)
            per_month = shares.groupby("period")["share"].sum()
            month_pos = {m: k for k, m in enumerate(months)}
            rows = shares[shares["period"].isin(month_pos)].drop_duplicates("week")
            week_of_month = rows["period"].map(month_pos).to_numpy()
            scale = (1 / rows["period"].map(per_month)).to_numpy()
            frame = pd.DataFrame({"item": np.repeat(items, len(rows)), "location": location,
                                  "week": np.tile(rows["week"].to_numpy(), len(items)),
                                  "quantity": np.round((values[:, week_of_month] * scale).ravel(), 1)})
        else:
            frame = pd.DataFrame({"item": np.repeat(items, len(months)), "location": location,
                                  "period": np.tile(months, len(items)), "quantity": values.ravel()})
        files[f"dc_{location}_{cycle}.csv"] = ("dc", f"location {location}", _csv_bytes(frame))
    family_of = keys["item"].map(company.items.set_index("item")["family"]).to_numpy()
    region_of = keys["location"].map(company.locations.set_index("location")["region"]).to_numpy()
    for region in sorted(set(region_of)):
        mine = region_of == region
        totals = pd.DataFrame(truth[mine], columns=months).groupby(family_of[mine]).sum()
        noisy = np.round(totals.to_numpy() * SALES_BIAS * rng.lognormal(0, 0.08, totals.shape))
        frame = pd.DataFrame({"family": np.repeat(totals.index.to_numpy(), len(months)), "region": region,
                              "period": np.tile(months, len(totals)), "quantity": noisy.ravel()})
        files[f"sales_{region}_{cycle}.csv"] = ("sales", f"region {region}", _csv_bytes(frame))
    families = company.items["family"].unique()
    chosen = rng.choice(families, size=min(10, len(families)), replace=False)
    start = rng.integers(0, HORIZON - 2, len(chosen))
    events = pd.DataFrame({"event": [f"Promo {cycle} {k}" for k in range(len(chosen))], "family": chosen,
                           "start": months[start], "end": months[start + 1],
                           "uplift_pct": np.round(rng.uniform(5, 25, len(chosen)), 1)})
    files[f"events_{cycle}.csv"] = ("marketing", None, _csv_bytes(events))
    return files


def _weeks_of(months: np.ndarray) -> list[tuple[int, int]]:
    first = pd.Timestamp(months[0] + "-01")
    last = pd.Timestamp(months[-1] + "-01") + pd.offsets.MonthEnd(0)
    days = pd.date_range(first, last, freq="D")
    iso = days.isocalendar()
    return sorted(set(zip(iso["year"].astype(int), iso["week"].astype(int))))


def build_store(n_series: int, url: str, *, folder: Path | None = None, log=print) -> Company:
    """Load an invented company of ``n_series`` series into the store at ``url`` through the intake."""
    company = invent_company(n_series)
    work = Path(folder or tempfile.mkdtemp(prefix="scale_store_"))
    work.mkdir(parents=True, exist_ok=True)
    (work / "items.csv").write_bytes(_csv_bytes(company.items))
    (work / "locations.csv").write_bytes(_csv_bytes(company.locations))
    load_master_file(work / "items.csv", kind="items", url=url)
    load_master_file(work / "locations.csv", kind="locations", url=url)
    (work / "orders.csv").write_bytes(_csv_bytes(actuals_frame(company)))
    load_actuals_file(work / "orders.csv", url=url)
    log(f"  master and {HISTORY_MONTHS} months of orders loaded")
    cycles = [periods.shift_month(CURRENT, -k) for k in range(PAST_CYCLES, -1, -1)]
    for number, cycle in enumerate(cycles):
        open_cycle(cycle, horizon=HORIZON, url=url)
        for name, (source, scope, data) in cycle_files(company, cycle, seed=number + 7).items():
            path = work / name
            path.write_bytes(data)
            submit_file(path, url=url, source=source, cycle=cycle, scope=scope, submitted_by="bench")
        log(f"  cycle {cycle} submitted")
    return company


def correction_file(company: Company, folder: Path) -> Path:
    """One new DC file for the current cycle (what a warm run takes in): DC-1's numbers 5 % higher."""
    files = cycle_files(company, CURRENT, seed=PAST_CYCLES + 7)
    data = files[f"dc_DC-1_{CURRENT}.csv"][2]
    frame = pd.read_csv(io.BytesIO(data))
    frame["quantity"] = np.round(frame["quantity"] * 1.05)
    path = Path(folder) / f"dc_DC-1_{CURRENT}_v2.csv"
    path.write_bytes(_csv_bytes(frame))
    return path
