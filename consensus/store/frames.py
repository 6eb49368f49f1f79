"""Bulk movement between tables and DataFrames: many rows in one statement, never row by row."""

from __future__ import annotations

from collections.abc import Iterable

import pandas as pd
from sqlalchemy import delete, insert, select
from sqlmodel import Session, SQLModel

from consensus.store.models import (
    Actual,
    BomLine,
    EventLine,
    ForecastLine,
    Item,
    Location,
    SubmissionCycle,
)

_CHUNK = 20_000


def _records(frame: pd.DataFrame, columns: Iterable[str]) -> list[dict]:
    """Plain-Python records with NaN/NA turned into None (drivers want None and Python scalars)."""
    sub = frame.loc[:, list(columns)].astype(object)  # object arrays hold Python floats, ints and bools
    sub = sub.where(pd.notna(sub), None)
    return sub.to_dict("records")


def write_frame(session: Session, model: type[SQLModel], frame: pd.DataFrame) -> int:
    """Insert every row of ``frame`` into ``model``'s table (columns the table lacks are ignored)."""
    if frame.empty:
        return 0
    table = model.__table__
    columns = [c.name for c in table.columns if c.name in frame.columns]
    records = _records(frame, columns)
    for start in range(0, len(records), _CHUNK):
        session.execute(insert(table), records[start : start + _CHUNK])
    return len(records)


def read_frame(session: Session, statement, columns: list[str] | None = None) -> pd.DataFrame:
    """Run a select and return a DataFrame (empty with ``columns`` when nothing matches)."""
    result = session.execute(statement)
    names = list(result.keys())
    frame = pd.DataFrame([tuple(row) for row in result], columns=names)  # plain tuples: much faster than Rows
    if columns is not None and frame.empty:
        frame = pd.DataFrame({c: pd.Series(dtype=object) for c in columns})
    return frame


def table_frame(session: Session, model: type[SQLModel], columns: list[str]) -> pd.DataFrame:
    table = model.__table__
    return read_frame(session, select(*[table.c[c] for c in columns]), columns)


def load_items(session: Session) -> pd.DataFrame:
    """Items master as [item, family, unit_price, description]."""
    frame = table_frame(session, Item, ["item", "family", "unit_price", "description"])
    frame["unit_price"] = pd.to_numeric(frame["unit_price"], errors="coerce")
    return frame.sort_values("item", ignore_index=True)


def load_locations(session: Session) -> pd.DataFrame:
    """Locations master as [location, region, description]."""
    return table_frame(session, Location, ["location", "region", "description"]).sort_values(
        "location", ignore_index=True
    )


def load_bom(session: Session) -> pd.DataFrame:
    """Bill of material as [parent, component, qty_per, lead_time_months]."""
    frame = table_frame(session, BomLine, ["parent", "component", "qty_per", "lead_time_months"])
    return frame.sort_values(["parent", "component"], ignore_index=True)


def load_actuals(session: Session, *, through: str | None = None) -> pd.DataFrame:
    """Monthly actual demand [item, location, period, quantity], optionally only up to ``through``."""
    table = Actual.__table__
    statement = select(table.c.item, table.c.location, table.c.period, table.c.quantity)
    if through is not None:
        statement = statement.where(table.c.period <= through)
    frame = read_frame(session, statement, ["item", "location", "period", "quantity"])
    frame["quantity"] = pd.to_numeric(frame["quantity"]).astype(float)
    return frame.sort_values(["item", "location", "period"], ignore_index=True)


def replace_actuals(session: Session, monthly: pd.DataFrame, submission_id: int | None) -> int:
    """Replace the stored actuals of every (item, location, period) present in ``monthly``."""
    table = Actual.__table__
    for (period, location), group in monthly.groupby(["period", "location"], sort=True):
        session.execute(
            delete(table)
            .where(table.c.period == period)
            .where(table.c.location == location)
            .where(table.c.item.in_(group["item"].unique().tolist()))
        )
    frame = monthly.assign(submission_id=submission_id)
    return write_frame(session, Actual, frame)


def _lines_in_force(session: Session, model: type[SQLModel], columns: list[str], numeric: tuple[str, ...], *,
                    cycles: list[str] | None, sources: list[str] | None = None) -> pd.DataFrame:
    """Rows of ``model`` whose submission is still in force for their cycle (joined through SubmissionCycle)."""
    lines, sc = model.__table__, SubmissionCycle.__table__
    statement = (select(*[lines.c[c] for c in columns])
                 .join(sc, (sc.c.submission_id == lines.c.submission_id) & (sc.c.cycle == lines.c.cycle))
                 .where(sc.c.status == "accepted"))
    if cycles is not None:
        statement = statement.where(lines.c.cycle.in_(cycles))
    if sources is not None:
        statement = statement.where(lines.c.source.in_(sources))
    frame = read_frame(session, statement, columns)
    for col in numeric:
        frame[col] = pd.to_numeric(frame[col], errors="coerce").astype(float)
    return frame.sort_values(["cycle", *(["source"] if "source" in columns else []), "submission_id", "row"],
                             ignore_index=True)


def active_forecast_lines(session: Session, *, cycles: list[str] | None = None,
                          sources: list[str] | None = None) -> pd.DataFrame:
    """Forecast lines of the submissions still in force for their (source, cycle, scope)."""
    columns = ["submission_id", "cycle", "source", "row", "item", "family", "location", "region",
               "period", "week", "quantity", "value", "note"]
    return _lines_in_force(session, ForecastLine, columns, ("quantity", "value"), cycles=cycles, sources=sources)


def active_event_lines(session: Session, *, cycles: list[str] | None = None) -> pd.DataFrame:
    """Marketing event rows of the submissions still in force."""
    columns = ["submission_id", "cycle", "row", "event", "item", "family", "location", "region",
               "start", "end", "uplift_pct", "units", "note"]
    return _lines_in_force(session, EventLine, columns, ("uplift_pct", "units"), cycles=cycles)
