"""Attribute grouping: every released supernode has at least min_size members.

Each released group of at least k records is the k-anonymity requirement of
L. Sweeney, "k-anonymity: a model for protecting privacy", IJUFKS 10(5), 2002;
here the records are people and the groups are supernodes.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from aggpub.errors import PolicyError, PrivacyError
from aggpub.grouping import RESIDUAL, group_by_attributes

AGE_LEVELS = [
    {"0-4": "0-9", "5-9": "0-9", "10-14": "10-19", "15-19": "10-19"},
    {"0-9": "0-19", "10-19": "0-19"},
]
AREA_LEVELS = [{"a1": "A", "a2": "A", "b1": "B", "b2": "B", "b3": "B"}]


def people_table(ages, areas):
    return pa.table({"age": ages, "area": areas})


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    data=st.lists(st.tuples(st.sampled_from(list(AGE_LEVELS[0])), st.sampled_from(list(AREA_LEVELS[0]))),
                  min_size=1, max_size=300),
    k=st.integers(min_value=1, max_value=60),
    use_hierarchies=st.booleans(),
)
def test_every_supernode_has_min_size_members(data, k, use_hierarchies):
    ages, areas = zip(*data)
    people = people_table(list(ages), list(areas))
    hier = {"age": AGE_LEVELS, "area": AREA_LEVELS} if use_hierarchies else {}
    if len(data) < k:
        with pytest.raises(PrivacyError):
            group_by_attributes(people, ["age", "area"], k, hier)
        return
    g = group_by_attributes(people, ["age", "area"], k, hier)
    sizes = g.sizes()
    assert len(g.assignment) == len(data)  # everyone is in exactly one supernode
    assert sizes.sum() == len(data)
    assert (sizes >= k).all()
    assert np.array_equal(g.labels.column("supernode").to_numpy(), np.arange(g.n_supernodes))
    # a label value is either the member's own value, a generalisation of it, or '*'
    ancestors = {}
    for v in AGE_LEVELS[0]:
        ancestors[("age", v)] = {v, AGE_LEVELS[0][v], AGE_LEVELS[1][AGE_LEVELS[0][v]], RESIDUAL}
    for v in AREA_LEVELS[0]:
        ancestors[("area", v)] = {v, AREA_LEVELS[0][v], RESIDUAL}
    labels = g.labels.to_pylist()
    for i in range(len(data)):
        lab = labels[g.assignment[i]]
        assert lab["age"] in ancestors[("age", ages[i])]
        assert lab["area"] in ancestors[("area", areas[i])]


def test_large_cells_keep_fine_values_small_ones_climb():
    ages = ["0-4"] * 30 + ["5-9"] * 4 + ["10-14"] * 3 + ["15-19"] * 30
    areas = ["a1"] * len(ages)
    g = group_by_attributes(people_table(ages, areas), ["age", "area"], 5, {"age": AGE_LEVELS})
    labels = {(r["age"], r["area"]): r["supernode"] for r in g.labels.to_pylist()}
    assert ("0-4", "a1") in labels and ("15-19", "a1") in labels
    # 4 + 3 people are too few apart; at 10-year bands they are still apart (4, 3), at 20 years together (7)
    assert ("0-19", "a1") in labels
    assert sorted(g.sizes().tolist()) == [7, 30, 30]


def test_merge_order_climbs_declared_attribute_first():
    ages = ["0-4"] * 3 + ["5-9"] * 3
    areas = ["a1"] * 3 + ["a2"] * 3
    people = people_table(ages, areas)
    hier = {"age": AGE_LEVELS, "area": AREA_LEVELS}
    by_area = group_by_attributes(people, ["age", "area"], 3, hier, merge_order=["area", "age"])
    assert by_area.labels.to_pylist() == [{"supernode": 0, "age": "0-4", "area": "a1"},
                                          {"supernode": 1, "age": "5-9", "area": "a2"}]
    people = people_table(["0-4"] * 2 + ["5-9"] * 2, ["a1", "a1", "a1", "a1"])
    # area climbs first (a1 -> A), and only then age (0-4, 5-9 -> 0-9)
    g = group_by_attributes(people, ["age", "area"], 4, hier, merge_order=["area", "age"])
    assert g.labels.to_pylist() == [{"supernode": 0, "age": "0-9", "area": "A"}]
    g = group_by_attributes(people, ["age", "area"], 4, hier, merge_order=["age", "area"])
    assert g.labels.to_pylist() == [{"supernode": 0, "age": "0-9", "area": "a1"}]


def test_residual_supernode_and_too_small_residual():
    # no hierarchies: small cells go to one residual supernode labelled '*' where members differ
    people = people_table(["0-4"] * 10 + ["5-9"] * 2 + ["10-14"] * 3, ["a1"] * 15)
    g = group_by_attributes(people, ["age", "area"], 5)
    rows = g.labels.to_pylist()
    assert {"supernode": 1, "age": RESIDUAL, "area": "a1"} in rows
    assert sorted(g.sizes().tolist()) == [5, 10]
    # a residual below k joins the smallest released supernode
    people = people_table(["0-4"] * 10 + ["5-9"] * 6 + ["10-14"] * 2, ["a1"] * 18)
    g = group_by_attributes(people, ["age", "area"], 5)
    assert sorted(g.sizes().tolist()) == [8, 10]


def test_min_size_larger_than_population_is_refused():
    with pytest.raises(PrivacyError, match="larger than the population"):
        group_by_attributes(people_table(["0-4"] * 3, ["a1"] * 3), ["age", "area"], 4)


def test_uncovered_hierarchy_value_names_the_key_not_the_value():
    people = people_table(["0-4"] * 2 + ["90+"] * 1, ["a1"] * 3)
    with pytest.raises(PolicyError) as exc:
        group_by_attributes(people, ["age", "area"], 2, {"age": AGE_LEVELS})
    assert "grouping.hierarchies.age.levels[0]" in str(exc.value)
    assert "90+" not in str(exc.value)


def test_counting_and_sorting_encodings_give_the_same_grouping(monkeypatch):
    """The dense counting pass (few attribute combinations) and np.unique (many) agree exactly."""
    from aggpub.grouping import attributes as attr_mod

    rng = np.random.default_rng(11)
    people = people_table([str(x) for x in rng.choice(list(AGE_LEVELS[0]), 2_000)],
                          [str(x) for x in rng.choice(list(AREA_LEVELS[0]), 2_000)])
    hier = {"age": AGE_LEVELS, "area": AREA_LEVELS}
    dense = group_by_attributes(people, ["age", "area"], 40, hier)
    monkeypatch.setattr(attr_mod, "DENSE_KEY_MAX", 0)
    sorted_ = group_by_attributes(people, ["age", "area"], 40, hier)
    assert np.array_equal(dense.assignment, sorted_.assignment)
    assert dense.labels.equals(sorted_.labels)
    assert dense.n_supernodes > 3


def test_uncovered_values_are_counted_as_values_not_cells():
    """One district missing from the hierarchy, present in 25 small cells (25 age bands): "1 value(s)" (issue 14.5)."""
    ages = [f"a{i:02d}" for i in range(25)]
    people = pa.table({"age": [a for a in ages for _ in range(2)] + ["a00"] * 3,
                       "district": ["d9"] * 50 + ["d1"] * 3})
    hier = {"district": ({"d1": "zone"},)}
    with pytest.raises(PolicyError, match=r"does not cover 1 value\(s\) of attribute 'district'") as err:
        group_by_attributes(people, ["age", "district"], 5, hier, ["district"])
    assert "d9" not in str(err.value)
