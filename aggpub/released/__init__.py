"""The released statistics: for each, the true value from the engine, its noise and its public table.

The pipeline releases the enabled statistics of :data:`STATISTICS` in order,
each through the same three steps (:func:`release_statistics`): count on the
engine (confidential), look up the sensitivity in :mod:`aggpub.budget`, draw the
noise and post-process. Every sensitivity is derived in ``docs/privacy.md``.
"""

from __future__ import annotations

__all__ = ["SuperedgeTruth", "dense_truth", "superedge_sparse_threshold", "release_superedge_counts",
           "release_cell_counts", "released_sizes", "checked_sizes", "release_degree_histograms",
           "release_weight_totals", "release_degree_sequences", "release_triangle_count", "Statistic",
           "STATISTICS", "StatisticsRun", "release_statistics", "post_process"]

from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from ..budget import sensitivity
from ..cells import n_cells
from ..errors import PolicyError
from ..pages import small_pages
from .degree_histograms import release_degree_histograms
from .degree_sequences import release_degree_sequences, sorted_sequences
from .sizes import checked_sizes, release_cell_counts, released_sizes
from .superedges import SuperedgeTruth, dense_truth, release_superedge_counts, superedge_sparse_threshold
from .triangles import ManifestFields, release_triangle_count, triangle_truth
from .weight_totals import release_weight_totals


@dataclass(frozen=True)
class _Context:
    """What each statistic's steps receive (inputs already validated)."""

    network: object
    grouping: object
    policy: object
    sizes: np.ndarray  # public or already-released supernode sizes
    source: object
    progress: Callable
    budget: object = None  # the release's budget (a statistic of several spends splits its share against it)
    counted: dict = field(default_factory=dict)  # true tables counted so far (confidential; a later count may reuse them)


@dataclass(frozen=True)
class Statistic:
    """One released statistic: its policy entry, how it is counted and how it is released.

    ``count(ctx, option)`` returns the confidential truth (and extra manifest
    fields); ``release(ctx, truth, option, epsilon, sens)`` returns ``(table,
    spend, mechanism)``, where ``table`` is a :class:`~aggpub.released.triangles.ManifestFields` for a
    statistic released in the manifest itself (the triangle count), or a dict of tables (with lists of
    spends and a dict of mechanisms) for a statistic of several tables (the contact views);
    ``sens_args(policy, option)`` the keyword arguments of
    :func:`aggpub.budget.sensitivity` beyond unit and name.
    """

    name: str
    table: str  # name of its table in the bundle (and of its truth for the audit)
    counting: str  # progress line while the engine counts
    count: Callable
    release: Callable
    describe: Callable  # (truth, epsilon, sens, extra) -> progress line before the noise


def _count_superedges(ctx, option, eps, sens):
    n_groups = ctx.grouping.n_supernodes
    nz_a, nz_b, nz_c = ctx.network.engine.superedge_counts(ctx.grouping.assignment)
    threshold = superedge_sparse_threshold(option, n_groups, eps, sens)  # None: dense
    if threshold is None:
        return dense_truth(n_groups, nz_a, nz_b, nz_c), {}
    # sparse release: never builds the dense table
    extra = {"superedges_sparse": True, "superedges_sparse_threshold": threshold,
             "superedge_cells": n_cells(n_groups)}
    return SuperedgeTruth(a=nz_a, b=nz_b, count=nz_c, complete=False), extra


def _release_superedges(ctx, truth, option, eps, sens, extra):
    return release_superedge_counts(truth, ctx.sizes, eps, sens, ctx.source,
                                    sparse_threshold=extra.get("superedges_sparse_threshold"),
                                    n_groups=ctx.grouping.n_supernodes)


def _describe_superedges(ctx, truth, eps, sens, extra):
    threshold = extra.get("superedges_sparse_threshold")
    return (f"adding noise to {n_cells(ctx.grouping.n_supernodes):,} superedge cells (epsilon {eps:g}, "
            f"sensitivity {sens:g})"
            + ("" if threshold is None else f", sparse release keeping noisy counts >= {threshold}"))


def _count_histograms(ctx, option, eps, sens):
    return ctx.network.engine.degree_histograms(ctx.grouping.assignment, ctx.grouping.n_supernodes,
                                                option.max_degree), {}


def _release_histograms(ctx, truth, option, eps, sens, extra):
    return release_degree_histograms(truth, ctx.sizes, eps, sens, ctx.source,
                                     max_possible_degree=ctx.policy.privacy.max_contacts)


def _count_weights(ctx, option, eps, sens):
    if not ctx.network.weighted:
        raise PolicyError(f"'components.weight_totals.column' = '{option.column}': the network was read "
                          "without a weight column")
    nz_a, nz_b, nz_t = ctx.network.engine.weight_totals(ctx.grouping.assignment, option.clip)
    return dense_truth(ctx.grouping.n_supernodes, nz_a, nz_b, nz_t), {}


def _release_weights(ctx, truth, option, eps, sens, extra):
    return release_weight_totals(truth, ctx.sizes, option.clip, eps, sens, ctx.source)


def _count_views(ctx, option, eps, sens):
    from .contact_views import count_contact_views

    return count_contact_views(ctx, option)


def _release_views(ctx, truth, option, eps, sens, extra):
    from .contact_views import release_contact_views

    return release_contact_views(ctx, truth, option, eps)


def _describe_views(ctx, truth, eps, sens, extra):
    cells = sum(int(t.size) for t in truth["counts"].values())
    layers = f" over {len(ctx.network.layers)} layers" if ctx.network.layers else ""
    return (f"adding noise to {len(truth['counts'])} contact view(s){layers}, {cells:,} cells"
            f"{' and their weight totals' if 'weights' in truth else ''} (epsilon {eps:g} in all, sensitivity "
            f"{sens:g} each)")


def _count_sequences(ctx, option, eps, sens):
    deg = ctx.network.engine.degrees(ctx.network.n_people)
    return sorted_sequences(deg, ctx.grouping.assignment, ctx.grouping.n_supernodes), {}


def _release_sequences(ctx, truth, option, eps, sens, extra):
    return release_degree_sequences(truth, eps, sens, ctx.source)


def _count_triangles(ctx, option, eps, sens):
    return triangle_truth(ctx.network.engine, ctx.network.n_people), {}


def _release_triangles(ctx, truth, option, eps, sens, extra):
    return release_triangle_count(truth, eps, ctx.source)


#: The statistics a release can hold, in the order they are counted and noised.
STATISTICS = (
    Statistic("superedge_counts", "superedges", "counting superedges", _count_superedges, _release_superedges,
              _describe_superedges),
    Statistic("degree_histograms", "degree_histograms", "counting degree histograms", _count_histograms, _release_histograms,
              lambda ctx, t, eps, sens, extra: f"adding noise to {t.size:,} degree-histogram bins "
                                               f"(epsilon {eps:g}, sensitivity {sens:g})"),
    Statistic("weight_totals", "weight_totals", "summing clipped weights per superedge", _count_weights, _release_weights,
              lambda ctx, t, eps, sens, extra: f"adding noise to {len(t.count):,} weight totals "
                                               f"(epsilon {eps:g}, sensitivity {sens:g})"),
    # issue 13: views by attribute (several tables and spends: aggpub.released.contact_views)
    Statistic("contact_views", "contact_views", "counting contact views", _count_views, _release_views,
              _describe_views),
    Statistic("degree_sequences", "degree_sequences", "sorting every supernode's numbers of contacts",
              _count_sequences, _release_sequences,
              lambda ctx, t, eps, sens, extra: f"adding noise to {len(t.values):,} sorted degrees "
                                               f"(epsilon {eps:g}, sensitivity {sens:g})"),
    Statistic("triangle_count", "triangle_count", "counting triangles", _count_triangles, _release_triangles,
              lambda ctx, t, eps, sens, extra: f"releasing the number of triangles (ladder mechanism, "
                                               f"epsilon {eps:g})"),
)


@dataclass
class StatisticsRun:
    """What :func:`release_statistics` produced: public tables, spends, mechanisms, confidential truth."""

    tables: dict = field(default_factory=dict)
    spends: list = field(default_factory=list)
    mechanisms: dict = field(default_factory=dict)
    truth: dict = field(default_factory=dict)
    manifest: dict = field(default_factory=dict)


def release_statistics(network, grouping, policy, sizes, epsilons: dict, source, progress, budget) -> StatisticsRun:
    """Count, noise and tabulate every enabled statistic of ``policy`` (inputs already validated).

    Parameters
    ----------
    network, grouping, policy
        The ingested network, its grouping and the release policy.
    sizes : numpy.ndarray
        Public or already-released supernode sizes (the caps of the post-processing).
    epsilons : dict
        Epsilon of each statistic (:func:`aggpub.policy.epsilon_shares`).
    source : RandomSource
    progress : callable
    budget : ReleaseBudget
        Each statistic's spend is recorded on it as soon as its noise is drawn.

    Returns
    -------
    StatisticsRun
    """
    from ..policy import component_enabled

    run = StatisticsRun()
    ctx = _Context(network=network, grouping=grouping, policy=policy, sizes=sizes, source=source,
                   progress=progress, budget=budget, counted=run.truth)
    unit, D = policy.privacy.unit, policy.privacy.max_contacts
    people = network.n_people if unit == "edge" else None  # public under edge only
    for stat in STATISTICS:
        option = getattr(policy.components, stat.name)
        if not component_enabled(policy, stat.name, people):
            continue
        eps = epsilons[stat.name]
        sens = sensitivity(unit, stat.name, D, option.clip if stat.name == "weight_totals" else None)
        progress(stat.counting)
        truth, extra = stat.count(ctx, option, eps, sens)
        run.truth[stat.table] = truth
        run.manifest.update(extra)
        progress(stat.describe(ctx, truth, eps, sens, extra))
        table, spend, mech = stat.release(ctx, truth, option, eps, sens, extra)
        for one in (spend if isinstance(spend, list) else [spend]):  # a statistic of several tables and spends
            budget.spend(one)
            run.spends.append(one)
        if isinstance(table, ManifestFields):  # released in the manifest itself (the triangle count)
            run.manifest.update(table)
        else:
            run.tables.update(table if isinstance(table, dict) else {stat.table: table})
        run.mechanisms.update(mech if isinstance(mech, dict) else {stat.name: mech})
    if run.tables:
        progress("estimating non-negative, consistent counts and degrees (post-processing)")
        with small_pages():  # many short-lived arrays of the table's size (see aggpub.pages)
            post_process(run, sizes, people=int(np.asarray(sizes).sum()))
    return run


def post_process(run: StatisticsRun, sizes, *, people: int) -> None:
    """Add the estimate columns every derived view uses (post-processing of released values only).

    * ``superedges.edge_count_estimate`` (float64): non-negative cells, at most their
      possible pairs, whose per-supernode degree totals and whole-table sum are the
      best linear unbiased ones (:func:`aggpub.estimates.counts.consistent_counts`,
      from ``edge_count_unclamped`` and, when released, the sums of the noisy degree
      sequences). A sparse release keeps its clamped counts (its absent cells are not
      known), and says so in the manifest.
    * ``degree_sequences.degree_estimate`` (float64): the isotonic fit of the noisy
      sorted degrees, rescaled to the consistent degree totals
      (:mod:`aggpub.estimates.degrees`).

    Reads only the released tables, the mechanisms' noise laws and the public or
    released ``sizes``; ``people`` is their sum.
    """
    import pyarrow as pa

    from ..estimates import degrees as dest

    sizes = np.asarray(sizes, dtype=np.int64)
    n = len(sizes)
    se = run.tables.get("superedges")
    seq = run.tables.get("degree_sequences")
    z = v_z = v_d = None
    if seq is not None:
        group = np.asarray(seq.column("supernode").to_numpy(), dtype=np.int64)
        noisy = np.asarray(seq.column("degree_noisy").to_numpy(), dtype=np.float64)
        v_d = run.mechanisms["degree_sequences"].variance()
        z = np.bincount(group, weights=noisy, minlength=n)
        v_z = np.maximum(sizes, 1) * v_d
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(max_workers=1, thread_name_prefix="aggpub-degree-fit") as pool:
        # the degree sequences' isotonic fit does not read the counts: it runs beside their estimate
        fit = pool.submit(dest.fit_sorted_degrees, noisy, group, people, v_d) if seq is not None else None
        totals = _estimate_counts(run, se, sizes, n, z, v_z)
        if seq is not None:
            if totals is None:
                totals = np.maximum(z, 0.0)
            target = dest.degree_targets(fit.result(), group, sizes, totals, cap=max(people - 1, 0))
            run.tables["degree_sequences"] = seq.add_column(3, "degree_estimate",
                                                            pa.array(target, type=pa.float64()))


def _estimate_counts(run: StatisticsRun, se, sizes, n: int, z, v_z):
    """``superedges.edge_count_estimate`` (see :func:`post_process`); the consistent degree totals, or ``None``."""
    import pyarrow as pa

    from ..cells import n_cells
    from ..estimates.counts import consistent_counts

    totals = None
    if se is not None:
        y = np.asarray(se.column("edge_count_unclamped").to_numpy(), dtype=np.float64)
        cap = np.asarray(se.column("possible_pairs").to_numpy(), dtype=np.int64)
        a = np.asarray(se.column("supernode_a").to_numpy(), dtype=np.int64)
        b = np.asarray(se.column("supernode_b").to_numpy(), dtype=np.int64)
        if run.manifest.get("superedges_sparse") or len(a) != n_cells(n):
            est = np.asarray(se.column("edge_count").to_numpy(), dtype=np.float64)
            run.manifest["superedge_estimates"] = "clamped noisy counts (sparse release: absent cells unknown)"
        else:
            res = consistent_counts(y, sizes, run.mechanisms["superedge_counts"].variance(), a, b,
                                    z=z, v_z=v_z, cap=cap)
            est, totals = res.x, res.totals
            run.manifest["superedge_estimates"] = (
                "least-squares non-negative cells with the best linear unbiased per-supernode degree totals"
                + (" (superedge counts and degree sequences together)" if z is not None else ""))
            run.manifest["superedge_estimates_max_total_gap"] = float(res.max_violation)
        run.tables["superedges"] = se.add_column(2, "edge_count_estimate", pa.array(est, type=pa.float64()))
    return totals
