"""The researcher data card (``README.md`` inside every bundle).

It holds only public parameters and noisy outputs, never a true statistic.
"""

from __future__ import annotations

__all__ = ["render_datacard", "CAUTIONS"]

from .synthesis_guide import columns_guide, synthesis_guide

CAUTIONS = (
    "Group statistics can still disclose something about the people in a small or homogeneous "
    "supernode (for example, that everyone aged 80+ in one neighbourhood had few contacts). "
    "Differential privacy bounds what any one privacy unit changes; it does not make every "
    "group-level conclusion harmless. Repeated releases about the same people add up: each one "
    "spends privacy budget, and the lifetime total is what protects them. Do not try to "
    "re-identify anyone, and do not link this release with other data about the same people "
    "without approval. Decisions about use and onward sharing belong to the data-protection "
    "officer and ethics board of the organisation that released it, under the law that applies "
    "(for example GDPR or HIPAA)."
)


def render_datacard(manifest: dict) -> str:
    """Markdown data card for a bundle, from its manifest (public values only)."""
    comps = manifest.get("components", [])
    comp_lines = "\n".join(
        f"| {c['name']} | {c['epsilon']:.6g} | {c['sensitivity']:g} | {c['mechanism']} | {c['scale']:.6g} |"
        for c in comps) or "| (none) | | | | |"
    attrs = manifest.get("grouping_attributes", [])
    attr_text = ", ".join(f"`{a}`" for a in attrs) if attrs else "(none)"
    unit = manifest["privacy_unit"]
    unit_text = {
        "edge": "one contact between two people: whether any single contact is in the data changes "
                "the distribution of this release by at most a factor exp(epsilon)",
        "person": "one person together with all of their contacts (on networks where nobody has more "
                  f"than {manifest.get('max_contacts')} contacts)",
    }.get(unit, unit)
    seeded = manifest.get("seeded")
    seeded_text = ("\n> **WARNING: this bundle was made with a fixed seed for testing. Its noise is "
                   "reproducible, so it is NOT private. It must not leave the test environment.**\n"
                   if seeded else "")
    rows = manifest.get("rows", {})
    sizes_text = ("" if manifest.get("sizes_exact", True) else
                  "\n> **Sizes are noisy.** Under this privacy unit the supernode sizes are private: each `size` "
                  "is a sum of noisy counts of the finest attribute cells (discrete Laplace noise, see the "
                  "`supernode_sizes` row of the budget table), and supernodes were merged on those noisy "
                  "counts. A true size can differ from the released one, and can be below the minimum.\n")
    extra_files = "".join(f"- `{stem}.parquet`: {desc}\n" for stem, desc in (
        ("degree_histograms", "`supernode`, `degree_bin`, `people`: number of members of each supernode "
         "with that many contacts (the top bin counts everyone at the cap or above). `people_noisy` is the "
         "noisy count as drawn (unbiased, may be negative; `ci95_half_width` applies to it); `people` is the "
         "same noise made consistent by post-processing: non-negative integers adding up to the supernode's "
         "`size` (least-squares projection, then rounding)."),
        ("weight_totals", "`supernode_a`, `supernode_b`, `weight_total`: noisy totals of contact weights, "
         "each weight clipped to the policy's bound and rounded to an integer unit, clamped to "
         "`[0, max_weight_total]` (the bound times the possible pairs); every cell including zeros. "
         "`weight_total_unclamped` is the same noisy value before clamping (unbiased): sum it, not "
         "`weight_total`, when you add up many cells."),
        ("degree_sequences", "`supernode`, `position`, `degree_noisy`, `degree_estimate`: one row per member of "
         "every supernode, the members' numbers of contacts sorted within the supernode (position 0 has the "
         "fewest), with noise (`degree_noisy`) and as estimated (`degree_estimate`, see below)."),
    ) if stem in rows) + _views_text(manifest)
    return f"""# Aggregated contact network release
{seeded_text}
This folder is a privacy-protected summary of a contact network. People were
grouped into **{rows.get('supernodes', '?')} supernodes** of at least **{manifest['min_size']}**
members each (grouping: `{manifest['grouping_method']}`; attributes {attr_text}), and
the number of contacts within and between supernodes was released with calibrated
random noise under **epsilon = {manifest['epsilon_total']:g}** (pure differential privacy,
privacy unit `{unit}`: {unit_text}).

Made by aggpub {manifest['tool_version']} on {manifest['created_utc']} (bundle format `{manifest['format']}`).

## Files

- `supernodes.parquet`: `supernode` (id), `size` (members), one column per grouping
  attribute. A value is the attribute of every member; a generalised value (`0-19`,
  a zone name) means members share that broader value; `*` means members differ.
  Labels of different supernodes can overlap: a supernode stands only for its own members.
- `superedges.parquet`: one row per pair `supernode_a <= supernode_b`, **every pair
  including zeros**; `edge_count` is the noisy number of contacts between the two
  supernodes (within the supernode when `a = b`), clamped to `[0, possible_pairs]`;
  `edge_count_unclamped` is the same noisy value before clamping (it can be negative):
  clamping lifts empty cells above zero, so **sum `edge_count_unclamped`, not `edge_count`,
  when you add up many cells** (its sums are unbiased);
  `edge_count_estimate` (when present) is the consistent, non-negative estimate to use for
  everything derived (see "Which column to use for what");
  `possible_pairs` is `size_a * size_b` (or `size * (size - 1) / 2` within one);
  `noise_scale` is the scale of the discrete Laplace noise; `ci95_half_width` is the
  half-width of a 95% interval for the noise on one cell.
{extra_files}{sizes_text}- `manifest.json`: every parameter of the release and the SHA-256 of every file.
  Verify with `aggpub check <this folder>`.

{columns_guide(manifest)}
{synthesis_guide(manifest)}
## Reading the noise

Each released count is the true count plus independent two-sided geometric
(discrete Laplace) noise with P(Z = z) proportional to a^|z|, a = exp(-1/scale),
variance 2a/(1-a)^2, then clamped at zero and at the number of possible pairs.

- One cell: the true value is within `edge_count ± ci95_half_width` with about 95%
  probability (before clamping; clamped zeros mean "small").
- A sum of m cells has noise variance m times the variance of one cell; for large m
  use a normal interval `sum ± 1.96 * sqrt(m * variance)`. `aggpub.researcher.interval`
  does this for you.
- Small counts are dominated by noise: aggregate cells (for example by attribute)
  before drawing conclusions. The clamping at zero biases tiny cells upwards.

## Privacy budget

| component | epsilon | sensitivity | mechanism | scale |
|---|---|---|---|---|
{comp_lines}

The epsilons add up to epsilon_total = {manifest['epsilon_total']:g} (sequential composition).

## Cautions

{CAUTIONS}
"""


def _views_text(manifest: dict) -> str:
    """The reader's guide to the contact views (issue 13), from the manifest's ``views`` and ``layers``."""
    views = manifest.get("views")
    if not views:
        return ""
    layers = manifest.get("layers") or {}
    names = ", ".join(f"`{v['name']}`" for v in views)
    lay = (f" per layer of `{layers.get('column')}` ({', '.join(f'`{x}`' for x in layers.get('values', []))}; a pair "
           "of people recorded in several layers counts once, in the first of its layers in this order)"
           if layers else "")
    weighted = any(v.get("weighted") for v in views)
    people = ("exact (the person table is public under this privacy unit)" if manifest.get("privacy_unit") == "edge"
              else "noisy: `noise_scale` is the scale of each noisy count summed and `noise_terms` how many were "
                   "summed")
    return (f"- `contact_views.parquet`: contact matrices by attribute ({names}){lay}. One row per `view`, "
            "`layer` (empty without layers) and unordered pair of declared values `value_a <= value_b`, every pair "
            "including zeros: `contacts_unclamped` is the noisy number of contacts between people of the two "
            "values (unbiased; use it for sums and estimates), `contacts` the same floored at 0, `noise_scale` the "
            "discrete Laplace scale. A view places every contact by the exact values of its two people, also "
            "when their supernodes carry a generalised value or `*`. Run `aggpub matrix <this folder> --by "
            "ATTR [--layer NAME] [--per-person] --out FILE.csv` (or `aggpub.contact_matrix` in Python) for the "
            "most precise consistent estimate with intervals.\n"
            + ("- `contact_view_weights.parquet`: the same with `weight_total` (clipped contact weights, e.g. "
               "minutes) instead of counts; `aggpub matrix --weight`.\n" if weighted else "")
            + f"- `view_people.parquet`: `view`, `value`, `people`: the people of each value, {people}; the "
            "denominators of per-person rates.\n")
