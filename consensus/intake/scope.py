"""What a submitted file speaks for: a closed set of scopes, declared or read off the rows.

A scope is one of: ``all`` (every location), ``region R`` or ``location L``,
for a region or location the master knows.  It is *declared* by ``--scope``
or by a template's own sheet; a declared scope covers every cell of its
places in the months the file carries, so a row it leaves out is no longer
forecast by that source.  A file with no declared scope speaks for the cells
its rows reach, and its scope is described from them ("location DC-N1",
"locations DC-N1, DC-N2", "region NORTH", "all locations").  Which
submission is then in force for each cell: :mod:`consensus.methods.in_force`.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from consensus.errors import InputRejected, Problem

PLACE_KINDS = ("all", "region", "location")


def _place_names(values) -> list[str]:
    return sorted({str(v) for v in values if isinstance(v, str) and v})


def parse_scope(text: str, *, locations: pd.DataFrame, filename: str) -> dict:
    """A declared scope in its closed form; InputRejected for anything outside the closed set."""
    words = str(text).strip().split(None, 1)
    kind = words[0].lower() if words else ""
    name = words[1].strip() if len(words) > 1 else ""
    if kind == "all" and not name:
        return {"declared": True, "place": "all", "places": []}
    known = {"region": set(locations["region"].astype(str)), "location": set(locations["location"].astype(str))}
    if kind in known and name:
        if name not in known[kind]:
            raise InputRejected(file=filename, problems=[Problem(
                filename, None, None, text, f"a scope naming a {kind} in the locations master "
                                            f"({', '.join(sorted(known[kind])[:8])})")])
        return {"declared": True, "place": kind, "places": [name]}
    raise InputRejected(file=filename, problems=[Problem(
        filename, None, None, text, "a scope of 'all', 'region NAME' or 'location NAME'")])


def derive_scope(clean: pd.DataFrame) -> dict:
    """The scope of a file with none declared: the places its rows name."""
    has_location = clean["location"].notna() if "location" in clean else pd.Series(False, index=clean.index)
    has_region = clean["region"].notna() if "region" in clean else pd.Series(False, index=clean.index)
    if len(clean) and has_location.all():
        return {"declared": False, "place": "location", "places": _place_names(clean["location"])}
    if len(clean) and has_region.all():
        return {"declared": False, "place": "region", "places": _place_names(clean["region"])}
    if len(clean) and (~(has_location | has_region)).any():  # a row for all locations reaches every place
        return {"declared": False, "place": "all", "places": []}
    if len(clean) and (has_location | has_region).any():
        return {"declared": False, "place": "mixed",
                "places": _place_names(pd.concat([clean.loc[has_location, "location"],
                                                  clean.loc[has_region, "region"]]))}
    return {"declared": False, "place": "all", "places": []}


def describe_scope(detail: dict) -> str:
    """The scope in words, e.g. 'region NORTH', 'locations DC-N1, DC-N2', 'all'."""
    place, places = detail.get("place", "all"), list(detail.get("places", []))
    if place == "all":
        return "all" if detail.get("declared") else "all locations"
    if place == "mixed":
        return "places " + ", ".join(places)
    if len(places) == 1:
        return f"{place} {places[0]}"
    shown = ", ".join(places[:6]) + (f" and {len(places) - 6} more" if len(places) > 6 else "")
    return f"{place}s {shown}"


def scope_locations(detail: dict, locations: pd.DataFrame) -> list[str]:
    """The locations a scope covers."""
    place, places = detail.get("place", "all"), set(detail.get("places", []))
    if place == "all":
        return sorted(locations["location"].astype(str))
    if place == "region":
        return sorted(locations.loc[locations["region"].isin(places), "location"].astype(str))
    if place == "location":
        return sorted(places)
    region_places = locations["region"].isin(places) | locations["location"].isin(places)
    return sorted(locations.loc[region_places, "location"].astype(str))


def rows_outside(clean: pd.DataFrame, detail: dict, *, locations: pd.DataFrame, rows: np.ndarray,
                 filename: str) -> list[Problem]:
    """Problems for rows that fall outside a declared scope (a region row inside a location scope, too)."""
    if detail.get("place") == "all":
        return []
    inside = set(scope_locations(detail, locations))
    region_of = locations.drop_duplicates("location").set_index("location")["region"]
    problems = []
    location = clean["location"] if "location" in clean else pd.Series(None, index=clean.index, dtype=object)
    region = clean["region"] if "region" in clean else pd.Series(None, index=clean.index, dtype=object)
    in_regions = {region_of.get(loc) for loc in inside}
    whole_region = {r for r in in_regions
                    if set(locations.loc[locations["region"] == r, "location"].astype(str)) <= inside}
    bad_location = location.notna() & ~location.astype(str).isin(inside)
    bad_region = location.isna() & region.notna() & ~region.astype(str).isin(whole_region)
    no_place = location.isna() & region.isna()
    scope = describe_scope(detail)
    for mask, column, values, what in (
            (bad_location, "location", location, "a location inside the declared scope"),
            (bad_region, "region", region, "a region wholly inside the declared scope"),
            (no_place, "location", location, "a location or region (rows for all locations fall outside")):
        for position in np.flatnonzero(mask.to_numpy())[:20]:
            shown = None if what.startswith("a location or") else str(values.iloc[position])
            suffix = f" {scope})" if what.startswith("a location or") else f" ({scope})"
            problems.append(Problem(filename, int(rows[position]), column, shown, what + suffix))
    return problems
