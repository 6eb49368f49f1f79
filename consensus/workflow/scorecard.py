"""Who has been right: accuracy of every source by lag bucket at any level of the hierarchy."""

from __future__ import annotations

from dataclasses import dataclass

import pandas as pd

from consensus import periods
from consensus.methods import accuracy, events
from consensus.store import frames
from consensus.store.db import session_scope
from consensus.workflow.cycles import get_cycle
from consensus.workflow.run import RunSpec, measure_history


@dataclass(frozen=True)
class ErrorHistory:
    """Every past error known at a cycle, with the master data and order history it was measured on."""

    errors: pd.DataFrame
    items: pd.DataFrame
    locations: pd.DataFrame
    actuals: pd.DataFrame  # known at the cycle


def load_error_history(cycle: str, *, url=None) -> ErrorHistory:
    """Errors of every source, the consensus and the naive reference, for the cycles in the weight window."""
    with session_scope(url) as session:
        c = get_cycle(session, cycle)
        items, locations = frames.load_items(session), frames.load_locations(session)
        actuals = frames.load_actuals(session, through=cycle)
        _, errors = measure_history(session, c, spec=RunSpec(), items=items, locations=locations, actuals=actuals)
    return ErrorHistory(errors, items, locations, actuals)


def scorecard(cycle: str, *, level: str = "family", window: int | None = None, url=None,
              history: ErrorHistory | None = None) -> pd.DataFrame:
    """Accuracy of each source (and the consensus and naive references) known at ``cycle``, by lag bucket."""
    history = history or load_error_history(cycle, url=url)
    errors = history.errors
    if window is not None:
        errors = errors[errors["cycle"] >= periods.shift_month(cycle, -window)]
    scale = accuracy.seasonal_naive_scale(history.actuals, level=level, items=history.items,
                                          locations=history.locations)
    return accuracy.accuracy_table(errors, level=level, items=history.items, locations=history.locations,
                                   seasonal_scale=scale)


def marketing_value_added(cycle: str, *, url=None, history: ErrorHistory | None = None) -> pd.DataFrame:
    """Did marketing's event uplifts make the statistical forecast better?  By lag bucket, on the cells they touched."""
    errors = (history or load_error_history(cycle, url=url)).errors
    without = errors[errors["source"] == "statistical_base"]
    if without.empty:
        return pd.DataFrame()
    return events.uplift_value_added(errors[errors["source"] == "statistical"], without)


def scorecard_report(cycle: str, *, level: str = "family", url=None) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The scorecard and marketing's value added, from one pass over the cycle's error history."""
    history = load_error_history(cycle, url=url)
    return (scorecard(cycle, level=level, history=history),
            marketing_value_added(cycle, history=history))
