"""Tamper detection (issue 7, item 4).

``check`` must fail and name the file for: any changed byte in any bundle file
(several offsets in each), a missing file, an extra file, an edited manifest (a
value changed, a key removed, with or without its digest recomputed). Parquet
page checksums (CRC-32 in each page header, written by ``write_bundle`` and
verified by ``check``) catch a changed byte inside a data page on their own:
the tests recompute every SHA-256 in the manifest, and the manifest's own digest,
after the change, so only the page checksum layer is left to notice.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from aggpub.bundle import check_bundle
from aggpub.bundle._files import MANIFEST, manifest_digest, sha256_file
from aggpub.cli import main
from aggpub.ingest import load_network
from aggpub.pipeline import build_release, publish
from aggpub.policy import parse_policy
from tests._badinput import Scenario

POLICY = {"privacy": {"unit": "edge", "epsilon": 1.0},
          "grouping": {"method": "attributes", "attributes": ["age_band", "district"], "min_size": 5},
          "components": {"degree_histograms": {"enabled": True, "max_degree": 12}}}


@pytest.fixture(scope="module")
def pristine(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("tamper")
    s = Scenario(root)
    network = load_network(s.edges, s.people, attributes=["age_band", "district"])
    release = build_release(network, parse_policy(POLICY), seed=11)
    path = publish(release, root / "pristine")
    assert check_bundle(path).ok
    return path


@pytest.fixture
def bundle(pristine, tmp_path) -> Path:
    target = tmp_path / "bundle"
    shutil.copytree(pristine, target)
    return target


def _files(path: Path) -> list[str]:
    return sorted(p.name for p in path.iterdir())


def _offsets(size: int) -> list[int]:
    return sorted({0, 1, 7, size // 5, size // 3, size // 2, (2 * size) // 3, size - 9, size - 2, size - 1})


def _rehash(path: Path) -> None:
    """Update every SHA-256 in the manifest and the manifest's own digest (a careful forger)."""
    m = json.loads((path / MANIFEST).read_text())
    m["files"] = {name: sha256_file(path / name) for name in m["files"]}
    m["manifest_sha256"] = manifest_digest(m)
    (path / MANIFEST).write_text(json.dumps(m, indent=2, sort_keys=True) + "\n")


def test_bundle_has_the_expected_files(pristine):
    assert {"manifest.json", "README.md", "supernodes.parquet", "superedges.parquet",
            "degree_histograms.parquet"} <= set(_files(pristine))


def test_every_file_every_offset(pristine, tmp_path):
    """A flipped byte at ten offsets of each file: check fails and names that file."""
    tried = 0
    for name in _files(pristine):
        size = (pristine / name).stat().st_size
        for off in _offsets(size):
            target = tmp_path / f"{name}-{off}"
            shutil.copytree(pristine, target)
            data = bytearray((target / name).read_bytes())
            data[off] ^= 0x20
            (target / name).write_bytes(bytes(data))
            res = check_bundle(target)
            assert not res.ok, (name, off)
            assert any(p.startswith(name) for p in res.problems), (name, off, res.problems)
            shutil.rmtree(target)
            tried += 1
    assert tried >= 40


@pytest.mark.parametrize("name", ["manifest.json", "README.md", "supernodes.parquet", "superedges.parquet",
                                  "degree_histograms.parquet"])
def test_missing_file(bundle, name):
    (bundle / name).unlink()
    res = check_bundle(bundle)
    assert not res.ok and any(p.startswith(name) and "missing" in p for p in res.problems), res.problems


@pytest.mark.parametrize("name", ["extra.csv", ".hidden", "notes.md"])
def test_extra_file(bundle, name):
    (bundle / name).write_text("added later\n")
    res = check_bundle(bundle)
    assert not res.ok and any(p.startswith(name) and "extra" in p for p in res.problems), res.problems


def test_extra_folder(bundle):
    (bundle / "sub").mkdir()
    res = check_bundle(bundle)
    assert not res.ok and any(p.startswith("sub") for p in res.problems)


def _edit_manifest(path: Path, edit, rehash_digest: bool) -> None:
    m = json.loads((path / MANIFEST).read_text())
    edit(m)
    if rehash_digest:
        m["manifest_sha256"] = manifest_digest(m)
    (path / MANIFEST).write_text(json.dumps(m, indent=2, sort_keys=True) + "\n")


EDITS = {
    "epsilon_total": lambda m: m.__setitem__("epsilon_total", 0.5),
    "min_size": lambda m: m.__setitem__("min_size", 2),
    "seeded": lambda m: m.__setitem__("seeded", False),
    "privacy_unit": lambda m: m.__setitem__("privacy_unit", "person"),
    "component_scale": lambda m: m["components"][0].__setitem__("scale", 0.01),
    "file_digest": lambda m: m["files"].__setitem__("README.md", "0" * 64),
    "rows": lambda m: m["rows"].__setitem__("supernodes", 99),
}


@pytest.mark.parametrize("field", sorted(EDITS))
def test_manifest_value_changed(bundle, field):
    _edit_manifest(bundle, EDITS[field], rehash_digest=False)
    res = check_bundle(bundle)
    assert not res.ok and any(p.startswith("manifest.json") and "edited" in p for p in res.problems)


@pytest.mark.parametrize("field", sorted(EDITS))
def test_manifest_value_changed_and_digest_recomputed(bundle, field):
    """A forger who also recomputes the manifest digest is still caught by another layer."""
    _edit_manifest(bundle, EDITS[field], rehash_digest=True)
    res = check_bundle(bundle)
    assert not res.ok, field
    assert all(not p.startswith("manifest.json: edited") for p in res.problems)


@pytest.mark.parametrize("key", ["files", "epsilon_total", "seeded", "min_size", "components",
                                 "manifest_sha256", "privacy_unit"])
def test_manifest_key_removed(bundle, key):
    _edit_manifest(bundle, lambda m: m.pop(key), rehash_digest=False)
    res = check_bundle(bundle)
    assert not res.ok and any(p.startswith("manifest.json") and f"'{key}'" in p for p in res.problems)


def test_manifest_not_json(bundle):
    (bundle / MANIFEST).write_text("{ not json")
    res = check_bundle(bundle)
    assert not res.ok and res.problems[0].startswith("manifest.json")


def _data_page_positions(path: Path):
    """(column, byte offset) inside each column chunk's data page, last payload byte first."""
    md = pq.ParquetFile(path).metadata
    for g in range(md.num_row_groups):
        rg = md.row_group(g)
        for j in range(rg.num_columns):
            c = rg.column(j)
            start = c.dictionary_page_offset or c.data_page_offset
            end = start + c.total_compressed_size
            yield c.path_in_schema, list(range(end - 1, c.data_page_offset, -1))


@pytest.mark.parametrize("name", ["supernodes.parquet", "superedges.parquet", "degree_histograms.parquet"])
def test_page_checksum_catches_a_changed_data_page_on_its_own(pristine, tmp_path, name):
    """For every column: a byte in its data page changed, all SHA-256 values recomputed.

    The changed file still reads without page checksum verification (so nothing
    but the page CRC could notice) and ``check`` reports it as corrupt.
    """
    original = pq.read_table(pristine / name)
    silent_value_changes = 0
    columns = 0
    for column, positions in _data_page_positions(pristine / name):
        target = tmp_path / f"{column}"
        for pos in positions:
            shutil.copytree(pristine, target)
            data = bytearray((target / name).read_bytes())
            data[pos] ^= 0x01
            (target / name).write_bytes(bytes(data))
            try:
                unverified = pq.read_table(target / name, page_checksum_verification=False)
            except Exception:  # this byte breaks decoding too; look for one only the CRC catches
                shutil.rmtree(target)
                continue
            _rehash(target)
            res = check_bundle(target)
            assert not res.ok
            assert any(p.startswith(name) and "corrupt Parquet" in p for p in res.problems), res.problems
            assert not any("SHA-256" in p or "edited" in p for p in res.problems)
            silent_value_changes += not unverified.equals(original)
            shutil.rmtree(target)
            columns += 1
            break
    assert columns >= 3
    if name == "superedges.parquet":  # at least one change that alters values silently without the CRC
        assert silent_value_changes >= 1


def test_check_command_names_the_file(bundle, capsys):
    data = bytearray((bundle / "superedges.parquet").read_bytes())
    data[len(data) // 2] ^= 0xFF
    (bundle / "superedges.parquet").write_bytes(bytes(data))
    assert main(["check", str(bundle)]) == 1
    out = capsys.readouterr().out
    assert "does not hold: superedges.parquet" in out and "check failed" in out


def test_check_pristine_copy_passes(bundle, capsys):
    assert main(["check", str(bundle)]) == 0
    assert "bundle verified" in capsys.readouterr().out


def test_check_counts_distinct_cells_like_numpy_unique():
    """The checker's distinct values (a sort and a comparison of neighbours) are ``numpy.unique``'s, NaN
    counted once as numpy counts it: the duplicate-cell and one-scale verdicts are the same as before."""
    import numpy as np

    from aggpub.bundle.check import _unique_sorted

    rng = np.random.default_rng(6)
    cases = [np.array([], dtype=np.int64), np.array([7]), rng.integers(0, 40, 500), rng.integers(-9, 9, 100_000),
             np.array([1.0, np.nan, 2.0, np.nan, 1.0]), np.array([np.nan, np.nan]), np.array([-0.0, 0.0, 1.5]),
             rng.normal(size=300), np.full(5, 3.0)]
    for x in cases:
        ref, got = np.unique(x), _unique_sorted(x)
        assert got.dtype == ref.dtype and np.array_equal(got, ref, equal_nan=True)
