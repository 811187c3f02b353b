"""The gate's figures from a release's public tables and the known law of their noise (post-processing).

Nothing here sees the true network: the inputs are the released tables (or a
stand-in built from public inputs, :mod:`aggpub.gate.predicted`) and the
manifest's record of each noise law. Each figure is the error a researcher
should *expect* from the noise, given the released magnitudes:

* **superedge cells**: the median over cells of ``E|Z| / max(estimate, s)``,
  with ``E|Z| = 2 alpha / (1 - alpha^2)`` the mean absolute discrete Laplace
  noise (Ghosh, Roughgarden, Sundararajan, STOC 2009) and ``estimate`` the
  unbiased (unclamped) released count;
* **contact matrix**: the same for each entry of the matrix by an attribute
  (a sum of ``m`` cells: ``E|Z_1 + ... + Z_m|`` from the exact law of the sum);
* **degree distribution**: the mean KS and Wasserstein-1 distances between the
  released degree distribution and copies of it re-noised with the same law and
  post-processed the same way (a parametric bootstrap of the noise the release
  carries).

``s`` is the sanity bound of Xiao, Wang and Gehrke (ICDE 2010): 0.1% of the
released (noisy) number of contacts, at least 1.
"""

from __future__ import annotations

__all__ = ["released_metrics", "RENOISE_DRAWS", "RENOISE_SEED"]

import numpy as np

from ..audit.degrees import implied_degree_pmf, block_model_terms, released_histogram_degrees
from ..audit.metrics import DEFAULT_SANITY_FRACTION, distribution_distances
from ..cells import n_cells, possible_pairs
from ..noise.mechanisms import GeometricMechanism
from . import gate_attribute

#: Re-noised copies of the degree distribution (histograms, block model).
RENOISE_DRAWS = {"histograms": 20, "block_model": 5}
#: The bootstrap's generator is seeded with a constant: the gate's figures are then a deterministic
#: function of the released values (the bootstrap's randomness protects nobody and need not be secret).
RENOISE_SEED = 20261202
#: Largest table the block-model bootstrap expands (dense cells).
MAX_BOOTSTRAP_CELLS = 30_000_000


def _col(table, name, dtype=np.int64):
    return np.asarray(table.column(name).to_numpy(zero_copy_only=False), dtype=dtype)


def _mechanism(manifest: dict, name: str):
    for c in manifest.get("components", []):
        if c["name"] == name:
            return GeometricMechanism(epsilon=c["epsilon"], sensitivity=c["sensitivity"])
    return None


def released_metrics(tables: dict, manifest: dict, policy, *, renoise_draws: dict | None = None) -> dict:
    """The metrics table of a release, from its public tables only.

    Parameters
    ----------
    tables : dict
        Name -> released Arrow table (``supernodes``, ``superedges``, ``degree_histograms`` ...).
    manifest : dict
        The release's manifest (its ``components`` give each noise law).
    policy : ReleasePolicy
        For the contact matrix's attribute.
    renoise_draws : dict, optional
        Bootstrap draws per degree basis (default :data:`RENOISE_DRAWS`).

    Returns
    -------
    dict
        ``superedge_median_relative_error``, ``contact_matrix_median_relative_error``,
        ``degree_ks``, ``degree_wasserstein1`` (``None`` when not measurable, with the
        reason in ``why``), ``contact_matrix_attribute``, ``sanity_bound``, ``degree_basis``.
    """
    draws = dict(RENOISE_DRAWS, **(renoise_draws or {}))
    out = {"superedge_median_relative_error": None, "contact_matrix_median_relative_error": None,
           "degree_ks": None, "degree_wasserstein1": None, "why": {},
           "contact_matrix_attribute": gate_attribute(policy)}
    supernodes = tables["supernodes"]
    sizes = np.maximum(_col(supernodes, "size"), 0)
    se = tables.get("superedges")
    mech = _mechanism(manifest, "superedge_counts")
    if se is None or mech is None:
        for k in ("superedge_median_relative_error", "contact_matrix_median_relative_error"):
            out["why"][k] = "the release has no superedge counts"
    else:
        _cell_metrics(out, supernodes, se, mech, manifest)
    _view_metric(out, tables, manifest)  # issue 13: the view's matrix when the attribute has a released view
    _degree_metrics(out, tables, manifest, sizes, draws)
    return out


def _view_metric(out, tables, manifest) -> None:
    """The contact-matrix figure from the released view of the gate's attribute, when there is one.

    Each entry of the matrix is the view's cell summed over its layers: a sum of ``L`` discrete Laplace
    draws of the view's scale (``E|Z_1 + ... + Z_L|`` from the exact law), over ``max(estimate, s)``, the
    estimate the unbiased released value. Every entry is an exact value pair (no generalised or ``*`` row).
    """
    views = tables.get("contact_views")
    attr = out["contact_matrix_attribute"]
    if views is None or attr is None:
        return
    import pyarrow.compute as pc

    sub = views.filter(pc.equal(views.column("view"), attr))
    mech = _mechanism(manifest, f"contact_views:{attr}")
    if not sub.num_rows or mech is None:
        return
    layers = (manifest.get("layers") or {}).get("values") or []
    n_layers = len(layers) if layers and sub.column("layer").null_count == 0 else 1
    est = _col(sub, "contacts_unclamped").astype(np.float64).reshape(n_layers, -1).sum(axis=0)
    s = max(1.0, DEFAULT_SANITY_FRACTION * max(float(est.sum()), 0.0))
    rel = mech.expected_abs_sum(np.full(len(est), n_layers)) / np.maximum(est, s)
    out["contact_matrix_median_relative_error"] = float(np.median(rel))
    out["contact_matrix_basis"] = f"released view '{attr}'"
    out["why"].pop("contact_matrix_median_relative_error", None)


def _cell_metrics(out, supernodes, se, mech, manifest) -> None:
    n = supernodes.num_rows
    a, b = _col(se, "supernode_a"), _col(se, "supernode_b")
    est = _col(se, "edge_count_unclamped" if "edge_count_unclamped" in se.column_names else "edge_count")
    total = n_cells(n)
    s = max(1.0, DEFAULT_SANITY_FRACTION * max(float(est.sum()), 0.0))
    out["sanity_bound"] = s
    e_abs = mech.expected_abs()
    rel = e_abs / np.maximum(est.astype(np.float64), s)
    absent = total - len(rel)  # sparse release: cells below the threshold are absent (estimate 0)
    if absent:
        rel = np.concatenate([rel, np.full(absent, e_abs / s)])
    out["superedge_median_relative_error"] = float(np.median(rel))
    attr = out["contact_matrix_attribute"]
    if attr is None or attr not in supernodes.column_names:
        out["why"]["contact_matrix_median_relative_error"] = (
            f"no contact matrix by '{attr}': it must be a grouping attribute (a column of the supernode labels)")
        return
    values = np.asarray(supernodes.column(attr).to_pylist(), dtype=object).astype(str)
    cats, code = np.unique(values, return_inverse=True)
    k = len(cats)
    per = np.bincount(code, minlength=k).astype(np.int64)
    # cells per unordered pair of values (absent sparse cells included): c_u c_v, or c_u (c_u + 1) / 2
    ti, tj = np.triu_indices(k)
    m = np.where(ti == tj, per[ti] * (per[ti] + 1) // 2, per[ti] * per[tj])
    lo, hi = np.minimum(code[a], code[b]), np.maximum(code[a], code[b])
    pair = lo * k - (lo * (lo - 1)) // 2 + (hi - lo)
    t_hat = np.bincount(pair, weights=est.astype(np.float64), minlength=len(m))
    used = m > 0
    rel_q = mech.expected_abs_sum(m[used]) / np.maximum(t_hat[used], s)
    out["contact_matrix_median_relative_error"] = float(np.median(rel_q))


def _degree_metrics(out, tables, manifest, sizes, draws) -> None:
    rng = np.random.default_rng(RENOISE_SEED)
    hist = tables.get("degree_histograms")
    hist_mech = _mechanism(manifest, "degree_histograms")
    se = tables.get("superedges")
    mech = _mechanism(manifest, "superedge_counts")
    runs = []
    if hist is not None and hist_mech is not None:
        from ..noise.sampler import SeededRandomSource
        from ..released import release_degree_histograms

        out["degree_basis"] = "released degree histograms"
        n_bins = int(_col(hist, "degree_bin").max()) + 1
        people = _col(hist, "people").reshape(len(sizes), n_bins)
        released = released_histogram_degrees(hist, n_bins)
        for i in range(int(draws["histograms"])):
            table, _, _ = release_degree_histograms(people, sizes, hist_mech.epsilon, hist_mech.sensitivity,
                                                    SeededRandomSource(int(rng.integers(2 ** 62))),
                                                    max_possible_degree=manifest.get("max_contacts"))
            runs.append(distribution_distances(released, released_histogram_degrees(table, n_bins)))
    elif se is not None and mech is not None:
        n = len(sizes)
        if n_cells(n) > MAX_BOOTSTRAP_CELLS:
            out["why"]["degree_ks"] = out["why"]["degree_wasserstein1"] = (
                f"more than {MAX_BOOTSTRAP_CELLS:,} superedge cells: the block-model bootstrap is left out")
            return
        from ..cells import all_cells, scatter_cells

        out["degree_basis"] = "block model of the released superedge counts"
        a, b = all_cells(n)
        counts = scatter_cells(n, _col(se, "supernode_a"), _col(se, "supernode_b"), _col(se, "edge_count"))
        cap = possible_pairs(sizes, a, b)
        terms = block_model_terms(a, b, sizes)
        released, method = implied_degree_pmf(a, b, counts, sizes, terms=terms)
        scale_draws = np.exp(mech.log_alpha)
        for _ in range(int(draws["block_model"])):
            z = rng.geometric(1.0 - scale_draws, len(counts)) - rng.geometric(1.0 - scale_draws, len(counts))
            pmf, _ = implied_degree_pmf(a, b, np.clip(counts + z, 0, cap), sizes, method=method, terms=terms)
            runs.append(distribution_distances(released, pmf))
    else:
        out["why"]["degree_ks"] = out["why"]["degree_wasserstein1"] = \
            "the release has neither superedge counts nor degree histograms"
        return
    out["degree_ks"] = float(np.mean([r["ks"] for r in runs]))
    out["degree_wasserstein1"] = float(np.mean([r["wasserstein1"] for r in runs]))
    out["degree_draws"] = len(runs)
