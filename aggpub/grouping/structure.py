"""Structure-aware private grouping: supernodes of people with similar network positions.

A grouping computed from the edges is itself a release, so every step that reads
the edges goes through a differentially private mechanism and is charged to the
budget (privacy unit ``edge`` only):

1. **Noisy degrees.** Each person's number of contacts plus discrete Laplace
   noise. One contact changes the degrees of its two ends by one each, so the
   degree vector has L1 sensitivity 2 (:data:`DEGREE_SENSITIVITY`).
2. **Degree tiers.** People are cut into quantile tiers of their *noisy* degree;
   adjacent tiers smaller than ``min_size`` are merged. This step reads only the
   noisy degrees (post-processing, no further budget).
3. **Refinement rounds (optional).** In the central-model spirit of LDPGen
   (Qin et al. 2017), each round releases every person's noisy number of
   contacts into each current supernode -- the whole ``n_people x n_supernodes``
   matrix, zeros included -- and re-clusters people by these noisy, normalised
   profiles with k-means; clusters below ``min_size`` are merged into the nearest
   cluster. One contact ``(u, v)`` changes row ``u`` at ``v``'s supernode and row
   ``v`` at ``u``'s supernode by one each, so the matrix has L1 sensitivity 2
   (:data:`PROFILE_SENSITIVITY`) whatever the current grouping (which is itself
   a function of earlier noisy outputs; adaptive sequential composition).

The assignment is a function of the noisy outputs and public data only, so the
supernode sizes (and the tier labels) are post-processing of a differentially
private output and may be released exactly. Derivations: ``docs/privacy-grouping.md``.

References
----------
Z. Qin, T. Yu, Y. Yang, I. Khalil, X. Xiao, K. Ren, "Generating synthetic
decentralized social graphs with local differential privacy", ACM CCS 2017.

A. Ghosh, T. Roughgarden, M. Sundararajan, "Universally utility-maximizing
privacy mechanisms", STOC 2009.

M. Hay, C. Li, G. Miklau, D. Jensen, "Accurate estimation of the degree
distribution of private networks", ICDM 2009.

C. Dwork, A. Roth, "The Algorithmic Foundations of Differential Privacy",
Foundations and Trends in Theoretical Computer Science 9(3-4), 2014 (post-processing,
Proposition 2.1; composition, Theorem 3.16).
"""

from __future__ import annotations

__all__ = ["group_by_structure", "noisy_degrees", "degree_tiers",
           "DEGREE_SENSITIVITY", "PROFILE_SENSITIVITY", "MAX_PROFILE_CELLS"]

import math

import numpy as np
import pyarrow as pa

from ..errors import PolicyError, PrivacyError
from ..noise.mechanisms import GeometricMechanism
from ..budget import SENSITIVITY, Spend, equal_split
from ._common import Grouping

#: L1 sensitivity of the degree vector under unit ``edge`` (one contact, two ends).
DEGREE_SENSITIVITY = SENSITIVITY[("edge", "grouping_degrees")]
#: L1 sensitivity of the person x supernode contact-profile matrix under unit ``edge``.
PROFILE_SENSITIVITY = SENSITIVITY[("edge", "grouping_profiles")]
#: Largest noisy profile matrix (cells) a refinement round builds; beyond it the round is refused.
MAX_PROFILE_CELLS = 60_000_000
#: Weight of the standardised log noisy degree next to the normalised profile columns in k-means
#: (small: the profile, not the degree, drives the refinement; tuned on planted partitions).
DEGREE_FEATURE_WEIGHT = 0.1
_ROW_CHUNK_CELLS = 4_000_000  # cells noised per chunk (bounds temporary memory)


# --------------------------------------------------------------------------- step 1


def noisy_degrees(degrees, epsilon: float, source, name: str = "grouping_degrees"):
    """Degrees plus discrete Laplace noise of scale ``2 / epsilon``.

    Parameters
    ----------
    degrees : array_like of int
        True number of contacts of every person.
    epsilon : float
        Budget of this step.
    source : RandomSource
        Randomness (operating-system entropy for a release).
    name : str
        Name of the spend in the manifest.

    Returns
    -------
    noisy : numpy.ndarray of int64
    spend : Spend

    References
    ----------
    A. Ghosh, T. Roughgarden, M. Sundararajan, "Universally utility-maximizing
    privacy mechanisms", STOC 2009.
    """
    mech = GeometricMechanism(epsilon=epsilon, sensitivity=DEGREE_SENSITIVITY)
    noisy = mech.randomise(np.asarray(degrees, dtype=np.int64), source)
    return noisy, Spend.of(name, mech)


# --------------------------------------------------------------------------- step 2


def degree_tiers(values, n_tiers: int, min_size: int) -> np.ndarray:
    """Quantile tiers of ``values`` with every tier holding at least ``min_size`` people.

    Cut points are the ``1/q, ..., (q-1)/q`` quantiles of ``values`` with
    ``q = min(n_tiers, len(values) // min_size)``; people with equal values stay
    in the same tier. While a tier has fewer than ``min_size`` members it is
    merged with its smaller adjacent tier.

    Parameters
    ----------
    values : array_like
        One value per person (the noisy degrees; only they are read).
    n_tiers : int
        Most tiers wanted (``>= 1``).
    min_size : int
        Minimum number of members per tier; ``len(values) >= min_size`` is required.

    Returns
    -------
    numpy.ndarray of int64
        Tier of each person, ``0`` (lowest values) to ``t - 1``.
    """
    values = np.asarray(values)
    n = len(values)
    if n < min_size or n == 0:
        raise PrivacyError(f"cannot form degree tiers of at least {min_size} people from {n} people")
    q = max(1, min(int(n_tiers), n // int(min_size)))
    if q == 1:
        return np.zeros(n, dtype=np.int64)
    cuts = np.unique(np.quantile(values, np.arange(1, q) / q, method="lower"))
    tier = np.searchsorted(cuts, values, side="right").astype(np.int64)
    counts = list(np.bincount(tier, minlength=len(cuts) + 1))
    # groups of consecutive raw tiers, merged until all reach min_size
    bounds = list(range(len(counts) + 1))  # group i covers raw tiers bounds[i]..bounds[i+1]-1
    sizes = counts
    while len(sizes) > 1 and min(sizes) < min_size:
        i = int(np.argmin(sizes))
        if i == 0:
            j = 1
        elif i == len(sizes) - 1:
            j = i - 1
        else:
            j = i - 1 if sizes[i - 1] <= sizes[i + 1] else i + 1
        lo = min(i, j)
        sizes[lo:lo + 2] = [sizes[lo] + sizes[lo + 1]]
        del bounds[lo + 1]
    raw_to_group = np.repeat(np.arange(len(sizes)), np.diff(bounds))
    return raw_to_group[tier].astype(np.int64)


# --------------------------------------------------------------------------- step 3


def _profile_features(engine, assignment, n_groups, dhat, epsilon, source, name, max_cells):
    """Noisy normalised contact profiles (float32, ``n x (n_groups + 1)``) and the spend.

    The last column is the standardised log noisy degree (post-processing of step 1).
    """
    n = len(assignment)
    cells = n * n_groups
    if cells > max_cells:
        raise PolicyError(f"'grouping.rounds': a refinement round needs a noisy profile matrix of "
                          f"{n:,} people x {n_groups:,} supernodes = {cells:,} cells, above the limit of "
                          f"{max_cells:,}; set grouping.rounds = 0 or use fewer grouping.tiers")
    mech = GeometricMechanism(epsilon=epsilon, sensitivity=PROFILE_SENSITIVITY)
    person, group, count = engine.contact_profiles(np.asarray(assignment, dtype=np.int32))
    order = np.argsort(person, kind="stable")
    person, group, count = person[order], group[order], count[order]
    feats = np.empty((n, n_groups + 1), dtype=np.float32)
    rows = max(1, _ROW_CHUNK_CELLS // max(1, n_groups))
    for start in range(0, n, rows):
        stop = min(n, start + rows)
        lo, hi = np.searchsorted(person, [start, stop])
        block = np.zeros((stop - start, n_groups), dtype=np.int64)
        block[person[lo:hi] - start, group[lo:hi]] = count[lo:hi]
        noisy = np.maximum(mech.randomise(block, source), 0).astype(np.float64)  # every cell, zeros included
        total = noisy.sum(axis=1, keepdims=True)
        feats[start:stop, :n_groups] = noisy / np.maximum(total, 1.0)
    logd = np.log1p(np.maximum(np.asarray(dhat, dtype=np.float64), 0.0))
    sd = logd.std()
    feats[:, n_groups] = DEGREE_FEATURE_WEIGHT * (logd - logd.mean()) / (sd if sd > 0 else 1.0)
    spend = Spend.of(name, mech)
    return feats, spend


def merge_small_clusters(labels, features, min_size: int) -> np.ndarray:
    """Merge clusters with fewer than ``min_size`` members into the nearest cluster.

    The smallest cluster is merged first, into the cluster whose centroid is
    nearest (Euclidean) to its own; centroids are size-weighted means. Repeats
    until every cluster has ``min_size`` members (or one cluster is left).

    Returns
    -------
    numpy.ndarray of int64
        Cluster labels renumbered ``0..c-1``.
    """
    labels = np.asarray(labels, dtype=np.int64)
    uniq, labels = np.unique(labels, return_inverse=True)
    k = len(uniq)
    sizes = np.bincount(labels, minlength=k).astype(np.float64)
    sums = np.zeros((k, features.shape[1]), dtype=np.float64)
    _add_rows(sums, labels, features)
    alive = np.ones(k, dtype=bool)
    target = np.arange(k)
    while alive.sum() > 1:
        live = np.flatnonzero(alive)
        small = live[sizes[live] < min_size]
        if len(small) == 0:
            break
        i = small[np.argmin(sizes[small])]
        others = live[live != i]
        cent = sums[others] / sizes[others, None]
        ci = sums[i] / sizes[i]
        j = others[np.argmin(((cent - ci) ** 2).sum(axis=1))]
        sums[j] += sums[i]
        sizes[j] += sizes[i]
        alive[i] = False
        target[target == i] = j
    _, out = np.unique(target[labels], return_inverse=True)
    return out.astype(np.int64)


def _add_rows(sums, labels, features):
    for j in range(features.shape[1]):
        sums[:, j] += np.bincount(labels, weights=features[:, j], minlength=sums.shape[0])


def _kmeans_labels(features, k, seed):
    from sklearn.cluster import KMeans

    if k <= 1 or len(features) <= k:
        return np.zeros(len(features), dtype=np.int64)
    km = KMeans(n_clusters=k, n_init=2, max_iter=100, random_state=seed)
    return km.fit_predict(features).astype(np.int64)


def _public_seed(source) -> int:
    """A seed for k-means initialisation (post-processing: need not be secret)."""
    return int(source.uniform(1)[0] * (2 ** 31 - 1))


# --------------------------------------------------------------------------- blocks


def _tiers_in_blocks(values, blocks, n_tiers, min_size):
    """Degree tiers inside each block; returns (group id per person, block of each group)."""
    blocks = np.asarray(blocks, dtype=np.int64)
    order = np.argsort(blocks, kind="stable")
    starts = np.flatnonzero(np.r_[True, np.diff(blocks[order]) != 0])
    ends = np.r_[starts[1:], len(order)]
    group = np.empty(len(values), dtype=np.int64)
    group_block = []
    next_id = 0
    for s, e in zip(starts, ends):  # one iteration per block (attribute cell), not per person
        members = order[s:e]
        t = degree_tiers(values[members], n_tiers, min_size)
        group[members] = t + next_id
        nt = int(t.max()) + 1
        group_block.extend([int(blocks[members[0]])] * nt)
        next_id += nt
    return group, np.asarray(group_block, dtype=np.int64)


def _cluster_in_blocks(features, group, group_block, min_size, seed):
    """k-means inside each block with as many clusters as the block has groups now."""
    person_block = group_block[group]
    order = np.argsort(person_block, kind="stable")
    pb = person_block[order]
    starts = np.flatnonzero(np.r_[True, np.diff(pb) != 0])
    ends = np.r_[starts[1:], len(order)]
    k_per_block = np.bincount(group_block)
    new = np.empty(len(group), dtype=np.int64)
    new_block = []
    next_id = 0
    for s, e in zip(starts, ends):
        members = order[s:e]
        b = int(pb[s])
        k = int(k_per_block[b])
        if k <= 1:
            lab = np.zeros(len(members), dtype=np.int64)
        else:
            x = features[members]
            lab = merge_small_clusters(_kmeans_labels(x, k, seed), x, min_size)
        new[members] = lab + next_id
        nk = int(lab.max()) + 1
        new_block.extend([b] * nk)
        next_id += nk
    return new, np.asarray(new_block, dtype=np.int64)


def _order_groups(group, group_block, dhat):
    """Renumber groups by (block, mean noisy degree); return (assignment, block, tier rank)."""
    n_groups = len(group_block)
    sizes = np.bincount(group, minlength=n_groups)
    mean_d = np.bincount(group, weights=np.asarray(dhat, dtype=np.float64), minlength=n_groups) / \
        np.maximum(sizes, 1)
    perm = np.lexsort((np.arange(n_groups), mean_d, group_block))  # new id -> old id
    old_to_new = np.empty(n_groups, dtype=np.int64)
    old_to_new[perm] = np.arange(n_groups)
    blocks_sorted = group_block[perm]
    first = np.r_[0, np.flatnonzero(np.diff(blocks_sorted) != 0) + 1]
    block_start = np.repeat(first, np.diff(np.r_[first, n_groups]))
    tier = np.arange(n_groups) - block_start
    return old_to_new[group].astype(np.int32), blocks_sorted, tier


# --------------------------------------------------------------------------- public entry


def group_by_structure(network, min_size: int, epsilon: float, source, *, tiers: int = 8, rounds: int = 0,
                       unit: str = "edge", attributes=(), hierarchies=None, merge_order=None,
                       max_profile_cells: int = MAX_PROFILE_CELLS) -> Grouping:
    """Group people by noisy degree tiers (and optional noisy contact-profile rounds).

    With ``attributes`` (method ``attributes+structure``) people are first put
    into public attribute cells by :func:`~aggpub.grouping.group_by_attributes`
    and each cell is split by noisy degree into tiers of at least ``min_size``;
    refinement rounds then cluster people inside their cell.

    Parameters
    ----------
    network : Network
        Ingested network (its engine supplies degrees and contact profiles).
    min_size : int
        Minimum members per supernode.
    epsilon : float
        The grouping's whole budget; split equally between the degree step and
        each refinement round.
    source : RandomSource
        Randomness for the noise (and the k-means initialisation).
    tiers : int
        Most degree tiers (per attribute cell for the combined method).
    rounds : int
        Refinement rounds with noisy contact profiles.
    unit : str
        Privacy unit; only ``"edge"`` is supported.
    attributes, hierarchies, merge_order
        Attribute cells for the combined method (see ``group_by_attributes``).
    max_profile_cells : int
        Largest noisy profile matrix a round may build.

    Returns
    -------
    Grouping
        ``public = False``; ``spends`` lists every epsilon the grouping used.

    Raises
    ------
    PrivacyError
        Unit ``person`` (no sensitivity bound derived), or too few people.
    PolicyError
        A refinement round would exceed ``max_profile_cells``.

    References
    ----------
    Z. Qin, T. Yu, Y. Yang, I. Khalil, X. Xiao, K. Ren, "Generating synthetic
    decentralized social graphs with local differential privacy", ACM CCS 2017.
    """
    if unit != "edge":
        raise PrivacyError(f"'grouping.method' structure grouping is only derived for privacy unit 'edge', "
                           f"not '{unit}': one person changes up to max_contacts degrees and every row of the "
                           "profile matrix; no bound is implemented")
    if not (epsilon > 0 and math.isfinite(epsilon)):
        raise PolicyError("'grouping.epsilon_share' must give the structure grouping a positive epsilon")
    n = network.n_people
    if n < min_size:
        raise PrivacyError(f"'grouping.min_size' = {min_size} is larger than the population ({n} people)")
    attributes = list(attributes or ())
    method = "attributes+structure" if attributes else "structure"
    eps_parts = equal_split(float(epsilon), int(rounds) + 1)
    spends, notes = [], []

    if attributes:
        from .attributes import group_by_attributes

        cells = group_by_attributes(network.people, attributes, min_size, hierarchies, merge_order)
        blocks = cells.assignment.astype(np.int64)
        notes.extend(cells.notes)
    else:
        cells = None
        blocks = np.zeros(n, dtype=np.int64)

    dhat, spend = noisy_degrees(network.engine.degrees(n), eps_parts[0], source)
    spends.append(spend)
    group, group_block = _tiers_in_blocks(dhat, blocks, tiers, min_size)
    notes.append(f"people split by noisy degree (epsilon {spend.epsilon:g}, discrete Laplace scale "
                 f"{spend.scale:g}) into {len(group_block)} tier(s) of at least {min_size}")

    for r in range(1, int(rounds) + 1):
        feats, spend = _profile_features(network.engine, group.astype(np.int32), len(group_block), dhat,
                                         eps_parts[r], source, f"grouping_profiles_round{r}",
                                         max_profile_cells)
        spends.append(spend)
        group, group_block = _cluster_in_blocks(feats, group, group_block, min_size, _public_seed(source))
        del feats
        notes.append(f"refinement round {r}: noisy contact profiles (epsilon {spend.epsilon:g}) clustered "
                     f"into {len(group_block)} supernode(s)")

    assignment, block_of, tier = _order_groups(group, group_block, dhat)
    sizes = np.bincount(assignment, minlength=len(block_of))
    if (sizes < min_size).any():  # pragma: no cover - guaranteed by the tiering and merging
        raise PrivacyError("internal check failed: a structure supernode is below min_size")
    cols = {"supernode": pa.array(np.arange(len(block_of), dtype=np.int64))}
    if cells is not None:
        for a in attributes:
            cols[a] = cells.labels.column(a).take(pa.array(block_of))
    cols["tier"] = pa.array(tier.astype(np.int64))
    return Grouping(assignment=assignment, labels=pa.table(cols), method=method, spends=spends,
                    notes=notes, public=False)
