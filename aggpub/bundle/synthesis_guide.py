"""The reader's guide on estimates and synthetic networks, written from a bundle's manifest only.

Two parts of ``README.md`` (:func:`aggpub.bundle.guide.render_guide` places them):
which count column to use for what (:func:`columns_guide`), and what a synthetic network
drawn from this release keeps and loses (:func:`synthesis_guide`). Both read the
manifest alone: which statistics were released, with which epsilon, and the sampler
that follows from them. The measured figures are those of releases *of the same kind*
on seven development networks (:data:`FIDELITY_REFERENCE`), never figures of this
release's own true network, which are confidential (the board's report has them).
"""

from __future__ import annotations

__all__ = ["FIDELITY_REFERENCE", "REFERENCE_SOURCE", "release_kind", "columns_guide", "synthesis_guide"]

import math

#: Release rows of ``benchmarks/results/fidelity-2026-12-02.md`` (6 releases x 2 synthetic networks per
#: network and epsilon): for each kind of release and epsilon, ``figure -> (lowest, highest, network of the
#: lowest, network of the highest)`` over the seven development networks. Ratios are synthetic / true; the
#: degree figure is a Kolmogorov-Smirnov distance.
FIDELITY_REFERENCE = {
    "uniform_block": {
        0.5: {"contacts_ratio": (0.998, 1.158, "hospital", "town"),
              "degree_ks": (0.117, 0.502, "town", "facebook"),
              "largest_degree_ratio": (0.153, 1.392, "facebook", "town"),
              "clustering_ratio": (0.025, 0.794, "facebook", "kenya"),
              "final_size_ratio": (0.094, 1.244, "facebook", "town")},
        1.0: {"contacts_ratio": (0.996, 1.068, "hospital", "town"),
              "degree_ks": (0.051, 0.502, "town", "facebook"),
              "largest_degree_ratio": (0.151, 1.259, "facebook", "town"),
              "clustering_ratio": (0.025, 0.807, "facebook", "kenya"),
              "final_size_ratio": (0.098, 1.114, "facebook", "town")},
        2.0: {"contacts_ratio": (1.0, 1.027, "facebook", "town"),
              "degree_ks": (0.029, 0.501, "town", "facebook"),
              "largest_degree_ratio": (0.155, 1.204, "facebook", "town"),
              "clustering_ratio": (0.025, 0.809, "facebook", "kenya"),
              "final_size_ratio": (0.095, 1.082, "facebook", "kenya")},
    },
    "degree_corrected": {
        0.5: {"contacts_ratio": (0.998, 1.005, "workplace", "kenya"),
              "degree_ks": (0.034, 0.177, "town", "kenya"),
              "largest_degree_ratio": (0.733, 1.843, "highschool", "town"),
              "clustering_ratio": (0.031, 0.976, "town", "hospital"),
              "final_size_ratio": (0.877, 1.958, "email", "facebook")},
        1.0: {"contacts_ratio": (0.992, 1.001, "hospital", "workplace"),
              "degree_ks": (0.018, 0.129, "town", "kenya"),
              "largest_degree_ratio": (0.739, 1.17, "highschool", "town"),
              "clustering_ratio": (0.031, 0.927, "town", "hospital"),
              "final_size_ratio": (0.865, 1.917, "email", "facebook")},
        2.0: {"contacts_ratio": (0.999, 1.002, "highschool", "kenya"),
              "degree_ks": (0.01, 0.087, "town", "kenya"),
              "largest_degree_ratio": (0.745, 1.056, "highschool", "town"),
              "clustering_ratio": (0.032, 0.932, "town", "hospital"),
              "final_size_ratio": (0.837, 1.935, "email", "facebook")},
    },
    "degree_corrected_affinity": {
        0.5: {"contacts_ratio": (0.989, 1.009, "highschool", "hospital"),
              "degree_ks": (0.04, 0.158, "town", "kenya"),
              "largest_degree_ratio": (0.724, 1.75, "facebook", "town"),
              "clustering_ratio": (0.696, 1.04, "facebook", "workplace"),
              "final_size_ratio": (0.908, 1.983, "email", "facebook")},
        1.0: {"contacts_ratio": (0.99, 1.002, "kenya", "workplace"),
              "degree_ks": (0.022, 0.116, "town", "hospital"),
              "largest_degree_ratio": (0.718, 1.327, "facebook", "town"),
              "clustering_ratio": (0.718, 1.011, "facebook", "workplace"),
              "final_size_ratio": (0.89, 1.966, "email", "facebook")},
        2.0: {"contacts_ratio": (1.0, 1.002, "email", "kenya"),
              "degree_ks": (0.014, 0.111, "town", "kenya"),
              "largest_degree_ratio": (0.705, 1.04, "facebook", "town"),
              "clustering_ratio": (0.756, 1.023, "facebook", "workplace"),
              "final_size_ratio": (0.9, 1.939, "email", "facebook")},
    },
}
REFERENCE_SOURCE = (
    "`benchmarks/fidelity.py` of aggpub (results of 2026-12-02): seven development networks released with the "
    "plainest policy (unit `edge`, attribute grouping, `min_size` 10 or 20) -- face-to-face contacts in a "
    "hospital ward (Vanhems et al., PLoS ONE 2013), rural households in Kenya (Kiti et al., EPJ Data Science "
    "2016), a workplace (Genois and Barrat, EPJ Data Science 2018) and a high school (Mastrandrea et al., PLoS ONE "
    "2015), an e-mail network (Leskovec et al., ACM TKDD 2007), an online friendship network (McAuley and "
    "Leskovec, NIPS 2012), and aggpub's invented demo town")

_KIND_TEXT = {
    "degree_corrected_affinity": "the degree-corrected sampler with affinity blocks",
    "degree_corrected": "the degree-corrected sampler (no triangle count released, so no affinity blocks)",
    "uniform_block": "the uniform block sampler",
}


def _spends(manifest) -> dict:
    return {c.get("name"): c for c in manifest.get("components", []) if isinstance(c, dict)}


def release_kind(manifest) -> str:
    """How ``aggpub sample`` draws from this release: one of the keys of :data:`FIDELITY_REFERENCE`."""
    spends = _spends(manifest)
    rows = manifest.get("rows", {})
    if "degree_sequences" in rows and "superedges" in rows and not manifest.get("superedges_sparse") \
            and "superedge_estimates" in manifest:
        return "degree_corrected_affinity" if "triangle_count" in spends else "degree_corrected"
    return "uniform_block"


def _nearest_epsilon(eps) -> float:
    try:
        e = float(eps)
    except (TypeError, ValueError):
        return 1.0
    return min((0.5, 1.0, 2.0), key=lambda x: abs(math.log(max(e, 1e-9) / x)))


def columns_guide(manifest) -> str:
    """Which count column to use for what (Markdown), from the manifest."""
    rows = manifest.get("rows", {})
    if "superedges" not in rows:
        return ""
    has_estimate = "superedge_estimates" in manifest
    lines = ["## Which column to use for what", ""]
    if has_estimate:
        lines += [
            ("- `superedges.edge_count_estimate`: in this sparse release, the clamped count of each listed cell "
             "(no consistency step: the absent cells are unknown); like the listed counts it is biased upwards on "
             "small cells. Absent cells have no estimate."
             if manifest.get("superedges_sparse") else
             "- **`superedges.edge_count_estimate`** (the column to lead with): contact totals of a supernode or of "
             "any group of supernodes, contact matrices, supergraph weights, synthetic networks. Non-negative, at "
             "most `possible_pairs`, and made consistent: "
             + ("every supernode's degree total (`2 x_AA + sum of x_AB`) and the whole table's total are the best "
                "linear unbiased estimates from the noisy counts and the noisy degree sequences together."
                if "degree_sequences" in rows else
                "every supernode's degree total (`2 x_AA + sum of x_AB`) and the whole table's total are the sums "
                "of the unbiased noisy counts.")),
            ("- `superedges.edge_count_unclamped`: the noisy counts as drawn (true count plus noise of a known law). "
             "In this sparse release only cells at or above the threshold are listed, so a sum over the listed "
             "cells is not an unbiased total: it misses what the absent cells hold, and empty cells that passed "
             "the threshold add their noise." if manifest.get("superedges_sparse") else
             "- `superedges.edge_count_unclamped`: error bars. It is the mechanism's output itself (true count plus "
             "noise of a known law, can be negative), so sums of it are unbiased and their intervals exact "
             "(`aggpub.interval` uses it). Single cells are noisy; prefer the estimate for point values."),
            "- `superedges.edge_count`: the noisy count clamped to `[0, possible_pairs]`, kept for older tools. "
            "Do not add it up: clamping lifts every empty cell above zero.",
        ]
    else:
        lines += ["- `superedges.edge_count_unclamped` for error bars on listed cells; its sums are not "
                  "unbiased in this sparse release (absent cells are missing, listed ones were kept for being high); "
                  "`edge_count` (clamped) for single cells only." if manifest.get("superedges_sparse") else
                  "- `superedges.edge_count_unclamped` for sums and error bars (unbiased); `edge_count` "
                  "(clamped) for single cells only."]
    if "degree_sequences" in rows:
        lines += [
            "- **`degree_sequences.degree_estimate`**: each supernode's members' numbers of contacts, sorted "
            "(position 0 has the fewest): the degree distribution, per supernode or summed. Sorted, within "
            "`[0, people - 1]`, and adding up per supernode to the degree totals of `edge_count_estimate`.",
            "- `degree_sequences.degree_noisy`: the noisy sorted degrees as drawn (unbiased, can be negative); "
            "`ci95_half_width` applies to each.",
        ]
    if "triangle_count" in _spends(manifest):
        lines += ["- `triangle_count` in `manifest.json`: the noisy number of triangles of the whole network "
                  "(ladder mechanism: the budget table's sensitivity 1 and scale `2 / epsilon` are those of its "
                  "rung score; its noise in triangles depends on the network and is not published). It can be "
                  "negative: clip it at 0. Synthetic networks are fitted to it."]
    return "\n".join(lines) + "\n"


def _range(fig, digits=2, pct=False):
    lo, hi, nlo, nhi = fig
    if pct:
        return f"{(lo - 1) * 100:+.1f}% ({nlo}) to {(hi - 1) * 100:+.1f}% ({nhi})"
    return f"{lo:.{digits}f} ({nlo}) to {hi:.{digits}f} ({nhi})"


def synthesis_guide(manifest) -> str:
    """What a synthetic network drawn from this release keeps and loses (Markdown), from the manifest."""
    rows = manifest.get("rows", {})
    if "superedges" not in rows:
        return ("## Synthetic networks\n\nThis release has no superedge counts: `aggpub sample` cannot draw "
                "synthetic networks from it.\n")
    kind = release_kind(manifest)
    eps = _nearest_epsilon(manifest.get("epsilon_total"))
    ref = FIDELITY_REFERENCE[kind][eps]
    sparse = bool(manifest.get("superedges_sparse"))
    keeps = (["the contacts of every listed superedge cell (its clamped count); the cells absent from this sparse "
              "release get no contact at all"] if sparse else
             ["the number of contacts in every superedge cell (its estimate, rounded without bias)"])
    loses = ["who is in contact with whom: synthetic people are invented and their contacts drawn at random",
             "any structure inside a supernode or between supernodes beyond what the released statistics carry "
             "(communities that the grouping attributes do not follow, for example)"]
    if kind.startswith("degree_corrected"):
        keeps.append("every supernode's estimated degree sequence: heavy tails and hubs survive, up to the noise")
        loses.append("which supernodes' members the hubs meet, beyond the cell totals")
    else:
        loses.append("degree heterogeneity: every member of a supernode gets the same expected number of "
                     "contacts" + (" (this release is sparse)" if manifest.get("superedges_sparse") else
                                   " (no degree sequences in this release)"))
    if kind == "degree_corrected_affinity":
        keeps.append("local clustering, through blocks of people of similar degree fitted to the released "
                     "number of triangles")
    else:
        loses.append("local clustering: no triangle count in this release, so synthetic networks have little more "
                     "clustering than random graphs")
    text = [
        "## What a synthetic network keeps and loses",
        "",
        f"`aggpub sample` draws synthetic networks from this release with {_KIND_TEXT[kind]}.",
        "",
        "Keeps: " + "; ".join(keeps) + ".",
        "",
        "Loses: " + "; ".join(loses) + ".",
        "",
        f"How well that works was measured on {'dense ' if sparse else ''}releases of the same kind at epsilon "
        f"{eps:g} (the benchmark "
        f"epsilon nearest this release's {manifest.get('epsilon_total')}), not on this release: its own true "
        "figures are confidential. Over the seven development networks, synthetic against true "
        "(lowest to highest, and on which network):",
        "",
        f"- contacts: {_range(ref['contacts_ratio'], pct=True)}",
        f"- degree distribution, Kolmogorov-Smirnov distance: {_range(ref['degree_ks'], 3)}",
        f"- largest degree: {_range(ref['largest_degree_ratio'])} times the true one",
        f"- average clustering: {_range(ref['clustering_ratio'])} times the true one",
        f"- final size of an epidemic (bond percolation at the transmissibility giving the true network R = 1.5; "
        f"Newman, Phys. Rev. E 66, 2002): {_range(ref['final_size_ratio'])} times the true one",
        "",
        "Where a figure is far from 1 the network has structure the release does not carry (the online friendship "
        "network's ego circles confine an epidemic that synthetic networks let spread). Simulate on several "
        "synthetic networks and report their spread.",
        "",
        f"Source: {REFERENCE_SOURCE}.",
    ]
    return "\n".join(text) + "\n"
