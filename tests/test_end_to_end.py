"""End to end through the command line: demo -> check passes; one changed byte -> check fails."""

from __future__ import annotations

import json

import numpy as np
import pyarrow.parquet as pq
import pytest

import aggpub
from aggpub.cli import main


@pytest.fixture(scope="module")
def demo_bundle(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo") / "release"
    assert main(["demo", "--out", str(out), "--people", "4000", "--quiet"]) == 0
    return out


def test_demo_bundle_verifies(demo_bundle, capsys):
    assert main(["check", str(demo_bundle)]) == 0
    assert "bundle verified" in capsys.readouterr().out
    names = sorted(p.name for p in demo_bundle.iterdir())
    assert {"manifest.json", "supernodes.parquet", "superedges.parquet", "README.md"} <= set(names)


def test_manifest_contents(demo_bundle):
    m = json.loads((demo_bundle / "manifest.json").read_text())
    for key in ("format", "tool_version", "created_utc", "policy", "privacy_unit", "epsilon_total", "min_size",
                "seeded", "components", "grouping_method", "rows", "files"):
        assert key in m
    assert m["seeded"] is False and m["privacy_unit"] == "edge"
    assert abs(sum(c["epsilon"] for c in m["components"]) - m["epsilon_total"]) < 1e-12
    se = [c for c in m["components"] if c["name"] == "superedge_counts"][0]
    assert se["sensitivity"] == 1 and se["mechanism"] == "discrete_laplace"
    assert se["scale"] == pytest.approx(se["sensitivity"] / se["epsilon"])
    meta = pq.read_schema(demo_bundle / "superedges.parquet").metadata[b"aggpub.privacy"]
    assert json.loads(meta)["epsilon_total"] == m["epsilon_total"]


def test_read_bundle_api(demo_bundle):
    b = aggpub.read_bundle(demo_bundle)
    sizes = b.supernodes.column("size").to_numpy()
    assert (sizes >= b.manifest["min_size"]).all() and sizes.sum() == 4000
    n = b.supernodes.num_rows
    assert b.superedges.num_rows == n * (n + 1) // 2
    counts = b.superedges.column("edge_count").to_numpy()
    assert counts.dtype == np.int64 and (counts >= 0).all()
    assert set(b.supernodes.column_names) >= {"supernode", "size", "age_band", "neighbourhood"}


@pytest.mark.parametrize("name", ["superedges.parquet", "supernodes.parquet", "README.md", "manifest.json"])
def test_one_changed_byte_fails_check(demo_bundle, tmp_path, name, capsys):
    import shutil

    copy = tmp_path / "copy"
    shutil.copytree(demo_bundle, copy)
    path = copy / name
    data = bytearray(path.read_bytes())
    pos = len(data) // 2
    data[pos] = (data[pos] + 1) % 256
    path.write_bytes(bytes(data))
    assert main(["check", str(copy)]) == 1
    out = capsys.readouterr().out
    assert "check failed" in out and (name in out or "manifest" in out)


def test_seeded_release_is_marked_and_reproducible(tmp_path, capsys):
    a, b = tmp_path / "a", tmp_path / "b"
    assert main(["demo", "--out", str(a), "--people", "2000", "--seed", "5", "--quiet"]) == 0
    assert main(["demo", "--out", str(b), "--people", "2000", "--seed", "5", "--quiet",
                 "--data", str(tmp_path / "inputs-b")]) == 0
    assert json.loads((a / "manifest.json").read_text())["seeded"] is True
    ta = pq.read_table(a / "superedges.parquet").column("edge_count")
    tb = pq.read_table(b / "superedges.parquet").column("edge_count")
    assert ta.equals(tb)
    capsys.readouterr()
    assert main(["check", str(a)]) == 0
    assert "NOT private" in capsys.readouterr().err


def test_unseeded_releases_differ(tmp_path):
    a, b = tmp_path / "a", tmp_path / "b"
    assert main(["demo", "--out", str(a), "--people", "2000", "--quiet"]) == 0
    assert main(["demo", "--out", str(b), "--people", "2000", "--quiet", "--data", str(tmp_path / "ib")]) == 0
    ta = pq.read_table(a / "superedges.parquet").column("edge_count")
    tb = pq.read_table(b / "superedges.parquet").column("edge_count")
    assert not ta.equals(tb)


def test_existing_output_is_not_overwritten(demo_bundle, capsys):
    before = (demo_bundle / "manifest.json").read_bytes()
    code = main(["demo", "--out", str(demo_bundle), "--people", "2000", "--quiet",
                 "--data", str(demo_bundle.parent / "other-inputs")])
    assert code == 7
    assert "already exists" in capsys.readouterr().err
    assert (demo_bundle / "manifest.json").read_bytes() == before


def test_release_command_with_example_policy(tmp_path, capsys):
    from aggpub.demo import write_demo_inputs

    paths = write_demo_inputs(tmp_path / "in", n_people=3000)
    out = tmp_path / "bundle"
    code = main(["release", "--policy", str(paths["policy"]), "--edges", str(paths["edges"]),
                 "--nodes", str(paths["people"]), "--out", str(out), "--quiet"])
    assert code == 0, capsys.readouterr().err
    assert aggpub.check_bundle(out).ok


def test_every_command_has_help(capsys):
    for cmd in ([], ["release"], ["check"], ["demo"]):
        with pytest.raises(SystemExit) as exc:
            main(cmd + ["--help"])
        assert exc.value.code == 0
    assert "usage" in capsys.readouterr().out


def test_audit_draws_option(tmp_path, capsys):
    from aggpub.demo import write_demo_inputs

    paths = write_demo_inputs(tmp_path / "in", n_people=2000)
    base = ["release", "--policy", str(paths["policy"]), "--edges", str(paths["edges"]),
            "--nodes", str(paths["people"]), "--quiet"]
    assert main(base + ["--out", str(tmp_path / "b"), "--audit-draws", "-1"]) == 2
    assert main(base + ["--out", str(tmp_path / "b"), "--audit-draws", "0"]) == 0
    audit = json.loads((tmp_path / "b.report" / "audit.json").read_text())
    assert audit["settings"]["monte_carlo_draws"] == 0
    assert "monte_carlo" not in audit["queries"]["superedge_cells"]
