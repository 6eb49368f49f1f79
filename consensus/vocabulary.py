"""One name for one thing: every source, state, level, exception kind and method the tool prints.

Raw identifiers (``dc``, ``holt_winters_mul``, ``family_region``) stay in the
code, the store and on ``--option`` values; whatever a planner reads, in the
terminal, the pack or an export header, comes from here.  A new source kind is
one :class:`SourceKind` entry in :data:`SOURCES`: intake, the run, the
scorecard and every page pick it up from this registry.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class SourceKind:
    """A kind of forecast the review weighs or scores, and how every page shows it.

    ``submitted``: it arrives in files from people (else the tool makes it);
    ``combined``: it enters the consensus (else it is only a yardstick);
    ``answers_for``: the scope each submitter is expected to cover every cycle
    ("region", "location", "all"), or None when nobody is expected to;
    ``colour`` and ``dashes``: its line in charts (matplotlib dash tuple), so
    colour is never the only cue.
    """

    key: str
    label: str
    short: str
    order: int
    submitted: bool
    combined: bool
    answers_for: str | None
    colour: str
    dashes: tuple | None
    description: str


SOURCES: tuple[SourceKind, ...] = (
    SourceKind("statistical", "Statistical", "Stat", 10, submitted=False, combined=True, answers_for=None,
               colour="#5f5f5f", dashes=(0, (3, 1.2, 1, 1.2, 1, 1.2)),
               description="made by the tool from customer-order history, with marketing's events applied"),
    SourceKind("sales", "Sales", "Sales", 20, submitted=True, combined=True, answers_for="region",
               colour="#d97a00", dashes=(0, (5, 2)),
               description="sales leads' forecasts, usually by product family and region"),
    SourceKind("marketing", "Marketing", "Mktg", 30, submitted=True, combined=True, answers_for="all",
               colour="#b3467f", dashes=(0, (1.5, 1.5)),
               description="marketing's events (promotions, launches, price moves) and any quantities it sends"),
    SourceKind("dc", "Distribution centers", "DCs", 40, submitted=True, combined=True, answers_for="location",
               colour="#1f9a8a", dashes=(0, (6, 1.5, 1.5, 1.5)),
               description="each distribution center's forecast for its own location"),
    SourceKind("statistical_base", "Statistical before events", "Stat0", 50, submitted=False, combined=False,
               answers_for=None, colour="#8c8c8c", dashes=(0, (1, 2)),
               description="the statistical forecast before marketing's events, to measure what the events add"),
    SourceKind("naive", "Seasonal naive", "Naive", 60, submitted=False, combined=False, answers_for=None,
               colour="#a9a9a9", dashes=(0, (2, 2)),
               description="last year's same month: the yardstick every forecast should beat"),
    SourceKind("consensus", "Consensus", "Cons", 0, submitted=False, combined=False, answers_for=None,
               colour="#0b4f8a", dashes=None,
               description="the plan: the sources weighed by their measured accuracy, with the meeting's decisions"),
)

_BY_KEY = {s.key: s for s in SOURCES}


def source(key: str) -> SourceKind:
    """The registry entry of a source; an unknown key gets a plain entry so nothing drops out of a page."""
    found = _BY_KEY.get(key)
    if found is not None:
        return found
    return SourceKind(key, key.replace("_", " ").capitalize(), key[:5], 90, submitted=True, combined=True,
                      answers_for="all", colour="#7a6a00", dashes=(0, (4, 1, 1, 1)), description=key)


def source_label(key: str) -> str:
    return source(key).label


def source_short(key: str) -> str:
    """The short name for narrow tables (printed with a legend)."""
    return source(key).short


def submitted_sources() -> tuple[str, ...]:
    """Sources that arrive in files, in display order."""
    return tuple(s.key for s in sorted(SOURCES, key=lambda s: s.order) if s.submitted)


def combined_sources() -> tuple[str, ...]:
    """Sources the consensus weighs, in display order."""
    return tuple(s.key for s in sorted(SOURCES, key=lambda s: s.order) if s.combined)


def scored_sources() -> tuple[str, ...]:
    """Everything the scorecard measures: the consensus, the combined sources, then the yardsticks."""
    return tuple(s.key for s in sorted(SOURCES, key=lambda s: s.order))


def ordered(keys) -> list[str]:
    """Source keys in display order (unknown keys last, alphabetically)."""
    return sorted(dict.fromkeys(keys), key=lambda k: (source(k).order, k))


_METHOD_LABELS = {
    "naive": "naive (last month)", "seasonal_naive": "seasonal naive", "moving_average": "moving average",
    "ses": "simple exponential smoothing", "croston": "Croston", "sba": "Syntetos–Boylan (SBA)",
    "holt_damped": "damped Holt", "holt": "Holt", "holt_winters_add": "Holt–Winters, additive season",
    "holt_winters_mul": "Holt–Winters, multiplicative season", "new_item_profile": "new-item profile",
    "zero_demand": "zero demand",
}


def method_label(key: str) -> str:
    """The statistical method's name as a planner reads it."""
    return _METHOD_LABELS.get(str(key), str(key).replace("_", " "))


def describe_change(kind: str, amount: float) -> str:
    """A decision in words: 'set to 240', '+40 units', '+8%'."""
    if kind == "set":
        return f"set to {amount:,.0f}"
    if kind == "pct":
        return f"{amount:+g}%"
    return f"{amount:+,.0f} units"
