"""Backcasts: the statistical forecast each past cycle would have had, from the data known then."""

from __future__ import annotations

from consensus import periods
from consensus.errors import ConsensusError
from consensus.store import frames
from consensus.store.db import session_scope
from consensus.store.models import Cycle
from consensus.workflow.statistical_source import ensure_statistical


def backcast_cycles(first: str, last: str, *, horizon: int = 18, url=None) -> list[dict]:
    """Open any missing cycle from ``first`` to ``last`` and make its statistical source (idempotent)."""
    if periods.month_index(first) > periods.month_index(last):
        raise ConsensusError(f"--from {first} is after --to {last}")
    done = []
    with session_scope(url) as session:
        items = frames.load_items(session)
        actuals = frames.load_actuals(session, through=last)
        if actuals.empty:
            raise ConsensusError("no order history loaded; load it with 'consensus actuals FILE'")
        for name in periods.month_range(first, last):
            cycle = session.get(Cycle, name)
            if cycle is None:
                cycle = Cycle(name=name, horizon=horizon)
                session.add(cycle)
                session.flush()
            done.append(ensure_statistical(session, cycle, actuals=actuals, items=items))
    return done
