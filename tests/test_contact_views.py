"""Contact views through the product (issue 13): ingest, engine, sensitivities, bundle, ``aggpub matrix``.

Outside references, named beside each check:

* networkx's ``attribute_mixing_matrix`` (M. E. J. Newman, "Mixing patterns in networks", Phys. Rev. E 67,
  2003) on Zachary's karate club (W. W. Zachary, J. Anthropological Research 33(4), 1977) and Les
  Misérables (D. E. Knuth, "The Stanford GraphBase", 1993), with invented attributes and layers, against
  the CLI (``aggpub release`` then ``aggpub matrix``) at a very large epsilon. networkx yields every
  undirected edge once per direction, so off the diagonal ``M[a, b]`` is our count and on it twice our count
  (checked on a three-person example in ``tests/test_views.py``).
* Brute-force neighbour tests of every new sensitivity (``aggpub.budget.SENSITIVITY``), counted by the
  DuckDB engine after ingest, and a counterfactual without the one-layer rule that breaks the bound: the
  parallel composition of layers (F. McSherry, "Privacy integrated queries", SIGMOD 2009).
* Interval coverage over many fresh releases, an exact binomial test (``scipy.stats.binomtest``).
"""

from __future__ import annotations

import csv
import itertools
import re

import networkx as nx
import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.compute as pc
import pytest
from scipy.stats import binomtest

from aggpub import budget
from aggpub.cli import main
from aggpub.engines._duckdb import DuckDBEngine
from aggpub.errors import InputError, PolicyError
from aggpub.estimates.views import one_layer_per_contact, view_cell_index
from aggpub.ingest import load_network
from aggpub.pipeline import build_release, release_tables
from aggpub.policy import parse_policy

LAYERS = ("home", "school", "work", "leisure")
CLIP = 3


# --------------------------------------------------------------------------- helpers: neighbours in one engine run


def _rows_of(rng, pairs, n_layers, max_rows=3):
    """Edge rows of each pair: 1..max_rows rows, in distinct random layers, with random weights."""
    rows = []
    for a, b in pairs:
        k = int(rng.integers(1, min(max_rows, n_layers) + 1))
        for lay in rng.choice(n_layers, size=k, replace=False):
            w = float(rng.integers(0, 4 * CLIP + 1)) / 2.0
            rows.append((int(a), int(b), int(lay), w) if rng.random() < 0.5 else (int(b), int(a), int(lay), w))
    return rows


def _union_views(copies, n_people_of, x, k, n_layers, *, weighted=False, people_of=None):
    """Views of every copy (a list of edge rows), counted in ONE engine run laid out as a disjoint union.

    Copy ``c`` uses person ids ``c<c>_p<i>`` and view values ``c * k + x[i]``: no contact crosses copies,
    so the cells ``(c k + a, c k + b)`` of the union's view are exactly copy ``c``'s own view.
    """
    people_ids, people_x, src, tgt, lay, wts = [], [], [], [], [], []
    for c, rows in enumerate(copies):
        members = people_of(c) if people_of else range(n_people_of)
        for i in members:
            people_ids.append(f"c{c}_p{i}")
            people_x.append(c * k + int(x[i]))
        for a, b, layer, w in rows:
            src.append(f"c{c}_p{a}")
            tgt.append(f"c{c}_p{b}")
            lay.append(LAYERS[layer])
            wts.append(w)
    edges = pa.table({"source": src, "target": tgt, "setting": lay, "minutes": wts})
    people = pa.table({"node": people_ids, "x": [str(v) for v in people_x]})
    eng = DuckDBEngine(memory_limit="256MB")
    try:
        net = load_network(edges, people, attributes=["x"], engine=eng, weight="minutes", layer="setting",
                           layer_values=LAYERS[:n_layers])
        codes = np.asarray([int(v) for v in net.people.column("x").to_pylist()], dtype=np.int64)
        total = len(copies) * k
        (view,) = eng.view_counts([codes], [total], n_layers, clip=CLIP if weighted else None)
    finally:
        eng.close()
    a, b = np.triu_indices(k)
    return [view[:, view_cell_index(c * k + a, c * k + b, total)] for c in range(len(copies))]


def _naive_views(copies, x, k, n_layers):
    """The counterfactual without the one-layer rule: a pair counts once in EACH of its layers."""
    out = []
    for rows in copies:
        t = np.zeros((n_layers, k * (k + 1) // 2), dtype=np.int64)
        for (a, b), layer in {(tuple(sorted((a, b))), layer) for a, b, layer, _ in rows}:
            t[layer, view_cell_index(x[a], x[b], k)] += 1
        out.append(t)
    return out


# --------------------------------------------------------------------------- sensitivities by brute force


@pytest.mark.parametrize("weighted", [False, True])
def test_view_sensitivity_edge_unit_with_layers_brute_force(weighted):
    """Unit edge: one view, all of its layers together, changes by at most 1 (w_max weighted); tight.

    Every neighbour: each contact removed with all of its rows, each missing pair added with 1-3 rows in
    random layers. Without the one-layer rule the same neighbours change the view by 2 (a contact recorded
    in two layers): the bound of 1 rests on the rule, and this test would catch its loss.
    """
    declared = budget.sensitivity("edge", "contact_view_weights" if weighted else "contact_views", clip=CLIP)
    assert declared == (CLIP if weighted else 1)
    worst, worst_naive, moved_cells = 0, 0, set()
    for seed in range(12):
        rng = np.random.default_rng(seed)
        n, k, n_layers = int(rng.integers(5, 9)), int(rng.integers(2, 4)), int(rng.integers(2, 5))
        x = rng.integers(0, k, n)
        iu, iv = np.triu_indices(n, 1)
        keep = rng.random(len(iu)) < 0.4
        keep[:2] = True
        base = _rows_of(rng, zip(iu[keep], iv[keep]), n_layers)
        copies = [base]
        present = {tuple(sorted((a, b))) for a, b, _, _ in base}
        for pair in sorted(present):  # remove one contact with all of its rows
            copies.append([r for r in base if tuple(sorted(r[:2])) != pair])
        for a, b in zip(iu[~keep], iv[~keep]):  # add one missing contact with its rows
            copies.append(base + _rows_of(rng, [(a, b)], n_layers))
        views = _union_views(copies, n, x, k, n_layers, weighted=weighted)
        for nb in views[1:]:
            diff = np.abs(nb - views[0])
            change = int(diff.sum())
            assert change <= declared
            worst = max(worst, change)
            if not weighted:
                assert change == 1 and (diff > 0).sum() == 1  # exactly one cell of one layer
                moved_cells.add(int(np.argmax(diff.sum(axis=1))))
        if not weighted:
            naive = _naive_views(copies, x, k, n_layers)
            worst_naive = max(worst_naive, max(int(np.abs(t - naive[0]).sum()) for t in naive[1:]))
    assert worst == declared  # tight
    if not weighted:
        assert worst_naive >= 2  # a contact in two layers would count twice without the rule
        assert len(moved_cells) >= 2  # the changed cell lies in different layers across neighbours


def _capped_base(rng, n, cap, hub):
    """Pairs of a network keeping the cap ``cap``; with ``hub`` person 0 has ``cap`` contacts of degree 1."""
    if hub:
        d = min(cap, n - 1)
        pairs = [(0, j) for j in range(1, d + 1)]
        deg = np.zeros(n, dtype=int)
        deg[0], deg[1:d + 1] = d, 1
        others = list(range(d + 1, n))
        for a, b in itertools.combinations(others, 2):
            if rng.random() < 0.5 and deg[a] < cap and deg[b] < cap:
                pairs.append((a, b))
                deg[a] += 1
                deg[b] += 1
        return pairs
    deg = np.zeros(n, dtype=int)
    pairs = []
    for a, b in itertools.combinations(rng.permutation(n), 2):
        if rng.random() < 0.5 and deg[a] < cap and deg[b] < cap:
            pairs.append((int(a), int(b)))
            deg[a] += 1
            deg[b] += 1
    return pairs


@pytest.mark.parametrize("weighted", [False, True])
def test_view_sensitivity_person_unit_with_layers_brute_force(weighted):
    """Unit person: removing a person with all of their contacts changes one view, all layers, by <= D (tight).

    Networks keep the cap D = 1..4 (half of them the hub worst case); contacts are recorded in 1-3 layers.
    A constant of 1 would fail: changes of D > 1 are seen.
    """
    worst = {}
    for seed in range(12):
        rng = np.random.default_rng(100 + seed)
        cap = 1 + seed % 4
        n, k, n_layers = int(rng.integers(6, 10)), int(rng.integers(2, 4)), int(rng.integers(1, 5))
        x = rng.integers(0, k, n)
        pairs = _capped_base(rng, n, cap, hub=seed % 2 == 0)
        if len(pairs) < 2:
            continue
        base = _rows_of(rng, pairs, n_layers)
        copies, removed = [base], [None]
        for j in range(n):
            rest = [r for r in base if j not in r[:2]]
            if rest:  # (ingest needs a contact)
                copies.append(rest)
                removed.append(j)
        views = _union_views(copies, n, x, k, n_layers, weighted=weighted,
                             people_of=lambda c: [i for i in range(n) if i != removed[c]])
        declared = budget.sensitivity("person", "contact_view_weights" if weighted else "contact_views",
                                      max_contacts=cap, clip=CLIP)
        assert declared == cap * (CLIP if weighted else 1)
        for nb in views[1:]:
            change = int(np.abs(nb - views[0]).sum())
            assert change <= declared
            worst[cap] = max(worst.get(cap, 0), change)
    for cap, w in worst.items():
        assert w == cap * (CLIP if weighted else 1), (cap, w)  # tight for every cap (the hub attains it)
    assert max(worst) > 1


def test_people_per_value_sensitivity_person_unit_brute_force():
    """People per value of an attribute outside the grouping: removing one person changes the counts by 1."""
    assert budget.sensitivity("person", "view_people") == 1 and budget.sensitivity("edge", "view_people") == 0
    rng = np.random.default_rng(7)
    for _ in range(20):
        n, k = int(rng.integers(2, 12)), int(rng.integers(1, 5))
        x = rng.integers(0, k, n)
        full = np.bincount(x, minlength=k)
        changes = {int(np.abs(np.bincount(np.delete(x, j), minlength=k) - full).sum()) for j in range(n)}
        assert changes == {1}


# --------------------------------------------------------------------------- the one-layer rule at ingest


def test_ingest_keeps_the_first_declared_layer_of_a_pair_like_the_reference():
    """The engine's GROUP BY gives each pair the first of its layers in declared order, whatever the row order
    (reference: ``aggpub.estimates.views.one_layer_per_contact``, the core's numpy rule)."""
    rng = np.random.default_rng(3)
    n, m = 40, 400
    u, v = rng.integers(0, n, m), rng.integers(0, n, m)
    lay = rng.integers(0, 4, m)
    edges = pa.table({"source": [f"q{a}" for a in u], "target": [f"q{b}" for b in v],
                      "setting": [LAYERS[i] for i in lay]})
    people = pa.table({"node": [f"q{i}" for i in range(n)], "x": ["a"] * n})
    for order in (LAYERS, tuple(reversed(LAYERS))):
        eng = DuckDBEngine(memory_limit="256MB")
        net = load_network(edges, people, attributes=["x"], engine=eng, layer="setting", layer_values=order)
        res = eng.con.execute("SELECT u, v, layer FROM edges ORDER BY u, v").fetchnumpy()
        eng.close()
        ids = [int(i[1:]) for i in net.ids.to_pylist()]  # dense id -> q<i>
        got = sorted((min(ids[a], ids[b]), max(ids[a], ids[b]), order[int(c)])
                     for a, b, c in zip(res["u"], res["v"], res["layer"]))
        code = np.array([order.index(LAYERS[i]) for i in lay])
        lo, hi, first = one_layer_per_contact(u, v, code, 4)
        assert got == sorted(zip(lo.tolist(), hi.tolist(), [order[i] for i in first]))


def test_undeclared_layer_is_refused_with_a_count_under_edge():
    edges = pa.table({"source": ["a", "b", "c"], "target": ["b", "c", "a"], "setting": ["home", "pub", "school"]})
    people = pa.table({"node": ["a", "b", "c"], "x": ["1", "1", "2"]})
    with pytest.raises(InputError, match=r"1 edge row\(s\) have an empty layer or one not listed in 'layers.values' "
                                         r"\(column 'setting'\) \(first at data row 2\)"):
        load_network(edges, people, attributes=["x"], layer="setting", layer_values=LAYERS)


def _person_inputs(tmp_path, bad_layer: bool):
    G = nx.karate_club_graph()
    rng = np.random.default_rng(2)
    with open(tmp_path / "people.csv", "w", newline="") as f:
        w = csv.writer(f)
        w.writerow(["node", "club"])
        for n in G.nodes():
            w.writerow([f"k{n}", G.nodes[n]["club"]])
    layer = [LAYERS[i] for i in rng.integers(0, 3, G.number_of_edges())]
    if bad_layer:
        layer[17] = "pub"
    with open(tmp_path / "contacts.csv", "w", newline="") as f:
        w = csv.writer(f)
        w.writerow(["source", "target", "setting"])
        for (a, b), lay in zip(G.edges(), layer):
            w.writerow([f"k{a}", f"k{b}", lay])
    (tmp_path / "policy.toml").write_text(f"""
[privacy]
unit = "person"
epsilon = 1.0
max_contacts = 17
[grouping]
attributes = ["club"]
min_size = 5
[grouping.hierarchies.club]
levels = [ {{ "Mr. Hi" = "Mr. Hi", "Officer" = "Officer" }} ]
[layers]
column = "setting"
values = ["home", "school", "work"]
[ledger]
path = "karate.ledger"
dataset = "karate"
lifetime_epsilon = 5.0
""")


def test_undeclared_layer_under_person_says_no_figure_and_is_charged(tmp_path):
    """Whether a contact has an undeclared layer is private under unit person: no count, no row, a charge."""
    from aggpub.budget.ledger import Ledger
    from aggpub.pipeline import run_release

    _person_inputs(tmp_path, bad_layer=True)
    with pytest.raises(InputError) as info:
        run_release(tmp_path / "policy.toml", tmp_path / "contacts.csv", tmp_path / "people.csv", tmp_path / "out")
    msg = str(info.value)
    assert "not one of 'layers.values'" in msg and "charged" in msg
    assert not re.search(r"\d+ edge row|data row", msg)
    (row,) = Ledger(tmp_path / "karate.ledger").spends()
    assert row.epsilon == 1.0 and not (tmp_path / "out").exists()


def test_person_unit_release_with_layers_and_noisy_people(tmp_path):
    """Unit person: views per layer at sensitivity D, people per value summed from the noisy fine cells."""
    from aggpub.bundle import check_bundle, read_bundle
    from aggpub.pipeline import run_release

    _person_inputs(tmp_path, bad_layer=False)
    run = run_release(tmp_path / "policy.toml", tmp_path / "contacts.csv", tmp_path / "people.csv",
                      tmp_path / "out", seed=3)
    spends = {c["name"]: c for c in run.release.manifest["components"]}
    assert spends["contact_views:club"]["sensitivity"] == 17
    assert check_bundle(run.path).ok
    b = read_bundle(run.path)
    vp = b.tables["view_people"].to_pylist()
    labels, counts = run.release.grouping.noisy_fine_cells
    fine = {lab[0]: c for lab, c in zip(labels, counts)}
    for r in vp:  # one fine cell per club value here: the released people are its noisy count
        assert r["people"] == round(fine[r["value"]]) and r["noise_terms"] == 1
        assert r["noise_scale"] == spends["supernode_sizes"]["scale"]
    t = main_matrix(run.path, tmp_path, "club", "--per-person", "--layer", "school")
    assert {r["layer"] for r in t} == {"school"} and len(t) == 3


def main_matrix(bundle, tmp_path, by, *extra):
    out = tmp_path / f"m-{by}-{len(list(tmp_path.iterdir()))}.csv"
    assert main(["matrix", str(bundle), "--by", by, "--out", str(out), "--seed", "1", *extra]) == 0
    with open(out, newline="") as f:
        return list(csv.DictReader(f))


# --------------------------------------------------------------------------- the CLI against networkx


def _graph(name):
    G = nx.karate_club_graph() if name == "karate" else nx.les_miserables_graph()
    G = nx.convert_node_labels_to_integers(G, label_attribute="label")
    rng = np.random.default_rng(11 if name == "karate" else 12)
    bands = ["young", "middle", "old"]
    for n in G.nodes():
        G.nodes[n]["band"] = bands[int(rng.integers(0, 3))]
        G.nodes[n]["area"] = ["north", "south"][int(rng.integers(0, 2))]
    rows = []
    for a, b in G.edges():
        first = int(rng.integers(0, 3))
        rows.append((a, b, first))
        if rng.random() < 0.3:  # recorded again in a later layer: counts in the first (declared order)
            rows.append((b, a, int(rng.integers(first, 3))))
    return G, rows


def _karate_tables():
    """People (band, area) and layered contacts of the karate club with invented attributes, as Arrow tables."""
    G, rows = _graph("karate")
    people = pa.table({"node": [f"n{n}" for n in G.nodes()], "band": [G.nodes[n]["band"] for n in G.nodes()],
                       "area": [G.nodes[n]["area"] for n in G.nodes()]})
    edges = pa.table({"source": [f"n{a}" for a, _, _ in rows], "target": [f"n{b}" for _, b, _ in rows],
                      "setting": [LAYERS[lay] for _, _, lay in rows]})
    return people, edges


def _write_inputs(G, rows, tmp_path, epsilon):
    with open(tmp_path / "people.csv", "w", newline="") as f:
        w = csv.writer(f)
        w.writerow(["node", "band", "area"])
        for n in G.nodes():
            w.writerow([f"n{n}", G.nodes[n]["band"], G.nodes[n]["area"]])
    with open(tmp_path / "contacts.csv", "w", newline="") as f:
        w = csv.writer(f)
        w.writerow(["source", "target", "setting"])
        for a, b, lay in rows:
            w.writerow([f"n{a}", f"n{b}", LAYERS[lay]])
    (tmp_path / "policy.toml").write_text(f"""
[privacy]
epsilon = {epsilon}
[grouping]
attributes = ["band", "area"]
min_size = 8
[components.contact_views]
combinations = ["band,area"]
[layers]
column = "setting"
values = ["home", "school", "work"]
""")


@pytest.mark.parametrize("name", ["karate", "lesmis"])
def test_cli_matrix_equals_networkx_mixing_matrix_per_layer_and_overall(name, tmp_path):
    """``aggpub release`` then ``aggpub matrix`` at epsilon 1e6 (noise ~0) equal networkx's
    ``attribute_mixing_matrix(normalized=False)`` of each layer's subgraph and of the whole graph
    (off the diagonal as is, on it halved: networkx counts an undirected edge once per direction)."""
    G, rows = _graph(name)
    _write_inputs(G, rows, tmp_path, 1e6)
    assert main(["release", "--policy", str(tmp_path / "policy.toml"), "--edges", str(tmp_path / "contacts.csv"),
                 "--nodes", str(tmp_path / "people.csv"), "--out", str(tmp_path / "b"), "--quiet"]) == 0
    first = {}
    for a, b, lay in rows:
        key = (min(a, b), max(a, b))
        first[key] = min(first.get(key, 9), lay)
    for view, attr in (("band", "band"), ("area", "area"), ("band,area", None)):
        if attr is None:
            for n in G.nodes():
                G.nodes[n]["band,area"] = f"{G.nodes[n]['band']}|{G.nodes[n]['area']}"
            attr = "band,area"
        values = sorted({G.nodes[n][attr] for n in G.nodes()})
        mapping = {v: i for i, v in enumerate(values)}
        for layer in (None, 0, 1, 2):
            H = nx.Graph()
            H.add_nodes_from(G.nodes(data=True))
            H.add_edges_from(e for e, lay in first.items() if layer is None or lay == layer)
            M = nx.attribute_mixing_matrix(H, attr, mapping=mapping, normalized=False)
            extra = [] if layer is None else ["--layer", LAYERS[layer]]
            table = main_matrix(tmp_path / "b", tmp_path, view, "--per-person", *extra)
            assert len(table) == len(values) * (len(values) + 1) // 2
            for r in table:
                i, j = mapping[r["value_a"]], mapping[r["value_b"]]
                ref = M[i, j] if i != j else M[i, i] / 2
                assert float(r["contacts"]) == pytest.approx(ref, abs=1e-6), (view, layer, r)
                assert float(r["lower"]) - 1e-6 <= ref <= float(r["upper"]) + 1e-6
                # the per-person rate of side a: networkx's row divided by the people of a
                n_a = sum(1 for n in G.nodes() if G.nodes[n][attr] == r["value_a"])
                assert float(r["contacts_per_person_a"]) == pytest.approx(M[i, j] / n_a, abs=1e-6)


# --------------------------------------------------------------------------- acceptance on the demo town


@pytest.fixture(scope="module")
def demo_bundle(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("demo")
    assert main(["demo", "--out", str(tmp / "town"), "--people", "4000", "--seed", "5", "--quiet"]) == 0
    return tmp / "town"


@pytest.mark.parametrize("by", ["age_band", "neighbourhood"])
def test_demo_release_gives_complete_matrices_per_setting(demo_bundle, tmp_path, by):
    """The demo's own policy (no share set) releases complete views by setting: no '*' or generalised row,
    every declared value, intervals, from the command line and from Python alike."""
    import aggpub
    from aggpub.demo import AGE_BANDS, NEIGHBOURHOODS, SETTINGS

    values = list(AGE_BANDS if by == "age_band" else NEIGHBOURHOODS)
    b = aggpub.read_bundle(demo_bundle)
    assert b.manifest["layers"]["values"] == list(SETTINGS)
    for setting in SETTINGS:
        rows = main_matrix(demo_bundle, tmp_path, by, "--layer", setting, "--per-person")
        assert len(rows) == len(values) * (len(values) + 1) // 2
        assert {r["value_a"] for r in rows} | {r["value_b"] for r in rows} == set(values)
        assert all(0 <= float(r["lower"]) <= float(r["upper"]) for r in rows)
    py = aggpub.contact_matrix(b, by, layer="school", per_person=True, seed=1)
    assert py.num_rows == len(values) * (len(values) + 1) // 2 and "*" not in py.column("value_a").to_pylist()
    assert tmp_path.joinpath("plot.png").exists() is False
    rows = main_matrix(demo_bundle, tmp_path, by, "--plot", str(tmp_path / "plot.png"))
    assert tmp_path.joinpath("plot.png").stat().st_size > 1000 and len(rows) > 0


def test_plainest_policy_defaults_and_switches(tmp_path):
    """No share set: a view per grouping attribute at an equal split; a share set elsewhere: no views unless
    asked; an explicit switch off; the views' share split equally among views."""
    base = {"privacy": {"epsilon": 1.0}, "grouping": {"attributes": ["a", "b"], "min_size": 2}}
    p = parse_policy(base)
    assert p.components.contact_views.enabled and p.components.contact_views.attributes == ("a", "b")
    p = parse_policy({**base, "components": {"superedge_counts": {"share": 1.0}}})
    assert not p.components.contact_views.enabled
    p = parse_policy({**base, "components": {"superedge_counts": {"share": 0.6},
                                             "contact_views": {"share": 0.4, "combinations": ["b, a"]}}})
    assert p.components.contact_views.enabled and p.components.contact_views.combinations == ("b,a",)
    p = parse_policy({**base, "components": {"contact_views": {"enabled": False}}})
    assert not p.components.contact_views.enabled
    with pytest.raises(PolicyError, match="needs a declared domain"):
        parse_policy({"privacy": {"unit": "person", "epsilon": 1.0, "max_contacts": 5},
                      "grouping": {"attributes": ["a"], "min_size": 2},
                      "components": {"contact_views": {"attributes": ["a", "role"]}}})


def test_weight_totals_unclamped_column_is_unbiased_and_views_are_weighted():
    """issue 13.4: sums of ``weight_total_unclamped`` are unbiased (mean over seeds within 4 standard errors
    of the truth, the sd from the discrete Laplace variance 2a/(1-a)^2), and the clamped column is the same value
    clamped to [0, max_weight_total]; weighted views sum the same clipped weights as networkx's edge weights."""
    G = nx.les_miserables_graph()
    G = nx.convert_node_labels_to_integers(G)
    rng = np.random.default_rng(4)
    people = pa.table({"node": [f"m{n}" for n in G.nodes()],
                       "g": [["x", "y", "z"][int(rng.integers(0, 3))] for _ in G.nodes()]})
    w = rng.integers(1, 90, G.number_of_edges())
    edges = pa.table({"source": [f"m{a}" for a, _ in G.edges()], "target": [f"m{b}" for _, b in G.edges()],
                      "minutes": w})
    pol = {"privacy": {"epsilon": 1.0}, "grouping": {"attributes": ["g"], "min_size": 10},
           "components": {"weight_totals": {"enabled": True, "column": "minutes", "clip": 60},
                          "contact_views": {"weighted": True, "column": "minutes", "clip": 60}}}
    true_total = int(np.minimum(w, 60).sum())
    sums_u, sums_c = [], []
    for seed in range(40):
        r = release_tables(edges, people, pol, seed=seed)
        wt = r.tables["weight_totals"]
        sums_u.append(int(np.sum(wt.column("weight_total_unclamped").to_numpy())))
        sums_c.append(int(np.sum(wt.column("weight_total").to_numpy())))
    scale = float(wt.column("noise_scale")[0].as_py())
    a = np.exp(-1.0 / scale)
    sd_sum = np.sqrt(wt.num_rows * 2 * a / (1 - a) ** 2)
    assert abs(np.mean(sums_u) - true_total) <= 4 * sd_sum / np.sqrt(len(sums_u))
    np.testing.assert_array_equal(wt.column("weight_total").to_numpy(), np.clip(
        wt.column("weight_total_unclamped").to_numpy(), 0, wt.column("max_weight_total").to_numpy()))
    cw = r.tables["contact_view_weights"]
    assert r.truth["contact_views"]["weights"]["g"].sum() == true_total
    assert cw.column("view").to_pylist()[0] == "g" and "weight_total_unclamped" in cw.column_names


# --------------------------------------------------------------------------- interval coverage


@pytest.mark.heavy
def test_interval_coverage_over_fresh_releases_binomial():
    """The 95% intervals of ``aggpub.contact_matrix`` cover the truth at the stated level: one cell per fresh
    release (independent trials, the cell rotating over the matrix and the layers), 200 releases of the karate
    club with invented attributes and layers at epsilon 1, the least-squares estimate researchers get by
    default; an exact two-sided binomial test at level 0.001 (the raw view's exact intervals and the least
    squares' are also tested at the estimate level in ``tests/test_contact_matrix.py``)."""
    import aggpub

    people, edges = _karate_tables()
    pol = {"privacy": {"epsilon": 1.0}, "grouping": {"attributes": ["band", "area"], "min_size": 8},
           "layers": {"column": "setting", "values": list(LAYERS[:3])}}
    covered, n_trials = 0, 200
    for t in range(n_trials):
        r = release_tables(edges, people, pol, seed=1000 + t)
        truth = r.truth["contact_views"]["counts"]["band"]          # (layers, cells)
        layer = t % 3
        cell = (t // 3) % truth.shape[1]
        m = aggpub.contact_matrix(r, "band", layer=LAYERS[layer], draws=1000, seed=t)
        lo, hi = m.column("lower")[cell].as_py(), m.column("upper")[cell].as_py()
        covered += lo <= truth[layer, cell] <= hi
    p = binomtest(covered, n_trials, 0.95).pvalue
    assert p > 0.001 or covered > 0.95 * n_trials, (covered, n_trials)  # never too narrow
    assert covered >= 0.9 * n_trials


# --------------------------------------------------------------------------- data-dependent decisions


def test_person_value_outside_a_declared_view_domain_is_refused_without_a_figure():
    """Unit person: a value outside [domains.<attribute>] is refused naming the key, never how many hold it."""
    G = nx.karate_club_graph()
    people = pa.table({"node": [f"k{n}" for n in G.nodes()], "club": [G.nodes[n]["club"] for n in G.nodes()],
                       "role": ["a"] * 30 + ["b", "b", "b", "zzz"]})
    edges = pa.table({"source": [f"k{a}" for a, _ in G.edges()], "target": [f"k{b}" for _, b in G.edges()]})
    pol = {"privacy": {"unit": "person", "epsilon": 1.0, "max_contacts": 17},
           "grouping": {"attributes": ["club"], "min_size": 5,
                        "hierarchies": {"club": {"levels": [{"Mr. Hi": "Mr. Hi", "Officer": "Officer"}]}}},
           "components": {"contact_views": {"attributes": ["club", "role"]}},
           "domains": {"role": {"values": ["a", "b"]}}}
    with pytest.raises(PolicyError) as info:
        release_tables(edges, people, pol, seed=1)
    assert "domains.role.values" in str(info.value) and not re.search(r"\d", str(info.value))
    # under unit edge the person table is public: the count is given
    pol_edge = {**pol, "privacy": {"unit": "edge", "epsilon": 1.0}}
    with pytest.raises(PolicyError, match=r"1 person\(s\) hold another value"):
        release_tables(edges, people, pol_edge, seed=1)
    # declared, the person unit releases noisy people per value of 'role' with its own spend
    people_ok = people.set_column(2, "role", pa.array(["a"] * 30 + ["b"] * 4))
    r = release_tables(edges, people_ok, pol, seed=1)
    spends = {c["name"]: c for c in r.manifest["components"]}
    assert spends["view_people:role"]["sensitivity"] == 1
    vp = r.tables["view_people"].filter(pa.compute.equal(r.tables["view_people"].column("view"), "role"))
    assert vp.column("noise_scale").to_pylist() == [spends["view_people:role"]["scale"]] * 2


def test_gate_reads_the_view_matrix_from_released_values_only():
    """With a view of the gate's attribute the contact-matrix figure is the view's: the median over its
    entries of E|Z_1 + ... + Z_L| (exact law of a sum of L discrete Laplace draws) over max(estimate, s),
    computed again here from the released table alone."""
    from aggpub.gate.released import released_metrics
    from aggpub.noise.mechanisms import GeometricMechanism

    G, rows = _graph("lesmis")
    people = pa.table({"node": [f"n{n}" for n in G.nodes()], "band": [G.nodes[n]["band"] for n in G.nodes()]})
    edges = pa.table({"source": [f"n{a}" for a, _, _ in rows], "target": [f"n{b}" for _, b, _ in rows],
                      "setting": [LAYERS[lay] for _, _, lay in rows]})
    pol = parse_policy({"privacy": {"epsilon": 1.0}, "grouping": {"attributes": ["band"], "min_size": 5},
                        "layers": {"column": "setting", "values": list(LAYERS[:3])}})
    r = release_tables(edges, people, pol, seed=4)
    met = released_metrics(r.tables, r.manifest, pol)
    assert met["contact_matrix_basis"] == "released view 'band'"
    v = r.tables["contact_views"]
    est = np.asarray(v.column("contacts_unclamped").to_numpy(), dtype=float).reshape(3, -1).sum(axis=0)
    spend = next(c for c in r.manifest["components"] if c["name"] == "contact_views:band")
    mech = GeometricMechanism(spend["epsilon"], spend["sensitivity"])
    s = max(1.0, 0.001 * est.sum())
    assert met["contact_matrix_median_relative_error"] == pytest.approx(
        np.median(mech.expected_abs_sum(np.full(len(est), 3)) / np.maximum(est, s)))
    # the figure is a function of the released tables: the truth may change under them without effect
    tables = dict(r.tables)
    assert released_metrics(tables, r.manifest, pol)["contact_matrix_median_relative_error"] == \
        met["contact_matrix_median_relative_error"]


def test_audit_reports_the_views_and_decides_nothing(tmp_path):
    """The audit compares each released view with the truth (overall and per layer); the report shows the
    section and its figure; the gate's decision is not taken from it."""
    from aggpub.audit import audit_release
    from aggpub.audit.report import render_html

    people, edges = _karate_tables()
    pol = {"privacy": {"epsilon": 2.0}, "grouping": {"attributes": ["band", "area"], "min_size": 8},
           "layers": {"column": "setting", "values": list(LAYERS[:3])}}
    r = release_tables(edges, people, pol, seed=2)
    audit = audit_release(r, monte_carlo=0, structure_samples=0, seed=1)
    band = audit["contact_views"]["band"]
    assert set(band["consistent"]["per_layer"]) == set(LAYERS[:3])
    assert 0 <= band["consistent"]["coverage"] <= 1 and band["view"]["n_queries"] == 6
    html = render_html(audit)
    assert "3b. Contact matrices by attribute (views)" in html and 'alt="true and released contact matrices"' in html
    assert "decides" in audit and "decide nothing" in audit["decides"]


def test_views_figure_drawn_on_the_views_thread_is_the_reports_own(monkeypatch):
    """With ``draw_figures`` the audit's views thread draws the heat maps as soon as its section is done; the
    report then takes that figure instead of drawing it again, and it is the very figure the report draws
    from the same audit without it. Zachary's karate club (Zachary 1977, as networkx ships it), with
    invented bands and areas."""
    import threading

    from aggpub.audit import audit_release
    from aggpub.audit import report as report_mod

    people, edges = _karate_tables()
    pol = {"privacy": {"epsilon": 2.0}, "grouping": {"attributes": ["band", "area"], "min_size": 8},
           "layers": {"column": "setting", "values": list(LAYERS[:3])}}
    r = release_tables(edges, people, pol, seed=2)
    drawn_by = []
    original = report_mod.views_figure

    def recording(views):
        drawn_by.append(threading.current_thread().name)
        return original(views)

    monkeypatch.setattr(report_mod, "views_figure", recording)
    ahead = audit_release(r, monte_carlo=0, structure_samples=0, seed=1, draw_figures=True)
    assert len(drawn_by) == 1 and drawn_by[0].startswith("aggpub-audit-views")
    figure = ahead["_plot"]["figures"]["views"]
    assert report_mod._plots(ahead)["views"] is figure and len(drawn_by) == 1  # taken, not drawn again
    plain = audit_release(r, monte_carlo=0, structure_samples=0, seed=1)
    assert "figures" not in plain["_plot"]
    assert report_mod._plots(plain)["views"] == figure and len(drawn_by) == 2  # drawn by the report itself
    assert figure.startswith("<svg") and "true contacts by band" in figure


def test_audit_view_plot_codes_are_the_cells_the_figures_compare(monkeypatch):
    """The report's heat-map codes of a view are its cells in the order the audit's error figures compare
    (read from the declared values); reading the value names of the researcher's matrix gives the same codes.
    Zachary's karate club (Zachary 1977, as networkx ships it), with invented bands and areas."""
    from aggpub.audit.core import _view_matrix, _view_plot_data

    people, edges = _karate_tables()
    pol = {"privacy": {"epsilon": 2.0}, "grouping": {"attributes": ["band", "area"], "min_size": 8},
           "layers": {"column": "setting", "values": list(LAYERS[:3])},
           "components": {"contact_views": {"attributes": ["band"], "combinations": ["band,area"]}}}
    r = release_tables(edges, people, pol, seed=2)
    domains = r.manifest["view_domains"]
    for name, true in r.truth["contact_views"]["counts"].items():
        m = _view_matrix(r, name, "consistent", {})
        tm = true.sum(axis=0).astype(float)
        est = np.asarray(m.column("contacts").to_numpy(), dtype=float)
        with monkeypatch.context() as mp:  # the declared values give the codes: no value name is read
            mp.setattr(pc, "unique", lambda *a, **k: pytest.fail("read the value names"))
            short = _view_plot_data(m, tm, est, domains, name)
        by_names = _view_plot_data(m, tm, est, {}, name)  # no domains: the value names are read
        assert short[0] == by_names[0] and len(short[0]) > 1
        assert np.array_equal(short[1], by_names[1]) and np.array_equal(short[2], by_names[2])


def _rehash(path):
    """Update every SHA-256 and the manifest's own digest (a careful forger): only the invariants catch it."""
    import json

    from aggpub.bundle._files import MANIFEST, manifest_digest, sha256_file

    m = json.loads((path / MANIFEST).read_text())
    m["files"] = {name: sha256_file(path / name) for name in m["files"]}
    m["manifest_sha256"] = manifest_digest(m)
    (path / MANIFEST).write_text(json.dumps(m, indent=2, sort_keys=True) + "\n")


@pytest.mark.parametrize("damage", ["drop_row", "clamped", "scale", "people"])
def test_check_finds_a_damaged_view_table(tmp_path, damage):
    """``aggpub check`` verifies the views against the manifest: every (layer, value pair) cell once, the
    clamped column, the noise scale of the spend, and exact people adding up to the sizes under unit edge."""
    import shutil

    import pyarrow.parquet as pq

    from aggpub.bundle import check_bundle
    from aggpub.bundle.write import PARQUET_META_KEY
    from aggpub.pipeline import publish

    G, rows = _graph("karate")
    people = pa.table({"node": [f"n{n}" for n in G.nodes()], "band": [G.nodes[n]["band"] for n in G.nodes()]})
    edges = pa.table({"source": [f"n{a}" for a, _, _ in rows], "target": [f"n{b}" for _, b, _ in rows],
                      "setting": [LAYERS[lay] for _, _, lay in rows]})
    r = release_tables(edges, people, {"privacy": {"epsilon": 1.0}, "grouping": {"attributes": ["band"],
                                       "min_size": 5}, "layers": {"column": "setting", "values": list(LAYERS[:3])}},
                       seed=1)
    path = publish(r, tmp_path / "b")
    assert check_bundle(path).ok
    stem = "view_people" if damage == "people" else "contact_views"
    t = pq.read_table(path / f"{stem}.parquet")
    meta = t.schema.metadata
    if damage == "drop_row":
        t = t.slice(1)
    elif damage == "clamped":
        t = t.set_column(4, "contacts", pa.array(np.asarray(t.column("contacts").to_numpy()) + 1))
    elif damage == "scale":
        t = t.set_column(6, "noise_scale", pa.array(np.asarray(t.column("noise_scale").to_numpy()) * 0.5))
    else:
        t = t.set_column(2, "people", pa.array(np.asarray(t.column("people").to_numpy()) + 1))
    pq.write_table(t.replace_schema_metadata(meta), path / f"{stem}.parquet")
    assert meta and PARQUET_META_KEY in meta
    if damage == "drop_row":  # the manifest's row count would catch it first: keep it in step
        import json

        m = json.loads((path / "manifest.json").read_text())
        m["rows"][stem] = t.num_rows
        (path / "manifest.json").write_text(json.dumps(m, indent=2, sort_keys=True) + "\n")
    _rehash(path)
    res = check_bundle(path)
    assert not res.ok and any(stem in p for p in res.problems), res.problems
    shutil.rmtree(path)
