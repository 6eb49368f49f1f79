"""Taking in a file: check everything first, then write it all in one transaction, or keep it as rejected.

Every file handed to the tool is stored with its bytes and sha256.  An accepted
forecast or events file becomes the one in force for its (source, cycle, scope)
and supersedes the earlier one, which stays stored.  A rejected file is stored
with its reasons in a transaction of its own, and nothing else changes.
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd
from sqlalchemy import select, update
from sqlmodel import Session

from consensus import periods
from consensus.errors import ConsensusError, InputRejected, Problem
from consensus.intake import checks, reader
from consensus.store import frames
from consensus.store.db import session_scope
from consensus.store.models import (
    BomLine,
    Cycle,
    EventLine,
    ForecastLine,
    Item,
    Location,
    Submission,
    SubmissionCycle,
)

SOURCES = ("sales", "marketing", "dc", "statistical")
SUBMITTED_SOURCES = ("sales", "marketing", "dc")
MASTER_KINDS = ("items", "locations", "bom")
DEFAULT_HORIZON = 18


@dataclass
class SubmissionOutcome:
    """What happened to one file, in one line for the planner."""

    filename: str
    status: str  # accepted | duplicate | rejected
    submission_id: int | None
    kind: str = ""
    source: str | None = None
    cycles: list[str] = field(default_factory=list)
    scope: str = "all"
    rows: int = 0
    superseded: list[int] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    message: str = ""

    def line(self) -> str:
        if self.status == "rejected":
            return self.message
        if self.status == "duplicate":
            return f"{self.filename}: already received as submission #{self.submission_id}; nothing changed"
        cyc = self.cycles[0] if len(self.cycles) == 1 else f"{len(self.cycles)} cycles"
        text = f"{self.filename}: accepted as #{self.submission_id}, {self.kind}"
        if self.source:
            text += f" from {self.source} ({self.scope})"
        if self.cycles:
            text += f", {cyc}"
        text += f", {self.rows:,} rows"
        if self.superseded:
            text += f"; supersedes #{', #'.join(map(str, self.superseded))}"
        return text


def file_sha256(content: bytes) -> str:
    return hashlib.sha256(content).hexdigest()


def _keep_rejected(engine_or_session_url, *, path: Path, content: bytes, kind: str, source: str | None,
                   cycle: str | None, submitted_by: str, error: InputRejected, file_format: dict) -> int:
    """Store a rejected file with its reasons, in a transaction of its own."""
    with session_scope(engine_or_session_url) as session:
        sub = Submission(
            kind=kind or "unknown", source=source, cycle=cycle, filename=path.name, sha256=file_sha256(content),
            submitted_by=submitted_by, status="rejected", reasons=[str(p) for p in error.problems[:200]],
            row_count=0, content=content, file_format=file_format,
        )
        if error.total_problems > len(error.problems[:200]):
            sub.reasons = sub.reasons + [f"… and {error.total_problems - len(sub.reasons)} more"]
        session.add(sub)
        session.flush()
        return int(sub.id)


@dataclass
class _Intake:
    """What is known of a file being taken in, so a rejection can be kept with it."""

    path: Path
    content: bytes
    kind: str
    source: str | None = None
    cycle: str | None = None
    file_format: dict = field(default_factory=dict)


@contextmanager
def _kept_if_rejected(path: Path, *, url, kind: str, submitted_by: str, source: str | None = None,
                      cycle: str | None = None) -> Iterator[_Intake]:
    """Run an import; if it raises InputRejected, store the file as rejected (own transaction) and re-raise."""
    intake = _Intake(path=path, content=path.read_bytes(), kind=kind, source=source, cycle=cycle)
    try:
        yield intake
    except InputRejected as error:
        error.submission_id = _keep_rejected(url, path=path, content=intake.content, kind=intake.kind,
                                             source=intake.source, cycle=intake.cycle, submitted_by=submitted_by,
                                             error=error, file_format=intake.file_format)
        raise


def _horizons(session: Session, extra_cycles: list[str]) -> dict[str, list[str]]:
    known = {c.name: c.horizon for c in session.exec(select(Cycle)).scalars()}
    for name in extra_cycles:
        known.setdefault(name, DEFAULT_HORIZON)
    return {name: periods.horizon_months(name, h) for name, h in known.items()}


def _bulk_cycles(raw: reader.RawTable) -> list[str]:
    if "cycle" not in raw.frame.columns:
        return []
    values = pd.unique(raw.frame["cycle"].astype(str).str.strip())
    return sorted(v for v in values if periods.is_month(v))


def _scope_of(clean: pd.DataFrame, source: str) -> str:
    """The scope a file speaks for: one region or location when it names only one, else all."""
    for column in ("location", "region"):
        if column in clean.columns:
            values = clean[column].dropna().unique()
            if len(values) == 1 and clean[column].notna().all():
                return f"{column} {values[0]}"
    return "all"


def _check_meta_agrees(raw: reader.RawTable, given: dict[str, str | None], filename: str) -> dict[str, str | None]:
    """Flags and a template's own meta must agree; the result fills what either side knows."""
    merged = dict(given)
    problems = []
    for key in ("source", "cycle", "scope"):
        said = raw.meta.get(key) or None
        if said and given.get(key) and said != given[key]:
            problems.append(Problem(filename, None, None, given[key],
                                    f"--{key} to agree with the file's own {key} '{said}' (from its template sheet)"))
        merged[key] = given.get(key) or said
    if problems:
        raise InputRejected(file=filename, problems=problems)
    return merged


def _refuse(path: Path, value, expected: str, column: str | None = None) -> InputRejected:
    """A file-level refusal (no row to point at)."""
    return InputRejected(file=path.name, problems=[Problem(path.name, None, column, value, expected)])


def submit_file(path: Path | str, *, url=None, source: str | None = None, cycle: str | None = None,
                scope: str | None = None, submitted_by: str = "") -> SubmissionOutcome:
    """Check a forecast or events file and store it as one transaction; raise InputRejected if it fails."""
    path = Path(path)
    with _kept_if_rejected(path, url=url, kind="forecast", submitted_by=submitted_by, source=source,
                           cycle=cycle) as intake:
        raw = reader.read_table(path)
        intake.file_format = dict(raw.file_format)
        # submit expects a forecast or events file, so its own checks name a missing column precisely;
        # only files that look like order lines or master data are sent to the general kind detection
        intake.kind = "events" if "event" in raw.frame.columns else "forecast"
        if "date" in raw.frame.columns or {"family", "unit_price"} <= set(raw.frame.columns):
            intake.kind = checks.detect_file_kind(raw)
        if intake.kind not in ("forecast", "events"):
            raise _refuse(path, intake.kind, "a forecast or events file here; load actuals with 'consensus actuals' "
                                             "and master data with 'consensus master'")
        given = _check_meta_agrees(raw, {"source": source, "cycle": cycle, "scope": scope}, path.name)
        source, cycle, scope = given["source"], given["cycle"], given["scope"]
        intake.source, intake.cycle = source, cycle
        if source not in SUBMITTED_SOURCES:
            raise _refuse(path, source, f"--source to be one of {', '.join(SUBMITTED_SOURCES)}")
        if intake.kind == "events" and source != "marketing":
            raise _refuse(path, source, "events files to come from the marketing source")
        bulk = _bulk_cycles(raw)
        if cycle is None and not bulk:
            raise _refuse(path, None, "--cycle YYYY-MM, or a 'cycle' column for bulk loading", column="cycle")
        sha = file_sha256(intake.content)
        with session_scope(url) as session:
            duplicate = session.exec(
                select(Submission).where(Submission.sha256 == sha).where(Submission.status.in_(["accepted", "superseded"]))
            ).scalars().first()
            if duplicate is not None:
                return SubmissionOutcome(path.name, "duplicate", duplicate.id, kind=duplicate.kind,
                                         source=duplicate.source)
            items, locations = frames.load_items(session), frames.load_locations(session)
            if items.empty or locations.empty:
                raise _refuse(path, None, "items and locations master data loaded first ('consensus master')")
            horizons = _horizons(session, bulk)
            check = checks.check_event_rows if intake.kind == "events" else checks.check_forecast_rows
            result = check(raw, filename=path.name, items=items, locations=locations, horizons=horizons,
                           default_cycle=cycle)
            result.raise_if_problems(path.name)
            clean = result.clean
            return _store_accepted(session, path=path, content=intake.content, sha=sha, kind=intake.kind,
                                   source=source, scope=scope or _scope_of(clean, source), clean=clean,
                                   submitted_by=submitted_by, file_format=intake.file_format, horizons=horizons,
                                   default_cycle=cycle)


def _store_accepted(session: Session, *, path: Path, content: bytes, sha: str, kind: str, source: str, scope: str,
                    clean: pd.DataFrame, submitted_by: str, file_format: dict, horizons: dict,
                    default_cycle: str | None) -> SubmissionOutcome:
    clean = clean.copy()
    clean["cycle"] = clean["cycle"].fillna(default_cycle) if "cycle" in clean else default_cycle
    cycles = sorted(clean["cycle"].dropna().unique().tolist())
    for name in cycles:  # bulk loads may open past cycles
        if session.get(Cycle, name) is None:
            session.add(Cycle(name=name, horizon=len(horizons[name])))
    sub = Submission(kind=kind, source=source, scope=scope, cycle=cycles[0] if len(cycles) == 1 else None,
                     filename=path.name, sha256=sha, submitted_by=submitted_by, status="accepted",
                     row_count=len(clean), grain=describe_grain(clean), file_format=file_format, content=content)
    session.add(sub)
    session.flush()
    sc = SubmissionCycle.__table__
    superseded_ids: set[int] = set()
    for name in cycles:
        previous = session.execute(
            select(sc.c.id, sc.c.submission_id).where(sc.c.source == source).where(sc.c.cycle == name)
            .where(sc.c.scope == scope).where(sc.c.status == "accepted")
        ).fetchall()
        if previous:
            session.execute(update(sc).where(sc.c.id.in_([p.id for p in previous]))
                            .values(status="superseded", superseded_by=sub.id))
            superseded_ids.update(p.submission_id for p in previous)
        session.add(SubmissionCycle(submission_id=sub.id, source=source, cycle=name, scope=scope))
    session.flush()
    for old_id in superseded_ids:  # a submission is superseded once none of its cycles is in force
        in_force = session.execute(select(sc.c.id).where(sc.c.submission_id == old_id)
                                   .where(sc.c.status == "accepted")).first()
        if in_force is None:
            session.execute(update(Submission.__table__).where(Submission.__table__.c.id == old_id)
                            .values(status="superseded"))
    lines = clean.assign(submission_id=sub.id, source=source)
    frames.write_frame(session, EventLine if kind == "events" else ForecastLine, lines)
    return SubmissionOutcome(path.name, "accepted", sub.id, kind=kind, source=source, cycles=cycles, scope=scope,
                             rows=len(clean), superseded=sorted(superseded_ids))


def describe_grain(clean: pd.DataFrame) -> str:
    """The grain of a checked file in words, e.g. 'family × region × week, value'."""
    def filled(col: str) -> bool:
        return col in clean.columns and clean[col].notna().any()
    product = "item" if filled("item") else "family"
    place = "location" if filled("location") else ("region" if filled("region") else "all locations")
    time = "week" if filled("week") else "month"
    measure = "value" if filled("value") and not filled("quantity") else "units"
    if "event" in clean.columns:
        return f"events by {product} × {place}"
    return f"{product} × {place} × {time}, {measure}"


def load_master_file(path: Path | str, *, kind: str, url=None, submitted_by: str = "") -> SubmissionOutcome:
    """Load items, locations or BOM master data: rows are added or replaced by key, all in one transaction."""
    if kind not in MASTER_KINDS:
        raise ConsensusError(f"--kind must be one of {', '.join(MASTER_KINDS)}, not {kind!r}")
    path = Path(path)
    with _kept_if_rejected(path, url=url, kind=kind, submitted_by=submitted_by) as intake:
        raw = reader.read_table(path)
        intake.file_format = dict(raw.file_format)
        result = checks.check_master_rows(raw, filename=path.name, kind=kind)
        result.raise_if_problems(path.name)
        clean = result.clean
        with session_scope(url) as session:
            model, keys = {"items": (Item, ["item"]), "locations": (Location, ["location"]),
                           "bom": (BomLine, ["parent", "component"])}[kind]
            table = model.__table__
            if kind == "bom":
                session.execute(table.delete().where(table.c.parent.in_(clean["parent"].unique().tolist())))
            else:
                session.execute(table.delete().where(table.c[keys[0]].in_(clean[keys[0]].tolist())))
            frames.write_frame(session, model, clean)
            sub = Submission(kind=kind, filename=path.name, sha256=file_sha256(intake.content),
                             submitted_by=submitted_by, row_count=len(clean), file_format=intake.file_format,
                             content=intake.content)
            session.add(sub)
            session.flush()
            return SubmissionOutcome(path.name, "accepted", sub.id, kind=kind, rows=len(clean))


def load_actuals_file(path: Path | str, *, url=None, submitted_by: str = "") -> SubmissionOutcome:
    """Load customer-order history into monthly buckets, replacing the months and keys it covers."""
    path = Path(path)
    with _kept_if_rejected(path, url=url, kind="actuals", submitted_by=submitted_by) as intake:
        raw = reader.read_table(path)
        intake.file_format = dict(raw.file_format)
        with session_scope(url) as session:
            items, locations = frames.load_items(session), frames.load_locations(session)
            result = checks.check_actual_rows(raw, filename=path.name, items=items, locations=locations)
            result.raise_if_problems(path.name)
            sub = Submission(kind="actuals", filename=path.name, sha256=file_sha256(intake.content),
                             submitted_by=submitted_by, row_count=len(raw.frame), file_format=intake.file_format,
                             content=intake.content)
            session.add(sub)
            session.flush()
            monthly = result.clean
            frames.replace_actuals(session, monthly, sub.id)
            months = sorted(monthly["period"].unique())
            return SubmissionOutcome(path.name, "accepted", sub.id, kind="actuals", rows=len(raw.frame),
                                     message=f"{len(monthly):,} monthly buckets {months[0]} … {months[-1]}")
