r"""Exact bulk sampling of integer (discrete Laplace) noise.

Three pieces live here:

* **random sources** -- objects that hand out random bytes, uniform integers
  and float64 uniforms strictly inside ``(0, 1)``.  Releases use
  :class:`SystemRandomSource` (the operating system's entropy source);
  :class:`SeededRandomSource` exists so tests can be deterministic and must
  never be used for a real release.
* **exact samplers** -- :func:`sample_discrete_laplace_exact` (and the
  internal geometric and Bernoulli samplers it is built from) draw the
  discrete Laplace law *exactly*, using only random bytes and exact integer
  arithmetic, vectorised over numpy arrays: every pending draw advances
  through the rejection loops together, never one value at a time.
* :func:`dyadic_rate` -- the exact rational noise rate ``s / 2**k`` the
  samplers work with (see below).

The algorithm
-------------
Canonne, Kamath and Steinke [1]_ show how to draw Bernoulli(exp(-x)) for a
rational ``x`` with uniform integers only (their Algorithm 1, after von
Neumann's method for the exponential): for ``x <= 1`` keep drawing
``A_K ~ Bernoulli(x / K)`` for ``K = 1, 2, ...`` until the first failure, and
output 1 iff that failure happened at an odd ``K``; for ``x > 1`` multiply
``floor(x)`` independent Bernoulli(exp(-1)) by one Bernoulli(exp(-(x -
floor(x)))).  Here ``x`` is always a dyadic rational ``c / 2**k`` and
``Bernoulli(x / K)`` is drawn as the product ``Bernoulli(c / 2**k)`` times
``Bernoulli(1 / K)`` (independent, so the product has probability ``x / K``)
which keeps every integer at or below ``2**62``.  ``Bernoulli(c / 2**k)`` is
decided lazily: random bytes are compared, from the most significant one, with
the binary expansion of ``c / 2**k``, so one byte decides it with probability
255/256.  The coins ``Bernoulli(1 / K)`` for ``K <= 7`` are decided together by
one uniform integer below ``13 * 7!`` (the first failure is after ``j`` iff it
is below ``13 * 7! / j!``); later ones are "a uniform integer in ``[0, K)`` is 0".

Their Algorithm 2 turns this into the discrete Laplace law: draw a geometric
``G`` with ``P(G >= g) = a**g`` (``a = exp(-s/t)``), a fair sign, reject the
pair (negative sign, ``G = 0``), output the signed ``G``.  The geometric is
drawn here as ``G = Q m + R`` with ``m`` the largest power of two not above
``max(1, t / s)`` (between half the noise scale and the scale): ``R`` in
``[0, m)`` is a uniform integer accepted with probability ``exp(-s R / t)`` (a truncated geometric by rejection; the
acceptance rate is about ``1 - 1/e`` or more) and ``Q`` counts the successes of
Bernoulli(exp(-s m / t)) before the first failure.  ``Q`` and ``R`` are
independent and ``P(Q m + R = g) = (1 - a) a**g``; this is the block
decomposition behind [1]_'s Algorithm 2 (which uses ``m = t`` and a division
by ``s``), chosen so that ``R`` costs about ``log2(scale)`` random bits rather
than ``log2(t)``.  Every step uses integers at most ``2**62`` in int64/uint64.

Inversion over a table (moderate scales)
----------------------------------------
For noise scales up to about 148 (``T <= 4096`` thresholds; every default
policy) :func:`sample_dyadic` draws the same law faster by inverting the
magnitude's survival function ``t_g = P(|Z| >= g) = 2 a**g / (1 + a)``: one
64-bit word per value (the sign and the first 63 bits of a uniform ``V``)
compared with integer bounds of ``2**63 t_g``, an undecided word settled
exactly by further words (probability about ``T * 2**-62``), and the tail
``V < t_T < 2**-40`` drawn as ``T`` plus the exact geometric above
(:func:`_discrete_laplace_by_table`).  2.3-3.0 times faster than Algorithm 2
at scales 0.1 to 10 (``benchmarks/bench_noise.py``,
``benchmarks/results/noise-table-2026-12-03.txt``).

The rate ``s / t`` and overflow
-------------------------------
The privacy parameters are binary64 floats, and a float is an exact dyadic
rational, so ``epsilon / sensitivity`` is an exact rational
(``fractions.Fraction``).  Its denominator can be far beyond ``2**64``
(``0.1 / 100`` has ``2**57 * 25``), so the samplers use ``t = 2**k`` and
:func:`dyadic_rate` replaces the rate by the **largest dyadic rational**
``s / 2**k <= epsilon / sensitivity`` with ``k <= 62`` and ``s <= 2**62``.
That rate is *never larger* than the stated one (the noise is never smaller),
so the release is ``epsilon'``-DP with ``epsilon' = s / 2**k * sensitivity
<= epsilon``.  It is *equal* to the stated rate whenever the rate's exact
denominator is a power of two up to ``2**62`` (``epsilon = 0.1`` with
sensitivity 1, 2 or 4; ``epsilon = 1`` with any power-of-two sensitivity),
and otherwise smaller by a relative amount below ``max(2**-61, scale * 2**-62)``
(below ``2.2e-16`` for scales up to 1000).
:attr:`aggpub.noise.mechanisms.GeometricMechanism.rate` records the rational
used.

The values are int64.  A draw whose magnitude would reach ``2**62`` raises
``OverflowError`` instead of wrapping; scales above ``2**54`` are refused,
so this has probability below ``exp(-256)`` per draw.  No other bound,
truncation or rounding exists: in particular the noise is unbounded below
that limit (the former float sampler never exceeded about ``36.7 * scale``).

Nothing in this module reads the environment: a seed only ever arrives as an
explicit argument of :func:`make_random_source`.

References
----------
.. [1] C. L. Canonne, G. Kamath, T. Steinke, "The Discrete Gaussian for
   Differential Privacy", Advances in Neural Information Processing Systems
   (NeurIPS), 2020 (Algorithms 1 and 2).
.. [2] A. Ghosh, T. Roughgarden, M. Sundararajan, "Universally
   utility-maximizing privacy mechanisms", Proceedings of the 41st ACM
   Symposium on Theory of Computing (STOC), 2009 (the discrete Laplace pmf).
.. [3] J. von Neumann, "Various techniques used in connection with random
   digits", National Bureau of Standards Applied Mathematics Series 12, 1951
   (citation recalled from memory).
"""

from __future__ import annotations

__all__ = [
    "RandomSource",
    "SystemRandomSource",
    "SeededRandomSource",
    "make_random_source",
    "sample_discrete_laplace",
    "sample_discrete_laplace_exact",
    "dyadic_rate",
    "DEFAULT_CHUNK_SIZE",
    "MIN_RATE",
]

import abc
import functools
import math
import numbers
import os
from fractions import Fraction

import numpy as np

#: Number of noise values produced per chunk (bounds the temporary memory to a
#: few tens of MiB whatever the requested size).
DEFAULT_CHUNK_SIZE = 1 << 20

#: Smallest noise rate ``epsilon / sensitivity`` accepted (scale ``2**54``,
#: about ``1.8e16``): a draw then reaches ``2**62`` with probability below
#: ``exp(-256)``, and the rate keeps at least 8 significant bits.
MIN_RATE = Fraction(1, 1 << 54)

# Integers in the samplers stay at or below 2**62 (rates, products s * r, values).
_TOP = 1 << 62
_MAX_K = 62
_MAX_VALUE = (1 << 62) - 1

# Uniforms are built from the top 52 bits of each 64-bit word, k in [0, 2**52),
# as u = (k + 0.5) * 2**-52.  Every such value is exactly representable in
# binary64 (2k + 1 < 2**53), the smallest is 2**-53 and the largest 1 - 2**-53,
# and the grid is symmetric (u and 1 - u are both on it).
#
# A 53-bit version, (k + 0.5) * 2**-53 with k in [0, 2**53), is NOT safe: for
# k = 2**53 - 1 the sum 2**53 - 0.5 needs 54 significant bits, rounds (ties to
# even) to 2**53, and the result is exactly 1.0.  Dropping one bit is what makes
# "0 and 1 never occur" true.
_UNIFORM_BITS = 52
_UNIFORM_SHIFT = np.uint64(64 - _UNIFORM_BITS)
_UNIFORM_STEP = 2.0 ** -_UNIFORM_BITS


def _bits_to_open_unit(bits: np.ndarray) -> np.ndarray:
    """Map uint64 words to float64 uniforms strictly inside ``(0, 1)``.

    Parameters
    ----------
    bits : numpy.ndarray of uint64
        Independent, uniformly distributed 64-bit words.

    Returns
    -------
    numpy.ndarray of float64
        ``((bits >> 12) + 0.5) * 2**-52``: values on the grid
        ``{(k + 0.5) / 2**52 : 0 <= k < 2**52}``, between ``2**-53`` and
        ``1 - 2**-53`` inclusive; every step is exact in binary64.
    """
    bits = np.asarray(bits, dtype=np.uint64)
    out = np.right_shift(bits, _UNIFORM_SHIFT).astype(np.float64)
    out += 0.5
    out *= _UNIFORM_STEP
    return out


def _open_unit_to_bits(u: np.ndarray, who: str) -> np.ndarray:
    """Inverse of :func:`_bits_to_open_unit` on its grid: the 52 random bits ``k`` of each uniform."""
    u = np.asarray(u, dtype=np.float64)
    k = u * 2.0 ** _UNIFORM_BITS - 0.5  # exact for grid points (k + 0.5) / 2**52
    ok = (k >= 0.0) & (k < 2.0 ** _UNIFORM_BITS) & (k == np.floor(k))  # also catches NaN
    if not bool(np.all(ok)):
        raise RuntimeError(
            f"{who}.uniform returned values off the grid (k + 0.5) / 2**52; random bytes cannot be "
            "recovered from them exactly (override random_bytes in the source)"
        )
    return k.astype(np.uint64)


def _check_count(n, what: str = "n") -> int:
    if isinstance(n, (bool, np.bool_)) or not isinstance(n, numbers.Integral):
        raise TypeError(f"'{what}' must be a non-negative integer, got {n!r}")
    n = int(n)
    if n < 0:
        raise ValueError(f"'{what}' must be a non-negative integer, got {n}")
    return n


class RandomSource(abc.ABC):
    """Source of randomness: random bytes, exact uniform integers and float64 uniforms.

    Subclasses implement :meth:`uniform`, :attr:`seeded` and
    :attr:`description`, and should override :meth:`random_bytes` with a
    direct implementation.  The default :meth:`random_bytes` takes 48 of the
    52 random bits of each uniform of :meth:`uniform` (which must then lie on
    the grid ``(k + 0.5) / 2**52`` that both sources here use), so a wrapper
    that only overrides :meth:`uniform` still sees every draw.

    The exact samplers use only :meth:`random_bytes`; :meth:`uniform` stays for
    code that needs float uniforms (shuffles, seeds of auxiliary simulations).
    """

    @abc.abstractmethod
    def uniform(self, n: int) -> np.ndarray:
        """Return ``n`` independent uniforms, float64, each strictly in ``(0, 1)``."""

    @property
    @abc.abstractmethod
    def seeded(self) -> bool:
        """True when the stream is reproducible from a seed (tests only)."""

    @property
    @abc.abstractmethod
    def description(self) -> str:
        """Short human-readable statement of where the randomness comes from."""

    def random_bytes(self, n: int) -> np.ndarray:
        """Return ``n`` independent uniformly distributed bytes (uint8).

        Parameters
        ----------
        n : int
            Number of bytes, ``>= 0``.

        Returns
        -------
        numpy.ndarray of uint8, shape ``(n,)``
        """
        n = _check_count(n)
        if n == 0:
            return np.empty(0, dtype=np.uint8)
        words = -(-n // 6)
        u = self.uniform(words)
        if not isinstance(u, np.ndarray) or u.shape != (words,):
            raise RuntimeError(f"{type(self).__name__}.uniform({words}) did not return an array of shape ({words},)")
        k = _open_unit_to_bits(u, type(self).__name__)
        le = k.astype("<u8").view(np.uint8).reshape(words, 8)
        return np.ascontiguousarray(le[:, :6]).reshape(-1)[:n]

    def integers(self, upper, size: int | None = None) -> np.ndarray:
        """Uniform integers in ``[0, upper)``, exactly (rejection sampling, no modulo bias).

        Parameters
        ----------
        upper : int or array_like of int
            Exclusive upper bound(s), ``1 <= upper <= 2**63``.  An array gives
            one draw per entry with its own bound.
        size : int, optional
            Number of draws when ``upper`` is a scalar (default 1).

        Returns
        -------
        numpy.ndarray of int64 (uint64 if some bound exceeds ``2**63 - 1``)
        """
        if np.ndim(upper) == 0:
            up = int(upper)
            if not (1 <= up <= 1 << 63):
                raise ValueError(f"'upper' must be between 1 and 2**63, got {up}")
            m = np.full(_check_count(1 if size is None else size, "size"), up, dtype=np.uint64)
        else:
            if size is not None:
                raise ValueError("'size' is given by 'upper' when 'upper' is an array")
            arr = np.asarray(upper)
            if arr.dtype.kind not in "iu":
                raise ValueError("'upper' must hold integers")
            if arr.size and (int(arr.min()) < 1 or int(arr.max()) > 1 << 63):
                raise ValueError("every 'upper' must be between 1 and 2**63")
            m = arr.astype(np.uint64).reshape(-1)
        out = _below(ByteStream(self, 8 * m.size), m)  # per-draw bounds
        if m.size and int(m.max()) > np.iinfo(np.int64).max:
            return out
        return out.astype(np.int64)

    def __repr__(self) -> str:
        return f"{type(self).__name__}({self.description!r})"


class SystemRandomSource(RandomSource):
    """Randomness from ``os.urandom``, the operating system's entropy source.

    Bytes are read in bulk with one call per request; :meth:`uniform` uses
    52 bits per uniform (see :func:`_bits_to_open_unit`).  The stream cannot be
    replayed, which is what a release needs.
    """

    @property
    def seeded(self) -> bool:
        return False

    @property
    def description(self) -> str:
        return "operating-system entropy (os.urandom); exact integer noise, 52-bit uniforms in (0, 1)"

    def uniform(self, n: int) -> np.ndarray:
        n = _check_count(n)
        if n == 0:
            return np.empty(0, dtype=np.float64)
        bits = np.frombuffer(os.urandom(8 * n), dtype="<u8")
        return _bits_to_open_unit(bits)

    def random_bytes(self, n: int) -> np.ndarray:
        n = _check_count(n)
        return np.frombuffer(os.urandom(n), dtype=np.uint8)


class SeededRandomSource(RandomSource):
    """Reproducible randomness from ``numpy.random.Generator(PCG64(seed))``.

    For tests and benchmarks only: anyone who knows the seed can regenerate
    the noise and strip it off a release.  Uniforms use raw 64-bit outputs of
    the bit generator with the same conversion as :class:`SystemRandomSource`,
    so this source also never yields 0 or 1.

    Parameters
    ----------
    seed : int
        Non-negative integer seed.

    References
    ----------
    .. [1] M. E. O'Neill, "PCG: A family of simple fast space-efficient
       statistically good algorithms for random number generation",
       Technical report HMC-CS-2014-0905, Harvey Mudd College, 2014
       (citation recalled from memory).
    """

    def __init__(self, seed: int):
        if isinstance(seed, (bool, np.bool_)) or not isinstance(seed, numbers.Integral):
            raise TypeError(f"'seed' must be a non-negative integer, got {seed!r}")
        if seed < 0:
            raise ValueError(f"'seed' must be a non-negative integer, got {seed}")
        self._seed = int(seed)
        self._generator = np.random.Generator(np.random.PCG64(self._seed))

    @property
    def seed(self) -> int:
        return self._seed

    @property
    def seeded(self) -> bool:
        return True

    @property
    def description(self) -> str:
        return f"numpy PCG64 seeded with {self._seed} (reproducible; tests only, never for a release)"

    def uniform(self, n: int) -> np.ndarray:
        n = _check_count(n)
        if n == 0:
            return np.empty(0, dtype=np.float64)
        bits = self._generator.bit_generator.random_raw(n)
        return _bits_to_open_unit(np.asarray(bits, dtype=np.uint64))

    def random_bytes(self, n: int) -> np.ndarray:
        n = _check_count(n)
        words = np.asarray(self._generator.bit_generator.random_raw(-(-n // 8)), dtype=np.uint64)
        return words.astype("<u8").view(np.uint8)[:n]


def make_random_source(seed: int | None) -> RandomSource:
    """Return the random source for ``seed``.

    Parameters
    ----------
    seed : int or None
        ``None`` (the only value a release should use) gives a
        :class:`SystemRandomSource`; an integer gives a
        :class:`SeededRandomSource`.  The environment is never consulted.

    Returns
    -------
    RandomSource
    """
    if seed is None:
        return SystemRandomSource()
    return SeededRandomSource(seed)


# --------------------------------------------------------------------------- random bytes, buffered
class ByteStream:
    """Hands out random bytes from a :class:`RandomSource`, fetched in blocks.

    One stream serves one sampling call; bytes left over at its end are
    dropped, never reused.  Blocks start near ``hint`` bytes and double (up to
    4 MiB) so that the many small requests of the rejection loops' tails do
    not each cost a system call.
    """

    def __init__(self, source: RandomSource, hint: int):
        if not isinstance(source, RandomSource):
            raise TypeError(f"'source' must be a RandomSource, got {type(source).__name__}")
        self._source = source
        self._buf = np.empty(0, dtype=np.uint8)
        self._pos = 0
        self._block = int(min(max(hint, 4096), 1 << 22))

    def take(self, n: int) -> np.ndarray:
        """``n`` fresh random bytes (uint8)."""
        end = self._pos + n
        if end > self._buf.size:
            rest = self._buf[self._pos:]
            fetch = max(n - rest.size, self._block)
            self._block = min(2 * self._block, 1 << 22)
            new = self._source.random_bytes(fetch)
            if not isinstance(new, np.ndarray) or new.shape != (fetch,):
                raise RuntimeError(f"{type(self._source).__name__}.random_bytes({fetch}) returned a wrong shape")
            self._buf = np.concatenate([rest, np.asarray(new, dtype=np.uint8)])
            self._pos, end = 0, n
        out = self._buf[self._pos:end]
        self._pos = end
        return out

    def words(self, n: int, width: int) -> np.ndarray:
        """``n`` uniform ``width``-bit words (width 8, 16, 32 or 64), as unsigned integers of that width."""
        raw = self.take(n * (width // 8))
        return raw.view(f"<u{width // 8}")

    def bits(self, n: int) -> np.ndarray:
        """``n`` fair bits as a bool array."""
        return np.unpackbits(self.take(-(-n // 8)))[:n].astype(bool)


def _width_for(top: int) -> int:
    return 8 if top <= 1 << 8 else 16 if top <= 1 << 16 else 32 if top <= 1 << 32 else 64


def _below(stream: ByteStream, m, n: int | None = None) -> np.ndarray:
    """Uniform integers ``x_i`` in ``[0, m_i)`` (uint64), exactly, for bounds ``1 <= m_i <= 2**63``.

    Rejection sampling: a ``w``-bit word is accepted when it falls below the
    largest multiple of ``m_i`` not above ``2**w``, then reduced modulo
    ``m_i``; each of the ``m_i`` residues then has the same number of
    preimages.  ``w`` is the smallest of 8, 16, 32, 64 with ``2**w >= max(m)``,
    so at least half the words are accepted.  ``m`` is either a Python int
    (with ``n`` draws) or an array of per-draw bounds.
    """
    if n is not None:  # one bound for all draws: limit computed once; results in the words' own dtype
        m = int(m)
        width = _width_for(m)
        dtype = np.dtype(f"u{width // 8}")
        if m & (m - 1) == 0:  # a power of two: every word is kept, masked
            return stream.words(n, width) & dtype.type(m - 1)
        limit = dtype.type(((1 << width) // m) * m)
        mod = dtype.type(m)
        x = stream.words(n, width)
        ok = x < limit
        out = x % mod
        bad = np.flatnonzero(~ok)
        while bad.size:
            y = stream.words(bad.size, width)
            good = y < limit
            out[bad[good]] = y[good] % mod
            bad = bad[~good]
        return out
    m = np.asarray(m, dtype=np.uint64)
    out = np.zeros(m.size, dtype=np.uint64)
    if m.size == 0:
        return out
    width = _width_for(int(m.max()))
    pending = np.arange(m.size)
    mm = m
    while pending.size:
        x = stream.words(pending.size, width).astype(np.uint64)
        if width < 64:
            span = np.uint64(1 << width)
            ok = x < span - span % mm
        else:
            rem = (np.uint64(0) - mm) % mm  # 2**64 mod m, computed with uint64 wrap-around
            ok = x <= ~rem                  # x < 2**64 - rem
        out[pending[ok]] = x[ok] % mm[ok]
        pending, mm = pending[~ok], mm[~ok]
    return out


def _bern_dyadic(stream: ByteStream, c, k: int, n: int | None = None) -> np.ndarray:
    """Independent Bernoulli(``c_i / 2**k``), ``0 <= c_i <= 2**k``, ``k <= 62``, exactly.

    Decides ``V < c / 2**k`` for a uniform ``V`` in ``[0, 1)`` revealed one byte
    at a time: the first byte that differs from the corresponding byte of
    ``c / 2**k`` decides; if all bytes agree, ``V >= c / 2**k``.  One byte
    decides with probability 255/256.  ``c`` is an array, or a Python int
    shared by ``n`` draws.
    """
    one = 1 << k
    kk = 8 * -(-k // 8)
    if n is not None:  # one numerator for every draw
        c = int(c)
        if c >= one:
            return np.ones(n, dtype=bool)
        if c <= 0:
            return np.zeros(n, dtype=bool)
        cc = c << (kk - k)
        shift = kk - 8
        digit = (cc >> shift) & 0xFF
        r = stream.take(n)
        out = r < digit
        live = np.flatnonzero(r == digit)
        shift -= 8
        while live.size and shift >= 0:
            digit = (cc >> shift) & 0xFF
            r = stream.take(live.size)
            out[live[r < digit]] = True
            live = live[r == digit]
            shift -= 8
        return out
    c = np.asarray(c, dtype=np.uint64)
    full = c >= np.uint64(one)
    if kk == 0:  # k == 0: c is 0 or 1
        return full
    cc = np.where(full, np.uint64(0), c) << np.uint64(kk - k)
    shift = kk - 8
    r = stream.take(c.size)
    digit = (cc >> np.uint64(shift)).astype(np.uint8)  # the top byte (cc < 2**kk)
    out = r < digit
    live = np.flatnonzero(r == digit)
    shift -= 8
    while live.size and shift >= 0:
        digit = ((cc[live] >> np.uint64(shift)) & np.uint64(0xFF)).astype(np.uint8)
        r = stream.take(live.size)
        out[live[r < digit]] = True
        live = live[r == digit]
        shift -= 8
    out |= full
    return out


def _words_below(stream: ByteStream, limit: int, width: int, n: int) -> np.ndarray:
    """``n`` uniform integers on ``[0, limit)``, ``limit < 2**width``, by plain rejection of ``width``-bit words."""
    x = stream.words(n, width)
    lim = x.dtype.type(limit)
    bad = np.flatnonzero(x >= lim)
    if bad.size:
        x = x.copy()
    while bad.size:
        y = stream.words(bad.size, width)
        x[bad] = y
        bad = bad[y >= lim]
    return x


# First failure among the Bernoulli(1/K) coins, K = 1..7, from one 16-bit word:
# x uniform on [0, C * 7!) (C = floor(2**16 / 7!) = 13, so 99.98 % of the words are kept);
# K1 > j iff x < C * 7! / j!, probability exactly 1 / j! (j! divides 7!).
_FACT_J = 7
_FACT_C = (1 << 16) // math.factorial(_FACT_J)
_FACT_LIMIT = _FACT_C * math.factorial(_FACT_J)
_FACT_THRESHOLDS = np.array([_FACT_C * (math.factorial(_FACT_J) // math.factorial(j))
                             for j in range(_FACT_J, 0, -1)], dtype=np.uint16)
# K1 for every kept word: 1 + #{j <= 7 : x < C * 7!/j!} (a 256 KiB lookup table; words >= C * 7! never used)
_FACT_TABLE = ((_FACT_THRESHOLDS.size + 1)
               - np.searchsorted(_FACT_THRESHOLDS, np.arange(1 << 16), side="right")).astype(np.int32)


def _first_factorial_failure(stream: ByteStream, n: int) -> np.ndarray:
    """``n`` draws of ``K1``, the index of the first failure among independent coins
    ``Bernoulli(1/1), Bernoulli(1/2), Bernoulli(1/3), ...`` (so ``P(K1 > j) = 1/j!``, ``K1 >= 2``).

    One uniform integer decides the first 7 coins at once: with ``x``
    uniform on ``[0, C * 7!)``, ``K1 > j`` iff ``x < C * 7!/j!``, an event of
    probability exactly ``1/j!``.  When ``K1 > 7`` (probability ``1/7!``) the
    coins from 8 on are drawn one by one; they are independent of the first
    7, so the law is unchanged.
    """
    k1 = _FACT_TABLE[_words_below(stream, _FACT_LIMIT, 16, n)]
    far = np.flatnonzero(k1 > _FACT_J)
    j = _FACT_J + 1
    while far.size:
        fail = _below(stream, j, far.size) != 0
        k1[far[fail]] = j
        far = far[~fail]
        j += 1
    return k1


def _bern_exp_unit(stream: ByteStream, c, k: int, n: int | None = None) -> np.ndarray:
    """Bernoulli(exp(-c_i / 2**k)) for ``0 <= c_i <= 2**k`` (Algorithm 1 of [CKS20] for ``x <= 1``).

    With ``x = c / 2**k``, [CKS20] draws ``A_K ~ Bernoulli(x / K)`` for ``K = 1, 2, ...``
    until the first failure and returns 1 iff it came at an odd ``K``:
    ``P(first failure > j) = x**j / j!`` and
    ``sum_{K odd} (x**(K-1)/(K-1)! - x**K/K!) = exp(-x)``.  Each ``A_K`` is the
    product of two independent coins, ``Bernoulli(x)`` and ``Bernoulli(1/K)``,
    so the first failure is ``min(J, K1)`` with ``J`` the first failure of the
    ``Bernoulli(x)`` coins and ``K1`` that of the ``Bernoulli(1/K)`` coins
    (:func:`_first_factorial_failure`, one random word for all of them).  Only
    the ``Bernoulli(x)`` coins before ``K1`` are drawn (lazily, about one
    byte each).  ``c`` is an array, or a Python int shared by ``n`` draws.
    """
    scalar = n is not None
    if not scalar:
        c = np.asarray(c, dtype=np.uint64)
        n = c.size
    first = _first_factorial_failure(stream, n)
    if scalar and int(c) >= 1 << k:  # x = 1: every Bernoulli(x) coin succeeds
        return (first & 1) == 1
    b = _bern_dyadic(stream, c, k, n) if scalar else _bern_dyadic(stream, c, k)   # coin 1
    kk = np.where(b, first, 1)
    idx = np.flatnonzero(b & (first > 2))
    j = 2
    while idx.size:
        b = _bern_dyadic(stream, c, k, idx.size) if scalar else _bern_dyadic(stream, c[idx], k)
        kk[idx[~b]] = j
        idx = idx[b]
        j += 1
        idx = idx[first[idx] > j]  # coin j matters only before the first Bernoulli(1/K) failure
    return (kk & 1) == 1


def _bern_exp(stream: ByteStream, c: int, k: int, n: int) -> np.ndarray:
    """``n`` Bernoulli(exp(-c / 2**k)) for one integer ``0 <= c <= 2**62`` (any size of ``c / 2**k``).

    ``exp(-x) = exp(-1)**floor(x) * exp(-(x - floor(x)))``: ``floor(x)``
    Bernoulli(exp(-1)), stopping at the first failure, then one for the
    fractional part ([CKS20], Algorithm 1).
    """
    whole, frac = divmod(int(c), 1 << k)
    if whole == 0:
        return _bern_exp_unit(stream, frac, k, n)
    out = np.zeros(n, dtype=bool)
    idx = np.arange(n)
    for _ in range(whole):
        idx = idx[_bern_exp_unit(stream, 1 << k, k, idx.size)]  # exp(-1)
        if not idx.size:
            return out
    out[idx] = _bern_exp_unit(stream, frac, k, idx.size) if frac else True
    return out


def geometric_exact(stream: ByteStream, s: int, k: int, n: int, cap: int | None = None) -> np.ndarray:
    """``n`` exact draws of ``G >= 0`` with ``P(G >= g) = exp(-g s / 2**k)`` (int64).

    ``G = Q m + R`` with ``m`` the largest power of two ``<= max(1, 2**k / s)``
    (so ``1/2 < s m / 2**k <= 1`` when ``s <= 2**k``): ``R`` uniform on
    ``[0, m)`` accepted with probability ``exp(-s R / 2**k)`` (so
    ``P(R = r) ~ a**r`` on ``[0, m)``), ``Q`` the number of successes of
    Bernoulli(``a**m``) before the first failure, ``a = exp(-s / 2**k)``.
    Then ``P(Q m + R = qm + r) = (1 - a**m) a**(qm) * a**r (1 - a)/(1 - a**m)
    = (1 - a) a**(qm + r)``.  All products stay at or below ``2**k <= 2**62``
    (or ``s <= 2**62`` when ``m = 1``).

    With ``cap``, values above ``cap`` are returned as ``cap`` (for skip walks,
    where every gap beyond the end is the same); without it a value of
    ``2**62`` or more raises ``OverflowError``.
    """
    if not (1 <= s <= _TOP and 0 <= k <= _MAX_K):
        raise ValueError(f"rate s / 2**k needs 1 <= s <= 2**62 and 0 <= k <= 62, got s={s}, k={k}")
    t = 1 << k
    m = 1 << ((t // s).bit_length() - 1) if s <= t else 1  # largest power of two <= 2**k / s
    r_part = np.zeros(n, dtype=np.int64)
    if m > 1:
        # Rejection on an i.i.d. stream of (R, coin) pairs: the accepted R's, taken in order, are
        # i.i.d. with the target law, so each round draws a little more than the expected need
        # (acceptance is at least 1 - 1/e) and keeps the first ones accepted; surplus accepted
        # values are dropped without looking at them.
        g_rate = s / t  # float, for the batch size only
        accept = -math.expm1(-g_rate * m) / (m * -math.expm1(-g_rate))  # P(accept) = mean of exp(-rate R)
        filled = 0
        while filled < n:
            need = n - filled
            draw = int(need / accept * 1.01) + 16
            r = _below(stream, m, draw)
            ok = _bern_exp_unit(stream, r.astype(np.uint64) * np.uint64(s), k)  # s * r < s * m <= 2**k
            got = r[ok][:need]
            r_part[filled:filled + got.size] = got
            filled += got.size
    q_part = np.zeros(n, dtype=np.int64)
    idx = np.arange(n)
    while idx.size:
        b = _bern_exp(stream, s * m, k, idx.size)      # s * m <= max(2**k, s) <= 2**62
        idx = idx[b]
        q_part[idx] += 1
    limit = _MAX_VALUE if cap is None else int(cap)
    if n == 0 or int(q_part.max()) <= (limit - (m - 1)) // m:  # q m + r <= q m + m - 1 <= limit
        return q_part * m + r_part
    too_big = q_part > (limit - r_part) // m
    if too_big.any():
        if cap is None:
            raise OverflowError(
                f"a geometric draw reached 2**62 (rate {s}/2**{k}); this has probability below "
                "exp(-256) at the scales accepted and is refused rather than wrapped"
            )
        out = q_part * m + np.where(too_big, 0, r_part)
        out[too_big] = limit
        return out
    return q_part * m + r_part


# --------------------------------------------------------------------------- exact bounds, constant coins
def _round_rel(x: Fraction, bits: int, up: bool) -> Fraction:
    """``x > 0`` rounded down (or up) to ``bits`` significant bits: a dyadic ``<= x`` (``>= x``)."""
    e = x.numerator.bit_length() - x.denominator.bit_length()  # 2**(e-1) < x < 2**(e+1)
    shift = bits - e
    if shift >= 0:
        q, r = divmod(x.numerator << shift, x.denominator)
        return Fraction(q + (1 if up and r else 0), 1 << shift)
    q, r = divmod(x.numerator, x.denominator << -shift)
    return Fraction((q + (1 if up and r else 0)) << -shift)


def _alternating_bounds(terms, first: Fraction, tol: Fraction) -> tuple[Fraction, Fraction]:
    """Bracket ``sum_j (-1)**j t_j`` for non-increasing ``t_j >= 0`` tending to 0.

    ``terms(j, t_{j-1})`` returns ``t_j``; consecutive partial sums bracket the
    limit (Leibniz).  Stops when the last term is below ``tol``.
    """
    total, term, j = first, first, 0
    while True:
        j += 1
        term = terms(j, term)
        nxt = total - term if j % 2 else total + term
        if term <= tol:
            return (min(total, nxt), max(total, nxt))
        total = nxt


@functools.lru_cache(maxsize=256)
def exp_neg_bounds(x: Fraction, bits: int) -> tuple[Fraction, Fraction]:
    """Rationals ``lo <= exp(-x) <= hi`` for rational ``x >= 0``, ``hi / lo - 1`` about ``2**-bits``.

    ``exp(-f)`` for ``0 <= f < 1`` and ``exp(-1)`` come from the alternating
    Taylor series (terms ``f**j / j!`` are non-increasing, so partial sums
    bracket the value); ``exp(-n) = exp(-1)**n`` by squaring with outward
    rounding.  Every step rounds down the lower and up the upper bound, so the
    bracket is rigorous whatever the precision.
    """
    x = Fraction(x)
    if x < 0:
        raise ValueError("x must be >= 0")
    n = x.numerator // x.denominator
    f = x - n
    work = bits + 8 + 2 * max(n, 1).bit_length()
    tol = Fraction(1, 1 << (work + 2))
    lo_f, hi_f = _alternating_bounds(lambda j, t: t * f / j, Fraction(1), tol)
    lo, hi = _round_rel(max(lo_f, tol), work, False), _round_rel(hi_f, work, True)
    if n:
        lo1, hi1 = _alternating_bounds(lambda j, t: t / j, Fraction(1), tol)
        lo1, hi1 = _round_rel(lo1, work, False), _round_rel(hi1, work, True)
        plo, phi = Fraction(1), Fraction(1)
        e = n
        while e:
            if e & 1:
                plo, phi = _round_rel(plo * lo1, work, False), _round_rel(phi * hi1, work, True)
            e >>= 1
            if e:
                lo1, hi1 = _round_rel(lo1 * lo1, work, False), _round_rel(hi1 * hi1, work, True)
        lo, hi = _round_rel(lo * plo, work, False), _round_rel(hi * phi, work, True)
    return lo, hi


@functools.lru_cache(maxsize=256)
def one_minus_exp_neg_bounds(x: Fraction, bits: int) -> tuple[Fraction, Fraction]:
    """Rationals ``lo <= 1 - exp(-x) <= hi`` for rational ``0 < x <= 1``, relative width about ``2**-bits``.

    Alternating series ``x - x**2/2! + x**3/3! - ...`` (no cancellation for small ``x``).
    """
    x = Fraction(x)
    if not 0 < x <= 1:
        raise ValueError("x must be in (0, 1]")
    tol = x / (1 << (bits + 4))
    lo, hi = _alternating_bounds(lambda j, t: t * x / (j + 1), x, tol)
    return _round_rel(lo, bits + 8, False), _round_rel(hi, bits + 8, True)


def bernoulli_bounded(stream: ByteStream, bounds, n: int, fast_bits: int = 128) -> np.ndarray:
    """``n`` Bernoulli(``rho``), exactly, for a constant ``0 <= rho <= 1`` known through rigorous bounds.

    ``bounds(bits)`` returns rationals ``lo <= rho <= hi`` that tighten as
    ``bits`` grows.  A uniform ``V`` is revealed 64 bits at a time: with the
    first word ``w``, ``V < rho`` is certain when ``(w + 1) / 2**64 <= lo`` and
    ``V >= rho`` is certain when ``w / 2**64 >= hi``.  The rest (probability
    about ``(hi - lo) + 2**-63``) get more words and tighter bounds, one by one,
    until decided: each draw is then exactly Bernoulli(``rho``).
    """
    lo, hi = bounds(fast_bits)
    w = stream.words(n, 64)
    lo64 = (lo.numerator << 64) // lo.denominator           # floor(lo * 2**64)
    hi64 = -((-hi.numerator << 64) // hi.denominator)       # ceil(hi * 2**64)
    top = (1 << 64) - 1
    out = w < np.uint64(min(lo64, top)) if lo64 > 0 else np.zeros(n, dtype=bool)
    if hi64 <= top:
        undecided = ~out & (w < np.uint64(hi64))
    else:
        undecided = ~out
        if hi64 > top and lo64 > top:  # rho == 1 up to the bounds: only w = 2**64 - 1 is undecided
            undecided = w == np.uint64(top)
    cache = {fast_bits: (lo, hi)}
    for i in np.flatnonzero(undecided):
        out[i] = _below_after(stream, int(w[i]), 64, bounds, cache, fast_bits)
    return out


def _below_after(stream: ByteStream, value: int, nbits: int, bounds, cache: dict, fast_bits: int) -> bool:
    """Decide ``V < rho`` for a uniform ``V`` whose first ``nbits`` bits are ``value``, exactly.

    The first bits left it open; further 64-bit words of ``V`` are drawn one
    at a time and compared with ``bounds(bits)`` (rationals ``lo <= rho <=
    hi``, tighter as ``bits`` grows; ``cache`` keeps them by precision) until
    the interval ``[value, value + 1) / 2**nbits`` lies on one side of the
    bounds.  ``V`` given its first bits is uniform on that interval, so the
    answer is exactly the event ``V < rho``.
    """
    bits = fast_bits
    while True:
        value = (value << 64) | int(stream.words(1, 64)[0])
        nbits += 64
        bits = max(bits, nbits + 64)
        if bits not in cache:
            cache[bits] = bounds(bits)
        lo, hi = cache[bits]
        if (value + 1) * lo.denominator <= lo.numerator << nbits:   # (value + 1) / 2**nbits <= lo
            return True
        if value * hi.denominator >= hi.numerator << nbits:         # value / 2**nbits >= hi
            return False


def _discrete_laplace(stream: ByteStream, s: int, k: int, n: int) -> np.ndarray:
    """``n`` exact discrete Laplace draws, ``P(Z = z) = (1 - a)/(1 + a) a**|z|``, ``a = exp(-s/2**k)``.

    [CKS20] Algorithm 2: a geometric ``G``, a fair sign, reject (negative,
    ``G = 0``).  Accepted pairs give ``P(Z = z) ~ (1/2) a**|z| (1 - a)`` for
    ``z != 0`` and ``(1/2)(1 - a)`` for ``z = 0``, i.e. the pmf above after
    normalising by ``1 - (1 - a)/2 = (1 + a)/2``.
    """
    out = np.empty(n, dtype=np.int64)
    # Rejection on an i.i.d. stream of (G, sign) pairs: the accepted values, in order, are i.i.d.
    # with the target law; each round draws enough for the expected rejections (a float estimate,
    # used for the batch size only) and keeps the first accepted ones.
    reject_rate = -math.expm1(-s / (1 << k)) / 2.0 if s <= 64 << k else 0.5  # (1 - a) / 2
    filled = 0
    while filled < n:
        need = n - filled
        draw = int(need / (1.0 - reject_rate) * 1.02) + 16
        g = geometric_exact(stream, s, k, draw)
        neg = stream.bits(draw)
        vals = np.where(neg, -g, g)[~(neg & (g == 0))][:need]
        out[filled:filled + vals.size] = vals
        filled += vals.size
    return out


# --------------------------------------------------------------------------- inversion by a table
# Magnitudes |Z| are drawn by inverting P(|Z| >= g) = 2 a**g / (1 + a) (g >= 1) over a table of rigorous
# 64-bit bounds while that probability is at least 2**-_TABLE_TAIL_BITS, then by the exact geometric sampler
# beyond it; the table is used when it has at most _TABLE_MAX thresholds (noise scales up to about 148).
_TABLE_TAIL_BITS = 40
_TABLE_MAX = 4096
_TABLE_WORK = 192  # bits of the fixed-point bounds of a**g (relative error below g * 2**-190)
_MAG_BITS = 63     # a draw's 64-bit word: the top bit is the sign, the other 63 bits invert the magnitude


def _tail_bounds(x: Fraction, g: int, bits: int) -> tuple[Fraction, Fraction]:
    """Rationals ``lo <= 2 a**g / (1 + a) <= hi`` for ``a = exp(-x)``, relative width about ``2**-bits``."""
    g_lo, g_hi = exp_neg_bounds(x * g, bits + 8)
    a_lo, a_hi = exp_neg_bounds(x, bits + 8)
    return 2 * g_lo / (1 + a_hi), 2 * g_hi / (1 + a_lo)


@functools.lru_cache(maxsize=64)
def _magnitude_table(s: int, k: int, tail_bits: int = _TABLE_TAIL_BITS):
    """Integer bounds of the magnitude thresholds of the discrete Laplace law at rate ``s / 2**k``.

    Returns ``(lo, hi)``, uint64 arrays of length ``T`` with ``lo[g-1] <=
    2**63 * 2 a**g / (1 + a) <= hi[g-1]`` for ``g = 1..T`` (``a = exp(-s /
    2**k)``), ``T`` the first ``g`` whose threshold is below ``2**-tail_bits``;
    or ``None`` when ``T`` would exceed ``_TABLE_MAX`` or two neighbouring
    thresholds are not separated (``lo[g-1] >= hi[g]``), so that a 63-bit word
    is ever undecided about one threshold at most.

    ``a**g`` is bracketed in fixed point with ``_TABLE_WORK`` bits, starting
    from the rigorous bounds of ``a`` of :func:`exp_neg_bounds` and rounding
    every product down (lower bound) or up (upper bound).
    """
    if s / (1 << k) * _TABLE_MAX < tail_bits * math.log(2) * 0.99:  # float estimate of T: far too many, skip
        return None
    x = Fraction(s, 1 << k)
    one = 1 << _TABLE_WORK
    a_lo, a_hi = exp_neg_bounds(x, _TABLE_WORK + 8)
    a_lo = (a_lo.numerator << _TABLE_WORK) // a_lo.denominator          # floor(a_lo * 2**W)
    a_hi = -((-a_hi.numerator << _TABLE_WORK) // a_hi.denominator)      # ceil(a_hi * 2**W)
    p_lo, p_hi = a_lo, a_hi                                             # bounds of a**g * 2**W
    lo, hi = [], []
    stop = 1 << (_MAG_BITS - tail_bits)
    while True:
        lo.append((2 * p_lo << _MAG_BITS) // (one + a_hi))             # floor(2 a**g / (1 + a) * 2**63), low
        hi.append(-((-2 * p_hi << _MAG_BITS) // (one + a_lo)))          # ceil(...), high
        if hi[-1] < stop:
            break
        if len(lo) >= _TABLE_MAX:
            return None
        p_lo = (p_lo * a_lo) >> _TABLE_WORK
        p_hi = -((-p_hi * a_hi) >> _TABLE_WORK)
    if hi[0] > (1 << _MAG_BITS) - 1 or any(lo[i] < hi[i + 1] for i in range(len(lo) - 1)):
        return None
    lo, hi = np.array(lo, dtype=np.uint64), np.array(hi, dtype=np.uint64)
    lo.flags.writeable = hi.flags.writeable = False  # cached and shared: nobody may change a threshold
    return lo, hi


def _discrete_laplace_by_table(stream: ByteStream, s: int, k: int, n: int, table) -> np.ndarray:
    """``n`` exact discrete Laplace draws at rate ``s / 2**k`` by inversion of the magnitude's law.

    With ``t_g = P(|Z| >= g) = 2 a**g / (1 + a)`` for ``g >= 1`` (from the pmf
    ``(1 - a)/(1 + a) a**|z|`` of [GRS09]) and ``V`` uniform on ``[0, 1)``,
    ``|Z| = #{g >= 1 : V < t_g}`` has exactly that law (the ``t_g`` decrease),
    and a fair sign makes ``Z``.  Each draw takes one 64-bit word: its top bit
    is the sign, the other 63 are the first bits of ``V``.  Against the
    table's bounds ``lo_g <= 2**63 t_g <= hi_g`` the word ``w`` decides ``V <
    t_g`` when ``w < lo_g`` and ``V >= t_g`` when ``w >= hi_g``; a word in
    ``[lo_g, hi_g)`` (at most one threshold, probability about ``T * 2**-62``)
    is settled exactly by more words of ``V`` (:func:`_below_after`).  When
    ``V < t_T`` (the last threshold, below ``2**-40``), ``|Z| = T + G`` with
    ``G`` the exact geometric of :func:`geometric_exact`: given ``|Z| >= T``,
    ``|Z| - T`` is geometric with ``P(>= j) = a**j`` (memorylessness), drawn
    afresh.  No floating point, no truncation.
    """
    lo, hi = table
    t = lo.size
    w = stream.words(n, 64)
    sign = (w >> np.uint64(_MAG_BITS)).astype(np.int64)
    v = w & np.uint64((1 << _MAG_BITS) - 1)
    mag = t - np.searchsorted(lo[::-1], v, side="right")    # #{g : v < lo_g} (lo decreasing in g)
    pending = np.flatnonzero(v < np.append(hi, np.uint64(0))[mag])  # lo_{c+1} <= v < hi_{c+1}
    if pending.size:
        x = Fraction(s, 1 << k)
        for i in pending:
            g = int(mag[i]) + 1
            bounds = functools.partial(_tail_bounds, x, g)
            if _below_after(stream, int(v[i]), _MAG_BITS, bounds, {}, 128):
                mag[i] = g
    far = np.flatnonzero(mag == t)
    if far.size:
        mag[far] += geometric_exact(stream, s, k, far.size)
    return (mag ^ -sign) + sign                              # -mag where the sign bit is 1


# --------------------------------------------------------------------------- rates
def _as_fraction(x, what: str) -> Fraction:
    if isinstance(x, (bool, np.bool_)):
        raise TypeError(f"'{what}' must be a number, got {x!r}")
    if isinstance(x, Fraction):
        return x
    if isinstance(x, numbers.Integral):
        return Fraction(int(x))
    if isinstance(x, numbers.Real):
        xf = float(x)
        if not math.isfinite(xf):
            raise ValueError(f"'{what}' must be finite, got {x!r}")
        return Fraction(xf)  # exact: a binary64 float is a dyadic rational
    raise TypeError(f"'{what}' must be a number, got {x!r}")


def dyadic_rate(rate) -> tuple[int, int]:
    """The largest ``s / 2**k <= rate`` with ``0 <= k <= 62`` and ``1 <= s <= 2**62``, as ``(s, k)``.

    Parameters
    ----------
    rate : int, float or fractions.Fraction
        ``epsilon / sensitivity`` (``-log(alpha)``), at least :data:`MIN_RATE`.
        Floats are taken at their exact binary value.

    Returns
    -------
    (int, int)
        ``s`` odd unless ``k == 0``; ``s / 2**k == rate`` exactly when ``rate``
        has such a form, else the largest such value below it (relative gap
        below ``2**-61`` for rates at least 1/2, below ``1 / (rate * 2**62)``
        for smaller rates).  Rates above ``2**62`` give ``(2**62, 0)``.

    Raises
    ------
    ValueError
        If ``rate`` is below :data:`MIN_RATE` (scale above ``2**54``) or not positive.
    """
    x = _as_fraction(rate, "rate")
    if not x > 0:
        raise ValueError(f"the noise rate epsilon/sensitivity must be > 0, got {x}")
    if x < MIN_RATE:
        raise ValueError(
            f"noise scale too large: rate epsilon/sensitivity = {float(x)!r} is below 2**-54 "
            "(scale above 1.8e16); draws could leave the int64 range"
        )
    num, den = x.numerator, x.denominator
    if den & (den - 1) == 0:
        k = den.bit_length() - 1
        if k <= _MAX_K and num <= _TOP:
            return num, k
    k = _MAX_K
    while k > 0 and (num << k) // den > _TOP:
        k -= 1
    s = min((num << k) // den, _TOP)
    while k > 0 and s % 2 == 0:
        s //= 2
        k -= 1
    return s, k


def _check_alpha(alpha) -> float:
    if isinstance(alpha, (bool, np.bool_)) or not isinstance(alpha, numbers.Real):
        raise TypeError(f"'alpha' must be a real number in (0, 1), got {alpha!r}")
    alpha = float(alpha)
    if not (0.0 < alpha < 1.0):  # also rejects NaN
        raise ValueError(
            f"'alpha' must satisfy 0 < alpha < 1, got {alpha!r} "
            "(alpha = exp(-epsilon/sensitivity); 'no noise' is not a valid request)"
        )
    return alpha


def sample_dyadic(s: int, k: int, size: int, source: RandomSource,
                   chunk_size: int = DEFAULT_CHUNK_SIZE) -> np.ndarray:
    """Exact discrete Laplace draws with ``a = exp(-s / 2**k)``, ``chunk_size`` values at a time."""
    size = _check_count(size, "size")
    chunk_size = _check_count(chunk_size, "chunk_size")
    if chunk_size == 0:
        raise ValueError("'chunk_size' must be positive, got 0")
    table = _magnitude_table(s, k) if size else None
    stream = ByteStream(source, (8 if table is not None else 24) * min(size, chunk_size))
    out = np.empty(size, dtype=np.int64)
    for start in range(0, size, chunk_size):
        m = min(chunk_size, size - start)
        if table is not None:
            out[start:start + m] = _discrete_laplace_by_table(stream, s, k, m, table)
        else:
            out[start:start + m] = _discrete_laplace(stream, s, k, m)
    return out


def sample_discrete_laplace_exact(rate, size: int, source: RandomSource, *,
                                  chunk_size: int = DEFAULT_CHUNK_SIZE) -> np.ndarray:
    r"""Draw ``size`` values from the discrete Laplace law with :math:`\alpha = e^{-\mathrm{rate}}`, exactly.

    The probability mass function is

    .. math:: P(Z = z) = \frac{1 - \alpha}{1 + \alpha}\, \alpha^{|z|},
              \qquad z \in \mathbb{Z},

    the geometric mechanism of Ghosh, Roughgarden and Sundararajan [1]_ for
    ``rate = epsilon / sensitivity``.  Sampling follows Canonne, Kamath and
    Steinke [2]_ (see the module docstring): only random bytes and integer
    arithmetic, no floating point, no truncation of the tails.

    Parameters
    ----------
    rate : int, float or fractions.Fraction
        :math:`-\log\alpha`, at least :data:`MIN_RATE`.  The law sampled has
        the rate ``s / 2**k`` of :func:`dyadic_rate`: equal to ``rate`` when
        ``rate`` is a dyadic rational with ``k <= 62`` (every float of
        magnitude between ``2**-10`` and ``2**62`` is), otherwise the largest
        such value below it (never less noise than asked for).
    size : int
        Number of values, ``>= 0``.
    source : RandomSource
        Where the random bytes come from; :class:`SystemRandomSource` for a release.
    chunk_size : int, optional
        Values produced per internal batch (default ``2**20``).

    Returns
    -------
    numpy.ndarray of int64, shape ``(size,)``

    References
    ----------
    .. [1] A. Ghosh, T. Roughgarden, M. Sundararajan, "Universally
       utility-maximizing privacy mechanisms", STOC 2009.
    .. [2] C. L. Canonne, G. Kamath, T. Steinke, "The Discrete Gaussian for
       Differential Privacy", NeurIPS 2020.
    """
    s, k = dyadic_rate(rate)
    if not isinstance(source, RandomSource):
        raise TypeError(f"'source' must be a RandomSource, got {type(source).__name__}")
    return sample_dyadic(s, k, size, source, chunk_size=chunk_size)


def sample_discrete_laplace(alpha: float, size: int, source: RandomSource, *,
                            chunk_size: int = DEFAULT_CHUNK_SIZE) -> np.ndarray:
    r"""Draw ``size`` values from the discrete Laplace (two-sided geometric) law given ``alpha``.

    The probability mass function is

    .. math:: P(Z = z) = \frac{1 - \alpha}{1 + \alpha}\, \alpha^{|z|},
              \qquad z \in \mathbb{Z},

    with :math:`\alpha = e^{-\varepsilon / \Delta}` [1]_.  This is
    :func:`sample_discrete_laplace_exact` at ``rate = -log(alpha)``: the one
    inexact step is that logarithm, a binary64 value (``log1p(alpha - 1)``
    for ``alpha > 1/2``, where ``alpha - 1`` is exact), so the law sampled is
    exactly :math:`e^{-r}` for a dyadic ``r`` within about one ulp below
    ``-log(alpha)``.  Callers that know :math:`\varepsilon/\Delta` should use
    :class:`aggpub.noise.mechanisms.GeometricMechanism` (or the exact
    function with the rate), which never takes a logarithm.

    Parameters
    ----------
    alpha : float
        :math:`e^{-\varepsilon/\Delta}`; must satisfy ``0 < alpha < 1``.  The
        degenerate ``alpha == 0`` ("no noise") is rejected rather than
        silently returning zeros.
    size : int
        Number of values, ``>= 0``.
    source : RandomSource
        Use :class:`SystemRandomSource` for a release.
    chunk_size : int, optional
        Values produced per internal batch (default ``2**20``).

    Returns
    -------
    numpy.ndarray of int64, shape ``(size,)``

    Raises
    ------
    ValueError
        If ``alpha`` is not in ``(0, 1)`` or so close to 1 that the scale
        exceeds ``2**54``, or if ``size`` is negative.

    Notes
    -----
    The output is an integer: continuous Laplace noise computed in floating
    point leaks the true value through the pattern of low-order bits of the
    result (Mironov [2]_); an integer-valued mechanism sampled with integer
    arithmetic has no such pattern.

    References
    ----------
    .. [1] A. Ghosh, T. Roughgarden, M. Sundararajan, "Universally
       utility-maximizing privacy mechanisms", Proceedings of the 41st ACM
       Symposium on Theory of Computing (STOC), 2009.
    .. [2] I. Mironov, "On significance of the least significant bits for
       differential privacy", Proceedings of the ACM Conference on Computer
       and Communications Security (CCS), 2012.
    """
    alpha = _check_alpha(alpha)
    rate = -math.log1p(alpha - 1.0) if alpha > 0.5 else -math.log(alpha)
    return sample_discrete_laplace_exact(rate, size, source, chunk_size=chunk_size)
