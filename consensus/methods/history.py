"""Every past error known at a cycle, reduced cycle by cycle into what the run needs.

A run at cycle C scores each past cycle c of its window: every source's
forecast of every cell whose month is ≤ C against the orders that came.  At
100,000 series and a 12-cycle window that is tens of millions of errors, so
they are never kept all at once: each past cycle's errors are reduced, as soon
as they are made, to

* per-cycle sums by (source, lag, segment) — all a source weight needs
  (:func:`consensus.methods.weights.estimate_weights_from_sums`), and the
  pooled item × location accuracy;
* per-series running sums by (source, lag bucket), for each series' own
  tracking signal and scaled error (MASE);
* the same sums by demand pattern, so slow and lumpy items are judged apart;
* errors of group totals (family × region, family, region, location, total),
  which are few: the accuracy of every upper level, and the errors that
  level weights and level bands are drawn from;
* the relative errors of the band sources, by lag bucket, for the bands;
* forecast value added and marketing's value added, as sums.

Errors are e = actual − forecast.  A cell is scored the way
:func:`consensus.methods.accuracy.forecast_errors` says: its month must have
orders for some series, the series must have orders in some month (a month
without a row is then zero demand), and unknown months (a cycle opened before
its orders were in) are not scored at all.  A series that never had an
order is not scored on its own, but its forecasts count at zero orders in
the group totals (a launch that did not sell is an error of its family's
number).
"""

from __future__ import annotations

import copy
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from consensus import periods
from consensus.methods.accuracy import TRACKING_SIGNAL_LIMIT, month_indexes_factorized
from consensus.periods import DEFAULT_LAG_BUCKETS, lag_bucket_labels

#: Upper levels scored as group totals, and the item-side and location-side key of each.
UPPER_LEVELS: dict[str, tuple[str, str]] = {
    "family_region": ("family", "region"),
    "family": ("family", "all"),
    "region": ("all", "region"),
    "location": ("all", "location"),
    "total": ("all", "all"),
}
BUCKETS = tuple(label for label, _, _ in DEFAULT_LAG_BUCKETS)
BAND_SOURCES = ("consensus", "statistical")
#: Longest DC lead time whose forecasts are kept for order amplification (months).
MAX_LEAD_TIME_MONTHS = 3
UNKNOWN_FAMILY, UNKNOWN_REGION = "(unknown family)", "(unknown region)"
#: Steps of forecast value added, from the yardstick to the plan.
FVA_STEPS = ("naive", "statistical_base", "statistical", "dc", "sales", "marketing", "consensus")
NODE_COLUMNS = ["level", "source", "cycle", "node_item", "node_location", "period", "lag", "forecast", "actual"]
SUM_FIELDS = ["n", "n_zero", "sum_abs", "sum_sq", "sum_err", "sum_actual", "sum_forecast", "sum_ape", "sum_scaled",
              "n_scaled"]


@dataclass(frozen=True)
class SeriesBook:
    """The series that have order history, with their place in the hierarchy, as integer codes.

    ``actual[i, j]`` is series i's orders in month ``first_month + j`` (0 for a
    month without a row inside the known months, NaN for an unknown month).
    """

    keys: pd.DataFrame  # [item, location, family, region] per series id
    actual: np.ndarray
    first_month: int
    index: pd.MultiIndex
    scale: np.ndarray  # in-sample seasonal naive MAE per series (the MASE scale), NaN when too short
    pattern: np.ndarray  # demand pattern per series ("" when unknown)
    #: The master's family of every item and region of every location, for forecasts of series without orders.
    family_of: pd.Series = field(default_factory=lambda: pd.Series(dtype=object))
    region_of: pd.Series = field(default_factory=lambda: pd.Series(dtype=object))

    def known_at_location(self) -> tuple[pd.Index, np.ndarray]:
        """Locations and, per location and month, whether its orders are known (a series there has a number)."""
        finite = pd.DataFrame(np.isfinite(self.actual))
        by_location = finite.groupby(self.keys["location"].to_numpy()).any()
        return pd.Index(by_location.index, dtype=object), by_location.to_numpy(bool)


def build_series_book(actuals: pd.DataFrame, *, items: pd.DataFrame, locations: pd.DataFrame, cycle: str,
                      unknown_months=(), patterns: pd.DataFrame | None = None, season: int = 12,
                      unknown_at=()) -> SeriesBook:
    """The dense order matrix of every series known at ``cycle`` (months after it are left out)."""
    known = actuals[actuals["period"].astype(str) <= cycle]
    keys = known[["item", "location"]].drop_duplicates().sort_values(["item", "location"], kind="mergesort")
    keys = keys.reset_index(drop=True)
    index = pd.MultiIndex.from_frame(keys.astype(object))
    end = periods.month_index(cycle)
    if len(known):
        first = int(month_indexes_factorized(known["period"]).min())
    else:
        first = end
    n_months = end - first + 1
    actual = np.zeros((len(keys), n_months))
    if len(known):
        row = index.get_indexer(pd.MultiIndex.from_frame(known[["item", "location"]].astype(object)))
        col = month_indexes_factorized(known["period"]) - first
        np.add.at(actual, (row, col), known["quantity"].to_numpy(float))
    with_orders = np.zeros(n_months, dtype=bool)
    if len(known):
        with_orders[np.unique(month_indexes_factorized(known["period"]) - first)] = True
    actual[:, ~with_orders] = np.nan  # a month with no orders at all is unknown, not zero
    for month in unknown_months:
        j = periods.month_index(month) - first
        if 0 <= j < n_months:
            actual[:, j] = np.nan
    for location, month in unknown_at:  # a location whose orders for the month were not in yet
        j = periods.month_index(month) - first
        if 0 <= j < n_months:
            actual[(keys["location"] == location).to_numpy(), j] = np.nan
    family_of = items.drop_duplicates("item").set_index("item")["family"].astype(object)
    region_of = locations.drop_duplicates("location").set_index("location")["region"].astype(object)
    family = keys["item"].map(family_of).fillna(UNKNOWN_FAMILY)
    region = keys["location"].map(region_of)
    keys = keys.assign(family=family.astype(object), region=region.fillna(UNKNOWN_REGION).astype(object))
    diffs = np.abs(actual[:, season:] - actual[:, :-season]) if n_months > season else np.empty((len(keys), 0))
    counted = np.isfinite(diffs)
    with np.errstate(invalid="ignore", divide="ignore"):
        scale = np.where(counted.sum(axis=1) > 0, np.nansum(diffs, axis=1) / np.maximum(counted.sum(axis=1), 1),
                         np.nan)
    pattern = np.full(len(keys), "", dtype=object)
    if patterns is not None and len(patterns):
        found = index.get_indexer(pd.MultiIndex.from_frame(patterns[["item", "location"]].astype(object)))
        ok = found >= 0
        pattern[found[ok]] = patterns["pattern"].to_numpy(dtype=object)[ok]
    return SeriesBook(keys=keys, actual=actual, first_month=first, index=index, scale=scale, pattern=pattern,
                      family_of=family_of, region_of=region_of)


def _sums_by(keys: dict[str, np.ndarray], values: pd.DataFrame) -> pd.DataFrame:
    """``values`` summed by whole-number keys, one row per key combination in sorted order, keys as columns.

    The keys are folded into one (mixed radix) and each group summed in row order (``np.bincount``), so a
    group's sum depends only on its own rows: scoring cycles together, a cycle code leading the keys, gives
    each cycle the digits it gets alone.
    """
    lows = {name: int(k.min()) if len(k) else 0 for name, k in keys.items()}
    sizes = {name: int(k.max()) - lows[name] + 1 if len(k) else 1 for name, k in keys.items()}
    folded = np.zeros(len(values), dtype=np.int64)
    for name, k in keys.items():
        folded = folded * sizes[name] + (k.astype(np.int64) - lows[name])
    groups, inverse = np.unique(folded, return_inverse=True)
    rest = groups
    columns = {}
    for name in reversed(list(keys)):
        rest, columns[name] = np.divmod(rest, sizes[name])
        columns[name] = columns[name] + lows[name]
    out = pd.DataFrame({name: columns[name] for name in keys})
    for column in values.columns:
        summed = np.bincount(inverse, weights=values[column].to_numpy(float), minlength=len(groups))
        if values[column].dtype.kind in "iub":
            summed = np.rint(summed).astype(np.int64)
        out[column] = summed
    return out


def _with_cycle(frame: pd.DataFrame, names: np.ndarray, k: np.ndarray) -> pd.DataFrame:
    """``frame`` with each row's cycle name, the column typed as one cycle's name would type it (even empty)."""
    if len(names) == 1 or not len(frame):
        return frame.assign(cycle=names[0])
    return frame.assign(cycle=names[k])


def _codes(values: pd.Series | np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    codes, uniques = pd.factorize(pd.Series(values, dtype=object), sort=True)
    return codes.astype(np.int64), np.asarray(uniques, dtype=object)


@dataclass
class HistoryLedger:
    """Running reductions of past errors; :meth:`add_cycle` one past cycle at a time, then :meth:`summary`."""

    book: SeriesBook
    cycle: str
    segment: str  # family | item | region | all (the weights' segment)
    sources: tuple[str, ...]
    keep_cells: bool = False
    band_levels: tuple[float, ...] = (0.8, 0.95)
    #: The item bands' scaling rule (consensus.methods.intervals.BAND_RULES); set by the run's RunSpec.band_rule.
    band_rule: str = "relative"
    _cell_sums: list = field(default_factory=list)
    _pattern_sums: list = field(default_factory=list)
    _nodes: list = field(default_factory=list)
    _bands: dict = field(default_factory=dict)
    _fva: list = field(default_factory=list)
    _uplift: list = field(default_factory=list)
    _history: list = field(default_factory=list)
    _cells: list = field(default_factory=list)
    _coverage: list = field(default_factory=list)
    _dc: list = field(default_factory=list)

    def __post_init__(self) -> None:
        keys = self.book.keys
        n = len(keys)
        self._n = n
        self._source_code = {s: k for k, s in enumerate(self.sources)}
        self._cell_acc = np.zeros((3, len(self.sources), len(BUCKETS), n))  # Σe, Σ|e|, count
        segment_values = {"family": keys["family"], "item": keys["item"], "region": keys["region"],
                          "all": pd.Series("all", index=keys.index)}[self.segment]
        self._segment_codes, self._segment_names = _codes(segment_values)
        self._pattern_codes, self._pattern_names = _codes(pd.Series(self.book.pattern).replace("", "unknown"))
        self._levels = {}
        # Nodes are every pair the book or the master can name, so a series without orders has a node too.
        # Each level's nodes get a block of one numbering (offset + code), so the summary labels every level's
        # totals in one vectorised lookup.
        names = {"family": sorted({*keys["family"], *self.book.family_of.dropna(), UNKNOWN_FAMILY}),
                 "region": sorted({*keys["region"], *self.book.region_of.dropna(), UNKNOWN_REGION}),
                 "location": sorted({*keys["location"], *self.book.region_of.index}), "all": ["all"]}
        offset, node_item, node_location, node_level = 0, [], [], []
        for level, (item_side, location_side) in UPPER_LEVELS.items():
            uniques = pd.MultiIndex.from_product([names[item_side], names[location_side]])
            left = keys[item_side] if item_side != "all" else pd.Series("all", index=keys.index)
            right = keys[location_side] if location_side != "all" else pd.Series("all", index=keys.index)
            codes = uniques.get_indexer(pd.MultiIndex.from_arrays([left.astype(object), right.astype(object)]))
            self._levels[level] = (codes.astype(np.int64), uniques, offset)
            node_item.append(uniques.get_level_values(0).to_numpy(object))
            node_location.append(uniques.get_level_values(1).to_numpy(object))
            node_level.append(np.full(len(uniques), level, dtype=object))
            offset += len(uniques)
        self._node_item = np.concatenate(node_item)
        self._node_location = np.concatenate(node_location)
        self._node_level = np.concatenate(node_level)
        self._known_locations, self._known_at = self.book.known_at_location()
        self._month_known = np.isfinite(self.book.actual).any(axis=0) if n else \
            np.zeros(self.book.actual.shape[1], dtype=bool)
        self._now = periods.month_index(self.cycle)

    # -- one past cycle -------------------------------------------------------------------

    _STATE = ("_cell_sums", "_pattern_sums", "_nodes", "_bands", "_fva", "_uplift", "_history", "_cells",
              "_coverage", "_dc")

    def fresh(self) -> "HistoryLedger":
        """An empty ledger for the same series and settings (a worker fills one per cycle).

        It shares this ledger's book and codes, made once in ``__post_init__``, and starts with nothing gathered.
        """
        part = copy.copy(self)
        for name in self._STATE:
            setattr(part, name, type(getattr(self, name))())
        part._cell_acc = np.zeros_like(self._cell_acc)
        return part

    def state(self) -> dict:
        """What this ledger has gathered, to be merged into another with :meth:`merge`."""
        return {**{name: getattr(self, name) for name in self._STATE}, "_cell_acc": self._cell_acc}

    def merge(self, state: dict) -> None:
        """Add another ledger's gatherings after this one's (cycles merged in order give the same digits)."""
        for name in self._STATE:
            mine = getattr(self, name)
            if isinstance(mine, dict):
                for key, parts in state[name].items():
                    mine.setdefault(key, []).extend(parts)
            else:
                mine.extend(state[name])
        self._cell_acc += state["_cell_acc"]

    def score_cycle(self, name: str, forecasts: pd.DataFrame, *, bands: pd.DataFrame | None = None) -> dict:
        """One cycle's gatherings as a state to :meth:`merge` (so cycles can be scored apart, in any process)."""
        part = self.fresh()
        part.add_cycle(name, forecasts, bands=bands)
        return part.state()

    def add_cycle(self, name: str, forecasts: pd.DataFrame, *, bands: pd.DataFrame | None = None) -> None:
        """Score one past cycle's forecasts [source, item, location, period, quantity] (``consensus`` included).

        ``bands``: the cycle's published plan with its bands [item, location,
        period, lower_80, upper_80, lower_95, upper_95], for band coverage.
        """
        self.add_cycles([(name, forecasts, bands)])

    def add_cycles(self, batch: list[tuple[str, pd.DataFrame, pd.DataFrame | None]]) -> None:
        """Score past cycles (name, forecasts, bands), in order, in one pass over their rows.

        A small catalogue's cycles cost more in per-call overhead than in arithmetic, so they are scored
        together; every reduction still runs cycle by cycle over the same rows in the same order (a cycle
        code leads each grouping key, the running sums are added one cycle at a time), so the digits are those
        of :meth:`add_cycle` called for each cycle.
        """
        if not batch:
            return
        book = self.book
        names = np.asarray([name for name, _, _ in batch], dtype=object)
        starts = np.asarray([periods.month_index(name) for name in names], dtype=np.int64)
        forecasts = pd.concat([f for _, f, _ in batch], ignore_index=True) if len(batch) > 1 else \
            batch[0][1].reset_index(drop=True)
        row_cycle = np.repeat(np.arange(len(batch), dtype=np.int64), [len(f) for _, f, _ in batch])
        is_dc = (forecasts["source"] == "dc").to_numpy()
        near = forecasts[is_dc]
        near_lag = month_indexes_factorized(near["period"]) - starts[row_cycle[is_dc]]
        near_ok = (near_lag >= 1) & (near_lag <= MAX_LEAD_TIME_MONTHS)
        self._dc.append(_with_cycle(near.loc[near_ok, ["item", "location", "period", "quantity"]], names,
                                    row_cycle[is_dc][near_ok]))
        in_sources = forecasts["source"].isin(self.sources).to_numpy()
        frame = forecasts[in_sources]
        k = row_cycle[in_sources]
        sid = book.index.get_indexer(pd.MultiIndex.from_frame(frame[["item", "location"]].astype(object)))
        month = month_indexes_factorized(frame["period"])
        lag = month - starts[k]
        in_window = (month <= self._now) & (lag >= 1) & (month >= book.first_month)
        unordered = self._unordered_cells(frame, month, in_window & (sid < 0), k)
        keep = (sid >= 0) & in_window
        sid, month, lag, k = sid[keep], month[keep], lag[keep], k[keep]
        forecast = frame["quantity"].to_numpy(float)[keep]
        actual = book.actual[sid, month - book.first_month]
        scored = np.isfinite(actual) & np.isfinite(forecast)
        sid, month, lag, k = sid[scored], month[scored], lag[scored], k[scored]
        forecast, actual = forecast[scored], actual[scored]
        source = frame["source"].map(self._source_code).to_numpy()[keep][scored].astype(np.int64)
        # Scored in one canonical order (cycle, source, series, month), whatever order the rows came in: a sum
        # is its rows added in order, so this keeps the digits free of how the frame was put together.
        n_months = book.actual.shape[1]
        order = np.argsort(((k * len(self.sources) + source) * max(self._n, 1) + sid) * n_months
                           + (month - book.first_month), kind="stable")
        k, source, sid, month, lag = k[order], source[order], sid[order], month[order], lag[order]
        forecast, actual = forecast[order], actual[order]
        self._add_nodes(names, k, source, sid, month, forecast, actual, unordered)
        if not len(sid):
            return
        error = actual - forecast
        bucket = np.searchsorted([first for _, first, _ in DEFAULT_LAG_BUCKETS], lag, side="right") - 1
        scale = book.scale[sid]
        scaled_ok = np.isfinite(scale) & (scale > 0)
        nonzero = actual != 0
        parts = pd.DataFrame({
            "source": source, "lag": lag, "n": 1, "n_zero": (~nonzero).astype(int), "sum_abs": np.abs(error),
            "sum_sq": error * error, "sum_err": error, "sum_actual": actual, "sum_forecast": forecast,
            "sum_ape": np.where(nonzero, np.abs(error) / np.where(nonzero, np.abs(actual), 1.0), 0.0),
            "sum_scaled": np.where(scaled_ok, np.abs(error) / np.where(scaled_ok, scale, 1.0), 0.0),
            "n_scaled": scaled_ok.astype(int)})
        for target, codes in ((self._cell_sums, self._segment_codes), (self._pattern_sums, self._pattern_codes)):
            summed = _sums_by({"k": k, "source": source, "lag": lag, "group": codes[sid]}, parts[SUM_FIELDS])
            target.append(_with_cycle(summed.drop(columns="k"), names, summed["k"].to_numpy()))
        # the rows are in cycle order: each cycle's slice, so the running sums are added one cycle at a time
        bounds = np.searchsorted(k, np.arange(len(batch) + 1))
        cycles = [(c, slice(bounds[c], bounds[c + 1])) for c in range(len(batch)) if bounds[c + 1] > bounds[c]]
        flat = (source * len(BUCKETS) + bucket) * self._n + sid
        size = self._cell_acc[0].size
        for _, rows in cycles:
            for j, values in enumerate((error, np.abs(error), None)):
                self._cell_acc[j] += np.bincount(flat[rows], weights=None if values is None else values[rows],
                                                 minlength=size).reshape(self._cell_acc[j].shape)
        for band_source in BAND_SOURCES:
            code = self._source_code.get(band_source)
            if code is None:
                continue
            mine = (source == code) & (forecast > 0)
            if not mine.any():  # no rows: an empty frame's column types would differ from a full one's
                continue
            self._bands.setdefault(band_source, []).append(
                pd.DataFrame({"lag_bucket": np.asarray(BUCKETS, dtype=object)[bucket[mine]],
                              "forecast": forecast[mine], "actual": actual[mine]}))
        history = _sums_by({"k": k, "source": source}, parts[["sum_abs", "sum_err", "sum_actual"]])
        self._history.append(_with_cycle(history.drop(columns="k"), names, history["k"].to_numpy()))
        for c, rows in cycles:
            self._add_fva(names[c], source[rows], sid[rows], month[rows], forecast[rows], actual[rows])
        self._add_uplift(k, source, sid, month, bucket, forecast, actual)
        for c, _ in cycles:
            bands = batch[c][2]
            if bands is not None and len(bands):
                self._add_coverage(names[c], bands)
        if self.keep_cells:
            self._cells.append(_with_cycle(pd.DataFrame({"source": source, "sid": sid}), names, k).assign(
                month=month, lag=lag, forecast=forecast, actual=actual))

    def _add_nodes(self, names, k, source, sid, month, forecast, actual, unordered) -> None:
        """Each upper level's group totals of forecast and orders, per cycle, source and month.

        Summed level by level: one level's cells at a time is all the memory it takes (a cycle of 100,000
        series has millions of scored cells, and five levels' copies at once cost gigabytes).  The totals are
        kept cycle by cycle, each cycle's levels in order.
        """
        summed = []
        for level, (codes, _, offset) in self._levels.items():
            cells = pd.DataFrame({"k": k, "source": source, "node": offset + codes[sid], "month": month,
                                  "forecast": forecast, "actual": actual})
            if unordered is not None:
                cells = pd.concat([cells, unordered.assign(node=offset + self._node_codes(level, unordered))[
                    cells.columns]], ignore_index=True)
            keys = {c: cells[c].to_numpy() for c in ("k", "source", "node", "month")}
            summed.append(_sums_by(keys, cells[["forecast", "actual"]]))
        nodes = pd.concat(summed, ignore_index=True)
        if len(names) > 1:
            nodes = nodes.iloc[np.argsort(nodes["k"].to_numpy(), kind="stable")].reset_index(drop=True)
        self._nodes.append(_with_cycle(nodes.drop(columns="k"), names, nodes["k"].to_numpy()))

    def _unordered_cells(self, frame: pd.DataFrame, month: np.ndarray, outside: np.ndarray,
                         k: np.ndarray) -> pd.DataFrame | None:
        """Forecasts of series that never had an order, scored at zero in group totals (months whose orders are known).

        Such a series is not scored on its own (:func:`consensus.methods.accuracy.forecast_errors`), but what a
        source forecast for it is part of the group total it forecast: a launch that never sold is an error of
        its family's number.
        """
        if not outside.any():
            return None
        rows = frame[outside]
        j = month[outside] - self.book.first_month
        at = self._known_locations.get_indexer(rows["location"].astype(object))
        known = np.where(at >= 0, self._known_at[np.maximum(at, 0), j], self._month_known[j])
        known &= np.isfinite(rows["quantity"].to_numpy(float))
        if not known.any():
            return None
        rows = rows[known]
        cells = pd.DataFrame({"k": k[outside][known],
                              "source": rows["source"].map(self._source_code).to_numpy().astype(np.int64),
                              "item": rows["item"].to_numpy(object), "location": rows["location"].to_numpy(object),
                              "month": month[outside][known], "forecast": rows["quantity"].to_numpy(float),
                              "actual": 0.0})
        # one canonical order, as for the scored cells (these are few: launches and dropped series)
        return cells.sort_values(["k", "source", "item", "location", "month"], kind="mergesort", ignore_index=True)

    def _node_codes(self, level: str, cells: pd.DataFrame) -> np.ndarray:
        item_side, location_side = UPPER_LEVELS[level]
        family = cells["item"].map(self.book.family_of).fillna(UNKNOWN_FAMILY)
        region = cells["location"].map(self.book.region_of).fillna(UNKNOWN_REGION)
        sides = {"family": family, "region": region, "location": cells["location"],
                 "all": pd.Series("all", index=cells.index)}
        pairs = pd.MultiIndex.from_arrays([sides[item_side].astype(object), sides[location_side].astype(object)])
        return self._levels[level][1].get_indexer(pairs).astype(np.int64)

    def _band_table(self) -> tuple[pd.DataFrame, str]:
        """Quantiles of the plan's own past relative errors by lag bucket (with the statistical source's while short).

        :func:`consensus.methods.intervals.own_errors_first`: the consensus's
        own cell errors alone once there are enough, before that pooled with
        the statistical source's.
        """
        from consensus.methods.intervals import band_table, own_errors_first

        parts = {s: pd.concat(p, ignore_index=True) for s, p in self._bands.items() if p}
        chosen, basis = own_errors_first(parts.get("consensus"), parts.get("statistical"))
        if chosen is None or chosen.empty:
            return pd.DataFrame(), "none"
        source = "consensus" if basis == "own" else "consensus and statistical"
        return band_table(chosen, levels=self.band_levels, rule=self.band_rule), source

    def _cell_key(self, sid: np.ndarray, month: np.ndarray) -> np.ndarray:
        return sid.astype(np.int64) * 10_000 + (month - self.book.first_month)

    def _add_fva(self, name, source, sid, month, forecast, actual) -> None:
        """Each step's absolute error on the cells the plan itself forecast (so steps compare on common cells)."""
        reference_code = self._source_code.get("consensus")
        if reference_code is None:
            present = [self._source_code[s] for s in FVA_STEPS if s in self._source_code]
            reference_code = present[0] if present else None
        if reference_code is None:
            return
        key = self._cell_key(sid, month)
        in_reference = np.isin(key, key[source == reference_code])
        for step in FVA_STEPS:
            code = self._source_code.get(step)
            if code is None:
                continue
            mine = (source == code) & in_reference
            if mine.any():
                self._fva.append({"cycle": name, "step": step, "sum_abs": float(np.abs(actual[mine] - forecast[mine])
                                                                              .sum()),
                                  "sum_actual": float(actual[mine].sum()), "n": int(mine.sum())})

    def _add_uplift(self, k, source, sid, month, bucket, forecast, actual) -> None:
        """Statistical with and without marketing's events, on the cells the events changed (cycle by cycle)."""
        with_code, without_code = self._source_code.get("statistical"), self._source_code.get("statistical_base")
        if with_code is None or without_code is None:
            return
        key = self._cell_key(sid, month)
        mine, base = source == with_code, source == without_code
        a = pd.DataFrame({"k": k[mine], "key": key[mine], "with": forecast[mine], "actual": actual[mine],
                          "bucket": bucket[mine]})
        b = pd.DataFrame({"k": k[base], "key": key[base], "without": forecast[base]})
        paired = a.merge(b, on=["k", "key"], how="inner")
        changed = paired[~np.isclose(paired["with"], paired["without"], rtol=0, atol=1e-9)]
        if len(changed):
            self._uplift.append(changed.assign(abs_with=(changed["actual"] - changed["with"]).abs(),
                                               abs_without=(changed["actual"] - changed["without"]).abs())[
                ["bucket", "abs_with", "abs_without", "actual"]])

    def _add_coverage(self, name: str, bands: pd.DataFrame) -> None:
        from consensus.methods.intervals import winkler_score

        book = self.book
        sid = book.index.get_indexer(pd.MultiIndex.from_frame(bands[["item", "location"]].astype(object)))
        month = month_indexes_factorized(bands["period"])
        keep = (sid >= 0) & (month <= self._now) & (month >= book.first_month)
        actual = book.actual[sid[keep], month[keep] - book.first_month]
        lag = month[keep] - periods.month_index(name)
        label = lag_bucket_labels(lag)
        for nominal in (80, 95):
            lo = bands[f"lower_{nominal}"].to_numpy(float)[keep] if f"lower_{nominal}" in bands else None
            if lo is None:
                continue
            hi = bands[f"upper_{nominal}"].to_numpy(float)[keep]
            ok = np.isfinite(actual) & np.isfinite(lo) & np.isfinite(hi)
            if not ok.any():
                continue
            hit = (actual[ok] >= lo[ok]) & (actual[ok] <= hi[ok])
            score = winkler_score(lo[ok], hi[ok], actual[ok], level=nominal / 100)
            self._coverage.append(pd.DataFrame({"level": "item", "lag_bucket": label[ok], "nominal": nominal / 100,
                                                "hit": hit.astype(int), "winkler": score, "n": 1}))

    # -- what the run reads -------------------------------------------------------------------

    def summary(self) -> "HistorySummary":
        src = np.asarray(self.sources, dtype=object)

        def named(frames: list[pd.DataFrame], names: np.ndarray, column: str) -> pd.DataFrame:
            if not frames:
                return pd.DataFrame(columns=["source", "cycle", "lag", "lag_bucket", column, *SUM_FIELDS])
            out = pd.concat(frames, ignore_index=True)
            out["source"] = src[out["source"].to_numpy()]
            out[column] = names[out["group"].to_numpy()]
            out["lag_bucket"] = lag_bucket_labels(out["lag"].to_numpy())
            return out.drop(columns="group")[["source", "cycle", "lag", "lag_bucket", column, *SUM_FIELDS]]

        cell_sums = named(self._cell_sums, self._segment_names, "segment")
        pattern_sums = named(self._pattern_sums, self._pattern_names, "pattern")
        if self._nodes:
            part = pd.concat(self._nodes, ignore_index=True)
            node = part["node"].to_numpy()
            node_errors = pd.DataFrame({
                "level": self._node_level[node], "source": src[part["source"].to_numpy()],
                "cycle": part["cycle"].to_numpy(object), "node_item": self._node_item[node],
                "node_location": self._node_location[node], "period": periods.month_names(part["month"].to_numpy()),
                "lag": part["month"].to_numpy() - month_indexes_factorized(part["cycle"]),
                "forecast": part["forecast"].to_numpy(), "actual": part["actual"].to_numpy()})
        else:
            node_errors = pd.DataFrame(columns=NODE_COLUMNS)
        total, absolute, count = self._cell_acc
        with np.errstate(invalid="ignore", divide="ignore"):
            mad = absolute / count
            signal = np.where(mad > 0, total / np.where(mad > 0, mad, 1.0), 0.0)
        has = count > 0
        rows = []
        for s, name in enumerate(self.sources):
            for b, bucket in enumerate(BUCKETS):
                mine = has[s, b]
                if mine.any():
                    values = signal[s, b][mine]
                    rows.append({"source": name, "lag_bucket": bucket, "mean_tracking_signal": float(values.mean()),
                                 "share_outside_limits": float(np.mean(np.abs(values) > TRACKING_SIGNAL_LIMIT)),
                                 "n_series": int(mine.sum())})
        cell_signals = pd.DataFrame(rows, columns=["source", "lag_bucket", "mean_tracking_signal",
                                                   "share_outside_limits", "n_series"])
        band_table, band_source = self._band_table()
        uplift = pd.concat(self._uplift, ignore_index=True) if self._uplift else pd.DataFrame(
            columns=["bucket", "abs_with", "abs_without", "actual"])
        cells = None
        if self.keep_cells and self._cells:
            raw = pd.concat(self._cells, ignore_index=True)
            keys = self.book.keys
            cells = pd.DataFrame({
                "source": src[raw["source"].to_numpy()], "cycle": raw["cycle"].to_numpy(),
                "item": keys["item"].to_numpy()[raw["sid"].to_numpy()],
                "location": keys["location"].to_numpy()[raw["sid"].to_numpy()],
                "period": periods.month_names(raw["month"].to_numpy()), "lag": raw["lag"].to_numpy(),
                "lag_bucket": lag_bucket_labels(raw["lag"].to_numpy()), "forecast": raw["forecast"].to_numpy(),
                "actual": raw["actual"].to_numpy()})
            cells["error"] = cells["actual"] - cells["forecast"]
        return HistorySummary(
            cell_sums=cell_sums, pattern_sums=pattern_sums, node_errors=node_errors, cell_signals=cell_signals,
            band_table=band_table, band_source=band_source, fva=pd.DataFrame(self._fva, columns=["cycle", "step", "sum_abs", "sum_actual", "n"]),
            uplift=uplift,
            history=(pd.concat(self._history, ignore_index=True).assign(
                source=lambda f: src[f["source"].to_numpy()]) if self._history else
                pd.DataFrame(columns=["source", "sum_abs", "sum_err", "sum_actual", "cycle"])),
            coverage=(pd.concat(self._coverage, ignore_index=True) if self._coverage else
                      pd.DataFrame(columns=["level", "lag_bucket", "nominal", "hit", "winkler", "n"])),
            cell_errors=cells,
            dc_forecasts=(pd.concat(self._dc, ignore_index=True) if self._dc else
                          pd.DataFrame(columns=["item", "location", "period", "quantity", "cycle"])))


@dataclass(frozen=True)
class HistorySummary:
    """What a run reads of its past: see the module docstring for each part."""

    cell_sums: pd.DataFrame  # [source, cycle, lag, lag_bucket, segment, *SUM_FIELDS]
    pattern_sums: pd.DataFrame  # [source, cycle, lag, lag_bucket, pattern, *SUM_FIELDS]
    node_errors: pd.DataFrame  # NODE_COLUMNS
    cell_signals: pd.DataFrame  # [source, lag_bucket, mean_tracking_signal, share_outside_limits, n_series]
    band_table: pd.DataFrame  # intervals.band_table of the band source's relative errors
    band_source: str
    fva: pd.DataFrame  # [cycle, step, sum_abs, sum_actual, n]
    uplift: pd.DataFrame  # [bucket, abs_with, abs_without, actual]
    history: pd.DataFrame  # [source, cycle, sum_abs, sum_err, sum_actual]
    coverage: pd.DataFrame  # [level, lag_bucket, nominal, hit, winkler, n]
    cell_errors: pd.DataFrame | None = None  # forecast_errors' table, only when a reconciliation needs it
    dc_forecasts: pd.DataFrame | None = None  # [item, location, period, quantity, cycle]: DCs' near forecasts

    def weight_sums(self) -> pd.DataFrame:
        """[segment, lag_bucket, source, cycle, n, sum_abs, sum_sq, sum_err] for the weights."""
        columns = ["segment", "lag_bucket", "source", "cycle"]
        if self.cell_sums.empty:
            return pd.DataFrame(columns=columns + ["n", "sum_abs", "sum_sq", "sum_err"])
        return (self.cell_sums.groupby(columns, sort=True)[["n", "sum_abs", "sum_sq", "sum_err"]].sum()
                .reset_index())

    def frames(self) -> dict[str, pd.DataFrame]:
        """Every part as a plain frame (for caching)."""
        out = {"cell_sums": self.cell_sums, "pattern_sums": self.pattern_sums, "node_errors": self.node_errors,
               "cell_signals": self.cell_signals, "fva": self.fva, "uplift": self.uplift, "history": self.history,
               "coverage": self.coverage, "band_table": self.band_table,
               "band_source": pd.DataFrame({"source": [self.band_source]})}
        if self.cell_errors is not None:
            out["cell_errors"] = self.cell_errors
        if self.dc_forecasts is not None:
            out["dc_forecasts"] = self.dc_forecasts
        return out

    @classmethod
    def from_frames(cls, frames: dict[str, pd.DataFrame]) -> "HistorySummary":
        return cls(cell_sums=frames["cell_sums"], pattern_sums=frames["pattern_sums"],
                   node_errors=frames["node_errors"], cell_signals=frames["cell_signals"],
                   band_table=frames["band_table"], band_source=str(frames["band_source"]["source"].iloc[0]),
                   fva=frames["fva"], uplift=frames["uplift"], history=frames["history"],
                   coverage=frames["coverage"], cell_errors=frames.get("cell_errors"),
                   dc_forecasts=frames.get("dc_forecasts"))
