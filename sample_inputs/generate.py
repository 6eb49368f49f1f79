#!/usr/bin/env python
"""Write the demo scenario's input files: an invented irrigation maker at cycle 2026-11.

Usage::

    python sample_inputs/generate.py            # rewrite the files next to this script
    python sample_inputs/generate.py OUT_FOLDER # write the same files under OUT_FOLDER

The company, its people, places and products are invented.  One fixed seed
drives every random draw, each part of the scenario from its own named
stream, so a re-run with the same numpy writes byte-identical files (the
spreadsheets get fixed zip timestamps and document dates for the same reason).

How the numbers are made (see README.md beside this script for the files):

* Customer orders.  The expected monthly quantity of item i at location l in
  month t is ``base_i · share_il · trend_it · season(family, region, month) ·
  (1 + realised event uplift)``.  Regular items draw the quantity from a
  gamma–Poisson (negative binomial) with 15 % extra variation; lumpy spares
  draw a Bernoulli occurrence and a negative-binomial lump size, the usual
  compound model of intermittent demand (Croston 1972; Syntetos, Boylan &
  Croston 2005).  Each month's quantity is split into order lines on business days.
* Past and current plans are made the way each author would have made them
  at the time, from the order history up to the cycle month only:
  sales (family × region) take the same month a year (or two) earlier, grow
  it by a belief in growth that they update slowly (so they miss the
  sprinklers' turn in mid-2025) and add 8–13 % optimism; the DCs (item ×
  location) take the same month a year earlier times their own 12-month
  growth ratio plus noise, with lumpy spares forecast as random lumps of the
  right mean; marketing lists the events it knows about, with the uplift it
  expects, and nothing else.
"""

from __future__ import annotations

import calendar
import datetime as dt
import io
import json
import re
import sys
import zipfile
import zlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import openpyxl
import pandas as pd

SEED = 20261130
COMPANY = "Quillmere Garden Systems"
CURRENT_CYCLE = "2026-11"
HORIZON = 18
FIRST_HISTORY_MONTH = "2023-12"
HISTORY_MONTHS = 36
PAST_CYCLES = [f"{y}-{m:02d}" for y, m in [(2025, 11), (2025, 12)] + [(2026, m) for m in range(1, 11)]]
SHORT_HORIZON_DC = "DC-S2"  # the DC that plans in weeks and only ~6 months ahead
SHORT_HORIZON_MONTHS = 6
WEEKLY_WEEKS = 26
# Document dates written into the spreadsheets, so they do not change on re-run.
FIXED_TIMESTAMP = dt.datetime(2026, 11, 27, 9, 0, 0)

HERE = Path(__file__).resolve().parent


# --------------------------------------------------------------------------- months

def month_index(month: str) -> int:
    """Integer index ``year*12 + month-1`` of a "YYYY-MM" month (as consensus.periods)."""
    return int(month[:4]) * 12 + int(month[5:7]) - 1


def month_name(index: int) -> str:
    """The "YYYY-MM" text of an integer month index."""
    year, month0 = divmod(int(index), 12)
    return f"{year:04d}-{month0 + 1:02d}"


T0 = month_index(FIRST_HISTORY_MONTH)
HISTORY = [month_name(T0 + t) for t in range(HISTORY_MONTHS)]
CALENDAR_MONTH0 = np.array([(T0 + t) % 12 for t in range(HISTORY_MONTHS)])  # 0 = January


def history_position(month: str) -> int:
    """Position of a month in the order-history axis (2023-12 is 0)."""
    return month_index(month) - T0


def stream(name: str) -> np.random.Generator:
    """An independent random stream per scenario part, so editing one part leaves the others as they were."""
    return np.random.default_rng([SEED, zlib.crc32(name.encode())])


# --------------------------------------------------------------------------- master data

REGIONS = ("NORTH", "SOUTH")

LOCATIONS = [
    # location, region, description, share of company volume
    ("DC-N1", "NORTH", "Northern hub, Kelsbrook", 0.32),
    ("DC-N2", "NORTH", "Northern satellite depot, Ashmere Fold", 0.18),
    ("DC-S1", "SOUTH", "Southern hub, Pennow Cross", 0.30),
    ("DC-S2", "SOUTH", "Southern coastal depot, Saltmarrow", 0.20),
]

# Seasonal shape per family for the NORTH region, January first; normalised to mean 1 below.
SEASON_NORTH = {
    "DRIP-KITS": [0.30, 0.40, 0.80, 1.60, 2.00, 1.80, 1.40, 1.00, 0.70, 0.50, 0.30, 0.30],
    "SPRINKLERS": [0.20, 0.20, 0.40, 0.90, 1.60, 2.20, 2.30, 1.70, 0.90, 0.50, 0.30, 0.30],
    "TIMERS": [0.50, 0.60, 1.30, 1.80, 1.70, 1.30, 1.00, 0.80, 0.70, 0.60, 0.70, 1.00],
    "SPARES": [0.70, 0.70, 0.90, 1.20, 1.30, 1.30, 1.30, 1.20, 1.00, 0.90, 0.80, 0.70],
}
# Growth per year of each family; sprinklers turn from growth to decline in mid-2025.
FAMILY_GROWTH = {"DRIP-KITS": 0.12, "SPRINKLERS": 0.10, "TIMERS": 0.06, "SPARES": 0.04}
SPRINKLER_TURN_MONTH = "2025-03"
SPRINKLER_GROWTH_AFTER_TURN = -0.10
ITEM_GROWTH_OVERRIDES = {"SK-OSC-CLASSIC": -0.20, "SK-OSC-PRO": 0.15}  # the classic is being replaced
LINE_SIZE = {"DRIP-KITS": 3, "SPRINKLERS": 6, "TIMERS": 3, "SPARES": 15}
LUMPY_LINE_SIZE = 3
MAX_LINES_PER_MONTH = 30

# item, description, family, unit_price, base units/month (all DCs, seasonal mean, at 2023-12)
REGULAR_ITEMS = [
    ("DK-STR-10", "Starter drip kit, 10 m", "DRIP-KITS", 29.90, 300),
    ("DK-BAL-08", "Balcony drip kit, 8 pots", "DRIP-KITS", 34.90, 260),
    ("DK-POT-16", "Patio pot drip kit, 16 pots", "DRIP-KITS", 49.90, 220),
    ("DK-BED-25", "Flower-bed drip kit, 25 m", "DRIP-KITS", 69.00, 180),
    ("DK-VEG-30", "Raised-bed vegetable drip kit, 30 m", "DRIP-KITS", 79.00, 150),
    ("DK-HDG-50", "Hedge dripline kit, 50 m", "DRIP-KITS", 99.00, 90),
    ("DK-GRH-40", "Greenhouse drip kit, 40 outlets", "DRIP-KITS", 119.00, 80),
    ("DK-PRO-100", "Large-garden drip kit, 100 m, pro tap head", "DRIP-KITS", 189.00, 35),
    ("SK-OSC-CLASSIC", "Oscillating sprinkler, classic", "SPRINKLERS", 19.90, 400),
    ("SK-OSC-PRO", "Oscillating sprinkler, 20 nozzles, range control", "SPRINKLERS", 34.90, 260),
    ("SK-PLS-METAL", "Pulse sprinkler, metal, on spike", "SPRINKLERS", 27.50, 180),
    ("SK-ROT-3ARM", "Three-arm rotary sprinkler", "SPRINKLERS", 14.90, 350),
    ("SK-POP-S", "Pop-up spray head, 5 cm", "SPRINKLERS", 8.50, 600),
    ("SK-POP-L", "Pop-up spray head, 10 cm", "SPRINKLERS", 11.90, 380),
    ("SK-GEAR-R", "Gear-drive rotor, 8–15 m throw", "SPRINKLERS", 24.90, 220),
    ("SK-TRAV-1", "Travelling sprinkler, tractor type", "SPRINKLERS", 89.00, 40),
    ("SK-MIST-5", "Patio misting set, 5 m", "SPRINKLERS", 22.90, 160),
    ("SK-SOAK-15", "Soaker hose, 15 m", "SPRINKLERS", 17.50, 300),
    ("TM-TAP-1", "Tap timer, one outlet, dial", "TIMERS", 27.90, 320),
    ("TM-TAP-2", "Tap timer, two outlets", "TIMERS", 44.90, 200),
    ("TM-SMART-1", "Smart tap timer, app control", "TIMERS", 69.00, 150),
    ("TM-CTRL-4", "Four-zone indoor controller", "TIMERS", 89.00, 70),
    ("TM-CTRL-8", "Eight-zone indoor controller", "TIMERS", 139.00, 30),
    ("TM-SENS-RAIN", "Rain sensor add-on", "TIMERS", 24.90, 110),
    ("TM-SENS-SOIL", "Soil-moisture sensor add-on", "TIMERS", 32.50, 90),
    ("SP-DRIP-2L-25", "Drippers 2 l/h, pack of 25", "SPARES", 6.90, 900),
    ("SP-DRIP-ADJ-10", "Adjustable drippers, pack of 10", "SPARES", 5.50, 700),
    ("SP-PIPE-13-25", "Supply pipe 13 mm, 25 m coil", "SPARES", 14.90, 450),
    ("SP-MICRO-4-15", "Micro tube 4 mm, 15 m", "SPARES", 4.90, 600),
    ("SP-TEE-13-5", "Tee connectors 13 mm, pack of 5", "SPARES", 3.90, 650),
    ("SP-ELB-13-5", "Elbow connectors 13 mm, pack of 5", "SPARES", 3.90, 500),
    ("SP-END-13-10", "End caps 13 mm, pack of 10", "SPARES", 2.90, 420),
    ("SP-STAKE-20", "Support stakes, pack of 20", "SPARES", 3.50, 380),
    ("SP-FILT-MESH", "Mesh filter insert", "SPARES", 4.50, 260),
    ("SP-WASH-SET", "Tap washer set", "SPARES", 1.90, 540),
    ("SP-NOZ-POP-5", "Replacement spray nozzles, pack of 5", "SPARES", 6.50, 230),
    ("SP-RED-1B5", "Pressure reducer 1.5 bar", "SPARES", 12.90, 140),
    ("SP-PUNCH", "Pipe hole punch", "SPARES", 5.90, 120),
]
# Service parts bought a few times a year in lumps: (item, description, family, price,
# chance of any order in a month at one DC, mean lump size in units).
LUMPY_ITEMS = [
    ("SP-SOL-24V", "Replacement solenoid valve 24 V", "SPARES", 38.00, 0.35, 6.0),
    ("SP-BOARD-C4", "Controller board, four-zone (service part)", "SPARES", 29.00, 0.20, 4.0),
    ("SP-SEAL-PLS", "Pulse sprinkler seal kit", "SPARES", 4.20, 0.40, 12.0),
    ("SP-MAN-6", "Six-outlet manifold", "SPARES", 21.50, 0.30, 5.0),
    ("SP-GEAR-RK", "Rotor gear repair kit", "SPARES", 9.80, 0.25, 8.0),
]
# Launched in 2027-03: in the master already, no order history yet.
LAUNCH_ITEM = ("TM-HUB-4", "Four-zone Wi-Fi controller", "TIMERS", 149.00)
LAUNCH_MONTH = "2027-03"
LAUNCH_UNITS_PER_MONTH = 250  # what marketing expects in its launch window, all DCs

# BOM: parent, component, qty_per, lead_time_months.  Sub-assemblies (SA-) are made
# in-house in a month; parts (PT-) are bought, imported emitters and valves take longest.
SUB_ASSEMBLIES = {
    "SA-HEAD-STD": [("PT-TAPCONN-34", 1), ("PT-FILT-MESH", 1), ("PT-RED-1B5", 1), ("PT-HOUSING-S", 1)],
    "SA-HEAD-PRO": [("PT-TAPCONN-34", 1), ("PT-FILT-DISC", 1), ("PT-RED-2B", 1), ("PT-BACKFLOW", 1),
                    ("PT-HOUSING-L", 1)],
    "SA-LINE-10": [("PT-PIPE-13", 10), ("PT-DRIP-INL", 30)],
    "SA-MICRO-8": [("PT-MICRO-4", 8), ("PT-DRIP-ADJ", 8), ("PT-STAKE", 8)],
    "SA-FIT-PACK": [("PT-TEE-13", 4), ("PT-ELB-13", 4), ("PT-END-13", 2), ("PT-PUNCH", 1)],
}
KIT_BOMS = {
    "DK-STR-10": [("SA-HEAD-STD", 1), ("SA-LINE-10", 1), ("SA-FIT-PACK", 1), ("PT-BOX-S", 1), ("PT-GUIDE", 1)],
    "DK-BAL-08": [("SA-HEAD-STD", 1), ("SA-MICRO-8", 1), ("PT-PIPE-13", 5), ("SA-FIT-PACK", 1), ("PT-BOX-S", 1),
                  ("PT-GUIDE", 1)],
    "DK-POT-16": [("SA-HEAD-STD", 1), ("SA-MICRO-8", 2), ("PT-PIPE-13", 10), ("SA-FIT-PACK", 1), ("PT-BOX-S", 1),
                  ("PT-GUIDE", 1)],
    "DK-BED-25": [("SA-HEAD-STD", 1), ("SA-LINE-10", 2), ("PT-PIPE-13", 5), ("SA-FIT-PACK", 2), ("PT-BOX-L", 1),
                  ("PT-GUIDE", 1)],
    "DK-VEG-30": [("SA-HEAD-STD", 1), ("SA-LINE-10", 3), ("SA-FIT-PACK", 2), ("PT-BOX-L", 1), ("PT-GUIDE", 1)],
    "DK-HDG-50": [("SA-HEAD-STD", 1), ("SA-LINE-10", 5), ("SA-FIT-PACK", 2), ("PT-BOX-L", 1), ("PT-GUIDE", 1)],
    "DK-GRH-40": [("SA-HEAD-PRO", 1), ("SA-MICRO-8", 5), ("PT-PIPE-13", 20), ("SA-FIT-PACK", 2), ("PT-BOX-L", 1),
                  ("PT-GUIDE", 1)],
    "DK-PRO-100": [("SA-HEAD-PRO", 1), ("SA-LINE-10", 10), ("SA-FIT-PACK", 4), ("PT-BOX-L", 1), ("PT-GUIDE", 1)],
}
LEAD_TIME_MONTHS = {
    "SA-HEAD-STD": 1, "SA-HEAD-PRO": 1, "SA-LINE-10": 1, "SA-MICRO-8": 1, "SA-FIT-PACK": 1,
    "PT-TAPCONN-34": 2, "PT-FILT-MESH": 2, "PT-FILT-DISC": 3, "PT-RED-1B5": 3, "PT-RED-2B": 3,
    "PT-BACKFLOW": 3, "PT-HOUSING-S": 2, "PT-HOUSING-L": 2, "PT-PIPE-13": 1, "PT-DRIP-INL": 3,
    "PT-MICRO-4": 1, "PT-DRIP-ADJ": 3, "PT-STAKE": 1, "PT-TEE-13": 2, "PT-ELB-13": 2, "PT-END-13": 2,
    "PT-PUNCH": 2, "PT-BOX-S": 1, "PT-BOX-L": 1, "PT-GUIDE": 1,
}


# --------------------------------------------------------------------------- events

@dataclass(frozen=True)
class Event:
    """One marketing event: its scope, window, what marketing said and what really happened."""

    name: str
    family: str | None
    item: str | None
    region: str | None          # None: every region
    start: str
    end: str
    plans: tuple[tuple[str, int], ...]  # (first cycle with this figure, uplift_pct); first entry = announcement
    realised_pct: float | None  # uplift built into the order history; None when the event is still ahead
    note: str
    units: int | None = None    # launches: units per month instead of an uplift

    @property
    def announced(self) -> str:
        return self.plans[0][0]

    def uplift_at(self, cycle: str) -> int | None:
        """The uplift marketing stated in ``cycle`` (latest revision not after it)."""
        stated = [pct for since, pct in self.plans if month_index(since) <= month_index(cycle)]
        return stated[-1] if stated else None


EVENTS = [
    Event("Winter installer offer", "TIMERS", None, None, "2025-12", "2026-01",
          (("2025-08", 15),), 16.0, "Installer discount on timers over the winter"),
    Event("Spring drip push 2026", "DRIP-KITS", None, None, "2026-03", "2026-04",
          (("2025-09", 25), ("2026-01", 30)), 27.0, "First national drip-kit campaign; TV spots from March"),
    Event("Sprinkler summer deal 2026", "SPRINKLERS", None, "SOUTH", "2026-06", "2026-07",
          (("2026-01", 20),), 18.0, "Second sprinkler at half price, southern retailers"),
    Event("Spares summer bundle", "SPARES", None, "NORTH", "2026-07", "2026-08",
          (("2026-03", 15),), 0.0, "Bundle offer on connectors and drippers"),  # stock came late: no effect
    Event("Smart timer trade-in", None, "TM-SMART-1", None, "2026-09", "2026-10",
          (("2026-04", 40),), 35.0, "Trade in any old timer for a smart one"),
    Event("Spring drip push 2027", "DRIP-KITS", None, None, "2027-03", "2027-04",
          (("2026-07", 25), ("2026-11", 28)), None, "Second national drip-kit campaign, same slots as 2026"),
    Event("Sprinkler summer deal 2027", "SPRINKLERS", None, "SOUTH", "2027-06", "2027-07",
          (("2026-10", 20),), None, "Repeat of the 2026 southern sprinkler deal"),
    Event("Wi-Fi controller launch", None, LAUNCH_ITEM[0], None, LAUNCH_MONTH, "2027-05",
          (("2026-11", 0),), None, "Launch of the four-zone Wi-Fi controller; launch stock at all DCs",
          units=LAUNCH_UNITS_PER_MONTH),
    Event("Sprinkler list-price rise", "SPRINKLERS", None, None, "2027-02", "2028-05",
          (("2026-11", -6),), None, "List prices +5% from February 2027; expect lower volumes"),
]


# --------------------------------------------------------------------------- the scenario

@dataclass
class Scenario:
    """Everything the files are written from."""

    items: pd.DataFrame       # item, description, family, unit_price, base, p_order, lump_mean, is_lumpy
    locations: pd.DataFrame   # location, region, description, share
    expected: np.ndarray      # expected quantity [item, location, month]
    actual: np.ndarray        # ordered quantity [item, location, month], integers
    orders: pd.DataFrame      # date, item, location, quantity


def build_items() -> pd.DataFrame:
    regular = pd.DataFrame(REGULAR_ITEMS, columns=["item", "description", "family", "unit_price", "base"])
    regular["p_order"] = 1.0
    regular["lump_mean"] = 0.0
    lumpy = pd.DataFrame(LUMPY_ITEMS, columns=["item", "description", "family", "unit_price", "p_order", "lump_mean"])
    lumpy["base"] = 0
    launch = pd.DataFrame([LAUNCH_ITEM], columns=["item", "description", "family", "unit_price"])
    launch[["base", "p_order", "lump_mean"]] = [0, 0.0, 0.0]
    items = pd.concat([regular, lumpy, launch], ignore_index=True)
    items["is_lumpy"] = items["lump_mean"] > 0
    family_order = {f: k for k, f in enumerate(SEASON_NORTH)}
    items = items.sort_values(["family", "item"], key=lambda s: s.map(family_order) if s.name == "family" else s)
    return items.reset_index(drop=True)


def seasonal_factors(families: np.ndarray, regions: np.ndarray) -> np.ndarray:
    """Seasonal factor [item, location, month]; the south peaks a month earlier and a little flatter."""
    north = {f: np.array(v) / np.mean(v) for f, v in SEASON_NORTH.items()}
    south = {f: 0.85 * np.roll(v, -1) + 0.15 for f, v in north.items()}
    out = np.empty((len(families), len(regions), HISTORY_MONTHS))
    for i, family in enumerate(families):
        for j, region in enumerate(regions):
            profile = north[family] if region == "NORTH" else south[family]
            out[i, j] = profile[CALENDAR_MONTH0]
    return out


def trend_factors(items: pd.DataFrame) -> np.ndarray:
    """Trend multiplier [item, month], 1 at 2023-12; compound growth per year, sprinklers turn in mid-2025."""
    rng = stream("trend")
    annual = items["family"].map(FAMILY_GROWTH).to_numpy() + rng.normal(0.0, 0.03, len(items))
    overrides = items["item"].map(ITEM_GROWTH_OVERRIDES)
    annual = np.where(overrides.notna(), overrides.to_numpy(dtype=float, na_value=np.nan), annual)
    monthly = np.repeat((np.log1p(annual) / 12)[:, None], HISTORY_MONTHS, axis=1)
    turned = (items["family"] == "SPRINKLERS").to_numpy() & overrides.isna().to_numpy()
    after = np.arange(HISTORY_MONTHS) >= history_position(SPRINKLER_TURN_MONTH)
    monthly[np.ix_(turned, after)] = np.log1p(SPRINKLER_GROWTH_AFTER_TURN) / 12
    monthly[:, 0] = 0.0
    return np.exp(np.cumsum(monthly, axis=1))


def event_scope(event: Event, items: pd.DataFrame, locations: pd.DataFrame) -> np.ndarray:
    """Boolean [item, location] of the cells an event touches."""
    in_items = (items["item"] == event.item) if event.item else (items["family"] == event.family)
    in_locations = np.ones(len(locations), bool) if event.region is None else (locations["region"] == event.region)
    return np.outer(np.asarray(in_items), np.asarray(in_locations))


def event_months(event: Event) -> np.ndarray:
    """Boolean over the history months inside the event window."""
    positions = np.arange(HISTORY_MONTHS)
    return (positions >= history_position(event.start)) & (positions <= history_position(event.end))


def realised_uplift(items: pd.DataFrame, locations: pd.DataFrame) -> np.ndarray:
    """Multiplier [item, location, month] of what the history's events really did."""
    factor = np.ones((len(items), len(locations), HISTORY_MONTHS))
    for event in EVENTS:
        if event.realised_pct is None:
            continue
        cells = event_scope(event, items, locations)[:, :, None] & event_months(event)[None, None, :]
        factor[cells] *= 1 + event.realised_pct / 100
    return factor


def draw_actuals(items: pd.DataFrame, locations: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """Expected and drawn monthly order quantity [item, location, month]."""
    rng = stream("actuals")
    base_shares = locations["share"].to_numpy()
    shares = rng.dirichlet(base_shares * 60, size=len(items))  # each item sells a little differently by DC
    seasons = seasonal_factors(items["family"].to_numpy(), locations["region"].to_numpy())
    expected = (items["base"].to_numpy()[:, None, None] * shares[:, :, None] * trend_factors(items)[:, None, :]
                * seasons * realised_uplift(items, locations))
    # Gamma–Poisson: Poisson counts around a mean that itself varies 15 % month to month.
    shape = 1 / 0.15**2
    regular = rng.poisson(expected * rng.gamma(shape, 1 / shape, expected.shape))
    # Lumpy spares: an order happens with chance p; its size is 1 + geometric (mean lump_mean), whose
    # squared CV (lump_mean−1)/lump_mean is above the 0.49 that marks "lumpy" (Syntetos et al. 2005).
    p_order = items["p_order"].to_numpy()[:, None, None]
    lump = items["lump_mean"].to_numpy()[:, None, None]
    happens = rng.random(expected.shape) < p_order
    extra_mean = np.maximum(lump - 1, 1e-9)
    sizes = 1 + rng.negative_binomial(1, 1 / (1 + extra_mean), expected.shape)
    is_lumpy = items["is_lumpy"].to_numpy()[:, None, None]
    actual = np.where(is_lumpy, happens * sizes, regular).astype(np.int64)
    expected = np.where(is_lumpy, p_order * lump, expected)
    return expected, actual


def split_into_order_lines(items: pd.DataFrame, locations: pd.DataFrame, actual: np.ndarray) -> pd.DataFrame:
    """Daily order lines whose monthly sums are exactly ``actual``: units spread over lines on business days."""
    rng = stream("orders")
    line_size = np.where(items["is_lumpy"], LUMPY_LINE_SIZE, items["family"].map(LINE_SIZE)).astype(float)
    wanted = np.rint(actual / line_size[:, None, None] * rng.uniform(0.6, 1.4, actual.shape))
    n_lines = np.minimum(np.clip(wanted, 1, MAX_LINES_PER_MONTH), actual).astype(np.int64)

    # Each unit goes to one of its cell's lines at random; lines left empty simply do not exist.
    flat_units = actual.ravel()
    unit_cell = np.repeat(np.arange(flat_units.size), flat_units)
    unit_line = (rng.random(unit_cell.size) * n_lines.ravel()[unit_cell]).astype(np.int64)
    line_key, quantity = np.unique(unit_cell * MAX_LINES_PER_MONTH + unit_line, return_counts=True)
    cell = line_key // MAX_LINES_PER_MONTH
    item_pos, location_pos, month_pos = np.unravel_index(cell, actual.shape)

    # Business days of every history month, flattened, with where each month starts.
    days_by_month = [pd.bdate_range(f"{m}-01", periods=31).to_series().loc[lambda s: s.dt.strftime("%Y-%m") == m]
                     for m in HISTORY]
    counts = np.array([len(d) for d in days_by_month])
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    all_days = np.concatenate([d.dt.strftime("%Y-%m-%d").to_numpy(dtype=object) for d in days_by_month])
    day_pick = starts[month_pos] + (rng.random(cell.size) * counts[month_pos]).astype(np.int64)

    lines = pd.DataFrame({
        "date": all_days[day_pick],
        "item": items["item"].to_numpy()[item_pos],
        "location": locations["location"].to_numpy()[location_pos],
        "quantity": quantity.astype(np.int64),
    })
    return lines.sort_values(["date", "item", "location"], kind="stable").reset_index(drop=True)


def build_scenario() -> Scenario:
    items = build_items()
    locations = pd.DataFrame(LOCATIONS, columns=["location", "region", "description", "share"])
    expected, actual = draw_actuals(items, locations)
    orders = split_into_order_lines(items, locations, actual)
    return Scenario(items, locations, expected, actual, orders)


# --------------------------------------------------------------------------- how each author plans

def family_region_actuals(sc: Scenario) -> tuple[list[str], np.ndarray]:
    """Ordered quantity [family, region, month] summed from the item history."""
    families = list(SEASON_NORTH)
    fam_onehot = (sc.items["family"].to_numpy()[None, :] == np.array(families)[:, None]).astype(float)
    reg_onehot = (sc.locations["region"].to_numpy()[None, :] == np.array(REGIONS)[:, None]).astype(float)
    return families, np.einsum("fi,rl,ilt->frt", fam_onehot, reg_onehot, sc.actual)


def reference_positions(cycle: str, horizon: int) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """For each planned month: the latest same calendar month already known, and how many years back it is."""
    c = history_position(cycle)
    ahead = np.arange(1, horizon + 1)
    years_back = np.ceil(ahead / 12).astype(int)
    return c + ahead - 12 * years_back, years_back, [month_name(T0 + c + a) for a in ahead]


def plan_sales(sc: Scenario) -> dict[str, pd.DataFrame]:
    """Sales plans per cycle, family × region × period, in units rounded to tens.

    forecast = same month k years earlier × (1 + believed growth)^k × (1 + optimism) × noise,
    with believed growth updated each cycle as 0.75·previous + 0.25·(last 12 months / the 12 before − 1),
    starting from the 10 % the budget assumed: a slow belief, so a turn in demand is seen late.
    Once the launch is announced, its expected units go into the family's plan.
    """
    rng = stream("sales")
    families, fr_actual = family_region_actuals(sc)
    optimism = rng.uniform(0.08, 0.13, (len(families), len(REGIONS)))
    belief = np.full((len(families), len(REGIONS)), 0.10)
    timers = families.index(LAUNCH_ITEM[2])
    launch_announced = next(e.announced for e in EVENTS if e.item == LAUNCH_ITEM[0])
    launch_season = seasonal_factors(np.array([LAUNCH_ITEM[2]]), np.array(["NORTH"]))[0, 0]
    region_shares = sc.locations.groupby("region", sort=True)["share"].sum().loc[list(REGIONS)].to_numpy()
    plans = {}
    for cycle in PAST_CYCLES + [CURRENT_CYCLE]:
        c = history_position(cycle)
        last_year = fr_actual[:, :, c - 11:c + 1].sum(axis=2)
        year_before = fr_actual[:, :, c - 23:c - 11].sum(axis=2)
        belief = 0.75 * belief + 0.25 * (last_year / year_before - 1)
        ref, years_back, periods = reference_positions(cycle, HORIZON)
        noise = rng.lognormal(-0.05**2 / 2, 0.05, (len(families), len(REGIONS), HORIZON))
        units = (fr_actual[:, :, ref] * (1 + belief[:, :, None]) ** years_back * (1 + optimism[:, :, None]) * noise)
        if month_index(cycle) >= month_index(launch_announced):
            # Sales add marketing's launch volume to the family as soon as they hear of it, optimism included.
            after_launch = np.array([month_index(p) >= month_index(LAUNCH_MONTH) for p in periods])
            launch = LAUNCH_UNITS_PER_MONTH * region_shares[:, None] * launch_season[ref][None, :] * after_launch
            units[timers] += launch * (1 + optimism[timers][:, None])
        f_idx, r_idx, p_idx = np.meshgrid(np.arange(len(families)), np.arange(len(REGIONS)), np.arange(HORIZON),
                                          indexing="ij")
        plans[cycle] = pd.DataFrame({
            "cycle": cycle,
            "family": np.array(families)[f_idx.ravel()],
            "region": np.array(REGIONS)[r_idx.ravel()],
            "period": np.array(periods)[p_idx.ravel()],
            "units_exact": units.ravel(),
            "quantity": (np.rint(units.ravel() / 10) * 10).astype(np.int64),
        })
    return plans


def plan_dc(sc: Scenario) -> dict[str, pd.DataFrame]:
    """DC plans per cycle, item × location × period, whole units.

    Regular items: same month k years earlier × g^k × lognormal noise (σ 0.15, mean 1), where g is the
    DC's own ratio of the last 12 months to the 12 before (clipped to 0.6–1.6).  Lumpy spares: each month
    a lump of twice the last 12 months' mean with chance one half, so the plan is unbiased but lumpy.
    DC-S2 plans only 6 months.  The launch item enters the DCs' plans in the cycle it is announced.
    """
    rng = stream("dc")
    items, locations = sc.items, sc.locations
    n_items, n_locations = len(items), len(locations)
    is_lumpy = items["is_lumpy"].to_numpy()[:, None, None]
    horizon_by_location = np.where(locations["location"] == SHORT_HORIZON_DC, SHORT_HORIZON_MONTHS, HORIZON)
    launch_row = int(np.flatnonzero(items["item"] == LAUNCH_ITEM[0])[0])
    launch_announced = next(e.announced for e in EVENTS if e.item == LAUNCH_ITEM[0])
    shares = np.asarray(locations["share"])
    plans = {}
    for cycle in PAST_CYCLES + [CURRENT_CYCLE]:
        c = history_position(cycle)
        ref, years_back, periods = reference_positions(cycle, HORIZON)
        recent = sc.actual[:, :, c - 5:c + 1].sum(axis=2)
        a_year_before = sc.actual[:, :, c - 17:c - 11].sum(axis=2)
        growth = np.clip((recent + 1) / (a_year_before + 1), 0.6, 1.6)
        level = sc.actual[:, :, c - 11:c + 1].mean(axis=2)
        noise = rng.lognormal(-0.15**2 / 2, 0.15, (n_items, n_locations, HORIZON))
        regular = sc.actual[:, :, ref] * growth[:, :, None] ** years_back * noise
        lump_hits = rng.random((n_items, n_locations, HORIZON)) < 0.5
        lumpy = lump_hits * (2 * level[:, :, None]) * rng.lognormal(-0.3**2 / 2, 0.3, lump_hits.shape)
        units = np.where(is_lumpy, lumpy, regular)
        if month_index(cycle) >= month_index(launch_announced):
            launch_season = seasonal_factors(np.array(["TIMERS"]), np.array(["NORTH"]))[0, 0]
            after_launch = np.array([month_index(p) >= month_index(LAUNCH_MONTH) for p in periods])
            season_of_period = launch_season[ref]  # ref shares the period's calendar month
            units[launch_row] = (LAUNCH_UNITS_PER_MONTH * 0.8 * shares[:, None] * season_of_period[None, :]
                                 * after_launch[None, :])
        planned = np.arange(HORIZON)[None, :] < horizon_by_location[:, None]  # [location, lag-1]
        if month_index(cycle) < month_index(launch_announced):
            item_kept = np.arange(n_items) != launch_row
        else:
            item_kept = np.ones(n_items, bool)
        keep = item_kept[:, None, None] & planned[None, :, :]
        i_idx, l_idx, p_idx = np.nonzero(keep)
        plans[cycle] = pd.DataFrame({
            "cycle": cycle,
            "item": items["item"].to_numpy()[i_idx],
            "location": locations["location"].to_numpy()[l_idx],
            "period": np.array(periods)[p_idx],
            "units_exact": units[i_idx, l_idx, p_idx],
            "quantity": np.rint(units[i_idx, l_idx, p_idx]).astype(np.int64),
        })
    return plans


def plan_marketing(cycle: str) -> pd.DataFrame:
    """The events marketing lists in a cycle: announced by then and touching the cycle's horizon."""
    first, last = month_index(cycle) + 1, month_index(cycle) + HORIZON
    rows = []
    for event in EVENTS:
        visible = (month_index(event.announced) <= month_index(cycle)
                   and month_index(event.end) >= first and month_index(event.start) <= last)
        if visible:
            rows.append({
                "cycle": cycle, "event": event.name, "item": event.item, "family": event.family,
                "region": event.region, "start": event.start, "end": event.end,
                "uplift_pct": None if event.units is not None else event.uplift_at(cycle),
                "units": event.units, "note": event.note,
            })
    return pd.DataFrame(rows)


def weekly_from_monthly(monthly: pd.DataFrame, weeks: list[tuple[str, list[dt.date]]]) -> pd.DataFrame:
    """Weekly units from a monthly plan: each day gets its month's daily rate; cumulative rounding keeps totals.

    A week's days before the horizon (the Monday of the first ISO week) take the first month's rate.
    """
    first_month = monthly["period"].min()
    day_months = [[max(d.strftime("%Y-%m"), first_month) for d in days] for _, days in weeks]
    pivot = monthly.pivot_table(index=["item", "location"], columns="period", values="units_exact", sort=True)
    days_in = np.array([calendar.monthrange(int(p[:4]), int(p[5:]))[1] for p in pivot.columns])
    rate = pivot.to_numpy() / days_in[None, :]
    column_of = {p: k for k, p in enumerate(pivot.columns)}
    week_matrix = np.zeros((len(pivot.columns), len(weeks)))
    for w, months in enumerate(day_months):
        for m in months:
            week_matrix[column_of[m], w] += 1
    exact = rate @ week_matrix
    rounded = np.diff(np.rint(np.cumsum(exact, axis=1)), axis=1, prepend=0).astype(np.int64)
    keys = pivot.index.to_frame(index=False)
    return pd.DataFrame({
        "item": np.repeat(keys["item"].to_numpy(), len(weeks)),
        "location": np.repeat(keys["location"].to_numpy(), len(weeks)),
        "week": np.tile([name for name, _ in weeks], len(keys)),
        "quantity": rounded.ravel(),
    })


def horizon_weeks(cycle: str, count: int) -> list[tuple[str, list[dt.date]]]:
    """The ISO weeks from the one holding the horizon's first day: ("YYYY-Www", its seven dates)."""
    first_day = dt.date(int(cycle[:4]), int(cycle[5:]), 1) + dt.timedelta(days=calendar.monthrange(
        int(cycle[:4]), int(cycle[5:]))[1])
    monday = first_day - dt.timedelta(days=first_day.weekday())
    weeks = []
    for w in range(count):
        start = monday + dt.timedelta(weeks=w)
        iso = start.isocalendar()
        weeks.append((f"{iso.year}-W{iso.week:02d}", [start + dt.timedelta(days=d) for d in range(7)]))
    return weeks


# --------------------------------------------------------------------------- writing

def write_csv(frame: pd.DataFrame, path: Path, **options) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    frame.to_csv(path, index=False, lineterminator="\n", **options)


def write_xlsx(frame: pd.DataFrame, path: Path, sheet: str) -> None:
    """One-sheet workbook with stable bytes: fixed document dates and zip entry times."""
    book = openpyxl.Workbook()
    ws = book.active
    ws.title = sheet
    ws.append(list(frame.columns))
    values = frame.astype(object).where(frame.notna(), None)
    for row in values.itertuples(index=False):
        ws.append([v.item() if isinstance(v, np.generic) else v for v in row])
    for column, width in zip("ABCDEFGHIJ", [28, 14, 14, 9, 9, 9, 11, 9, 48]):
        ws.column_dimensions[column].width = width
    book.properties.creator = COMPANY
    book.properties.created = FIXED_TIMESTAMP
    buffer = io.BytesIO()
    book.save(buffer)
    stamp = FIXED_TIMESTAMP.strftime("%Y-%m-%dT%H:%M:%SZ")
    out = io.BytesIO()
    with zipfile.ZipFile(buffer) as src, zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as dst:
        for info in src.infolist():
            data = src.read(info.filename)
            if info.filename == "docProps/core.xml":
                # openpyxl stamps "modified" with the clock on save.
                data = re.sub(rb"(<dcterms:modified[^>]*>)[^<]*", rb"\g<1>" + stamp.encode(), data)
            entry = zipfile.ZipInfo(info.filename, date_time=FIXED_TIMESTAMP.timetuple()[:6])
            entry.compress_type = zipfile.ZIP_DEFLATED
            entry.external_attr = 0o644 << 16
            dst.writestr(entry, data)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(out.getvalue())


def bom_frame() -> pd.DataFrame:
    rows = [(parent, comp, qty) for parent, comps in KIT_BOMS.items() for comp, qty in comps]
    rows += [(parent, comp, qty) for parent, comps in SUB_ASSEMBLIES.items() for comp, qty in comps]
    bom = pd.DataFrame(rows, columns=["parent", "component", "qty_per"])
    bom["lead_time_months"] = bom["component"].map(LEAD_TIME_MONTHS).astype(np.int64)
    return bom


def mix_prices(sc: Scenario, region: str) -> pd.Series:
    """Units-weighted mean list price per family over the last 12 history months in one region."""
    in_region = (sc.locations["region"] == region).to_numpy()
    units = sc.actual[:, in_region, -12:].sum(axis=(1, 2))
    frame = pd.DataFrame({"family": sc.items["family"], "units": units,
                          "revenue": units * sc.items["unit_price"].to_numpy()})
    totals = frame.groupby("family", sort=False)[["units", "revenue"]].sum()
    return totals["revenue"] / totals["units"]


SALES_NORTH_NOTES = {
    ("DRIP-KITS", "2027-03"): "Spring campaign: retail listings confirmed",
    ("SPRINKLERS", "2027-06"): "Hot summer assumed, as in 2025",
    ("TIMERS", "2027-03"): "Includes first Wi-Fi controller orders",
    ("SPARES", "2026-12"): "Year-end stock-up by installers",
}
SALES_SOUTH_NOTES = {
    ("DRIP-KITS", "2027-02"): "Pre-season café-terrace displays – early orders",
    ("SPRINKLERS", "2027-06"): "Summer deal again – volumes as in 2026",
    ("TIMERS", "2027-04"): "Installer fairs in April – expect a peak",
}


def current_sales(plan: pd.DataFrame, sc: Scenario) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The two regional sales returns of the current cycle: north in units, south in money."""
    north = plan[plan["region"] == "NORTH"].copy()
    north["note"] = [SALES_NORTH_NOTES.get((f, p)) for f, p in zip(north["family"], north["period"])]
    north = north[["family", "region", "period", "quantity", "note"]]
    south = plan[plan["region"] == "SOUTH"].copy()
    price = south["family"].map(mix_prices(sc, "SOUTH"))
    south["value"] = (np.rint(south["units_exact"] * price / 10) * 10).astype(np.int64)
    south["note"] = [SALES_SOUTH_NOTES.get((f, p)) for f, p in zip(south["family"], south["period"])]
    return north, south[["family", "region", "period", "value", "note"]]


def broken_sales(north: pd.DataFrame) -> pd.DataFrame:
    """A sales return with four deliberate mistakes: unknown family, bad month, negative, duplicate key."""
    rows = north[north["period"] <= "2027-03"].reset_index(drop=True).copy()
    rows["note"] = rows["note"].astype(object)
    rows.loc[rows.index[1], "family"] = "DRIP-KIT"        # typo of DRIP-KITS
    rows.loc[rows.index[6], "period"] = "2027-13"         # no 13th month
    rows.loc[rows.index[9], "quantity"] = -40             # negative units
    duplicate = rows.iloc[[12]].assign(note="Second line for the same month")
    return pd.concat([rows, duplicate], ignore_index=True)


PEOPLE = {
    "master": "Wren Caldicott",
    "actuals": "Hollis Brandt",
    "sales_bulk": "Della Pryce",
    "sales_north": "Idris Mallory",
    "sales_south": "Ines Marchetti",
    "dc_bulk": "Tobias Farrant",
    "DC-N1": "Juniper Achebe",
    "DC-N2": "Rafe Osterman",
    "DC-S1": "Marisol Thackeray",
    "DC-S2": "Cato Lindgren-Bell",
    "marketing": "Amara Quennell",
}


#: What the demo's review meeting decides (recorded after the first run, applied by the second).
MEETING_DECISIONS = [
    {"family": "SPRINKLERS", "region": "NORTH", "period": "2027-04", "kind": "pct", "amount": 8.0,
     "reason": "Garden-centre group in the north confirmed an extra spring display run",
     "author": "Wren Caldicott"},
    {"item": "TM-HUB-4", "period": "2027-03", "kind": "set", "amount": 240.0,
     "reason": "Launch month: hold the first allocation at the committed retailer orders",
     "author": "Amara Quennell"},
]


def manifest_files() -> list[dict]:
    entry = lambda path, kind, source, cycle, who: {  # noqa: E731
        "path": path, "kind": kind, "source": source, "cycle": cycle, "submitted_by": PEOPLE[who]}
    files = [
        entry("master/items.csv", "items", None, None, "master"),
        entry("master/locations.csv", "locations", None, None, "master"),
        entry("master/bom.csv", "bom", None, None, "master"),
        entry("history/orders.csv", "actuals", None, None, "actuals"),
        entry("past/sales_history.csv", "forecast", "sales", None, "sales_bulk"),
        entry("past/dc_history.csv", "forecast", "dc", None, "dc_bulk"),
        entry("past/marketing_events_history.csv", "events", "marketing", None, "marketing"),
        entry("current/sales_north.xlsx", "forecast", "sales", CURRENT_CYCLE, "sales_north"),
        entry("current/sales_south.csv", "forecast", "sales", CURRENT_CYCLE, "sales_south"),
    ]
    for location, _, _, _ in LOCATIONS:
        code = location.removeprefix("DC-").lower()
        suffix = "_weekly" if location == SHORT_HORIZON_DC else ""
        files.append(entry(f"current/dc_{code}{suffix}.csv", "forecast", "dc", CURRENT_CYCLE, location))
    files.append(entry("current/marketing_events.xlsx", "events", "marketing", CURRENT_CYCLE, "marketing"))
    broken = entry("broken/sales_typo.csv", "forecast", "sales", CURRENT_CYCLE, "sales_north")
    broken["expect"] = "rejected"
    files.append(broken)
    return files


def write_all(out: Path) -> list[Path]:
    """Build the scenario and write every file under ``out``; returns the paths written."""
    sc = build_scenario()
    assert (sc.orders.assign(month=sc.orders["date"].str.slice(0, 7))
            .groupby("month")["quantity"].sum().to_numpy() == sc.actual.sum(axis=(0, 1))).all()

    master_items = sc.items[["item", "description", "family", "unit_price"]]
    write_csv(master_items, out / "master/items.csv", float_format="%.2f")
    write_csv(sc.locations[["location", "region", "description"]], out / "master/locations.csv")
    write_csv(bom_frame(), out / "master/bom.csv")
    write_csv(sc.orders, out / "history/orders.csv")

    sales = plan_sales(sc)
    dc = plan_dc(sc)
    write_csv(pd.concat([sales[c] for c in PAST_CYCLES])[["cycle", "family", "region", "period", "quantity"]],
              out / "past/sales_history.csv")
    write_csv(pd.concat([dc[c] for c in PAST_CYCLES])[["cycle", "item", "location", "period", "quantity"]],
              out / "past/dc_history.csv")
    marketing_past = pd.concat([plan_marketing(c) for c in PAST_CYCLES], ignore_index=True)
    marketing_past["uplift_pct"] = marketing_past["uplift_pct"].astype("Int64")
    write_csv(marketing_past.drop(columns="units"), out / "past/marketing_events_history.csv")

    north, south = current_sales(sales[CURRENT_CYCLE], sc)
    write_xlsx(north, out / "current/sales_north.xlsx", "forecast")
    write_csv(south, out / "current/sales_south.csv", sep=";", encoding="cp1252")
    current_dc = dc[CURRENT_CYCLE]
    for location, _, _, _ in LOCATIONS:
        code = location.removeprefix("DC-").lower()
        rows = current_dc[current_dc["location"] == location]
        if location == SHORT_HORIZON_DC:
            weekly = weekly_from_monthly(rows, horizon_weeks(CURRENT_CYCLE, WEEKLY_WEEKS))
            write_csv(weekly, out / f"current/dc_{code}_weekly.csv")
        else:
            write_csv(rows[["item", "location", "period", "quantity"]], out / f"current/dc_{code}.csv")
    events = plan_marketing(CURRENT_CYCLE)
    events = events[["event", "family", "item", "region", "start", "end", "uplift_pct", "units", "note"]]
    write_xlsx(events, out / "current/marketing_events.xlsx", "events")
    write_csv(broken_sales(north), out / "broken/sales_typo.csv")

    manifest = {
        "company": COMPANY,
        "current_cycle": CURRENT_CYCLE,
        "horizon": HORIZON,
        "past_cycles": PAST_CYCLES,
        "files": manifest_files(),
        "decisions": MEETING_DECISIONS,
        "publisher": PEOPLE["master"],
    }
    (out / "manifest.json").write_text(json.dumps(manifest, indent=2, ensure_ascii=False) + "\n", encoding="utf-8")
    return [out / f["path"] for f in manifest["files"]] + [out / "manifest.json"]


def main(argv: list[str]) -> int:
    out = Path(argv[1]).resolve() if len(argv) > 1 else HERE
    for path in write_all(out):
        print(f"{path.stat().st_size:>10,d}  {path.relative_to(out)}")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
