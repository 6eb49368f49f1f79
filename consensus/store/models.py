"""The tables.  Singular nouns; one row means one thing a planner could point at."""

from __future__ import annotations

from datetime import datetime, timezone

from sqlalchemy import JSON, Column, Index, LargeBinary, UniqueConstraint
from sqlmodel import Field, SQLModel


def utcnow() -> datetime:
    return datetime.now(timezone.utc).replace(microsecond=0)


# --- master data -------------------------------------------------------------------------

class Item(SQLModel, table=True):
    """A sellable item (independent demand), grouped into a family."""

    item: str = Field(primary_key=True)
    family: str = Field(index=True)
    unit_price: float | None = None
    description: str = ""


class Location(SQLModel, table=True):
    """A distribution center, grouped into a region."""

    location: str = Field(primary_key=True)
    region: str = Field(index=True)
    description: str = ""


class BomLine(SQLModel, table=True):
    """One parent → component link of the bill of material."""

    __table_args__ = (UniqueConstraint("parent", "component"),)
    id: int | None = Field(default=None, primary_key=True)
    parent: str = Field(index=True)
    component: str
    qty_per: float
    lead_time_months: int = 0


# --- cycles and submissions ----------------------------------------------------------------

class Cycle(SQLModel, table=True):
    """A monthly planning cycle: order history known through ``name``; plans the next ``horizon`` months."""

    name: str = Field(primary_key=True)  # "YYYY-MM"
    horizon: int = 18
    status: str = "open"  # open | published
    opened_at: datetime = Field(default_factory=utcnow)
    published_at: datetime | None = None
    published_run_id: int | None = None


class Submission(SQLModel, table=True):
    """Every file handed to the tool, accepted or not, kept with its bytes and its reasons."""

    id: int | None = Field(default=None, primary_key=True)
    kind: str  # forecast | events | actuals | items | locations | bom
    source: str | None = Field(default=None, index=True)  # sales | marketing | dc | statistical
    scope: str = "all"  # e.g. region NORTH, location DC-1, or all
    cycle: str | None = Field(default=None, index=True)  # None for bulk files carrying a cycle column
    filename: str
    sha256: str = Field(index=True)
    submitted_by: str = ""
    submitted_at: datetime = Field(default_factory=utcnow)
    status: str = "accepted"  # accepted | rejected | superseded | duplicate
    reasons: list = Field(default_factory=list, sa_column=Column(JSON))
    row_count: int = 0
    grain: str = ""  # e.g. "family x region x month, value"
    file_format: dict = Field(default_factory=dict, sa_column=Column(JSON))
    content: bytes = Field(default=b"", sa_column=Column(LargeBinary))


class SubmissionCycle(SQLModel, table=True):
    """Which cycles a submission speaks for, and whether it is still the one in force there."""

    __table_args__ = (Index("ix_subcycle_key", "source", "cycle", "scope"),)
    id: int | None = Field(default=None, primary_key=True)
    submission_id: int = Field(foreign_key="submission.id", index=True)
    source: str
    cycle: str
    scope: str
    status: str = "accepted"  # accepted | superseded
    superseded_by: int | None = None


class ForecastLine(SQLModel, table=True):
    """One row of a forecast file exactly as submitted (before alignment)."""

    __table_args__ = (Index("ix_fline_cycle_source", "cycle", "source"),)
    id: int | None = Field(default=None, primary_key=True)
    submission_id: int = Field(foreign_key="submission.id", index=True)
    cycle: str
    source: str
    row: int  # spreadsheet row in the file
    item: str | None = None
    family: str | None = None
    location: str | None = None
    region: str | None = None
    period: str | None = None
    week: str | None = None
    quantity: float | None = None
    value: float | None = None
    note: str | None = None


class EventLine(SQLModel, table=True):
    """One marketing event row: an uplift over a span of months."""

    id: int | None = Field(default=None, primary_key=True)
    submission_id: int = Field(foreign_key="submission.id", index=True)
    cycle: str = Field(index=True)
    row: int
    event: str
    item: str | None = None
    family: str | None = None
    location: str | None = None
    region: str | None = None
    start: str
    end: str
    uplift_pct: float | None = None
    units: float | None = None
    note: str | None = None


class Actual(SQLModel, table=True):
    """Customer orders of one item at one location in one month."""

    item: str = Field(primary_key=True)
    location: str = Field(primary_key=True)
    period: str = Field(primary_key=True)
    quantity: float
    submission_id: int | None = None


# --- consensus runs and their audit ------------------------------------------------------------

class ConsensusRun(SQLModel, table=True):
    """One computation of a cycle's consensus, with the settings that made it."""

    id: int | None = Field(default=None, primary_key=True)
    cycle: str = Field(foreign_key="cycle.name", index=True)
    created_at: datetime = Field(default_factory=utcnow)
    status: str = "draft"  # draft | published | superseded
    spec: dict = Field(default_factory=dict, sa_column=Column(JSON))
    inputs: list = Field(default_factory=list, sa_column=Column(JSON))  # submission ids and hashes
    notes: dict = Field(default_factory=dict, sa_column=Column(JSON))  # method notes, warnings


class ConsensusLine(SQLModel, table=True):
    """The consensus of one cell (item × location × month) in a run, with its error band."""

    __table_args__ = (Index("ix_cline_run_cell", "run_id", "item", "location", "period"),)
    id: int | None = Field(default=None, primary_key=True)
    run_id: int = Field(foreign_key="consensusrun.id")
    item: str
    location: str
    period: str
    lag: int
    consensus: float
    lower_80: float | None = None
    upper_80: float | None = None
    lower_95: float | None = None
    upper_95: float | None = None
    band_method: str = ""
    n_sources: int = 0
    missing_sources: str = ""
    spread: float = 0.0
    spread_ratio: float = 0.0
    flagged: bool = False
    before_reconciliation: float | None = None
    reconciliation_adjustment: float = 0.0
    reconciliation_note: str = ""
    before_override: float | None = None


class CellSource(SQLModel, table=True):
    """Audit: one source's part in one cell of a run (value, weight, contribution, why)."""

    __table_args__ = (Index("ix_csource_run_cell", "run_id", "item", "location", "period"),)
    id: int | None = Field(default=None, primary_key=True)
    run_id: int = Field(foreign_key="consensusrun.id")
    item: str
    location: str
    period: str
    source: str
    value: float
    weight: float
    contribution: float
    bias_correction: float = 0.0
    weight_basis: str = ""
    note: str = ""


class AlignmentTrace(SQLModel, table=True):
    """Audit: how one submitted row reached one planning cell (share and where it came from)."""

    __table_args__ = (Index("ix_trace_run_cell", "run_id", "item", "location", "period"),)
    id: int | None = Field(default=None, primary_key=True)
    run_id: int = Field(foreign_key="consensusrun.id")
    source: str
    submission_id: int | None = None
    row: int | None = None
    item: str
    location: str
    period: str
    submitted: str = ""  # the original row in words, e.g. "family DRIP-KITS, region NORTH, 2027-01: 1,200 units"
    share: float = 1.0
    share_basis: str = ""
    quantity: float = 0.0


class WeightRecord(SQLModel, table=True):
    """The weight a source earned in a segment and lag bucket, and the accuracy behind it."""

    id: int | None = Field(default=None, primary_key=True)
    run_id: int = Field(foreign_key="consensusrun.id", index=True)
    segment: str
    lag_bucket: str
    source: str
    weight: float
    raw_weight: float | None = None
    psi: float | None = None
    n_cycles: int = 0
    n_errors: int = 0
    mad: float | None = None
    mse: float | None = None
    mean_error: float | None = None
    basis: str = ""
    note: str = ""


class Decision(SQLModel, table=True):
    """A change the review meeting made to the consensus, with its reason and author."""

    id: int | None = Field(default=None, primary_key=True)
    cycle: str = Field(foreign_key="cycle.name", index=True)
    at: datetime = Field(default_factory=utcnow)
    author: str
    item: str | None = None
    family: str | None = None
    location: str | None = None
    region: str | None = None
    period: str
    kind: str = "set"  # set | delta | pct
    amount: float = 0.0
    reason: str


class Setting(SQLModel, table=True):
    """A named setting of this store, such as the company name printed on the pack."""

    key: str = Field(primary_key=True)
    value: str


class AlignedLine(SQLModel, table=True):
    """Derived, not input: a past cycle's sources at planning grain, kept so runs need not re-align history.

    ``key`` fingerprints everything the alignment read (the submissions in force,
    the order history known at the cycle, the settings); a different key is a
    stale row, never used.
    """

    __table_args__ = (Index("ix_aligned_cycle_key", "cycle", "key"),)
    id: int | None = Field(default=None, primary_key=True)
    cycle: str
    key: str
    source: str
    item: str
    location: str
    period: str
    lag: int
    quantity: float
