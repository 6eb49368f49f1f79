"""Past cycles for the accuracy record: opened with no submissions, so their statistical forecast counts.

A new store has no forecasts from earlier months, so nobody's accuracy can be
measured yet.  Opening the past cycles lets every run make, for each of them,
the statistical forecast the method would have given from the orders known
then (the run keeps those in its cache), so the statistical source has an
accuracy record from the first real cycle.
"""

from __future__ import annotations

from consensus import periods
from consensus.errors import ConsensusError, CycleStateError
from consensus.store import frames
from consensus.store.db import session_scope
from consensus.store.models import Cycle
from consensus.workflow.cycles import describe_missing, missing_history_months, open_cycle


def open_past_cycles(first: str, last: str, *, horizon: int = 18, url=None) -> list[dict]:
    """Open every cycle from ``first`` to ``last`` that is not open yet (idempotent)."""
    for name in (first, last):
        if not periods.is_month(name):
            raise ConsensusError(f"--from and --to must be months in YYYY-MM form, not {name!r}")
    if periods.month_index(first) > periods.month_index(last):
        raise ConsensusError(f"--from {first} is after --to {last}")
    with session_scope(url, write=False) as session:
        actuals = frames.load_actuals(session)
    if actuals.empty:
        raise ConsensusError("no order history loaded; load it with 'consensus actuals FILE'")
    first_orders = str(actuals["period"].min())
    for name in periods.month_range(first, last):  # refuse before opening any, naming what open-past can do
        if name < first_orders:
            raise CycleStateError(f"cycle {name} comes before the first month of order history ({first_orders}); "
                                  f"a past cycle is planned from the orders known then: start --from at "
                                  f"{first_orders} or later, or load the earlier orders with 'consensus actuals FILE'")
        missing = missing_history_months(actuals, name)
        if missing:
            raise CycleStateError(f"cycle {name}: no order history for {describe_missing(missing)}; load those "
                                  "months with 'consensus actuals FILE' before opening past cycles over them")
    done = []
    for name in periods.month_range(first, last):
        with session_scope(url, write=False) as session:
            already = session.get(Cycle, name) is not None
        open_cycle(name, horizon=horizon, url=url)
        done.append({"cycle": name, "opened": not already})
    return done
