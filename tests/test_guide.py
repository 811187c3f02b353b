"""The reader's guide (``README.md`` in every bundle) says what is true of *this* release (issues 11.5, 14.6, 14.8).

Every guide here comes from the real pipeline (:func:`aggpub.release_tables`, :func:`aggpub.publish`) on
Zachary's karate club as networkx ships it (W. W. Zachary, "An information flow model for conflict and
fission in small groups", Journal of Anthropological Research 33(4), 1977): 34 members, 78 ties, each member's
faction in the node attribute ``club`` ('Mr. Hi' or 'Officer', 17 each in networkx's copy) and the number of
contexts in which two members interacted as the edge attribute ``weight`` (1 to 7). Where the guide makes a
claim about the numbers (sizes exact, weights clipped at the stated bound, sizes below ``min_size`` possible
under unit ``person``), the test checks the claim against the network itself, not only the wording.
"""

from __future__ import annotations

import collections
import doctest
import math
import re
from pathlib import Path

import networkx as nx
import numpy as np
import pyarrow as pa
import pytest

import aggpub
from aggpub.bundle.guide import render_guide

G = nx.karate_club_graph()
CLUBS = collections.Counter(G.nodes[v]["club"] for v in G)  # {'Mr. Hi': 17, 'Officer': 17}
EXACT = "is published exactly"
NOISY = "**Sizes are noisy.**"


def _tables():
    edges = pa.table({
        "source": [str(u) for u, v in G.edges()],
        "target": [str(v) for u, v in G.edges()],
        "weight": [int(G.edges[u, v]["weight"]) for u, v in G.edges()],
        # a layer by a public rule on the edge itself: ties seen in at least 3 contexts are 'strong'
        "kind": ["strong" if G.edges[u, v]["weight"] >= 3 else "weak" for u, v in G.edges()],
    })
    people = pa.table({"node": [str(v) for v in G], "club": [G.nodes[v]["club"] for v in G],
                       # an invented public attribute outside the grouping (first and second half of the ids)
                       "cohort": ["first" if v < 17 else "second" for v in G]})
    return edges, people


def _policy(unit="edge", epsilon=1.0, min_size=5, **extra):
    pol = {"title": "Karate club factions, test release", "privacy": {"unit": unit, "epsilon": epsilon},
           "grouping": {"method": "attributes", "attributes": ["club"], "min_size": min_size}}
    if unit == "person":
        pol["privacy"]["max_contacts"] = max(d for _, d in G.degree())  # 17: the promise holds
        pol["grouping"]["hierarchies"] = {"club": {"levels": [{"Mr. Hi": "Mr. Hi", "Officer": "Officer"}]}}
    pol.update(extra)
    return pol


def _release(policy, seed=1, **kw):
    edges, people = _tables()
    return aggpub.release_tables(edges, people, policy, seed=seed, weight="weight", **kw)


def _section(text, title):
    """The text of the section ``## title`` (up to the next ``## ``)."""
    m = re.search(rf"^## {re.escape(title)}\n(.*?)(?=^## |\Z)", text, flags=re.S | re.M)
    assert m, f"no section {title!r}"
    return m.group(1)


# --------------------------------------------------------------------------- privacy unit edge


def test_edge_unit_says_sizes_are_exact_and_they_are():
    rel = _release(_policy())
    text = rel.guide()
    sizes = _section(text, "Supernodes and their sizes")
    assert "**Sizes are exact.**" in sizes and EXACT in sizes and "`club`" in sizes
    assert NOISY not in text and "`min_size` = 5" in sizes
    # the claim itself: the released sizes are networkx's faction counts, no noise
    sn = rel.supernodes
    assert dict(zip(sn.column("club").to_pylist(), sn.column("size").to_pylist())) == dict(CLUBS)
    assert "Privacy unit **`edge`**" in text and "exp(1)" in text
    assert "**The person table.**" in _section(text, "What the guarantee covers")


def test_person_unit_says_sizes_are_noisy_and_what_min_size_means():
    rel = _release(_policy(unit="person", epsilon=2.0))
    text = rel.guide()
    sizes = _section(text, "Supernodes and their sizes")
    assert NOISY in sizes and "**What `min_size` = 5 means here.**" in sizes
    assert "does **not** guarantee that any supernode holds 5 real people" in sizes
    scale = next(c["scale"] for c in rel.manifest["components"] if c["name"] == "supernode_sizes")
    assert f"scale {scale:g}" in sizes and "2 fine cells" in sizes  # the declared domain: two values
    assert EXACT not in text and "**Sizes are exact.**" not in text
    assert "Privacy unit **`person`**" in text and f"more than **{rel.manifest['max_contacts']} contacts**" in text
    assert "**The person table.**" not in text


def test_person_unit_min_size_really_allows_fewer_real_people():
    """What the person-unit guide says is true: with ``min_size`` 18 and 17 real members per faction, the noisy
    grouping publishes a faction supernode of 17 people (released size >= 18) for some draws. Seeds are tried
    in order (tests only); the noise law makes P(noisy count >= 18 | true 17) = a / (1 + a) > 0, so the loop
    stops after a few seeds."""
    found = None
    for seed in range(1, 60):
        rel = _release(_policy(unit="person", epsilon=4.0, min_size=18), seed=seed)
        true = rel.grouping.sizes()
        released = np.asarray(rel.supernodes.column("size").to_numpy())
        small = (true < 18) & (released >= 18)
        if small.any():
            found = rel
            break
    assert found is not None, "no draw kept a supernode of fewer than min_size real people"
    assert "can be below 18" in _section(found.guide(), "Supernodes and their sizes")


# --------------------------------------------------------------------------- superedges: sparse and dense


@pytest.mark.parametrize("threshold", [3, None])
def test_sparse_guide_gives_the_threshold_of_the_manifest(threshold):
    se = {"method": "sparse"} | ({"sparse_threshold": threshold} if threshold else {})
    rel = _release(_policy(components={"superedge_counts": se}))
    m = rel.manifest
    t = m["superedges_sparse_threshold"]
    if threshold:
        assert t == threshold
    text = rel.guide()
    files = _section(text, "Files")
    assert f"**T = {t}**" in files and f"**An absent cell means \"noisy count below T = {t}\"**" in files
    assert f"({m['rows']['superedges']:,} of the {m['superedge_cells']:,} pairs" in files
    assert "**zeros included**" not in files and "not an unbiased total" in files
    # the listed cells are exactly those at or above T
    assert (np.asarray(rel.superedges.column("edge_count_unclamped").to_numpy()) >= t).all()
    assert "sums of it are unbiased" not in _section(text, "Which column to use for what")


def test_dense_guide_has_no_threshold_and_lists_every_cell():
    rel = _release(_policy(components={"superedge_counts": {"method": "dense"}}))
    text = rel.guide()
    files = _section(text, "Files")
    n = rel.manifest["rows"]["supernodes"]
    assert f"({n * (n + 1) // 2:,} rows), **zeros included**" in files
    assert rel.superedges.num_rows == n * (n + 1) // 2
    assert "threshold" not in text.lower() and "absent cell" not in text
    assert "Sums of `edge_count_unclamped` are unbiased" in files


# --------------------------------------------------------------------------- weights, histograms, views, layers


def test_weighted_guide_names_the_declared_unit_of_the_weights():
    """Issue 14.6: the guide names the weights' unit when the policy declares one (`unit`), for the weight
    totals and for weighted views alike, and says it is the column's own unit otherwise."""
    comps = {"superedge_counts": {"share": 0.4},
             "weight_totals": {"enabled": True, "share": 0.3, "column": "weight", "clip": 2,
                               "unit": "interaction rounds"},
             "contact_views": {"share": 0.3, "weighted": True, "column": "weight", "clip": 2, "unit": "rounds"}}
    rel = _release(_policy(epsilon=10.0, components=comps))
    files = _section(rel.guide(), "Files")
    assert "column `weight` of the contacts, in `interaction rounds` (the unit the policy declares" in files
    assert "from column `weight` (in `rounds` (the unit the policy declares" in files
    assert "own unit" not in files
    assert rel.manifest["policy"]["components"]["weight_totals"]["weight_unit"] == "interaction rounds"


def test_weighted_guide_names_the_column_and_the_clip_and_the_totals_are_clipped():
    comps = {"superedge_counts": {"share": 0.4}, "degree_histograms": {"enabled": True, "share": 0.1,
                                                                       "max_degree": 10},
             "weight_totals": {"enabled": True, "share": 0.5, "column": "weight", "clip": 2}}
    rel = _release(_policy(epsilon=10.0, components=comps))
    files = _section(rel.guide(), "Files")
    assert "column `weight` of the contacts" in files and "clipped to **[0, 2]**" in files
    assert "in that column's own unit" in files
    assert "top bin 10 **or more** (the cap `max_degree` = 10" in files
    # the claim: each contact adds min(weight, 2). networkx's weights go up to 7: the unclipped totals exceed
    # the clipped ones by 38, 5 and 38 between and within the factions (computed below, not typed in)
    wt = rel.tables["weight_totals"]
    clubs = rel.supernodes.column("club").to_pylist()
    clipped, raw = collections.Counter(), collections.Counter()
    for u, v, w in G.edges(data="weight"):
        key = tuple(sorted((clubs.index(G.nodes[u]["club"]), clubs.index(G.nodes[v]["club"]))))
        clipped[key] += min(w, 2)
        raw[key] += w
    scale = next(c["scale"] for c in rel.manifest["components"] if c["name"] == "weight_totals")  # 0.4
    cells = list(zip(wt.column("supernode_a").to_pylist(), wt.column("supernode_b").to_pylist(),
                     wt.column("weight_total_unclamped").to_pylist()))
    assert len(cells) == 3
    for a, b, y in cells:  # P(|Z| >= 4) = 2 a^4 / (1 + a) < 1e-4 at a = exp(-1 / 0.4)
        assert abs(y - clipped[(a, b)]) <= 8 * scale
    off_clipped = sum(abs(y - clipped[(a, b)]) for a, b, y in cells)
    off_raw = sum(abs(y - raw[(a, b)]) for a, b, y in cells)
    assert off_raw > off_clipped + 50


def test_layered_views_guide_names_the_layers_and_the_view_weights():
    pol = _policy(layers={"column": "kind", "values": ["strong", "weak"]},
                  components={"contact_views": {"weighted": True, "column": "weight", "clip": 4}})
    rel = _release(pol)
    text = rel.guide()
    files = _section(text, "Files")
    assert "contact matrices by attribute (`club`), one table per layer of `kind` (`strong`, `weak`)" in files
    assert "`contact_view_weights.parquet`" in files and "clipped to **[0, 4]**" in files
    assert "contacts of every layer together" in files
    assert "Layers: column `kind` of the contacts, values `strong`, `weak`" in _section(text, "Attributes and their values")
    assert set(rel.tables["contact_views"].column("layer").to_pylist()) == {"strong", "weak"}
    # without layers, none of this appears
    plain = _release(_policy()).guide()
    assert "one table per layer" not in plain and "Layers:" not in plain and "contact_view_weights" not in plain


def test_person_unit_view_outside_the_grouping_is_named_and_its_people_are_noisy():
    pol = _policy(unit="person", epsilon=2.0, domains={"cohort": {"values": ["first", "second"]}},
                  components={"contact_views": {"attributes": ["club", "cohort"]}})
    rel = _release(pol)
    text = rel.guide()
    assert "- `cohort` (view attribute, not used for grouping): values `first`, `second`." in text
    assert "(`club`, `cohort`)" in _section(text, "Files")
    assert "exact (the person table is public" not in text and "noisy count per value" in text
    assert any(c["name"] == "view_people:cohort" for c in rel.manifest["components"])
    edge = _release(_policy(components={"contact_views": {"attributes": ["club", "cohort"]}})).guide()
    assert "exact (the person table is public under unit `edge`)" in edge and "noisy count per value" not in edge


def test_components_present_are_the_components_described():
    rel = _release(_policy())
    files = _section(rel.guide(), "Files")
    for stem in rel.tables:
        assert f"`{stem}.parquet`" in files
    for stem in ("degree_histograms", "weight_totals", "contact_view_weights"):
        assert stem not in rel.tables and f"`{stem}.parquet`" not in files
    assert f"`triangle_count` in `manifest.json` (= {rel.manifest['triangle_count']})" in files
    off = _release(_policy(components={"triangle_count": {"enabled": False}}))
    assert "triangle_count" not in off.manifest and "`triangle_count` in `manifest.json`" not in off.guide()


# --------------------------------------------------------------------------- guarantee, seed, accounting


def test_seeded_guide_says_there_is_no_guarantee_and_an_unseeded_one_does_not():
    seeded = _release(_policy()).guide()
    assert "**NOT PRIVATE.**" in seeded and "**This bundle has no guarantee**" in seeded
    private = _release(_policy(), seed=None).guide()
    assert "NOT PRIVATE" not in private and "no guarantee" not in private
    assert "changes the probability of every possible output of this release by at most a factor exp(1)" in private


def test_not_charged_and_charged_marks(tmp_path):
    ledger = {"path": str(tmp_path / "karate.ledger"), "dataset": "karate-club-1977", "lifetime_epsilon": 5.0}
    uncharged = _release(_policy(ledger=ledger), charge_ledger=False)
    acc = _section(uncharged.guide(), "Accounting")
    assert "**Not charged to any lifetime ledger** (the caller chose not to charge" in acc
    assert uncharged.manifest["dataset"] == "karate-club-1977"
    assert "of dataset `karate-club-1977`" in uncharged.guide().split("## ")[0]
    charged = _release(_policy(ledger=ledger))
    acc = _section(charged.guide(), "Accounting")
    assert "**Charged** to the lifetime ledger of dataset `karate-club-1977`" in acc
    assert "lifetime cap of 5" in acc and "Not charged" not in acc
    none = _release(_policy())
    assert none.manifest["dataset"] is None and "records no dataset id" in none.guide()
    assert "**Not charged to any lifetime ledger** (the policy has no [ledger] section)" in none.guide()


# --------------------------------------------------------------------------- the release's own names


def test_guide_uses_the_release_own_attribute_names_and_labels():
    rel = _release(_policy())
    text = rel.guide()
    assert rel.manifest["grouping_labels"] == {"club": sorted(CLUBS)}
    assert "`club` (grouping attribute)" in text and "`Mr. Hi`" in text and "`Officer`" in text
    assert "Karate club factions, test release" in text.splitlines()[0]
    assert not re.search(r"neighbourhood|zone", text, flags=re.I)


def test_demo_words_come_from_the_demo_release_only(tmp_path):
    """The same function names the demo town's own attributes when, and because, the release has them."""
    from aggpub.demo import write_demo_inputs
    from aggpub.pipeline import run_release

    town = write_demo_inputs(tmp_path / "inputs", n_people=1500)
    rel, path = run_release(town["policy"], town["edges"], town["people"], tmp_path / "bundle", seed=2)
    text = (path / "README.md").read_text(encoding="utf-8")
    assert "`neighbourhood` (grouping attribute)" in text and "`age_band`" in text
    assert "layer of `setting`" in text


def test_published_readme_is_the_guide_and_checks(tmp_path):
    rel = _release(_policy())
    path = aggpub.publish(rel, tmp_path / "bundle")
    assert (path / "README.md").read_text(encoding="utf-8") == render_guide(rel.manifest)
    assert aggpub.check_bundle(path).ok


def test_guide_examples_run():
    import aggpub.bundle.guide as mod

    result = doctest.testmod(mod, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    assert result.attempted > 0 and result.failed == 0


def test_noise_table_matches_the_discrete_laplace_law():
    """The guide's standard deviation per cell is sqrt(2a) / (1 - a), a = exp(-1/scale) (Ghosh, Roughgarden,
    Sundararajan, STOC 2009), checked against scipy's dlaplace with parameter 1/scale."""
    import scipy.stats as st

    rel = _release(_policy())
    noise = _section(rel.guide(), "Reading the noise")
    for c in rel.manifest["components"]:
        if c["mechanism"] == "discrete_laplace":
            sd = math.sqrt(st.dlaplace(1.0 / c["scale"]).var())
            assert f"| {c['name']} | {c['scale']:g} | {sd:.3g} |" in noise


def test_the_old_name_is_gone_from_the_tree():
    root = Path(__file__).resolve().parents[1]
    old = ("data" + " card", "data" + "card")
    files = [root / "README.md", root / "DEVELOPERS.md"]
    for folder in ("aggpub", "docs", "tests", "examples", "scripts", "benchmarks"):
        if (root / folder).is_dir():
            files += [p for p in (root / folder).rglob("*") if p.suffix in (".py", ".md", ".sh", ".toml", ".txt")]
    hits = [str(p.relative_to(root)) for p in files
            if any(w in p.read_text(encoding="utf-8", errors="replace").lower() for w in old)]
    assert hits == []
