"""Reading the store as DataFrames: master data, order history and submissions, as in force at a journal position.

Master data and order history are not kept as rows that files overwrite: each
accepted file keeps its checked lines (a packed frame), and what is in force
is worked out from them by the one rule in :mod:`consensus.methods.in_force`
— so the store can say what was in force when any run was made, and a run
made later from the same files gives the same numbers.
"""

from __future__ import annotations

import pandas as pd
from sqlalchemy import insert, select
from sqlmodel import Session, SQLModel

from consensus.errors import StoreError
from consensus.methods.in_force import in_force
from consensus.store import blobs
from consensus.store.models import Submission, SubmissionCycle

_CHUNK = 20_000

#: Columns of each master kind's checked lines, and the key a newer file replaces by.
MASTER_COLUMNS = {
    "items": (["item", "family", "unit_price", "description"], ["item"]),
    "locations": (["location", "region", "description"], ["location"]),
    "bom": (["parent", "component", "qty_per", "lead_time_months"], ["parent", "component"]),
}
ACTUAL_COLUMNS = ["item", "location", "period", "quantity"]
SUBMISSION_COLUMNS = ["id", "seq", "kind", "source", "cycle", "revision", "scope", "scope_detail", "replace",
                      "filename", "sha256", "lines_sha256", "submitted_by", "submitted_at", "status", "reinstates",
                      "late", "row_count", "grain", "months"]


def _records(frame: pd.DataFrame, columns) -> list[dict]:
    """Plain-Python records with NaN/NA turned into None (drivers want None and Python scalars)."""
    sub = frame.loc[:, list(columns)].astype(object)
    sub = sub.where(pd.notna(sub), None)
    return sub.to_dict("records")


def write_frame(session: Session, model: type[SQLModel], frame: pd.DataFrame) -> int:
    """Insert every row of ``frame`` into ``model``'s table, one executemany per chunk.

    Every column of the frame must be a column of the table: a column that
    would be silently dropped is an error, not a loss.
    """
    if frame.empty:
        return 0
    table = model.__table__
    unknown = [c for c in frame.columns if c not in table.columns]
    if unknown:
        raise StoreError(f"table {table.name} has no column(s) {unknown}; nothing was written")
    records = _records(frame, frame.columns)
    for start in range(0, len(records), _CHUNK):
        session.execute(insert(table), records[start: start + _CHUNK])
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


def submissions(session: Session, *, kinds, cycles=None, through: int | None = None,
                accepted: bool = True) -> pd.DataFrame:
    """Submission records (newest last), optionally only those written up to journal position ``through``."""
    t = Submission.__table__
    statement = select(*[t.c[c] for c in SUBMISSION_COLUMNS]).where(t.c.kind.in_(list(kinds)))
    if accepted:
        statement = statement.where(t.c.status == "accepted")
    if cycles is not None:
        link = SubmissionCycle.__table__
        statement = statement.where(t.c.id.in_(select(link.c.submission_id).where(link.c.cycle.in_(list(cycles)))))
    if through is not None:
        statement = statement.where(t.c.seq <= through)
    frame = read_frame(session, statement.order_by(t.c.seq, t.c.id), SUBMISSION_COLUMNS)
    return frame.reset_index(drop=True)


def submission_lines(session: Session, subs: pd.DataFrame) -> pd.DataFrame:
    """The checked lines of the given submissions, each row tagged with its submission's ``seq`` and id."""
    shas = [s for s in subs["lines_sha256"].dropna().unique()]
    found = blobs.get_frames(session, shas)
    parts = [found[row.lines_sha256].assign(seq=int(row.seq), submission_id=int(row.id))
             for row in subs.itertuples(index=False) if isinstance(row.lines_sha256, str)]
    if not parts:
        return pd.DataFrame({"seq": pd.Series(dtype=int), "submission_id": pd.Series(dtype=int)})
    return pd.concat(parts, ignore_index=True)


def _master(session: Session, kind: str, through: int | None) -> pd.DataFrame:
    columns, keys = MASTER_COLUMNS[kind]
    subs = submissions(session, kinds=[kind], through=through)
    lines = submission_lines(session, subs)
    if lines.empty:
        return pd.DataFrame({c: pd.Series(dtype=float if c in ("unit_price", "qty_per") else
                                           int if c == "lead_time_months" else object) for c in columns})
    whole = subs.loc[subs["replace"].astype(bool), "seq"]
    kept = in_force(lines, keys=keys, whole=whole)
    return kept[columns].sort_values(keys, kind="mergesort", ignore_index=True)


def load_items(session: Session, *, through: int | None = None) -> pd.DataFrame:
    """Items master in force as [item, family, unit_price, description]."""
    frame = _master(session, "items", through)
    frame["unit_price"] = pd.to_numeric(frame["unit_price"], errors="coerce")
    return frame


def load_locations(session: Session, *, through: int | None = None) -> pd.DataFrame:
    """Locations master in force as [location, region, description]."""
    return _master(session, "locations", through)


def load_bom(session: Session, *, through: int | None = None) -> pd.DataFrame:
    """Bill of material in force as [parent, component, qty_per, lead_time_months]."""
    frame = _master(session, "bom", through)
    frame["qty_per"] = pd.to_numeric(frame["qty_per"]).astype(float)
    frame["lead_time_months"] = pd.to_numeric(frame["lead_time_months"]).astype(int)
    return frame


def load_actuals(session: Session, *, through: int | None = None, period_through: str | None = None) -> pd.DataFrame:
    """Monthly customer orders in force [item, location, period, quantity] (newest file wins per key)."""
    subs = submissions(session, kinds=["actuals"], through=through)
    lines = submission_lines(session, subs)
    if lines.empty:
        return pd.DataFrame({"item": pd.Series(dtype=object), "location": pd.Series(dtype=object),
                             "period": pd.Series(dtype=object), "quantity": pd.Series(dtype=float)})
    kept = in_force(lines, keys=["item", "location", "period"])[ACTUAL_COLUMNS]
    if period_through is not None:
        kept = kept[kept["period"] <= period_through]
    kept = kept.assign(quantity=pd.to_numeric(kept["quantity"]).astype(float))
    return kept.sort_values(["item", "location", "period"], kind="mergesort", ignore_index=True)
