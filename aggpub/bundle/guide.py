"""The reader's guide: ``README.md`` inside every bundle, written from the bundle's manifest alone.

Every sentence is chosen by what the manifest records about this release: its title and
dataset id, the privacy unit and epsilon (or that a seed voids the guarantee), whether
the supernode sizes are exact or noisy and what ``min_size`` then means, the dense or
sparse superedge table and its threshold, each released component actually present with
its own parameters (histogram cap, weight column and clip, views and layers), the
release's own attribute names and value labels, the ledger charge or its absence, and
the cautions. Nothing here reads the data: the manifest holds public values and noisy
outputs only, so the guide is post-processing of the release.
"""

from __future__ import annotations

__all__ = ["render_guide", "CAUTIONS", "DEFERENCE"]

import math

from .synthesis_guide import columns_guide, synthesis_guide

#: The cautions every bundle carries (also in the manifest's ``cautions`` and the board's report).
CAUTIONS = (
    "Group statistics can still disclose something about the people of a small or homogeneous "
    "supernode: if all of its members had few contacts, the release says so about each of them. "
    "Differential privacy bounds what any one privacy unit changes; it does not make every "
    "group-level conclusion harmless. Repeated releases about the same people add up: each one "
    "spends privacy budget, and only the lifetime total protects them. Do not try to "
    "re-identify anyone, and do not link this release with other data about the same people "
    "without approval."
)
#: Who decides about use and onward sharing.
DEFERENCE = (
    "Decisions about use and onward sharing belong to the data-protection officer and the ethics "
    "board of the organisation that released it, under the law that applies (for example GDPR or "
    "HIPAA). This guide is not legal advice."
)

#: At most this many values of one attribute are listed in the guide (all are in the manifest).
MAX_LISTED_VALUES = 40


# --------------------------------------------------------------------------- small helpers


def _code(value) -> str:
    """``value`` as Markdown inline code (a value holding a backtick gets double backticks)."""
    s = str(value)
    return f"`` {s} ``" if "`" in s else f"`{s}`"


def _codes(values, limit: int = MAX_LISTED_VALUES) -> str:
    values = list(values)
    shown = ", ".join(_code(v) for v in values[:limit])
    if len(values) > limit:
        shown += f" and {len(values) - limit} more (all in `manifest.json`)"
    return shown


def _num(x) -> str:
    try:
        return f"{float(x):g}"
    except (TypeError, ValueError):
        return str(x)


def _spends(manifest) -> list:
    return [c for c in manifest.get("components", []) if isinstance(c, dict)]


def _spend(manifest, name):
    return next((c for c in _spends(manifest) if c.get("name") == name), None)


def _policy(manifest) -> dict:
    p = manifest.get("policy")
    return p if isinstance(p, dict) else {}


def _component_policy(manifest, name) -> dict:
    c = (_policy(manifest).get("components") or {}).get(name)
    return c if isinstance(c, dict) else {}


def _noise_sd(scale) -> float:
    """Standard deviation of discrete Laplace noise of scale ``scale``: sqrt(2a) / (1 - a), a = exp(-1/scale)."""
    a = math.exp(-1.0 / float(scale))
    return math.sqrt(2.0 * a) / (1.0 - a)


def _dataset(manifest):
    acc = manifest.get("accounting") or {}
    return (manifest.get("dataset") or acc.get("dataset") or (manifest.get("ledger") or {}).get("dataset")
            or (_policy(manifest).get("ledger") or {}).get("dataset"))


def _title(manifest) -> str:
    return manifest.get("title") or _policy(manifest).get("title") or "(untitled release)"


def _unit(manifest) -> str:
    return manifest.get("privacy_unit", "?")


def _attribute_groupings(manifest) -> bool:
    return manifest.get("grouping_method") in ("attributes", "attributes+structure") and \
        bool(manifest.get("grouping_attributes"))


def _attrs_text(attrs) -> str:
    attrs = [_code(a) for a in attrs]
    if len(attrs) <= 1:
        return "".join(attrs)
    return ", ".join(attrs[:-1]) + " and " + attrs[-1]


# --------------------------------------------------------------------------- sections


def _header(m) -> str:
    title = _title(m)
    rows = m.get("rows", {})
    dataset = _dataset(m)
    ds = (f" of dataset {_code(dataset)}" if dataset else
          "; it records no dataset id (its policy names no lifetime ledger)")
    lines = [f"# Reader's guide: {title}", ""]
    if m.get("seeded"):
        lines += ["> **NOT PRIVATE.** This bundle was made with a fixed random seed, for testing "
                  f"(`randomness`: {m.get('randomness', 'seeded')}). Its noise can be reproduced, so it carries "
                  "**no privacy guarantee**, whatever the epsilon below says. It must not leave the test "
                  "environment.", ""]
    lines += [
        f"This folder is the release \"{title}\"{ds}. It holds statistics about groups of people in a "
        f"contact network, never a single contact: **{rows.get('supernodes', '?')} supernodes** (groups of "
        f"people) and numbers of contacts within and between them, with random noise added under privacy unit "
        f"`{_unit(m)}` and **epsilon = {_num(m.get('epsilon_total'))}**.",
        "",
        f"Made by aggpub {m.get('tool_version', '?')} on {m.get('created_utc', '?')} (bundle format "
        f"`{m.get('format', '?')}`). `manifest.json` records every parameter of the release; "
        "`aggpub check <this folder>` verifies every file against it.",
        "",
    ]
    return "\n".join(lines)


def _guarantee(m) -> str:
    unit = _unit(m)
    eps = m.get("epsilon_total")
    try:
        factor = f" (about {math.exp(float(eps)):.3g})"
    except (TypeError, ValueError, OverflowError):
        factor = ""
    lines = ["## What the guarantee covers", ""]
    if unit == "edge":
        lines.append("Privacy unit **`edge`**: one contact between two people. Adding or removing any single "
                     f"contact in the source data changes the probability of every possible output of this release "
                     f"by at most a factor exp({_num(eps)}){factor}.")
    elif unit == "person":
        lines.append("Privacy unit **`person`**: one person together with all of their contacts. Adding or "
                     "removing any one person, with every contact they have, changes the probability of every "
                     f"possible output of this release by at most a factor exp({_num(eps)}){factor}. This holds "
                     f"for networks in which nobody has more than **{m.get('max_contacts')} contacts** "
                     "(`max_contacts`), a promise the data steward made about the source data: input breaking it "
                     "was refused, never truncated. Contacts missing from the input (recorded elsewhere, or under "
                     "another id) are outside what the release can account for.")
    else:
        lines.append(f"Privacy unit `{unit}`.")
    lines += ["",
              f"Epsilon {_num(eps)} is the total for this release (pure differential privacy, delta = "
              f"{_num(m.get('delta', 0.0))}); its components share it (the budget table below; they spent "
              f"{_num(m.get('epsilon_spent', eps))}), and by sequential composition their epsilons add up. "
              "Every count got integer noise drawn exactly (discrete Laplace, integer arithmetic)."]
    if m.get("seeded"):
        lines += ["", "**This bundle has no guarantee**: its noise came from a fixed seed, so anyone holding the "
                      "seed can remove it. The sentences above describe the mechanism as configured, not a "
                      "protection this bundle gives."]
    lines += ["", "Not covered:", ""]
    if unit == "edge":
        lines.append("- **The person table.** Under unit `edge`, who is in the data and their attributes are treated "
                     "as public: the supernode sizes carry no noise (next section).")
    lines += [
        "- **Group-level facts.** A true statement about every member of a small or homogeneous group remains "
        "true, and the release can show it.",
        "- **Repeated releases.** Every release about the same people spends budget; two releases at epsilon 1 "
        "are one release at epsilon 2. Only a lifetime total over all of them protects the people (see "
        "\"Accounting\").",
        "- **Choices made by looking at the true data**, such as releasing again because a confidential "
        "comparison with the truth looked bad.",
        "",
    ]
    return "\n".join(lines)


def _accounting(m) -> str:
    lines = ["## Accounting", ""]
    acc = m.get("accounting")
    ledger = m.get("ledger") or {}
    if acc is None:
        acc = ({"charged": True, "dataset": ledger.get("dataset")} if ledger else None)
    if acc is None:
        lines.append("This manifest does not say whether the release was charged to a lifetime ledger: count "
                     "its epsilon yourself against any other release of the same people.")
    elif acc.get("charged"):
        cap = ledger.get("lifetime_epsilon", (_policy(m).get("ledger") or {}).get("lifetime_epsilon"))
        lines.append(f"**Charged** to the lifetime ledger of dataset {_code(acc.get('dataset'))}: this release's "
                     f"epsilon {_num(ledger.get('epsilon', m.get('epsilon_spent')))} counts against the dataset's "
                     f"lifetime cap of {_num(cap)}, together with every other release charged to it.")
    else:
        lines.append(f"**Not charged to any lifetime ledger** ({acc.get('why') or 'no reason recorded'}). Nothing "
                     "keeps count of this release against a lifetime budget for these people: whoever holds it "
                     "must add its epsilon to that of every other release about them.")
    lines.append("")
    return "\n".join(lines)


def _grouping_text(m) -> str:
    method = m.get("grouping_method")
    attrs = m.get("grouping_attributes") or []
    k = m.get("min_size")
    pg = _policy(m).get("grouping") or {}
    if method == "attributes":
        order = pg.get("merge_order") or []
        small = "noisy size" if not m.get("sizes_exact", True) else "number of people"
        hier = [a for a in attrs if (pg.get("hierarchies") or {}).get(a)]
        text = (f"People were grouped by {_attrs_text(attrs)}: each supernode holds the people with one "
                f"combination of values. Where a combination's {small} was below {k}, "
                + (f"its values were replaced by broader ones from the policy's hierarchies of {_attrs_text(hier)}"
                   + (" (first " + ", then ".join(_code(a) for a in order) + ")" if len(order) > 1 else "")
                   + ", and what was still too small" if hier else "it")
                + " was merged into a residual supernode (or, if too small for one, into the smallest supernode).")
    elif method in ("structure", "attributes+structure"):
        within = f" within the combinations of {_attrs_text(attrs)}" if method == "attributes+structure" else ""
        text = ("People were grouped by their position in the network: into tiers of their noisy number of "
                f"contacts{within}"
                + (", refined by noisy contact profiles" if pg.get("rounds") else "")
                + ". The grouping read the contacts only through noisy values, paid from the budget (the "
                "`grouping_*` rows of the budget table); `tier` in `supernodes.parquet` numbers the tiers.")
    elif method == "given":
        text = ("People were grouped by a public map from person to supernode supplied by the data steward"
                + (f" ({_code(pg.get('map_path'))})" if pg.get("map_path") else "")
                + "; `map_supernode` in `supernodes.parquet` holds the map's own label.")
    elif method == "random":
        text = ("People were put into supernodes at random (a baseline for comparison): the supernodes say "
                "nothing about who their members are.")
    else:
        text = f"Grouping method {_code(method)}."
    notes = m.get("grouping_notes") or []
    if notes:
        text += " What the grouping did: " + "; ".join(str(n) for n in notes) + "."
    return text


def _fine_cells(m):
    """Number of fine attribute cells under unit ``person`` (the product of the declared domains), or None."""
    hier = (_policy(m).get("grouping") or {}).get("hierarchies") or {}
    n = 1
    for a in m.get("grouping_attributes") or []:
        levels = hier.get(a)
        if not levels:
            return None
        n *= len(levels[0])
    return n


def _sizes(m) -> str:
    k = m.get("min_size")
    attrs = m.get("grouping_attributes") or []
    lines = ["## Supernodes and their sizes", "", _grouping_text(m), ""]
    if m.get("sizes_exact", True):
        lines.append(f"**Sizes are exact.** `supernodes.size` is the true number of people in each supernode, with "
                     f"no noise, and every supernode holds at least `min_size` = {k} people.")
        if _attribute_groupings(m):
            lines.append(f"**So the number of people with each combination of {_attrs_text(attrs)} (as grouped "
                         "into supernodes, after any generalisation) is published exactly.**"
                         + (" Anyone who knows that someone is in the data, and knows their "
                            f"{_attrs_text(attrs)}, knows which supernode they belong to."
                            if m.get("grouping_method") == "attributes" else ""))
        if "view_people" in m.get("rows", {}):
            lines.append("`view_people.parquet` likewise gives the exact number of people with each value of every "
                         "view attribute.")
        if _unit(m) == "edge":
            lines.append("This is what unit `edge` means: it protects contacts, not the person table.")
    else:
        sp = _spend(m, "supernode_sizes")
        cells = _fine_cells(m)
        scale = sp.get("scale") if sp else None
        noise = (f"discrete Laplace noise of scale {_num(scale)}, standard deviation {_noise_sd(scale):.3g} per "
                 "cell, from the `supernode_sizes` row of the budget table" if scale else
                 "discrete Laplace noise (the `supernode_sizes` row of the budget table)")
        lines.append("**Sizes are noisy.** Under unit `person` the number of people with given attributes is "
                     "private. Every combination of the declared values"
                     + (f" ({cells:,} fine cells)" if cells else "")
                     + f" got a noisy count ({noise}), whether anyone has it or not; the grouping merged cells using "
                       "only these noisy counts, and each released `size` is the sum of its cells' noisy counts, "
                       "floored at 0. A size made of m cells has m times the variance of one cell.")
        lines.append("")
        lines.append(f"**What `min_size` = {k} means here.** It was applied to the noisy sizes: cells were "
                     f"generalised and merged until each supernode's noisy size reached {k}. It does **not** "
                     f"guarantee that any supernode holds {k} real people: a supernode's true size is its released "
                     f"size minus the noise of its cells, and can be below {k}. Released sizes are at least {k}, "
                     "except that a supernode which absorbed leftover cells too small to stand alone (see the "
                     "grouping notes) can end below it when their noisy counts were negative. Each person's "
                     "protection comes from the noise and epsilon, not from the size of their group. Caps derived "
                     "from sizes (`possible_pairs`, histogram totals) use the released sizes.")
    return "\n\n".join(x for x in lines if x)


def _attributes(m) -> str:
    attrs = list(m.get("grouping_attributes") or [])
    hier = (_policy(m).get("grouping") or {}).get("hierarchies") or {}
    labels = m.get("grouping_labels") or {}
    domains = m.get("view_domains") or {}
    layers = m.get("layers")
    view_only = [a for a in domains if a not in attrs]
    if not attrs and not view_only and not layers:
        return ""
    lines = ["## Attributes and their values", ""]
    lines.append("The names and values below are this release's own, as its policy declared them and as they "
                 "appear in its tables.")
    lines.append("")
    for a in attrs:
        levels = hier.get(a) or []
        parts = []
        if levels:
            parts.append(f"declared values: {_codes(levels[0])}")
            for i, level in enumerate(levels, start=1):
                broader = list(dict.fromkeys(level.values()))
                parts.append(f"broader values (hierarchy level {i}): {_codes(broader)}")
        elif a in domains:
            parts.append(f"values: {_codes(domains[a])}")
        if a in labels:
            parts.append(f"values in the supernode labels: {_codes(labels[a])}")
        text = f"- {_code(a)} (grouping attribute)" + (": " + "; ".join(parts) if parts else "") + "."
        lines.append(text)
    if attrs:
        generalised = any(hier.get(a) for a in attrs)
        residual = not labels or any("*" in v for v in labels.values())
        lines.append("- In `supernodes.parquet` a label is the value shared by every member of the supernode"
                     + ("; a broader value means the members share that broader value" if generalised else "")
                     + ("; `*` means the members differ on that attribute (a residual supernode)" if residual else "")
                     + "." + (" Labels of different supernodes can overlap (a broader value covers narrower ones "
                              "shown elsewhere): each supernode stands only for its own members."
                              if generalised or residual else ""))
    for a in view_only:
        lines.append(f"- {_code(a)} (view attribute, not used for grouping): values {_codes(domains[a])}.")
    if layers:
        lines.append(f"- Layers: column {_code(layers.get('column'))} of the contacts, values "
                     f"{_codes(layers.get('values', []))}, in this order: a pair of people recorded in several "
                     "layers counts once, in the first of its layers in this order.")
    lines.append("")
    return "\n".join(lines)


def _superedges_file(m) -> str:
    rows = m.get("rows", {})
    n = rows.get("supernodes")
    sp = _spend(m, "superedge_counts") or {}
    cells = m.get("superedge_cells") or (n * (n + 1) // 2 if isinstance(n, int) else None)
    layered = "; contacts of every layer together" if m.get("layers") else ""
    cols = ("`edge_count` is the noisy number of contacts between the two supernodes (within the supernode when "
            "`a = b`" + layered + "), clamped to `[0, possible_pairs]`; `edge_count_unclamped` is the same noisy "
            "value before clamping (it can be negative); `edge_count_estimate` (when present) is the consistent, "
            "non-negative estimate (see \"Which column to use for what\"); `possible_pairs` is `size_a * size_b` (or "
            "`size * (size - 1) / 2` within one supernode); `noise_scale` is the scale of the discrete Laplace "
            "noise; `ci95_half_width` is the half-width of a 95% interval for the noise of one cell.")
    if m.get("superedges_sparse"):
        t = m.get("superedges_sparse_threshold")
        return (f"- `superedges.parquet`: **a sparse release.** Only the cells whose noisy count reached the "
                f"threshold **T = {t}** are listed ({rows.get('superedges', '?'):,} of the {cells:,} pairs of "
                f"supernodes `supernode_a <= supernode_b`). **An absent cell means \"noisy count below T = {t}\"**, "
                "not zero: its true count is unknown. A true count well above T is rarely absent, but counts near "
                "or below T often are, and noise can push any count below T. The listed cells were kept for being high, so small listed counts "
                "are biased upwards, and a sum over the listed cells is not an unbiased total (it misses what the "
                "absent cells hold, and empty cells that passed the threshold add their noise). (The listing has "
                "exactly the law of noising every cell and then dropping those below T; Cormode, Procopiuc, "
                "Srivastava and Tran, \"Differentially private summaries for sparse data\", ICDT 2012.) "
                + cols + "\n")
    return (f"- `superedges.parquet`: one row for every pair of supernodes `supernode_a <= supernode_b` "
            f"({cells:,} rows), **zeros included**: a pair with no contact is released with its noise like any other. "
            + cols + " Sums of `edge_count_unclamped` are unbiased; sums of `edge_count` are not (clamping lifts "
            "empty cells above zero)." + (f" Noise scale {_num(sp.get('scale'))}." if sp.get("scale") else "") + "\n")


def _weight_source(m, name) -> tuple:
    cp = _component_policy(m, name)
    col = cp.get("column") or (_policy(m).get("input") or {}).get("weight")
    return col, cp.get("clip"), cp.get("weight_unit")


def _in_unit(unit) -> str:
    """How the guide names the weights' unit: the policy's own words, or the column's unit."""
    return f"in {_code(unit)} (the unit the policy declares; aggpub does not convert it)" if unit else \
        "in that column's own unit (aggpub does not convert it; the policy declares none)"


def _files(m) -> str:
    rows = m.get("rows", {})
    unit = _unit(m)
    D = m.get("max_contacts")
    lines = ["## Files", ""]
    label_cols = {"attributes": "one column per grouping attribute (its label)",
                  "attributes+structure": "one column per grouping attribute (its label) and `tier`",
                  "structure": "`tier`", "given": "`map_supernode` (the map's label)", "random": "no label"}
    lines.append(f"- `supernodes.parquet`: `supernode` (id, 0 to n-1), `size` ("
                 + ("exact number of members" if m.get("sizes_exact", True) else "noisy number of members")
                 + f"), {label_cols.get(m.get('grouping_method'), 'label columns')}.\n")
    if "superedges" in rows:
        lines.append(_superedges_file(m))
    if "degree_histograms" in rows:
        cap = _component_policy(m, "degree_histograms").get("max_degree")
        capt = (f"0, 1, ..., {cap - 1} contacts, and in the top bin {cap} **or more** (the cap `max_degree` = "
                f"{cap}, a public choice)" if isinstance(cap, int) else
                "each number of contacts up to the cap (the top bin counts everyone at the cap or above)")
        lines.append(f"- `degree_histograms.parquet`: `supernode`, `degree_bin`, `people`: how many members of each "
                     f"supernode have {capt}. `people_noisy` is the noisy count as drawn (unbiased, can be negative; "
                     "`ci95_half_width` applies to it); `people` is the same made consistent by post-processing: "
                     "non-negative integers adding up to the supernode's `size`."
                     + (f" Bins above {D} are known to be empty (nobody has more than {D} contacts under this "
                        "release's promise) and are 0." if unit == "person" and D is not None else "") + "\n")
    if "weight_totals" in rows:
        col, clip, wunit = _weight_source(m, "weight_totals")
        sp = _spend(m, "weight_totals") or {}
        lines.append(f"- `weight_totals.parquet`: `supernode_a`, `supernode_b`, `weight_total`: the noisy total of "
                     f"contact weights per pair of supernodes, every pair including zeros. The weights are column "
                     f"{_code(col)} of the contacts, {_in_unit(wunit)}; a pair "
                     f"of people recorded in several rows has the sum of its rows' weights. Each contact's weight "
                     f"is clipped to **[0, {clip}]** and rounded to a whole unit before summing, so one contact adds "
                     f"at most {clip} (sensitivity {_num(sp.get('sensitivity'))}, noise scale {_num(sp.get('scale'))}): "
                     f"totals are below the raw weights wherever contacts weigh more than {clip}. `weight_total` is "
                     "clamped to `[0, max_weight_total]` (the clip times the possible pairs); "
                     "`weight_total_unclamped` is the noisy value before clamping (unbiased): sum it, not "
                     "`weight_total`, when you add up many cells.\n")
    if "degree_sequences" in rows:
        lines.append("- `degree_sequences.parquet`: `supernode`, `position`, `degree_noisy`, `degree_estimate`: one "
                     "row per member of every supernode, the members' numbers of contacts sorted within the "
                     "supernode (position 0 has the fewest), with noise (`degree_noisy`) and as estimated "
                     "(`degree_estimate`, see below).\n")
    lines.append(_views_files(m))
    if "triangle_count" in m:
        lines.append(f"- `triangle_count` in `manifest.json` (= {m.get('triangle_count')}): the noisy number of "
                     "triangles (three people all in contact with each other) in the whole network; see below.\n")
    lines.append("- `manifest.json`: every parameter of the release and the SHA-256 of every file; `README.md`: "
                 "this guide.\n")
    return lines[0] + "\n\n" + "".join(x if x.endswith("\n") else x + "\n" for x in lines[1:] if x)


def _views_files(m) -> str:
    views = m.get("views")
    if not views:
        return ""
    rows = m.get("rows", {})
    layers = m.get("layers") or {}
    unit = _unit(m)
    names = ", ".join(_code(v["name"]) for v in views)
    per_layer = (f", one table per layer of {_code(layers.get('column'))} "
                 f"({_codes(layers.get('values', []))})" if layers else "")
    out = [f"- `contact_views.parquet`: contact matrices by attribute ({names}){per_layer}. One row per `view`, "
           "`layer` (empty without layers) and unordered pair of declared values `value_a <= value_b`, every pair "
           "including zeros: `contacts_unclamped` is the noisy number of contacts between people of the two values "
           "(unbiased: use it for sums and estimates), `contacts` the same floored at 0, `noise_scale` the discrete "
           "Laplace scale. A view places every contact by the exact values of its two people, also when their "
           "supernodes carry a broader value or `*`. All layers of one view share that view's epsilon: each contact "
           "counts in exactly one layer. `aggpub matrix <this folder> --by ATTRIBUTE [--layer NAME] [--per-person] "
           "--out FILE.csv` (or `aggpub.contact_matrix` in Python) gives the most precise consistent matrix with "
           "intervals.\n"]
    if "contact_view_weights" in rows:
        col, clip, wunit = _weight_source(m, "contact_views")
        out.append(f"- `contact_view_weights.parquet`: the same with `weight_total`: contact weights from column "
                   f"{_code(col)} ({_in_unit(wunit)}), each clipped to **[0, {clip}]** and rounded to a "
                   "whole unit, instead of counts; `aggpub matrix --weight`.\n")
    if "view_people" in rows:
        if unit == "edge":
            people = "exact (the person table is public under unit `edge`)"
        else:
            people = ("noisy: for a grouping attribute the sum of the grouping's noisy cell counts, otherwise a "
                      "noisy count per value (its `view_people:` row of the budget table); `noise_scale` is the "
                      "scale of each noisy count summed and `noise_terms` how many were summed")
        out.append(f"- `view_people.parquet`: `view`, `value`, `people`: the number of people with each value, "
                   f"{people}; the denominators of per-person rates.\n")
    return "".join(out)


def _noise(m) -> str:
    lines = ["## Reading the noise", "",
             "Each released count is the true count plus independent discrete Laplace (two-sided geometric) noise: "
             "P(Z = z) = (1 - a) / (1 + a) * a^|z| with a = exp(-1 / scale), variance 2a / (1 - a)^2. Each table's "
             "scale is in its `noise_scale` column and in the budget table; for the scales of this release:", ""]
    lines.append("| component | noise scale | standard deviation of one cell |")
    lines.append("|---|---|---|")
    for c in _spends(m):
        if c.get("mechanism") != "discrete_laplace" or not c.get("scale"):
            continue
        lines.append(f"| {c.get('name')} | {_num(c.get('scale'))} | {_noise_sd(c['scale']):.3g} |")
    lines += ["",
              "- One cell: the true value is within `value ± ci95_half_width` of the unclamped value with about 95% "
              "probability.",
              "- A sum of m cells has m times the variance of one cell; for large m use "
              "`sum ± 1.96 * sqrt(m * variance)`. `aggpub.interval` does this for superedge cells.",
              "- Small counts are dominated by noise: add cells up (for example by attribute) before drawing "
              "conclusions. Clamping at zero biases tiny cells upwards."]
    if m.get("superedges_sparse"):
        lines.append(f"- In this sparse release, intervals hold for the listed superedge cells only; the cells absent "
                     f"from `superedges.parquet` (noisy count below {m.get('superedges_sparse_threshold')}) are not "
                     "covered by any interval.")
    lines.append("")
    return "\n".join(lines)


def _budget(m) -> str:
    comps = _spends(m)
    rows = "\n".join(f"| {c.get('name')} | {c.get('epsilon', 0):.6g} | {_num(c.get('sensitivity'))} | "
                     f"{c.get('mechanism')} | {_num(c.get('scale'))} |" for c in comps) or "| (none) | | | | |"
    unit = _unit(m)
    sens = ("sensitivity is the most one contact can change the component's whole table" if unit == "edge" else
            f"sensitivity is the most one person with up to {m.get('max_contacts')} contacts can change the "
            "component's whole table" if unit == "person" else "sensitivity per privacy unit")
    return (f"## Privacy budget\n\n| component | epsilon | sensitivity | mechanism | scale |\n"
            f"|---|---|---|---|---|\n{rows}\n\n"
            f"The epsilons add up to at most epsilon_total = {_num(m.get('epsilon_total'))} (sequential composition); "
            f"the {sens}; scale = sensitivity / epsilon.\n\n")


def _cautions(m) -> str:
    attrs = m.get("grouping_attributes") or []
    example = ""
    if attrs and _attribute_groupings(m):
        example = (f" For this release: a supernode is people sharing values of {_attrs_text(attrs)}; if few "
                   "people share a combination, or they are alike in their contacts, what the tables show about the "
                   "supernode is close to a statement about each of them.")
    return f"## Cautions\n\n{CAUTIONS}{example}\n\n{DEFERENCE}\n"


def render_guide(manifest: dict) -> str:
    """The reader's guide (Markdown, ``README.md`` in a bundle) for a release, from its manifest only.

    Parameters
    ----------
    manifest : dict
        A release's manifest (:func:`aggpub.bundle.manifest.build_manifest`): public
        parameters and noisy outputs only. Older manifests without some fields give a
        guide that leaves those parts out.

    Returns
    -------
    str
        Markdown text.

    Examples
    --------
    >>> import networkx as nx, pyarrow as pa
    >>> import aggpub
    >>> from aggpub.bundle.guide import render_guide
    >>> G = nx.karate_club_graph()  # Zachary's karate club, as networkx ships it
    >>> edges = pa.table({"source": [str(u) for u, v in G.edges()], "target": [str(v) for u, v in G.edges()]})
    >>> people = pa.table({"node": [str(n) for n in G], "club": [G.nodes[n]["club"] for n in G]})
    >>> policy = {"title": "Karate club", "privacy": {"unit": "edge", "epsilon": 1.0},
    ...           "grouping": {"method": "attributes", "attributes": ["club"], "min_size": 5}}
    >>> text = render_guide(aggpub.release_tables(edges, people, policy, seed=1).manifest)
    >>> text.splitlines()[0]
    "# Reader's guide: Karate club"
    >>> "no privacy guarantee" in text  # a seeded release says it has none
    True
    """
    m = manifest
    parts = [_header(m), _guarantee(m), _accounting(m), _sizes(m), _attributes(m), _files(m),
             columns_guide(m), synthesis_guide(m), _noise(m), _budget(m), _cautions(m)]
    return "\n\n".join(p.strip("\n") for p in parts if p.strip()) + "\n"
