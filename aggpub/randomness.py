"""Randomness that is not privacy noise, chosen in one place.

The noise that protects people comes from :func:`aggpub.noise.sampler.make_random_source`
(the operating system's entropy unless a test passes a seed). Everything else
that draws random numbers -- synthetic networks, the audit's Monte Carlo, the
choice of cut queries -- is post-processing or confidential measurement and
may be seeded freely; it gets its generator here.
"""

from __future__ import annotations

__all__ = ["make_generator"]

import numpy as np

from .errors import UsageError


def make_generator(seed=None) -> np.random.Generator:
    """A numpy generator: ``seed`` may be ``None`` (fresh entropy from the operating system), a
    non-negative integer, or a generator (returned as is).

    Raises
    ------
    UsageError
        ``seed`` is neither.
    """
    if isinstance(seed, np.random.Generator):
        return seed
    if seed is not None and (isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0):
        raise UsageError(f"'seed' must be a non-negative integer or None, got {seed!r}")
    return np.random.default_rng(seed)
