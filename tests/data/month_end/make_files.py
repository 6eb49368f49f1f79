"""Write the small invented company of this folder (run from anywhere: python tests/data/month_end/make_files.py).

"Fernhollow Pumps" (invented) sells six items in two families from three
distribution centers in two regions.  The files are what a month end hands
the tool: master data, 36 months of monthly order totals through 2026-10, a
bill of material, and each DC's forecast for cycle 2026-10 (12 months).
Numbers come from a fixed seed, so rerunning this script rewrites the same
bytes; the tests read the committed files.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

HERE = Path(__file__).parent
CYCLE = "2026-10"
HORIZON = 12
ITEMS = pd.DataFrame({
    "item": ["PK-100", "PK-200", "PK-300", "PT-IMP", "PT-SEAL", "PT-HOSE"],
    "family": ["PUMP-KITS"] * 3 + ["PARTS"] * 3,
    "unit_price": [120.0, 185.0, 240.0, 14.5, 3.2, 9.9],
    "description": ["Garden pump kit", "Pond pump kit", "Well pump kit", "Impeller", "Seal set", "Hose, 10 m"],
})
LOCATIONS = pd.DataFrame({
    "location": ["DC-E1", "DC-E2", "DC-W1"],
    "region": ["EAST", "EAST", "WEST"],
    "description": ["Eastern hub", "Eastern depot", "Western hub"],
})
BOM = pd.DataFrame({
    "parent": ["PK-100", "PK-100", "PK-200", "PK-200", "PK-300", "PK-300"],
    "component": ["PT-IMP", "PT-SEAL", "PT-IMP", "PT-HOSE", "PT-SEAL", "PT-HOSE"],
    "qty_per": [1, 2, 1, 1, 4, 2],
    "lead_time_months": [1, 0, 1, 2, 0, 1],
})
LEVEL = {"PK-100": 90, "PK-200": 60, "PK-300": 30, "PT-IMP": 40, "PT-SEAL": 120, "PT-HOSE": 25}
SHARE = {"DC-E1": 0.5, "DC-E2": 0.2, "DC-W1": 0.3}


def _months(first: str, count: int) -> list[str]:
    return [str(p) for p in pd.period_range(first, periods=count, freq="M")]


def orders(rng: np.random.Generator) -> pd.DataFrame:
    months = _months("2023-11", 36)
    season = 1 + 0.25 * np.sin(2 * np.pi * (np.arange(36) % 12) / 12)
    rows = []
    for item, level in LEVEL.items():
        for location, share in SHARE.items():
            mean = level * share * season
            quantity = rng.poisson(mean)
            rows += [(item, location, m, int(q)) for m, q in zip(months, quantity)]
    return pd.DataFrame(rows, columns=["item", "location", "period", "quantity"])


def dc_forecast(rng: np.random.Generator, location: str) -> pd.DataFrame:
    months = _months("2026-11", HORIZON)
    rows = []
    for item, level in LEVEL.items():
        values = np.round(level * SHARE[location] * (1 + rng.normal(0, 0.1, HORIZON)))
        rows += [(item, location, m, int(max(v, 0))) for m, v in zip(months, values)]
    return pd.DataFrame(rows, columns=["item", "location", "period", "quantity"])


def main() -> None:
    rng = np.random.default_rng(20261002)
    ITEMS.to_csv(HERE / "items.csv", index=False)
    LOCATIONS.to_csv(HERE / "locations.csv", index=False)
    BOM.to_csv(HERE / "bom.csv", index=False)
    orders(rng).to_csv(HERE / "orders.csv", index=False)
    for location in LOCATIONS["location"]:
        dc_forecast(rng, location).to_csv(HERE / f"dc_{location[3:].lower()}.csv", index=False)


if __name__ == "__main__":
    main()
