"""Totals of clipped integer weights (e.g. minutes of contact) per superedge cell."""

from __future__ import annotations

__all__ = ["release_weight_totals"]

import numpy as np
import pyarrow as pa

from ..budget import Spend
from ..cells import possible_pairs
from ..estimates.consistency import clamp
from ..noise.mechanisms import GeometricMechanism
from .superedges import SuperedgeTruth


def release_weight_totals(truth: SuperedgeTruth, public_sizes, clip: int, epsilon: float, sens: float,
                          source, confidence: float = 0.95):
    """Noisy totals of clipped integer weights on every superedge cell, zeros included.

    ``truth.count`` holds the true totals of ``round(min(max(w, 0), clip))`` per
    cell. Discrete Laplace noise with scale ``sens / epsilon``, then
    post-processing: clamp to ``[0, clip * possible pairs]``.

    Returns
    -------
    table : pyarrow.Table
        ``supernode_a``, ``supernode_b``, ``weight_total``, ``weight_total_unclamped`` (the noisy value
        before clamping, unbiased), ``max_weight_total``, ``noise_scale``, ``ci95_half_width``.
    spend : Spend
    mechanism : GeometricMechanism
    """
    mech = GeometricMechanism(epsilon=epsilon, sensitivity=sens)
    noisy = mech.randomise(truth.count, source)
    cap = possible_pairs(public_sizes, truth.a, truth.b) * int(clip)
    released = clamp(noisy, 0, cap)
    n = len(released)
    table = pa.table({
        "supernode_a": pa.array(truth.a),
        "supernode_b": pa.array(truth.b),
        "weight_total": pa.array(released),
        # the noisy total before clamping (may be negative): unbiased, so sums of it are unbiased (issue 13.4)
        "weight_total_unclamped": pa.array(np.asarray(noisy, dtype=np.int64)),
        "max_weight_total": pa.array(cap.astype(np.int64)),
        "noise_scale": pa.array(np.full(n, mech.scale)),
        "ci95_half_width": pa.array(np.full(n, mech.interval_half_width(confidence), dtype=np.int64)),
    })
    spend = Spend.of("weight_totals", mech)
    return table, spend, mech
