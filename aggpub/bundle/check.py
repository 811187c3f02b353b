"""Verify a bundle: checksums, file list, manifest digest, schemas, metadata, invariants."""

from __future__ import annotations

__all__ = ["CheckResult", "check_bundle"]

import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .._version import BUNDLE_FORMAT
from ._files import MANIFEST, manifest_digest, sha256_file
from .write import PARQUET_META_KEY

REQUIRED_MANIFEST_KEYS = ("format", "tool_version", "created_utc", "policy", "privacy_unit", "epsilon_total",
                          "min_size", "seeded", "components", "grouping_method", "rows", "files",
                          "manifest_sha256")

SCHEMAS = {
    "supernodes": {"supernode": pa.int64(), "size": pa.int64()},
    "superedges": {"supernode_a": pa.int64(), "supernode_b": pa.int64(), "edge_count": pa.int64(),
                   "possible_pairs": pa.int64(), "noise_scale": pa.float64(), "ci95_half_width": pa.int64()},
}


@dataclass
class CheckResult:
    """Outcome of :func:`check_bundle`: ``problems`` fail the check, ``warnings`` do not."""

    path: Path
    problems: list = field(default_factory=list)
    warnings: list = field(default_factory=list)
    checked: list = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.problems


def check_bundle(path) -> CheckResult:
    """Verify a release bundle and report every problem found.

    Checks the file list against the manifest (no missing or extra file), the
    SHA-256 of every file, the manifest's own digest, Parquet page checksums
    (by reading every page with verification on), the schemas, the privacy
    parameters in each file's metadata, that every supernode has at least
    ``min_size`` members, that counts are non-negative integers with
    ``supernode_a <= supernode_b`` and every cell present, and warns on seeded
    (non-private) bundles.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    CheckResult
    """
    path = Path(path)
    res = CheckResult(path=path)
    mpath = path / MANIFEST
    if not path.is_dir():
        res.problems.append(f"{path}: not a folder")
        return res
    if not mpath.is_file():
        res.problems.append(f"{MANIFEST}: missing")
        return res
    try:
        manifest = json.loads(mpath.read_text("utf-8"))
        if not isinstance(manifest, dict):
            raise ValueError("not a JSON object")
    except (OSError, UnicodeDecodeError, ValueError) as exc:
        res.problems.append(f"{MANIFEST}: unreadable ({exc})")
        return res
    for key in REQUIRED_MANIFEST_KEYS:
        if key not in manifest:
            res.problems.append(f"{MANIFEST}: missing key '{key}'")
    if res.problems:
        return res
    if manifest_digest(manifest) != manifest["manifest_sha256"]:
        res.problems.append(f"{MANIFEST}: edited (its manifest_sha256 does not match its content)")
    if manifest["format"] != BUNDLE_FORMAT:
        res.problems.append(f"{MANIFEST}: unknown bundle format {manifest['format']!r}")
    res.checked.append("manifest digest")

    # ---- file list and checksums
    files = manifest["files"]
    present = {p.name for p in path.iterdir()} - {MANIFEST}
    for extra in sorted(present - set(files)):
        res.problems.append(f"{extra}: extra file not listed in the manifest")
    for name, digest in sorted(files.items()):
        fp = path / name
        if not fp.is_file():
            res.problems.append(f"{name}: missing")
            continue
        if sha256_file(fp) != digest:
            res.problems.append(f"{name}: SHA-256 does not match the manifest (file changed)")
    res.checked.append(f"SHA-256 of {len(files)} files")

    # ---- Parquet: page checksums, schema, metadata, invariants
    tables = {}
    for name in sorted(files):
        if not name.endswith(".parquet") or not (path / name).is_file():
            continue
        stem = name[: -len(".parquet")]
        try:
            table = pq.read_table(path / name, page_checksum_verification=True)
        except (OSError, pa.ArrowException) as exc:
            res.problems.append(f"{name}: unreadable or corrupt Parquet ({str(exc)[:120]})")
            continue
        tables[stem] = table
        meta = (table.schema.metadata or {}).get(PARQUET_META_KEY)
        if meta is None:
            res.problems.append(f"{name}: no privacy parameters in the Parquet metadata")
        else:
            try:
                m = json.loads(meta)
                for k in ("privacy_unit", "epsilon_total", "seeded"):
                    if m.get(k) != manifest.get(k):
                        res.problems.append(f"{name}: metadata '{k}' differs from the manifest")
            except ValueError:
                res.problems.append(f"{name}: unreadable privacy metadata")
        for col, typ in SCHEMAS.get(stem, {}).items():
            if col not in table.column_names:
                res.problems.append(f"{name}: missing column '{col}'")
            elif table.schema.field(col).type != typ:
                res.problems.append(f"{name}: column '{col}' has type {table.schema.field(col).type}, "
                                    f"expected {typ}")
        expected_rows = manifest["rows"].get(stem)
        if expected_rows is not None and expected_rows != table.num_rows:
            res.problems.append(f"{name}: {table.num_rows} rows, manifest says {expected_rows}")
    res.checked.append("Parquet page checksums and schemas")

    if res.problems:
        return res
    _check_invariants(manifest, tables, res)
    if manifest.get("seeded"):
        res.warnings.append("seeded bundle: the noise came from a fixed seed, so this release is NOT private "
                            "(for tests only; never give it to researchers)")
    return res


def _check_invariants(manifest, tables, res):
    k = int(manifest["min_size"])
    sn = tables.get("supernodes")
    if sn is None:
        res.problems.append("supernodes.parquet: missing")
        return
    ids = sn.column("supernode").to_numpy()
    n = len(ids)
    if not np.array_equal(ids, np.arange(n)):
        res.problems.append("supernodes.parquet: 'supernode' is not 0..n-1 in order")
    sizes = sn.column("size").to_numpy()
    # Under a private size release the sizes are noisy; min_size binds the true sizes the grouping used.
    if manifest.get("sizes_exact", True) and (sizes < k).any():
        res.problems.append(f"supernodes.parquet: {(sizes < k).sum()} supernode(s) below min_size {k}")
    if (sizes < 0).any():
        res.problems.append("supernodes.parquet: negative sizes")
    res.checked.append(f"every supernode has >= {k} members")
    se = tables.get("superedges")
    if se is not None:
        a = se.column("supernode_a").to_numpy()
        b = se.column("supernode_b").to_numpy()
        c = se.column("edge_count").to_numpy()
        if (a > b).any():
            res.problems.append("superedges.parquet: rows with supernode_a > supernode_b")
        if (c < 0).any():
            res.problems.append("superedges.parquet: negative edge_count")
        if ((a < 0) | (b >= n)).any():
            res.problems.append("superedges.parquet: supernode ids out of range")
        cap = se.column("possible_pairs").to_numpy()
        if (c > cap).any():
            res.problems.append("superedges.parquet: edge_count above possible_pairs")
        sparse = manifest.get("superedges_sparse", False)
        if not sparse and len(a) != n * (n + 1) // 2:
            res.problems.append(f"superedges.parquet: {len(a)} rows, a dense release of {n} supernodes has "
                                f"{n * (n + 1) // 2} cells (zeros must be released too)")
        elif len(a):
            key = a * (n + 1) + b
            if len(np.unique(key)) != len(key):
                res.problems.append("superedges.parquet: a cell appears twice")
        res.checked.append("superedge counts: non-negative integers, a <= b, every cell once")
