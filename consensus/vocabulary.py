"""One name for one thing: every source, state, level, exception kind and method the tool prints.

Raw identifiers (``dc``, ``holt_winters_mul``, ``family_region``) stay in the
code, the store and on ``--option`` values; whatever a planner reads, in the
terminal, the pack or an export header, comes from here.  A new source kind is
one :class:`SourceKind` entry in :data:`SOURCES`: intake, the run, the
scorecard and every page pick it up from this registry.

Each other registry is a tuple of :class:`Term` (key, label, what it means,
where it is published) and is read through :func:`label` / :func:`term`, so an
unknown key still prints as words instead of dropping out of a page.  Labels of
sources are proper names and keep their capital letter mid-sentence
("weighted towards Sales"), so they never blur with ordinary words.
"""

from __future__ import annotations

import math
import zlib
from dataclasses import dataclass

# --------------------------------------------------------------------------- sources


@dataclass(frozen=True)
class SourceKind:
    """A kind of forecast the review weighs or scores, and how every page shows it.

    ``submitted``: it arrives in files from people (else the tool makes it);
    ``combined``: it enters the consensus (else it is only a yardstick);
    ``answers_for``: the scope each submitter is expected to cover every cycle
    ("region", "location", "all"), or None when nobody is expected to;
    ``colour`` and ``dashes``: its line in charts (matplotlib dash tuple), so
    colour is never the only cue;
    ``value_added_baseline``: the step of the forecasting process it is judged
    against on the value-added page (what it should improve on), None for the
    first step; ``value_added_rank``: its place in that process.
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
    value_added_baseline: str | None = "statistical"
    value_added_rank: int = 50


SOURCES: tuple[SourceKind, ...] = (
    SourceKind("statistical", "Statistical", "Stat", 10, submitted=False, combined=True, answers_for=None,
               colour="#5f5f5f", dashes=(0, (3, 1.2, 1, 1.2, 1, 1.2)),
               description="made by the tool from customer-order history, with marketing's events applied",
               value_added_baseline="statistical_base", value_added_rank=20),
    SourceKind("sales", "Sales", "Sales", 20, submitted=True, combined=True, answers_for="region",
               colour="#d97a00", dashes=(0, (5, 2)),
               description="sales leads' forecasts, usually by product family and region"),
    SourceKind("marketing", "Marketing", "Mktg", 30, submitted=True, combined=True, answers_for="all",
               colour="#b3467f", dashes=(0, (1.5, 1.5)),
               description="marketing's events (promotions, launches, price moves) and any quantities it sends"),
    SourceKind("dc", "Distribution centers", "DCs", 40, submitted=True, combined=True, answers_for="location",
               colour="#1f9a8a", dashes=(0, (6, 1.5, 1.5, 1.5)),
               description="each distribution center's forecast for its own location"),
    SourceKind("statistical_base", "Statistical before events", "Stat-", 50, submitted=False, combined=False,
               answers_for=None, colour="#8c8c8c", dashes=(0, (1, 2)),
               description="the statistical forecast before marketing's events, to measure what the events add",
               value_added_baseline="naive", value_added_rank=10),
    SourceKind("naive", "Seasonal naive", "Naive", 60, submitted=False, combined=False, answers_for=None,
               colour="#a9a9a9", dashes=(0, (2, 2)),
               description="last year's same month: the yardstick every forecast should beat",
               value_added_baseline=None, value_added_rank=0),
    SourceKind("consensus", "Consensus", "Cons", 0, submitted=False, combined=False, answers_for=None,
               colour="#0b4f8a", dashes=None,
               description="the plan: the sources weighed by their measured accuracy, with the meeting's decisions",
               value_added_baseline="statistical", value_added_rank=90),
)


def source(key: str) -> SourceKind:
    """The registry entry of a source; an unknown key gets a plain entry so nothing drops out of a page.

    The registry is read on every call (it is a handful of entries), so a
    source kind added to :data:`SOURCES` shows everywhere at once.
    """
    key = str(key)
    for found in SOURCES:
        if found.key == key:
            return found
    # A stable pick per key, so two unregistered sources still draw apart.
    colour, dashes = _UNREGISTERED_STYLES[zlib.crc32(key.encode("utf-8")) % len(_UNREGISTERED_STYLES)]
    return SourceKind(key, _humanise(key).capitalize(), key[:5], 90, submitted=True, combined=True,
                      answers_for="all", colour=colour, dashes=dashes, description=_humanise(key))


#: Lines for sources not (yet) in the registry: hues and dashes none of the registered sources use.
_UNREGISTERED_STYLES: tuple[tuple[str, tuple], ...] = (
    ("#7a6a00", (0, (4, 1, 1, 1))), ("#4d7ab3", (0, (2, 1, 2, 3))), ("#a05a2c", (0, (6, 1, 1, 1, 1, 1))),
    ("#3f7f3f", (0, (1, 1, 4, 1))),
)


def source_label(key: str) -> str:
    """The name every page prints for a source ("dc" → "Distribution centers")."""
    return source(key).label


def source_short(key: str) -> str:
    """The short name for narrow terminal tables (printed with a legend of the full names)."""
    return source(key).short


def method_label(key: str) -> str:
    """A statistical method's name as a planner reads it."""
    return label(STATISTICAL_METHODS, key)


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
    return sorted(dict.fromkeys(str(k) for k in keys), key=lambda k: (source(k).order, k))


def value_added_order(keys) -> list[str]:
    """Source keys in the order of the forecasting process, as the value-added page lists its steps.

    The yardstick first, then the statistical forecast before and after
    events, then what people send, then the consensus; ties in display order.
    """
    return sorted(dict.fromkeys(str(k) for k in keys),
                  key=lambda k: (source(k).value_added_rank, source(k).order, k))


def value_added_baseline(key: str, present) -> str | None:
    """The step ``key`` is judged against among the steps ``present``, walking back when its own is absent.

    E.g. without "statistical_base" the statistical forecast is judged
    against seasonal naive, the baseline of the step it would have followed.
    """
    present = set(str(k) for k in present)
    seen = {str(key)}
    baseline = source(key).value_added_baseline
    while baseline is not None and baseline not in present and baseline not in seen:
        seen.add(baseline)
        baseline = source(baseline).value_added_baseline
    return baseline if baseline in present else None


# --------------------------------------------------------------------------- terms


@dataclass(frozen=True)
class Term:
    """A word the tool prints for a raw identifier: its label, what it means, and where it is published.

    ``reference`` is the published source of a method ("" for a fact of the
    trade with no single source).
    """

    key: str
    label: str
    description: str = ""
    reference: str = ""


def term(registry: tuple[Term, ...], key) -> Term:
    """The entry of ``key`` in ``registry``; an unknown key gets its identifier in words."""
    key = str(key)
    for found in registry:
        if found.key == key:
            return found
    return Term(key, _humanise(key))


def label(registry: tuple[Term, ...], key) -> str:
    """The label of ``key`` in ``registry`` (an unknown key in words, never dropped)."""
    return term(registry, key).label


def _humanise(key: str) -> str:
    return str(key).replace("_", " ").strip()


#: Where accuracy is measured: the grain of the plan and the groups it adds up to.
LEVELS: tuple[Term, ...] = (
    Term("item", "Item × location", "each item at each distribution center, the grain the plan is made at"),
    Term("family_region", "Family × region", "each product family in each region"),
    Term("family", "Family", "each product family, all locations together"),
    Term("region", "Region", "each region, all items together"),
    Term("total", "Total", "all items and locations together"),
)

#: Where a submission stands in a cycle (the keys ``consensus status`` gives).
SUBMISSION_STATES: tuple[Term, ...] = (
    Term("received", "Received", "a file in force for this scope"),
    Term("partly_received", "Partly received", "a file in force for some of the scope's families or locations"),
    Term("not_received", "Missing", "an expected submission that has not arrived"),
    Term("replaced", "Replaced by a later file", "a newer file covers this scope; this one is kept, not used here"),
    Term("rejected", "Rejected", "a file that failed the checks; nothing of it was used"),
    Term("unchanged", "Already received", "the same file (same SHA-256) is in force already; nothing changed"),
)
#: Column heading over a submission state, on every page and in the terminal.
STATE_HEADING = "State"

#: Where a cycle's plan stands.  The store says "open" for a cycle, the run and the pack "draft" for its plan.
PLAN_STATES: tuple[Term, ...] = (
    Term("draft", "Draft", "the plan can still change: inputs and the meeting's decisions are still coming in"),
    Term("open", "Draft", "the plan can still change: inputs and the meeting's decisions are still coming in"),
    Term("published", "Published", "the plan handed to supply planning; it no longer changes"),
)


@dataclass(frozen=True)
class ExceptionKind:
    """A kind of exception the pack raises: its one name, what its count counts, and its rule.

    ``label`` is both the kind's name in lists and its section heading;
    ``counts`` is the thing counted, singular and plural ("item", "items");
    ``rule`` is a :meth:`str.format` template filled by
    :func:`describe_exception_rule` with the thresholds in force.
    """

    key: str
    label: str
    counts: tuple[str, str]
    rule: str
    question: str


EXCEPTION_KINDS: tuple[ExceptionKind, ...] = (
    ExceptionKind("disagreement", "Sources disagree", ("item", "items"),
                  "highest minus lowest source {disagreement}{min_units}",
                  "Which source should the plan follow for {scope}?"),
    ExceptionKind("tracking", "Persistent bias", ("source", "sources"),
                  "|tracking signal| above {ts_limit} for a source the consensus weighs, at some level and lag",
                  "Correct {scope} for its persistent bias, or give it less weight?"),
    ExceptionKind("missing", "Missing submissions", ("submission", "submissions"),
                  "an expected submission not received{due}",
                  "Chase {scope}, or plan without it?"),
    ExceptionKind("change", "Large changes since last cycle", ("item", "items"),
                  "plan moved by more than {change_pct} against the last published cycle",
                  "Accept the move for {scope}?"),
    ExceptionKind("band", "Wide bands", ("item", "items"),
                  "80% band wider than {band_pct} of the plan over the next {band_months} months",
                  "Hold buffer stock, or firm up the plan for {scope}?"),
    ExceptionKind("amplification", "Order amplification", ("DC", "DCs"),
                  "variance ratio of the orders a DC's forecasts imply to its demand above {amplification_limit} "
                  "the bound of a {amplification_months}-month moving average at its lead time (Chen et al. 2000)",
                  "Ask {scope} to steady its forecast revisions, or plan supply for the swing?"),
)


def exception_kind(key: str) -> ExceptionKind:
    """The registry entry of an exception kind (an unknown key gets a plain entry)."""
    for found in EXCEPTION_KINDS:
        if found.key == key:
            return found
    return ExceptionKind(key, _humanise(key).capitalize(), ("case", "cases"), _humanise(key), "Decide on {scope}?")


def describe_exception_rule(
    key: str, *, disagreement_threshold: float | None = None, disagreement_min_units: float | None = None,
    ts_limit: float, change_threshold_pct: float, band_ratio_threshold: float, band_months: int,
    quantity_unit: str = "units", due_date: str | None = None, amplification_multiple: float | None = None,
    amplification_moving_average_months: int | None = None,
) -> str:
    """The rule of an exception kind with its thresholds as numbers, e.g. "|tracking signal| above 4".

    ``amplification_multiple`` is the limit as a multiple of the Chen et al.
    bound and ``amplification_moving_average_months`` the moving average that
    bound is for; without them the rule says the run did not record them.
    """
    if disagreement_threshold is None:
        disagreement = "above the run's threshold, which the run did not record"
    else:
        disagreement = f"above {format_percent_plain(100 * disagreement_threshold)} of the consensus in a month"
    min_units = ("" if not disagreement_min_units
                 else f", and at least {disagreement_min_units:,.0f} {quantity_unit}")
    if amplification_multiple is None:
        amplification_limit = "a multiple, which the run did not record, of"
    else:
        amplification_limit = f"{format_number(amplification_multiple, digits=2)} times"
    return exception_kind(key).rule.format(
        disagreement=disagreement, min_units=min_units, ts_limit=format_number(ts_limit),
        change_pct=format_percent_plain(change_threshold_pct), band_pct=format_percent_plain(100 * band_ratio_threshold),
        band_months=int(band_months), due=f" by its due date, {due_date}" if due_date else "",
        amplification_limit=amplification_limit,
        amplification_months=("p" if amplification_moving_average_months is None
                              else int(amplification_moving_average_months)),
    )


def describe_count(n: int, key: str) -> str:
    """A count with the unit of its exception kind: "1 item", "41 items", "0 sources"."""
    one, many = exception_kind(key).counts
    return f"{int(n):,} {one if int(n) == 1 else many}"


#: How the statistical forecast classes a history (Syntetos, Boylan & Croston 2005).
DEMAND_PATTERNS: tuple[Term, ...] = (
    Term("smooth", "smooth", "regular demand of steady size"),
    Term("erratic", "erratic", "regular demand of very uneven size"),
    Term("intermittent", "intermittent", "demand in few months, of steady size"),
    Term("lumpy", "lumpy", "demand in few months, of very uneven size"),
    Term("no_demand", "no demand", "no demand at all in the history"),
    Term("unknown", "not classed", "series the statistical forecast did not class this cycle"),
)
PATTERN_REFERENCE = "Syntetos, Boylan & Croston (2005)"

#: How the accuracy-by-pattern page groups the patterns: regular demand apart from slow and lumpy demand.
PATTERN_GROUPS: tuple[Term, ...] = (
    Term("regular", "Regular demand", "demand in most months, of steady or uneven size"),
    Term("sparse", "Slow and lumpy demand", "demand in few months, where a WAPE above 100% is usual"),
    Term("other", "Other series", "no demand in the history, or not classed"),
)
#: The group of each demand pattern (patterns not listed fall in "other").
PATTERN_GROUP_OF: dict[str, str] = {"smooth": "regular", "erratic": "regular", "intermittent": "sparse",
                                    "lumpy": "sparse"}

#: Where a DC stands on order amplification (methods.amplification), as its row on the pack says.
AMPLIFICATION_STATES: tuple[Term, ...] = (
    Term("out_of_line", "Out of line", "its orders vary more than the limit: more swing passed upstream than "
         "lead time and forecast updates explain"),
    Term("within_limit", "Within the limit", "above the bound, but within the limit"),
    Term("below_bound", "Below the bound", "less swing than a moving-average forecast would add at the least"),
    Term("not_measured", "Not measured", "no item has enough months of successive forecasts and known demand yet"),
    Term("no_ratio", "No ratio", "its customers' demand did not vary over the months measured"),
)

#: Methods of the statistical forecast; labels are names a planner can look up.
STATISTICAL_METHODS: tuple[Term, ...] = (
    Term("naive", "Naive", "every month ahead equals the last month's demand", "common practice"),
    Term("seasonal_naive", "Seasonal naive", "each month ahead equals the same month a year before",
         "Hyndman & Athanasopoulos, Forecasting: Principles and Practice"),
    Term("moving_average", "Moving average", "the mean of the last three months", "common practice"),
    Term("ses", "Simple exponential smoothing", "a level that follows demand, recent months counting most",
         "Brown 1959"),
    Term("croston", "Croston", "the size of demand and the interval between demands smoothed apart",
         "Croston 1972"),
    Term("sba", "Syntetos–Boylan approximation", "Croston's method with its bias corrected",
         "Syntetos & Boylan 2005"),
    Term("holt_damped", "Damped trend", "a level and a trend that flattens out", "Gardner & McKenzie 1985"),
    Term("holt", "Holt's linear trend", "a level and a straight-line trend", "Holt 1957"),
    Term("holt_winters_add", "Holt–Winters additive", "a level, a damped trend and a season of fixed size",
         "Winters 1960"),
    Term("holt_winters_mul", "Holt–Winters multiplicative",
         "a level, a damped trend and a season that grows and shrinks with the level", "Winters 1960"),
    Term("theta", "Theta", "simple exponential smoothing plus half the long-run trend line",
         "Assimakopoulos & Nikolopoulos 2000; Hyndman & Billah 2003"),
    Term("combination", "Combination of methods", "the average of several methods' forecasts",
         "Makridakis & Hibon 2000 (M3); Makridakis et al. 2020 (M4)"),
    Term("new_item_profile", "New-item profile",
         "too little history: the family's seasonal shape times the item's mean so far", ""),
    Term("zero_demand", "Zero", "no demand in the history, so none is forecast", ""),
)

#: How the consensus weighs the sources (methods.weights.SCHEMES).
WEIGHT_SCHEMES: tuple[Term, ...] = (
    Term("equal", "Equal weights", "every source counts the same", "Stock & Watson 2004"),
    Term("inverse_mad", "Inverse mean absolute error", "weight ∝ 1 / MAD of past errors", "common practice"),
    Term("inverse_mse", "Inverse mean squared error", "weight ∝ 1 / MSE of past errors", "Bates & Granger 1969"),
    Term("discounted_mse", "Discounted inverse mean squared error",
         "weight ∝ 1 / MSE of past errors, recent cycles counting more", "Bates & Granger 1969"),
    Term("best", "Best source only", "all weight on the source with the lowest past MSE", "common practice"),
    Term("shrunk_mse", "Inverse mean squared error, pulled toward equal",
         "weight ∝ 1 / MSE of past errors, then pulled toward equal weights the less history there is: "
         "w = ψ·measured + (1 − ψ)·equal, ψ = n / (n + κ) for n cycles of history",
         "Bates & Granger 1969; Stock & Watson 2004 on why equal weights are hard to beat"),
)

#: Where a weight's history came from (the ``basis`` of a weight row).
WEIGHT_BASES: tuple[Term, ...] = (
    Term("segment", "Own history", "measured on this segment's own past errors"),
    Term("all", "All pooled", "too little history of its own: measured on all segments together"),
    Term("equal", "Equal", "too little history even pooled: equal weights"),
)

#: What a segment of weights is (methods.weights.SEGMENTS).
WEIGHT_SEGMENTS: tuple[Term, ...] = (
    Term("family", "family"), Term("item", "item"), Term("region", "region"), Term("all", "whole plan"),
)

#: How figures at every level are made to add up (methods.reconcile.METHODS).
RECONCILIATION_METHODS: tuple[Term, ...] = (
    Term("bottom_up", "Bottom-up", "the plan is made at item × location × month and every total is the sum of "
         "its cells", "common practice"),
    Term("top_down_hist_avg", "Top-down, average of historical shares",
         "the total is split by each cell's average share of past totals", "Gross & Sohl 1990"),
    Term("top_down_prop_avg", "Top-down, share of historical averages",
         "the total is split by each cell's share of the average past total", "Gross & Sohl 1990"),
    Term("ols", "Least-squares reconciliation", "forecasts at every level adjusted as little as possible, "
         "all levels counting the same", "Wickramasuriya, Athanasopoulos & Hyndman 2019"),
    Term("wls_struct", "Weighted least squares, by size of level",
         "levels with more cells below them count more", "Wickramasuriya, Athanasopoulos & Hyndman 2019"),
    Term("wls_var", "Weighted least squares, by error variance",
         "levels that forecast better count more", "Wickramasuriya, Athanasopoulos & Hyndman 2019"),
    Term("mint_shrink", "Minimum trace (MinT), shrunk covariance",
         "levels weighed by how their errors vary and move together",
         "Wickramasuriya, Athanasopoulos & Hyndman 2019"),
)

#: How the bands around every number are made (methods.intervals).
BAND_METHODS: tuple[Term, ...] = (
    Term("empirical", "Past errors at the same lag", "the band is read off the spread of past forecast errors "
         "at the same lag, scaled to the forecast", "Williams & Goodman 1971"),
    Term("normal_mad", "Normal approximation from the mean absolute error",
         "with too few past errors, σ ≈ 1.25 × MAD and the normal distribution's quantiles", "Brown 1959"),
)

#: Kinds of meeting decision (workflow.decisions.KINDS) and how each reads.
DECISION_KINDS: tuple[Term, ...] = (
    Term("set", "Set to", "the scope's total becomes the amount"),
    Term("delta", "Changed by", "the amount is added to the scope's total"),
    Term("pct", "Changed by a percentage", "the scope's total moves by the amount in percent"),
)

#: Accuracy measures and the words the pack uses for them.
MEASURES: tuple[Term, ...] = (
    Term("wape", "WAPE", "sum of absolute errors divided by sum of actuals, in %", "common practice"),
    Term("mape", "MAPE", "average of absolute errors as % of each actual; months with zero actual left out",
         "common practice"),
    Term("mad", "MAD", "mean absolute error", "common practice"),
    Term("mse", "MSE", "mean squared error", "common practice"),
    Term("rmse", "RMSE", "square root of the mean squared error, in the quantity unit", "common practice"),
    Term("bias", "Bias", "sum of errors (actual minus forecast) as % of actuals: negative means the source "
         "forecast too high, positive too low", "common practice"),
    Term("bias_pct", "Bias %", "bias as a share of actual demand", "common practice"),
    Term("tracking_signal", "Tracking signal", "cumulative error divided by the mean absolute error",
         "Brown 1959"),
    Term("mase", "MASE", "mean absolute error scaled by that of same-month-last-year", "Hyndman & Koehler 2006"),
    Term("variance_ratio", "Variance ratio", "how many times as much the orders a DC passes upstream vary as the "
         "customer demand it serves: Var(orders) ÷ Var(demand)", "Lee, Padmanabhan & Whang 1997"),
    Term("amplification_bound", "Bound", "the least variance ratio a p-month moving-average forecast gives at "
         "lead time L: 1 + 2L/p + 2L²/p²", "Chen, Drezner, Ryan & Simchi-Levi 2000"),
    Term("amplification_limit", "Limit", "the variance ratio above which a DC is out of line: a multiple of its "
         "bound that leaves room for the sampling noise of a ratio of two variances (the tool's choice, not a "
         "published value)"),
    Term("n", "Forecasts scored", "how many past forecasts have been compared with actual demand"),
    Term("n_zero_actual", "Months with zero actual", "left out of MAPE, which cannot divide by zero"),
    Term("winkler", "Winkler score", "band width plus a penalty for each actual outside it; lower is better",
         "Winkler 1972"),
)


# --------------------------------------------------------------------------- phrases


def describe_change(kind: str, amount: float, *, unit: str = "") -> str:
    """A meeting decision in words: "set to 240", "raised by 15", "lowered by 8%".

    A set gives the scope a new total, so it is never written with a sign;
    delta and percent decisions move the total up or down by the amount.
    """
    kind = str(kind)
    amount = float(amount)
    suffix = f" {unit}" if unit else ""
    if kind == "set":
        return f"set to {format_number(amount, digits=0)}{suffix}"
    if kind not in ("delta", "pct"):
        return f"{_humanise(kind)} {format_number(amount)}{suffix}"
    if amount == 0:
        return "left unchanged"
    verb = "raised" if amount > 0 else "lowered"
    size = f"{format_number(abs(amount))}%" if kind == "pct" else f"{format_number(abs(amount), digits=0)}{suffix}"
    return f"{verb} by {size}"


def describe_days_late(days: int | float | None) -> str:
    """How late something arrived or still is: "on time", "1 day late", "3 days late"."""
    try:
        value = float(days)
    except (TypeError, ValueError):  # None, or pandas' NA for "no due date"
        return "on time"
    if not math.isfinite(value):
        return "on time"
    whole = int(math.ceil(value))
    if whole <= 0:
        return "on time"
    return f"{whole} day late" if whole == 1 else f"{whole} days late"


def describe_submission_state(state: str, *, days_late: int | float | None = None) -> str:
    """A submission's state in words, with how late it is when a due date makes that known.

    A file in force 2 days after its due date reads "Received 2 days late";
    a missing one 3 days past its due date reads "Missing, 3 days late";
    without a due date only the state is printed ("Received", "Missing").
    """
    late = describe_days_late(days_late)
    if state in ("received", "partly_received"):
        return f"{label(SUBMISSION_STATES, state)} {late}" if late != "on time" else label(SUBMISSION_STATES, state)
    if state == "not_received" and late != "on time":
        return f"Missing, {late}"
    return label(SUBMISSION_STATES, state)


def describe_scope(scope) -> str:
    """A submission or decision scope as printed: "all" → "All", "region NORTH" → "Region NORTH"."""
    text = str(scope).strip()
    if text.lower() in ("all", "*", ""):
        return "All"
    return text[:1].upper() + text[1:]


def format_percent_plain(value: float) -> str:
    """A threshold in percent without trailing zeros: 25 → "25%", 12.5 → "12.5%"."""
    return f"{format_number(value)}%"


def format_number(value: float, *, digits: int = 1) -> str:
    """A number with thousands separators, ``digits`` decimals at most, no trailing zeros."""
    value = float(value)
    text = f"{value:,.{digits}f}" if digits else f"{value:,.0f}"
    if "." in text:
        text = text.rstrip("0").rstrip(".")
    return text.replace("-", "\u2212")


# --------------------------------------------------------------------------- fill-in workbooks

#: Every reference line of a fill-in workbook starts with this word; a returned file's reader skips those lines.
REFERENCE_LINE_PREFIX = "Reference"

#: The lines of a fill-in workbook: the one the submitter fills in, and the references printed beside it.
TEMPLATE_LINES: tuple[Term, ...] = (
    Term("forecast", "Your forecast", "the line to fill in: units a month, 0 or more; a blank cell is no forecast"),
    Term("orders", "Reference: orders", "what customers ordered in each of the last 12 months"),
    Term("orders_last_year", "Reference: orders a year earlier", "what customers ordered in the same month a year "
         "before"),
    Term("last_consensus", "Reference: last consensus", "the plan of the previous cycle"),
    Term("statistical", "Reference: statistical forecast", "the tool's forecast from order history, with "
         "marketing's events"),
)


def describe_lag_bucket(bucket) -> str:
    """A lag bucket as a planner reads it: "1" → "1 month ahead", "2-3" → "2–3 months ahead", "7+" → "7 or more months ahead"."""
    text = str(bucket).strip()
    if text.endswith("+"):
        return f"{text[:-1]} or more months ahead"
    if "-" in text:
        first, last = text.split("-", 1)
        return f"{first}\u2013{last} months ahead"
    return "1 month ahead" if text == "1" else f"{text} months ahead"
