"""The tables.  Singular nouns; one row means one thing a planner could point at.

The store keeps what was received, what was decided and what was computed:

* every file handed to the tool (:class:`Submission`), its bytes and its checked
  lines as content-addressed :class:`Blob` rows, accepted or rejected;
* the cycles (:class:`Cycle`) and each revision of a cycle (:class:`CycleRevision`);
* the meeting's decisions (:class:`Decision`), withdrawals included;
* the runs (:class:`ConsensusRun`) with their specification and their result as
  packed frames in :class:`Blob` rows;
* a :class:`JournalEntry` for each of those records, in the order they were
  written, with a hash chain so an edit made outside the tool shows.

Which submission is in force is never stored: it follows from the journal
order (:mod:`consensus.methods.in_force`), so it cannot drift from the rule.
"""

from __future__ import annotations

from datetime import date, datetime, timezone

from sqlalchemy import JSON, Column, Index, LargeBinary, UniqueConstraint
from sqlmodel import Field, SQLModel


def utcnow() -> datetime:
    return datetime.now(timezone.utc).replace(microsecond=0)


class Blob(SQLModel, table=True):
    """Bytes stored once by their sha256: a received file (deflated) or a packed frame."""

    sha256: str = Field(primary_key=True)
    encoding: str  # "zlib" (a file's bytes, deflated) | "frame" (consensus.store.columnar)
    size: int  # bytes before encoding
    content: bytes = Field(sa_column=Column(LargeBinary, nullable=False))


class Cycle(SQLModel, table=True):
    """A monthly planning cycle: order history known through ``name``; plans the next ``horizon`` months."""

    name: str = Field(primary_key=True)  # "YYYY-MM"
    horizon: int = 18
    due: date | None = None  # when submissions are due
    revision: int = 1  # the revision now open or last published
    status: str = "open"  # open | published (of the current revision)
    opened_at: datetime = Field(default_factory=utcnow)
    opened_by: str = ""
    opened_seq: int | None = None  # journal position of the opening
    allow_missing_history: bool = False


class CycleRevision(SQLModel, table=True):
    """One revision of a cycle: opened (or reopened, with a reason), then perhaps published."""

    cycle: str = Field(foreign_key="cycle.name", primary_key=True)
    revision: int = Field(primary_key=True)
    opened_at: datetime = Field(default_factory=utcnow)
    opened_by: str = ""
    reason: str = ""
    published_at: datetime | None = None
    published_by: str | None = None
    published_run_id: int | None = None
    published_seq: int | None = None  # journal position of the publication


class Submission(SQLModel, table=True):
    """Every file handed to the tool, accepted or not, kept with its bytes, its checked lines and its reasons.

    ``id`` grows in the order submissions were accepted: the newest submission
    whose scope covers a cell is the one in force there.  ``scope`` is the
    scope in words; ``scope_detail`` its closed form: {"declared": bool,
    "place": "all" | "region" | "location", "places": [...]} (a declared scope
    covers every cell of its places; an undeclared one covers the cells its rows reach).
    """

    id: int | None = Field(default=None, primary_key=True)
    seq: int | None = Field(default=None, index=True)  # journal position: the order of acceptance
    kind: str  # forecast | events | actuals | items | locations | bom
    source: str | None = Field(default=None, index=True)
    cycle: str | None = Field(default=None, index=True)
    revision: int | None = None
    scope: str = "all"
    scope_detail: dict = Field(default_factory=dict, sa_column=Column(JSON))
    replace: bool = False  # master data: the file is the whole master (keys it leaves out are removed)
    filename: str
    sha256: str = Field(index=True)  # of the bytes as received
    lines_sha256: str | None = None  # the checked lines, a packed frame in Blob
    submitted_by: str = ""
    submitted_at: datetime = Field(default_factory=utcnow)
    status: str = "accepted"  # accepted | rejected
    reinstates: int | None = None  # an earlier submission with the same bytes that this makes current again
    late: bool = False
    reasons: list = Field(default_factory=list, sa_column=Column(JSON))
    row_count: int = 0
    grain: str = ""
    file_format: dict = Field(default_factory=dict, sa_column=Column(JSON))
    months: list = Field(default_factory=list, sa_column=Column(JSON))  # months the lines reach, sorted


class SubmissionCycle(SQLModel, table=True):
    """Which cycles a forecast or events file speaks for (a bulk file of past cycles speaks for several)."""

    submission_id: int = Field(foreign_key="submission.id", primary_key=True)
    cycle: str = Field(primary_key=True, index=True)


class Decision(SQLModel, table=True):
    """A change the review meeting made to the consensus, with its reason and author (and its withdrawal)."""

    id: int | None = Field(default=None, primary_key=True)
    seq: int | None = None  # journal position of the decision
    cycle: str = Field(foreign_key="cycle.name", index=True)
    revision: int = 1
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
    withdrawn_at: datetime | None = None
    withdrawn_by: str | None = None
    withdrawn_reason: str | None = None
    withdrawn_seq: int | None = None


class ConsensusRun(SQLModel, table=True):
    """One computation of a cycle's consensus: the settings, the inputs it read and where its result is."""

    id: int | None = Field(default=None, primary_key=True)
    cycle: str = Field(foreign_key="cycle.name", index=True)
    revision: int = 1
    created_at: datetime = Field(default_factory=utcnow)
    created_by: str = ""
    status: str = "draft"  # draft | published | superseded
    spec: dict = Field(default_factory=dict, sa_column=Column(JSON))
    through_seq: int = 0  # the journal position the inputs were read at
    inputs_digest: str = ""  # fingerprint of everything the result depends on
    method_version: str = ""
    inputs: list = Field(default_factory=list, sa_column=Column(JSON))  # submissions read: id, source, file, sha256
    summary: dict = Field(default_factory=dict, sa_column=Column(JSON))  # cells, total, flagged, sources
    parts: dict = Field(default_factory=dict, sa_column=Column(JSON))  # result frame name -> Blob sha256 (packed)
    notes: dict = Field(default_factory=dict, sa_column=Column(JSON))  # warnings and method notes


class CacheEntry(SQLModel, table=True):
    """Derived, not input: a part of a computation kept under the digest of everything it read.

    A different digest is a different entry, so a stale entry is never read;
    entries can be deleted at any time without changing a number.
    """

    key: str = Field(primary_key=True)
    kind: str = Field(index=True)
    cycle: str = ""
    created_at: datetime = Field(default_factory=utcnow)
    content: bytes = Field(sa_column=Column(LargeBinary, nullable=False))


class JournalEntry(SQLModel, table=True):
    """The store's history in write order, each entry chained to the one before by sha256.

    ``digest`` is the sha256 of the record as written (its canonical JSON);
    ``chain`` = sha256(previous chain + digest).  Recomputing both shows any
    record changed or removed outside the tool.
    """

    __table_args__ = (UniqueConstraint("kind", "ref_id", name="uq_journal_record"),
                      Index("ix_journal_cycle", "cycle"))
    seq: int | None = Field(default=None, primary_key=True)
    at: datetime = Field(default_factory=utcnow)
    kind: str  # submission | decision | withdrawal | cycle | reopen | publish | run
    ref_id: str
    cycle: str | None = None
    digest: str
    chain: str


class Setting(SQLModel, table=True):
    """A named setting of this store: the company name on the pack, intake limits."""

    key: str = Field(primary_key=True)
    value: str
