"""Everything the meeting pack shows, as one plain object, and a synthetic example of it.

The store side gathers a :class:`PackInputs` for a cycle; the pack side turns it
into HTML and PDF without touching the store again.  :func:`example_pack_inputs`
builds an invented, seeded scenario of any size for tests and the benchmark.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime

import numpy as np
import pandas as pd

from consensus.errors import InvalidSpec
from consensus.vocabulary import describe_change
from consensus.periods import (
    DEFAULT_LAG_BUCKETS,
    horizon_months,
    lag_bucket_labels,
    month_index,
    month_names,
    shift_month,
)

STATUSES = ("draft", "published")

#: Columns each frame of PackInputs must carry (frames may be empty).
FRAME_COLUMNS: dict[str, tuple[str, ...]] = {
    "submissions": ("source", "scope", "filename", "sha256", "submitted_by", "submitted_at", "status", "rows"),
    "missing": ("source", "scope"),
    "items": ("item", "family", "unit_price"),
    "locations": ("location", "region"),
    "actuals": ("item", "location", "period", "quantity"),
    "sources": ("source", "item", "location", "period", "quantity"),
    "consensus": ("item", "location", "period", "lag", "consensus", "lower_80", "upper_80", "lower_95", "upper_95"),
    "previous": ("item", "location", "period", "consensus"),
    "weights": ("segment", "lag_bucket", "source", "weight", "psi", "n_cycles", "mse", "basis", "note"),
    "scorecard": (
        "source", "level", "lag_bucket", "n", "n_zero_actual", "mad", "mse", "rmse", "mape", "wape",
        "bias", "bias_pct", "tracking_signal", "ts_flag", "mase",
    ),
    "scorecard_history": ("source", "cycle", "wape", "bias_pct"),
    "disagreement": ("item", "location", "period", "family", "spread", "spread_ratio", "flagged"),
    "fva": ("step", "wape", "n"),
    "decisions": ("at", "author", "scope", "period", "change", "reason"),
    "components": ("component", "period", "quantity"),
    "band_coverage": ("level", "nominal", "coverage", "winkler"),
    "level_bands": ("level", "node", "period", "lower_80", "upper_80", "lower_95", "upper_95"),
    # One row per item × location of the statistical forecast; holdout_wape is a fraction (0.12 = 12%),
    # fallback is "" when a fitted method was used.
    "series": ("item", "location", "pattern", "method", "holdout_wape", "fallback"),
    # One row per DC, as consensus.methods.amplification.measure_amplification gives it (ratio NaN when not
    # measured; limit = the flag multiple × bound; explanation one plain sentence).
    "amplification": ("location", "n_series", "n_months", "ratio", "moving_average_months", "lead_time_months",
                      "bound", "limit", "flagged", "explanation"),
    # Accuracy by demand pattern pooled over every lag, as consensus.methods.scoring stores it (a lag_bucket
    # column, when present, is kept to its "all" rows); wape and bias_pct in %, mase a ratio.
    "accuracy_patterns": ("pattern", "source", "n", "wape", "mase", "bias_pct"),
    # The run's persistent-bias corrections (consensus.methods.bias.BIAS_COLUMNS): a source's numbers are
    # multiplied by factor, per segment and lag bucket, before they are weighed.
    "bias": ("segment", "lag_bucket", "source", "persistent", "factor"),
}


@dataclass(frozen=True)
class PackInputs:
    """The inputs of one cycle's meeting pack; frames may be empty but always carry their columns."""

    company: str
    cycle: str
    status: str
    generated_at: datetime
    horizon: int
    last_actual_month: str
    submissions: pd.DataFrame
    missing: pd.DataFrame
    items: pd.DataFrame
    locations: pd.DataFrame
    actuals: pd.DataFrame
    sources: pd.DataFrame
    consensus: pd.DataFrame
    previous: pd.DataFrame
    weights: pd.DataFrame
    scorecard: pd.DataFrame
    scorecard_history: pd.DataFrame
    disagreement: pd.DataFrame
    fva: pd.DataFrame
    decisions: pd.DataFrame
    components: pd.DataFrame
    method_notes: dict[str, str] = field(default_factory=dict)
    band_coverage: pd.DataFrame = field(default_factory=lambda: empty_frame("band_coverage"))
    # Family and total bands as the run stored them, from those levels' own errors (node: family, or "all").
    level_bands: pd.DataFrame = field(default_factory=lambda: empty_frame("level_bands"))
    series: pd.DataFrame = field(default_factory=lambda: empty_frame("series"))
    amplification: pd.DataFrame = field(default_factory=lambda: empty_frame("amplification"))
    accuracy_patterns: pd.DataFrame = field(default_factory=lambda: empty_frame("accuracy_patterns"))
    bias: pd.DataFrame = field(default_factory=lambda: empty_frame("bias"))
    # Months of implied orders an item × DC needed before it counted for amplification (None: not recorded).
    amplification_min_months: int | None = None
    # Labels only: the pack never converts units or currencies.
    quantity_unit: str = "units"
    currency: str = "EUR"
    # The run's settings the methods and exceptions pages name (raw keys of consensus.vocabulary; None: not
    # recorded, and the pages say so instead of guessing).
    weight_scheme: str | None = None  # methods.weights.SCHEMES
    weight_segment: str | None = None  # methods.weights.SEGMENTS
    weight_window_cycles: int | None = None
    reconciliation_method: str | None = None  # methods.reconcile.METHODS
    disagreement_threshold: float | None = None  # spread / consensus above which a cell is flagged
    disagreement_min_units: float | None = None
    # Level (consensus.vocabulary.LEVELS) at which scorecard_history's WAPE and bias are measured.
    scorecard_history_level: str = "item"
    # When submissions were due (None: no due date recorded, and the pack promises no lateness check).
    due_date: str | None = None
    # Which revision of the cycle this pack shows, and for a reopened cycle who reopened it and why.
    revision: int = 1
    reopened_by: str | None = None
    reopen_reason: str | None = None
    published_by: str | None = None
    published_at: datetime | None = None
    # Where the plan came from: the run, the journal position it read and the journal's chain value then,
    # so a printed pack can be matched against the store ('consensus verify').
    run_id: int | None = None
    record_fingerprint: str | None = None

    def __post_init__(self) -> None:
        if self.status not in STATUSES:
            raise InvalidSpec(f"status must be one of {STATUSES}, got {self.status!r}")
        month_index(self.cycle)
        month_index(self.last_actual_month)
        if int(self.horizon) < 1:
            raise InvalidSpec(f"horizon must be at least 1 month, got {self.horizon!r}")
        for name, columns in FRAME_COLUMNS.items():
            frame = getattr(self, name)
            if not isinstance(frame, pd.DataFrame):
                raise InvalidSpec(f"PackInputs.{name} must be a DataFrame, got {type(frame).__name__}")
            absent = [c for c in columns if c not in frame.columns]
            if absent:
                raise InvalidSpec(f"PackInputs.{name} lacks column(s) {absent}")


def empty_frame(name: str) -> pd.DataFrame:
    """An empty frame with the columns PackInputs expects for ``name``."""
    return pd.DataFrame({column: pd.Series(dtype=object) for column in FRAME_COLUMNS[name]})


# --------------------------------------------------------------------------- synthetic scenario

_FAMILY_WORDS = (
    "Cookware", "Bakeware", "Storage", "Cutlery", "Textiles", "Glassware", "Lighting", "Hand tools",
    "Garden", "Cleaning", "Tableware", "Small appliances",
)
_LOCATIONS = (("DC-N1", "North"), ("DC-N2", "North"), ("DC-S1", "South"), ("DC-S2", "South"), ("DC-W1", "West"))
_SOURCES = ("sales", "marketing", "dc", "statistical")
# Per-source systematic bias and noise (fraction of the true level) of the invented scenario.
_SOURCE_BIAS = {"sales": 0.08, "marketing": 0.15, "dc": -0.03, "statistical": 0.0}
_SOURCE_NOISE = {"sales": 0.12, "marketing": 0.22, "dc": 0.10, "statistical": 0.09}


def _family_names(n_families: int) -> list[str]:
    names = []
    for i in range(n_families):
        word = _FAMILY_WORDS[i % len(_FAMILY_WORDS)]
        round_ = i // len(_FAMILY_WORDS)
        names.append(word if round_ == 0 else f"{word} {round_ + 1}")
    return names


def example_pack_inputs(
    n_families: int = 4,
    n_items: int = 24,
    seed: int = 7,
    *,
    cycle: str = "2027-03",
    horizon: int = 18,
    history_months: int = 36,
    status: str = "draft",
) -> PackInputs:
    """A seeded, invented scenario of ``n_families`` families and ``n_items`` items for tests and bench.

    Demand per item × location is level × (1 + 0.25·sin seasonality) with gamma noise;
    each source is the true future scaled by its own bias and noise; the consensus is
    the weight-blended sources with bands widening as √lag.  Names are made up.
    """
    if n_families < 1 or n_items < n_families:
        raise InvalidSpec("need at least one family and at least one item per family")
    rng = np.random.default_rng(seed)
    families = _family_names(n_families)
    items = pd.DataFrame(
        {
            "item": [f"ITM-{i + 1:05d}" for i in range(n_items)],
            "family": [families[i % n_families] for i in range(n_items)],
            "unit_price": np.round(rng.lognormal(mean=2.8, sigma=0.7, size=n_items), 2),
        }
    )
    locations = pd.DataFrame(_LOCATIONS, columns=["location", "region"])

    # Each item is stocked at 2–4 locations.
    n_locs = rng.integers(2, 5, size=n_items)
    loc_order = np.argsort(rng.random((n_items, len(_LOCATIONS))), axis=1)
    cell_item = np.repeat(np.arange(n_items), n_locs)
    cell_rank = np.concatenate([np.arange(k) for k in n_locs])
    cell_loc = loc_order[cell_item, cell_rank]
    n_cells = len(cell_item)
    level = rng.lognormal(mean=4.0, sigma=0.9, size=n_cells)
    phase = rng.uniform(0, 2 * np.pi, size=n_families)[cell_item % n_families]

    cycle_idx = month_index(cycle)
    hist_idx = np.arange(cycle_idx - history_months + 1, cycle_idx + 1)
    plan_idx = np.arange(cycle_idx + 1, cycle_idx + horizon + 1)
    trend = rng.normal(0.004, 0.006, size=n_cells)

    def expected(month_idx: np.ndarray) -> np.ndarray:
        steps = month_idx[None, :] - cycle_idx
        season = 1 + 0.25 * np.sin(2 * np.pi * month_idx[None, :] / 12 + phase[:, None])
        return level[:, None] * season * (1 + trend[:, None]) ** steps

    hist_mean = expected(hist_idx)
    hist_qty = rng.gamma(shape=8.0, scale=hist_mean / 8.0)
    item_codes = items["item"].to_numpy()
    loc_codes = locations["location"].to_numpy()

    def long_frame(values: np.ndarray, month_idx: np.ndarray, column: str) -> pd.DataFrame:
        n_months = len(month_idx)
        return pd.DataFrame(
            {
                "item": np.repeat(item_codes[cell_item], n_months),
                "location": np.repeat(loc_codes[cell_loc], n_months),
                "period": np.tile(month_names(month_idx), n_cells),
                column: np.round(values.ravel(), 0),
            }
        )

    actuals = long_frame(hist_qty, hist_idx, "quantity")

    plan_mean = expected(plan_idx)
    missing_dc = "DC-W1"
    source_frames, source_values = [], {}
    for source in _SOURCES:
        noise = rng.normal(0, _SOURCE_NOISE[source], size=plan_mean.shape)
        values = np.maximum(plan_mean * (1 + _SOURCE_BIAS[source] + noise), 0)
        source_values[source] = values
        frame = long_frame(values, plan_idx, "quantity")
        frame.insert(0, "source", source)
        if source == "dc":
            frame = frame[frame["location"] != missing_dc]
        source_frames.append(frame)
    sources = pd.concat(source_frames, ignore_index=True)

    # Weights per family × lag bucket: inverse of each source's error variance, shrunk.
    bucket_of_lag = lag_bucket_labels(np.arange(1, horizon + 1))
    bucket_labels = [label for label, _, _ in DEFAULT_LAG_BUCKETS if label in set(bucket_of_lag)]
    inv_mse = np.array([1 / (_SOURCE_NOISE[s] ** 2 + _SOURCE_BIAS[s] ** 2) for s in _SOURCES])
    weight_rows = []
    for segment in ["all", *families]:
        jitter = rng.uniform(0.8, 1.25, size=(len(bucket_labels), len(_SOURCES)))
        raw = inv_mse[None, :] * jitter
        # ψ is the share on the measured weights, w = ψ·measured + (1 − ψ)·equal, as methods.weights has it.
        psi = 1 - rng.uniform(0.1, 0.4)
        shrunk = psi * raw / raw.sum(axis=1, keepdims=True) + (1 - psi) / len(_SOURCES)
        n_cycles = int(rng.integers(6, 25))
        # Few cycles of its own: the segment's weights come from all segments pooled (basis "all").
        basis = "segment" if n_cycles >= 8 else "all"
        for b, bucket in enumerate(bucket_labels):
            for s, source in enumerate(_SOURCES):
                weight_rows.append(
                    {
                        "segment": segment, "lag_bucket": bucket, "source": source,
                        "weight": round(float(shrunk[b, s]), 4), "psi": round(psi, 3), "n_cycles": n_cycles,
                        "mse": round(float(1 / (inv_mse[s] * jitter[b, s])), 5), "basis": basis,
                        "note": f"inverse-MSE weights shrunk toward equal with psi = {psi:.2f} from {n_cycles} cycles",
                    }
                )
    weights = pd.DataFrame(weight_rows)
    # The blend uses the "all" segment so the example stays simple; family rows document the scheme.
    all_w = weights[weights["segment"] == "all"].pivot(index="lag_bucket", columns="source", values="weight")
    w_by_lag = all_w.loc[bucket_of_lag, list(_SOURCES)].to_numpy()  # horizon × sources
    has_dc = (loc_codes[cell_loc] != missing_dc)[:, None, None]
    stack = np.stack([source_values[s] for s in _SOURCES], axis=2)  # cells × horizon × sources
    w = np.broadcast_to(w_by_lag[None, :, :], stack.shape).copy()
    w[..., _SOURCES.index("dc")] *= has_dc[..., 0]
    w /= w.sum(axis=2, keepdims=True)
    blend = (stack * w).sum(axis=2)
    lag_arr = np.arange(1, horizon + 1)
    # A few cells are much less predictable, so their bands are wide.
    spread_factor = np.where(rng.random(n_cells) < 0.06, 0.45, 0.12)
    sigma = blend * spread_factor[:, None] * np.sqrt(lag_arr)[None, :]
    consensus = long_frame(blend, plan_idx, "consensus")
    consensus.insert(3, "lag", np.tile(lag_arr, n_cells))
    for name, z in (("80", 1.2816), ("95", 1.96)):
        consensus[f"lower_{name}"] = np.round(np.maximum(blend - z * sigma, 0).ravel(), 0)
        consensus[f"upper_{name}"] = np.round((blend + z * sigma).ravel(), 0)

    # Last cycle's plan covered cycle … cycle+horizon−1; a few cells move a lot.
    prev_idx = np.arange(cycle_idx, cycle_idx + horizon)
    prev_mean = expected(prev_idx)
    shock = np.where(rng.random(n_cells) < 0.05, rng.uniform(0.55, 1.6, n_cells), 1.0)
    prev_values = prev_mean * shock[:, None] * (1 + rng.normal(0, 0.05, size=prev_mean.shape))
    previous = long_frame(prev_values, prev_idx, "consensus")

    spread = stack.max(axis=2) - stack.min(axis=2)
    ratio = spread / np.maximum(blend, 1e-9)
    disagreement = long_frame(spread, plan_idx, "spread")
    disagreement["spread_ratio"] = np.round(ratio.ravel(), 3)
    disagreement["flagged"] = disagreement["spread_ratio"] > 0.6
    disagreement = disagreement[disagreement["flagged"]].merge(items[["item", "family"]], on="item")
    disagreement = disagreement[["item", "location", "period", "family", "spread", "spread_ratio", "flagged"]]

    scorecard = _example_scorecard(rng, bucket_labels)
    cycles_back = [shift_month(cycle, -k) for k in range(11, -1, -1)]
    scorecard_history = pd.DataFrame(
        [
            {
                "source": s, "cycle": c,
                "wape": round(100 * (_SOURCE_NOISE[s] * 1.6 + abs(_SOURCE_BIAS[s]) * 0.6) * rng.uniform(0.85, 1.15), 1),
                "bias_pct": round(100 * _SOURCE_BIAS[s] * rng.uniform(0.6, 1.4), 1),
            }
            for s in _SOURCES
            for c in cycles_back
        ]
    )
    # What the store scores besides the sources: the consensus and the seasonal-naive yardstick, and the
    # family × region level.  Drawn from a generator of their own, so the scenario above stays as it was.
    extra_card, extra_history = _example_yardsticks(np.random.default_rng(seed + 1), bucket_labels, cycles_back)
    scorecard = pd.concat([scorecard, extra_card], ignore_index=True)
    scorecard_history = pd.concat([scorecard_history, extra_history], ignore_index=True)
    # One step per source key, as the value-added page names and orders them (consensus.vocabulary).
    fva = pd.DataFrame(
        {
            "step": ["naive", "statistical_base", "statistical", "sales", "marketing", "dc", "consensus"],
            "wape": [31.5, 23.4, 22.8, 21.9, 23.1, 20.7, 19.4],
            "n": [n_cells * 12] * 7,
        }
    )
    generated_at = datetime(2027, 4, 6, 9, 30)
    decisions = pd.DataFrame(
        {
            "at": [datetime(2027, 4, 3, 14, 5), datetime(2027, 4, 4, 10, 40), datetime(2027, 4, 5, 16, 20)],
            "author": ["R. Okafor (demand planning)", "L. Brandt (sales, North)", "M. Ruiz (marketing)"],
            "scope": [item_codes[0], families[0], "all"],
            "period": [shift_month(cycle, 2), shift_month(cycle, 4), shift_month(cycle, 6)],
            # As the store records them: a kind and an amount, worded by consensus.vocabulary.describe_change.
            "kind": ["pct", "set", "pct"],
            "amount": [15.0, 1200.0, -8.0],
            "reason": [
                "Confirmed tender for a hotel refit; delivery booked for that month.",
                "Range review moves two listings forward by a month.",
                "Autumn campaign postponed; uplift taken out until a new date is set.",
            ],
        }
    )
    decisions.insert(4, "change", [describe_change(k, a) for k, a in zip(decisions["kind"], decisions["amount"])])
    components = _example_components(rng, consensus, items, n_families)
    n_sub = {s: int((sources["source"] == s).sum()) for s in _SOURCES}
    submissions = pd.DataFrame(
        [
            {"source": "sales", "scope": "all", "filename": f"sales_{cycle}.xlsx", "submitted_by": "L. Brandt",
             "submitted_at": datetime(2027, 4, 2, 17, 12), "status": "received", "rows": n_sub["sales"]},
            {"source": "marketing", "scope": "all", "filename": f"marketing_{cycle}.csv", "submitted_by": "M. Ruiz",
             "submitted_at": datetime(2027, 4, 4, 8, 55), "status": "received", "rows": n_sub["marketing"]},
            {"source": "dc", "scope": "North", "filename": f"dc_north_{cycle}.xlsx", "submitted_by": "P. Nowak",
             "submitted_at": datetime(2027, 4, 1, 11, 3), "status": "received", "rows": n_sub["dc"] // 2},
            {"source": "dc", "scope": "South", "filename": f"dc_south_{cycle}.xlsx", "submitted_by": "A. Haddad",
             "submitted_at": datetime(2027, 4, 2, 9, 47), "status": "received", "rows": n_sub["dc"] - n_sub["dc"] // 2},
        ]
    )
    submissions.insert(3, "sha256", [f"{rng.integers(0, 2**63):016x}" * 4 for _ in range(len(submissions))])
    missing = pd.DataFrame({"source": ["dc"], "scope": [missing_dc]})
    method_notes = {
        "Weights": (
            "Each source is weighted by how accurate it has been, measured separately for each family and "
            "lag bucket: weight ∝ 1 / mean squared error over past cycles (Bates–Granger), then pulled toward "
            "equal weights by the shrinkage ψ when few cycles are available."
        ),
        "Bands": (
            "The 80% and 95% bands come from the spread of past forecast errors at the same lag, widening "
            "with the horizon. Family and total bands come from the past errors of family and total plans "
            "themselves, so items that miss together widen them."
        ),
        "Reconciliation": "Item, family and total figures add up: family numbers are sums of their items.",
    }
    band_coverage = pd.DataFrame(
        {"level": ["item", "item", "family", "family"], "nominal": [0.8, 0.95, 0.8, 0.95],
         "coverage": [0.77, 0.93, 0.82, 0.96], "winkler": [41.2, 63.5, 388.0, 602.1]}
    )
    series = _example_series(rng, item_codes[cell_item], loc_codes[cell_loc], hist_qty, items, cycle_idx)
    # Generators of their own, so the scenario above stays as it was.
    amplification = example_amplification(np.random.default_rng(seed + 2), cycle=cycle,
                                           locations=list(loc_codes), not_measured=missing_dc)
    accuracy_patterns = _example_pattern_accuracy(np.random.default_rng(seed + 3), series)
    return PackInputs(
        company="Demo Kitchenware Co. (invented example)", cycle=cycle, status=status,
        generated_at=generated_at, horizon=horizon, last_actual_month=cycle,
        submissions=submissions, missing=missing, items=items, locations=locations, actuals=actuals,
        sources=sources, consensus=consensus, previous=previous, weights=weights, scorecard=scorecard,
        scorecard_history=scorecard_history, disagreement=disagreement.reset_index(drop=True), fva=fva,
        decisions=decisions, components=components, method_notes=method_notes, band_coverage=band_coverage,
        level_bands=_example_level_bands(consensus, items),
        series=series, weight_scheme="shrunk_mse", weight_segment="family", weight_window_cycles=12,
        reconciliation_method="bottom_up", disagreement_threshold=0.6, disagreement_min_units=0.0,
        amplification=amplification, accuracy_patterns=accuracy_patterns,
        amplification_min_months=EXAMPLE_AMPLIFICATION_MIN_MONTHS,
    )


#: How each invented DC forecasts its next month: the mean of its last p months of demand, plus noise of this
#: share of demand's standard deviation.  A p-month moving average with a 1-month lead time gives the variance
#: ratio 1 + 2/p + 2/p² (Chen, Drezner, Ryan & Simchi-Levi 2000), so 12 months sits near the 12-month bound,
#: 6 months within the limit (1.5 × that bound) and 3 months (ratio ≈ 1.89) beyond it.
_EXAMPLE_DC_FORECASTERS = ((12, 0.0), (6, 0.0), (3, 0.0), (12, 0.45), (12, 0.0))
EXAMPLE_AMPLIFICATION_MIN_MONTHS = 6


def example_amplification(
    rng: np.random.Generator, *, cycle: str, locations: list[str], not_measured: str | None = None,
    n_items: int = 30, n_months: int = 36, forecasters=_EXAMPLE_DC_FORECASTERS,
    min_months: int = EXAMPLE_AMPLIFICATION_MIN_MONTHS,
) -> pd.DataFrame:
    """Order amplification of invented DCs, measured by :func:`consensus.methods.amplification.measure_amplification`.

    Each DC serves ``n_items`` items of independent demand and each cycle
    forecasts the next month with a moving average of its own (``forecasters``,
    one (p, noise) per location, cycled); the DC ``not_measured`` has only
    four cycles of forecasts, too few for ``min_months``.
    """
    from consensus.methods.amplification import measure_amplification

    cycle_idx = month_index(cycle)
    first = cycle_idx - n_months + 1
    longest = max(p for p, _ in forecasters)
    months = np.arange(first - longest, cycle_idx + 1)  # demand back far enough for the first forecasts
    forecast_rows, actual_rows = [], []
    for position, location in enumerate(locations):
        p, noise = forecasters[position % len(forecasters)]
        mean = rng.uniform(40, 400, size=n_items)
        demand = rng.gamma(shape=6.0, scale=mean[:, None] / 6.0, size=(n_items, len(months)))
        window = np.lib.stride_tricks.sliding_window_view(demand, p, axis=1)  # window k ends at month k + p − 1
        moving = window.mean(axis=2)[:, longest - p:]  # aligned so column j ends at months[longest + j − 1]
        cycles = months[longest - 1:]
        forecast = moving + noise * demand.std(axis=1, keepdims=True) * rng.standard_normal(moving.shape)
        if location == not_measured:
            cycles, forecast = cycles[-4:], forecast[:, -4:]
        item_codes = np.asarray([f"AMP-{i + 1:03d}" for i in range(n_items)], dtype=object)
        forecast_rows.append(pd.DataFrame({
            "cycle": np.tile(month_names(cycles), n_items), "item": np.repeat(item_codes, len(cycles)),
            "location": location, "period": np.tile(month_names(cycles + 1), n_items),
            "quantity": np.maximum(forecast, 0.0).ravel(),
        }))
        actual_rows.append(pd.DataFrame({
            "item": np.repeat(item_codes, len(months)), "location": location,
            "period": np.tile(month_names(months), n_items), "quantity": demand.ravel(),
        }))
    return measure_amplification(pd.concat(forecast_rows, ignore_index=True),
                                 pd.concat(actual_rows, ignore_index=True), min_months=min_months)


#: Invented accuracy by pattern: (WAPE %, MASE) of the consensus, and each source's factor on both.
_EXAMPLE_PATTERN_ERRORS = {"smooth": (18.0, 0.82), "erratic": (41.0, 0.95), "intermittent": (132.0, 0.88),
                           "lumpy": (187.0, 1.04)}
_EXAMPLE_PATTERN_FACTORS = {"consensus": 1.0, "statistical": 1.04, "sales": 1.12, "marketing": 1.3, "dc": 1.08,
                            "naive": 1.2}


def _example_pattern_accuracy(rng: np.random.Generator, series: pd.DataFrame) -> pd.DataFrame:
    """Accuracy by demand pattern of the invented scenario, pooled over lags, for the patterns its series have.

    Slow and lumpy series get a WAPE above 100% and a MASE near 1, as such series usually do; forecasts of
    slow series run high (negative bias: actual minus forecast).
    """
    counts = series["pattern"].value_counts()
    rows = []
    for pattern, (wape, mase) in _EXAMPLE_PATTERN_ERRORS.items():
        if pattern not in counts.index:
            continue
        for source, factor in _EXAMPLE_PATTERN_FACTORS.items():
            jitter = rng.uniform(0.95, 1.05)
            lean = -25.0 if pattern in ("intermittent", "lumpy") else 100 * _SOURCE_BIAS.get(source, 0.0)
            rows.append({"pattern": pattern, "source": source, "lag_bucket": "all",
                         "n": int(counts[pattern]) * 12 * 6, "wape": round(wape * factor * jitter, 1),
                         "mase": round(mase * factor * jitter, 2),
                         "bias_pct": round(lean * rng.uniform(0.6, 1.4) if lean else rng.normal(0, 2), 1)})
    return pd.DataFrame(rows, columns=["pattern", "source", "lag_bucket", "n", "wape", "mase", "bias_pct"])


def _example_level_bands(consensus: pd.DataFrame, items: pd.DataFrame) -> pd.DataFrame:
    """Family bands of the example: the items' distances to the consensus added up (items missing together)."""
    frame = consensus.merge(items[["item", "family"]], on="item")
    out = {"consensus": frame.groupby(["family", "period"])["consensus"].sum()}
    for key in ("80", "95"):
        out[f"lower_{key}"] = out["consensus"] - (frame["consensus"] - frame[f"lower_{key}"]).groupby(
            [frame["family"], frame["period"]]).sum()
        out[f"upper_{key}"] = out["consensus"] + (frame[f"upper_{key}"] - frame["consensus"]).groupby(
            [frame["family"], frame["period"]]).sum()
    table = pd.DataFrame(out).reset_index().rename(columns={"family": "node"}).assign(level="family")
    return table[list(FRAME_COLUMNS["level_bands"])]


def _example_scorecard(rng: np.random.Generator, bucket_labels: list[str]) -> pd.DataFrame:
    rows = []
    level_factor = {"item": 1.45, "family": 0.85, "total": 0.55}
    for source in _SOURCES:
        for level, factor in level_factor.items():
            for b, bucket in enumerate(bucket_labels):
                wape = 100 * (_SOURCE_NOISE[source] * 1.6 + abs(_SOURCE_BIAS[source]) * 0.6) * factor * (1 + 0.18 * b)
                bias_pct = 100 * _SOURCE_BIAS[source] * rng.uniform(0.7, 1.3)
                # Marketing's persistent optimism pushes its tracking signal beyond ±4.
                ts = float(rng.normal(0, 1.3)) + (5.2 if source == "marketing" else 0.0)
                rows.append(
                    {
                        "source": source, "level": level, "lag_bucket": bucket,
                        "n": int(rng.integers(200, 900)), "n_zero_actual": int(rng.integers(0, 12)),
                        "mad": round(wape * rng.uniform(0.6, 0.9), 1), "mse": round((wape * 1.3) ** 2, 1),
                        "rmse": round(wape * 1.3, 1), "mape": round(wape * rng.uniform(1.1, 1.5), 1),
                        "wape": round(wape, 1), "bias": round(bias_pct * 0.9, 1), "bias_pct": round(bias_pct, 1),
                        "tracking_signal": round(ts, 2), "ts_flag": abs(ts) > 4,
                        "mase": round(wape / 28.0 * rng.uniform(0.9, 1.1), 2),
                    }
                )
    return pd.DataFrame(rows)


#: Noise and bias (fraction of the level) of what the invented store scores besides the sources.
_YARDSTICK_NOISE = {"consensus": 0.08, "naive": 0.2}
_YARDSTICK_BIAS = {"consensus": 0.02, "naive": 0.0}


def _example_yardsticks(
    rng: np.random.Generator, bucket_labels: list[str], cycles: list[str]
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Scorecard rows of the consensus and seasonal naive at every level, and family × region rows of the sources.

    Tracking signals stay within ±3, so only marketing's optimism is flagged.
    """
    noise = {**_SOURCE_NOISE, **_YARDSTICK_NOISE}
    bias = {**_SOURCE_BIAS, **_YARDSTICK_BIAS}
    wanted = [(s, level) for s in _YARDSTICK_NOISE for level in ("item", "family_region", "family", "total")]
    wanted += [(s, "family_region") for s in _SOURCES]
    level_factor = {"item": 1.45, "family_region": 1.1, "family": 0.85, "total": 0.55}
    rows = []
    for source, level in wanted:
        for b, bucket in enumerate(bucket_labels):
            wape = 100 * (noise[source] * 1.6 + abs(bias[source]) * 0.6) * level_factor[level] * (1 + 0.18 * b)
            bias_pct = 100 * bias[source] * rng.uniform(0.7, 1.3)
            ts = float(np.clip(rng.normal(0, 1.0), -3, 3)) if source in _YARDSTICK_NOISE else float(
                rng.normal(0, 1.3)) + (5.2 if source == "marketing" else 0.0)
            rows.append({
                "source": source, "level": level, "lag_bucket": bucket,
                "n": int(rng.integers(200, 900)), "n_zero_actual": int(rng.integers(0, 12)),
                "mad": round(wape * rng.uniform(0.6, 0.9), 1), "mse": round((wape * 1.3) ** 2, 1),
                "rmse": round(wape * 1.3, 1), "mape": round(wape * rng.uniform(1.1, 1.5), 1),
                "wape": round(wape, 1), "bias": round(bias_pct * 0.9, 1), "bias_pct": round(bias_pct, 1),
                "tracking_signal": round(ts, 2), "ts_flag": abs(ts) > 4,
                "mase": round(wape / 28.0 * rng.uniform(0.9, 1.1), 2),
            })
    history = pd.DataFrame([
        {"source": s, "cycle": c,
         "wape": round(100 * (noise[s] * 1.6 + abs(bias[s]) * 0.6) * rng.uniform(0.85, 1.15), 1),
         "bias_pct": round(100 * bias[s] * rng.uniform(0.6, 1.4), 1)}
        for s in _YARDSTICK_NOISE for c in cycles
    ])
    return pd.DataFrame(rows), history


def _example_components(
    rng: np.random.Generator, consensus: pd.DataFrame, items: pd.DataFrame, n_families: int
) -> pd.DataFrame:
    n_components = max(6, min(3 * n_families, 300))
    per_family = 3
    fam_codes = pd.Categorical(items["family"]).codes
    usage = pd.DataFrame(
        {
            "family_code": np.repeat(np.arange(n_families), per_family),
            "component": [f"CMP-{c + 1:04d}" for c in rng.integers(0, n_components, size=n_families * per_family)],
            "qty_per": rng.integers(1, 5, size=n_families * per_family),
        }
    )
    demand = consensus[["item", "period", "consensus"]].merge(
        pd.DataFrame({"item": items["item"], "family_code": fam_codes}), on="item"
    )
    demand = demand.groupby(["family_code", "period"], as_index=False)["consensus"].sum()
    exploded = demand.merge(usage, on="family_code")
    exploded["quantity"] = exploded["consensus"] * exploded["qty_per"]
    return exploded.groupby(["component", "period"], as_index=False)["quantity"].sum().round({"quantity": 0})


# Methods the invented scenario picks per pattern, with how often (seasonal scenario: mostly Holt–Winters).
_EXAMPLE_METHODS = {
    "smooth": (("holt_winters_add", 0.55), ("holt_winters_mul", 0.2), ("holt_damped", 0.15), ("ses", 0.1)),
    "erratic": (("ses", 0.5), ("holt_damped", 0.3), ("moving_average", 0.2)),
    "intermittent": (("sba", 0.6), ("croston", 0.4)),
    "lumpy": (("sba", 0.5), ("moving_average", 0.5)),
}


def _example_series(
    rng: np.random.Generator, cell_items: np.ndarray, cell_locations: np.ndarray, hist_qty: np.ndarray,
    items: pd.DataFrame, cycle_idx: int,
) -> pd.DataFrame:
    """The statistical forecast's per-series table of the invented scenario.

    The pattern is the real Syntetos–Boylan–Croston class of each history with a
    share of months zeroed out (so all four classes occur); methods are drawn
    per class, a few cells are new items on the family-profile fallback.
    """
    from consensus.methods.demand_pattern import classify_demand

    n_cells, n_months = hist_qty.shape
    # Sparse demand for about a quarter of the cells: each month kept with probability 0.35.
    sparse = rng.random(n_cells) < 0.25
    kept = np.where(sparse[:, None], rng.random(hist_qty.shape) < 0.35, True)
    # Erratic sizes for some cells: a heavy multiplicative shock.
    shocked = hist_qty * np.where((rng.random(n_cells) < 0.2)[:, None], rng.lognormal(0, 1.2, hist_qty.shape), 1.0)
    history = np.where(kept, shocked, 0.0)
    pattern = np.asarray(classify_demand(history, np.zeros(n_cells, dtype=int)), dtype=object)
    method = np.empty(n_cells, dtype=object)
    for name, choices in _EXAMPLE_METHODS.items():
        rows = np.flatnonzero(pattern == name)
        labels = [m for m, _ in choices]
        method[rows] = rng.choice(labels, size=len(rows), p=[p for _, p in choices])
    no_demand = pattern == "no_demand"
    method[no_demand] = "zero_demand"
    wape = np.round(np.where(np.isin(pattern, ("intermittent", "lumpy")), rng.uniform(0.45, 0.95, n_cells),
                             rng.uniform(0.08, 0.35, n_cells)), 4)
    fallback = np.full(n_cells, "", dtype=object)
    new_item = rng.random(n_cells) < 0.03
    months_known = rng.integers(1, 6, size=n_cells)
    family_of = pd.Series(cell_items).map(items.set_index("item")["family"]).to_numpy(dtype=object)
    method[new_item] = "new_item_profile"
    wape[new_item | no_demand] = np.nan
    fallback[no_demand] = "no demand in history: forecast zero"
    fallback[new_item] = (
        "new item: " + months_known[new_item].astype(str) + " month(s) since first demand; family "
        + family_of[new_item].astype(str) + " seasonal profile × item mean"
    )
    return pd.DataFrame(
        {"item": cell_items, "location": cell_locations, "pattern": pattern, "method": method,
         "holdout_wape": wape, "fallback": fallback}
    )
