"""Utility audit of a release against the true network (confidential), the gate and the board report.

Everything this package computes from ``release.truth`` or ``release.network``
is an unprotected statistic: it goes into the confidential report folder,
never into the public bundle.

API
---
``audit_release(release, *, monte_carlo=None, source=None, structure_samples=3, n_cut_queries=200,
sanity_bound=None, seed=None, progress=None, parallel_structure=None, draw_figures=False) -> dict``
    All figures: ``degree_distribution`` (``ks``, ``wasserstein1``, ``l1``,
    ``basis``, ``grouping_loss``, ``noise_added``, ``monte_carlo``), ``queries``
    (per workload: ``mean_absolute_error``, ``rmse``, ``median_relative_error``,
    ``p90_relative_error``, ``p99_relative_error``, ``expected_rmse``,
    ``expected_mean_absolute_error``, ``monte_carlo``), ``error_split``,
    ``structure``, ``budget``, ``grouping``. Keys starting with ``_``
    hold plot arrays and are not serialised. The audit decides nothing: the gate
    (:mod:`aggpub.gate`) reads released values only.
``write_report(directory, audit, *, overwrite=False) -> Path`` (``report.html`` + ``audit.json``)

Metric functions for reuse (numpy in, float out; histograms indexed by degree):
``ks_distance(p, q)``, ``wasserstein1_distance(p, q)``, ``l1_distance(p, q)``,
``distribution_distances(p, q) -> {"ks", "wasserstein1", "l1"}``,
``relative_errors(true, est, s)``, ``error_summary(true, est, s) -> dict``,
``implied_degree_pmf(a, b, count, sizes) -> (pmf, method)`` (block-model degree
distribution of a supergraph), ``structure_statistics(u, v, n, categories) -> dict``.
Workload builders on cells (``aggpub.audit.queries``): ``superedge_cells_workload``,
``contact_matrix_workload``, ``cut_workload``, ``degree_totals_workload``.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from .._lazy import lazy_attributes

_LAZY = {
    "audit_release": ".core", "implied_degree_pmf": ".degrees", "structure_statistics": ".network_stats",
    "distribution_distances": ".metrics", "error_summary": ".metrics", "ks_distance": ".metrics",
    "l1_distance": ".metrics", "relative_errors": ".metrics", "wasserstein1_distance": ".metrics",
}
__getattr__, __dir__ = lazy_attributes(__name__, globals(), _LAZY)

if TYPE_CHECKING:  # the same names, eagerly, for type checkers and editors
    from .core import audit_release
    from .degrees import implied_degree_pmf
    from .metrics import (distribution_distances, error_summary, ks_distance, l1_distance, relative_errors,
                          wasserstein1_distance)
    from .network_stats import structure_statistics

__all__ = [
    "audit_release",
    "write_report",
    "ks_distance",
    "wasserstein1_distance",
    "l1_distance",
    "distribution_distances",
    "relative_errors",
    "error_summary",
    "implied_degree_pmf",
    "structure_statistics",
]


def write_report(directory, audit, *, overwrite=False, **kwargs):
    """Write ``report.html`` and ``audit.json`` into ``directory`` (see :func:`aggpub.audit.report.write_report`)."""
    from .report import write_report as _write

    return _write(directory, audit, overwrite=overwrite, **kwargs)
