"""Per-supernode sorted degree sequences: every member's number of contacts, sorted within the supernode.

Released: for each supernode ``A`` of public size ``m_A``, the degrees of its members
in non-decreasing order, ``s_A[0] <= ... <= s_A[m_A - 1]``; all supernodes together
form one vector of ``N`` entries (one per person, supernode by supernode), each with
discrete Laplace noise.

Sensitivity under unit ``edge``: 2 (``docs/privacy.md`` section 3.1). Adding the
contact ``{u, v}`` raises ``d(u)`` and ``d(v)`` by one and no other degree. Raising
one element of value ``x`` of a multiset by one changes its sorted sequence in
exactly one position (the last position holding ``x`` becomes ``x + 1``: positions
before it hold values ``<= x`` and keep them, positions after it hold values
``>= x + 1`` and keep them), an L1 change of 1. The two raises change the vector by
exactly 2 (each is a ``+1`` at one position; ``+1``s cannot cancel); removal is the
reverse. Hay, Li, Miklau and Jensen (ICDM 2009) prove the same constant for the
single sorted sequence of a whole network. The vector's shape (the supernode sizes)
is public under ``edge``; the constant holds for every fixed grouping.

Unit ``person``: the vector's length is a private size and one person moves the
sequences of all of their contacts' supernodes; not derived, so the policy refuses it.

The post-processing (isotonic fit, rescaling to the consistent degree totals) is in
:mod:`aggpub.estimates.degrees`.

References
----------
M. Hay, C. Li, G. Miklau, D. Jensen, "Accurate estimation of the degree distribution
of private networks", ICDM 2009.
"""

from __future__ import annotations

__all__ = ["SequenceTruth", "sorted_sequences", "release_degree_sequences"]

from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from ..budget import Spend
from ..noise.mechanisms import GeometricMechanism


@dataclass(frozen=True)
class SequenceTruth:
    """True sorted degrees (confidential): ``values[i]`` is position ``position[i]`` of supernode ``group[i]``."""

    values: np.ndarray
    group: np.ndarray
    position: np.ndarray


def sorted_sequences(degrees, assignment, n_groups: int) -> SequenceTruth:
    """Degrees sorted within each supernode, supernodes in id order (inputs already validated)."""
    deg = np.asarray(degrees, dtype=np.int64)
    assignment = np.asarray(assignment, dtype=np.int64)
    span = int(deg.max()) + 1 if len(deg) else 1
    key = np.sort(assignment * span + deg)  # one sort of combined keys (faster than a lexsort)
    group, values = np.divmod(key, span)
    sizes = np.bincount(group, minlength=n_groups)
    starts = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    position = np.arange(len(group), dtype=np.int64) - starts[group]
    return SequenceTruth(values=values, group=group, position=position)


def release_degree_sequences(truth: SequenceTruth, epsilon: float, sens: float, source, confidence: float = 0.95):
    """Noisy sorted degree sequences (one vector, every entry noised).

    Returns
    -------
    table : pyarrow.Table
        ``supernode``, ``position`` (0 = fewest contacts), ``degree_noisy`` (the noisy
        value as drawn: unbiased, may be negative), ``noise_scale``, ``ci95_half_width``.
        The post-processing adds ``degree_estimate`` (:mod:`aggpub.estimates.degrees`).
    spend : Spend
    mechanism : GeometricMechanism
    """
    mech = GeometricMechanism(epsilon=epsilon, sensitivity=sens)
    noisy = mech.randomise(truth.values, source)
    n = len(noisy)
    table = pa.table({
        "supernode": pa.array(truth.group.astype(np.int64)),
        "position": pa.array(truth.position.astype(np.int64)),
        "degree_noisy": pa.array(noisy.astype(np.int64)),
        "noise_scale": pa.array(np.full(n, mech.scale)),
        "ci95_half_width": pa.array(np.full(n, mech.interval_half_width(confidence), dtype=np.int64)),
    })
    return table, Spend.of("degree_sequences", mech), mech
