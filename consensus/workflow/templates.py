"""Fill-in files for submitters: every key and month of the horizon, with last cycle's consensus beside it."""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from consensus import periods
from consensus.errors import ConsensusError, NotFound
from consensus.intake.template_file import write_template
from consensus.store import frames
from consensus.store.db import session_scope
from consensus.store.models import Cycle, utcnow
from consensus.workflow.cycles import get_cycle
from consensus.workflow.publish import latest_run, run_lines

GRAINS = ("item", "family")
PLACES = ("location", "region")


def template_frame(session, cycle: Cycle, *, product: str = "item", place: str = "location",
                   region: str | None = None, location: str | None = None) -> pd.DataFrame:
    """Keys × months of the cycle's horizon, quantity empty, and the last cycle's consensus at that grain."""
    if product not in GRAINS or place not in PLACES:
        raise ConsensusError(f"grain must name one of {GRAINS} and one of {PLACES}")
    items, locations = frames.load_items(session), frames.load_locations(session)
    if items.empty or locations.empty:
        raise ConsensusError("load items and locations master data first ('consensus master')")
    if region is not None:
        locations = locations[locations["region"] == region]
    if location is not None:
        locations = locations[locations["location"] == location]
    if locations.empty:
        raise NotFound(f"no location matches region {region!r} / location {location!r}")
    products = items[[product]].drop_duplicates()
    places = locations[[place]].drop_duplicates()
    months = pd.DataFrame({"period": periods.horizon_months(cycle.name, cycle.horizon)})
    frame = products.merge(places, how="cross").merge(months, how="cross")
    frame["quantity"] = pd.NA
    previous = periods.shift_month(cycle.name, -1)
    try:
        lines = run_lines(session, latest_run(session, previous))
    except NotFound:
        lines = pd.DataFrame(columns=["item", "location", "period", "consensus"])
    if not lines.empty:
        lines = lines.merge(items[["item", "family"]], on="item").merge(locations[["location", "region"]],
                                                                         on="location")
        ref = lines.groupby([product, place, "period"], as_index=False)["consensus"].sum()
        frame = frame.merge(ref.rename(columns={"consensus": "last_consensus"}), on=[product, place, "period"],
                            how="left")
        frame["last_consensus"] = frame["last_consensus"].round(0)
    else:
        frame["last_consensus"] = pd.NA
    frame["note"] = ""
    return frame.sort_values([product, place, "period"], ignore_index=True)


def make_template(cycle: str, *, source: str, out: Path | str, grain: str = "item,location",
                  region: str | None = None, location: str | None = None, url=None) -> tuple[Path, int]:
    """Write the fill-in file; an XLSX carries its source, cycle and scope on a hidden sheet."""
    parts = [g.strip() for g in grain.split(",") if g.strip()]
    product = next((p for p in parts if p in GRAINS), "item")
    place = next((p for p in parts if p in PLACES), "location")
    unknown = [p for p in parts if p not in GRAINS + PLACES]
    if unknown:
        raise ConsensusError(f"--grain takes item or family and location or region, not {', '.join(unknown)}")
    scope = f"region {region}" if region else (f"location {location}" if location else "all")
    with session_scope(url) as session:
        c = get_cycle(session, cycle)
        frame = template_frame(session, c, product=product, place=place, region=region, location=location)
    path = write_template(Path(out), frame, meta={"source": source, "cycle": cycle, "scope": scope,
                                                  "grain": f"{product},{place}",
                                                  "generated_at": utcnow().isoformat()})
    return path, len(frame)
