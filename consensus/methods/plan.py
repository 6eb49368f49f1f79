"""A cycle's plan as one pure computation: inputs and settings in, the whole result out.

:func:`compute_plan` takes everything a run depends on (:class:`PlanInputs`:
the master data, the order history and the submissions in force at one
journal position, the earlier cycles' published plans and the meeting's
decisions) and the run's settings (:class:`RunSpec`), and returns the result
(:class:`PlanResult`): the consensus of every cell with its bands, the
weights, the accuracy of every source at every level, the statistical
method of every series and the component demand.  It reads no store and
writes no file, so the same inputs give the same numbers, and a published
plan can be recomputed and compared digit for digit.

Steps, all vectorised over cells:

1. each cycle of the window (the current one and up to ``window_cycles``
   before it): the statistical and seasonal naive forecasts from the orders
   known then (:mod:`consensus.methods.statistical`), the human sources
   aligned and taken from the submissions in force
   (:mod:`consensus.methods.cycle_sources`), marketing's events applied;
2. each past cycle scored against the orders that came, and reduced to what
   the run reads (:mod:`consensus.methods.history`);
3. weights from those errors (:mod:`consensus.methods.weights`), the
   combination (:mod:`consensus.methods.combine`), reconciliation
   (:mod:`consensus.methods.reconciliation`), bands
   (:mod:`consensus.methods.intervals`) and the meeting's decisions
   (:mod:`consensus.methods.decisions`);
4. the plan is stated in thousandths of a unit.

A cache may be passed in: every part it keeps is filed under the digest of
everything that part read (and :data:`METHOD_VERSION`), so a result from the
cache is the result the computation would give.  ``jobs`` spreads the
statistical fits of fixed groups of families over processes; the groups do
not depend on ``jobs``, so any number of processes gives the same digits.
"""

from __future__ import annotations

import ctypes
import gc
import zlib
from collections.abc import Callable
from concurrent.futures import ProcessPoolExecutor
from dataclasses import asdict, dataclass, field
from functools import partial
from multiprocessing import get_context
from typing import Protocol

import numpy as np
import pandas as pd

from consensus import periods
from consensus.errors import InvalidSpec
from consensus.methods import cycle_sources as cs
from consensus.methods import history as hist
from consensus.methods import scoring
from consensus.methods.accuracy import month_indexes_factorized
from consensus.methods.alignment import historical_mix
from consensus.methods.bias import BiasSpec, correct_sources, factors_as_known, persistent_bias, segment_weight_sums
from consensus.methods.bom import component_totals, explode_bom
from consensus.methods.combine import combine_sources
from consensus.methods.decisions import apply_decisions
from consensus.methods.intervals import BAND_RULES, apply_bands, band_columns, level_band_errors, stored_level_bands
from consensus.methods.reconciliation import DEFAULT_RECONCILIATION, RECONCILIATION_METHODS, reconcile_hierarchy
from consensus.methods.statistical import forecast_statistical
from consensus.methods.weights import WeightSpec, assign_segments, estimate_weights_from_sums
from consensus.store.columnar import digest_of, frame_digest, pack_frames, unpack_frames
from consensus.vocabulary import combined_sources, scored_sources

#: Bump when any step changes the numbers, so cached parts made by older code are never read.
METHOD_VERSION = "2026.12.6"
#: The published plan and its bands are stated in thousandths of a unit.
PLAN_DECIMALS = 3
#: Fixed groups of families the statistical fits are spread over (independent of the number of processes).
#: The parts are sorted by series when gathered, so the count changes no number or row.  32 groups did not
#: lower the fits' peak at 100,000 series (6.19 GB PSS against 6.08 GB with 16), so it stays 16.
STATISTICAL_GROUPS = 16
#: Fewer series than this and the fits stay in one process (starting processes would cost more).
PARALLEL_MIN_SERIES = 4000
#: The errors source weights can be estimated from (see RunSpec.weights_from).
WEIGHT_ERRORS = ("segment_totals", "cells")


@dataclass(frozen=True)
class RunSpec:
    """Every setting of a consensus run; stored with the run."""

    weights: WeightSpec = field(default_factory=WeightSpec)
    band_levels: tuple[float, ...] = (0.8, 0.95)
    mix_window_months: int = 12
    reconciliation: str = DEFAULT_RECONCILIATION
    #: When a source's persistent bias is corrected before it is combined (consensus.methods.bias).
    bias: BiasSpec = field(default_factory=BiasSpec)
    #: Which errors weigh the sources: each source's segment totals ("segment_totals") or its cells ("cells").
    weights_from: str = "cells"
    #: How item bands scale past errors to a forecast (consensus.methods.intervals.BAND_RULES).
    band_rule: str = "relative_by_size"

    def __post_init__(self) -> None:
        if self.band_rule not in BAND_RULES:
            raise InvalidSpec(f"band_rule must be one of {', '.join(BAND_RULES)}")
        if self.weights_from not in WEIGHT_ERRORS:
            raise InvalidSpec(f"weights_from must be one of {', '.join(WEIGHT_ERRORS)}")
        if self.reconciliation not in RECONCILIATION_METHODS:
            raise InvalidSpec(f"reconciliation must be one of {', '.join(RECONCILIATION_METHODS)}")
        levels = tuple(float(level) for level in self.band_levels)
        if not levels or not all(0 < level < 1 for level in levels):
            raise InvalidSpec("band levels must lie strictly between 0 and 1")
        if len({int(round(100 * level)) for level in levels}) != len(levels):
            raise InvalidSpec(f"band levels {levels} would share column names")
        object.__setattr__(self, "band_levels", levels)
        if not isinstance(self.mix_window_months, int) or not 1 <= self.mix_window_months <= 60:
            raise InvalidSpec("mix window must be 1 to 60 months")

    def to_dict(self) -> dict:
        out = asdict(self)
        out["band_levels"] = list(self.band_levels)
        return out

    @classmethod
    def from_dict(cls, data: dict) -> "RunSpec":
        data = dict(data)
        weights = WeightSpec(**data.pop("weights", {}))
        bias = BiasSpec(**data.pop("bias", {}))
        if "band_levels" in data:
            data["band_levels"] = tuple(data["band_levels"])
        return cls(weights=weights, bias=bias, **data)


@dataclass(frozen=True)
class CycleInputs:
    """One cycle of the window: its submissions in force and, for a past cycle, its published plan."""

    name: str
    horizon: int
    submissions: pd.DataFrame  # accepted forecast and events files: [id, seq, kind, source, scope_detail, months, lines_sha256]
    published: pd.DataFrame | None = None  # [item, location, period, consensus, lower_80, upper_80, …]
    published_run: int | None = None


@dataclass(frozen=True)
class PlanInputs:
    """Everything a run depends on, read at one journal position."""

    cycle: CycleInputs
    past: tuple[CycleInputs, ...]
    items: pd.DataFrame
    locations: pd.DataFrame
    bom: pd.DataFrame
    actuals: pd.DataFrame  # monthly orders in force, any months
    decisions: pd.DataFrame  # the current cycle's decisions in force
    lines: Callable[[list[str]], dict[str, pd.DataFrame]]  # checked lines of submissions, by their sha256
    unknown_months: tuple[str, ...] = ()  # months planned as unknown (a cycle opened before its orders were in)
    unknown_at: tuple[tuple[str, str], ...] = ()  # (location, month) whose orders were not in yet

    def master_digest(self) -> str:
        return digest_of(self.items, self.locations)

    def fingerprint(self, spec: RunSpec) -> str:
        """A digest of everything the result depends on: same fingerprint, same numbers."""
        def cycle_part(c: CycleInputs):
            subs = c.submissions[["seq", "kind", "source", "lines_sha256"]].astype(str).values.tolist()
            scopes = [str(d) for d in c.submissions["scope_detail"]]
            published = frame_digest(c.published) if c.published is not None else None
            return [c.name, c.horizon, subs, scopes, published]
        decisions = self.decisions.drop(columns=[c for c in ("at",) if c in self.decisions.columns])
        return digest_of(METHOD_VERSION, spec.to_dict(), cycle_part(self.cycle), [cycle_part(c) for c in self.past],
                         self.items, self.locations, self.bom, self.actuals, decisions, list(self.unknown_months),
                         [list(p) for p in self.unknown_at])


class Cache(Protocol):
    """Where computed parts may be kept, as packed frames (consensus.store.columnar.pack_frames).

    ``durable=False`` marks a part cheap enough to remake that only this
    process need keep it (a past cycle's scoring frame): a cache may hold it
    in memory, or not at all.
    """

    def get(self, key: str) -> bytes | None: ...

    def put(self, key: str, *, kind: str, cycle: str, content: bytes, durable: bool = True) -> None: ...


class NoCache:
    def get(self, key: str):
        return None

    def put(self, key: str, *, kind: str, cycle: str, content: bytes, durable: bool = True) -> None:
        return None


@dataclass
class PlanResult:
    """The result of a run: named frames (each stored as one packed part), notes and a summary."""

    parts: dict[str, pd.DataFrame]
    notes: dict
    summary: dict


# --------------------------------------------------------------------------- order history


@dataclass(frozen=True)
class _History:
    """The order history as the run reads it: known rows, unknown months, and a digest per cycle."""

    actuals: pd.DataFrame
    unknown: tuple[str, ...]
    month_digests: dict[str, str]
    months: np.ndarray  # month index of each row
    groups: np.ndarray  # statistical group of each row (see _statistical_group)
    unknown_at: tuple[tuple[str, str], ...] = ()  # (location, month) not in yet

    def known_at(self, cycle: str) -> pd.DataFrame:
        return self.actuals[self.actuals["period"] <= cycle]

    def digest_at(self, cycle: str) -> str:
        """Digest of the orders known at ``cycle`` (and of which months are unknown), cheap per cycle."""
        months = [(m, d) for m, d in self.month_digests.items() if m <= cycle]
        return digest_of(months, [m for m in self.unknown if m <= cycle],
                         [list(p) for p in self.unknown_at if p[1] <= cycle])


def _history(actuals: pd.DataFrame, unknown: tuple[str, ...], items: pd.DataFrame | None = None,
             unknown_at: tuple[tuple[str, str], ...] = ()) -> _History:
    frame = actuals[["item", "location", "period", "quantity"]].astype(
        {"item": object, "location": object, "period": object}).reset_index(drop=True)
    frame["quantity"] = frame["quantity"].astype(float)
    hashed = pd.util.hash_pandas_object(frame, index=False).to_numpy()
    sums = pd.DataFrame({"period": frame["period"], "h": hashed}).groupby("period", sort=True)["h"]
    digests = {month: f"{int(np.bitwise_xor.reduce(values.to_numpy()))}:{len(values)}"
               for month, values in sums}
    months = periods.month_indexes(frame["period"]) if len(frame) else np.zeros(0, dtype=int)
    families = (frame["item"].map(items.drop_duplicates("item").set_index("item")["family"]).fillna("")
                if items is not None and len(frame) else pd.Series("", index=frame.index))
    return _History(actuals=frame, unknown=tuple(sorted(unknown)), month_digests=digests, months=months,
                    groups=_statistical_group(families), unknown_at=tuple(sorted(tuple(p) for p in unknown_at)))


# --------------------------------------------------------------------------- statistical source


def _statistical_group(families: pd.Series) -> np.ndarray:
    """A fixed group per family (crc32 of its name), so a family is always fitted whole and in one place."""
    codes, names = pd.factorize(families.astype(str), sort=False)
    group_of = np.array([zlib.crc32(str(f).encode("utf-8")) % STATISTICAL_GROUPS for f in names], dtype=int)
    return group_of[codes] if len(codes) else np.zeros(0, dtype=int)


def _group_history(history: _History, *, cycle: str, group: int) -> pd.DataFrame:
    """One statistical group's orders known at ``cycle``, with unknown months as missing observations (NaN)."""
    known = history.actuals[(history.months <= periods.month_index(cycle)) & (history.groups == group)]
    unknown_here = [m for m in history.unknown if m <= cycle]
    holes = []
    if unknown_here and len(known):
        pairs = known[["item", "location"]].drop_duplicates()
        holes.append(pairs.merge(pd.DataFrame({"period": unknown_here}), how="cross"))
    at_here = [(loc, m) for loc, m in history.unknown_at if m <= cycle]
    if at_here and len(known):
        pairs = known[["item", "location"]].drop_duplicates()
        holes.append(pairs.merge(pd.DataFrame(at_here, columns=["location", "period"]), on="location"))
    if holes:
        known = pd.concat([known, *[h.assign(quantity=np.nan)[known.columns] for h in holes]], ignore_index=True)
    return known


def _fit_group(history: _History, items: pd.DataFrame, cycle: str, horizon: int, group: int) -> tuple:
    """The statistical and seasonal naive forecasts of one fixed group of families (whole families)."""
    families = items.drop_duplicates("item").set_index("item")["family"]
    result = forecast_statistical(_group_history(history, cycle=cycle, group=group), cycle=cycle, horizon=horizon,
                                  families=families)
    return result.forecast, result.seasonal_naive, result.series


def _gather_statistical(results: list[tuple]) -> dict[str, pd.DataFrame]:
    """One cycle's statistical parts from its groups' results, in the fixed order of the groups."""
    columns = ["item", "location", "period", "quantity"]
    if not results:
        empty = pd.DataFrame({c: pd.Series(dtype=float if c == "quantity" else object) for c in columns})
        return {"statistical": empty, "naive": empty.copy(), "series": pd.DataFrame(columns=["item", "location"])}

    def gather(position: int, keep: list[str]) -> pd.DataFrame:
        frame = pd.concat([r[position] for r in results], ignore_index=True)
        if "quantity" in frame:
            frame["quantity"] = cs.rounded(frame["quantity"])
        return frame[keep]

    series = gather(2, list(results[0][2].columns)).sort_values(["item", "location"], kind="mergesort",
                                                                 ignore_index=True)
    return {"statistical": gather(0, columns), "naive": gather(1, columns), "series": series}


def statistical_for_cycle(history: pd.DataFrame, *, cycle: str, horizon: int, items: pd.DataFrame,
                          unknown: tuple[str, ...] = ()) -> dict[str, pd.DataFrame]:
    """The statistical and seasonal naive forecasts of every series from the orders known at ``cycle``.

    Unknown months are given to the fit as missing observations (NaN), never as zero.  The series are
    fitted in fixed groups of whole families (the same groups whatever the number of processes).
    Returns {"statistical": [item, location, period, quantity], "naive": …, "series": per-series method}.
    """
    book = _history(history, unknown, items)
    here = np.unique(book.groups[book.months <= periods.month_index(cycle)])
    return _gather_statistical([_fit_group(book, items, cycle, horizon, int(g)) for g in here])


# --------------------------------------------------------------------------- one cycle's sources


@dataclass
class _Context:
    inputs: PlanInputs
    spec: RunSpec
    history: _History
    cache: Cache
    pool: ProcessPoolExecutor | None
    progress: Callable[[str], None]
    warnings: list[str] = field(default_factory=list)
    made: list[str] = field(default_factory=list)
    prepared: dict = field(default_factory=dict)  # (kind, cycle) -> the part's frames
    keys: dict = field(default_factory=dict)  # (key maker, cycle) -> the part's cache key
    master: str = field(init=False)  # the master data's digest, made once: every part key reads it

    def __post_init__(self) -> None:
        self.master = self.inputs.master_digest()


#: The context forked worker processes read (set before the pool starts, so it reaches them by fork).
_WORKER: _Context | None = None
#: The ledger forked workers score past cycles with (set before the pool is restarted for scoring).
_WORKER_LEDGER: hist.HistoryLedger | None = None


def _known_lines(lines: pd.DataFrame, items: pd.DataFrame, locations: pd.DataFrame) -> tuple[pd.DataFrame, int]:
    """Lines whose item, family, location and region are all in the master in force (the rest are left out)."""
    ok = np.ones(len(lines), dtype=bool)
    for column, known in (("item", items["item"]), ("family", items["family"]), ("location", locations["location"]),
                          ("region", locations["region"])):
        if column in lines:
            values = lines[column]
            ok &= (values.isna() | values.isin(set(known))).to_numpy()
    return lines[ok], int((~ok).sum())


def _cycle_lines(ctx: _Context, c: CycleInputs, kind: str) -> pd.DataFrame:
    subs = c.submissions[c.submissions["kind"] == kind]
    if subs.empty:
        return pd.DataFrame()
    found = ctx.inputs.lines([s for s in subs["lines_sha256"] if isinstance(s, str)])
    parts = []
    for sub in subs.itertuples(index=False):
        frame = found[sub.lines_sha256]
        if "cycle" in frame:
            frame = frame[frame["cycle"] == c.name]
        parts.append(frame.assign(seq=int(sub.seq), submission_id=int(sub.id), source=sub.source))
    return pd.concat(parts, ignore_index=True) if parts else pd.DataFrame()


def _memo_key(make):
    """A part's key is made once per run and cycle (a digest of frames is not free)."""
    def key(ctx: _Context, c: CycleInputs) -> str:
        slot = (make.__name__, c.name)
        if slot not in ctx.keys:
            ctx.keys[slot] = make(ctx, c)
        return ctx.keys[slot]
    key.__name__, key.__doc__ = make.__name__, make.__doc__
    return key


@_memo_key
def _statistical_key(ctx: _Context, c: CycleInputs) -> str:
    return digest_of("statistical", METHOD_VERSION, c.name, c.horizon, ctx.history.digest_at(c.name),
                     ctx.inputs.items[["item", "family"]])


@_memo_key
def _aligned_key(ctx: _Context, c: CycleInputs) -> str:
    forecasts = c.submissions[c.submissions["kind"] == "forecast"]
    return digest_of("aligned", METHOD_VERSION, c.name, forecasts[["seq", "source", "lines_sha256"]].astype(str)
                     .values.tolist(), [str(d) for d in forecasts["scope_detail"]],
                     [list(m or []) for m in forecasts["months"]], ctx.history.digest_at(c.name),
                     ctx.master, ctx.spec.mix_window_months)


@_memo_key
def _frame_key(ctx: _Context, c: CycleInputs) -> str:
    """Everything a past cycle's scoring frame reads (:func:`cycle_frame`): its statistical and aligned parts,
    its events in force, its horizon and the master data."""
    events = c.submissions[c.submissions["kind"] == "events"]
    return digest_of("frame", METHOD_VERSION, c.name, c.horizon, _statistical_key(ctx, c), _aligned_key(ctx, c),
                     events[["seq", "source", "lines_sha256"]].astype(str).values.tolist(),
                     [str(d) for d in events["scope_detail"]], ctx.master)


#: Largest past-cycle scoring frame (rows) handed back to be kept in memory: above it a frame costs more to
#: pack, send back and hold than to remake, and a small catalogue (the sample company's is about 16,000 rows)
#: is where the per-cycle overhead dominates.
FRAME_MEMO_MAX_ROWS = 200_000


def _stat_task(args) -> bytes:
    """In a worker (or here): one statistical group of one cycle, packed."""
    name, horizon, group = args
    ctx = _WORKER
    forecast, naive, series = _fit_group(ctx.history, ctx.inputs.items, name, horizon, group)
    return pack_frames({"statistical": forecast, "naive": naive, "series": series})


def _align_task(name: str) -> bytes:
    """In a worker (or here): one cycle's submitted sources at planning grain, in force, packed."""
    ctx = _WORKER
    c = _cycle(ctx, name)
    forecasts = c.submissions[c.submissions["kind"] == "forecast"]
    # The lines go straight in, so only _align holds them and lets go once it has what it needs.
    aligned, warnings = _align(_cycle_lines(ctx, c, "forecast"), forecasts, c.name, ctx.inputs, ctx.history,
                               ctx.spec.mix_window_months)
    return pack_frames({"aligned": aligned, "warnings": pd.DataFrame({"text": warnings}, dtype=object)})


def _cycle(ctx: _Context, name: str) -> CycleInputs:
    return next(c for c in (ctx.inputs.cycle, *ctx.inputs.past) if c.name == name)


def _worker_start() -> None:
    """A forked worker opens its own store connections (the parent's are not shared across processes)."""
    from consensus.store.db import get_engine

    get_engine.cache_clear()


def _new_pool(jobs: int) -> ProcessPoolExecutor:
    """Workers forked from this process, so they read ``_WORKER`` (and ``_WORKER_LEDGER``) as they are now."""
    return ProcessPoolExecutor(max_workers=jobs, mp_context=get_context("fork"), initializer=_worker_start)


def _map_tasks(pool: ProcessPoolExecutor | None, task: Callable, items: list, **kwargs):
    """The task over the items, lazily, in order: here when there is no pool, else in its workers.

    In the workers it does the two things that keep two workers' memory down at 100,000 series.
    Before the fork, the parent's objects are frozen out of the garbage collector
    (gc.freeze): a collection writes to every tracked object's header, which would copy
    the inherited pages into each worker.  After each task, the worker hands what it
    freed back to the system (glibc's malloc_trim), or its heap keeps the high-water
    mark of its largest task.  :func:`_close_pool` unfreezes.
    """
    if pool is None:
        return map(task, items)
    gc.collect()
    gc.freeze()
    return pool.map(partial(_trimmed, task), items, **kwargs)


def _trimmed(task: Callable, args):
    """In a worker: run one task, then give back the memory it freed."""
    try:
        return task(args)
    finally:
        _malloc_trim()


def _malloc_trim() -> None:
    """glibc's malloc_trim(0); nothing where there is no glibc."""
    global _LIBC
    if _LIBC is None:
        try:
            _LIBC = ctypes.CDLL("libc.so.6")
            _LIBC.malloc_trim.argtypes = [ctypes.c_size_t]
        except (OSError, AttributeError):
            _LIBC = False
    if _LIBC:
        _LIBC.malloc_trim(0)


_LIBC = None


def _close_pool(ctx: _Context) -> None:
    """Stop the workers (their memory goes with them) and let the collector see every object again."""
    if ctx.pool is not None:
        ctx.pool.shutdown()
        ctx.pool = None
    gc.unfreeze()


def _prepare(ctx: _Context, cycles: list[CycleInputs]) -> None:
    """Make (or read from the cache) every cycle's statistical and aligned parts, spread over the processes.

    Statistical fits go out as (cycle, group) tasks and alignments as one task
    per cycle; each comes back packed, and a cycle's groups are kept in their
    fixed order, so the numbers do not depend on how many processes ran them.
    Parts are held packed until a cycle is read (:func:`_unpacked`).
    """
    global _WORKER
    _WORKER = ctx
    stat_tasks, align_names = [], []
    for c in cycles:
        for kind, key in (("statistical", _statistical_key(ctx, c)), ("aligned", _aligned_key(ctx, c))):
            if (kind, c.name) in ctx.prepared:
                continue
            found = ctx.cache.get(key)
            if found is not None:
                ctx.prepared[(kind, c.name)] = found
                continue
            if kind == "statistical":
                here = np.unique(ctx.history.groups[ctx.history.months <= periods.month_index(c.name)])
                stat_tasks += [(c.name, c.horizon, int(g)) for g in here]
                if not len(here):
                    ctx.prepared[(kind, c.name)] = pack_frames(_gather_statistical([]))
            else:
                align_names.append(c.name)
            ctx.prepared.setdefault(("key", kind, c.name), key)
    if not stat_tasks and not align_names:
        return
    ctx.progress(f"statistical forecast of {len({t[0] for t in stat_tasks})} cycle(s), alignment of "
                 f"{len(align_names)}")
    pool = ctx.pool if len(stat_tasks) + len(align_names) > 1 else None
    aligned = _map_tasks(pool, _align_task, align_names)
    groups: dict[str, list[bytes]] = {}
    expected = pd.Series([t[0] for t in stat_tasks]).value_counts().to_dict() if stat_tasks else {}
    results = _map_tasks(pool, _stat_task, stat_tasks, chunksize=1)
    for task, packed in zip(stat_tasks, results):
        groups.setdefault(task[0], []).append(packed)
        if len(groups[task[0]]) == expected[task[0]]:  # the cycle's last group: assemble it, keep it packed
            parts = [unpack_frames(p) for p in groups.pop(task[0])]
            made = pack_frames(_gather_statistical([(p["statistical"], p["naive"], p["series"]) for p in parts]))
            ctx.prepared[("statistical", task[0])] = made
            ctx.cache.put(ctx.prepared[("key", "statistical", task[0])], kind="statistical", cycle=task[0],
                          content=made)
            ctx.made.append(task[0])
            del parts
            _malloc_trim()  # the parent too: the unpacked groups are gone, their pages need not stay
    for name, made in zip(align_names, aligned):
        ctx.prepared[("aligned", name)] = made
        ctx.cache.put(ctx.prepared[("key", "aligned", name)], kind="aligned", cycle=name, content=made)


def _score_task(args) -> tuple[dict, list[str], bytes | None]:
    """In a worker (or here): one past cycle's sources scored against the orders that came (a ledger state)."""
    name, frame, published, warnings, made = _scoring_frame(args)
    return _WORKER_LEDGER.score_cycle(name, frame, bands=published), warnings, made


#: Rows of past-cycle frames scored in one pass in this process (a small catalogue's twelve cycles are ~200,000;
#: one cycle of 100,000 series is several million, so it is a pass of its own).
SCORE_PASS_MAX_ROWS = 1_000_000


def _score_here(ledger: hist.HistoryLedger, tasks: list) -> list[tuple[list[str], bytes | None]]:
    """Here: past cycles scored into ``ledger`` a few at a time, in order (the digits of one by one).

    Cycles go into one pass until their frames reach :data:`SCORE_PASS_MAX_ROWS`, so a small catalogue pays the
    per-call overhead once per pass while a large one's memory stays one cycle's; each pass adds to the ledger's
    running sums cycle by cycle, as merging one cycle's state after another would.  Returns each cycle's
    (warnings, packed frame to keep).
    """
    kept, waiting, rows = [], [], 0
    for i, args in enumerate(tasks):
        name, frame, published, warnings, made = _scoring_frame(args)
        waiting.append((name, frame, published))
        kept.append((warnings, made))
        rows += len(frame)
        del frame, published  # held by ``waiting`` alone, so a pass lets go of its frames as it ends
        if rows >= SCORE_PASS_MAX_ROWS or i == len(tasks) - 1:
            ledger.add_cycles(waiting)
            waiting, rows = [], 0
    return kept


def _scoring_frame(args) -> tuple[str, pd.DataFrame, pd.DataFrame | None, list[str], bytes | None]:
    """One past cycle's scored frame (every source and its published plan, months up to this cycle).

    The cycle's frame comes packed from the cache, or is made from its statistical and aligned parts and
    handed back packed (when small enough to keep) with the warnings making it gave.
    """
    name, frame_packed, stat, aligned = args
    ctx = _WORKER
    c = _cycle(ctx, name)
    made = None
    if frame_packed is not None:
        found = unpack_frames(frame_packed)
        frame, warnings = found["frame"], found["warnings"]["text"].tolist()
    else:
        ctx.prepared[("statistical", name)] = stat
        ctx.prepared[("aligned", name)] = aligned
        before = len(ctx.warnings)
        frame, _ = cycle_frame(ctx, c, keep=False)
        warnings = ctx.warnings[before:]
        del ctx.warnings[before:]
        if len(frame) <= FRAME_MEMO_MAX_ROWS:
            made = pack_frames({"frame": frame, "warnings": pd.DataFrame({"text": warnings}, dtype=object)})
    cycle = ctx.inputs.cycle.name
    frame = frame[frame["period"] <= cycle]
    published = None
    if c.published is not None and len(c.published):
        published = c.published[c.published["period"] <= cycle]
        frame = pd.concat([frame, published[["item", "location", "period", "consensus"]]
                           .rename(columns={"consensus": "quantity"}).assign(source="consensus")], ignore_index=True)
    return name, frame, published, warnings, made


def _unpacked(ctx: _Context, kind: str, c: CycleInputs, *, keep: bool = True) -> dict[str, pd.DataFrame]:
    if (kind, c.name) not in ctx.prepared:
        _prepare(ctx, [c])
    content = ctx.prepared[(kind, c.name)] if keep else ctx.prepared.pop((kind, c.name))
    return unpack_frames(content)


def _statistical(ctx: _Context, c: CycleInputs, *, keep: bool = True) -> dict[str, pd.DataFrame]:
    return _unpacked(ctx, "statistical", c, keep=keep)


def _human_sources(ctx: _Context, c: CycleInputs, *, keep: bool = True) -> pd.DataFrame:
    """A cycle's submitted sources at planning grain, in force; cached under everything they read."""
    found = _unpacked(ctx, "aligned", c, keep=keep)
    ctx.warnings += found["warnings"]["text"].tolist()
    return found["aligned"]


def _align(lines: pd.DataFrame, forecasts: pd.DataFrame, cycle: str, inputs: PlanInputs, history: _History,
           mix_window: int, *, with_traces: bool = False):
    empty = pd.DataFrame({c: pd.Series(dtype=float if c == "quantity" else object) for c in cs.ALIGNED_COLUMNS})
    if lines.empty:
        return (empty, [], None) if with_traces else (empty, [])
    lines, dropped = _known_lines(lines, inputs.items, inputs.locations)
    warnings = []
    if dropped:
        warnings.append(f"cycle {cycle}: {dropped:,} submitted row(s) name items, families, locations or regions "
                        "no longer in the master data; they are left out")
    known = history.known_at(cycle)
    known = known[known["quantity"].notna() & known["item"].isin(set(inputs.items["item"])) &
                  known["location"].isin(set(inputs.locations["location"]))]

    def mix(levels):
        return historical_mix(known, items=inputs.items, locations=inputs.locations, cycle=cycle,
                              window_months=mix_window, levels=levels)

    per_submission, align_warnings, traces = cs.align_submissions(
        lines, cycle=cycle, items=inputs.items, locations=inputs.locations, mix=mix, with_traces=with_traces)
    covered = cs.declared_cells(forecasts, items=inputs.items, locations=inputs.locations)
    aligned = cs.sources_in_force(per_submission, covered)
    warnings += align_warnings
    if with_traces:
        return aligned, warnings, (traces, per_submission, covered)
    return aligned, warnings


def _events(ctx: _Context, c: CycleInputs) -> pd.DataFrame:
    lines = _cycle_lines(ctx, c, "events")
    if lines.empty:
        return lines
    lines, _ = _known_lines(lines, ctx.inputs.items, ctx.inputs.locations)
    return cs.events_in_force(lines, c.submissions[c.submissions["kind"] == "events"])


def cycle_frame(ctx: _Context, c: CycleInputs, *, keep: bool = True) -> tuple[pd.DataFrame, dict[str, pd.DataFrame]]:
    """[source, item, location, period, lag, quantity] of every source of one cycle, and its statistical parts.

    ``keep=False`` lets go of the cycle's prepared parts once read (a past cycle is read once).
    """
    stat = _statistical(ctx, c, keep=keep)
    human = _human_sources(ctx, c, keep=keep)
    horizon = set(periods.horizon_months(c.name, c.horizon))
    human = human[human["period"].isin(horizon)]
    statistical = stat["statistical"]
    # A cell that only people forecast (an item with no orders yet) gets a statistical forecast of 0.
    known = pd.MultiIndex.from_frame(statistical[["item", "location", "period"]])
    cells = human[["item", "location", "period"]].drop_duplicates()
    new = cells[~pd.MultiIndex.from_frame(cells).isin(known)]
    if len(new):
        statistical = pd.concat([statistical, new.assign(quantity=0.0)], ignore_index=True).sort_values(
            ["item", "location", "period"], kind="mergesort", ignore_index=True)
    with_events, event_warnings = cs.apply_events(statistical, _events(ctx, c), items=ctx.inputs.items,
                                                     locations=ctx.inputs.locations)
    ctx.warnings += [f"cycle {c.name}: {w}" for w in event_warnings]
    frame = pd.concat([human, with_events, stat["naive"].assign(source=cs.NAIVE)[cs.ALIGNED_COLUMNS]],
                      ignore_index=True)
    frame = frame[frame["period"].isin(horizon)]
    frame = frame.assign(lag=month_indexes_factorized(frame["period"]) - periods.month_index(c.name))
    return frame.reset_index(drop=True), stat


# --------------------------------------------------------------------------- the run


def _history_key(ctx: _Context) -> str:
    """Everything the history summary reads: every past cycle's inputs and published plan, the orders, the
    master data, the settings that shape it, and the current cycle's statistical key (its demand patterns)."""
    inputs, spec = ctx.inputs, ctx.spec
    past_keys = []
    for c in inputs.past:
        forecasts = c.submissions[["seq", "kind", "source", "lines_sha256"]].astype(str).values.tolist()
        past_keys.append([c.name, c.horizon, forecasts, [str(d) for d in c.submissions["scope_detail"]],
                          frame_digest(c.published) if c.published is not None else None])
    return digest_of("history", METHOD_VERSION, inputs.cycle.name, past_keys, ctx.history.digest_at(inputs.cycle.name),
                     ctx.master, spec.mix_window_months, spec.weights.segment,
                     spec.reconciliation != "bottom_up", list(spec.band_levels), spec.band_rule,
                     _statistical_key(ctx, inputs.cycle))


def _history_summary(ctx: _Context, patterns: pd.DataFrame, key: str,
                     found: bytes | None) -> hist.HistorySummary:
    inputs, spec = ctx.inputs, ctx.spec
    cycle = inputs.cycle.name
    keep_cells = spec.reconciliation != "bottom_up"
    if found is not None:
        return hist.HistorySummary.from_frames(unpack_frames(found))
    book = hist.build_series_book(ctx.history.actuals[ctx.history.actuals["quantity"].notna()], items=inputs.items,
                                  locations=inputs.locations, cycle=cycle, unknown_months=ctx.history.unknown,
                                  unknown_at=ctx.history.unknown_at,
                                  patterns=patterns)
    ledger = hist.HistoryLedger(book=book, cycle=cycle, segment=spec.weights.segment,
                                sources=tuple(scored_sources()), keep_cells=keep_cells,
                                band_levels=spec.band_levels, band_rule=spec.band_rule)
    global _WORKER_LEDGER
    _WORKER_LEDGER = ledger
    frames = _past_frames(ctx)
    _prepare(ctx, [c for c in inputs.past if c.name not in frames])
    tasks = [(c.name, frames.get(c.name), ctx.prepared.pop(("statistical", c.name), None),
              ctx.prepared.pop(("aligned", c.name), None)) for c in inputs.past]
    if tasks:
        ctx.progress(f"score {len(tasks)} past cycle(s)")
    pool = None
    if ctx.pool is not None and len(tasks) > 1:  # forked again, so the workers see the ledger
        jobs = ctx.pool._max_workers
        _close_pool(ctx)
        pool = ctx.pool = _new_pool(jobs)
        _malloc_trim()
    if pool is None:
        kept = _score_here(ledger, tasks)
    else:
        kept = []
        for state, warnings, made in _map_tasks(pool, _score_task, tasks):  # merged in cycle order
            ledger.merge(state)
            kept.append((warnings, made))
    for c, (warnings, made) in zip(inputs.past, kept):
        ctx.warnings += warnings
        if made is not None:
            ctx.cache.put(_frame_key(ctx, c), kind="frame", cycle=c.name, content=made, durable=False)
    _WORKER_LEDGER = None
    _close_pool(ctx)  # no later step uses the workers: let go of their memory now
    summary = ledger.summary()
    ctx.cache.put(key, kind="history", cycle=cycle, content=pack_frames(summary.frames()))
    return summary


def _past_frames(ctx: _Context) -> dict[str, bytes]:
    """The past cycles' scoring frames the cache holds, packed, by cycle (looked up once per run)."""
    if "frames" not in ctx.prepared:
        found = {c.name: ctx.cache.get(_frame_key(ctx, c)) for c in ctx.inputs.past}
        ctx.prepared["frames"] = {name: content for name, content in found.items() if content is not None}
    return ctx.prepared["frames"]


def compute_plan(inputs: PlanInputs, spec: RunSpec | None = None, *, cache: Cache | None = None, jobs: int = 1,
                 progress: Callable[[str], None] | None = None) -> PlanResult:
    """The plan of ``inputs.cycle``: see the module docstring."""
    spec = spec or RunSpec()
    if not isinstance(spec, RunSpec):
        raise InvalidSpec("spec must be a RunSpec")
    if not isinstance(jobs, int) or jobs < 1:
        raise InvalidSpec(f"jobs must be a whole number ≥ 1, got {jobs!r}")
    global _WORKER
    series_count = inputs.actuals[["item", "location"]].drop_duplicates().shape[0] if len(inputs.actuals) else 0
    ctx = _Context(inputs=inputs, spec=spec,
                   history=_history(inputs.actuals, inputs.unknown_months, inputs.items, inputs.unknown_at),
                   cache=cache or NoCache(), pool=None, progress=progress or (lambda _m: None))
    _WORKER = ctx  # set before the pool starts: forked workers read it
    if jobs > 1 and series_count >= PARALLEL_MIN_SERIES:
        ctx.pool = _new_pool(jobs)
    try:
        return _compute(ctx)
    finally:
        _close_pool(ctx)
        _WORKER = None


def _compute(ctx: _Context) -> PlanResult:
    inputs, spec = ctx.inputs, ctx.spec
    cycle = inputs.cycle
    history_key = _history_key(ctx)
    history_found = ctx.cache.get(history_key)
    to_make = [] if history_found is not None else [c for c in inputs.past if c.name not in _past_frames(ctx)]
    _prepare(ctx, [cycle, *to_make])  # all at once: in parallel
    current, stat = cycle_frame(ctx, cycle)
    in_cycle = set(current["source"].unique())
    present = [s for s in combined_sources() if s in in_cycle]
    combined_rows = current[current["source"].isin(present)]
    if combined_rows.empty:
        raise InvalidSpec(f"cycle {cycle.name} has no forecast from any source and no order history")
    summary = _history_summary(ctx, stat["series"][["item", "location", "pattern"]]
                               if "pattern" in stat["series"] else pd.DataFrame(columns=["item", "location",
                                                                                         "pattern"]),
                               history_key, history_found)
    ctx.progress("weights")
    segments = _segments(spec.weights.segment, inputs.items, inputs.locations)
    bias, corrected_rows = _corrected_sources(summary, combined_rows, cycle.name, segments, present, inputs, spec)
    weights = _weights(summary, cycle.name, segments, present, spec)
    combined = combine_sources(corrected_rows, weights, items=inputs.items, locations=inputs.locations,
                               spec=spec.weights, audit=False)
    table = combined.consensus
    reconciled = reconcile_hierarchy(table, corrected_rows, summary.cell_errors if summary.cell_errors is not None
                                     else _no_errors(), items=inputs.items, locations=inputs.locations,
                                     method=spec.reconciliation, weight_spec=spec.weights, cycle=cycle.name,
                                     actuals=inputs.actuals[inputs.actuals["quantity"].notna()])
    table = reconciled.consensus
    ctx.progress("error bands")
    bands = band_columns(spec.band_levels)
    table = apply_bands(table, summary.band_table, levels=spec.band_levels) if len(summary.band_table) else \
        table.assign(**{c: np.nan for c in bands}, band_method="no error history yet")
    table, applied = apply_decisions(table, inputs.decisions, items=inputs.items, locations=inputs.locations,
                                     band_columns=bands)
    for column in ["consensus", *bands]:
        table[column] = np.round(table[column].astype(float), PLAN_DECIMALS) + 0.0
    cells = _cells_part(table, combined_rows, present, bands)
    record = _level_errors(summary, weights, cycle.name, segments, present, spec)
    level_bands = stored_level_bands(cells, {level: errors for level, (errors, _) in record.items()},
                                     items=inputs.items, cycle=cycle.name, levels=spec.band_levels,
                                     basis={level: basis for level, (_, basis) in record.items()})
    for column in ["consensus", *bands]:
        level_bands[column] = np.round(level_bands[column].astype(float), PLAN_DECIMALS) + 0.0
    components = component_totals(explode_bom(cells.rename(columns={"consensus": "quantity"})[
        ["item", "period", "quantity"]], inputs.bom)) if len(inputs.bom) else pd.DataFrame(
        columns=["component", "period", "quantity"])
    parts = {"cells": cells, "weights": combined.weights, "series": stat["series"], "components": components,
             "band_table": summary.band_table, "bias": bias, "level_bands": level_bands}
    parts.update(scoring.scorecards(summary, items=inputs.items, locations=inputs.locations,
                                    actuals=ctx.history.known_at(cycle.name)))
    parts["amplification"] = _amplification(summary, current, cycle, ctx.history, inputs.locations)
    notes = {"warnings": list(dict.fromkeys(ctx.warnings)), "decisions_applied": applied,
             "reconciliation": reconciled.notes, "statistical_made": ctx.made, "band_source": summary.band_source,
             "unknown_months": list(inputs.unknown_months), "unknown_at": [list(p) for p in inputs.unknown_at],
             "method_version": METHOD_VERSION,
             "bias_correction": _bias_notes(bias, spec.weights.segment)}
    summary_line = {"cells": int(len(cells)), "total": float(cells["consensus"].sum()), "sources": present,
                    "flagged": int(cells["flagged"].sum())}
    return PlanResult(parts=parts, notes=notes, summary=summary_line)


def _corrected_sources(summary: hist.HistorySummary, rows: pd.DataFrame, cycle: str, segments: list, present: list,
                       inputs: PlanInputs, spec: RunSpec) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The bias table of every (segment, lag bucket, source) and the rows to combine, persistent biases corrected."""
    bias = persistent_bias(summary.cell_sums, cycle=cycle, window_cycles=spec.weights.window_cycles,
                           segments=segments, sources=present, spec=spec.bias)
    segment_of = assign_segments(rows, segment=spec.weights.segment, items=inputs.items, locations=inputs.locations)
    corrected = correct_sources(rows, bias, segment_of=segment_of).drop(columns="bias_factor")
    return bias, corrected


def _weights(summary: hist.HistorySummary, cycle: str, segments: list, present: list,
             spec: RunSpec) -> pd.DataFrame:
    """Source weights from the errors RunSpec.weights_from names (segment totals after correction, or cells)."""
    if spec.weights_from == "segment_totals":
        window = spec.weights.window_cycles
        known = factors_as_known(summary.cell_sums, cycle=cycle, window_cycles=window, segments=segments,
                                 sources=present, spec=spec.bias)
        sums = segment_weight_sums(summary.cell_sums, known, cycle=cycle, window_cycles=window, sources=present)
    else:
        sums = summary.weight_sums()
    return estimate_weights_from_sums(sums, cycle=cycle, segments=segments, spec=spec.weights, sources=present)


def _level_errors(summary: hist.HistorySummary, weights: pd.DataFrame, cycle: str, segments: list, present: list,
                  spec: RunSpec) -> dict[str, tuple[pd.DataFrame | None, str]]:
    """The family and total errors the level bands read: the published plans' (while few, with the combination's)."""
    if spec.weights.segment != "family":  # the sources' family totals are weighed with family weights only
        return level_band_errors(summary.node_errors, None)
    factors = factors_as_known(summary.cell_sums, cycle=cycle, window_cycles=spec.weights.window_cycles,
                               segments=segments, sources=present, spec=spec.bias)
    return level_band_errors(summary.node_errors, weights, factors)


def _bias_notes(bias: pd.DataFrame, segment: str) -> list[str]:
    """One line per corrected (segment, lag bucket, source), for the run's notes."""
    on = bias[bias["persistent"]]
    return [f"{r.source}, {segment} {r.segment}, lag {r.lag_bucket}: {r.note}" for r in on.itertuples(index=False)]


#: Fewest months of implied orders an item × DC needs before its variance counts (a stated choice: a
#: variance from fewer months says little; the measure's own default asks for a year).
AMPLIFICATION_MIN_MONTHS = 6


def _amplification(summary: hist.HistorySummary, current: pd.DataFrame, cycle: CycleInputs, history: _History,
                   locations: pd.DataFrame) -> pd.DataFrame:
    """Order amplification by DC from the DCs' own successive forecasts (see consensus.methods.amplification)."""
    from consensus.methods.amplification import measure_amplification

    past = summary.dc_forecasts if summary.dc_forecasts is not None else pd.DataFrame()
    now = current[(current["source"] == "dc") & (current["lag"] <= hist.MAX_LEAD_TIME_MONTHS)]
    dc = pd.concat([past, now[["item", "location", "period", "quantity"]].assign(cycle=cycle.name)],
                   ignore_index=True)
    known = history.known_at(cycle.name)
    if not dc.empty:
        dc = dc.assign(lag=periods.lags(dc["cycle"], dc["period"]))
    else:
        dc = pd.DataFrame({c: pd.Series(dtype=float if c == "quantity" else object)
                           for c in ["cycle", "item", "location", "period", "lag", "quantity"]})
    table = measure_amplification(dc, known[known["quantity"].notna()], locations=locations,
                                  min_months=AMPLIFICATION_MIN_MONTHS)
    return table.assign(min_months=AMPLIFICATION_MIN_MONTHS)  # the rule the run used, with the figures


def _no_errors() -> pd.DataFrame:
    return pd.DataFrame({c: pd.Series(dtype=float if c in ("forecast", "actual", "error") else object)
                         for c in ["source", "cycle", "item", "location", "period", "lag", "lag_bucket", "forecast",
                                   "actual", "error"]})


def _segments(segment: str, items: pd.DataFrame, locations: pd.DataFrame) -> list:
    if segment == "all":
        return ["all"]
    if segment == "item":
        return sorted(items["item"].astype(str))
    if segment == "family":
        return sorted(items["family"].astype(str).unique())
    return sorted(locations["region"].astype(str).unique())


#: The cell columns a run stores (the source values ride along, one column per combined source).
CELL_COLUMNS = ["item", "location", "period", "consensus", "band_method", "combined", "reconciliation_adjustment",
                "before_override", "n_sources", "missing_sources", "spread", "spread_ratio", "flagged"]


def _cells_part(table: pd.DataFrame, rows: pd.DataFrame, present: list[str], bands: list[str]) -> pd.DataFrame:
    """The stored cells: the plan, its bands, how it was reached, and each combined source's value."""
    out = table.rename(columns={"before_reconciliation": "combined"})
    out = out[[c for c in CELL_COLUMNS[:4]] + bands + CELL_COLUMNS[4:]].copy()
    out["combined"] = np.round(out["combined"].astype(float), cs.QUANTITY_DECIMALS) + 0.0
    out["reconciliation_adjustment"] = np.round(out["reconciliation_adjustment"].astype(float),
                                                cs.QUANTITY_DECIMALS) + 0.0
    out["spread"] = np.round(out["spread"].astype(float), cs.QUANTITY_DECIMALS) + 0.0
    out["spread_ratio"] = np.round(out["spread_ratio"].astype(float), cs.QUANTITY_DECIMALS) + 0.0
    out["n_sources"] = out["n_sources"].astype(np.int8)
    out["flagged"] = out["flagged"].astype(bool)
    out = out.sort_values(["item", "location", "period"], kind="mergesort", ignore_index=True)
    cell_index = pd.MultiIndex.from_frame(out[["item", "location", "period"]].astype(object))
    for source in present:
        mine = rows[rows["source"] == source]
        values = np.full(len(out), np.nan)
        where = cell_index.get_indexer(pd.MultiIndex.from_frame(mine[["item", "location", "period"]].astype(object)))
        values[where[where >= 0]] = mine["quantity"].to_numpy(float)[where >= 0]
        out[f"value_{source}"] = values
    return out


# --------------------------------------------------------------------------- the trail of one cell


def trace_cell(inputs: PlanInputs, spec: RunSpec, *, item: str, location: str, period: str) -> pd.DataFrame:
    """How each submitted row reached one cell of the current cycle, and which submission is in force there.

    Recomputed from the stored inputs with the run's own alignment, for the
    rows that can reach the cell (its item or family, its location or region,
    or all).  Returns TRACE_COLUMNS of :mod:`consensus.methods.cycle_sources`
    and ``in_force`` (the row belongs to the submission whose value the run used).
    """
    c = inputs.cycle
    items, locations = inputs.items, inputs.locations
    family = items.loc[items["item"] == item, "family"]
    region = locations.loc[locations["location"] == location, "region"]
    ctx = _Context(inputs=inputs, spec=spec,
                   history=_history(inputs.actuals, inputs.unknown_months, items, inputs.unknown_at),
                   cache=NoCache(), pool=None, progress=lambda _m: None)
    lines = _cycle_lines(ctx, c, "forecast")
    columns = cs.TRACE_COLUMNS + ["in_force"]
    if lines.empty or family.empty or region.empty:
        return pd.DataFrame(columns=columns)
    lines = cs._for_columns(lines)
    product = (lines["item"] == item) | (lines["item"].isna() & (lines["family"].isna() |
                                                                 (lines["family"] == family.iloc[0])))
    place = (lines["location"] == location) | (lines["location"].isna() & (lines["region"].isna() |
                                                                           (lines["region"] == region.iloc[0])))
    forecasts = c.submissions[c.submissions["kind"] == "forecast"]
    aligned, _, (traces, per_submission, covered) = _align(lines[product & place], forecasts, c.name, inputs,
                                                           ctx.history, spec.mix_window_months, with_traces=True)
    at_cell = lambda f: f[(f["item"] == item) & (f["location"] == location) & (f["period"] == period)]  # noqa: E731
    mine = at_cell(traces)
    candidates = pd.concat([at_cell(per_submission)[["seq", "source"]], at_cell(covered)[["seq", "source"]]])
    winners = candidates.groupby("source")["seq"].max()
    mine = mine.assign(in_force=mine["seq"].to_numpy() == mine["source"].map(winners).to_numpy())
    return mine.sort_values(["source", "seq", "row"], kind="mergesort")[columns].reset_index(drop=True)


def current_sources(inputs: PlanInputs, spec: RunSpec | None = None) -> pd.DataFrame:
    """Every source of the current cycle at planning grain, as the run would combine them (nothing cached)."""
    spec = spec or RunSpec()
    ctx = _Context(inputs=inputs, spec=spec, history=_history(inputs.actuals, inputs.unknown_months,
                                                              inputs.items, inputs.unknown_at),
                   cache=NoCache(), pool=None, progress=lambda _m: None)
    frame, _ = cycle_frame(ctx, inputs.cycle)
    return frame
