"""Compute and store a cycle's consensus: statistical source, alignment, weights, combination, bands, audit.

The run is one transaction.  Its settings (:class:`RunSpec`) and the ids and
hashes of every submission it read are stored with it, so the same inputs give
the same numbers and every number can be explained from stored rows.
"""

from __future__ import annotations

import hashlib
import warnings as warnings_module
from collections.abc import Callable
from dataclasses import asdict, dataclass, field

import numpy as np
import pandas as pd
from sqlalchemy import delete, select, update

from consensus import periods
from consensus.errors import InvalidSpec
from consensus.methods import accuracy, combine, events, intervals
from consensus.methods.weights import WeightSpec, estimate_weights
from consensus.store import frames
from consensus.store.db import session_scope
from consensus.store.models import (
    AlignedLine,
    AlignmentTrace,
    CellSource,
    ConsensusLine,
    ConsensusRun,
    Cycle,
    Submission,
    SubmissionCycle,
    WeightRecord,
)
from consensus.workflow import decisions
from consensus.workflow.align import align_lines
from consensus.workflow.cycles import get_cycle
from consensus.workflow.reconciliation import DEFAULT_RECONCILIATION, RECONCILIATION_METHODS, reconcile_consensus
from consensus.workflow.statistical_source import NAIVE, STATISTICAL, ensure_statistical

COMBINED_SOURCES = ("sales", "marketing", "dc", STATISTICAL)
ALIGNMENT_VERSION = "1"  # bump when alignment changes, so cached past alignments are redone
ALIGNED_COLUMNS_NO_CYCLE = ["source", "item", "location", "period", "lag", "quantity"]
RECONCILIATIONS = RECONCILIATION_METHODS


@dataclass(frozen=True)
class RunSpec:
    """Every setting of a consensus run; stored with the run."""

    weights: WeightSpec = field(default_factory=WeightSpec)
    band_levels: tuple[float, ...] = (0.8, 0.95)
    mix_window_months: int = 12
    reconciliation: str = DEFAULT_RECONCILIATION

    def __post_init__(self) -> None:
        if self.reconciliation not in RECONCILIATIONS:
            raise InvalidSpec(f"reconciliation must be one of {', '.join(RECONCILIATIONS)}")
        if not all(0 < level < 1 for level in self.band_levels):
            raise InvalidSpec("band levels must lie strictly between 0 and 1")
        if not 1 <= self.mix_window_months <= 60:
            raise InvalidSpec("mix window must be 1 to 60 months")

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass
class RunSummary:
    run_id: int
    cycle: str
    cells: int
    sources: list[str]
    total: float
    flagged: int
    warnings: list[str]

    def line(self) -> str:
        return (f"cycle {self.cycle}: run #{self.run_id}, {self.cells:,} cells from {', '.join(self.sources)}; "
                f"total {self.total:,.0f} units; {self.flagged} cells flagged for disagreement")


def _previous_consensus(session, cycles: list[str]) -> pd.DataFrame:
    """The latest stored run of each earlier cycle, as source 'consensus' (published runs first)."""
    runs = frames.read_frame(session, select(ConsensusRun.__table__.c.id, ConsensusRun.__table__.c.cycle,
                                             ConsensusRun.__table__.c.status)
                             .where(ConsensusRun.__table__.c.cycle.in_(cycles)), ["id", "cycle", "status"])
    if runs.empty:
        return pd.DataFrame(columns=["source", "cycle", "item", "location", "period", "quantity"])
    runs["rank"] = runs["status"].map({"published": 0, "draft": 1, "superseded": 2})
    chosen = runs.sort_values(["cycle", "rank", "id"], ascending=[True, True, False]).drop_duplicates("cycle")
    cl = ConsensusLine.__table__
    lines = frames.read_frame(session, select(cl.c.run_id, cl.c.item, cl.c.location, cl.c.period, cl.c.consensus)
                              .where(cl.c.run_id.in_(chosen["id"].tolist())),
                              ["run_id", "item", "location", "period", "consensus"])
    lines = lines.merge(chosen[["id", "cycle"]], left_on="run_id", right_on="id")
    return lines.rename(columns={"consensus": "quantity"}).assign(source="consensus")[
        ["source", "cycle", "item", "location", "period", "quantity"]]


def _pad_statistical(frame: pd.DataFrame, cycle: Cycle, items, locations) -> pd.DataFrame:
    """Give every master item × location a statistical forecast: zero where it has no history (a new item)."""
    stat = frame[frame["source"] == STATISTICAL]
    if stat.empty:
        return frame
    grid = (items[["item"]].merge(locations[["location"]], how="cross")
            .merge(pd.DataFrame({"period": periods.horizon_months(cycle.name, cycle.horizon)}), how="cross"))
    known = pd.MultiIndex.from_frame(stat[["item", "location", "period"]])
    extra = grid[~pd.MultiIndex.from_frame(grid).isin(known)]
    if extra.empty:
        return frame
    extra = extra.assign(source=STATISTICAL, cycle=cycle.name, quantity=0.0,
                         lag=periods.lags(pd.Series(cycle.name, index=extra.index), extra["period"]))
    return pd.concat([frame, extra[frame.columns]], ignore_index=True)


def align_cycle(cycle: Cycle, lines: pd.DataFrame, cycle_events: pd.DataFrame, *, items, locations, actuals,
                mix_window_months: int) -> tuple[pd.DataFrame, pd.DataFrame, list[str]]:
    """One cycle's sources at planning grain, marketing events applied to the statistical source.

    Returns (aligned, traces, warnings).  The statistical forecast before the
    events is kept as source ``statistical_base`` so marketing's value added can
    be measured; each event's uplift is traced to the cells it touched.
    """
    known = actuals[actuals["period"] <= cycle.name]
    result = align_lines(lines, cycle=cycle.name, items=items, locations=locations, actuals=known,
                         mix_window_months=mix_window_months)
    frame = _pad_statistical(result.aligned, cycle, items, locations)
    traces, warnings = result.traces, list(result.warnings)
    stat = frame[frame["source"] == STATISTICAL]
    if cycle_events.empty or stat.empty:
        return frame, traces, warnings
    with warnings_module.catch_warnings(record=True) as caught:
        warnings_module.simplefilter("always")
        adjusted, audit = events.apply_event_uplifts(stat, cycle_events, items=items, locations=locations)
    warnings += [str(w.message) for w in caught]
    frame = pd.concat([frame[frame["source"] != STATISTICAL], stat.assign(source="statistical_base"),
                       adjusted.assign(source=STATISTICAL, cycle=cycle.name)[frame.columns]], ignore_index=True)
    if not audit.empty:
        first = cycle_events.drop_duplicates("event").set_index("event")
        uplift = audit.assign(source="marketing event", share=1.0,
                              submission_id=audit["event"].map(first["submission_id"]),
                              row=audit["event"].map(first["row"]),
                              submitted="event " + audit["event"].astype(str),
                              share_basis="uplift on the statistical forecast of "
                                          + audit["base"].map("{:,.1f}".format) + " units",
                              quantity=audit["uplift_units"])
        traces = pd.concat([traces, uplift[traces.columns]], ignore_index=True)
    return frame, traces, warnings


def _alignment_key(session, cycle: str, digest: str, mix_window_months: int) -> str:
    sc = SubmissionCycle.__table__
    ids = sorted(r.submission_id for r in session.execute(
        select(sc.c.submission_id).where(sc.c.cycle == cycle).where(sc.c.status == "accepted")))
    return hashlib.sha256(f"{ALIGNMENT_VERSION}|{ids}|{digest}|{mix_window_months}".encode()).hexdigest()


def gather_history(session, cycle: Cycle, *, window: int, items, locations, actuals, mix_window_months,
                   progress: Callable[[str], None] | None = None) -> dict:
    """Every cycle in the window aligned to planning grain, with the statistical source made where missing.

    Past cycles are read from the alignment cache when nothing they depend on
    has changed; the current cycle is always aligned afresh, with its traces.
    """
    names = [periods.shift_month(cycle.name, -k) for k in range(window, -1, -1)]
    cycles = [c for c in (session.get(Cycle, n) for n in names) if c is not None]
    made = []
    for c in cycles:
        if progress:
            progress(f"statistical forecast {c.name}")
        made.append(ensure_statistical(session, c, actuals=actuals, items=items))
    session.flush()
    keys = {m["cycle"]: _alignment_key(session, m["cycle"], m["digest"], mix_window_months) for m in made}
    al = AlignedLine.__table__
    cached = frames.read_frame(session, select(*[al.c[k] for k in ("cycle", "key", *ALIGNED_COLUMNS_NO_CYCLE)])
                               .where(al.c.cycle.in_([c.name for c in cycles if c.name != cycle.name])),
                               ["cycle", "key", *ALIGNED_COLUMNS_NO_CYCLE])
    cached = cached[cached["key"] == cached["cycle"].map(keys)]
    cached_cycles = set(cached["cycle"].unique())
    to_align = [c for c in cycles if c.name == cycle.name or c.name not in cached_cycles]
    names_to_align = [c.name for c in to_align]
    lines = frames.active_forecast_lines(session, cycles=names_to_align)
    event_rows = frames.active_event_lines(session, cycles=names_to_align)
    aligned, traces, warnings = [cached.drop(columns="key")], None, []
    for c in to_align:
        if progress:
            progress(f"align {c.name}")
        frame, cycle_traces, cycle_warnings = align_cycle(
            c, lines[lines["cycle"] == c.name], event_rows[event_rows["cycle"] == c.name], items=items,
            locations=locations, actuals=actuals, mix_window_months=mix_window_months)
        aligned.append(frame)
        if c.name == cycle.name:
            traces, warnings = cycle_traces, cycle_warnings
        else:
            session.execute(delete(al).where(al.c.cycle == c.name))
            frames.write_frame(session, AlignedLine, frame.assign(key=keys[c.name]))
    history = pd.concat([f for f in aligned if not f.empty], ignore_index=True)
    return {"aligned": history, "traces": traces, "warnings": warnings, "made": made,
            "cycles": [c.name for c in cycles]}


def measure_history(session, cycle: Cycle, *, spec: "RunSpec", items, locations, actuals,
                    progress: Callable[[str], None] | None = None) -> tuple[dict, pd.DataFrame]:
    """The window's aligned sources and every past error known at this cycle (sources, consensus, naive)."""
    gathered = gather_history(session, cycle, window=spec.weights.window_cycles, items=items, locations=locations,
                              actuals=actuals, mix_window_months=spec.mix_window_months, progress=progress)
    history = gathered["aligned"]
    past = history[history["cycle"] < cycle.name]
    past = pd.concat([past, _previous_consensus(session, gathered["cycles"][:-1])], ignore_index=True)
    known_actuals = actuals[actuals["period"] <= cycle.name]
    errors = accuracy.forecast_errors(past[["source", "cycle", "item", "location", "period", "quantity"]],
                                      known_actuals)
    return gathered, errors


def run_cycle(cycle_name: str, *, url=None, spec: RunSpec | None = None,
              progress: Callable[[str], None] | None = None) -> RunSummary:
    """Compute, store and return the consensus of one cycle as a new draft run."""
    spec = spec or RunSpec()
    with session_scope(url) as session:
        cycle = get_cycle(session, cycle_name)
        items, locations = frames.load_items(session), frames.load_locations(session)
        actuals = frames.load_actuals(session)
        gathered, errors = measure_history(session, cycle, spec=spec, items=items, locations=locations,
                                           actuals=actuals, progress=progress)
        history = gathered["aligned"]
        current = history[(history["cycle"] == cycle.name) & history["source"].isin(COMBINED_SOURCES)]
        if current.empty:
            raise InvalidSpec(f"cycle {cycle.name} has no forecast from any source and no order history")
        if progress:
            progress("weights")
        sources = sorted(current["source"].unique())
        weights = estimate_weights(errors[errors["source"].isin(sources)], cycle=cycle.name, items=items,
                                   locations=locations, spec=spec.weights, sources=sources)
        combined = combine.combine_sources(current, weights, items=items, locations=locations, spec=spec.weights)
        table = combined.consensus
        table, gathered["reconciliation"] = reconcile_consensus(
            table, current, errors, items=items, locations=locations, method=spec.reconciliation,
            weight_spec=spec.weights, cycle=cycle.name, actuals=actuals)
        if progress:
            progress("error bands")
        band_errors = _band_errors(errors)
        if band_errors.empty:  # a store's very first cycle: say so rather than invent a band
            table = table.assign(**{c: np.nan for c in intervals.band_columns(spec.band_levels)},
                                 band_method="no error history yet (run 'consensus backcast')")
        else:
            banded = intervals.empirical_bands(table, band_errors, levels=spec.band_levels)
            table = table.merge(banded[["item", "location", "period", *intervals.band_columns(spec.band_levels),
                                        "band_method"]], on=["item", "location", "period"], how="left")
        table, applied = decisions.apply_decisions(session, cycle.name, table, items=items, locations=locations)
        run = _store_run(session, cycle, spec=spec, table=table, combined=combined, gathered=gathered,
                         applied=applied)
        return RunSummary(run.id, cycle.name, len(table), sources, float(table["consensus"].sum()),
                          int(table["flagged"].sum()), gathered["warnings"])


def _band_errors(errors: pd.DataFrame) -> pd.DataFrame:
    """Past errors that the bands are drawn from: the consensus's own where it has history, else the statistical."""
    own = errors[errors["source"] == "consensus"]
    return own if len(own) >= 30 else errors[errors["source"].isin(["consensus", STATISTICAL])]


def _store_run(session, cycle: Cycle, *, spec: RunSpec, table: pd.DataFrame, combined, gathered, applied) -> ConsensusRun:
    cr = ConsensusRun.__table__
    session.execute(update(cr).where(cr.c.cycle == cycle.name).where(cr.c.status == "draft").values(status="superseded"))
    inputs = frames.read_frame(session, select(Submission.__table__.c.id, Submission.__table__.c.source,
                                               Submission.__table__.c.filename, Submission.__table__.c.sha256)
                               .where(Submission.__table__.c.id.in_(
                                   gathered["traces"]["submission_id"].dropna().astype(int).unique().tolist())),
                               ["id", "source", "filename", "sha256"])
    run = ConsensusRun(cycle=cycle.name, spec=spec.to_dict(), inputs=inputs.to_dict("records"),
                       notes={"warnings": gathered["warnings"], "decisions_applied": applied,
                              "reconciliation": gathered.get("reconciliation", {}),
                              "statistical": [m for m in gathered["made"] if m["made"]]})
    session.add(run)
    session.flush()
    frames.write_frame(session, ConsensusLine, table.assign(run_id=run.id))
    frames.write_frame(session, CellSource, combined.contributions.assign(run_id=run.id))
    frames.write_frame(session, AlignmentTrace, gathered["traces"].assign(run_id=run.id))
    frames.write_frame(session, WeightRecord, combined.weights.assign(run_id=run.id))
    return run
