"""Who has been right: accuracy of every source by lag bucket at any level of the hierarchy."""

from __future__ import annotations

import pandas as pd

from consensus.methods import accuracy, events
from consensus.store import frames
from consensus.store.db import session_scope
from consensus.workflow.cycles import get_cycle
from consensus.workflow.run import RunSpec, measure_history

LEVELS = ("item", "family", "location", "region", "total")


def scorecard(cycle: str, *, level: str = "family", window: int | None = None, url=None) -> pd.DataFrame:
    """Accuracy of each source (and the consensus and naive references) known at ``cycle``, by lag bucket."""
    spec = RunSpec()
    with session_scope(url) as session:
        c = get_cycle(session, cycle)
        items, locations = frames.load_items(session), frames.load_locations(session)
        actuals = frames.load_actuals(session)
        _, errors = measure_history(session, c, spec=spec, items=items, locations=locations, actuals=actuals)
    if window is not None:
        from consensus import periods
        errors = errors[errors["cycle"] >= periods.shift_month(cycle, -window)]
    scale = accuracy.seasonal_naive_scale(actuals[actuals["period"] <= cycle], level=level, items=items,
                                          locations=locations)
    return accuracy.accuracy_table(errors, level=level, items=items, locations=locations, seasonal_scale=scale)


def marketing_value_added(cycle: str, *, url=None) -> pd.DataFrame:
    """Did marketing's event uplifts make the statistical forecast better?  By lag bucket, on the cells they touched."""
    spec = RunSpec()
    with session_scope(url) as session:
        c = get_cycle(session, cycle)
        items, locations = frames.load_items(session), frames.load_locations(session)
        actuals = frames.load_actuals(session)
        _, errors = measure_history(session, c, spec=spec, items=items, locations=locations, actuals=actuals)
    with_events = errors[errors["source"] == "statistical"]
    without = errors[errors["source"] == "statistical_base"]
    if without.empty:
        return pd.DataFrame()
    return events.uplift_value_added(with_events, without)
