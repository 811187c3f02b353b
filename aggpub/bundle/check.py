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
from ..outputs import stale_temp_siblings
from ._files import MANIFEST, manifest_digest, sha256_file
from .write import PARQUET_META_KEY

REQUIRED_MANIFEST_KEYS = ("format", "tool_version", "created_utc", "policy", "privacy_unit", "epsilon_total",
                          "min_size", "seeded", "components", "grouping_method", "rows", "files",
                          "manifest_sha256")

SCHEMAS = {
    "supernodes": {"supernode": pa.int64(), "size": pa.int64()},
    "superedges": {"supernode_a": pa.int64(), "supernode_b": pa.int64(), "edge_count": pa.int64(),
                   "possible_pairs": pa.int64(), "noise_scale": pa.float64(), "ci95_half_width": pa.int64()},
    "degree_histograms": {"supernode": pa.int64(), "degree_bin": pa.int64(), "people": pa.int64(),
                          "people_noisy": pa.int64(), "noise_scale": pa.float64(),
                          "ci95_half_width": pa.int64()},
    "weight_totals": {"supernode_a": pa.int64(), "supernode_b": pa.int64(), "weight_total": pa.int64(),
                      "max_weight_total": pa.int64(), "noise_scale": pa.float64(),
                      "ci95_half_width": pa.int64()},
    "degree_sequences": {"supernode": pa.int64(), "position": pa.int64(), "degree_noisy": pa.int64(),
                         "degree_estimate": pa.float64(), "noise_scale": pa.float64(), "ci95_half_width": pa.int64()},
    # contact views (issue 13)
    "contact_views": {"view": pa.string(), "layer": pa.string(), "value_a": pa.string(), "value_b": pa.string(),
                      "contacts": pa.int64(), "contacts_unclamped": pa.int64(), "noise_scale": pa.float64()},
    "contact_view_weights": {"view": pa.string(), "layer": pa.string(), "value_a": pa.string(),
                             "value_b": pa.string(), "weight_total": pa.int64(),
                             "weight_total_unclamped": pa.int64(), "noise_scale": pa.float64()},
    "view_people": {"view": pa.string(), "value": pa.string(), "people": pa.int64(), "noise_scale": pa.float64(),
                    "noise_terms": pa.int64()},
}
#: Columns a table may lack (bundles made before they existed) but whose type is checked when present.
OPTIONAL_COLUMNS = {"superedges": {"edge_count_estimate": pa.float64(), "edge_count_unclamped": pa.int64()}}


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

    Examples
    --------
    >>> import networkx as nx, pyarrow as pa
    >>> import aggpub
    >>> G = nx.karate_club_graph()  # Zachary's karate club, as networkx ships it
    >>> edges = pa.table({"source": [str(u) for u, v in G.edges()], "target": [str(v) for u, v in G.edges()]})
    >>> people = pa.table({"node": [str(n) for n in G], "club": [G.nodes[n]["club"] for n in G]})
    >>> policy = {"privacy": {"unit": "edge", "epsilon": 1.0},
    ...           "grouping": {"method": "attributes", "attributes": ["club"], "min_size": 5}}
    >>> import pathlib, tempfile
    >>> path = aggpub.publish(aggpub.release_tables(edges, people, policy, seed=1),
    ...                       pathlib.Path(tempfile.mkdtemp()) / "bundle")
    >>> result = aggpub.check_bundle(path)
    >>> result.ok, result.problems
    (True, [])
    >>> (path / "superedges.parquet").write_bytes(b"edited")  # a changed file is found
    6
    >>> aggpub.check_bundle(path).ok
    False
    """
    path = Path(path)
    res = CheckResult(path=path)
    manifest = _read_manifest(path, res)
    if manifest is None:
        return res
    _check_files(path, manifest["files"], res)
    tables = _read_tables(path, manifest, res)
    for stale in stale_temp_siblings(path.absolute(), ("tmp", "old")):
        res.warnings.append(f"{stale.name}: temporary folder beside the bundle, left by an interrupted write "
                            "(not part of the bundle; the next release to this path removes a 'tmp' one)")
    if res.problems:
        return res
    _check_invariants(manifest, tables, res)
    if manifest.get("seeded"):
        res.warnings.append("seeded bundle: the noise came from a fixed seed, so this release is NOT private "
                            "(for tests only; never give it to researchers)")
    _note_accounting(manifest, res)
    return res


def _read_manifest(path: Path, res: CheckResult) -> dict | None:
    """The manifest, its required keys, digest and format checked; ``None`` when the rest cannot be checked."""
    mpath = path / MANIFEST
    if not path.is_dir():
        res.problems.append(f"{path}: not a folder")
        return None
    if not mpath.is_file():
        res.problems.append(f"{MANIFEST}: missing")
        return None
    try:
        manifest = json.loads(mpath.read_text("utf-8"))
        if not isinstance(manifest, dict):
            raise ValueError("not a JSON object")
    except (OSError, UnicodeDecodeError, ValueError) as exc:
        res.problems.append(f"{MANIFEST}: unreadable ({exc})")
        return None
    for key in REQUIRED_MANIFEST_KEYS:
        if key not in manifest:
            res.problems.append(f"{MANIFEST}: missing key '{key}'")
    if res.problems:
        return None
    if manifest_digest(manifest) != manifest["manifest_sha256"]:
        res.problems.append(f"{MANIFEST}: edited (its manifest_sha256 does not match its content)")
    if manifest["format"] != BUNDLE_FORMAT:
        res.problems.append(f"{MANIFEST}: unknown bundle format {manifest['format']!r}")
    res.checked.append("manifest digest")
    return manifest


def _check_files(path: Path, files: dict, res: CheckResult) -> None:
    """The file list against the folder (nothing missing, nothing extra) and every file's SHA-256."""
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


def _read_tables(path: Path, manifest: dict, res: CheckResult) -> dict:
    """Every Parquet file read with page checksums verified, its metadata, schema and row count checked."""
    tables = {}
    for name in sorted(manifest["files"]):
        if not name.endswith(".parquet") or not (path / name).is_file():
            continue
        stem = name[: -len(".parquet")]
        try:
            table = pq.read_table(path / name, page_checksum_verification=True)
        except (OSError, pa.ArrowException) as exc:
            res.problems.append(f"{name}: unreadable or corrupt Parquet ({str(exc)[:120]})")
            continue
        tables[stem] = table
        _check_table(name, stem, table, manifest, res)
    res.checked.append("Parquet page checksums and schemas")
    return tables


def _check_table(name: str, stem: str, table: pa.Table, manifest: dict, res: CheckResult) -> None:
    """One Parquet file's privacy metadata against the manifest, its schema and its row count."""
    meta = (table.schema.metadata or {}).get(PARQUET_META_KEY)
    if meta is None:
        res.problems.append(f"{name}: no privacy parameters in the Parquet metadata")
    else:
        try:
            m = json.loads(meta)
            for k in ("privacy_unit", "epsilon_total", "seeded", "min_size", "components"):
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
    for col, typ in OPTIONAL_COLUMNS.get(stem, {}).items():
        if col in table.column_names and table.schema.field(col).type != typ:
            res.problems.append(f"{name}: column '{col}' has type {table.schema.field(col).type}, "
                                f"expected {typ}")
    expected_rows = manifest["rows"].get(stem)
    if expected_rows is not None and expected_rows != table.num_rows:
        res.problems.append(f"{name}: {table.num_rows} rows, manifest says {expected_rows}")


def _note_accounting(manifest, res) -> None:
    """Say how the release was accounted: charged to a lifetime ledger, or not (and why)."""
    acc = manifest.get("accounting")
    if acc is None:  # bundles written before the manifest said it
        acc = ({"charged": True, "dataset": manifest["ledger"].get("dataset")} if manifest.get("ledger")
               else {"charged": False, "why": "this bundle's manifest does not say"})
    if acc.get("charged"):
        res.checked.append(f"charged to the lifetime ledger of dataset '{acc.get('dataset')}'")
    else:
        res.warnings.append(f"not charged to a lifetime ledger ({acc.get('why')}): releases of the same people "
                            "add up, and nothing here keeps count of this one")


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
    # Under a private size release (sizes_exact false) the sizes are noisy: the grouping decided its
    # merges on noisy counts, so min_size binds those decisions, not the true sizes, and a released
    # size may differ from the true one (and fall below min_size after the noise).
    sizes_exact = manifest.get("sizes_exact", True)
    if sizes_exact and (sizes < k).any():
        res.problems.append(f"supernodes.parquet: {(sizes < k).sum()} supernode(s) below min_size {k}")
    if (sizes < 0).any():
        res.problems.append("supernodes.parquet: negative sizes")
    if sizes_exact:
        if manifest.get("privacy_unit") == "person":
            res.problems.append(f"{MANIFEST}: 'sizes_exact' is true under privacy unit 'person' "
                                "(the sizes must be released with noise)")
        res.checked.append(f"every supernode has >= {k} members")
    else:
        if not any(isinstance(c, dict) and c.get("name") == "supernode_sizes" for c in manifest["components"]) \
                and manifest.get("privacy_unit") == "person":
            res.problems.append(f"{MANIFEST}: noisy sizes but no 'supernode_sizes' spend in 'components'")
        res.checked.append("noisy sizes: non-negative, with their spend recorded (min_size binds the "
                           "grouping's noisy decisions)")
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
            if len(_unique_sorted(key)) != len(key):
                res.problems.append("superedges.parquet: a cell appears twice")
        if sparse:  # sparse release: only cells whose noisy count reached the threshold (then clamped)
            t = manifest.get("superedges_sparse_threshold")
            if not isinstance(t, int) or isinstance(t, bool) or t < 1:
                res.problems.append(f"{MANIFEST}: sparse superedges without an integer "
                                    "'superedges_sparse_threshold' >= 1")
            elif (c < np.minimum(t, cap)).any():
                res.problems.append(f"superedges.parquet: {(c < np.minimum(t, cap)).sum()} row(s) below the "
                                    f"sparse threshold {t}")
            res.checked.append("sparse superedges: every listed cell at or above the threshold")
        else:
            res.checked.append("superedge counts: non-negative integers, a <= b, every cell once")
        if "edge_count_estimate" in se.column_names:
            est = se.column("edge_count_estimate").to_numpy()
            if not np.isfinite(est).all() or (est < 0).any() or (est > cap + 1e-6).any():
                res.problems.append("superedges.parquet: edge_count_estimate not within [0, possible_pairs]")
            res.checked.append("superedge estimates: finite, within [0, possible_pairs]")
    _check_degree_histograms(manifest, tables.get("degree_histograms"), sizes, res)
    _check_weight_totals(tables.get("weight_totals"), n, res)
    _check_degree_sequences(manifest, tables.get("degree_sequences"), sizes, res)
    _check_triangle_count(manifest, res)
    _check_contact_views(manifest, tables, sizes, res)


def _spend(manifest, name):
    return next((c for c in manifest.get("components", []) if isinstance(c, dict) and c.get("name") == name), None)


def _check_degree_sequences(manifest, ds, sizes, res):
    """Every member of every supernode once (positions ``0 .. size - 1``); estimates sorted, within ``[0, N - 1]``."""
    if ds is None:
        if _spend(manifest, "degree_sequences") is not None:
            res.problems.append(f"{MANIFEST}: a 'degree_sequences' spend but no degree_sequences.parquet")
        return
    n = len(sizes)
    s = ds.column("supernode").to_numpy()
    pos = ds.column("position").to_numpy()
    est = ds.column("degree_estimate").to_numpy()
    people = int(np.asarray(sizes).sum())
    if manifest.get("privacy_unit") != "edge":
        res.problems.append("degree_sequences.parquet: degree sequences are released under unit 'edge' only")
    if _spend(manifest, "degree_sequences") is None:
        res.problems.append("degree_sequences.parquet: no 'degree_sequences' spend in the manifest")
    if ((s < 0) | (s >= n)).any():
        res.problems.append("degree_sequences.parquet: supernode ids out of range")
        return
    if len(s) != people or not np.array_equal(np.bincount(s, minlength=n), np.asarray(sizes)):
        res.problems.append(f"degree_sequences.parquet: {len(s)} rows, expected one per member of every supernode "
                            f"({people})")
        return
    order = np.lexsort((pos, s))
    s, pos, est = s[order], pos[order], est[order]
    starts = np.concatenate([[0], np.cumsum(sizes)[:-1]]).astype(np.int64)
    if not np.array_equal(pos, np.arange(len(s)) - starts[s]):
        res.problems.append("degree_sequences.parquet: positions are not 0 .. size - 1 once each in every supernode")
        return
    if not np.isfinite(est).all() or (est < 0).any() or (est > max(people - 1, 0) + 1e-9).any():
        res.problems.append("degree_sequences.parquet: degree_estimate not within [0, people - 1]")
    same = s[1:] == s[:-1]
    if (np.diff(est)[same] < -1e-9 * max(1.0, float(np.abs(est).max()) if len(est) else 1.0)).any():
        res.problems.append("degree_sequences.parquet: degree_estimate decreases within a supernode")
    res.checked.append("degree sequences: every member once, estimates sorted within [0, people - 1]")


def _check_triangle_count(manifest, res):
    """A released triangle count is an integer with its ladder spend (and the other way round)."""
    spend = _spend(manifest, "triangle_count")
    has = "triangle_count" in manifest
    if not has and spend is None:
        return
    value = manifest.get("triangle_count")
    if not has:
        res.problems.append(f"{MANIFEST}: a 'triangle_count' spend but no 'triangle_count' value")
    elif not isinstance(value, int) or isinstance(value, bool):
        res.problems.append(f"{MANIFEST}: 'triangle_count' is not an integer")
    if has and spend is None:
        res.problems.append(f"{MANIFEST}: 'triangle_count' released without its spend in 'components'")
    elif spend is not None and spend.get("mechanism") != "ladder":
        res.problems.append(f"{MANIFEST}: the 'triangle_count' spend is not the ladder mechanism")
    if manifest.get("privacy_unit") != "edge":
        res.problems.append(f"{MANIFEST}: the triangle count is released under unit 'edge' only")
    res.checked.append("triangle count: an integer with its ladder spend")


def _check_degree_histograms(manifest, dh, sizes, res):
    """Every (supernode, bin) once; bins non-negative and adding up to the released size."""
    if dh is None:
        return
    n = len(sizes)
    s = dh.column("supernode").to_numpy()
    b = dh.column("degree_bin").to_numpy()
    p = dh.column("people").to_numpy()
    comp = {c.get("name"): c for c in manifest.get("components", []) if isinstance(c, dict)}
    cap = ((manifest.get("policy") or {}).get("components") or {}).get("degree_histograms", {}).get("max_degree")
    if ((s < 0) | (s >= n)).any():
        res.problems.append("degree_histograms.parquet: supernode ids out of range")
        return
    if (p < 0).any():
        res.problems.append("degree_histograms.parquet: negative 'people'")
    if isinstance(cap, int):
        if ((b < 0) | (b > cap)).any():
            res.problems.append(f"degree_histograms.parquet: degree_bin outside 0..{cap}")
        elif len(s) != n * (cap + 1) or len(_unique_sorted(s * (cap + 1) + b)) != len(s):
            res.problems.append(f"degree_histograms.parquet: {len(s)} rows, expected every one of the "
                                f"{n * (cap + 1)} (supernode, bin) cells exactly once (zeros included)")
    totals = np.bincount(s, weights=p, minlength=n)
    if not np.array_equal(totals.astype(np.int64), np.asarray(sizes, dtype=np.int64)):
        res.problems.append("degree_histograms.parquet: a supernode's bins do not add up to its size")
    if "degree_histograms" not in comp:
        res.problems.append("degree_histograms.parquet: no 'degree_histograms' spend in the manifest")
    res.checked.append("degree histograms: every bin once, non-negative, adding up to the sizes")


def _check_weight_totals(wt, n, res):
    """Every cell once, totals in [0, max_weight_total]."""
    if wt is None:
        return
    a = wt.column("supernode_a").to_numpy()
    b = wt.column("supernode_b").to_numpy()
    t = wt.column("weight_total").to_numpy()
    cap = wt.column("max_weight_total").to_numpy()
    if (a > b).any() or ((a < 0) | (b >= n)).any():
        res.problems.append("weight_totals.parquet: supernode ids out of range or supernode_a > supernode_b")
    if (t < 0).any() or (t > cap).any():
        res.problems.append("weight_totals.parquet: weight_total outside [0, max_weight_total]")
    if len(a) != n * (n + 1) // 2 or len(_unique_sorted(a * (n + 1) + b)) != len(a):
        res.problems.append(f"weight_totals.parquet: {len(a)} rows, expected every one of the "
                            f"{n * (n + 1) // 2} cells exactly once (zeros included)")
    res.checked.append("weight totals: every cell once, within [0, max_weight_total]")



def _unique_sorted(values) -> np.ndarray:
    """``numpy.unique(values)`` by a sort and a comparison of neighbours (NaNs counted as one value, as numpy
    does): numpy's hashing ``unique`` takes about a second on a table of 2M cells on these machines."""
    x = np.sort(np.asarray(values).ravel())
    if not x.size:
        return x
    keep = np.empty(x.size, dtype=bool)
    keep[0] = True
    np.not_equal(x[1:], x[:-1], out=keep[1:])
    if x.dtype.kind in "fc":
        nan = np.isnan(x)
        keep[1:] &= ~(nan[1:] & nan[:-1])
    return x[keep]

# ---- contact views (issue 13)

def _view_values(name, domains):
    out = [""]
    for a in name.split(","):
        out = [f"{p}|{x}" if p else str(x) for p in out for x in domains.get(a, [])]
    return out


def _check_view_table(stem, column, kind, table, views, domains, layers, spends, res):
    """Every (layer, value pair) of every listed view once, clamped = max(unclamped, 0), the spend's scale."""
    name_col = np.asarray(table.column("view").to_pylist(), dtype=object)
    listed = {v["name"] for v in views}
    extra = set(name_col.tolist()) - listed
    if extra:
        res.problems.append(f"{stem}.parquet: view(s) {sorted(extra)} not listed in the manifest's 'views'")
    for v in views:
        name = v["name"]
        rows = np.flatnonzero(name_col == name)
        values = _view_values(name, domains)
        k = len(values)
        n_l = len(layers) if (layers and v.get("layered")) else 1
        expected = n_l * k * (k + 1) // 2
        sub = table.take(pa.array(rows, type=pa.int64()))
        pos = {x: i for i, x in enumerate(values)}
        a = np.array([pos.get(x, -1) for x in sub.column("value_a").to_pylist()])
        b = np.array([pos.get(x, -1) for x in sub.column("value_b").to_pylist()])
        lay = sub.column("layer").to_pylist()
        if n_l > 1:
            lpos = {x: i for i, x in enumerate(layers)}
            li = np.array([lpos.get(x, -1) for x in lay])
        else:
            li = np.array([0 if x is None else -1 for x in lay])
        if len(rows) != expected or (a < 0).any() or (b < 0).any() or (a > b).any() or (li < 0).any() \
                or len(_unique_sorted((li * k + a) * k + b)) != len(rows):
            res.problems.append(f"{stem}.parquet: view '{name}' must list each of its {expected} (layer, value "
                                "pair) cells once, value_a <= value_b in the declared order, zeros included")
            continue
        c = np.asarray(sub.column(column).to_numpy())
        cu = np.asarray(sub.column(f"{column}_unclamped").to_numpy())
        if not np.array_equal(c, np.maximum(cu, 0)):
            res.problems.append(f"{stem}.parquet: view '{name}': '{column}' is not the unclamped value floored at 0")
        scale = _unique_sorted(np.asarray(sub.column("noise_scale").to_numpy()))
        spend = spends.get(f"{kind}:{name}")
        if spend is None:
            res.problems.append(f"{stem}.parquet: view '{name}' has no '{kind}:{name}' spend in the manifest")
        elif len(scale) != 1 or not np.isclose(scale[0], spend.get("scale", np.nan), rtol=1e-12):
            res.problems.append(f"{stem}.parquet: view '{name}': noise_scale differs from its spend's scale")


def _check_contact_views(manifest, tables, sizes, res):
    """Views, their weighted twins and the people per value against the manifest's ``views`` and ``layers``."""
    cv, cw, vp = tables.get("contact_views"), tables.get("contact_view_weights"), tables.get("view_people")
    views = manifest.get("views")
    if cv is None and cw is None and vp is None:
        if views:
            res.problems.append(f"{MANIFEST}: 'views' listed but contact_views.parquet is missing")
        return
    if not isinstance(views, list) or not views or cv is None:
        res.problems.append(f"{MANIFEST}: view tables present without a 'views' list (or contact_views.parquet)")
        return
    domains = manifest.get("view_domains") or {}
    layers = (manifest.get("layers") or {}).get("values") or []
    spends = {c.get("name"): c for c in manifest.get("components", []) if isinstance(c, dict)}
    for v in views:
        if not isinstance(v, dict) or not all(a in domains for a in v.get("attributes", [None])):
            res.problems.append(f"{MANIFEST}: a view lacks its attributes' domains in 'view_domains'")
            return
    _check_view_table("contact_views", "contacts", "contact_views", cv, views, domains, layers, spends, res)
    if cw is not None:
        _check_view_table("contact_view_weights", "weight_total", "contact_view_weights", cw,
                          [v for v in views if v.get("weighted")], domains, layers, spends, res)
    elif any(v.get("weighted") for v in views):
        res.problems.append(f"{MANIFEST}: weighted views listed but contact_view_weights.parquet is missing")
    if vp is not None:
        p = np.asarray(vp.column("people").to_numpy())
        exact = manifest.get("privacy_unit") == "edge"
        if exact:
            names = np.asarray(vp.column("view").to_pylist(), dtype=object)
            for v in views:
                if (p < 0).any() or int(p[names == v["name"]].sum()) != int(np.asarray(sizes).sum()):
                    res.problems.append(f"view_people.parquet: view '{v['name']}': exact people per value must "
                                        "be non-negative and add up to the people of the supernodes")
                    break
            if (np.asarray(vp.column("noise_scale").to_numpy()) != 0).any():
                res.problems.append("view_people.parquet: people per value are exact under unit 'edge' "
                                    "(noise_scale 0)")
    res.checked.append(f"contact views: {len(views)} view(s), every (layer, value pair) cell once, scales as spent"
                       + (f", {len(layers)} layers" if layers else ""))
