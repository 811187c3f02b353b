"""Tests for the invented demo town generator (:mod:`aggpub.demo`)."""

from __future__ import annotations

import re

import networkx as nx
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pytest

from aggpub import demo

PEOPLE_SCHEMA = pa.schema(
    [
        ("node", pa.string()),
        ("age_band", pa.string()),
        ("neighbourhood", pa.string()),
        ("role", pa.string()),
    ]
)
EDGES_SCHEMA = pa.schema(
    [
        ("source", pa.string()),
        ("target", pa.string()),
        ("setting", pa.string()),
        ("minutes", pa.int64()),
    ]
)


@pytest.fixture(scope="module")
def town():
    """The default 30,000-person town, generated once for the module."""
    return demo.generate_town()


def _indices(edges: pa.Table, people: pa.Table) -> tuple[np.ndarray, np.ndarray]:
    """Map the edge endpoints to row numbers of ``people``."""
    src = pc.index_in(edges["source"], value_set=people["node"]).to_numpy(zero_copy_only=False)
    tgt = pc.index_in(edges["target"], value_set=people["node"]).to_numpy(zero_copy_only=False)
    return src, tgt


def _pair_keys(edges: pa.Table, people: pa.Table) -> np.ndarray:
    src, tgt = _indices(edges, people)
    n = people.num_rows
    return np.minimum(src, tgt).astype(np.int64) * n + np.maximum(src, tgt)


def _graph(edges: pa.Table, people: pa.Table) -> nx.Graph:
    src, tgt = _indices(edges, people)
    band = pc.index_in(people["age_band"], value_set=pa.array(demo.AGE_BANDS)).to_numpy()
    g = nx.Graph()
    g.add_nodes_from(
        (i, {"age_band": b, "band_index": int(k)})
        for i, (b, k) in enumerate(zip(people["age_band"].to_pylist(), band))
    )
    g.add_edges_from(zip(src.tolist(), tgt.tolist()))
    return g


# --- determinism -----------------------------------------------------------


def test_same_seed_gives_identical_tables():
    e1, p1 = demo.generate_town(3_000, seed=11)
    e2, p2 = demo.generate_town(3_000, seed=11)
    assert e1.equals(e2)
    assert p1.equals(p2)


def test_different_seed_gives_different_tables():
    e1, p1 = demo.generate_town(3_000, seed=11)
    e2, p2 = demo.generate_town(3_000, seed=12)
    assert not e1.equals(e2)
    assert not p1.equals(p2)


def test_schemas(town):
    edges, people = town
    assert edges.schema.equals(EDGES_SCHEMA)
    assert people.schema.equals(PEOPLE_SCHEMA)
    assert people.num_rows == 30_000
    for table in (edges, people):
        assert all(col.null_count == 0 for col in table.columns)


def test_people_value_domains(town):
    _, people = town
    nodes = people["node"].to_pylist()
    assert len(set(nodes)) == len(nodes)
    assert nodes[0] == "R000001"
    assert nodes == sorted(nodes)
    assert all(re.fullmatch(r"R\d{6}", v) for v in nodes)
    assert set(people["age_band"].to_pylist()) == set(demo.AGE_BANDS)
    assert set(people["neighbourhood"].to_pylist()) == set(demo.NEIGHBOURHOODS)
    assert set(people["role"].to_pylist()) == set(demo.ROLES)


def test_edge_value_domains(town):
    edges, people = town
    assert set(edges["setting"].to_pylist()) == set(demo.SETTINGS)
    assert pc.min(edges["minutes"]).as_py() >= 1
    # Every endpoint is a known person.
    assert pc.sum(pc.is_null(pc.index_in(edges["source"], value_set=people["node"]))).as_py() == 0
    assert pc.sum(pc.is_null(pc.index_in(edges["target"], value_set=people["node"]))).as_py() == 0


def test_roles_match_ages(town):
    _, people = town
    table = people.group_by(["age_band", "role"]).aggregate([]).to_pylist()
    allowed = {
        "preschool": {"0-4"},
        "pupil": {"5-9", "10-14", "15-19"},
        "worker": {f"{a}-{a + 4}" for a in range(20, 65, 5)},
        "other": {f"{a}-{a + 4}" for a in range(20, 65, 5)},
        "retired": {"65-69", "70-74", "75-79", "80+"},
    }
    for row in table:
        assert row["age_band"] in allowed[row["role"]], row


def test_setting_roles(town):
    edges, people = town
    src, tgt = _indices(edges, people)
    role = np.asarray(people["role"].to_pylist())
    setting = np.asarray(edges["setting"].to_pylist())
    for name, required in (("school", "pupil"), ("work", "worker")):
        sel = setting == name
        assert sel.any()
        assert np.all(role[src[sel]] == required)
        assert np.all(role[tgt[sel]] == required)


def test_invalid_size_rejected():
    for bad in (0, -5, 2.5, True, "100"):
        with pytest.raises(ValueError):
            demo.generate_town(bad)


def test_tiny_towns_work():
    for n in (1, 2, 7, 40):
        edges, people = demo.generate_town(n, seed=3)
        assert people.num_rows == n
        assert edges.schema.equals(EDGES_SCHEMA)


# --- network structure -----------------------------------------------------


def test_no_self_loops(town):
    edges, _ = town
    assert pc.sum(pc.equal(edges["source"], edges["target"])).as_py() == 0


def test_mean_distinct_degree(town):
    """Mean distinct contacts per person lies in 8..20.

    Large European contact surveys report daily means of roughly 8 to 20
    contacts (Mossong et al., "Social contacts and mixing patterns relevant to
    the spread of infectious diseases", PLoS Medicine 2008; range recalled
    from memory).
    """
    edges, people = town
    distinct = np.unique(_pair_keys(edges, people)).size
    mean_degree = 2 * distinct / people.num_rows
    assert 8.0 <= mean_degree <= 20.0


def test_few_repeated_pairs(town):
    edges, people = town
    keys = _pair_keys(edges, people)
    repeated = 1 - np.unique(keys).size / keys.size
    assert repeated < 0.05
    # A pair is never repeated within one setting.
    table = pa.table({"key": keys, "setting": edges["setting"]})
    assert table.group_by(["key", "setting"]).aggregate([]).num_rows == table.num_rows


def test_age_assortativity_positive(town):
    """Contacts are assortative by age.

    Measured with the assortativity coefficients of Newman, "Mixing patterns in
    networks", Phys. Rev. E 67, 026126 (2003), on the age band (categorical) and
    on the band index (numeric).
    """
    g = _graph(*town)
    assert nx.attribute_assortativity_coefficient(g, "age_band") > 0.05
    assert nx.numeric_assortativity_coefficient(g, "band_index") > 0.2


def test_households(town):
    """Household contacts form cliques of 1-6 people, mean size about 2.4."""
    edges, people = town
    hh = edges.filter(pc.equal(edges["setting"], "household"))
    src, tgt = _indices(hh, people)
    g = nx.Graph()
    g.add_nodes_from(range(people.num_rows))
    g.add_edges_from(zip(src.tolist(), tgt.tolist()))
    sizes = []
    for comp in nx.connected_components(g):
        s = len(comp)
        assert g.subgraph(comp).number_of_edges() == s * (s - 1) // 2
        sizes.append(s)
    sizes = np.asarray(sizes)
    assert sizes.min() >= 1 and sizes.max() <= 6
    assert 2.2 <= sizes.mean() <= 2.7
    assert np.all(np.bincount(sizes)[1:] > 0)


def test_community_prefers_own_neighbourhood(town):
    edges, people = town
    com = edges.filter(pc.equal(edges["setting"], "community"))
    src, tgt = _indices(com, people)
    nb = np.asarray(people["neighbourhood"].to_pylist())
    same = np.mean(nb[src] == nb[tgt])
    sizes = np.unique(nb, return_counts=True)[1] / nb.size
    assert same > 2 * np.sum(sizes**2)  # far above random mixing


# --- population shape ------------------------------------------------------


def test_age_pyramid_and_unequal_neighbourhoods(town):
    _, people = town
    bands = dict(
        zip(*people.group_by("age_band").aggregate([("node", "count")]).to_pydict().values())
    )
    assert bands["80+"] < bands["30-34"] / 3
    assert bands["75-79"] < bands["40-44"]
    nbs = people.group_by("neighbourhood").aggregate([("node", "count")])["node_count"].to_numpy()
    assert nbs.max() > 2 * nbs.min()


def test_some_cells_are_small(town):
    """Some age band x neighbourhood cells hold fewer than 20 people."""
    _, people = town
    counts = people.group_by(["age_band", "neighbourhood"]).aggregate([("node", "count")])
    assert counts.num_rows == len(demo.AGE_BANDS) * len(demo.NEIGHBOURHOODS)
    assert pc.sum(pc.less(counts["node_count"], 20)).as_py() >= 1


# --- hierarchies -----------------------------------------------------------


def test_age_bands():
    assert len(demo.AGE_BANDS) == 17
    assert demo.AGE_BANDS[0] == "0-4" and demo.AGE_BANDS[-2] == "75-79"
    assert demo.AGE_BANDS[-1] == "80+"


def test_hierarchies_cover_every_value():
    level0, level1 = demo.AGE_HIERARCHY
    assert tuple(level0) == demo.AGE_BANDS
    assert set(level1) == set(level0.values())
    assert set(level0.values()) == {"0-9", "10-19", "20-29", "30-39", "40-49", "50-59", "60-69", "70-79", "80+"}
    assert set(level1.values()) == {"0-19", "20-39", "40-59", "60-79", "80+"}
    assert level0["75-79"] == "70-79" and level1["70-79"] == "60-79"
    (nb_level,) = demo.NEIGHBOURHOOD_HIERARCHY
    assert set(nb_level) == set(demo.NEIGHBOURHOODS)
    assert nb_level == demo.ZONES
    assert 3 <= len(set(demo.ZONES.values())) <= 6
    assert 10 <= len(demo.NEIGHBOURHOODS) <= 14
    assert tuple(demo.SETTINGS) == ("household", "school", "work", "community")


# --- CSV output ------------------------------------------------------------


def test_write_town_round_trip(tmp_path):
    out = tmp_path / "new" / "town"
    paths = demo.write_town(out, n_people=2_000, seed=5)
    assert set(paths) == {"people", "edges"}
    assert paths["people"] == out / "people.csv"
    assert paths["edges"] == out / "contacts.csv"
    edges, people = demo.generate_town(2_000, seed=5)
    read_people = pacsv.read_csv(
        paths["people"], convert_options=pacsv.ConvertOptions(column_types=PEOPLE_SCHEMA)
    )
    read_edges = pacsv.read_csv(
        paths["edges"], convert_options=pacsv.ConvertOptions(column_types=EDGES_SCHEMA)
    )
    assert read_people.equals(people)
    assert read_edges.equals(edges)
    # Writing again into the existing directory replaces the files.
    again = demo.write_town(out, n_people=2_000, seed=5)
    assert again == paths
