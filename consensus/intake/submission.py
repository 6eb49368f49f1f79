"""Taking in a file: check everything first, then record it in one short write, or keep it as rejected.

Every file handed to the tool is kept: its bytes (once, by sha256), its
checked lines (a packed frame) and a :class:`Submission` record with its own
journal position.  Nothing already stored is changed by a new file: which
submission is in force for each cell follows from the journal order
(:mod:`consensus.methods.in_force`), so a correction replaces exactly the cells
it covers, resubmitting an older version makes it current again, and a
rejected file is stored with its reasons in a transaction of its own while
nothing else changes.

Writers take turns (:func:`consensus.store.db.session_scope`): the checks run
outside the write lock, and the write re-checks the cycle's state under it,
so a file can never land in a cycle that was published meanwhile.
"""

from __future__ import annotations

import functools
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd
from sqlalchemy import select
from sqlmodel import Session

from consensus import periods
from consensus.errors import ConsensusError, CycleStateError, InputRejected, Problem
from consensus.intake import checks, reader, workbook
from consensus.intake.scope import derive_scope, describe_scope, parse_scope, rows_outside, scope_locations
from consensus.store import blobs, frames, journal
from consensus.store.db import session_scope
from consensus.store.models import Cycle, Submission, SubmissionCycle, utcnow
from consensus.vocabulary import source_label, submitted_sources

MASTER_KINDS = ("items", "locations", "bom")
DEFAULT_HORIZON = 18
#: What a master file's key is called in messages.
_KEY_WORDS = {"items": "item", "locations": "location", "bom": "BOM line"}


@dataclass
class SubmissionOutcome:
    """What happened to one file, in one or two lines for the planner."""

    filename: str
    status: str  # accepted | unchanged | rejected
    submission_id: int | None
    kind: str = ""
    source: str | None = None
    cycles: list[str] = field(default_factory=list)
    scope: str = "all"
    rows: int = 0
    takes_over: list[int] = field(default_factory=list)
    reinstates: int | None = None
    late_days: int = 0
    warnings: list[str] = field(default_factory=list)
    message: str = ""

    def line(self) -> str:
        if self.status == "rejected":
            return self.message
        if self.status == "unchanged":
            return (f"{self.filename}: the same file is already in force as submission #{self.submission_id}; "
                    "nothing changed")
        cyc = self.cycles[0] if len(self.cycles) == 1 else f"{len(self.cycles)} cycles"
        text = f"{self.filename}: accepted as #{self.submission_id}, {self.kind}"
        if self.source:
            text += f" from {source_label(self.source)} ({self.scope})"
        if self.cycles:
            text += f", cycle {cyc}"
        text += f", {self.rows:,} rows"
        if self.reinstates:
            text += f"; the same file as #{self.reinstates}, which is now in force again"
        elif self.takes_over:
            text += f"; replaces #{', #'.join(map(str, self.takes_over))} where they overlap"
        if self.late_days > 0:
            text += f"; {self.late_days} day{'s' if self.late_days != 1 else ''} late"
        if self.message:
            text += f"; {self.message}"
        return text


def file_sha256(content: bytes) -> str:
    import hashlib

    return hashlib.sha256(content).hexdigest()


def _record(session: Session, sub: Submission, cycle: str | None) -> Submission:
    session.add(sub)
    session.flush()
    entry = journal.record(session, "submission", sub, cycle=cycle)
    sub.seq = entry.seq
    session.add(sub)
    session.flush()
    return sub


def _keep_rejected(url, *, path: Path, content: bytes, kind: str, source: str | None, cycle: str | None,
                   submitted_by: str, error: InputRejected, file_format: dict) -> int:
    """Store a rejected file with its reasons, in a transaction of its own."""
    reasons = [str(p) for p in error.problems[:200]]
    if error.total_problems > len(reasons):
        reasons.append(f"… and {error.total_problems - len(reasons)} more")
    with session_scope(url) as session:
        sha = blobs.put_file(session, content)
        sub = Submission(kind=kind or "unknown", source=source, cycle=cycle, filename=path.name, sha256=sha,
                         submitted_by=submitted_by, status="rejected", reasons=reasons, row_count=0,
                         file_format=file_format, submitted_at=utcnow())
        return int(_record(session, sub, cycle).id)


@dataclass
class _Intake:
    """What is known of a file being taken in, so a rejection can be kept with it."""

    path: Path
    content: bytes
    kind: str
    source: str | None = None
    cycle: str | None = None
    file_format: dict = field(default_factory=dict)


def _read_bytes(path: Path) -> bytes:
    if path.is_dir():
        raise ConsensusError(f"{path} is a folder, not a file")
    try:
        return path.read_bytes()
    except FileNotFoundError:
        raise ConsensusError(f"{path} does not exist") from None
    except OSError as error:
        raise ConsensusError(f"{path} cannot be read: {error.strerror}") from None


@contextmanager
def _kept_if_rejected(path: Path, *, url, kind: str, submitted_by: str, source: str | None = None,
                      cycle: str | None = None) -> Iterator[_Intake]:
    """Run an import; if it raises InputRejected, store the file as rejected (own transaction) and re-raise."""
    intake = _Intake(path=path, content=_read_bytes(path), kind=kind, source=source, cycle=cycle)
    try:
        yield intake
    except InputRejected as error:
        error.submission_id = _keep_rejected(url, path=path, content=intake.content, kind=intake.kind,
                                             source=intake.source, cycle=intake.cycle, submitted_by=submitted_by,
                                             error=error, file_format=intake.file_format)
        raise


def _refuse(path: Path, value, expected: str, column: str | None = None) -> InputRejected:
    """A file-level refusal (no row to point at)."""
    return InputRejected(file=path.name, problems=[Problem(path.name, None, column, value, expected)])


def frozen_message(cycle: Cycle) -> str:
    return (f"cycle {cycle.name} is published (revision {cycle.revision}) and takes no more changes; to change it, "
            f"reopen it: consensus cycle reopen {cycle.name} --reason \"...\" --by \"...\"")


def require_open(session: Session, name: str) -> Cycle:
    """The cycle, if it exists and takes changes; CycleStateError naming the way to reopen it if published."""
    from consensus.errors import NotFound

    cycle = session.get(Cycle, name)
    if cycle is None:
        raise NotFound(f"cycle {name} is not open; open it with 'consensus cycle open {name}'")
    if cycle.status == "published":
        raise CycleStateError(frozen_message(cycle))
    return cycle


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


def _bulk_cycles(raw: reader.RawTable) -> list[str]:
    if "cycle" not in raw.frame.columns:
        return []
    values = pd.unique(raw.frame["cycle"].astype(str).str.strip())
    return sorted(v for v in values if periods.is_month(v))


def _horizons(session: Session, extra_cycles: list[str]) -> dict[str, list[str]]:
    t = Cycle.__table__
    known = {row.name: row.horizon for row in session.execute(select(t.c.name, t.c.horizon))}
    for name in extra_cycles:
        known.setdefault(name, DEFAULT_HORIZON)
    return {name: periods.horizon_months(name, h) for name, h in known.items()}


def _months_of(clean: pd.DataFrame) -> list[str]:
    months = set(clean["period"].dropna().astype(str)) if "period" in clean else set()
    if "week" in clean and clean["week"].notna().any():
        from consensus.methods.alignment import week_month_shares

        months |= set(week_month_shares(clean["week"].dropna().drop_duplicates())["period"].astype(str))
    if "start" in clean:
        for start, end in zip(clean["start"].astype(str), clean["end"].astype(str)):
            months |= set(periods.month_range(start, end))
    return sorted(months)


def _late_days(cycle: Cycle | None, at) -> int:
    if cycle is None or cycle.due is None:
        return 0
    return max(0, (at.date() - cycle.due).days)


def _newest_of_source(session: Session, source: str, cycles: list[str], kind: str) -> pd.DataFrame:
    """Earlier accepted files of this source and kind for exactly these cycles (oldest first)."""
    subs = frames.submissions(session, kinds=[kind], cycles=cycles)
    subs = subs[subs["source"] == source]
    if len(cycles) == 1:
        return subs[subs["cycle"] == cycles[0]]
    return subs[subs["cycle"].isna()]


def submit_file(path: Path | str, *, url=None, source: str | None = None, cycle: str | None = None,
                scope: str | None = None, submitted_by: str = "") -> SubmissionOutcome:
    """Check a forecast or events file and record it; raise InputRejected (file kept as rejected) if it fails."""
    path = Path(path)
    with _kept_if_rejected(path, url=url, kind="forecast", submitted_by=submitted_by, source=source,
                           cycle=cycle) as intake:
        returned = workbook.read_returned_file(path)  # the wide layout melted to long rows, or a long file as read
        raw = returned.raw
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
        allowed = submitted_sources()
        if source not in allowed:
            raise _refuse(path, source, f"--source to be one of {', '.join(allowed)}")
        if intake.kind == "events" and source != "marketing":
            raise _refuse(path, source, "events files to come from the marketing source")
        bulk = _bulk_cycles(raw)
        if cycle is None and not bulk:
            raise _refuse(path, None, "--cycle YYYY-MM, or a 'cycle' column for bulk loading", column="cycle")
        if cycle is not None and not periods.is_month(cycle):
            raise _refuse(path, cycle, "--cycle in YYYY-MM form", column="cycle")
        with session_scope(url, write=False) as session:
            items, locations = frames.load_items(session), frames.load_locations(session)
            if items.empty or locations.empty:
                raise _refuse(path, None, "items and locations master data loaded first ('consensus master')")
            for name in ([cycle] if cycle else []) + bulk:
                existing = session.get(Cycle, name)
                if existing is not None and existing.status == "published":
                    raise CycleStateError(frozen_message(existing))
            horizons = _horizons(session, bulk)
            from consensus.workflow.settings import frozen_months
            frozen = frozen_months(session)
        if intake.kind == "events":
            check = checks.check_event_rows
        else:
            check = functools.partial(checks.check_forecast_rows, frozen_months=frozen)
        result = workbook.check_returned(returned, check, filename=path.name, items=items,
                                         locations=locations, horizons=horizons, default_cycle=cycle)
        result.raise_if_problems(path.name)
        clean = result.clean.copy()
        clean["cycle"] = clean["cycle"].fillna(cycle) if "cycle" in clean else cycle
        detail = parse_scope(scope, locations=locations, filename=path.name) if scope else derive_scope(clean)
        if detail["declared"] and intake.kind == "forecast":
            outside = rows_outside(clean, detail, locations=locations, rows=clean["row"].to_numpy(), filename=path.name)
            if outside:
                raise InputRejected(file=path.name, problems=workbook.name_problem_cells(outside, returned))
        if intake.kind == "events" and not scope:
            detail = {"declared": False, "place": "events", "places": sorted(clean["event"].astype(str).unique())}
        detail["families"] = _families_of(clean, items)
        clean = workbook.with_sheet_rows(clean, returned)
        return _store_forecast(url, path=path, content=intake.content, kind=intake.kind, source=source, detail=detail,
                               clean=clean, submitted_by=submitted_by, file_format=intake.file_format,
                               horizons=horizons, locations=locations)


def _families_of(clean: pd.DataFrame, items: pd.DataFrame) -> list[str]:
    """The families a file's rows reach (an item row reaches its family; a row for all items, every family)."""
    family = clean["family"] if "family" in clean else pd.Series(None, index=clean.index, dtype=object)
    item = clean["item"] if "item" in clean else pd.Series(None, index=clean.index, dtype=object)
    of_item = item.map(items.drop_duplicates("item").set_index("item")["family"])
    named = family.where(family.notna(), of_item)
    if named.isna().any():
        return sorted(items["family"].astype(str).unique())
    return sorted(named.astype(str).unique())


def _describe(detail: dict) -> str:
    if detail.get("place") == "events":
        names = detail.get("places", [])
        return "events " + ", ".join(names[:4]) + (f" and {len(names) - 4} more" if len(names) > 4 else "")
    return describe_scope(detail)


def _store_forecast(url, *, path: Path, content: bytes, kind: str, source: str, detail: dict, clean: pd.DataFrame,
                    submitted_by: str, file_format: dict, horizons: dict, locations: pd.DataFrame) -> SubmissionOutcome:
    cycles = sorted(clean["cycle"].dropna().astype(str).unique().tolist())
    sha = file_sha256(content)
    lines = clean.drop(columns=[c for c in ("source",) if c in clean.columns]).reset_index(drop=True)
    with session_scope(url) as session:
        opened = []
        for name in cycles:  # re-checked under the write lock: a cycle may have been published meanwhile
            existing = session.get(Cycle, name)
            if existing is None:  # bulk loads may open past cycles
                opened.append(name)
                session.add(Cycle(name=name, horizon=len(horizons[name]), opened_at=utcnow()))
            elif existing.status == "published":
                raise CycleStateError(frozen_message(existing))
        session.flush()
        for name in opened:
            c = session.get(Cycle, name)
            c.opened_seq = journal.record(session, "cycle", c, cycle=name).seq
        earlier = _newest_of_source(session, source, cycles, kind)
        same_cycles = earlier
        # the same bytes answering for the same places: a different --scope is a different submission
        same_file = (same_cycles["sha256"] == sha) & same_cycles["scope_detail"].map(
            lambda theirs: _same_places(theirs, detail)).astype(bool)
        newest = same_cycles.iloc[-1] if len(same_cycles) else None
        if newest is not None and bool(same_file.iloc[-1]) and len(cycles) == 1:
            return SubmissionOutcome(path.name, "unchanged", int(newest["id"]), kind=kind, source=source,
                                     cycles=cycles, scope=newest["scope"])
        reinstated = same_cycles[same_file]
        first_cycle = session.get(Cycle, cycles[0])
        at = utcnow()
        late = _late_days(first_cycle, at) if len(cycles) == 1 else 0
        lines_sha = blobs.put_frame(session, lines)
        sub = Submission(kind=kind, source=source, cycle=cycles[0] if len(cycles) == 1 else None,
                         revision=first_cycle.revision if len(cycles) == 1 else None, scope=_describe(detail),
                         scope_detail=detail, filename=path.name, sha256=blobs.put_file(session, content),
                         lines_sha256=lines_sha, submitted_by=submitted_by, submitted_at=at, status="accepted",
                         reinstates=int(reinstated.iloc[-1]["id"]) if len(reinstated) else None, late=late > 0,
                         row_count=len(clean), grain=describe_grain(clean), file_format=file_format,
                         months=_months_of(clean))
        session.add(sub)
        session.flush()
        for name in cycles:
            session.add(SubmissionCycle(submission_id=sub.id, cycle=name))
        _record(session, sub, sub.cycle)
        takes_over = _overlapping(same_cycles, detail, locations)
        return SubmissionOutcome(path.name, "accepted", sub.id, kind=kind, source=source, cycles=cycles,
                                 scope=sub.scope, rows=len(clean), takes_over=takes_over,
                                 reinstates=sub.reinstates, late_days=late)


def _same_places(theirs, mine: dict) -> bool:
    """Two scopes in closed form answer for the same places (declared or not, the same place kind and names)."""
    theirs = theirs or {}
    return all(theirs.get(k) == mine.get(k) for k in ("declared", "place")) and \
        sorted(theirs.get("places", [])) == sorted(mine.get("places", []))


def _overlapping(earlier: pd.DataFrame, detail: dict, locations: pd.DataFrame) -> list[int]:
    """Earlier submissions whose places overlap this one's (they lose the cells this one covers).

    Places are compared as the locations they cover, so "region EAST" overlaps "location DC-E1"; events
    files name events, and overlap when they name the same one; a file for "all" overlaps every other.
    """
    def reach(scope: dict) -> set[str]:
        if scope.get("place") == "events":
            return {f"event {name}" for name in scope.get("places", [])}
        return set(scope_locations(scope, locations))

    out = []
    mine = reach(detail)
    for row in earlier.itertuples(index=False):  # a handful of earlier files of one source and cycle
        theirs = row.scope_detail or {}
        if "all" in (theirs.get("place"), detail.get("place")) or mine & reach(theirs):
            out.append(int(row.id))
    return out


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


def _master_change(current: pd.DataFrame, clean: pd.DataFrame, kind: str, *, replace: bool) -> tuple[str, dict]:
    """What loading a master file does, in words and counts: added, changed, unchanged, staying, removed."""
    columns, keys = frames.MASTER_COLUMNS[kind]
    now = current[columns].copy()
    new = clean[columns].copy()
    joined = new.merge(now, on=keys, how="left", suffixes=("", "_now"), indicator=True)
    added = int((joined["_merge"] == "left_only").sum())
    both = joined[joined["_merge"] == "both"]
    values = [c for c in columns if c not in keys]
    differs = pd.Series(False, index=both.index)
    for column in values:
        a, b = both[column], both[f"{column}_now"]
        differs |= ~((a == b) | (a.isna() & b.isna()))
    changed = int(differs.sum())
    absent = now.merge(new[keys], on=keys, how="left", indicator=True)
    absent = absent[absent["_merge"] == "left_only"]
    word = _KEY_WORDS[kind]
    counts = {"added": added, "changed": changed, "unchanged": int(len(both) - changed), "absent": len(absent)}
    text = f"{added:,} added, {changed:,} changed, {counts['unchanged']:,} unchanged"
    if len(absent):
        names = absent[keys].astype(str).agg(" → ".join, axis=1).tolist()
        shown = ", ".join(names[:5]) + (f" and {len(names) - 5} more" if len(names) > 5 else "")
        if replace:
            text += f"; {len(absent):,} {word}{'s' if len(absent) != 1 else ''} not in the file removed ({shown})"
        else:
            text += (f"; {len(absent):,} {word}{'s' if len(absent) != 1 else ''} not in the file stay ({shown}); "
                     "load with --replace to remove them")
    return text, counts


def load_master_file(path: Path | str, *, kind: str, url=None, submitted_by: str = "",
                     replace: bool = False) -> SubmissionOutcome:
    """Load items, locations or BOM master data: added and updated by key, or the whole master with ``replace``."""
    if kind not in MASTER_KINDS:
        raise ConsensusError(f"--kind must be one of {', '.join(MASTER_KINDS)}, not {kind!r}")
    path = Path(path)
    with _kept_if_rejected(path, url=url, kind=kind, submitted_by=submitted_by) as intake:
        raw = reader.read_table(path)
        intake.file_format = dict(raw.file_format)
        result = checks.check_master_rows(raw, filename=path.name, kind=kind)
        result.raise_if_problems(path.name)
        clean = result.clean.reset_index(drop=True)
        with session_scope(url) as session:
            loader = {"items": frames.load_items, "locations": frames.load_locations, "bom": frames.load_bom}[kind]
            current = loader(session)
            if kind == "bom":
                _check_bom_after(clean, current, replace=replace, filename=path.name)
            message, _ = _master_change(current, clean, kind, replace=replace)
            sub = Submission(kind=kind, filename=path.name, sha256=blobs.put_file(session, intake.content),
                             lines_sha256=blobs.put_frame(session, clean), submitted_by=submitted_by,
                             submitted_at=utcnow(), row_count=len(clean), file_format=intake.file_format,
                             replace=bool(replace), scope="whole master" if replace else "the keys it carries",
                             scope_detail={"declared": bool(replace), "place": "all" if replace else "keys"})
            _record(session, sub, None)
            return SubmissionOutcome(path.name, "accepted", sub.id, kind=kind, rows=len(clean), message=message)


def _check_bom_after(clean: pd.DataFrame, current: pd.DataFrame, *, replace: bool, filename: str) -> None:
    """The BOM in force after this file must stay free of loops (a loop can span this file and earlier ones)."""
    from consensus.methods.bom import bom_cycle

    keys = ["parent", "component"]
    kept = current if replace is False else current.iloc[0:0]
    merged = pd.concat([kept.merge(clean[keys], on=keys, how="left", indicator=True)
                        .query("_merge == 'left_only'").drop(columns="_merge"), clean[current.columns]],
                       ignore_index=True)
    loop = bom_cycle(merged)
    if loop:
        raise InputRejected(file=filename, problems=[Problem(
            filename, None, "component", " → ".join(loop),
            "a bill of material without loops, together with the lines already stored")])


def load_actuals_file(path: Path | str, *, url=None, submitted_by: str = "") -> SubmissionOutcome:
    """Load customer-order history into monthly buckets; a later file's month replaces the same month's bucket."""
    path = Path(path)
    with _kept_if_rejected(path, url=url, kind="actuals", submitted_by=submitted_by) as intake:
        # A fill-in workbook given here is read in its layout, so its hidden sheet refuses it as a template.
        raw = workbook.read_returned_file(path, only_templates=True).raw
        intake.file_format = dict(raw.file_format)
        with session_scope(url, write=False) as session:
            items, locations = frames.load_items(session), frames.load_locations(session)
        result = checks.check_actual_rows(raw, filename=path.name, items=items, locations=locations)
        result.raise_if_problems(path.name)
        monthly = result.clean.reset_index(drop=True)
        months = sorted(monthly["period"].unique())
        with session_scope(url) as session:
            sub = Submission(kind="actuals", filename=path.name, sha256=blobs.put_file(session, intake.content),
                             lines_sha256=blobs.put_frame(session, monthly[frames.ACTUAL_COLUMNS]),
                             submitted_by=submitted_by, submitted_at=utcnow(), row_count=len(raw.frame),
                             file_format=intake.file_format, months=months, scope="the months and keys it carries",
                             scope_detail={"declared": False, "place": "keys"})
            _record(session, sub, None)
            return SubmissionOutcome(path.name, "accepted", sub.id, kind="actuals", rows=len(raw.frame),
                                     message=f"{len(monthly):,} monthly buckets {months[0]} … {months[-1]}")


__all__ = ["SubmissionOutcome", "submit_file", "load_master_file", "load_actuals_file", "require_open",
           "frozen_message", "describe_grain", "scope_locations"]
