"""Bring submitted numbers to the planning grain: item × location × month, in units.

Sources speak at different grains.  Sales plans families and regions, the
distribution centres plan items at locations and sometimes ISO weeks, finance
plans money.  This module turns each of them into item × location × month
quantities with three pure steps, each of which keeps the caller's ``row_id``
so an audit can say which submitted row touched which cell and by what share:

* :func:`spread_weeks` puts ISO weeks into months by calendar days
  (:func:`week_month_shares`);
* :func:`value_to_units` divides money by the unit price, or for a group by
  the mix-weighted average price of the group;
* :func:`split_to_grain` splits group numbers over item × location pairs by
  the historical mix (:func:`historical_mix`).

Mix levels are named ``"<item side>×<location side>"`` with the item side one
of item, family, all and the location side one of location, region, all; the
mix covers every level but item × location itself (whose share is 1).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import sparse

from consensus import periods
from consensus.errors import InvalidSpec

ITEM_SIDES = ("item", "family", "all")
LOCATION_SIDES = ("location", "region", "all")
#: Every group level a mix is measured at: all pairs of sides except the planning grain itself.
MIX_LEVELS: tuple[tuple[str, str], ...] = tuple(
    (i, l) for i in ITEM_SIDES for l in LOCATION_SIDES if (i, l) != ("item", "location")
)
ALL = "all"
#: Smallest shift of a month's mix from the year's (total-variation distance) that counts as seasonal.
MIN_SEASONAL_SHIFT = 0.10
SEASONAL_YEARS = 2
#: How much more the month-of-year pattern must explain than year-to-year noise would.
SEASONAL_VARIANCE_RATIO = 4.0

MIX_COLUMNS = ["level", "group_item", "group_location", "item", "location", "month_of_year", "share", "basis",
               "imputed"]
#: The share basis of a row given at item × location: its own pair, share 1.
GIVEN_AT_PAIR = "given at item × location"
GRAIN_COLUMNS = ["row_id", "item", "location", "period", "quantity", "share", "share_basis"]

_WEEK_PATTERN = r"^(\d{4})-W(\d{2})$"
_DAY = np.timedelta64(1, "D")


def level_name(item_side: str, location_side: str) -> str:
    """The label of a mix level, e.g. ``"family×region"``."""
    return f"{item_side}×{location_side}"


# ---------------------------------------------------------------------------
# ISO weeks into months
# ---------------------------------------------------------------------------

def _week1_mondays(years: np.ndarray) -> np.ndarray:
    """Monday of ISO week 1 of each year: the Monday on or before 4 January (ISO 8601)."""
    jan4 = (years - 1970).astype("datetime64[Y]").astype("datetime64[D]") + 3 * _DAY
    # 1970-01-01 was a Thursday, so (days + 3) % 7 is the weekday with Monday = 0.
    weekday = (jan4.astype(np.int64) + 3) % 7
    return jan4 - weekday * _DAY


def iso_week_mondays(weeks: pd.Series) -> np.ndarray:
    """The Monday (datetime64[D]) that starts each ISO week "YYYY-Www"; ValueError for a malformed or absent week."""
    text = pd.Series(weeks, dtype="string").str.strip()
    parts = text.str.extract(_WEEK_PATTERN)
    malformed = parts.isna().any(axis=1).to_numpy()
    if malformed.any():
        bad = text[malformed].astype(object).unique()[:5].tolist()
        raise ValueError(f"not ISO weeks in YYYY-Www form: {bad}")
    years = parts[0].astype(int).to_numpy()
    numbers = parts[1].astype(int).to_numpy()
    first = _week1_mondays(years)
    weeks_in_year = (_week1_mondays(years + 1) - first).astype(np.int64) // 7
    absent = (numbers < 1) | (numbers > weeks_in_year)
    if absent.any():
        bad = text[absent].astype(object).unique()[:5].tolist()
        raise ValueError(f"ISO weeks that do not exist (a year has 52 or 53): {bad}")
    return first + (numbers - 1) * 7 * _DAY


def week_month_shares(weeks: pd.Series) -> pd.DataFrame:
    """Share of each ISO week's seven days falling in each calendar month.

    Returns [week, period, share], one row per distinct week and month it
    touches (one or two months); shares of a week sum to 1.  Week 1 of an ISO
    year is the week holding 4 January and weeks start on Monday (ISO 8601).
    """
    distinct = pd.Series(pd.unique(pd.Series(weeks, dtype="string").str.strip().to_numpy()), dtype="string")
    mondays = iso_week_mondays(distinct)
    first_month = mondays.astype("datetime64[M]")
    last_month = (mondays + 6 * _DAY).astype("datetime64[M]")
    crosses = last_month != first_month
    days_first = np.where(crosses, (last_month.astype("datetime64[D]") - mondays).astype(np.int64), 7)
    frame = pd.DataFrame({
        "week": np.concatenate([distinct.to_numpy(), distinct.to_numpy()[crosses]]),
        "period": np.concatenate([np.datetime_as_string(first_month, unit="M"),
                                  np.datetime_as_string(last_month[crosses], unit="M")]),
        "share": np.concatenate([days_first / 7.0, (7 - days_first[crosses]) / 7.0]),
        "_order": np.concatenate([np.arange(len(distinct)), np.flatnonzero(crosses)]),
    })
    frame = frame.sort_values(["_order", "period"], kind="stable").drop(columns="_order")
    return frame.reset_index(drop=True)


def spread_weeks(rows: pd.DataFrame) -> pd.DataFrame:
    """Weekly rows into monthly rows, each quantity and value multiplied by the week's share of the month.

    ``rows`` carry ``row_id``, ``week`` ("YYYY-Www") and ``quantity`` and/or
    ``value``; every other column rides along.  A row whose ``week`` is empty
    but which has a ``period`` passes through with ``week_share`` 1.  The
    result has ``period`` and ``week_share`` and one row per row × month the
    week touches, so Σ over a ``row_id`` returns the row's number.
    """
    if "row_id" not in rows.columns:
        raise ValueError("rows need a row_id column so every monthly row can be traced to its source row")
    if "week" not in rows.columns:
        raise ValueError("rows need a week column (ISO week, YYYY-Www)")
    amounts = [c for c in ("quantity", "value") if c in rows.columns]
    if not amounts:
        raise ValueError("rows need a quantity or a value column")
    weekly_mask = rows["week"].notna().to_numpy()
    if not weekly_mask.all() and "period" not in rows.columns:
        raise ValueError("rows without a week need a period")
    weekly = rows.loc[weekly_mask].drop(columns=["period"], errors="ignore")
    weekly = weekly.assign(_week_key=weekly["week"].astype("string").str.strip())
    shares = week_month_shares(weekly["_week_key"]).rename(columns={"week": "_week_key", "share": "week_share"})
    spread = weekly.merge(shares, on="_week_key", how="left", sort=False).drop(columns="_week_key")
    for column in amounts:
        spread[column] = spread[column].astype(float) * spread["week_share"].to_numpy()
    monthly = rows.loc[~weekly_mask].assign(week_share=1.0)
    out = pd.concat([spread, monthly], ignore_index=True) if len(monthly) else spread.reset_index(drop=True)
    return out


# ---------------------------------------------------------------------------
# Historical mix
# ---------------------------------------------------------------------------

def _side_keys(pairs: pd.DataFrame, item_side: str, location_side: str) -> tuple[pd.Series, pd.Series]:
    group_item = pairs[item_side].astype(object) if item_side != ALL else pd.Series(ALL, index=pairs.index, dtype=object)
    group_location = (pairs[location_side].astype(object) if location_side != ALL
                      else pd.Series(ALL, index=pairs.index, dtype=object))
    return group_item, group_location


def _describe_group(item_side: str, location_side: str, group_item: pd.Series, group_location: pd.Series) -> pd.Series:
    index = group_item.index
    left = (pd.Series("all items", index=index, dtype=object) if item_side == ALL
            else item_side + " " + group_item.astype(str))
    right = "all locations" if location_side == ALL else location_side + " " + group_location.astype(str)
    return (left + " × " + right).astype(object)


def _check_known(frame: pd.DataFrame, column: str, known: pd.Series, what: str) -> None:
    values = frame[column].dropna()
    unknown = values[~values.isin(known)]
    if len(unknown):
        raise ValueError(f"{what} not in the master: {sorted(map(str, unknown.unique()))[:5]}")


def _check_masters(items: pd.DataFrame, locations: pd.DataFrame) -> None:
    for frame, cols, name in ((items, ["item", "family"], "items"), (locations, ["location", "region"], "locations")):
        missing = [c for c in cols if c not in frame.columns]
        if missing:
            raise ValueError(f"{name} master lacks columns {missing}")


def _planning_pairs(window: pd.DataFrame, *, items: pd.DataFrame, locations: pd.DataFrame,
                    pairs: pd.DataFrame | None) -> pd.DataFrame:
    """The item × location pairs a mix covers, with family, region and whether each has history."""
    seen = window[["item", "location"]].drop_duplicates()
    universe = [seen]
    if pairs is not None:
        universe.append(pairs[["item", "location"]])
    # Items with no history land where their family sold in the window (or everywhere for a new family).
    family_of = items.set_index("item")["family"]
    unseen_items = items.loc[~items["item"].isin(seen["item"]), ["item", "family"]]
    if len(unseen_items):
        family_locations = seen.assign(family=seen["item"].map(family_of))[["family", "location"]].drop_duplicates()
        placed = unseen_items.merge(family_locations, on="family", how="inner")
        homeless = unseen_items[~unseen_items["family"].isin(family_locations["family"])]
        everywhere = homeless.merge(locations[["location"]], how="cross")
        universe += [placed[["item", "location"]], everywhere[["item", "location"]]]
    out = pd.concat(universe, ignore_index=True).drop_duplicates().reset_index(drop=True)
    out = out.astype({"item": object, "location": object})
    out["family"] = out["item"].map(family_of).astype(object)
    out["region"] = out["location"].map(locations.set_index("location")["region"]).astype(object)
    keys = pd.MultiIndex.from_frame(seen.astype(object))
    out["has_history"] = pd.MultiIndex.from_frame(out[["item", "location"]]).isin(keys)
    return out.sort_values(["family", "item", "region", "location"], kind="stable").reset_index(drop=True)


def _impute_missing(quantities: np.ndarray, pairs: pd.DataFrame) -> np.ndarray:
    """Fill pairs with no history with their family's average quantity per item at that location.

    Falls back to the family's average per item × location anywhere, then to
    the overall average pair; keeps pairs with history untouched.
    """
    has = pairs["has_history"].to_numpy()
    if has.all():
        return quantities
    filled = quantities.copy()
    columns = range(quantities.shape[1])
    known = pd.DataFrame(quantities[has], columns=columns)
    known["family"] = pairs.loc[has, "family"].to_numpy()
    known["location"] = pairs.loc[has, "location"].to_numpy()
    missing = pairs.loc[~has, ["family", "location"]].reset_index(drop=True)
    by_family_location = known.groupby(["family", "location"])[list(columns)].mean()
    by_family = known.groupby("family")[list(columns)].mean()
    overall = known[list(columns)].mean().to_numpy() if has.any() else np.ones(quantities.shape[1])
    first = by_family_location.reindex(pd.MultiIndex.from_frame(missing)).to_numpy()
    second = by_family.reindex(missing["family"]).to_numpy()
    value = np.where(np.isnan(first), second, first)
    value = np.where(np.isnan(value), overall[None, :], value)
    filled[~has] = value
    return filled


def _group_indicator(codes: np.ndarray, n_groups: int) -> sparse.csr_matrix:
    n = len(codes)
    return sparse.csr_matrix((np.ones(n), (codes, np.arange(n))), shape=(n_groups, n))


def _seasonal_groups(real: np.ndarray, codes: np.ndarray, n_groups: int, *, min_shift: float) -> np.ndarray:
    """Which groups have a material, repeating month-of-year mix.

    ``real`` is pairs × (Y years × 12) quantities in calendar order.  With
    s[i,y,m] a pair's share of its group in month m of year y, f[i] its share
    over the whole span and p[i,m] its share in month m pooled over years, a
    group is seasonal when every month has sales in every year and

        max_m ½ Σ_i |p[i,m] − f[i]|  ≥  min_shift          (material), and
        Σ_{i,m} (p[i,m] − f[i])²  ≥  4 · Σ_{i,m,y} (s[i,y+1,m] − s[i,y,m])² / (2Y)   (repeating).

    The first says the most distinctive month moves the mix by at least
    ``min_shift`` of total-variation distance.  The second is a variance
    ratio: if shares only wobbled independently from year to year with
    variance σ², the pooled month shares would scatter around f with variance
    σ²/Y and consecutive-year differences with 2σ², so the two sides match
    and the ratio is near 1; we ask for 4.  This is our own rule of thumb,
    chosen so that a one-off month (a promotion in one year) stays flat.
    """
    n_pairs = real.shape[0]
    years = real.shape[1] // 12
    cube = real.reshape(n_pairs, years, 12)
    indicator = _group_indicator(codes, n_groups)
    group_year_month = (indicator @ real).reshape(n_groups, years, 12)
    valid = (group_year_month > 0).all(axis=(1, 2))
    with np.errstate(divide="ignore", invalid="ignore"):
        shares = cube / group_year_month[codes]
        pooled = cube.sum(axis=1) / group_year_month.sum(axis=1)[codes]
        flat = real.sum(axis=1) / group_year_month.sum(axis=(1, 2))[codes]
    shares, pooled, flat = (np.nan_to_num(a) for a in (shares, pooled, flat))
    deviation = pooled - flat[:, None]
    shift = 0.5 * (indicator @ np.abs(deviation)).max(axis=1)
    signal = indicator @ (deviation ** 2).sum(axis=1)
    noise = indicator @ (np.diff(shares, axis=1) ** 2).sum(axis=(1, 2)) / (2 * years)
    return valid & (shift >= min_shift) & (signal >= SEASONAL_VARIANCE_RATIO * noise) & (signal > 0)


def historical_mix(actuals: pd.DataFrame, *, items: pd.DataFrame, locations: pd.DataFrame, cycle: str,
                   window_months: int = 12, seasonal: bool = True, pairs: pd.DataFrame | None = None,
                   min_seasonal_shift: float = MIN_SEASONAL_SHIFT,
                   levels: tuple[tuple[str, str], ...] | None = None) -> pd.DataFrame:
    """Each item × location pair's share of every group it belongs to, from trailing actuals.

    share(pair, group) = q(pair) / Σ_{pairs in group} q, with q the pair's
    actual quantity over the ``window_months`` ending at ``cycle``.  Groups
    are every level of :data:`MIX_LEVELS` (family × region, family × all,
    all × region, all × all, and item × region, item × all, family ×
    location, all × location).

    Seasonal mix: when ``seasonal`` and the actuals reach back two full years,
    each group whose month-of-year mix differs materially and repeatedly
    (see :func:`_seasonal_groups`) gets twelve shares per pair, one per
    month of year, pooled over the 24 months to ``cycle``; other groups get
    one share (``month_of_year`` empty).

    Pairs covered: those with actuals in the window, ``pairs`` if given, and
    each master item with no actuals placed where its family sold.  A pair
    with no actuals in the window is given its family's average quantity per
    item at that location (falling back to the family's average anywhere, then
    to the average pair), flagged ``imputed`` and named in a warning.

    ``levels`` limits the mix to those (item side, location side) levels (all
    of :data:`MIX_LEVELS` by default): a split needs only the levels its rows
    are given at, and each level's shares do not depend on the others.

    Returns [level, group_item, group_location, item, location, month_of_year,
    share, basis, imputed]; ``group_item``/``group_location`` hold the item,
    family, location or region name, or "all".  Warnings are in
    ``result.attrs["warnings"]`` (a list of strings), not printed.
    """
    wanted = MIX_LEVELS if levels is None else tuple(level for level in MIX_LEVELS if level in set(levels))
    _check_masters(items, locations)
    if not isinstance(window_months, (int, np.integer)) or window_months < 1:
        raise InvalidSpec(f"window_months must be a positive whole number of months, got {window_months!r}")
    if not 0 <= min_seasonal_shift <= 1:
        raise InvalidSpec(f"min_seasonal_shift must be within 0 … 1, got {min_seasonal_shift!r}")
    end = periods.month_index(cycle)
    acts = actuals[["item", "location", "period", "quantity"]].dropna(subset=["item", "location", "period"])
    _check_known(acts, "item", items["item"], "items in actuals")
    _check_known(acts, "location", locations["location"], "locations in actuals")
    month = periods.month_indexes(acts["period"]) if len(acts) else np.array([], dtype=int)
    seasonal_span = 12 * SEASONAL_YEARS
    can_be_seasonal = bool(seasonal) and len(acts) > 0 and month.min() <= end - seasonal_span + 1
    span = max(window_months, seasonal_span if can_be_seasonal else 0)
    keep = (month <= end) & (month > end - span)
    acts = acts.loc[keep].assign(_offset=span - 1 - (end - month[keep]))  # column 0 is the oldest month
    in_window = acts[acts["_offset"] >= span - window_months]
    grain = _planning_pairs(in_window, items=items, locations=locations, pairs=pairs)
    n_pairs = len(grain)

    pair_code = pd.MultiIndex.from_frame(grain[["item", "location"]]).get_indexer(
        pd.MultiIndex.from_frame(acts[["item", "location"]].astype(object)))
    covered = pair_code >= 0
    real = np.zeros((n_pairs, span))
    np.add.at(real, (pair_code[covered], acts["_offset"].to_numpy()[covered]),
              acts["quantity"].astype(float).to_numpy()[covered])
    real = np.clip(real, 0.0, None)  # returns booked as negative sales do not make a negative share
    flat_weight = _impute_missing(real[:, span - window_months:].sum(axis=1, keepdims=True), grain)[:, 0]
    if can_be_seasonal:
        recent = real[:, span - seasonal_span:]
        first_month_of_year = (end - seasonal_span + 1) % 12 + 1
        month_of_year = (np.arange(12) + first_month_of_year - 1) % 12 + 1  # month of year of each column
        pooled = recent.reshape(n_pairs, SEASONAL_YEARS, 12).sum(axis=1)
        seasonal_weight = _impute_missing(pooled, grain)
        real_history = np.where(grain["has_history"].to_numpy()[:, None], recent, 0.0)

    flat_text = f" mix, {window_months} months to {cycle}"
    seasonal_text = f" month-of-year mix, {seasonal_span} months to {cycle}"
    imputed_text = "; no actuals for this item × location in the window, given its family's average"
    frames, warnings = [], []
    imputed = ~grain["has_history"].to_numpy()
    for item_side, location_side in wanted:
        group_item, group_location = _side_keys(grain, item_side, location_side)
        codes, uniques = pd.MultiIndex.from_arrays([group_item, group_location]).factorize()
        n_groups = len(uniques)
        describe = _describe_group(item_side, location_side, group_item, group_location)
        is_seasonal = (_seasonal_groups(real_history, codes, n_groups, min_shift=min_seasonal_shift)
                       if can_be_seasonal else np.zeros(n_groups, dtype=bool))
        base = pd.DataFrame({"level": level_name(item_side, location_side), "group_item": group_item,
                             "group_location": group_location, "item": grain["item"], "location": grain["location"]})
        pair_seasonal = is_seasonal[codes]
        share_flat, empty_flat = _shares(flat_weight[:, None], codes, n_groups)
        flat_rows = base.loc[~pair_seasonal].assign(
            month_of_year=pd.array([pd.NA] * int((~pair_seasonal).sum()), dtype="Int64"),
            share=share_flat[~pair_seasonal, 0],
            basis=(describe[~pair_seasonal] + flat_text).to_numpy(),
            imputed=imputed[~pair_seasonal],
            _empty=empty_flat[codes[~pair_seasonal], 0])
        frames.append(flat_rows)
        if pair_seasonal.any():
            share_seasonal, empty_seasonal = _shares(seasonal_weight, codes, n_groups)
            rows = np.flatnonzero(pair_seasonal)
            n = len(rows)
            seasonal_rows = base.iloc[np.repeat(rows, 12)].assign(
                month_of_year=pd.array(np.tile(month_of_year, n), dtype="Int64"),
                share=share_seasonal[rows].ravel(),
                basis=np.repeat((describe.iloc[rows] + seasonal_text).to_numpy(), 12),
                imputed=np.repeat(imputed[rows], 12),
                _empty=empty_seasonal[codes[rows]].ravel())
            frames.append(seasonal_rows)
        if empty_flat.any():
            names = describe.iloc[np.unique(np.flatnonzero(empty_flat[codes, 0]))].unique()
            warnings += [f"{name}: no actuals in the {window_months} months to {cycle}; split equally"
                         for name in names]
    if not frames:
        mix = pd.DataFrame({c: pd.Series(dtype=object) for c in MIX_COLUMNS})
        mix.attrs["warnings"] = []
        return mix
    mix = pd.concat(frames, ignore_index=True)
    mix["basis"] = mix["basis"].where(~mix["imputed"], mix["basis"] + imputed_text)
    mix["basis"] = mix["basis"].where(~mix["_empty"], mix["basis"] + "; no actuals in the group, equal shares")
    mix = mix.drop(columns="_empty")[MIX_COLUMNS].reset_index(drop=True)
    if imputed.any():
        missing = grain.loc[imputed].groupby("item", sort=True).agg(family=("family", "first"),
                                                                    n=("location", "size"))
        warnings = [f"item {item}: no actuals in the {window_months} months to {cycle} at {row.n} location(s); "
                    f"given the average share of family {row.family}" for item, row in missing.iterrows()] + warnings
    mix.attrs["warnings"] = warnings
    return mix


def _shares(weights: np.ndarray, codes: np.ndarray, n_groups: int) -> tuple[np.ndarray, np.ndarray]:
    """weights / group total per column; a group whose total is 0 is split equally.  Also returns which were."""
    indicator = _group_indicator(codes, n_groups)
    totals = indicator @ weights
    counts = np.bincount(codes, minlength=n_groups).astype(float)
    empty = totals <= 0
    with np.errstate(divide="ignore", invalid="ignore"):
        shares = np.where(empty[codes], 1.0 / counts[codes, None], weights / totals[codes])
    return shares, empty


# ---------------------------------------------------------------------------
# Splitting rows to the grain, and money to units
# ---------------------------------------------------------------------------

def _present(rows: pd.DataFrame, column: str) -> np.ndarray:
    """Rows that name ``column`` (a missing value or an empty text cell does not)."""
    if column not in rows.columns:
        return np.zeros(len(rows), dtype=bool)
    values = rows[column].to_numpy(dtype=object)
    present = pd.notna(values)
    present[present] = values[present] != ""  # intake strips every cell, so an empty one is exactly ""
    return present


def levels_of(rows: pd.DataFrame) -> tuple[tuple[str, str], ...]:
    """The mix levels (item side, location side) that rows at any grain are given at, planning grain left out."""
    has_item, has_family = _present(rows, "item"), _present(rows, "family")
    has_location, has_region = _present(rows, "location"), _present(rows, "region")
    item_side = np.where(has_item, "item", np.where(has_family, "family", ALL))
    location_side = np.where(has_location, "location", np.where(has_region, "region", ALL))
    pairs = set(zip(item_side.tolist(), location_side.tolist())) if len(rows) else set()
    return tuple(level for level in MIX_LEVELS if level in pairs)


def _resolve_groups(rows: pd.DataFrame, *, items: pd.DataFrame, locations: pd.DataFrame | None) -> pd.DataFrame:
    """Each row's item side, location side and group names; ValueError for names not in the masters."""
    has_item, has_family = _present(rows, "item"), _present(rows, "family")
    has_location, has_region = _present(rows, "location"), _present(rows, "region")
    item_side = np.where(has_item, "item", np.where(has_family, "family", ALL))
    location_side = np.where(has_location, "location", np.where(has_region, "region", ALL))
    empty = pd.Series(ALL, index=rows.index, dtype=object)
    group_item = np.where(has_item, rows["item"].astype(object) if "item" in rows else empty,
                          np.where(has_family, rows["family"].astype(object) if "family" in rows else empty, ALL))
    group_location = np.where(has_location, rows["location"].astype(object) if "location" in rows else empty,
                              np.where(has_region, rows["region"].astype(object) if "region" in rows else empty, ALL))
    out = pd.DataFrame({"item_side": item_side, "location_side": location_side,
                        "group_item": group_item, "group_location": group_location}, index=rows.index)
    for side, column, known in (("item", "item", items["item"]), ("family", "family", items["family"])):
        _check_known(out.loc[out["item_side"] == side], "group_item", known, f"{column}s in rows")
    if locations is not None:
        for side, known in (("location", locations["location"]), ("region", locations["region"])):
            _check_known(out.loc[out["location_side"] == side], "group_location", known, f"{side}s in rows")
    out["level"] = out["item_side"] + "×" + out["location_side"]
    return out


def _mix_lookup(mix: pd.DataFrame) -> tuple[pd.DataFrame, pd.MultiIndex]:
    """The mix keyed by (level, group_item, group_location, month_key), month_key 0 for a flat group."""
    keyed = mix.assign(_month_key=mix["month_of_year"].fillna(0).astype(int).to_numpy())
    seasonal = keyed.loc[keyed["_month_key"] > 0, ["level", "group_item", "group_location"]].drop_duplicates()
    return keyed, pd.MultiIndex.from_frame(seasonal.astype(object))


def _expand_to_pairs(rows: pd.DataFrame, groups: pd.DataFrame, *, mix: pd.DataFrame, items: pd.DataFrame,
                     locations: pd.DataFrame | None) -> pd.DataFrame:
    """One line per row × pair of its group, with the pair's share and its basis.

    Columns: _row (position in rows), item, location, share, share_basis.  A
    row at item × location is its own pair with share 1; a group missing from
    the mix is split equally over its master pairs (and said so).
    """
    position = np.arange(len(rows))
    direct = (groups["level"] == "item×location").to_numpy()
    parts = [pd.DataFrame({"_row": position[direct], "item": groups["group_item"].to_numpy()[direct],
                           "location": groups["group_location"].to_numpy()[direct], "share": 1.0,
                           "share_basis": GIVEN_AT_PAIR})]
    if (~direct).any():
        keyed, seasonal_groups = _mix_lookup(mix)
        wanted = groups.loc[~direct, ["level", "group_item", "group_location"]].astype(object)
        is_seasonal = pd.MultiIndex.from_frame(wanted).isin(seasonal_groups)
        month_of_year = periods.month_indexes(rows.loc[~direct, "period"]) % 12 + 1
        wanted = wanted.assign(_month_key=np.where(is_seasonal, month_of_year, 0), _row=position[~direct])
        matched = wanted.merge(keyed[["level", "group_item", "group_location", "_month_key", "item", "location",
                                      "share", "basis"]], on=["level", "group_item", "group_location", "_month_key"],
                               how="inner", sort=False).rename(columns={"basis": "share_basis"})
        parts.append(matched[["_row", "item", "location", "share", "share_basis"]])
        unmatched = wanted[~wanted["_row"].isin(matched["_row"])]
        if len(unmatched) and locations is not None:
            parts.append(_equal_split(unmatched, items=items, locations=locations))
    return pd.concat(parts, ignore_index=True)


def _equal_split(unmatched: pd.DataFrame, *, items: pd.DataFrame, locations: pd.DataFrame) -> pd.DataFrame:
    """Rows whose group has no mix: equal shares over the master items × locations of the group."""
    master = items[["item", "family"]].merge(locations[["location", "region"]], how="cross").astype(object)
    master["all"] = ALL
    lines = []
    for level, chunk in unmatched.groupby("level", sort=False):
        item_side, location_side = level.split("×")
        candidates = master.assign(group_item=master[item_side], group_location=master[location_side])
        joined = chunk[["_row", "group_item", "group_location"]].merge(
            candidates[["group_item", "group_location", "item", "location"]], on=["group_item", "group_location"])
        counts = joined.groupby("_row")["item"].transform("size")
        joined["share"] = 1.0 / counts
        joined["share_basis"] = (_describe_group(item_side, location_side, joined["group_item"],
                                                 joined["group_location"])
                                 + ": no mix for this group, split equally over its item × location pairs")
        lines.append(joined[["_row", "item", "location", "share", "share_basis"]])
    out = pd.concat(lines, ignore_index=True)
    lost = set(unmatched["_row"]) - set(out["_row"])
    if lost:
        raise ValueError(f"{len(lost)} row(s) name a group with no item × location pairs in the masters")
    return out


def split_to_grain(rows: pd.DataFrame, *, mix: pd.DataFrame, items: pd.DataFrame,
                   locations: pd.DataFrame) -> tuple[pd.DataFrame, list[str]]:
    """Split rows given at any grain into item × location rows by the historical mix.

    Each row carries ``row_id``, ``period``, ``quantity``, ``item`` or
    ``family`` (neither = all items) and ``location``, ``region`` or neither
    (all locations).  quantity(pair) = quantity(row) · share(pair, group),
    with the share from :func:`historical_mix` (month-of-year share for a
    seasonal group), so Σ over a row's pairs returns the row's quantity.

    Returns ([row_id, item, location, period, quantity, share, share_basis]
    plus any other columns of ``rows`` except family and region, and the
    warnings: those of the mix for the pairs used, and groups split equally
    for want of a mix).
    """
    _check_masters(items, locations)
    missing = [c for c in ("row_id", "period", "quantity") if c not in rows.columns]
    if missing:
        raise ValueError(f"rows lack columns {missing}")
    rows = rows.reset_index(drop=True)
    carried = [c for c in rows.columns if c not in ("item", "family", "location", "region")]
    # Rows already at item × location are their own pair (share 1): checked against the masters, never
    # grouped or expanded.  At 100,000 series they are most rows (a DC's weekly file spread to months),
    # and grouping them cost gigabytes of per-row group names.
    at_pair = _present(rows, "item") & _present(rows, "location")
    own = rows.loc[at_pair]
    if at_pair.any():
        _check_known(own, "item", items["item"], "items in rows")
        _check_known(own, "location", locations["location"], "locations in rows")
    own = own[carried].assign(**{side: own[side].to_numpy(dtype=object) if side in own else np.empty(0, dtype=object)
                                 for side in ("item", "location")}, share=1.0, share_basis=GIVEN_AT_PAIR)
    rest = rows.loc[~at_pair]
    del rows
    lines = _expand_to_pairs(rest, _resolve_groups(rest, items=items, locations=locations), mix=mix, items=items,
                             locations=locations)
    spread = rest[carried].iloc[lines["_row"].to_numpy()].reset_index(drop=True)
    del rest
    spread["item"] = lines["item"].to_numpy()
    spread["location"] = lines["location"].to_numpy()
    spread["share"] = lines["share"].to_numpy()
    spread["share_basis"] = lines["share_basis"].to_numpy()
    out = pd.concat([own, spread], ignore_index=True) if len(spread) else own.reset_index(drop=True)
    out["quantity"] = out["quantity"].astype(float).to_numpy() * out["share"].to_numpy()
    order = GRAIN_COLUMNS + [c for c in out.columns if c not in GRAIN_COLUMNS]
    warnings = _used_warnings(mix, {*own["item"].unique(), *lines["item"].unique()})
    del own, spread
    equal = lines.loc[lines["share_basis"].str.contains("no mix for this group", regex=False), "share_basis"]
    warnings += [text.split(":")[0] + ": no mix for this group; split equally" for text in equal.unique()]
    return out[order], warnings


def _used_warnings(mix: pd.DataFrame, items_touched) -> list[str]:
    """The mix's warnings that concern items the split actually touched."""
    touched = set(map(str, items_touched))
    used = []
    for text in mix.attrs.get("warnings", []):
        if text.startswith("item "):
            if text[5:].split(":")[0] in touched:
                used.append(text)
        else:
            used.append(text)
    return used


def value_to_units(rows: pd.DataFrame, *, items: pd.DataFrame, mix: pd.DataFrame) -> pd.DataFrame:
    """Money into units: quantity = value / price.

    For an item row, price is the item's ``unit_price``; for a family or
    total row it is the mix-weighted average price of the group,
    p̄ = Σ_pairs share · price, which is exact: a value V split by unit
    shares s buys Q units with Σ Q·s·p = V, so Q = V / Σ s·p.  A seasonal
    group uses the month's shares.  Rows that already have a quantity keep
    it.  Returns ``rows`` with ``quantity`` filled and ``unit_price`` (the
    price used) added; ValueError when a needed price is missing or not
    positive.
    """
    if "value" not in rows.columns:
        raise ValueError("rows need a value column")
    if "unit_price" not in items.columns:
        raise ValueError("items master lacks unit_price")
    out = rows.copy()
    if "quantity" not in out.columns:
        out["quantity"] = np.nan
    out["quantity"] = out["quantity"].astype(float)
    todo = (out["quantity"].isna() & out["value"].notna()).to_numpy()
    out["unit_price"] = np.nan
    if not todo.any():
        return out
    chosen = out.loc[todo].reset_index(drop=True)
    groups = _resolve_groups(chosen, items=items, locations=None)
    if "period" not in chosen.columns:
        raise ValueError("rows need a period to find the month's mix")
    price_of = items.drop_duplicates("item").set_index("item")["unit_price"].astype(float)
    # Without locations the lookup leaves groups absent from the mix out; they are priced below.
    lines = _expand_to_pairs(chosen, groups, mix=mix, items=items, locations=None)
    lines["weighted"] = lines["share"].to_numpy() * lines["item"].map(price_of).to_numpy(dtype=float)
    price = lines.groupby("_row")["weighted"].sum(min_count=1).reindex(np.arange(len(chosen)))
    # Groups absent from the mix: the plain average price of the group's master items.
    absent = price.isna().to_numpy() & (groups["item_side"] != "item").to_numpy()
    if absent.any():
        family_price = items.groupby("family")["unit_price"].mean()
        fallback = np.where(groups["item_side"].to_numpy() == "family",
                            groups["group_item"].map(family_price).to_numpy(dtype=float),
                            float(items["unit_price"].mean()))
        price = price.where(~absent, fallback)
    direct = (groups["item_side"] == "item").to_numpy()
    price = price.where(~direct, groups["group_item"].map(price_of).to_numpy(dtype=float))
    bad = price.isna().to_numpy() | (price.to_numpy() <= 0)
    if bad.any():
        names = groups.loc[bad, "group_item"].astype(str).unique()[:5].tolist()
        raise ValueError(f"no usable unit price to turn value into units for {names}")
    values = chosen["value"].astype(float).to_numpy()
    out.loc[todo, "unit_price"] = price.to_numpy()
    out.loc[todo, "quantity"] = values / price.to_numpy()
    return out
