"""Statistical verification of the discrete Laplace sampler and GeometricMechanism.

Every check names, beside it, where its expected value comes from.

Sources used below:

* [GRS09] A. Ghosh, T. Roughgarden, M. Sundararajan, "Universally
  utility-maximizing privacy mechanisms", STOC 2009 -- the pmf
  P(Z=z) = (1-a)/(1+a) a^|z|, a = exp(-epsilon/sensitivity).
* [DPL] diffprivlib 0.6.6, ``diffprivlib/mechanisms/geometric.py`` (read in the
  installed package): ``Geometric._scale = -epsilon/sensitivity`` and
  ``randomise`` inverts the two-sided geometric cdf with ratio
  ``exp(-epsilon/sensitivity)`` -- the same law as [GRS09].
* [SCIPY] ``scipy.stats.chisquare`` (one-sample goodness of fit) and
  ``scipy.stats.chi2_contingency`` (homogeneity of two samples).
* [COCHRAN] the usual rule that chi-square cells need expected counts of at
  least 5: W. G. Cochran, "Some methods for strengthening the common chi-square
  tests", Biometrics, 1954 (citation recalled from memory).
* [CKS20] C. L. Canonne, G. Kamath, T. Steinke, "The Discrete Gaussian for
  Differential Privacy", NeurIPS 2020 -- Algorithm 1 (Bernoulli(exp(-gamma))
  for rational gamma, expected to succeed with probability exactly
  exp(-gamma)) and Algorithm 2 (discrete Laplace by a geometric, a sign and a
  rejection).
* [DEC] Python's ``decimal`` module: ``Decimal.exp`` is correctly rounded
  (documented in the Python library reference), used as an independent
  high-precision value of exp(-x).
* [BINOM] ``scipy.stats.binomtest``: exact binomial test.
* [MOM] moments derived here from sum_{k>=1} k^2 a^k = a(1+a)/(1-a)^3 and
  sum_{k>=1} k^4 a^k = a(1+11a+11a^2+a^3)/(1-a)^5 (Eulerian-number series,
  recalled from memory and re-checked numerically in ``test_moment_formulas``);
  Var(mean of X^2) = (mu4 - sigma^4)/n for a mean-zero variable is the
  textbook variance of a sample mean.

Seeded sources make every statistical test here deterministic; the thresholds
(1e-3 for seeded runs, 1e-4 for the one run on the operating system's entropy)
are the significance levels at which a correct sampler would fail by chance.
"""

from __future__ import annotations

import math
import os

import numpy as np
import pytest
import scipy.stats as st
from hypothesis import given, settings
from hypothesis import strategies as hs

from aggpub.noise.mechanisms import GeometricMechanism
from fractions import Fraction

from aggpub.noise import sampler as smp
from aggpub.noise.sampler import (
    MIN_RATE,
    RandomSource,
    SeededRandomSource,
    SystemRandomSource,
    _bits_to_open_unit,
    dyadic_rate,
    make_random_source,
    sample_discrete_laplace,
    sample_discrete_laplace_exact,
)

SEEDED_LEVEL = 1e-3
SYSTEM_LEVEL = 1e-4
N_GOF = 200_000
PAIRS = [(1.0, 1.0), (0.5, 2.0), (2.0, 3.0)]  # (epsilon, sensitivity): a = 0.368, 0.779, 0.513


# ----------------------------------------------------------------- helpers
def alpha_of(epsilon: float, sensitivity: float) -> float:
    return math.exp(-epsilon / sensitivity)  # [GRS09]


def dl_pmf(z, a: float) -> np.ndarray:
    """Discrete Laplace pmf written independently of the package code [GRS09]."""
    z = np.abs(np.asarray(z, dtype=np.float64))
    return (1.0 - a) / (1.0 + a) * a ** z


def pooled_cells(a: float, n: int, min_expected: float = 5.0):
    """Cells -T-1 (pooled left tail), -T..T, T+1 (pooled right tail).

    T is the largest value with n * pmf(T) >= min_expected and a pooled
    one-sided tail P(Z > T) = a^(T+1)/(1+a) [GRS09] with n * tail >= min_expected
    [COCHRAN].  Returns (T, probabilities of the 2T+3 cells).
    """
    t = 0
    while n * dl_pmf(t + 1, a) >= min_expected and n * a ** (t + 2) / (1 + a) >= min_expected:
        t += 1
    tail = a ** (t + 1) / (1.0 + a)
    probs = np.concatenate([[tail], dl_pmf(np.arange(-t, t + 1), a), [tail]])
    assert abs(probs.sum() - 1.0) < 1e-12
    return t, probs


def cell_counts(x: np.ndarray, t: int) -> np.ndarray:
    return np.bincount(np.clip(x, -t - 1, t + 1) + t + 1, minlength=2 * t + 3)


def gof(x: np.ndarray, a: float):
    """One-sample chi-square of integer draws against the discrete Laplace(a) pmf [SCIPY]."""
    t, probs = pooled_cells(a, x.size)
    res = st.chisquare(cell_counts(x, t), probs * x.size)
    return res.statistic, res.pvalue, 2 * t + 3


def homogeneity(x: np.ndarray, y: np.ndarray, a: float):
    """Two-sample chi-square (contingency table) on cells pooled for the smaller sample [SCIPY]."""
    t, _ = pooled_cells(a, min(x.size, y.size), min_expected=10.0)  # realised column totals stay >= 5
    table = np.vstack([cell_counts(x, t), cell_counts(y, t)])
    res = st.chi2_contingency(table)
    assert res.expected_freq.min() >= 5.0  # [COCHRAN]
    return res.statistic, res.pvalue, res.dof


def dl_fourth_moment(a: float) -> float:
    # E[Z^4] = 2 (1-a)/(1+a) * a(1+11a+11a^2+a^3)/(1-a)^5  [MOM]
    return 2.0 * a * (1 + 11 * a + 11 * a * a + a ** 3) / ((1 + a) * (1 - a) ** 4)


def diffprivlib_draws(epsilon: float, n: int, seed: int) -> np.ndarray:
    from diffprivlib.mechanisms import Geometric

    # 0.6.6 signature: Geometric(*, epsilon, sensitivity=1, random_state=None);
    # an int random_state seeds a numpy RandomState [DPL].
    mech = Geometric(epsilon=epsilon, sensitivity=1, random_state=seed)
    return np.fromiter((mech.randomise(0) for _ in range(n)), dtype=np.int64, count=n)


# ------------------------------------------------------------- dependencies
def test_diffprivlib_imports():
    # Guards the scikit-learn < 1.9 pin: diffprivlib 0.6.6 imports scikit-learn
    # internals and these imports fail with an incompatible release [DPL].
    from diffprivlib.accountant import BudgetAccountant
    from diffprivlib.mechanisms import Geometric

    acc = BudgetAccountant(epsilon=1.0)
    assert acc.epsilon == 1.0
    assert Geometric(epsilon=1.0, sensitivity=1, random_state=0).randomise(0) in range(-1000, 1000)


# ------------------------------------------------------------ random sources
def test_system_source_open_interval_and_fresh():
    src = SystemRandomSource()
    u = src.uniform(100_000)
    assert u.dtype == np.float64 and u.shape == (100_000,)
    assert np.all(u > 0.0) and np.all(u < 1.0)
    v = src.uniform(100_000)
    assert not np.array_equal(u, v)  # collision chance ~ 2^-(52*100000)
    assert src.seeded is False
    assert "os.urandom" in src.description
    assert src.uniform(0).shape == (0,)
    # Mean of 10^5 uniforms: sd = sqrt(1/12/1e5) ~ 9.1e-4; 6 sd bound (flake rate ~2e-9).
    assert abs(u.mean() - 0.5) < 6 * math.sqrt(1 / 12 / u.size)


def test_bit_conversion_extremes_stay_open():
    # The extreme 64-bit words must map strictly inside (0, 1).  Design note in
    # sampler.py: with 53 bits, (2^53 - 1 + 0.5) * 2^-53 rounds to exactly 1.0 in
    # binary64, hence 52 bits are used.
    top = np.array([0, 2 ** 64 - 1, 2 ** 63], dtype=np.uint64)
    u = _bits_to_open_unit(top)
    assert u[0] == 2.0 ** -53
    assert u[1] == 1.0 - 2.0 ** -53
    assert u[2] == 0.5 + 2.0 ** -53
    assert np.all((u > 0) & (u < 1))
    # The grid is symmetric: 1 - u is exact and lands on the grid.
    assert 1.0 - u[0] == u[1] and 1.0 - u[1] == u[0]


def test_seeded_source_reproducible():
    a = SeededRandomSource(1234).uniform(1000)
    b = SeededRandomSource(1234).uniform(1000)
    c = SeededRandomSource(1235).uniform(1000)
    assert np.array_equal(a, b)
    assert not np.array_equal(a, c)
    assert np.all((a > 0) & (a < 1))
    src = SeededRandomSource(7)
    assert src.seeded is True and "7" in src.description
    assert np.array_equal(
        sample_discrete_laplace(0.5, 1000, SeededRandomSource(9)),
        sample_discrete_laplace(0.5, 1000, SeededRandomSource(9)),
    )


def test_make_random_source_never_reads_environment(monkeypatch):
    class NoEnv(dict):
        def _refuse(self, *args, **kwargs):
            raise AssertionError("the environment was read")

        __getitem__ = get = __contains__ = keys = items = _refuse

    monkeypatch.setattr(os, "environ", NoEnv())
    monkeypatch.setattr(os, "getenv", lambda *a, **k: (_ for _ in ()).throw(AssertionError("getenv")))
    src = make_random_source(None)
    assert isinstance(src, SystemRandomSource) and not src.seeded
    assert src.uniform(3).shape == (3,)
    seeded = make_random_source(42)
    assert isinstance(seeded, SeededRandomSource) and seeded.seeded
    assert isinstance(src, RandomSource)


def test_source_argument_validation():
    with pytest.raises(ValueError, match="seed"):
        SeededRandomSource(-1)
    with pytest.raises(TypeError, match="seed"):
        SeededRandomSource(1.5)
    with pytest.raises(ValueError, match="n"):
        SystemRandomSource().uniform(-1)


# ------------------------------------------------------- sampler validation
@pytest.mark.parametrize("bad", [0.0, 1.0, -0.1, 1.5, float("nan"), float("inf")])
def test_sampler_rejects_bad_alpha(bad):
    with pytest.raises(ValueError, match="alpha"):
        sample_discrete_laplace(bad, 10, SeededRandomSource(0))


def test_sampler_shapes_extremes_and_chunks():
    src = SeededRandomSource(3)
    assert sample_discrete_laplace(0.5, 0, src).shape == (0,)
    x = sample_discrete_laplace(0.5, 1001, src, chunk_size=7)
    assert x.dtype == np.int64 and x.shape == (1001,)
    assert np.array_equal(
        sample_discrete_laplace(0.5, 1001, SeededRandomSource(4), chunk_size=7),
        sample_discrete_laplace(0.5, 1001, SeededRandomSource(4), chunk_size=7),
    )
    # a close to 0: P(Z != 0) = 2a/(1+a) ~ 2e-300, so all zeros.
    assert not sample_discrete_laplace(1e-300, 10_000, src).any()
    # a one ulp below 1: huge but finite int64 draws, no overflow / wrap-around.
    big = sample_discrete_laplace(np.nextafter(1.0, 0.0), 10_000, src)
    assert big.dtype == np.int64 and np.abs(big).max() < 2 ** 61
    with pytest.raises(ValueError, match="size"):
        sample_discrete_laplace(0.5, -1, src)
    with pytest.raises(TypeError, match="source"):
        sample_discrete_laplace(0.5, 3, np.random.default_rng(0))


# ----------------------------------------------------- goodness of fit [GRS09]
@pytest.mark.parametrize("epsilon,sensitivity", PAIRS)
def test_gof_seeded(epsilon, sensitivity):
    a = alpha_of(epsilon, sensitivity)
    x = sample_discrete_laplace(a, N_GOF, SeededRandomSource(20240 + int(10 * epsilon)))
    stat, p, cells = gof(x, a)  # [SCIPY] chisquare vs [GRS09] pmf, tails pooled [COCHRAN]
    print(f"GOF seeded eps={epsilon} sens={sensitivity} a={a:.4f}: chi2={stat:.2f} cells={cells} p={p:.4f}")
    assert p > SEEDED_LEVEL


def test_gof_system_source():
    a = alpha_of(1.0, 1.0)
    x = GeometricMechanism(1.0, 1.0).noise(N_GOF, SystemRandomSource())
    stat, p, cells = gof(x, a)  # [SCIPY] vs [GRS09]; level 1e-4 so a correct sampler fails 1 run in 10^4
    print(f"GOF system eps=1 sens=1: chi2={stat:.2f} cells={cells} p={p:.4f}")
    assert p > SYSTEM_LEVEL


@pytest.mark.parametrize("factor", [1.3, 0.7])
@pytest.mark.parametrize("epsilon,sensitivity", PAIRS[:2])
def test_gof_has_power_against_wrong_scale(epsilon, sensitivity, factor):
    # The same test, same sample size, on draws whose scale sensitivity/epsilon
    # is 30 % too large / too small must reject at the same level.
    a = alpha_of(epsilon, sensitivity)
    wrong = math.exp(-1.0 / (factor * sensitivity / epsilon))
    x = sample_discrete_laplace(wrong, N_GOF, SeededRandomSource(77))
    stat, p, cells = gof(x, a)
    print(f"POWER eps={epsilon} sens={sensitivity} scale x{factor}: chi2={stat:.1f} cells={cells} p={p:.3g}")
    assert p < SEEDED_LEVEL


# ------------------------------------------------ agreement with diffprivlib
def test_diffprivlib_parametrisation_matches():
    from diffprivlib.mechanisms import Geometric

    for eps in (0.3, 1.0, 2.5):
        ref = Geometric(epsilon=eps, sensitivity=1)
        ours = GeometricMechanism(eps, 1)
        assert ref._scale == pytest.approx(ours.log_alpha, rel=1e-15)  # [DPL]: _scale = -eps/sens
        assert ref.variance(0) == pytest.approx(ours.variance(), rel=1e-12)  # [DPL] vs 2a/(1-a)^2 [MOM]


@pytest.mark.parametrize("epsilon", [1.0, 0.5])
def test_agrees_with_diffprivlib(epsilon):
    a = alpha_of(epsilon, 1.0)
    ref = diffprivlib_draws(epsilon, 20_000, seed=11)          # reference law [DPL]
    ours = GeometricMechanism(epsilon, 1.0).noise(20_000, SeededRandomSource(12))
    stat, p, dof = homogeneity(ref, ours, a)                   # [SCIPY] chi2_contingency
    s_ref, p_ref, _ = gof(ref, a)                              # reference itself fits [GRS09]
    print(f"DPL eps={epsilon}: two-sample chi2={stat:.2f} dof={dof} p={p:.4f}; "
          f"diffprivlib vs pmf chi2={s_ref:.2f} p={p_ref:.4f}")
    assert p > SEEDED_LEVEL
    assert p_ref > SEEDED_LEVEL
    # Power of the same two-sample test against a 30 % larger scale.
    off = sample_discrete_laplace(math.exp(-epsilon / 1.3), 20_000, SeededRandomSource(13))
    _, p_off, _ = homogeneity(ref, off, a)
    print(f"DPL eps={epsilon}: two-sample vs scale x1.3 p={p_off:.3g}")
    assert p_off < SEEDED_LEVEL


# ----------------------------------------------------------------- moments
def test_moment_formulas():
    # Closed forms [MOM] against direct summation of the [GRS09] pmf.
    for a in (0.1, 0.5, 0.9):
        z = np.arange(-3000, 3001, dtype=np.float64)
        p = dl_pmf(z, a)
        assert p.sum() == pytest.approx(1.0, rel=1e-12)
        assert (p * z ** 2).sum() == pytest.approx(2 * a / (1 - a) ** 2, rel=1e-12)
        assert (p * z ** 4).sum() == pytest.approx(dl_fourth_moment(a), rel=1e-12)
        mech = GeometricMechanism(-math.log(a), 1.0)
        assert mech.variance() == pytest.approx(2 * a / (1 - a) ** 2, rel=1e-12)
        assert np.allclose(mech.pmf(z[2990:3011]), p[2990:3011], rtol=1e-12)
        assert mech.pmf(0.5) == 0.0


@pytest.mark.parametrize("epsilon,sensitivity", PAIRS[:2])
def test_sample_variance(epsilon, sensitivity):
    mech = GeometricMechanism(epsilon, sensitivity)
    a = mech.alpha
    n = 1_000_000
    x = mech.noise(n, SeededRandomSource(2024)).astype(np.float64)
    sigma2 = 2 * a / (1 - a) ** 2                              # [MOM]
    se = math.sqrt((dl_fourth_moment(a) - sigma2 ** 2) / n)    # [MOM] sd of mean of X^2
    m2 = float(np.mean(x * x))
    z = (m2 - sigma2) / se
    z_mean = float(x.mean()) / math.sqrt(sigma2 / n)
    print(f"VAR eps={epsilon} sens={sensitivity}: sample={m2:.4f} theory={sigma2:.4f} "
          f"se={se:.4f} z={z:.2f}; mean z={z_mean:.2f}")
    assert abs(z) < 4.0
    assert abs(z_mean) < 4.0
    assert abs(np.var(x, ddof=1) - sigma2) < 4.5 * se


# -------------------------------------------------------- interval width
@pytest.mark.parametrize("epsilon,sensitivity,confidence",
                         [(1.0, 1.0, 0.95), (0.5, 2.0, 0.95), (0.1, 1.0, 0.9), (5.0, 1.0, 0.95), (1.0, 1.0, 0.999)])
def test_interval_half_width(epsilon, sensitivity, confidence):
    mech = GeometricMechanism(epsilon, sensitivity)
    a = mech.alpha
    t = mech.interval_half_width(confidence)
    exact = lambda k: float(dl_pmf(np.arange(-k, k + 1), a).sum())  # [GRS09] pmf summed
    assert exact(t) >= confidence - 1e-12 and mech.cdf_abs(t) >= confidence
    if t > 0:
        assert exact(t - 1) < confidence and mech.cdf_abs(t - 1) < confidence
    assert mech.cdf_abs(t) == pytest.approx(exact(t), abs=1e-12)
    assert mech.cdf_abs(t) == pytest.approx(1 - 2 * a ** (t + 1) / (1 + a), rel=1e-14)  # closed form
    n = 1_000_000
    x = mech.noise(n, SeededRandomSource(555))
    cover = float(np.mean(np.abs(x) <= t))
    se = math.sqrt(exact(t) * (1 - exact(t)) / n)               # binomial sd
    print(f"INTERVAL eps={epsilon} sens={sensitivity} c={confidence}: t={t} "
          f"P(|Z|<=t)={exact(t):.5f} P(|Z|<=t-1)={exact(t - 1) if t else float('nan'):.5f} "
          f"empirical={cover:.5f}")
    assert abs(cover - exact(t)) < 4 * se


@settings(max_examples=150, deadline=None)
@given(eps=hs.floats(1e-3, 50.0), sens=hs.floats(0.1, 20.0), conf=hs.floats(0.01, 0.9999))
def test_interval_half_width_is_minimal(eps, sens, conf):
    mech = GeometricMechanism(eps, sens)
    t = mech.interval_half_width(conf)
    assert isinstance(t, int) and t >= 0
    assert mech.cdf_abs(t) >= conf
    if t > 0:
        assert mech.cdf_abs(t - 1) < conf


# ------------------------------------------------------ mechanism object
@pytest.mark.parametrize("field,kwargs", [
    ("epsilon", dict(epsilon=0.0, sensitivity=1.0)),
    ("epsilon", dict(epsilon=-1.0, sensitivity=1.0)),
    ("epsilon", dict(epsilon=float("inf"), sensitivity=1.0)),
    ("epsilon", dict(epsilon=float("nan"), sensitivity=1.0)),
    ("epsilon", dict(epsilon="1", sensitivity=1.0)),
    ("sensitivity", dict(epsilon=1.0, sensitivity=0.0)),
    ("sensitivity", dict(epsilon=1.0, sensitivity=float("inf"))),
    ("sensitivity", dict(epsilon=1.0, sensitivity=-2)),
])
def test_mechanism_validation_names_parameter_and_value(field, kwargs):
    with pytest.raises(ValueError) as info:
        GeometricMechanism(**kwargs)
    msg = str(info.value)
    assert f"'{field}'" in msg and repr(kwargs[field]) in msg


def test_mechanism_properties_and_randomise():
    mech = GeometricMechanism(0.5, 2)
    assert mech.name == "discrete_laplace"
    assert mech.alpha == pytest.approx(math.exp(-0.25))
    assert mech.scale == 4.0
    assert isinstance(mech.sensitivity, float)
    with pytest.raises(Exception):
        mech.epsilon = 2.0  # frozen
    values = np.array([[0, 5, 10], [100, 7, 3]])
    out = mech.randomise(values, SeededRandomSource(8))
    noise = mech.noise(values.size, SeededRandomSource(8)).reshape(values.shape)
    assert out.dtype == np.int64 and out.shape == values.shape
    assert np.array_equal(out, values + noise)
    assert mech.randomise(np.array([1.0, 2.0]), SeededRandomSource(1)).dtype == np.int64
    with pytest.raises(ValueError, match="values"):
        mech.randomise(np.array([1.5]), SeededRandomSource(1))
    with pytest.raises(OverflowError):
        mech.randomise(np.array([np.iinfo(np.int64).max] * 50), SeededRandomSource(1))
    assert mech.noise((2, 3), SeededRandomSource(1)).shape == (2, 3)
    with pytest.raises(ValueError, match="confidence"):
        mech.interval_half_width(1.0)
    # Huge epsilon: alpha underflows to 0 but sampling goes through log(alpha).
    sharp = GeometricMechanism(1e4, 1.0)
    assert sharp.alpha == 0.0 and sharp.variance() == 0.0
    assert not sharp.noise(1000, SeededRandomSource(1)).any()


# ====================================================================== exact sampler [CKS20]
class _PrefixSource(SeededRandomSource):
    """Seeded bytes, except that the first bytes ever handed out are a fixed prefix (white-box tests)."""

    def __init__(self, seed, prefix: bytes):
        super().__init__(seed)
        self._prefix = np.frombuffer(prefix, dtype=np.uint8)

    def random_bytes(self, n):
        head, self._prefix = self._prefix[:n], self._prefix[n:]
        return np.concatenate([head, super().random_bytes(n - head.size)])


def _stream(seed: int, hint: int = 1 << 16):
    return smp.ByteStream(SeededRandomSource(seed), hint)


def test_random_bytes_are_uniform_on_both_sources():
    # [SCIPY] chi-square of 2**20 bytes against the uniform law on 0..255.
    for src, level in ((SeededRandomSource(5), SEEDED_LEVEL), (SystemRandomSource(), SYSTEM_LEVEL)):
        b = src.random_bytes(1 << 20)
        assert b.dtype == np.uint8 and b.shape == (1 << 20,)
        assert st.chisquare(np.bincount(b, minlength=256)).pvalue > level
    assert SeededRandomSource(5).random_bytes(0).shape == (0,)
    assert np.array_equal(SeededRandomSource(6).random_bytes(100), SeededRandomSource(6).random_bytes(100))


class _UniformOnly(RandomSource):
    """A source that only implements uniform(), as wrappers do: bytes come from the default path."""

    def __init__(self, inner):
        self.inner, self.calls = inner, 0

    def uniform(self, n):
        self.calls += 1
        return self.inner.uniform(n)

    seeded = property(lambda self: True)
    description = property(lambda self: "test wrapper")


def test_default_random_bytes_come_from_uniform_and_are_uniform():
    wrapped = _UniformOnly(SeededRandomSource(8))
    b = wrapped.random_bytes(600_000)
    assert wrapped.calls == 1 and b.shape == (600_000,)
    assert st.chisquare(np.bincount(b, minlength=256)).pvalue > SEEDED_LEVEL  # [SCIPY]
    # Off-grid uniforms (e.g. numpy's 53-bit random()) cannot give exact bytes: refused, not guessed.
    class OffGrid(_UniformOnly):
        def uniform(self, n):
            return np.random.default_rng(0).random(n)
    with pytest.raises(RuntimeError, match="grid"):
        OffGrid(None).random_bytes(10)


def test_charge_on_first_draw_runs_before_exact_noise():
    # The release pipeline wraps its source in ChargeOnFirstDraw, which forwards uniform() and
    # random_bytes(): the exact sampler must go through it, after the charge.
    from aggpub.budget.ledger import ChargeOnFirstDraw

    events = []

    class Src(SeededRandomSource):
        def uniform(self, n):
            events.append("draw")
            return super().uniform(n)

        def random_bytes(self, n):
            events.append("draw")
            return super().random_bytes(n)

    guarded = ChargeOnFirstDraw(Src(3), lambda: events.append("charge"))
    x = GeometricMechanism(1.0, 1.0).noise(50_000, guarded)
    assert events[0] == "charge" and events.count("charge") == 1 and "draw" in events
    stat, p, cells = gof(x, alpha_of(1.0, 1.0))  # [SCIPY] vs [GRS09]
    assert p > SEEDED_LEVEL


@pytest.mark.parametrize("upper", [3, 10, 255, 256, 1000, 2 ** 32 + 5, 3 * 2 ** 61])
def test_integers_are_uniform_without_modulo_bias(upper):
    src = SeededRandomSource(upper % 1000)
    x = src.integers(upper, 120_000)
    assert x.min() >= 0 and int(x.max()) < upper
    # Thirds of the range [SCIPY], expected counts from the number of integers in each third. For
    # upper = 3 * 2**61 a plain "word mod upper" would put 3/8 (not 1/3) of the mass in the first
    # third (values below 2**64 - 2 * upper have 3 preimages, the others 2); the same test rejects it.
    def third_counts(v):
        return np.bincount(np.minimum((v.astype(np.float64) * 3 / upper).astype(np.int64), 2), minlength=3)

    edges = [-(-j * upper // 3) for j in range(4)]
    probs = np.diff(edges) / upper
    assert st.chisquare(third_counts(x), probs * x.size).pvalue > SEEDED_LEVEL
    if upper <= 1000:
        assert st.chisquare(np.bincount(x, minlength=upper)).pvalue > SEEDED_LEVEL
    if upper == 3 * 2 ** 61:
        naive = SeededRandomSource(1).random_bytes(8 * 120_000).view("<u8") % np.uint64(upper)
        assert st.chisquare(third_counts(naive), probs * x.size).pvalue < 1e-10


def test_integers_with_per_draw_bounds_and_validation():
    src = SeededRandomSource(2)
    bounds = np.array([1, 2, 7, 2 ** 40, 2 ** 63] * 20_000, dtype=np.uint64)
    x = src.integers(bounds)
    assert x.dtype == np.uint64 and np.all(x < bounds)
    assert np.all(x[bounds == 1] == 0)
    for b in (2, 7):
        assert st.chisquare(np.bincount(x[bounds == b].astype(np.int64), minlength=b)).pvalue > SEEDED_LEVEL
    with pytest.raises(ValueError):
        src.integers(0)
    with pytest.raises(ValueError):
        src.integers(2 ** 63 + 1)


# ------------------------------------------------------------------ rates
def test_dyadic_rate_is_exact_for_dyadics_and_the_largest_below_otherwise():
    assert dyadic_rate(1) == (1, 0)
    assert dyadic_rate(0.25) == (1, 2)
    assert dyadic_rate(0.1) == (Fraction(0.1).numerator, 55)          # a float is an exact dyadic
    for x in (Fraction(1, 3), Fraction(0.1) / 100, Fraction(7, 10) / Fraction(2.3), Fraction(10 ** 6, 7)):
        s, k = dyadic_rate(x)
        assert 0 <= k <= 62 and 1 <= s <= 2 ** 62
        y = Fraction(s, 2 ** k)
        assert y <= x                                                  # never more epsilon than stated
        # largest with k <= 62: the next multiple of 2**-62 is above x (or s would exceed 2**62)
        assert Fraction(s * 2 ** (62 - k) + 1, 2 ** 62) > x or s * 2 ** (62 - k) + 1 > 2 ** 62
        assert (x - y) / x < 2.0 ** -52
    assert dyadic_rate(2.0 ** 70) == (2 ** 62, 0)
    assert dyadic_rate(MIN_RATE) == (1, 54)
    with pytest.raises(ValueError, match="too large"):
        dyadic_rate(MIN_RATE / 2)
    with pytest.raises(ValueError):
        dyadic_rate(0)


def test_mechanism_records_the_rate_it_samples():
    exact = GeometricMechanism(0.1, 1.0)
    assert exact.rate == Fraction(0.1) and exact.rate_is_exact and exact.effective_epsilon == 0.1
    assert GeometricMechanism(0.1, 4.0).rate_is_exact and GeometricMechanism(1.0, 2.0).rate == Fraction(1, 2)
    approx = GeometricMechanism(0.1, 100.0)          # 0.1 / 100 has denominator 2**57 * 25
    assert not approx.rate_is_exact
    assert approx.rate < Fraction(0.1) / 100
    assert Fraction(approx.effective_epsilon) <= approx.rate * 100 < Fraction(0.1)  # rounded down
    assert 0.1 - approx.effective_epsilon < 1e-16
    with pytest.raises(ValueError, match="too large"):
        GeometricMechanism(1e-9, 1e9)


# --------------------------------------------------------- Bernoulli(exp(-gamma)) [CKS20]
@pytest.mark.parametrize("c,k", [(0, 0), (3, 3), (1, 0), (5, 2), (5, 1), (7, 0), (43, 2),
                                 (Fraction(0.1).numerator, 55), (2 ** 62 - 1, 62)])
def test_bernoulli_exp_matches_exp(c, k):
    # Bernoulli(exp(-gamma)), gamma = c / 2**k in {0, 3/8, 1, 5/4, 5/2, 7, 10.75, 0.1, ~1}: the
    # frequency of 1 must pass an exact binomial test [BINOM] against exp(-gamma) [CKS20].
    n = 300_000
    gamma = Fraction(c, 2 ** k)
    x = smp._bern_exp(_stream(c % 997 + k), c, k, n)
    p_true = math.exp(-float(gamma))
    if c == 0:
        assert x.all()
        return
    assert st.binomtest(int(x.sum()), n, p_true).pvalue > SEEDED_LEVEL
    if gamma <= 1:  # per-draw numerators (array path) on the same law
        y = smp._bern_exp_unit(_stream(k + 1), np.full(n, c, dtype=np.uint64), k)
        assert st.binomtest(int(y.sum()), n, p_true).pvalue > SEEDED_LEVEL
    # power: the same test rejects a law 5 % off in gamma when exp(-gamma) is not tiny
    if p_true > 1e-3:
        assert st.binomtest(int(x.sum()), n, math.exp(-1.05 * float(gamma))).pvalue < SEEDED_LEVEL


def test_bernoulli_dyadic_and_first_factorial_failure():
    n = 400_000
    for c, k in ((1, 1), (3, 3), (200, 8), (Fraction(0.1).numerator, 55)):
        x = smp._bern_dyadic(_stream(c % 101), np.full(n, c, dtype=np.uint64), k)
        assert st.binomtest(int(x.sum()), n, c / 2 ** k).pvalue > SEEDED_LEVEL  # [BINOM]
    # K1 = first failure among Bernoulli(1/1), Bernoulli(1/2), ...: P(K1 > j) = 1/j!
    k1 = smp._first_factorial_failure(_stream(3), n)
    assert k1.min() >= 2
    for j in (2, 3, 4, 5):
        assert st.binomtest(int((k1 > j).sum()), n, 1 / math.factorial(j)).pvalue > SEEDED_LEVEL
    # The rare K1 > 7 branch (a first word of 0): the coins from 8 on are drawn one by one.
    forced = smp.ByteStream(_PrefixSource(4, bytes(2)), 64)
    assert smp._first_factorial_failure(forced, 1)[0] >= 8


# ------------------------------------------------------------- geometric and tails
def _geometric_gof(g: np.ndarray, rate: float, n: int, bins: int = 40):
    """Chi-square of geometric draws against P(G >= j) = a**j, a = exp(-rate) [GRS09].

    Bins start at about equal-probability points (rounded up to integers, duplicates dropped), so
    small and large scales are tested alike; bins with an expected count below 5 are merged into
    their left neighbour [COCHRAN]; the last bin is the whole tail.
    """
    q = np.arange(1, bins) / bins
    starts = np.unique(np.concatenate([[0], np.ceil(-np.log1p(-q) / rate)]).astype(np.int64))
    surv = np.exp(-rate * starts.astype(np.float64))          # P(G >= start)
    probs = np.append(surv[:-1] - surv[1:], surv[-1])
    obs = np.bincount(np.searchsorted(starts, g, side="right") - 1, minlength=starts.size)
    keep_o, keep_p = [], []
    for o, p in zip(obs, probs):
        if keep_p and (p * n < 5 or keep_p[-1] * n < 5):
            keep_o[-1] += o
            keep_p[-1] += p
        else:
            keep_o.append(o)
            keep_p.append(p)
    keep_p = np.array(keep_p)
    return st.chisquare(keep_o, keep_p / keep_p.sum() * n).pvalue


@pytest.mark.parametrize("s,k", [(1, 0), (Fraction(0.1).numerator, 55), (1, 2), (5, 1), (3, 20), (1, 5)])
def test_exact_geometric_law(s, k):
    # P(G >= g) = exp(-g s / 2**k): scale 1 (m = 1), 10 (m = 10), 4 (power of two), rate 2.5 (> 1),
    # about 350,000 (m = 349525, per-value uniforms of 32 bits) and 32.
    n = 200_000
    g = smp.geometric_exact(_stream(s % 991 + k), s, k, n)
    assert g.dtype == np.int64 and g.min() >= 0
    rate = s / 2 ** k
    assert _geometric_gof(g, rate, n) > SEEDED_LEVEL
    assert _geometric_gof(g, 1.3 * rate, n) < SEEDED_LEVEL  # power: a 30 % wrong rate is rejected


def test_discrete_laplace_far_tails_exact_binomial():
    # 4 million draws at a = exp(-1): cells 0..T fitted by chi-square, then the far one-sided tails
    # P(|Z| >= t) = 2 a**t / (1 + a) [GRS09] by exact binomial tests [BINOM] for t up to 16
    # (expected count 1.6 at t = 16); Bonferroni over the tails.
    n = 4_000_000
    mech = GeometricMechanism(1.0, 1.0)
    x = mech.noise(n, SeededRandomSource(4242))
    a = mech.alpha
    stat, p, cells = gof(x, a)
    assert p > SEEDED_LEVEL
    tails = [8, 10, 12, 14, 16]
    pvals = [st.binomtest(int((np.abs(x) >= t).sum()), n, 2 * a ** t / (1 + a)).pvalue for t in tails]
    print(f"far tails t={tails}: counts={[int((np.abs(x) >= t).sum()) for t in tails]} p={pvals}")
    assert min(pvals) * len(tails) > SEEDED_LEVEL
    # power of the same tail tests against a 30 % larger scale
    wrong = sample_discrete_laplace_exact(1 / 1.3, n, SeededRandomSource(4243))
    assert st.binomtest(int((np.abs(wrong) >= 10).sum()), n, 2 * a ** 10 / (1 + a)).pvalue < SEEDED_LEVEL


def test_noise_is_unbounded_beyond_the_old_float_limit():
    # The float sampler never exceeded 53 ln 2 / rate = 36.7 * scale: an event of probability about
    # 1e-16, too rare to observe. Instead the conditional law is checked (white box): the magnitude
    # |Z| is the exact geometric G of [CKS20] Algorithm 2. At rate 1 (scale 1) each trial of G is one
    # exp(-1) coin decided by one 16-bit word; the first 40 trials are forced to succeed by a fixed
    # prefix of words, after which fresh random bytes must give G = 40 + G' with G' geometric of the
    # same law (memorylessness, [GRS09]): values far beyond 36.7 appear with exactly the conditional
    # frequencies of the law, and nothing caps them.
    j_max = smp._FACT_J
    succeed = int(smp._FACT_C * (math.factorial(j_max) // math.factorial(3)))  # K1 = 3, odd: the coin succeeds
    prefix = np.full(40, succeed, dtype="<u2").tobytes()
    runs = 6000
    out = np.empty(runs, dtype=np.int64)
    for i in range(runs):
        stream = smp.ByteStream(_PrefixSource(10_000 + i, prefix), 64)
        out[i] = smp.geometric_exact(stream, 1, 0, 1)[0]
    assert out.min() >= 40
    assert _geometric_gof(out - 40, 1.0, runs) > SEEDED_LEVEL
    assert _geometric_gof(out - 40, 1.3, runs) < SEEDED_LEVEL  # power: a 30 % steeper tail is rejected
    # and the signed noise built from such magnitudes keeps them (Algorithm 2 only rejects G = 0)
    assert smp._FACT_J == 7 and smp._FACT_TABLE[succeed] == 3


def test_large_scale_cap_and_overflow_guard(monkeypatch):
    # scale 2**40: values of the order of 1e12, exact int64, standard deviation sqrt(2) * scale.
    x = sample_discrete_laplace_exact(Fraction(1, 2 ** 40), 20_000, SeededRandomSource(3))
    assert x.dtype == np.int64
    assert 0.9 < float(np.std(x.astype(np.float64))) / (math.sqrt(2) * 2 ** 40) < 1.1
    # cap (skip walks): values >= cap come back as cap, with probability P(G >= cap) = a**cap
    g = smp.geometric_exact(_stream(5), 1, 3, 100_000, cap=20)          # rate 1/8
    assert g.max() == 20
    assert st.binomtest(int((g == 20).sum()), g.size, math.exp(-20 / 8)).pvalue > SEEDED_LEVEL
    # without a cap a value past the int64 guard raises instead of wrapping (guard lowered to 10 here;
    # the real one is 2**62 - 1, reached with probability below exp(-256) at the accepted scales)
    monkeypatch.setattr(smp, "_MAX_VALUE", 10)
    with pytest.raises(OverflowError):
        smp.geometric_exact(_stream(6), 1, 3, 1000)


# --------------------------------------------------- rigorous bounds and constant coins
@pytest.mark.parametrize("x", [Fraction(0), Fraction(3, 8), Fraction(1), Fraction(0.1) * 7, Fraction(400),
                               Fraction(12345, 7), Fraction(1, 2 ** 40)])
def test_exp_bounds_bracket_the_decimal_value(x):
    from decimal import Decimal, localcontext

    lo, hi = smp.exp_neg_bounds(x, 120)
    with localcontext() as ctx:
        ctx.prec = 80
        ref = (-(Decimal(x.numerator) / Decimal(x.denominator))).exp()  # [DEC] correctly rounded
        tol = abs(ref) * Decimal(10) ** -75
        assert Decimal(lo.numerator) / Decimal(lo.denominator) <= ref + tol
        assert Decimal(hi.numerator) / Decimal(hi.denominator) >= ref - tol
    assert lo <= hi and (x == 0 or (hi - lo) / lo < Fraction(1, 2 ** 110))
    if 0 < x <= 1:
        qlo, qhi = smp.one_minus_exp_neg_bounds(x, 120)
        with localcontext() as ctx:
            ctx.prec = 80
            ref1 = 1 - ref
            assert Decimal(qlo.numerator) / Decimal(qlo.denominator) <= ref1 * (1 + Decimal(10) ** -70)
            assert Decimal(qhi.numerator) / Decimal(qhi.denominator) >= ref1 * (1 - Decimal(10) ** -70)
        assert (qhi - qlo) / qlo < Fraction(1, 2 ** 110)


@pytest.mark.parametrize("rho", [Fraction(1, 3), Fraction(0), Fraction(1), Fraction(2, 7)])
def test_bernoulli_from_bounds_including_the_slow_path(rho):
    # Bounds deliberately loose at the fast precision (width 2**-8) so about 1 % of the draws take
    # the word-by-word path; the frequency must still be exactly rho [BINOM].
    def bounds(bits):
        w = Fraction(1, 2 ** max(bits - 120, 1))
        return max(Fraction(0), rho - w), min(Fraction(1), rho + w)

    n = 200_000
    x = smp.bernoulli_bounded(_stream(int(rho * 97)), bounds, n)
    if rho in (0, 1):
        assert x.all() if rho == 1 else not x.any()
    else:
        assert st.binomtest(int(x.sum()), n, float(rho)).pvalue > SEEDED_LEVEL


# ------------------------------------------- inversion of the magnitude's law over a table
@pytest.mark.parametrize("rate", [Fraction(1), Fraction(1, 2), Fraction(0.1), Fraction(3, 1024), Fraction(7, 2)])
def test_magnitude_table_brackets_the_decimal_thresholds(rate):
    # lo_g <= 2**63 * P(|Z| >= g) <= hi_g with P(|Z| >= g) = 2 a**g / (1 + a) [GRS09], against exp(-x)
    # from Python's correctly rounded Decimal.exp [DEC] at 60 digits; neighbours separated; the last
    # threshold below 2**-40 and the one before it not.
    from decimal import Decimal, localcontext

    s, k = dyadic_rate(rate)
    table = smp._magnitude_table(s, k)
    if rate < Fraction(1, 148):  # scale above about 148: more than 4096 thresholds, no table
        assert table is None
        return
    lo, hi = (np.array([int(v) for v in arr], dtype=object) for arr in table)
    with localcontext() as ctx:
        ctx.prec = 60
        x = Decimal(s) / Decimal(2 ** k)
        a = (-x).exp()
        for g in range(1, lo.size + 1):
            ref = 2 * (-(x * g)).exp() / (1 + a) * 2 ** 63
            assert Decimal(lo[g - 1]) <= ref <= Decimal(hi[g - 1])
            assert hi[g - 1] - lo[g - 1] <= 2
        assert Decimal(hi[-1]) < Decimal(2) ** 23 and (lo.size == 1 or Decimal(hi[-2]) >= Decimal(2) ** 23)
    assert all(lo[i] >= hi[i + 1] for i in range(lo.size - 1))


def test_magnitude_table_only_for_moderate_scales():
    assert smp._magnitude_table(*dyadic_rate(Fraction(1, 100))) is not None   # 2,774 thresholds
    assert smp._magnitude_table(*dyadic_rate(Fraction(1, 1000))) is None      # would need 27,700
    assert smp._magnitude_table(*dyadic_rate(Fraction(1, 2 ** 40))) is None


@pytest.mark.parametrize("epsilon,sensitivity", PAIRS)
def test_rejection_sampler_still_matches_the_law(epsilon, sensitivity):
    # Scales above about 148 still use [CKS20] Algorithm 2 (_discrete_laplace); it is tested here at the
    # moderate scales where the table is used otherwise, against the [GRS09] pmf [SCIPY].
    s, k = dyadic_rate(Fraction(epsilon) / Fraction(sensitivity))
    x = smp._discrete_laplace(_stream(31 + k), s, k, N_GOF)
    stat, p, cells = gof(x, alpha_of(epsilon, sensitivity))
    assert p > SEEDED_LEVEL


@pytest.mark.parametrize("s,k", [(1, 0), (1, 2), (7, 1)])
def test_table_sampler_tail_beyond_the_table(s, k):
    # A table cut at P(|Z| >= T) < 2**-3 sends a few draws in a hundred to the exact geometric beyond it
    # (|Z| = T + G, memorylessness); the whole law must still be the [GRS09] pmf [SCIPY], and a 30 %
    # wrong scale must be rejected (power).
    table = smp._magnitude_table(s, k, tail_bits=3)
    assert table is not None and table[0].size <= 12
    x = smp._discrete_laplace_by_table(_stream(s + 40 * k), s, k, N_GOF, table)
    a = math.exp(-s / 2 ** k)
    t = table[0].size
    assert (np.abs(x) >= t).mean() > 0.02  # P(|Z| >= T) = 2 a**T / (1 + a), between 2**-3 a and 2**-3
    assert gof(x, a)[1] > SEEDED_LEVEL
    assert gof(x, math.exp(-1.3 * s / 2 ** k))[1] < SEEDED_LEVEL


def test_table_sampler_undecided_words_take_the_exact_path():
    # Bounds widened to about 2**-6 of each threshold leave about 1 word in 30 undecided; those are
    # settled by further words against the exact thresholds (_below_after), and the law must stay the
    # [GRS09] pmf [SCIPY]; settling them all one way (a wrong resolution) is rejected (power).
    s, k = 1, 0
    lo, hi = smp._magnitude_table(s, k)
    wide = ((lo - (lo >> np.uint64(6))), (hi + (hi >> np.uint64(6))))
    assert all(wide[0][i] >= wide[1][i + 1] for i in range(lo.size - 1))
    a = math.exp(-1.0)
    x = smp._discrete_laplace_by_table(_stream(57), s, k, N_GOF, wide)
    assert gof(x, a)[1] > SEEDED_LEVEL
    calls = []
    real = smp._below_after

    def count_calls(*args):
        calls.append(1)
        return real(*args)

    try:
        smp._below_after = count_calls
        smp._discrete_laplace_by_table(_stream(58), s, k, 20_000, wide)
        assert 200 < len(calls) < 2000
        smp._below_after = lambda *args: True  # every undecided word counted as below its threshold
        biased = smp._discrete_laplace_by_table(_stream(57), s, k, N_GOF, wide)
    finally:
        smp._below_after = real
    assert gof(biased, a)[1] < SEEDED_LEVEL


@pytest.mark.parametrize("tail_ones", [False, True])
def test_table_sampler_settles_a_word_on_a_threshold_exactly(tail_ones):
    # White box: a first word equal to lo_g (sign bit 0) is undecided about threshold g. V's next bits
    # all 0 put V just above lo_g / 2**63 < t_g, so |Z| >= g (and = g); all 1 put it just below
    # (lo_g + 1) / 2**63, above t_g when hi_g = lo_g + 1, so |Z| = g - 1.
    s, k = 1, 1
    lo, hi = smp._magnitude_table(s, k)
    g = 3
    assert int(hi[g - 1]) == int(lo[g - 1]) + 1
    word = int(lo[g - 1]).to_bytes(8, "little")
    more = (b"\xff" if tail_ones else b"\x00") * 64
    stream = smp.ByteStream(_PrefixSource(1, word + more), 8)
    z = smp._discrete_laplace_by_table(stream, s, k, 1, (lo, hi))
    assert int(z[0]) == (g - 1 if tail_ones else g)
