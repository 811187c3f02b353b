"""Fuzzing ingest and policy parsing (issue 7, item 5).

Hypothesis feeds random CSV bytes, random Arrow tables, damaged Parquet files,
random TOML-like mappings and random policy text to the library, and random
input files to the whole command line. The only exceptions allowed out are
:class:`aggpub.errors.AggpubError` subclasses; from the command line, only the
documented exit codes, one ``aggpub:`` line, no traceback and no bundle unless
the run succeeded. Every test has an explicit example budget (``deadline=None``:
DuckDB start-up time varies on a loaded machine).
"""

from __future__ import annotations

import io
import math
import os
import string
import tempfile
import warnings
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from aggpub.cli import main
from aggpub.engines._duckdb import DuckDBEngine
from aggpub.errors import AggpubError
from aggpub.ingest import load_network
from aggpub.policy import parse_policy, read_policy
from tests._badinput import MARK, Scenario, edges_table, error_lines, people_table, person_id, tree_snapshot

SETTINGS = dict(deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])

# Example budgets. The default run uses them as written (780 examples in all). For a longer run, scale
# them (tests only; the product reads no environment variable): AGGPUB_FUZZ_SCALE=3 gives 2,340.
FUZZ_SCALE = max(1, int(os.environ.get("AGGPUB_FUZZ_SCALE", "1")))


def budget(n: int) -> int:
    return n * FUZZ_SCALE

# ---------------------------------------------------------------------------------------------- CSV

IDS = [person_id(i) for i in range(6)]
FIELD = st.one_of(st.sampled_from(IDS), st.sampled_from(["", "NaN", "null", "-1", "1e999", "inf", "3", "0.5",
                                                           '"', '""', "a,b", "\u00e9", "\ufeff", " "]),
                  st.text(alphabet=string.printable + "\u00e9\u2603\x00", max_size=8))
HEADER = st.lists(st.sampled_from(["source", "target", "weight", "node", "age_band", "", "source", "x"]),
                  min_size=0, max_size=4)
DELIM = st.sampled_from([",", ";", "\t", "|"])
NEWLINE = st.sampled_from(["\n", "\r\n", "\r"])


@st.composite
def csv_files(draw):
    if draw(st.integers(0, 9)) == 0:  # arbitrary bytes now and then
        return draw(st.binary(max_size=400))
    delim, nl = draw(DELIM), draw(NEWLINE)
    header = draw(HEADER)
    rows = draw(st.lists(st.lists(FIELD, min_size=0, max_size=4), max_size=12))
    text = nl.join([delim.join(header)] + [delim.join(r) for r in rows])
    if draw(st.booleans()):
        text += nl
    prefix = draw(st.sampled_from([b"", b"\xef\xbb\xbf", b"\xff\xfe"]))
    encoding = draw(st.sampled_from(["utf-8", "utf-8", "latin-1", "utf-16"]))
    return prefix + text.encode(encoding, errors="replace")


def _people_csv() -> bytes:
    return ("node,age_band\n" + "".join(f"{i},{'ab'[k % 2]}\n" for k, i in enumerate(IDS))).encode()


def _edges_csv() -> bytes:
    return ("source,target,weight\n" + "".join(f"{IDS[k]},{IDS[(k + 1) % 6]},{k}\n" for k in range(6))).encode()


_ENGINE = {}


def _load(edges, people, **kw):
    """Ingest with a reused engine; only AggpubError may come out (anything else fails the test)."""
    engine = _ENGINE.get("engine")
    if engine is None:
        engine = _ENGINE["engine"] = DuckDBEngine(memory_limit="256MB", threads=1)
    try:
        return load_network(edges, people, engine=engine, **kw)
    except AggpubError:
        return None


@settings(max_examples=budget(100), **SETTINGS)
@given(data=csv_files(), weight=st.sampled_from([None, "weight"]), name=st.sampled_from(["e.csv", "e.tsv", "e"]))
def test_random_edge_csv(data, weight, name):
    with tempfile.TemporaryDirectory() as d:
        e, p = Path(d) / name, Path(d) / "people.csv"
        e.write_bytes(data)
        p.write_bytes(_people_csv())
        _load(e, p, weight=weight, attributes=["age_band"])


@settings(max_examples=budget(100), **SETTINGS)
@given(data=csv_files(), attrs=st.sampled_from([None, ["age_band"], ["x"]]))
def test_random_person_csv(data, attrs):
    with tempfile.TemporaryDirectory() as d:
        e, p = Path(d) / "edges.csv", Path(d) / "people.csv"
        e.write_bytes(_edges_csv())
        p.write_bytes(data)
        _load(e, p, attributes=attrs)


# ---------------------------------------------------------------------------------------------- Arrow

ARROW_COLUMNS = st.sampled_from(["int", "uint64", "str", "float", "bool", "null", "list", "dict_str", "date",
                                 "binary", "decimal"])


def _column(kind, n, draw):
    ints = draw(st.lists(st.integers(-3, 8), min_size=n, max_size=n))
    if kind == "int":
        return pa.array(ints, pa.int64())
    if kind == "uint64":
        return pa.array([abs(i) + 2 ** 63 for i in ints], pa.uint64())
    if kind == "str":
        return pa.array([IDS[i % 6] if i >= 0 else (None if i == -1 else "") for i in ints])
    if kind == "float":
        return pa.array([[math.nan, math.inf, -1.0][i] if i < 0 else float(i) for i in ints])
    if kind == "bool":
        return pa.array([i % 2 == 0 for i in ints])
    if kind == "null":
        return pa.nulls(n)
    if kind == "list":
        return pa.array([[i] for i in ints])
    if kind == "dict_str":
        return pa.array([IDS[i % 6] for i in ints]).dictionary_encode()
    if kind == "date":
        return pa.array([abs(i) for i in ints], pa.int32()).cast(pa.date32())
    if kind == "binary":
        return pa.array([IDS[i % 6].encode() for i in ints], pa.binary())
    return pa.array([i for i in ints], pa.decimal128(10, 0))


@st.composite
def arrow_edges(draw):
    n = draw(st.integers(0, 10))
    cols = {}
    for name in draw(st.lists(st.sampled_from(["source", "target", "weight", "other"]), unique=True,
                              max_size=4)):
        cols[name] = _column(draw(ARROW_COLUMNS), n, draw)
    return pa.table(cols) if cols else pa.table({"x": pa.array([], pa.int64())})


@settings(max_examples=budget(100), **SETTINGS)
@given(edges=arrow_edges(), weight=st.sampled_from([None, "weight"]))
def test_random_arrow_edges(edges, weight):
    people = pa.table({"node": IDS, "age_band": ["a", "b"] * 3})
    _load(edges, people, weight=weight, attributes=["age_band"])


@st.composite
def arrow_people(draw):
    n = draw(st.integers(0, 10))
    cols = {"node": _column(draw(ARROW_COLUMNS), n, draw)}
    if draw(st.booleans()):
        cols["age_band"] = _column(draw(ARROW_COLUMNS), n, draw)
    return pa.table(cols)


@settings(max_examples=budget(70), **SETTINGS)
@given(people=arrow_people())
def test_random_arrow_people(people):
    edges = pa.table({"source": IDS[:3], "target": IDS[3:]})
    _load(edges, people, attributes=["age_band"] if "age_band" in people.column_names else [])


def _parquet_bytes() -> bytes:
    buf = io.BytesIO()
    pq.write_table(edges_table(), buf)
    return buf.getvalue()


PARQUET = _parquet_bytes()


@settings(max_examples=budget(50), **SETTINGS)
@given(cut=st.integers(0, len(PARQUET)), flips=st.lists(st.integers(0, len(PARQUET) - 1), max_size=6),
       xor=st.integers(1, 255))
def test_damaged_parquet(cut, flips, xor):
    data = bytearray(PARQUET)
    for i in flips:
        data[i] ^= xor
    data = bytes(data[:cut]) if cut < len(data) // 2 else bytes(data)
    with tempfile.TemporaryDirectory() as d:
        e = Path(d) / "edges.parquet"
        e.write_bytes(data)
        _load(e, people_table(), attributes=["age_band", "district"])


# ---------------------------------------------------------------------------------------------- policy

KNOWN_KEYS = ["title", "privacy", "grouping", "components", "ledger", "gate", "input", "unit", "epsilon",
              "max_contacts", "method", "attributes", "min_size", "hierarchies", "merge_order", "epsilon_share",
              "tiers", "rounds", "map", "supernode_sizes", "superedge_counts", "degree_histograms",
              "weight_totals", "enabled", "share", "max_degree", "column", "clip", "sparse_threshold",
              "sparse_above_cells", "levels", "path", "dataset", "lifetime_epsilon", "age_band", "district"]
SCALARS = st.one_of(st.integers(-5, 50), st.floats(allow_nan=True, allow_infinity=True), st.booleans(),
                    st.sampled_from(["edge", "person", "attributes", "structure", "given", "random", "dense",
                                     "sparse", "auto", "age_band", "district", ""]), st.text(max_size=6))
KEYS = st.one_of(st.sampled_from(KNOWN_KEYS), st.text(max_size=6))
VALUES = st.recursive(SCALARS, lambda inner: st.one_of(st.lists(inner, max_size=4),
                                                       st.dictionaries(KEYS, inner, max_size=4)), max_leaves=12)


@st.composite
def policies(draw):
    base = {"privacy": {"unit": "edge", "epsilon": 1.0},
            "grouping": {"method": "attributes", "attributes": ["age_band"], "min_size": 2}}
    for _ in range(draw(st.integers(0, 4))):  # mutate the valid policy at random places
        section = draw(st.sampled_from(["privacy", "grouping", "components", "ledger", "gate", "input", "title",
                                        "bogus"]))
        if draw(st.integers(0, 4)) == 0:
            base[section] = draw(VALUES)
            continue
        sec = base.setdefault(section, {})
        if not isinstance(sec, dict):
            continue
        sec[draw(KEYS)] = draw(VALUES)
    if draw(st.integers(0, 5)) == 0:
        return draw(st.dictionaries(KEYS, VALUES, max_size=5))
    return base


@settings(max_examples=budget(170), **SETTINGS)
@given(data=policies())
def test_random_policy_mapping(data):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            parse_policy(data, base_dir=Path(tempfile.gettempdir()))
        except AggpubError:
            pass


def _toml_value(v):
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return "nan" if math.isnan(v) else ("inf" if v == math.inf else "-inf" if v == -math.inf else repr(v))
    if isinstance(v, int):
        return str(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n") + '"'
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    return "{" + ", ".join(f'"{k}" = {_toml_value(x)}' for k, x in v.items()) + "}"


POLICY_LINES = st.one_of(
    st.sampled_from(["[privacy]", "[grouping]", "[components.degree_histograms]", "[gate]", "[[privacy]]",
                     'unit = "edge"', "epsilon = 1.0", "epsilon = nan", 'method = "attributes"',
                     'attributes = ["age_band"]', "min_size = 2", "min_size = = 2", "x = [", "epsilon = 1e400",
                     '"quoted key" = 1', "a.b.c = 1", "[grouping.hierarchies.age_band]", "levels = [{a = \"b\"}]",
                     "enabled = true", "max_degree = 0", "\ufeff[privacy]", "# comment"]),
    st.builds(lambda k, v: f"{k} = {_toml_value(v)}", st.sampled_from(KNOWN_KEYS), SCALARS),
    st.text(max_size=20))


@settings(max_examples=budget(170), **SETTINGS)
@given(lines=st.lists(POLICY_LINES, max_size=12), raw=st.binary(max_size=40), use_raw=st.integers(0, 9))
def test_random_policy_text(lines, raw, use_raw):
    data = raw if use_raw == 0 else "\n".join(lines).encode("utf-8", errors="surrogatepass")
    with tempfile.TemporaryDirectory() as d:
        p = Path(d) / "policy.toml"
        p.write_bytes(data)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            try:
                read_policy(p)
            except AggpubError:
                pass


# ---------------------------------------------------------------------------------------------- CLI

ALLOWED_CODES = {0, 2, 3, 4, 5, 6, 7}


@pytest.fixture(scope="module")
def cli_root(tmp_path_factory):
    return tmp_path_factory.mktemp("fuzzcli")


@pytest.mark.heavy
@settings(max_examples=budget(20), **SETTINGS)
@given(edges=csv_files(), people=st.one_of(csv_files(), st.just(None)))
def test_random_files_through_the_command_line(edges, people, cli_root, capsys, monkeypatch):
    import aggpub.audit.report as report

    monkeypatch.setattr(report, "_plots", lambda audit: {})  # figures only cost time
    with tempfile.TemporaryDirectory(dir=cli_root) as d:
        s = Scenario(Path(d))
        s.edges.write_bytes(edges)
        if people is not None:
            s.people.write_bytes(people)
        before = {k: v for k, v in tree_snapshot(Path(d)).items() if k.startswith(("in", "policy"))}
        capsys.readouterr()
        rc = main(s.argv() + ["--quiet", "--seed", "1"])
        out, err = capsys.readouterr()
        assert rc in ALLOWED_CODES, err
        assert "Traceback" not in err
        assert MARK not in err
        after = tree_snapshot(Path(d))
        assert {k: v for k, v in after.items() if k.startswith(("in", "policy"))} == before
        if rc == 0:
            assert s.out.is_dir()
        else:
            assert len(error_lines(err)) == 1, err
            assert not s.out.exists()
            assert not [k for k in after if k.startswith("out/.")], "temporary folder left behind"
