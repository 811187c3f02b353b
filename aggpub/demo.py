"""Invented demo scenario: the contact network of a fictional town.

This module makes up a town, Quennet Vale, with twelve neighbourhoods in four
zones, fills it with households, schools, workplaces and community mixing, and
returns the resulting person-level contact network. Every name and every
number in it is invented; no real person, place or organisation is described.
The data exist only so that the rest of aggpub can be exercised end to end on
something that looks like a contact survey or proximity-sensor study.

The generator is deterministic for a given seed (a single
:class:`numpy.random.Generator` drives every draw) and fully vectorised: the
only Python loops run over household types, household sizes, settings or age
bands, never over people or contacts.

Target shape of the network
---------------------------
* An age pyramid with thin old-age bands, so that some of the
  17 age bands x 12 neighbourhoods cells hold fewer than 20 people and the
  grouping stage has to generalise them (see :data:`AGE_HIERARCHY` and
  :data:`NEIGHBOURHOOD_HIERARCHY`).
* Households of 1 to 6 people, mean about 2.4, everyone in a household in
  contact with everyone else in it.
* School classes for ages 5-19 formed within (age band, zone); each pupil
  meets a handful of classmates.
* Workplaces (heavy-tailed sizes) for workers aged 20-64; each worker meets a
  few colleagues.
* Community contacts that are assortative by age band (probability falls with
  band distance) and by neighbourhood (own neighbourhood, then own zone).
* About 10-15 distinct contacts per person on average. Large European contact
  diary surveys report daily means of roughly 8 to 20 contacts per participant
  depending on country (Mossong et al., "Social contacts and mixing patterns
  relevant to the spread of infectious diseases", PLoS Medicine, 2008; range
  recalled from memory).

Output tables
-------------
``people``
    ``node`` (string, ``"R000001"``...), ``age_band`` (string, one of
    :data:`AGE_BANDS`), ``neighbourhood`` (string, one of
    :data:`NEIGHBOURHOODS`), ``role`` (string, one of :data:`ROLES`).
``edges``
    ``source``, ``target`` (strings, node ids), ``setting`` (string, one of
    :data:`SETTINGS`), ``minutes`` (int64, contact duration, > 0).

Each contact appears once per setting (undirected: the order of ``source``
and ``target`` is arbitrary). A pair that meets in two settings, say at home
and in the community, appears once for each; this affects well under 5% of
the rows and the ingest stage collapses such duplicates. There are no
self-loops. Person ids are assigned in random order so that consecutive ids
do not reveal households.
"""

from __future__ import annotations

import pathlib
from os import PathLike

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv

__all__ = [
    "TOWN_NAME",
    "AGE_BANDS",
    "NEIGHBOURHOODS",
    "ZONES",
    "AGE_HIERARCHY",
    "NEIGHBOURHOOD_HIERARCHY",
    "SETTINGS",
    "ROLES",
    "PEOPLE_FILE",
    "EDGES_FILE",
    "generate_town",
    "write_town",
]

#: Name of the invented town.
TOWN_NAME = "Quennet Vale"

#: Five-year age bands, youngest first; the last band is open-ended.
AGE_BANDS: tuple[str, ...] = tuple(f"{a}-{a + 4}" for a in range(0, 80, 5)) + ("80+",)

#: Invented neighbourhoods of :data:`TOWN_NAME`.
NEIGHBOURHOODS: tuple[str, ...] = (
    "Alderquay",
    "Brackenholt",
    "Cinder Row",
    "Dovecote Green",
    "Emberlea",
    "Fennick Heights",
    "Gorsemoor",
    "Hollin Cross",
    "Ivywick",
    "Juniper Flats",
    "Kestrel Bank",
    "Loomside",
)

#: Neighbourhood -> zone (four invented zones of three neighbourhoods each).
ZONES: dict[str, str] = {
    "Alderquay": "Millward",
    "Brackenholt": "Millward",
    "Cinder Row": "Millward",
    "Dovecote Green": "Northreach",
    "Emberlea": "Northreach",
    "Fennick Heights": "Northreach",
    "Gorsemoor": "Southmere",
    "Hollin Cross": "Southmere",
    "Ivywick": "Southmere",
    "Juniper Flats": "Eastling",
    "Kestrel Bank": "Eastling",
    "Loomside": "Eastling",
}


def _decade(band: str) -> str:
    if band == "80+":
        return "80+"
    lo = int(band.split("-")[0]) // 10 * 10
    return f"{lo}-{lo + 9}"


def _double_decade(band: str) -> str:
    if band == "80+":
        return "80+"
    lo = int(band.split("-")[0]) // 20 * 20
    return f"{lo}-{lo + 19}"


#: Age generalisation levels. Level 0 maps each 5-year band to its 10-year
#: band ("0-9", ..., "70-79", "80+"); level 1 maps each 10-year band to its
#: 20-year band ("0-19", "20-39", "40-59", "60-79", "80+").
AGE_HIERARCHY: list[dict[str, str]] = [
    {band: _decade(band) for band in AGE_BANDS},
    {dec: _double_decade(dec) for dec in dict.fromkeys(_decade(b) for b in AGE_BANDS)},
]

#: Neighbourhood generalisation levels: one level, neighbourhood -> zone.
NEIGHBOURHOOD_HIERARCHY: list[dict[str, str]] = [dict(ZONES)]

#: Contact settings, in the order used internally.
SETTINGS = ("household", "school", "work", "community")

#: Person roles.
ROLES = ("preschool", "pupil", "worker", "retired", "other")

#: File names written by :func:`write_town`.
PEOPLE_FILE = "people.csv"
EDGES_FILE = "contacts.csv"

# ---------------------------------------------------------------------------
# Invented model parameters. None of these is an estimate of anything real;
# they are chosen so that the resulting network has the shape described in
# the module docstring.
# ---------------------------------------------------------------------------

_ZONE_NAMES = tuple(dict.fromkeys(ZONES.values()))
_NB_ZONE = np.array([_ZONE_NAMES.index(ZONES[nb]) for nb in NEIGHBOURHOODS])

# Relative neighbourhood sizes (households), deliberately unequal.
_NB_WEIGHT = np.array([14.0, 9.0, 6.0, 11.0, 4.0, 8.0, 13.0, 3.0, 7.0, 10.0, 5.0, 12.0])

# Household types: (probability, class) where the class selects a row of the
# neighbourhood affinity table below.
_HH_TYPES = (
    # name            prob   class
    ("single_young", 0.100, "young"),
    ("single_mid", 0.095, "middle"),
    ("single_old", 0.095, "old"),
    ("couple", 0.200, "middle"),
    ("old_couple", 0.080, "old"),
    ("lone_parent", 0.075, "family"),
    ("two_parent", 0.250, "family"),
    ("shared", 0.060, "young"),
    ("multigen", 0.050, "family"),
)
_HH_PROB = np.array([t[1] for t in _HH_TYPES])
_HH_PROB = _HH_PROB / _HH_PROB.sum()
_T = {t[0]: i for i, t in enumerate(_HH_TYPES)}

# Multiplicative affinity of each household class for each neighbourhood
# (columns in NEIGHBOURHOODS order): Cinder Row and Juniper Flats are young
# and rented, Dovecote Green and Hollin Cross are quiet and old, the outer
# estates are family areas.
_AFFINITY = {
    "young": np.array([1.2, 0.8, 2.5, 0.5, 0.8, 0.7, 1.0, 0.6, 1.0, 2.2, 0.9, 1.1]),
    "middle": np.array([1.1, 1.0, 1.0, 1.0, 1.0, 1.1, 1.0, 1.0, 1.0, 1.0, 1.0, 1.0]),
    "old": np.array([0.9, 1.1, 0.3, 2.2, 1.0, 0.9, 1.0, 1.8, 1.1, 0.4, 1.0, 1.0]),
    "family": np.array([0.9, 1.2, 0.5, 0.8, 1.2, 1.3, 1.1, 0.9, 1.0, 0.7, 1.3, 1.0]),
}

# Children per family household.
_KIDS_LONE = (np.array([1, 2, 3]), np.array([0.55, 0.35, 0.10]))
_KIDS_TWO = (np.array([1, 2, 3, 4]), np.array([0.38, 0.42, 0.15, 0.05]))
_KIDS_MULTI = (np.array([1, 2, 3]), np.array([0.45, 0.40, 0.15]))
_SHARED_SIZE = (np.array([3, 4]), np.array([0.7, 0.3]))

# Share of 20-64 year olds who work (role "worker"); the rest are "other".
_EMPLOYMENT = 0.74

# Contacts per setting.
_CLASS_SIZE = 27          # pupils per class (classes are balanced within a group)
_SCHOOL_RING = 3          # each pupil is linked to 2 * 3 classmates
_WORK_RING = 2            # each worker is linked to about 2 * 2 colleagues
_WORKPLACE_MEAN = 12.0    # mean workplace size (heavy-tailed)
_WORKPLACE_MAX = 250

# Community contacts initiated per person per age band (Poisson means): higher
# for teenagers and young adults, lower for the oldest bands.
_COMMUNITY_RATE = np.array(
    [2.2, 2.8, 3.4, 3.8, 4.0, 3.8, 3.5, 3.3, 3.2, 3.0, 2.9, 2.7, 2.5, 2.2, 2.0, 1.7, 1.4]
)
_AGE_DECAY = 1.6          # community age kernel exp(-|band distance| / decay)
_NB_MIX = (1.0, 0.12, 0.025)  # weight of own neighbourhood, own zone, elsewhere (per person)

# Contact duration per setting: (median minutes, log-scale sigma).
_DURATION = {
    "household": (240.0, 0.6),
    "school": (180.0, 0.4),
    "work": (120.0, 0.7),
    "community": (20.0, 0.9),
}
_MAX_MINUTES = 900

_N_BANDS = len(AGE_BANDS)
_N_NB = len(NEIGHBOURHOODS)


# ---------------------------------------------------------------------------
# Helpers
# ---------------------------------------------------------------------------


def _choice(rng: np.random.Generator, spec: tuple[np.ndarray, np.ndarray], size: int) -> np.ndarray:
    values, probs = spec
    return rng.choice(values, size=size, p=probs)


def _elderly_age(rng: np.random.Generator, size: int) -> np.ndarray:
    """Ages of older people: 60 plus a gamma(2, 6 years) tail, capped at 100."""
    return np.minimum(60.0 + rng.gamma(2.0, 6.0, size), 100.0)


def _segment_positions(group_sorted: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Position within, and size of, each run of equal values in a sorted array."""
    n = group_sorted.size
    if n == 0:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    starts = np.flatnonzero(np.r_[True, group_sorted[1:] != group_sorted[:-1]])
    sizes = np.diff(np.r_[starts, n])
    run = np.repeat(np.arange(starts.size), sizes)
    return np.arange(n) - starts[run], sizes[run]


def _canonical_unique(src: np.ndarray, tgt: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Drop self-loops and repeated pairs; return pairs with ``src < tgt``."""
    keep = src != tgt
    lo = np.minimum(src[keep], tgt[keep]).astype(np.int64)
    hi = np.maximum(src[keep], tgt[keep]).astype(np.int64)
    key = np.unique(lo * n + hi)
    return key // n, key % n


def _ring_contacts(
    rng: np.random.Generator, members: np.ndarray, groups: np.ndarray, k: int, n: int
) -> tuple[np.ndarray, np.ndarray]:
    """Contacts inside groups: each member meets the next ``k`` members of a random ring.

    Parameters
    ----------
    rng : numpy.random.Generator
        Source of randomness (used to shuffle each group before the ring is formed).
    members : numpy.ndarray
        Person indices.
    groups : numpy.ndarray
        Group label of each member (same length as ``members``).
    k : int
        Ring reach: in a group larger than ``2 * k`` everyone has ``2 * k`` contacts;
        smaller groups become complete graphs.
    n : int
        Number of people in the town (for pair keys).

    Returns
    -------
    tuple of numpy.ndarray
        ``(source, target)`` person indices, unique pairs, no self-loops.
    """
    if members.size == 0:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    order = np.lexsort((rng.random(members.size), groups))
    m_sorted = members[order]
    pos, size = _segment_positions(groups[order])
    start = np.arange(members.size) - pos
    src_parts, tgt_parts = [], []
    for offset in range(1, k + 1):
        ok = size > offset
        partner = start[ok] + (pos[ok] + offset) % size[ok]
        src_parts.append(m_sorted[ok])
        tgt_parts.append(m_sorted[partner])
    return _canonical_unique(np.concatenate(src_parts), np.concatenate(tgt_parts), n)


def _sample_rows(rng: np.random.Generator, cdf: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """Draw one category per entry of ``rows`` from the row-wise cumulative table ``cdf``."""
    u = rng.random(rows.size) * cdf[rows, -1]
    return np.minimum((u[:, None] >= cdf[rows]).sum(axis=1), cdf.shape[1] - 1)


# ---------------------------------------------------------------------------
# Population
# ---------------------------------------------------------------------------


def _households(rng: np.random.Generator, n_people: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Draw households until ``n_people`` people are housed.

    Parameters
    ----------
    rng : numpy.random.Generator
        Source of randomness.
    n_people : int
        Number of people to house; the last household is shortened to fit.

    Returns
    -------
    tuple of numpy.ndarray
        Per person: age in years (float), household index, neighbourhood index.
        People of one household are contiguous.
    """
    n_hh = n_people  # every household has at least one person, so this always suffices
    htype = rng.choice(len(_HH_TYPES), size=n_hh, p=_HH_PROB)

    # Household composition: number of adults and of children per type.
    adults = np.ones(n_hh, dtype=np.int64)
    kids = np.zeros(n_hh, dtype=np.int64)
    elders = np.zeros(n_hh, dtype=np.int64)  # a grandparent in a multigeneration home
    for name in ("couple", "old_couple", "two_parent", "multigen"):
        adults[htype == _T[name]] = 2
    for name, spec in (("lone_parent", _KIDS_LONE), ("two_parent", _KIDS_TWO), ("multigen", _KIDS_MULTI)):
        sel = htype == _T[name]
        kids[sel] = _choice(rng, spec, int(sel.sum()))
    sel = htype == _T["shared"]
    adults[sel] = _choice(rng, _SHARED_SIZE, int(sel.sum()))
    elders[htype == _T["multigen"]] = 1
    size = adults + kids + elders

    # Keep just enough households; shorten the last one to hit n_people exactly.
    cum = np.cumsum(size)
    last = int(np.searchsorted(cum, n_people))
    htype, adults, kids, elders, size = (a[: last + 1] for a in (htype, adults, kids, elders, size))
    size[-1] -= int(cum[last] - n_people)
    n_hh = htype.size

    # Reference adult age per household.
    ref = np.empty(n_hh)
    young = np.isin(htype, [_T["single_young"], _T["shared"]])
    ref[young] = rng.uniform(20.0, 36.0, int(young.sum()))
    sel = htype == _T["single_mid"]
    ref[sel] = rng.uniform(40.0, 68.0, int(sel.sum()))
    sel = htype == _T["couple"]  # young couples and empty nesters
    m = int(sel.sum())
    ref[sel] = np.where(rng.random(m) < 0.3, rng.uniform(22.0, 40.0, m), rng.uniform(46.0, 64.0, m))
    old = np.isin(htype, [_T["single_old"], _T["old_couple"]])
    ref[old] = _elderly_age(rng, int(old.sum()))
    fam = np.isin(htype, [_T["lone_parent"], _T["two_parent"], _T["multigen"]])
    ref[fam] = rng.triangular(23.0, 38.0, 60.0, int(fam.sum()))

    # Neighbourhood per household: base size weights times class affinity.
    nb = np.empty(n_hh, dtype=np.int64)
    for cls, affinity in _AFFINITY.items():
        types = [i for i, t in enumerate(_HH_TYPES) if t[2] == cls]
        sel = np.isin(htype, types)
        w = _NB_WEIGHT * affinity
        nb[sel] = rng.choice(_N_NB, size=int(sel.sum()), p=w / w.sum())

    # Expand to people: slot 0..adults-1 are adults, then children, then the elder.
    hh = np.repeat(np.arange(n_hh), size)
    slot = np.arange(hh.size) - np.repeat(np.cumsum(size) - size, size)
    r = ref[hh]
    t = htype[hh]
    is_adult = slot < adults[hh]
    is_kid = (~is_adult) & (slot < (adults + kids)[hh])
    is_elder = ~(is_adult | is_kid)

    age = r.copy()
    partner = is_adult & (slot >= 1)
    shared = t == _T["shared"]
    age[partner & shared] = rng.uniform(20.0, 36.0, int((partner & shared).sum()))
    other = partner & ~shared
    age[other] = r[other] + rng.normal(-1.5, 3.5, int(other.sum()))
    oldp = other & (t == _T["old_couple"])
    age[oldp] = np.maximum(age[oldp], 58.0)
    # Children: aged between (parent - 42) and (parent - 20), and under 20.
    lo = np.maximum(0.0, r[is_kid] - 42.0)
    hi = np.minimum(19.999, r[is_kid] - 20.0)
    age[is_kid] = rng.uniform(lo, hi)
    age[is_elder] = np.maximum(r[is_elder] + rng.uniform(22.0, 35.0, int(is_elder.sum())), 62.0)
    age = np.clip(age, 0.0, 100.0)
    return age, hh, nb[hh]


def _age_band_index(age: np.ndarray) -> np.ndarray:
    return np.minimum((age // 5).astype(np.int64), _N_BANDS - 1)


def _roles(rng: np.random.Generator, age: np.ndarray) -> np.ndarray:
    """Role index into :data:`ROLES` from age in years."""
    role = np.full(age.size, ROLES.index("other"), dtype=np.int64)
    role[age < 5] = ROLES.index("preschool")
    role[(age >= 5) & (age < 20)] = ROLES.index("pupil")
    working = (age >= 20) & (age < 65)
    employed = working & (rng.random(age.size) < _EMPLOYMENT)
    role[employed] = ROLES.index("worker")
    role[age >= 65] = ROLES.index("retired")
    return role


# ---------------------------------------------------------------------------
# Contacts per setting
# ---------------------------------------------------------------------------


def _household_contacts(hh: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """All pairs inside each household (people of a household are contiguous)."""
    if n == 0:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    starts = np.flatnonzero(np.r_[True, hh[1:] != hh[:-1]])
    sizes = np.diff(np.r_[starts, n])
    src_parts, tgt_parts = [np.zeros(0, dtype=np.int64)], [np.zeros(0, dtype=np.int64)]
    for s in range(2, int(sizes.max()) + 1):
        first = starts[sizes == s]
        i, j = np.triu_indices(s, 1)
        src_parts.append((first[:, None] + i).ravel())
        tgt_parts.append((first[:, None] + j).ravel())
    return np.concatenate(src_parts), np.concatenate(tgt_parts)


def _school_contacts(
    rng: np.random.Generator, band: np.ndarray, nb: np.ndarray, role: np.ndarray, n: int
) -> tuple[np.ndarray, np.ndarray]:
    """Classes formed within (age band, zone); each pupil meets a few classmates."""
    pupils = np.flatnonzero(role == ROLES.index("pupil"))
    group = band[pupils] * len(_ZONE_NAMES) + _NB_ZONE[nb[pupils]]
    # Split each (band, zone) group into balanced classes of about _CLASS_SIZE.
    order = np.lexsort((rng.random(pupils.size), group))
    pos, gsize = _segment_positions(group[order])
    n_classes = np.maximum(1, np.round(gsize / _CLASS_SIZE)).astype(np.int64)
    stride = int(n_classes.max(initial=0)) + 1
    klass = np.empty(pupils.size, dtype=np.int64)
    klass[order] = group[order] * stride + pos * n_classes // np.maximum(gsize, 1)
    return _ring_contacts(rng, pupils, klass, _SCHOOL_RING, n)


def _work_contacts(rng: np.random.Generator, role: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Workers spread over heavy-tailed workplaces; each meets a few colleagues."""
    workers = np.flatnonzero(role == ROLES.index("worker"))
    if workers.size == 0:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    n_places = int(workers.size / _WORKPLACE_MEAN * 1.5) + 4
    sizes = np.minimum(
        np.ceil(rng.lognormal(np.log(_WORKPLACE_MEAN) - 0.5, 1.0, n_places)).astype(np.int64),
        _WORKPLACE_MAX,
    )
    while sizes.sum() < workers.size:  # rarely more than one pass
        sizes = np.r_[sizes, sizes]
    place = np.repeat(np.arange(sizes.size), sizes)[: workers.size]
    place = place[rng.permutation(workers.size)]
    return _ring_contacts(rng, workers, place, _WORK_RING, n)


def _community_contacts(
    rng: np.random.Generator, band: np.ndarray, nb: np.ndarray, n: int
) -> tuple[np.ndarray, np.ndarray]:
    """Age- and neighbourhood-assortative contacts in shops, streets, clubs and transport.

    Every person initiates a Poisson number of contacts (rate by age band). For
    each, a target neighbourhood is drawn (own neighbourhood strongly preferred,
    then own zone, each weighted by population), then a target age band with
    weight ``exp(-|band distance| / decay)`` times the population of that band in
    the target neighbourhood, then a uniformly random person of that cell.
    """
    cell = nb * _N_BANDS + band
    counts = np.bincount(cell, minlength=_N_NB * _N_BANDS).reshape(_N_NB, _N_BANDS).astype(float)
    nb_pop = counts.sum(axis=1)

    same_nb = np.eye(_N_NB, dtype=bool)
    same_zone = _NB_ZONE[:, None] == _NB_ZONE[None, :]
    mix = np.where(same_nb, _NB_MIX[0], np.where(same_zone, _NB_MIX[1], _NB_MIX[2]))
    nb_cdf = np.cumsum(mix * nb_pop[None, :], axis=1)

    dist = np.abs(np.arange(_N_BANDS)[:, None] - np.arange(_N_BANDS)[None, :])
    kernel = np.exp(-dist / _AGE_DECAY)
    # age_cdf[a, j, :] is the cumulative weight of target bands for a source in
    # band a contacting someone in neighbourhood j.
    age_cdf = np.cumsum(kernel[:, None, :] * counts[None, :, :], axis=2)

    n_init = rng.poisson(_COMMUNITY_RATE[band])
    src = np.repeat(np.arange(n), n_init)
    if src.size == 0:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    tgt_nb = _sample_rows(rng, nb_cdf, nb[src])
    flat = age_cdf.reshape(_N_BANDS * _N_NB, _N_BANDS)
    tgt_band = _sample_rows(rng, flat, band[src] * _N_NB + tgt_nb)

    by_cell = np.argsort(cell, kind="stable")
    cell_count = counts.ravel().astype(np.int64)
    cell_start = np.cumsum(cell_count) - cell_count
    tcell = tgt_nb * _N_BANDS + tgt_band
    pick = cell_start[tcell] + (rng.random(src.size) * cell_count[tcell]).astype(np.int64)
    # Float rounding could in principle land on an empty cell; drop such draws.
    ok = cell_count[tcell] > 0
    tgt = by_cell[np.minimum(pick[ok], n - 1)]
    return _canonical_unique(src[ok], tgt, n)


def _minutes(rng: np.random.Generator, setting: str, size: int) -> np.ndarray:
    median, sigma = _DURATION[setting]
    m = np.rint(rng.lognormal(np.log(median), sigma, size))
    return np.clip(m, 1, _MAX_MINUTES).astype(np.int64)


# ---------------------------------------------------------------------------
# Public API
# ---------------------------------------------------------------------------


def _node_ids(n: int) -> pa.Array:
    width = max(6, len(str(n)))
    digits = pc.utf8_lpad(pa.array(np.arange(1, n + 1, dtype=np.int64)).cast(pa.string()), width, "0")
    return pc.binary_join_element_wise(pa.scalar("R"), digits, "")


def generate_town(n_people: int = 30_000, seed: int = 20261201) -> tuple[pa.Table, pa.Table]:
    """Generate the invented town's people and their contacts.

    Parameters
    ----------
    n_people : int, default 30000
        Number of residents (at least 1).
    seed : int, default 20261201
        Seed of the :class:`numpy.random.Generator` that drives every draw; the
        same ``(n_people, seed)`` always gives identical tables.

    Returns
    -------
    edges : pyarrow.Table
        Columns ``source`` (string), ``target`` (string), ``setting`` (string,
        one of :data:`SETTINGS`) and ``minutes`` (int64, > 0). One row per
        contact and setting, no self-loops, source/target order arbitrary.
    people : pyarrow.Table
        Columns ``node`` (string, ``"R000001"``, ...), ``age_band`` (string, one
        of :data:`AGE_BANDS`), ``neighbourhood`` (string, one of
        :data:`NEIGHBOURHOODS`) and ``role`` (string, one of :data:`ROLES`),
        sorted by ``node``.

    Raises
    ------
    ValueError
        If ``n_people`` is not a positive integer.

    Notes
    -----
    With the defaults the network has roughly 10-15 distinct contacts per
    person, in line with the daily means of roughly 8 to 20 contacts reported by
    large European contact surveys (Mossong et al., "Social contacts and mixing
    patterns relevant to the spread of infectious diseases", PLoS Medicine,
    2008; range recalled from memory). Everything else about the town is
    invented.

    Examples
    --------
    >>> edges, people = generate_town(2_000, seed=7)
    >>> people.column_names
    ['node', 'age_band', 'neighbourhood', 'role']
    >>> edges.column_names
    ['source', 'target', 'setting', 'minutes']
    """
    if isinstance(n_people, bool) or not isinstance(n_people, (int, np.integer)) or n_people < 1:
        raise ValueError(f"n_people must be a positive integer, got {n_people!r}")
    n = int(n_people)
    rng = np.random.default_rng(seed)

    age, hh, nb = _households(rng, n)
    band = _age_band_index(age)
    role = _roles(rng, age)

    pairs = {
        "household": _household_contacts(hh, n),
        "school": _school_contacts(rng, band, nb, role, n),
        "work": _work_contacts(rng, role, n),
        "community": _community_contacts(rng, band, nb, n),
    }

    # Random public ids so that id order says nothing about households.
    id_of = rng.permutation(n)
    src_parts, tgt_parts, set_parts, min_parts = [], [], [], []
    for k, setting in enumerate(SETTINGS):
        s, t = pairs[setting]
        src_parts.append(id_of[s])
        tgt_parts.append(id_of[t])
        set_parts.append(np.full(s.size, k, dtype=np.int8))
        min_parts.append(_minutes(rng, setting, s.size))
    src = np.concatenate(src_parts)
    tgt = np.concatenate(tgt_parts)
    setting_idx = np.concatenate(set_parts)
    minutes = np.concatenate(min_parts)
    # Arbitrary orientation and row order.
    flip = rng.random(src.size) < 0.5
    src, tgt = np.where(flip, tgt, src), np.where(flip, src, tgt)
    rows = rng.permutation(src.size)

    ids = _node_ids(n)
    edges = pa.table(
        {
            "source": ids.take(pa.array(src[rows])),
            "target": ids.take(pa.array(tgt[rows])),
            "setting": pa.array(np.asarray(SETTINGS, dtype=object)[setting_idx[rows]], type=pa.string()),
            "minutes": pa.array(minutes[rows], type=pa.int64()),
        }
    )

    by_id = np.argsort(id_of)  # person index holding id 0, 1, 2, ...
    people = pa.table(
        {
            "node": ids,
            "age_band": pa.array(np.asarray(AGE_BANDS, dtype=object)[band[by_id]], type=pa.string()),
            "neighbourhood": pa.array(np.asarray(NEIGHBOURHOODS, dtype=object)[nb[by_id]], type=pa.string()),
            "role": pa.array(np.asarray(ROLES, dtype=object)[role[by_id]], type=pa.string()),
        }
    )
    return edges, people


def write_town(
    directory: str | PathLike[str], n_people: int = 30_000, seed: int = 20261201
) -> dict[str, pathlib.Path]:
    """Generate the town and write it as two CSV files.

    Parameters
    ----------
    directory : str or os.PathLike
        Output directory; created (with parents) if missing. Existing files of
        the same names are replaced.
    n_people : int, default 30000
        Number of residents, passed to :func:`generate_town`.
    seed : int, default 20261201
        Random seed, passed to :func:`generate_town`.

    Returns
    -------
    dict of str to pathlib.Path
        ``{"people": <directory>/people.csv, "edges": <directory>/contacts.csv}``.

    See Also
    --------
    generate_town : the tables that are written.
    """
    out = pathlib.Path(directory)
    out.mkdir(parents=True, exist_ok=True)
    edges, people = generate_town(n_people, seed)
    paths = {"people": out / PEOPLE_FILE, "edges": out / EDGES_FILE}
    pacsv.write_csv(people, paths["people"])
    pacsv.write_csv(edges, paths["edges"])
    return paths


# --------------------------------------------------------------------------- demo policy and inputs

DEMO_POLICY_FILE = "policy.toml"


def _toml_inline(mapping: dict[str, str]) -> str:
    return "{ " + ", ".join(f'"{k}" = "{v}"' for k, v in mapping.items()) + " }"


def demo_policy_text() -> str:
    """The example policy used by ``aggpub demo`` (TOML text)."""
    age_levels = ",\n  ".join(_toml_inline(level) for level in AGE_HIERARCHY)
    nb_levels = ",\n  ".join(_toml_inline(level) for level in NEIGHBOURHOOD_HIERARCHY)
    return f"""# Demo release policy for the invented town of {TOWN_NAME}.
title = "{TOWN_NAME} contact network, demo release"

[privacy]
unit = "edge"        # the guarantee covers any one contact between two residents
epsilon = 1.0        # total for this release

[grouping]
method = "attributes"
attributes = ["age_band", "neighbourhood"]
min_size = 20        # every supernode has at least 20 residents
# Small cells first give up neighbourhood detail (neighbourhood -> zone), then age detail.
merge_order = ["neighbourhood", "age_band"]

[grouping.hierarchies.age_band]
# 5-year bands -> 10-year bands -> 20-year bands
levels = [
  {age_levels}
]

[grouping.hierarchies.neighbourhood]
# neighbourhood -> zone
levels = [
  {nb_levels}
]

# Contact matrices by age band and by neighbourhood (the grouping attributes, by default), per setting:
# each contact's setting is declared, in the order that places a pair met in several settings.
[layers]
column = "setting"
values = [{", ".join(f'"{x}"' for x in SETTINGS)}]

[input]
source = "source"
target = "target"
node = "node"
"""


def write_demo_inputs(directory, n_people: int = 30_000, seed: int = 20261201) -> dict:
    """Write the demo town's people, contacts and example policy into ``directory``.

    Returns
    -------
    dict
        ``{"people": path, "edges": path, "policy": path}``.
    """
    paths = write_town(directory, n_people=n_people, seed=seed)
    policy_path = pathlib.Path(directory) / DEMO_POLICY_FILE
    policy_path.write_text(demo_policy_text(), encoding="utf-8")
    paths["policy"] = policy_path
    return paths
