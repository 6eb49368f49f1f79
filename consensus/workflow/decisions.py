"""The review meeting's decisions: recorded with a reason and an author, withdrawn the same way, applied by the run.

Every decision and every withdrawal is a journal entry, so the log keeps both
and a run applies exactly the decisions in force when it read its inputs
(:func:`consensus.workflow.inputs.decisions_in_force`; the arithmetic is in
:mod:`consensus.methods.decisions`).  A published cycle takes no decisions.
"""

from __future__ import annotations

import math

import pandas as pd
from sqlalchemy import select

from consensus import periods
from consensus.errors import ConsensusError, CycleStateError, NotFound
from consensus.methods.decisions import DECISION_COLUMNS, KINDS, decision_scope
from consensus.store import frames, journal
from consensus.store.db import session_scope
from consensus.store.models import Decision, utcnow

#: Largest number a decision may set or add, in units (the intake limit for quantities).
MAX_UNITS = 1e9

__all__ = ["record_decision", "withdraw_decision", "load_decisions", "decision_scope", "KINDS"]


def _check_amount(kind: str, amount: float) -> float:
    try:
        amount = float(amount)
    except (TypeError, ValueError):
        raise ConsensusError(f"the amount must be a number, not {amount!r}") from None
    if not math.isfinite(amount):
        raise ConsensusError(f"the amount must be a finite number, not {amount}")
    if kind == "set" and amount < 0:
        raise ConsensusError("a set decision cannot make demand negative")
    if kind == "pct" and amount < -100:
        raise ConsensusError(f"--pct {amount:g} would make demand negative; the smallest change is -100 (to zero)")
    if kind in ("set", "delta") and abs(amount) > MAX_UNITS:
        raise ConsensusError(f"{amount:g} units is beyond the plausible limit of {MAX_UNITS:,.0f}")
    if kind == "pct" and amount > 10_000:
        raise ConsensusError(f"--pct {amount:g} is beyond the plausible limit of 10,000%")
    return amount


def record_decision(cycle: str, *, period: str, amount: float, reason: str, author: str, kind: str = "set",
                    item: str | None = None, family: str | None = None, location: str | None = None,
                    region: str | None = None, url=None) -> Decision:
    """Store one decision after checking that its scope exists, the cycle is open and it has a reason."""
    from consensus.intake.submission import require_open

    if kind not in KINDS:
        raise ConsensusError(f"kind must be one of {', '.join(KINDS)}, not {kind!r}")
    if not reason.strip() or not author.strip():
        raise ConsensusError("a decision needs a reason and an author")
    if (item is None) == (family is None):
        raise ConsensusError("name exactly one of --item or --family")
    if location is not None and region is not None:
        raise ConsensusError("name at most one of --location or --region")
    amount = _check_amount(kind, amount)
    if not periods.is_month(period):
        raise ConsensusError(f"--period must be a month in YYYY-MM form, not {period!r}")
    with session_scope(url) as session:
        c = require_open(session, cycle)
        if period not in periods.horizon_months(c.name, c.horizon):
            raise ConsensusError(f"period {period} is outside cycle {cycle}'s horizon")
        items, locations = frames.load_items(session), frames.load_locations(session)
        for value, column, frame in ((item, "item", items), (family, "family", items),
                                     (location, "location", locations), (region, "region", locations)):
            if value is not None and value not in set(frame[column]):
                raise ConsensusError(f"unknown {column} {value!r}")
        decision = Decision(cycle=cycle, revision=c.revision, period=period, amount=amount, reason=reason.strip(),
                            author=author.strip(), kind=kind, item=item, family=family, location=location,
                            region=region, at=utcnow())
        session.add(decision)
        session.flush()
        decision.seq = journal.record(session, "decision", decision, cycle=cycle).seq
        session.add(decision)
        return decision


def withdraw_decision(decision_id: int, *, reason: str, by: str, url=None) -> Decision:
    """Withdraw a decision of an open cycle; it stays in the log, marked withdrawn, and stops applying."""
    from consensus.intake.submission import require_open

    if not reason.strip() or not by.strip():
        raise ConsensusError("withdrawing a decision needs --reason and --by")
    with session_scope(url) as session:
        decision = session.get(Decision, int(decision_id))
        if decision is None:
            raise NotFound(f"there is no decision #{decision_id}")
        if decision.withdrawn_at is not None:
            raise CycleStateError(f"decision #{decision_id} was already withdrawn by {decision.withdrawn_by}")
        require_open(session, decision.cycle)
        decision.withdrawn_at, decision.withdrawn_by, decision.withdrawn_reason = utcnow(), by.strip(), reason.strip()
        session.add(decision)
        session.flush()
        decision.withdrawn_seq = journal.record(session, "withdrawal", decision, cycle=decision.cycle).seq
        session.add(decision)
        return decision


def load_decisions(session, cycle: str, *, through: int | None = None) -> pd.DataFrame:
    """Every decision of the cycle (withdrawn ones included, with who withdrew them and why)."""
    d = Decision.__table__
    columns = [*DECISION_COLUMNS, "revision", "seq", "withdrawn_at", "withdrawn_by", "withdrawn_reason",
               "withdrawn_seq"]
    statement = select(*[d.c[c] for c in columns]).where(d.c.cycle == cycle)
    if through is not None:
        statement = statement.where(d.c.seq <= through)
    frame = frames.read_frame(session, statement.order_by(d.c.id), columns)
    if through is not None and len(frame):
        late = pd.to_numeric(frame["withdrawn_seq"]) > through
        frame.loc[late, ["withdrawn_at", "withdrawn_by", "withdrawn_reason", "withdrawn_seq"]] = None
    return frame
