"""The statistical source: made by the tool from order history, stored like any submission.

For each cycle the forecast uses only the actuals known at that cycle, so a
past cycle's statistical forecast (a backcast) is what the method would have
said then, and its accuracy compares fairly with the human sources'.  The
seasonal naive forecast is stored beside it as source ``naive``, the
reference for MASE and forecast value added.
"""

from __future__ import annotations

import hashlib
import io

import pandas as pd
from sqlalchemy import select, update
from sqlmodel import Session

from consensus.methods.statistical import forecast_statistical
from consensus.store import frames
from consensus.store.models import Cycle, ForecastLine, Submission, SubmissionCycle

STATISTICAL, NAIVE = "statistical", "naive"


def actuals_digest(actuals: pd.DataFrame) -> str:
    """A fingerprint of the order history a forecast was made from."""
    text = actuals.sort_values(["item", "location", "period"]).to_csv(index=False, float_format="%.6f")
    return hashlib.sha256(text.encode()).hexdigest()


def _in_force(session: Session, source: str, cycle: str) -> Submission | None:
    sc = SubmissionCycle.__table__
    row = session.execute(select(sc.c.submission_id).where(sc.c.source == source).where(sc.c.cycle == cycle)
                          .where(sc.c.status == "accepted")).first()
    return session.get(Submission, row.submission_id) if row else None


def ensure_statistical(session: Session, cycle: Cycle, *, actuals: pd.DataFrame, items: pd.DataFrame) -> dict:
    """Make (or reuse) the statistical and seasonal-naive submissions of one cycle; return what was done."""
    known = actuals[actuals["period"] <= cycle.name]
    digest = actuals_digest(known)
    current = _in_force(session, STATISTICAL, cycle.name)
    if current is not None and current.file_format.get("actuals_digest") == digest:
        return {"cycle": cycle.name, "made": False, "submission_id": current.id, "digest": digest}
    if known.empty:
        return {"cycle": cycle.name, "made": False, "submission_id": None, "digest": digest}
    families = items.set_index("item")["family"]
    result = forecast_statistical(known, cycle=cycle.name, horizon=cycle.horizon, families=families)
    forecast = result.forecast.merge(result.intervals, on=["item", "location", "period"], how="left")
    series_csv = result.series.to_csv(index=False).encode()
    sub_ids = {}
    for source, lines in ((STATISTICAL, forecast.assign(note=forecast["method"])),
                          (NAIVE, result.seasonal_naive.assign(note="seasonal naive"))):
        body = lines.to_csv(index=False, float_format="%.6f").encode()
        sub = Submission(kind="forecast", source=source, scope="all", cycle=cycle.name,
                         filename=f"{source}-{cycle.name}.csv (computed)",
                         sha256=hashlib.sha256(body + digest.encode()).hexdigest(), submitted_by="consensus",
                         status="accepted", row_count=len(lines), grain="item × location × month, units",
                         file_format={"actuals_digest": digest, "computed": True,
                                      "history_through": cycle.name},
                         content=series_csv if source == STATISTICAL else b"")
        session.add(sub)
        session.flush()
        sc = SubmissionCycle.__table__
        session.execute(update(sc).where(sc.c.source == source).where(sc.c.cycle == cycle.name)
                        .where(sc.c.status == "accepted").values(status="superseded", superseded_by=sub.id))
        session.add(SubmissionCycle(submission_id=sub.id, source=source, cycle=cycle.name, scope="all"))
        rows = lines.reset_index(drop=True)
        frames.write_frame(session, ForecastLine, rows.assign(
            submission_id=sub.id, cycle=cycle.name, source=source, row=rows.index + 2))
        sub_ids[source] = sub.id
    session.flush()
    return {"cycle": cycle.name, "made": True, "submission_id": sub_ids[STATISTICAL], "digest": digest}


def series_table(session: Session, cycle: str) -> pd.DataFrame:
    """Per item × location: demand pattern, chosen method and its parameters, for the cycle's forecast."""
    sub = _in_force(session, STATISTICAL, cycle)
    if sub is None or not sub.content:
        return pd.DataFrame(columns=["item", "location", "pattern", "method"])
    return pd.read_csv(io.BytesIO(sub.content), keep_default_na=False, na_values=[""])
