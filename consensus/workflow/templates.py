"""Fill-in files for submitters: every key and month of the horizon, the references beside them, and a track record.

The wide workbook (the default) has one row per key and one column per
month; under each row, as references never read back: the orders of the last
12 months, the orders of the same month a year earlier, the last consensus
(the previous cycle's newest run) and the statistical forecast of this cycle
(its draft run's ``value_statistical``; without a run, "not yet computed",
unless ``statistical="compute"`` computes it on the spot with
:func:`consensus.methods.plan.current_sources`).  Its second sheet is the
submitter's track record, read from the stored scorecard of the newest run of
this cycle (else of the previous one).  The long layout of earlier versions
is kept (``layout="long"``).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from consensus import periods
from consensus.errors import ConsensusError, NotFound
from consensus.intake.template_file import ReferenceLine, WideTemplate, write_template, write_wide_template
from consensus.methods.track_record import TrackRecord, describe_bucket, explain_weights, pool_groups
from consensus.store import frames
from consensus.store.db import session_scope
from consensus.store.models import ConsensusRun, Cycle, utcnow
from consensus.vocabulary import TEMPLATE_LINES, label, source_label
from consensus.workflow.cycles import get_cycle
from consensus.workflow.inputs import run_parts
from consensus.workflow.publish import latest_run, run_lines
from consensus.workflow.settings import frozen_months

GRAINS = ("item", "family")
PLACES = ("location", "region")
LAYOUTS = ("wide", "long")
STATISTICAL_CHOICES = ("run", "compute")
HISTORY_MONTHS = 12


@dataclass(frozen=True)
class TemplateWritten:
    """What ``make_template`` wrote: the file, its layout, its rows to fill in and the cells (or rows) to fill."""

    path: Path
    layout: str
    rows: int
    cells: int
    months: int

    def line(self) -> str:
        if self.layout == "long":
            return f"wrote {self.path} ({self.rows:,} rows to fill in)"
        return (f"wrote {self.path} ({self.rows:,} row{'s' if self.rows != 1 else ''} × {self.months} months: "
                f"{self.cells:,} cells to fill in)")


def _scope_master(session, region: str | None, location: str | None) -> tuple[pd.DataFrame, pd.DataFrame]:
    items, locations = frames.load_items(session), frames.load_locations(session)
    if items.empty or locations.empty:
        raise ConsensusError("load items and locations master data first ('consensus master')")
    if region is not None:
        locations = locations[locations["region"] == region]
    if location is not None:
        locations = locations[locations["location"] == location]
    if locations.empty:
        raise NotFound(f"no location matches region {region!r} / location {location!r}")
    return items, locations


def _previous_run(session, cycle: str) -> ConsensusRun | None:
    try:
        return latest_run(session, cycle)
    except NotFound:
        return None


def _at_grain(cells: pd.DataFrame, value: str, items: pd.DataFrame, locations: pd.DataFrame, product: str,
              place: str) -> pd.DataFrame:
    """Cells (item, location, period, ``value``) summed to the template's grain, within its locations."""
    if cells.empty:
        return pd.DataFrame(columns=[product, place, "period", "quantity"])
    joined = (cells[["item", "location", "period", value]]
              .merge(items[["item", "family"]].drop_duplicates("item"), on="item")
              .merge(locations[["location", "region"]], on="location"))
    return (joined.groupby([product, place, "period"], as_index=False)[value].sum()
            .rename(columns={value: "quantity"}))


def template_frame(session, cycle: Cycle, *, product: str = "item", place: str = "location",
                   region: str | None = None, location: str | None = None) -> pd.DataFrame:
    """The long layout: keys × months of the cycle's horizon, quantity empty, and the last cycle's consensus."""
    if product not in GRAINS or place not in PLACES:
        raise ConsensusError(f"grain must name one of {GRAINS} and one of {PLACES}")
    items, locations = _scope_master(session, region, location)
    products = items[[product]].drop_duplicates()
    places = locations[[place]].drop_duplicates()
    months = pd.DataFrame({"period": periods.horizon_months(cycle.name, cycle.horizon)})
    frame = products.merge(places, how="cross").merge(months, how="cross")
    frame["quantity"] = pd.NA
    run = _previous_run(session, periods.shift_month(cycle.name, -1))
    lines = run_lines(session, run) if run is not None else pd.DataFrame(columns=["item", "location", "period",
                                                                                   "consensus"])
    ref = _at_grain(lines, "consensus", items, locations, product, place)
    if not ref.empty:
        frame = frame.merge(ref.rename(columns={"quantity": "last_consensus"}), on=[product, place, "period"],
                            how="left")
        frame["last_consensus"] = frame["last_consensus"].round(0)
    else:
        frame["last_consensus"] = pd.NA
    frame["note"] = ""
    return frame.sort_values([product, place, "period"], ignore_index=True)


def wide_template(session, cycle: Cycle, *, source: str, product: str = "item", place: str = "location",
                  region: str | None = None, location: str | None = None,
                  statistical: pd.DataFrame | None = None) -> WideTemplate:
    """Everything the wide workbook shows for one submitter, read from the store.

    ``statistical`` (cells: item, location, period, quantity) is used when
    the cycle has no run yet; otherwise the run's ``value_statistical`` is.
    """
    if product not in GRAINS or place not in PLACES:
        raise ConsensusError(f"grain must name one of {GRAINS} and one of {PLACES}")
    items, locations = _scope_master(session, region, location)
    keys = (items[[product]].drop_duplicates().merge(locations[[place]].drop_duplicates(), how="cross")
            .sort_values([product, place], ignore_index=True))
    horizon = periods.horizon_months(cycle.name, cycle.horizon)
    history = [periods.shift_month(cycle.name, -k) for k in range(HISTORY_MONTHS - 1, -1, -1)]
    frozen = horizon[:min(frozen_months(session), len(horizon))]

    actuals = frames.load_actuals(session)
    actuals = actuals[actuals["quantity"].notna() & (actuals["period"] <= cycle.name)]
    orders = _at_grain(actuals, "quantity", items, locations, product, place)
    recent = orders[orders["period"].isin(history)]
    a_year_on = orders.assign(period=[periods.shift_month(m, 12) for m in orders["period"]]) if len(orders) else orders
    a_year_on = a_year_on[a_year_on["period"].isin(horizon)]

    previous = periods.shift_month(cycle.name, -1)
    last_run = _previous_run(session, previous)
    if last_run is not None:
        last = _at_grain(run_lines(session, last_run), "consensus", items, locations, product, place)
        last_label = f"{label(TEMPLATE_LINES, 'last_consensus')} (cycle {previous}, {last_run.status})"
    else:
        last = pd.DataFrame(columns=[product, place, "period", "quantity"])
        last_label = f"{label(TEMPLATE_LINES, 'last_consensus')} (none: cycle {previous} has no consensus)"

    this_run = _previous_run(session, cycle.name)
    stat_label = label(TEMPLATE_LINES, "statistical")
    if this_run is not None:
        cells = run_parts(session, this_run, ["cells"])["cells"]
        stat = _at_grain(cells, "value_statistical", items, locations, product, place) \
            if "value_statistical" in cells.columns else pd.DataFrame(columns=[product, place, "period", "quantity"])
        stat_label += f" (run #{this_run.id} of cycle {cycle.name})"
    elif statistical is not None:
        stat = _at_grain(statistical, "quantity", items, locations, product, place)
        stat_label += " (computed for this template)"
    else:
        stat = pd.DataFrame(columns=[product, place, "period", "quantity"])
        stat_label += " (not yet computed)"

    references = (
        ReferenceLine("orders", f"{label(TEMPLATE_LINES, 'orders')} ({history[0]} … {history[-1]})", recent),
        ReferenceLine("orders_last_year", label(TEMPLATE_LINES, "orders_last_year"), a_year_on),
        ReferenceLine("last_consensus", last_label, last),
        ReferenceLine("statistical", stat_label, stat),
    )
    scope = f"region {region}" if region else (f"location {location}" if location else "all")
    record_run = this_run if this_run is not None else last_run
    families = sorted(items.loc[items[product].isin(keys[product]), "family"].astype(str).unique())
    record = None
    missing = (f"No consensus run of cycle {cycle.name} or {previous} yet, so no forecast of yours has been "
               "measured.")
    if record_run is not None:
        record = track_record(session, record_run, source=source, region=region, location=location, place=place,
                              families=families, regions=sorted(locations["region"].astype(str).unique()),
                              items=sorted(keys[product].astype(str)) if product == "item" else None,
                              scope=scope)
    due = f" Due {cycle.due.isoformat()}." if cycle.due else ""
    notes = (
        f"Plans {horizon[0]} … {horizon[-1]} (order history known through {cycle.name}).{due}",
        "Type your forecast in the yellow cells: units a month, 0 or more. A blank cell means no forecast, not zero.",
        "Grey lines and columns are references and are never read back. The sheet is protected (no password) "
        "to keep them safe." + (f" {len(frozen)} frozen month{'s' if len(frozen) != 1 else ''} "
                                "(cycle.frozen_months) are shown but locked." if frozen else ""),
        "The sheet 'Your track record' shows how your past forecasts compared with what customers ordered.",
    )
    title = f"{source_label(source)} forecast, cycle {cycle.name}, {scope if scope != 'all' else 'all places'}"
    meta = {"source": source, "cycle": cycle.name, "scope": scope, "grain": f"{product},{place}",
            "generated_at": utcnow().isoformat()}
    return WideTemplate(keys=keys, history_months=tuple(history), horizon_months=tuple(horizon),
                        frozen_months=tuple(frozen), references=references, meta=meta, title=title, notes=notes,
                        track_record=record, track_record_missing=missing)


def track_record(session, run: ConsensusRun, *, source: str, region: str | None, location: str | None,
                 place: str, families: list[str], regions: list[str], items: list[str] | None,
                 scope: str) -> TrackRecord:
    """A submitter's track record from a stored run: scorecard rows of their groups, pooled, and their weights.

    Groups: family × region rows of the submitter's region (``region``), the
    location's row (``location``), or every family × region (or family)
    row of their families when the file covers all places.
    """
    parts = run_parts(session, run, ["accuracy_groups", "weights", "accuracy_history"])
    groups = parts.get("accuracy_groups", pd.DataFrame())
    if location is not None:
        level, keep = "location", lambda g: g["node_location"] == location
    elif region is not None:
        level, keep = "family_region", lambda g: (g["node_location"] == region) & g["node_item"].isin(families)
    elif place == "region":
        level, keep = "family_region", lambda g: g["node_item"].isin(families)
    else:
        level, keep = "family", lambda g: g["node_item"].isin(families)
    if groups.empty:
        mine = pd.DataFrame(columns=["level", "source", "lag_bucket", "node_item", "node_location", "n", "mad",
                                     "wape", "bias", "bias_pct", "tracking_signal", "ts_flag"])
    else:
        mine = groups[(groups["level"] == level) & (groups["source"] == source)]
        mine = mine[keep(mine)].sort_values(["node_item", "node_location", "lag_bucket"], kind="stable")
    mine = mine.reset_index(drop=True)
    pooled = pool_groups(mine)
    pooled["sentence"] = [describe_bucket(r.lag_bucket, wape=r.wape, bias_pct=r.bias_pct,
                                          tracking_signal=r.tracking_signal, n=r.n)
                          for r in pooled.itertuples(index=False)]  # one per lag bucket
    spec = run.spec or {}
    weight_spec = spec.get("weights", {})
    segment = weight_spec.get("segment", "family")
    segments = {"family": families, "region": [region] if region else regions, "all": ["all"],
                "item": items or []}.get(segment, families)
    weights = explain_weights(parts.get("weights", pd.DataFrame()), source=source, segments=segments,
                              scheme=weight_spec.get("scheme", ""))
    history = parts.get("accuracy_history", pd.DataFrame())
    cycles = tuple(sorted(history.loc[(history["level"] == level) & (history["source"] == source), "cycle"]
                          .astype(str).unique())) if len(history) else ()
    return TrackRecord(source=source, scope=scope, level=level, run_cycle=run.cycle, run_id=int(run.id),
                       run_status=str(run.status), cycles=cycles, groups=mine, pooled=pooled, weights=weights,
                       scheme=str(weight_spec.get("scheme", "")))


def _computed_statistical(cycle: str, url) -> pd.DataFrame:
    """This cycle's statistical forecast at planning grain, computed now (every series' fit: seconds per thousand)."""
    from consensus.methods.plan import RunSpec, current_sources
    from consensus.workflow.inputs import load_plan_inputs

    sources = current_sources(load_plan_inputs(cycle, url=url, spec=RunSpec(), require_open=False).inputs)
    return sources.loc[sources["source"] == "statistical", ["item", "location", "period", "quantity"]]


def make_template(cycle: str, *, source: str, out: Path | str, grain: str = "item,location",
                  region: str | None = None, location: str | None = None, layout: str = "wide",
                  statistical: str = "run", url=None) -> TemplateWritten:
    """Write the fill-in file; an XLSX carries its source, cycle and scope on a hidden sheet."""
    parts = [g.strip() for g in grain.split(",") if g.strip()]
    product = next((p for p in parts if p in GRAINS), "item")
    place = next((p for p in parts if p in PLACES), "location")
    unknown = [p for p in parts if p not in GRAINS + PLACES]
    if unknown:
        raise ConsensusError(f"--grain takes item or family and location or region, not {', '.join(unknown)}")
    if layout not in LAYOUTS:
        raise ConsensusError(f"--layout must be one of {', '.join(LAYOUTS)}, not {layout!r}")
    if statistical not in STATISTICAL_CHOICES:
        raise ConsensusError(f"--statistical must be one of {', '.join(STATISTICAL_CHOICES)}, not {statistical!r}")
    scope = f"region {region}" if region else (f"location {location}" if location else "all")
    if layout == "long":
        with session_scope(url, write=False) as session:
            c = get_cycle(session, cycle)
            frame = template_frame(session, c, product=product, place=place, region=region, location=location)
        path = write_template(Path(out), frame, meta={"source": source, "cycle": cycle, "scope": scope,
                                                      "grain": f"{product},{place}",
                                                      "generated_at": utcnow().isoformat()})
        months = frame["period"].nunique()
        return TemplateWritten(path, "long", len(frame), len(frame), months)
    with session_scope(url, write=False) as session:
        c = get_cycle(session, cycle)
        has_run = _previous_run(session, cycle) is not None
    computed = _computed_statistical(cycle, url) if statistical == "compute" and not has_run else None
    with session_scope(url, write=False) as session:
        c = get_cycle(session, cycle)
        book = wide_template(session, c, source=source, product=product, place=place, region=region,
                             location=location, statistical=computed)
    path = write_wide_template(Path(out), book)
    open_months = len(book.horizon_months) - len(book.frozen_months)
    return TemplateWritten(path, "wide", len(book.keys), len(book.keys) * open_months, open_months)


__all__ = ["make_template", "wide_template", "template_frame", "track_record", "TemplateWritten", "GRAINS",
           "PLACES", "LAYOUTS"]
