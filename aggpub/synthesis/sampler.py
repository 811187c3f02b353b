"""Synthetic networks drawn from a release: the one sampler, used by researchers and by the audit.

What a release carries decides how its synthetic networks are drawn
(:func:`inputs_from_release`):

``degree_corrected``
    The release holds the consistent superedge estimates (``edge_count_estimate``) and
    the estimated sorted degree sequences (``degree_sequences.degree_estimate``): every
    cell gets its estimate (rounded without bias) as an exact number of distinct
    contacts, every synthetic person their supernode's estimated degree as a target,
    drawn by the degree-corrected block model (Karrer and Newman 2011) realised as a
    simple graph, after the affinity blocks of BTER (Seshadhri, Kolda, Pinar 2012)
    that carry local clustering (:mod:`aggpub.synthesis.degree_corrected`). When the
    release also holds the noisy number of triangles (manifest ``triangle_count``), the
    blocks' density is fitted so that synthetic networks have that many triangles
    (:func:`fit_affinity`); without it there are no affinity blocks.
``uniform_block``
    Older bundles, sparse releases and releases without degree sequences: every cell's
    count (the estimate when the bundle has it, else the clamped ``edge_count``) as
    distinct contacts drawn uniformly among the cell's possible pairs (Hay, Miklau,
    Jensen, Towsley, Weis 2008; :func:`aggpub.synthesis.sample_block_network`).

Sampling reads the released tables only (post-processing): it costs no budget and may
be seeded. The audit's "grouping alone" figures draw from :func:`inputs_from_truth`,
the same tables filled with the true (confidential) values, through the same functions.

References
----------
B. Karrer, M. E. J. Newman, "Stochastic blockmodels and community structure in
networks", Physical Review E 83, 016107, 2011.

C. Seshadhri, T. G. Kolda, A. Pinar, "Community structure and scale-free collections
of Erdos-Renyi graphs", Physical Review E 85, 056109, 2012.

M. Hay, G. Miklau, D. Jensen, D. Towsley, P. Weis, "Resisting structural
re-identification in anonymized social networks", PVLDB 1(1), 2008.
"""

from __future__ import annotations

__all__ = ["SynthesisInputs", "inputs_from_release", "inputs_from_truth", "fit_affinity", "draw_network",
           "sample_network", "synthetic_people", "write_sample", "SAMPLERS"]

import hashlib
import json
from collections import OrderedDict
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from ..cells import n_cells, possible_pairs
from ..errors import BundleError
from ..randomness import make_generator
from .block_model import sample_block_network
from .degree_corrected import round_counts, sample_degree_corrected

if TYPE_CHECKING:  # pyarrow and the bundle readers are imported where a release is read or a table made:
    import pyarrow as pa  # the audit's helper process draws and fits with numpy alone, without importing them

#: The two ways a release is sampled, by what it carries.
SAMPLERS = ("degree_corrected", "uniform_block")
#: Most interior trial densities of the affinity fit (besides the two ends).
AFFINITY_STEPS = 5
#: The affinity fit stops at a trial whose triangle count is within this share of the target.
AFFINITY_TOLERANCE = 0.025


@dataclass(frozen=True)
class SynthesisInputs:
    """What the sampler draws from (public values of a release, or the true aggregate for the audit).

    Attributes
    ----------
    sizes : numpy.ndarray
        Supernode sizes (synthetic person ``offset[s] + i`` is member ``i`` of supernode ``s``).
    a, b : numpy.ndarray
        The cells, ``a <= b``.
    cells : numpy.ndarray of float
        Non-negative target count of each cell, at most its possible pairs.
    degrees : numpy.ndarray of float or None
        Target degree of every synthetic person (supernode by supernode, ascending), or
        ``None`` for the uniform block sampler.
    triangles : float or None
        Target number of triangles, or ``None`` (no affinity blocks).
    sampler : str
        One of :data:`SAMPLERS`.
    """

    sizes: np.ndarray
    a: np.ndarray
    b: np.ndarray
    cells: np.ndarray
    degrees: np.ndarray | None
    triangles: float | None
    sampler: str

    @property
    def cap(self) -> np.ndarray:
        return possible_pairs(self.sizes, self.a, self.b)

    def digest(self) -> str:
        """SHA-256 of the inputs (keys the affinity fit; seeds it, so a release always fits the same)."""
        h = hashlib.sha256(self.sampler.encode())
        for arr in (self.sizes, self.a, self.b, self.cells, self.degrees):
            if arr is not None:
                h.update(np.ascontiguousarray(arr, dtype=np.float64).tobytes())
        h.update(repr(self.triangles).encode())
        return h.hexdigest()


def _sizes(supernodes: pa.Table) -> np.ndarray:
    sizes = np.asarray(supernodes.column("size").to_numpy(), dtype=np.int64)
    return np.maximum(sizes, 0)


def inputs_from_release(release) -> SynthesisInputs:
    """The sampler's inputs from a release's public tables (a Bundle or a Release).

    Raises
    ------
    BundleError
        A table the sampler reads is inconsistent (ids out of range, counts outside
        ``[0, possible pairs]``, a degree table that does not list every person).
    """
    from ..bundle.read import require_superedges
    from ..bundle.read import table_column as _col

    supernodes, superedges, manifest = require_superedges(release)
    tables = getattr(release, "tables", {}) or {}
    sizes = _sizes(supernodes)
    n = len(sizes)
    a = _col(superedges, "supernode_a")
    b = _col(superedges, "supernode_b")
    if len(a) and (a.min() < 0 or b.max() >= n or (a > b).any()):
        raise BundleError("superedges table: supernode ids out of range or not ordered a <= b")
    cap = possible_pairs(sizes, a, b)
    has_estimate = "edge_count_estimate" in superedges.column_names
    column = "edge_count_estimate" if has_estimate else "edge_count"
    cells = _col(superedges, column, np.float64)
    if not np.isfinite(cells).all() or (cells < 0).any() or (cells > cap + 1e-6).any():
        raise BundleError(f"superedges table: an {column} is negative or above the possible pairs of its "
                          "supernodes' released sizes")
    cells = np.minimum(cells, cap)
    full = len(a) == n_cells(n) and not manifest.get("superedges_sparse", False)
    seq = tables.get("degree_sequences")
    if has_estimate and full and seq is not None and "degree_estimate" in seq.column_names:
        s = np.asarray(seq.column("supernode").to_numpy(), dtype=np.int64)
        p = np.asarray(seq.column("position").to_numpy(), dtype=np.int64)
        d = np.asarray(seq.column("degree_estimate").to_numpy(), dtype=np.float64)
        if len(s) != int(sizes.sum()) or (s < 0).any() or (s >= n).any() \
                or not np.array_equal(np.bincount(s, minlength=n), sizes) or not np.isfinite(d).all():
            raise BundleError("degree_sequences table: it must list every member of every supernode once")
        order = np.lexsort((p, s))
        tri = manifest.get("triangle_count")
        triangles = float(max(int(tri), 0)) if isinstance(tri, (int, np.integer)) and not isinstance(tri, bool) \
            else None
        return SynthesisInputs(sizes=sizes, a=a, b=b, cells=cells, degrees=np.maximum(d[order], 0.0),
                               triangles=triangles, sampler="degree_corrected")
    return SynthesisInputs(sizes=sizes, a=a, b=b, cells=cells, degrees=None, triangles=None,
                           sampler="uniform_block")


def inputs_from_truth(release, like: SynthesisInputs | None = None) -> SynthesisInputs:
    """The same inputs filled with the true aggregate of a built release (CONFIDENTIAL; audit and benchmarks).

    True sizes, true superedge counts, true sorted degrees and the true triangle count,
    for the sampler the release itself uses (``like``, default
    :func:`inputs_from_release` of the release): what the grouping alone keeps.
    """
    from ..cells import all_cells, scatter_cells
    from ..released import dense_truth
    from ..released.degree_sequences import sorted_sequences

    like = like or inputs_from_release(release)
    grouping = release.grouping
    n = grouping.n_supernodes
    st = release.truth["superedges"]
    if not getattr(st, "complete", True):
        st = dense_truth(n, st.a, st.b, st.count)
    sizes = np.asarray(grouping.sizes(), dtype=np.int64)
    a, b = all_cells(n)
    cells = scatter_cells(n, st.a, st.b, st.count).astype(np.float64)
    if like.sampler != "degree_corrected":
        return SynthesisInputs(sizes=sizes, a=a, b=b, cells=cells, degrees=None, triangles=None,
                               sampler="uniform_block")
    seq = release.truth.get("degree_sequences")
    if seq is None:
        seq = sorted_sequences(release.network.engine.degrees(release.network.n_people), grouping.assignment, n)
    tri = release.truth.get("triangle_count")
    triangles = float(tri.count) if (tri is not None and like.triangles is not None) else None
    return SynthesisInputs(sizes=sizes, a=a, b=b, cells=cells, degrees=seq.values.astype(np.float64),
                           triangles=triangles, sampler="degree_corrected")


def _draw(inputs: SynthesisInputs, rho: float, rng):
    counts = round_counts(inputs.cells, inputs.cap, rng)
    if inputs.sampler == "uniform_block":
        return sample_block_network(inputs.a, inputs.b, counts, inputs.sizes, rng)
    return sample_degree_corrected(inputs.sizes, inputs.a, inputs.b, counts, inputs.degrees, rho, rng)


_AFFINITY_CACHE: "OrderedDict[str, float]" = OrderedDict()
_CACHE_SIZE = 16


def fit_affinity(inputs: SynthesisInputs) -> float:
    """Density ``rho`` of the affinity blocks whose synthetic networks have the target triangle count.

    One synthetic network per trial density, triangles counted exactly. The trial at
    ``rho = 1/2`` and the end on the target's side (``rho = 1`` or ``0``) bracket it
    (when it lies beyond that end, the end is the answer); inside, the Illinois variant
    of the method of false position (regula falsi; Dowell and Jarratt 1971) moves the
    bracket until a trial's count is within :data:`AFFINITY_TOLERANCE` of the target (a
    draw's own spread is about that large) or after :data:`AFFINITY_STEPS` trials. The
    count grows smoothly with ``rho`` (like ``rho**2.4`` at first, then nearly linearly:
    on the demo town it has gone 35-37% of the way at ``rho = 1/2``), so one or two
    interior trials usually suffice
    where bisection needed seven for the same accuracy.

    0 without a triangle target or for the uniform block sampler. The draws come from a
    generator seeded with the inputs' digest, so one release always gets the same
    ``rho`` (and it is computed once per process: the result is cached by digest).
    Post-processing: reads the inputs only.

    References
    ----------
    M. Dowell, P. Jarratt, "A modified regula falsi method for computing the root of an
    equation", BIT Numerical Mathematics 11, 168-174, 1971.
    """
    if inputs.sampler != "degree_corrected" or inputs.triangles is None:
        return 0.0
    key = inputs.digest()
    if key in _AFFINITY_CACHE:
        _AFFINITY_CACHE.move_to_end(key)
        return _AFFINITY_CACHE[key]
    from ..graph_counts import count_triangles

    rng = np.random.default_rng(int(key[:32], 16))
    n = int(inputs.sizes.sum())
    target = inputs.triangles

    def excess(rho):
        u, v = _draw(inputs, rho, rng)
        return count_triangles(u, v, n) - target

    rho = _false_position(excess, AFFINITY_TOLERANCE * target, AFFINITY_STEPS)
    _AFFINITY_CACHE[key] = rho
    while len(_AFFINITY_CACHE) > _CACHE_SIZE:
        _AFFINITY_CACHE.popitem(last=False)
    return rho


def _false_position(f, tolerance: float, steps: int) -> float:
    """A root of the increasing (noisy) ``f`` on ``[0, 1]`` by the Illinois method; the nearer end if none.

    Evaluates ``f(1/2)`` first (a root within tolerance there ends the search), then the end
    on the root's side: ``f(1)`` when ``f(1/2) < 0``, else ``f(0)`` (a root beyond that end
    returns the end). The bracket is then half of ``[0, 1]``, where the triangle count is
    closer to linear than over the whole interval, so the first false-position point lands
    nearer the root. Then at most ``steps`` interior points; stops at the first point with
    ``|f| <= tolerance``. Without one, returns the false-position point of the final bracket.
    """
    mid, f_mid = 0.5, f(0.5)
    if abs(f_mid) <= tolerance:
        return mid
    if f_mid < 0:
        lo, f_lo = mid, f_mid
        hi, f_hi = 1.0, f(1.0)
        if f_hi <= 0:
            return 1.0
    else:
        hi, f_hi = mid, f_mid
        lo, f_lo = 0.0, f(0.0)
        if f_lo >= 0:
            return 0.0
    return illinois(f, lo, f_lo, hi, f_hi, tolerance, steps)


def illinois(f, lo: float, f_lo: float, hi: float, f_hi: float, tolerance: float, steps: int) -> float:
    """The Illinois method on the bracket ``[lo, hi]`` (``f_lo < 0 < f_hi``): at most ``steps`` false-position
    points, stopping at the first with ``|f| <= tolerance``; else the false-position point of the final
    bracket (Dowell and Jarratt 1971: an end kept twice in a row has its value halved)."""
    kept = 0  # +1: the low end was kept last time, -1: the high end
    for _ in range(steps):
        mid = min(max(lo - f_lo * (hi - lo) / (f_hi - f_lo), lo), hi)
        f_mid = f(mid)
        if abs(f_mid) <= tolerance:
            return float(mid)
        if f_mid < 0:
            lo, f_lo = mid, f_mid
            if kept == -1:  # the high end stayed twice: halve its value (Illinois)
                f_hi /= 2.0
            kept = -1
        else:
            hi, f_hi = mid, f_mid
            if kept == 1:
                f_lo /= 2.0
            kept = 1
    return float(min(max(lo - f_lo * (hi - lo) / (f_hi - f_lo), lo), hi))


def draw_network(inputs: SynthesisInputs, rng, affinity: float | None = None):
    """One synthetic network ``(u, v)`` (``u < v``) from ``inputs``; ``affinity`` default :func:`fit_affinity`."""
    rho = fit_affinity(inputs) if affinity is None else float(affinity)
    return _draw(inputs, rho, rng)


def sample_network(release, seed=None, *, affinity: float | None = None) -> pa.Table:
    """Draw a synthetic contact network from a release.

    Every cell gets exactly its count of distinct contacts: the consistent estimate
    ``edge_count_estimate`` rounded without bias (older bundles: the clamped
    ``edge_count``). With the release's degree sequences, people get their
    supernode's estimated degrees (the degree-corrected sampler, with affinity blocks
    fitted to the released triangle count when there is one); otherwise contacts are
    uniform within each cell. See the module docstring.

    Sampling is post-processing of the public release: a seed costs no privacy.

    Parameters
    ----------
    release : Bundle or Release
    seed : int or numpy.random.Generator, optional
        ``None`` draws fresh entropy from the operating system.
    affinity : float, optional
        The affinity-block density ``rho`` in ``[0, 1]``; by default fitted to the
        release's triangle count (once per release and process).

    Returns
    -------
    pyarrow.Table
        ``source``, ``target`` (int64 person ids, ``source < target``); see
        :func:`synthetic_people` for the person -> supernode map. The schema metadata
        ``aggpub.sample`` names the sampler used and the affinity density.

    References
    ----------
    B. Karrer, M. E. J. Newman, Physical Review E 83, 016107, 2011.
    M. Hay, G. Miklau, D. Jensen, D. Towsley, P. Weis, PVLDB 1(1), 2008.
    """
    import pyarrow as pa

    from ..bundle.read import public_tables

    rng = make_generator(seed)
    inputs = inputs_from_release(release)
    manifest = public_tables(release)[2]
    rho = fit_affinity(inputs) if affinity is None else float(affinity)
    src, tgt = _draw(inputs, rho, rng)
    meta = {"synthetic": True, "people": int(inputs.sizes.sum()), "seed": seed if isinstance(seed, int) else None,
            "release_manifest_sha256": manifest.get("manifest_sha256"), "sampler": inputs.sampler,
            "affinity": rho if inputs.sampler == "degree_corrected" else None,
            "note": f"synthetic network sampled from a release ({inputs.sampler.replace('_', ' ')}); invented "
                    "people, not real contacts"}
    return pa.table({"source": np.asarray(src, dtype=np.int64), "target": np.asarray(tgt, dtype=np.int64)}) \
        .replace_schema_metadata({b"aggpub.sample": json.dumps(meta, sort_keys=True).encode()})


def synthetic_people(release) -> pa.Table:
    """Person ids of the synthetic networks and their supernodes.

    Person ids are dense: supernode ``s`` holds ids ``offset[s] .. offset[s] + size[s] - 1``
    with ``offset`` the running total of the released sizes. They number invented
    people; they have nothing to do with the ids of the real network.

    Returns
    -------
    pyarrow.Table
        ``person`` (int64) and ``supernode`` (int64).
    """
    import pyarrow as pa

    from ..bundle.read import public_tables

    sizes = _sizes(public_tables(release)[0])
    supernode = np.repeat(np.arange(len(sizes), dtype=np.int64), sizes)
    return pa.table({"person": np.arange(len(supernode), dtype=np.int64), "supernode": supernode})


def write_sample(table: pa.Table, out, *, overwrite: bool = False) -> Path:
    """Write a sampled network as Parquet atomically (temporary file beside the target, fsync, rename).

    Raises
    ------
    OutputError
        ``out`` exists (and ``overwrite`` is false), is a folder, or its folder is missing or not writable.
    """
    import pyarrow.parquet as pq

    from ..outputs import write_file

    return write_file(out, lambda tmp: pq.write_table(table, tmp), overwrite=overwrite, what="sample")
