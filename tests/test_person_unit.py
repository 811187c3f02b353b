"""Acceptance of issue 3 for privacy unit ``person`` with ``max_contacts = 30``.

A random network of 9,600 invented people in 240 public attribute cells, where
nobody has more than 30 contacts, is released under unit ``person``. The sizes
are noisy, the superedge noise has scale 30 / epsilon_share, and over the
28,920 cells of the superedge table the noise variance matches
2a/(1-a)^2, a = exp(-epsilon_share/30) (Ghosh, Roughgarden, Sundararajan,
"Universally utility-maximizing privacy mechanisms", STOC 2009), within
sampling error.

How the unclamped noise is obtained: the release runs with a fixed seed (a test
only path, marked non-private in its manifest). The noise is drawn again from a
fresh source with the same seed in the pipeline's order (the 240 fine-cell
counts, then the superedge cells). That this replay is the noise the release
used is checked on EVERY cell: ``clip(true + replay, 0, possible_pairs)`` must
equal the released count exactly. The variance test then uses the replayed,
unclamped noise, so clamping cannot bias it.

Tolerance: with n iid draws, the sample variance S^2 has standard error
sqrt((mu4 - sigma^4) / n) (mu4 the fourth central moment; e.g. Kendall and
Stuart, "The Advanced Theory of Statistics" -- recalled from memory). By the
central limit theorem the z-score (S^2 - sigma^2) / se is close to standard
normal for n = 28,920; we accept |z| < 4 (two-sided false-alarm probability
about 6e-5). sigma^2 and mu4 come from ``scipy.stats.dlaplace``, the reference
implementation of the discrete Laplace law. Power: the same statistic rejects
a scale 10% off and a sensitivity of D/2 (both asserted).
"""

from __future__ import annotations

import math

import numpy as np
import pyarrow as pa
import pytest
import scipy.stats as st

from aggpub import cells as comp
from aggpub.bundle.check import check_bundle
from aggpub.errors import PolicyError, PrivacyError
from aggpub.noise.mechanisms import GeometricMechanism
from aggpub.noise.sampler import make_random_source
from aggpub.pipeline import publish, release_tables

D = 30
SEED = 424242
N_AREAS, N_BANDS, PER_CELL = 20, 12, 40


def _capped_network(rng, n_people, cap):
    """Configuration-model contacts: person i gets k_i <= cap stubs, stubs paired at random.

    Self-pairs and repeated pairs are dropped, so every degree stays <= k_i <= cap.
    """
    k = rng.integers(0, cap + 1, n_people)
    stubs = rng.permutation(np.repeat(np.arange(n_people), k))
    stubs = stubs[: len(stubs) // 2 * 2].reshape(-1, 2)
    u, v = stubs.min(axis=1), stubs.max(axis=1)
    keep = u != v
    key = np.unique(u[keep].astype(np.int64) * n_people + v[keep])
    return key // n_people, key % n_people


def _town(seed=1):
    rng = np.random.default_rng(seed)
    areas = [f"area{i:02d}" for i in range(N_AREAS)]
    bands = [f"band{j:02d}" for j in range(N_BANDS)]
    n = N_AREAS * N_BANDS * PER_CELL
    area = np.repeat(np.arange(N_AREAS), N_BANDS * PER_CELL)
    band = np.tile(np.repeat(np.arange(N_BANDS), PER_CELL), N_AREAS)
    people = pa.table({"node": [f"p{i}" for i in range(n)],
                       "area": np.array(areas, dtype=object)[area],
                       "band": np.array(bands, dtype=object)[band]})
    u, v = _capped_network(rng, n, D)
    edges = pa.table({"source": [f"p{i}" for i in u], "target": [f"p{i}" for i in v]})
    policy = {
        "privacy": {"unit": "person", "epsilon": 2.0, "max_contacts": D},
        "grouping": {"method": "attributes", "attributes": ["area", "band"], "min_size": 10,
                     "hierarchies": {"area": {"levels": [{a: f"zone{i % 5}" for i, a in enumerate(areas)}]},
                                     "band": {"levels": [{b: f"wide{j // 3}" for j, b in enumerate(bands)}]}}},
        "components": {"supernode_sizes": {"share": 0.5}, "superedge_counts": {"share": 0.5}},
    }
    return edges, people, policy, np.bincount(np.r_[u, v], minlength=n)


@pytest.fixture(scope="module")
def released():
    edges, people, policy, degrees = _town()
    assert degrees.max() <= D
    release = release_tables(edges, people, policy, seed=SEED)
    return release, degrees


def _replayed_noise(release):
    """The noise of the seeded release, drawn again in the pipeline's order."""
    spends = {c["name"]: c for c in release.manifest["components"]}
    source = make_random_source(SEED)
    n_fine = N_AREAS * N_BANDS
    size_noise = GeometricMechanism(spends["supernode_sizes"]["epsilon"], 1.0).noise(n_fine, source)
    se = release.superedges
    edge_noise = GeometricMechanism(spends["superedge_counts"]["epsilon"], float(D)).noise(se.num_rows, source)
    return size_noise, edge_noise


def test_person_release_spends_and_scales(released):
    release, _ = released
    m = release.manifest
    assert m["privacy_unit"] == "person" and m["max_contacts"] == D and m["sizes_exact"] is False
    spends = {c["name"]: c for c in m["components"]}
    assert list(spends) == ["supernode_sizes", "superedge_counts"]  # ONE spend for the sizes
    eps_share = spends["superedge_counts"]["epsilon"]
    assert eps_share == pytest.approx(1.0)
    assert spends["superedge_counts"]["sensitivity"] == D
    assert spends["superedge_counts"]["scale"] == pytest.approx(D / eps_share)
    assert spends["supernode_sizes"]["sensitivity"] == 1
    assert spends["supernode_sizes"]["scale"] == pytest.approx(1 / spends["supernode_sizes"]["epsilon"])
    assert sum(c["epsilon"] for c in m["components"]) <= m["epsilon_total"]
    assert sum(c["epsilon"] for c in m["components"]) == pytest.approx(m["epsilon_total"], rel=1e-12)
    assert release.superedges.num_rows >= 20_000
    assert np.allclose(release.superedges.column("noise_scale").to_numpy(), D / eps_share, rtol=1e-12)


def test_person_sizes_are_noisy_sums_of_noisy_cells(released):
    release, _ = released
    released_sizes = release.supernodes.column("size").to_numpy()
    true_sizes = release.truth["sizes"]
    assert (released_sizes != true_sizes).mean() > 0.3  # noise scale 1: most sizes moved
    size_noise, _ = _replayed_noise(release)
    # every fine cell is its own supernode here (40 people each, min_size 10), in domain order
    assert release.grouping.n_supernodes == N_AREAS * N_BANDS
    assert np.array_equal(released_sizes, np.maximum(true_sizes + size_noise, 0))


def test_unclamped_noise_variance_matches_discrete_laplace(released):
    release, _ = released
    se = release.superedges
    truth = release.truth["superedges"].count
    _, z = _replayed_noise(release)
    cap = se.column("possible_pairs").to_numpy()
    # the replay is the release's noise: on every cell, clamping true + replay gives the released count
    assert np.array_equal(np.clip(truth + z, 0, cap), se.column("edge_count").to_numpy())
    # the caps come from the released (noisy) sizes, not the true ones
    sizes = release.supernodes.column("size").to_numpy()
    assert np.array_equal(cap, comp.possible_pairs(sizes, se.column("supernode_a").to_numpy(),
                                                   se.column("supernode_b").to_numpy()))

    eps_share = [c for c in release.manifest["components"] if c["name"] == "superedge_counts"][0]["epsilon"]
    a = math.exp(-eps_share / D)
    ref = st.dlaplace(eps_share / D)  # scipy's discrete Laplace: pmf tanh(a/2) exp(-a|k|)
    sigma2 = 2 * a / (1 - a) ** 2
    assert ref.var() == pytest.approx(sigma2, rel=1e-9)
    assert GeometricMechanism(eps_share, D).variance() == pytest.approx(sigma2, rel=1e-9)
    mu4 = ref.moment(4)
    n = len(z)
    s2 = float(np.var(z, ddof=1))

    def zscore(var):
        return (s2 - var) / math.sqrt((mu4 - sigma2 ** 2) / n)

    assert abs(zscore(sigma2)) < 4, (s2, sigma2)
    assert abs(float(z.mean())) < 4 * math.sqrt(sigma2 / n)
    # power: the same test rejects a 10% larger or smaller scale and the sensitivity D/2
    for wrong_scale in (1.1 * D / eps_share, 0.9 * D / eps_share, D / 2 / eps_share):
        b = math.exp(-1 / wrong_scale)
        assert abs(zscore(2 * b / (1 - b) ** 2)) > 4


def test_person_bundle_passes_check(released, tmp_path):
    release, _ = released
    path = publish(release, tmp_path / "bundle")
    result = check_bundle(path)
    assert result.ok, result.problems
    assert any("noisy sizes" in c for c in result.checked)


def test_contacts_above_the_cap_are_refused_not_truncated():
    edges, people, policy, degrees = _town(seed=2)
    # give three people 31 contacts each
    src = [f"p{i}" for i in (0, 1, 2) for _ in range(D + 1)]
    dst = [f"p{100 + 40 * i + j}" for i in (0, 1, 2) for j in range(D + 1)]
    extra = pa.table({"source": src, "target": dst})
    over = pa.concat_tables([edges, extra])
    with pytest.raises(PrivacyError, match=r"max_contacts' = 30: the input breaks the promised cap") as err:
        release_tables(over, people, policy, seed=1)
    msg = str(err.value)
    assert "p0" not in msg and "3 " not in msg and "person(s)" not in msg  # no private figure
    assert "public facts" in msg and "charged" in msg


def test_person_grouping_needs_a_public_domain():
    edges, people, policy, _ = _town()
    del policy["grouping"]["hierarchies"]["band"]
    with pytest.raises(PolicyError, match="grouping.hierarchies.band"):
        release_tables(edges, people, policy, seed=1)
    edges, people, policy, _ = _town()
    lv = policy["grouping"]["hierarchies"]["area"]["levels"][0]
    lv.pop("area03")
    with pytest.raises(PolicyError, match=r"levels\[0\]' does not list every value of attribute 'area'") as err:
        release_tables(edges, people, policy, seed=1)
    assert "480" not in str(err.value) and "codebook" in str(err.value)  # no private figure; a public source


def test_person_guide_says_sizes_are_noisy(released):
    release, _ = released
    card = release.guide()
    assert "Sizes are noisy" in card and "supernode_sizes" in card
    assert "| superedge_counts | 1 | 30 | discrete_laplace | 30 |" in card
