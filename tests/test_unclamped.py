"""The unclamped noisy counts: post-processing that keeps sums unbiased.

The released ``edge_count`` is clamped at zero, which lifts every empty cell; the
``edge_count_unclamped`` column is true count plus zero-mean discrete Laplace noise
(Ghosh, Roughgarden, Sundararajan, STOC 2009: variance 2a/(1-a)^2), so the sum over
all m cells differs from the true total by noise of variance m * 2a/(1-a)^2.
"""

from __future__ import annotations

import math

import numpy as np

from aggpub.audit import audit_release
from aggpub.demo import generate_town
from aggpub.pipeline import release_tables

from .conftest import simple_policy


def test_unclamped_sums_are_unbiased_and_audited():
    edges, people = generate_town(3000, seed=11)
    rel = release_tables(edges, people, simple_policy(["age_band", "neighbourhood"], min_size=20), seed=4)
    se = rel.superedges
    raw = se.column("edge_count_unclamped").to_numpy()
    clamped = se.column("edge_count").to_numpy()
    cap = se.column("possible_pairs").to_numpy()
    assert np.array_equal(np.clip(raw, 0, cap), clamped)  # edge_count is exactly the clamped raw value
    true_total = int(rel.truth["superedges"].count.sum())
    mech = rel.mechanisms["superedge_counts"]
    sd = math.sqrt(len(raw) * mech.variance())
    assert abs(int(raw.sum()) - true_total) < 4 * sd  # unbiased: within 4 sd of the truth
    assert int(clamped.sum()) - true_total > 4 * sd  # the clamped sum is biased upwards, far beyond noise
    audit = audit_release(rel, monte_carlo=0, structure_samples=0)
    cuts = audit["queries"]["cut_queries"]
    assert cuts["from_unclamped_counts"]["mean_absolute_error"] < cuts["mean_absolute_error"]
