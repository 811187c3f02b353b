"""Fresh noise draws on the true tables (the audit's Monte Carlo): one draw evaluated, many mapped.

Confidential: the re-drawn tables are never published, only error figures
computed from them go into the board's report.
"""

from __future__ import annotations

__all__ = ["MC_DEFAULT_MAX", "MC_DEFAULT_MIN", "MC_DEFAULT_VALUES", "MC_PARALLEL_MAX_CELLS", "audit_source",
           "default_monte_carlo", "draw_noise", "map_draws", "mc_errors", "post_process", "spread"]

import os

import numpy as np

from .metrics import percentiles

#: Above this many cells the Monte Carlo runs one draw at a time: two draws at once on 2,001,000-cell tables
#: took 1.3-1.5 times as long as one after the other (their fresh arrays contend for memory, each draw holds
#: a few copies of the table), while on 720,600 cells and fewer two at once were 1.1-1.6 times faster
#: (``benchmarks/bench_mc_threads.py``, ``benchmarks/results/mc-threads-2026-12-03.txt``).
MC_PARALLEL_MAX_CELLS = 1_000_000
#: Monte Carlo draws when none are asked for: as many as fit ``MC_DEFAULT_VALUES`` values
#: (draws x cells), between ``MC_DEFAULT_MIN`` and ``MC_DEFAULT_MAX``.
MC_DEFAULT_MAX = 20
MC_DEFAULT_MIN = 3
MC_DEFAULT_VALUES = 6_000_000


def default_monte_carlo(n_cells: int) -> int:
    """Monte Carlo draws the audit makes by default on a table of ``n_cells`` cells.

    20 draws up to 300,000 cells; fewer above (each draw costs a pass over every
    cell and every workload), never fewer than 3. An error figure that averages
    over millions of cells varies little from draw to draw, so a few draws show
    its spread; the expected errors beside it are exact.
    """
    per = MC_DEFAULT_VALUES // max(int(n_cells), 1)
    return int(min(MC_DEFAULT_MAX, max(MC_DEFAULT_MIN, per)))


def audit_source():
    """Randomness for the audit's Monte Carlo: PCG64 seeded from the operating system's entropy.

    The re-drawn tables are never published (only error figures computed from
    them go into the confidential report), so a fast generator seeded once from
    the operating system serves; reading the operating system's source for each
    of millions of values costs seconds on large tables.
    """
    import secrets

    from ..noise.sampler import SeededRandomSource

    return SeededRandomSource(secrets.randbits(63))


def draw_noise(mech, n: int, rng: np.random.Generator, *, as_float: bool = False) -> np.ndarray:
    """``n`` draws of a discrete Laplace mechanism's noise for the audit's Monte Carlo (never published).

    The difference of two independent geometric variables on ``{0, 1, ...}``
    with success probability ``1 - alpha`` has the two-sided geometric law
    ``P(Z = z) = (1 - alpha) / (1 + alpha) alpha^|z|`` (Ghosh, Roughgarden,
    Sundararajan, STOC 2009), at ``alpha = exp(-rate)`` with the mechanism's
    own rate. Each geometric is ``floor(E / rate)`` for a standard exponential
    ``E``: ``P(floor(E / rate) >= g) = P(E >= g rate) = alpha^g``. numpy's
    floating-point exponentials (ziggurat) are faster than its geometric sampler
    and than the exact integer sampler a release needs (Canonne, Kamath, Steinke,
    NeurIPS 2020); floating-point defects (Mironov, CCS 2012) matter only for
    values that are published, and these tables never are.

    With ``as_float`` the same whole numbers come as float64 (the audit adds them to float tables; no
    integer copy in between).

    References
    ----------
    A. Ghosh, T. Roughgarden, M. Sundararajan, "Universally utility-maximizing privacy
    mechanisms", STOC 2009.
    """
    scale = 1.0 / float(mech.rate)
    z, g = rng.standard_exponential(n), rng.standard_exponential(n)  # two arrays, reused in place
    z *= scale
    np.floor(z, out=z)
    g *= scale
    np.floor(g, out=g)
    z -= g  # whole numbers as floats (exact below 2**53: scales up to about 10**14); int64 holds every value
    return z if as_float else z.astype(np.int64)


def post_process(noisy, cap, threshold=None):
    """A noisy table post-processed as the release is.

    ``clip(noisy, 0, cap)`` on every cell; with a sparse ``threshold``, cells
    whose noisy value is below it are absent (read as 0), which is the law the
    sparse release samples (noise every cell, then threshold).
    """
    out = np.clip(noisy, 0, cap)
    if threshold is not None:
        out = np.where(noisy >= threshold, out, 0)
    return out


def mc_errors(true, estimate, sanity_bound: float) -> tuple[float, float, float]:
    """Mean absolute, median relative and p90 relative error (the Monte Carlo's figures).

    The same definitions as :func:`aggpub.audit.metrics.error_summary`, without
    the figures the Monte Carlo does not keep.
    """
    abs_err = np.abs(np.asarray(estimate, dtype=np.float64) - true)
    mean_abs = float(abs_err.mean())
    rel = np.divide(abs_err, np.maximum(true, sanity_bound), out=abs_err)  # abs_err is ours: reused in place
    p50, p90 = percentiles(rel, [50, 90], overwrite=True)
    return mean_abs, float(p50), float(p90)


def spread(values) -> dict:
    """Mean, standard deviation and 5th/95th percentiles of a figure over the draws."""
    v = np.asarray(values, dtype=np.float64)
    return {"mean": float(v.mean()), "sd": float(v.std(ddof=1)) if len(v) > 1 else 0.0,
            "p05": float(np.percentile(v, 5)), "p95": float(np.percentile(v, 95)), "draws": int(len(v))}


def map_draws(one_draw, draws: int, n_cells: int, source):
    """``one_draw(i, rng_i)`` for ``i < draws``, in order, on up to two worker threads.

    Each draw gets its own numpy generator (PCG64), seeded from ``source`` (so a seeded audit
    stays reproducible and the draws stay independent); the work of a draw is
    numpy on whole tables, which runs outside Python's global interpreter lock,
    so two draws proceed at once on a two-core machine. Tables above
    :data:`MC_PARALLEL_MAX_CELLS` cells run one draw at a time (faster there, and less memory).
    """
    from concurrent.futures import ThreadPoolExecutor

    seeds = np.floor(source.uniform(draws) * 2.0 ** 53).astype(np.int64)
    sources = [np.random.default_rng(int(x)) for x in seeds]
    workers = 1 if n_cells > MC_PARALLEL_MAX_CELLS else max(1, min(2, os.cpu_count() or 1, draws))
    if workers == 1:
        return [one_draw(i, src) for i, src in enumerate(sources)]
    with ThreadPoolExecutor(max_workers=workers, thread_name_prefix="aggpub-audit") as pool:
        return list(pool.map(one_draw, range(draws), sources))
