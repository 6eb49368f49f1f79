"""Opening, listing and reopening cycles, and seeing who has submitted what.

A cycle is planned from the order history known through its month.  Opening
(or running) a cycle whose months have no order history says which months
are missing and refuses, unless the cycle is opened with
``allow_missing_history``: then those months are planned as unknown — left
out of every fit and every score — never as zero demand.

A published cycle takes no more submissions, decisions or runs.  Reopening it
starts its next revision, with a reason and an author; the published
revision stays readable.
"""

from __future__ import annotations

from datetime import date, datetime

import pandas as pd
from sqlalchemy import select

from consensus import periods
from consensus.errors import ConsensusError, CycleStateError, NotFound
from consensus.intake.scope import scope_locations
from consensus.store import frames, journal
from consensus.store.db import session_scope
from consensus.store.models import Cycle, CycleRevision, Submission, utcnow
from consensus.vocabulary import SOURCES

CYCLE_STATES = ("open", "published")
#: The states ``submission_status`` gives (labels in consensus.vocabulary.SUBMISSION_STATES).
STATUS_STATES = ("received", "partly_received", "not_received", "replaced", "rejected")


def missing_history_months(actuals: pd.DataFrame, cycle: str) -> list[str]:
    """Months up to ``cycle`` with no order history at all, from the first month with orders.

    An empty history means every month is missing; the list then holds the
    cycle month alone (there is no first month to count from).
    """
    known = set(actuals["period"].astype(str)) if len(actuals) else set()
    known = {m for m in known if m <= cycle}
    if not known:
        return [cycle]
    return [m for m in periods.month_range(min(known), cycle) if m not in known]


def missing_location_months(actuals: pd.DataFrame, cycle: str) -> list[tuple[str, str]]:
    """(location, month) pairs up to ``cycle`` where a location's orders have not come in yet.

    A location whose last month with orders is before a month other locations
    have orders for is missing that month (and every later one up to the
    cycle): its orders for the month are not in yet, which is not zero demand.
    Months no location has orders for are :func:`missing_history_months`'.
    """
    if actuals.empty:
        return []
    known = actuals[actuals["period"].astype(str) <= cycle]
    months_with_orders = set(known["period"].astype(str))
    last = known.groupby("location")["period"].max()
    out = []
    for location, month in last.items():  # one entry per location: a handful
        after = [m for m in periods.month_range(str(month), cycle)[1:] if m in months_with_orders]
        out += [(str(location), m) for m in after]
    return sorted(out)


def describe_missing_locations(pairs: list[tuple[str, str]]) -> str:
    by_location: dict[str, list[str]] = {}
    for location, month in pairs:
        by_location.setdefault(location, []).append(month)
    return "; ".join(f"{location} for {describe_missing(months)}" for location, months in sorted(by_location.items()))


def describe_missing(months: list[str]) -> str:
    if not months:
        return ""
    if len(months) > 3 and periods.month_range(months[0], months[-1]) == months:
        return f"{months[0]} … {months[-1]} ({len(months)} months)"
    return ", ".join(months)


def missing_history_error(name: str, months: list[str], *, empty: bool,
                          locations: list[tuple[str, str]] = ()) -> CycleStateError:
    if locations and not months and not empty:
        return CycleStateError(f"cycle {name}: the orders of {describe_missing_locations(list(locations))} are not in "
                               "yet; load them with 'consensus actuals FILE', or open the cycle with "
                               "--allow-missing-history to plan them as unknown (not as zero demand)")
    if empty:
        return CycleStateError(f"cycle {name}: no order history is loaded yet; load it with 'consensus actuals FILE' "
                               "first, or open the cycle with --allow-missing-history to plan without it")
    return CycleStateError(f"cycle {name}: no order history for {describe_missing(months)}; load those months with "
                           "'consensus actuals FILE', or open the cycle with --allow-missing-history to plan them "
                           "as unknown (not as zero demand)")


def open_cycle(name: str, *, horizon: int = 18, due: date | str | None = None, allow_missing_history: bool = False,
               by: str = "", url=None) -> Cycle:
    """Open a planning cycle (idempotent when the horizon agrees); a due date may be set or moved later."""
    if not periods.is_month(name):
        raise ConsensusError(f"cycle must be a month in YYYY-MM form, not {name!r}")
    if not isinstance(horizon, int) or not 1 <= horizon <= 60:
        raise ConsensusError(f"horizon must be between 1 and 60 months, not {horizon}")
    due_date = _parse_due(due)
    with session_scope(url) as session:
        cycle = session.get(Cycle, name)
        if cycle is not None:
            if cycle.horizon != horizon:
                raise ConsensusError(f"cycle {name} is already open with a horizon of {cycle.horizon} months")
            changed = False
            if due_date is not None and due_date != cycle.due:
                cycle.due, changed = due_date, True
                journal.append(session, kind="due", ref_id=f"{name}:{cycle.revision}:{due_date}:{journal.last_seq(session)}",
                               cycle=name, digest=journal.digest_record("cycle", cycle))
            if allow_missing_history and not cycle.allow_missing_history:
                cycle.allow_missing_history, changed = True, True
            if changed:
                session.add(cycle)
            return cycle
        actuals = frames.load_actuals(session)
        missing = missing_history_months(actuals, name)
        partial = missing_location_months(actuals, name)
        if (missing or partial) and not allow_missing_history:
            raise missing_history_error(name, missing, empty=actuals.empty, locations=partial)
        cycle = Cycle(name=name, horizon=horizon, due=due_date, opened_at=utcnow(), opened_by=by,
                      allow_missing_history=bool(allow_missing_history))
        session.add(cycle)
        session.flush()
        cycle.opened_seq = journal.record(session, "cycle", cycle, cycle=name).seq
        session.add(CycleRevision(cycle=name, revision=1, opened_at=cycle.opened_at, opened_by=by))
        return cycle


def _parse_due(due) -> date | None:
    if due is None or isinstance(due, date):
        return due
    try:
        return datetime.strptime(str(due).strip(), "%Y-%m-%d").date()
    except ValueError:
        raise ConsensusError(f"--due must be a date in YYYY-MM-DD form, not {due!r}") from None


def get_cycle(session, name: str) -> Cycle:
    if not periods.is_month(name):
        raise ConsensusError(f"cycle must be a month in YYYY-MM form, not {name!r}")
    cycle = session.get(Cycle, name)
    if cycle is None:
        raise NotFound(f"cycle {name} is not open; open it with 'consensus cycle open {name}'")
    return cycle


def reopen_cycle(name: str, *, reason: str, by: str, url=None) -> CycleRevision:
    """Start the next revision of a published cycle; the published one stays readable."""
    if not reason.strip() or not by.strip():
        raise ConsensusError("reopening a cycle needs --reason and --by")
    with session_scope(url) as session:
        cycle = get_cycle(session, name)
        if cycle.status != "published":
            raise CycleStateError(f"cycle {name} is open (revision {cycle.revision}); only a published cycle "
                                  "is reopened")
        cycle.revision += 1
        cycle.status = "open"
        revision = CycleRevision(cycle=name, revision=cycle.revision, opened_at=utcnow(), opened_by=by.strip(),
                                 reason=reason.strip())
        session.add(cycle)
        session.add(revision)
        session.flush()
        journal.record(session, "reopen", revision, cycle=name)
        return revision


def list_cycles(*, url=None) -> pd.DataFrame:
    """Every cycle with its horizon, revision, state, due date and publication."""
    with session_scope(url, write=False) as session:
        cycles = frames.table_frame(session, Cycle, ["name", "horizon", "revision", "status", "due", "opened_at"])
        revisions = frames.table_frame(session, CycleRevision, ["cycle", "revision", "published_at", "published_by",
                                                                "published_run_id", "reason"])
    latest = revisions.merge(cycles[["name", "revision"]], left_on=["cycle", "revision"],
                             right_on=["name", "revision"], how="inner").drop(columns="name")
    out = cycles.merge(latest, left_on=["name", "revision"], right_on=["cycle", "revision"], how="left")
    return out.drop(columns="cycle").sort_values("name", ignore_index=True)


def expected_scopes(locations: pd.DataFrame) -> pd.DataFrame:
    """Who is expected each cycle: each submitted source answers for its regions, locations or all.

    Common practice in a monthly review: sales leads answer for their region,
    distribution centers for their own location, marketing for the whole plan
    (each source's ``answers_for`` in :data:`consensus.vocabulary.SOURCES`).
    """
    rows = []
    for s in sorted(SOURCES, key=lambda s: s.order):
        if not s.submitted or s.answers_for is None:
            continue
        if s.answers_for == "region":
            rows += [(s.key, "region", r) for r in sorted(locations["region"].astype(str).unique())]
        elif s.answers_for == "location":
            rows += [(s.key, "location", loc) for loc in sorted(locations["location"].astype(str).unique())]
        else:
            rows.append((s.key, "all", ""))
    return pd.DataFrame(rows, columns=["source", "place", "name"])


def _scope_text(place: str, name: str) -> str:
    return "all" if place == "all" else f"{place} {name}"


def submission_status(cycle: str, *, url=None, through: int | None = None) -> pd.DataFrame:
    """For each expected source and scope: the file in force there, or that none came; then replaced and rejected files.

    A scope is answered by the newest accepted file of that source whose
    scope covers it (declared, or the places its rows name); earlier files
    covering it are listed as replaced there.  ``state``: received,
    partly_received (some of the families or places), not_received, replaced, rejected;
    ``days_late`` counts days after the cycle's due date (negative: days left).
    """
    with session_scope(url, write=False) as session:
        c = get_cycle(session, cycle)
        locations = frames.load_locations(session, through=through)
        items = frames.load_items(session, through=through)
        subs = frames.submissions(session, kinds=["forecast", "events"], cycles=[cycle], through=through)
        sub = Submission.__table__
        rejected = frames.read_frame(session, select(
            sub.c.id, sub.c.source, sub.c.filename, sub.c.submitted_by, sub.c.submitted_at, sub.c.reasons)
            .where(sub.c.status == "rejected")
            .where((sub.c.cycle == cycle) | sub.c.cycle.is_(None))
            .where(sub.c.kind.in_(["forecast", "events", "unknown"])),
            ["id", "source", "filename", "submitted_by", "submitted_at", "reasons"])
    expected = expected_scopes(locations)
    families = set(items["family"].astype(str))
    rows = []
    used: set[int] = set()
    for exp in expected.itertuples(index=False):
        wanted = set(locations["location"].astype(str)) if exp.place == "all" else (
            set(locations.loc[locations["region"].astype(str) == exp.name, "location"].astype(str))
            if exp.place == "region" else {exp.name})
        covering = []
        for s in subs[subs["source"] == exp.source].itertuples(index=False):
            detail = s.scope_detail or {}
            if detail.get("place") == "events":
                covered = set(locations["location"].astype(str))
            else:
                covered = set(scope_locations(detail, locations))
            if covered & wanted:
                covering.append((s, covered))
        if not covering:
            rows.append({"source": exp.source, "scope": _scope_text(exp.place, exp.name), "state": "not_received"})
            continue
        newest, covered = covering[-1]
        fams = set((newest.scope_detail or {}).get("families", families))
        is_events = (newest.scope_detail or {}).get("place") == "events"  # events name what they touch, no more
        partly = (not wanted <= covered) or (not is_events and families and not families <= fams)
        rows.append({"source": exp.source, "scope": _scope_text(exp.place, exp.name),
                     "state": "partly_received" if partly else "received", "id": int(newest.id),
                     "filename": newest.filename, "submitted_by": newest.submitted_by,
                     "submitted_at": newest.submitted_at, "row_count": int(newest.row_count), "late": bool(newest.late),
                     "file_scope": newest.scope})
        used.add(int(newest.id))
        for older, _ in covering[:-1]:
            rows.append({"source": exp.source, "scope": _scope_text(exp.place, exp.name), "state": "replaced",
                         "id": int(older.id), "filename": older.filename, "submitted_by": older.submitted_by,
                         "submitted_at": older.submitted_at, "row_count": int(older.row_count),
                         "late": bool(older.late), "replaced_by": int(newest.id), "file_scope": older.scope})
    for s in subs.itertuples(index=False):  # files no expected scope asked for (a source nobody expects)
        if int(s.id) not in used and not any(r.get("id") == int(s.id) for r in rows):
            rows.append({"source": s.source, "scope": s.scope, "state": "received", "id": int(s.id),
                         "filename": s.filename, "submitted_by": s.submitted_by, "submitted_at": s.submitted_at,
                         "row_count": int(s.row_count), "late": bool(s.late), "file_scope": s.scope})
    for r in rejected.itertuples(index=False):
        rows.append({"source": r.source, "scope": "", "state": "rejected", "id": int(r.id), "filename": r.filename,
                     "submitted_by": r.submitted_by, "submitted_at": r.submitted_at, "row_count": 0,
                     "reasons": r.reasons})
    columns = ["source", "scope", "state", "id", "filename", "submitted_by", "submitted_at", "row_count", "late",
               "days_late", "replaced_by", "file_scope", "reasons"]
    table = pd.DataFrame(rows).reindex(columns=columns)
    table["days_late"] = _days_late(c, table)
    return table


def _days_late(cycle: Cycle, table: pd.DataFrame) -> pd.Series:
    """Days after the due date each file came (received files), or days left / days late now (not received)."""
    if cycle.due is None:
        return pd.Series(pd.NA, index=table.index, dtype="Int64")
    today = pd.Timestamp(utcnow().date())
    due = pd.Timestamp(cycle.due)
    came = pd.to_datetime(table["submitted_at"], errors="coerce", utc=True).dt.tz_localize(None).dt.normalize()
    days = (came.fillna(today) - due).dt.days
    return days.astype("Int64")
