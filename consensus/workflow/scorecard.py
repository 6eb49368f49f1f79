"""Who has been right: the accuracy a run measured, read back from its stored result.

``consensus scorecard`` shows what the run of the cycle measured with its own
settings (its window, its segments); it never measures again.
"""

from __future__ import annotations

import pandas as pd

from consensus.errors import ConsensusError
from consensus.methods.scoring import LEVELS
from consensus.store.db import session_scope
from consensus.workflow.inputs import run_parts
from consensus.workflow.publish import latest_run

__all__ = ["scorecard", "marketing_value_added", "scorecard_report", "LEVELS"]


def _parts(cycle: str, names: list[str], *, revision: int | None, url) -> dict[str, pd.DataFrame]:
    with session_scope(url, write=False) as session:
        run = latest_run(session, cycle, revision=revision)
        return run_parts(session, run, names)


def scorecard(cycle: str, *, level: str = "family", revision: int | None = None, url=None,
              pooled: bool | None = None) -> pd.DataFrame:
    """Accuracy of each source (and the consensus and the naive yardstick) known at ``cycle``, by lag bucket.

    For item × location the rows pool every cell; for an upper level, one row
    per group (``pooled=True`` pools the groups instead).
    """
    if level not in LEVELS:
        raise ConsensusError(f"--level must be one of {', '.join(LEVELS)}, not {level!r}")
    parts = _parts(cycle, ["accuracy", "accuracy_groups"], revision=revision, url=url)
    if level == "item" or pooled:
        table = parts["accuracy"]
        return table[table["level"] == level].drop(columns="level").reset_index(drop=True)
    table = parts["accuracy_groups"]
    return table[table["level"] == level].drop(columns="level").reset_index(drop=True)


def marketing_value_added(cycle: str, *, revision: int | None = None, url=None) -> pd.DataFrame:
    """Did marketing's event uplifts make the statistical forecast better?  By lag bucket, on the cells they touched."""
    return _parts(cycle, ["uplift"], revision=revision, url=url).get("uplift", pd.DataFrame())


def scorecard_report(cycle: str, *, level: str = "family", revision: int | None = None,
                     url=None) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The scorecard and marketing's value added, as the cycle's run stored them."""
    return (scorecard(cycle, level=level, revision=revision, url=url),
            marketing_value_added(cycle, revision=revision, url=url))
