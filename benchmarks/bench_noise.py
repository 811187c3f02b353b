"""Bulk discrete Laplace noise: the exact sampler against diffprivlib's ``Geometric`` and the old float sampler.

Usage::

    .venv/bin/python benchmarks/bench_noise.py                       # 2,000,000 cells, five (epsilon, sensitivity)
    .venv/bin/python benchmarks/bench_noise.py --cells 1000000 --pairs 1:1,0.1:100 --repeats 5

For each ``(epsilon, sensitivity)`` the same run times, on ``--cells`` values:

* ``exact``: ``GeometricMechanism(epsilon, sensitivity).noise(cells, SystemRandomSource())``, the
  sampler of ``aggpub.noise.sampler`` (integer arithmetic, ``os.urandom`` bytes);
* ``exact-wrapped``: the same through ``ChargeOnFirstDraw(SystemRandomSource(), ...)``, the wrapper the
  release pipeline uses (it forwards ``random_bytes`` after charging the ledger once);
* ``alg2``: Canonne, Kamath and Steinke's Algorithm 2 (geometric, sign, rejection), the exact sampler
  that ``exact`` uses only above a noise scale of about 148 since the magnitude table came in
  (``aggpub.noise.sampler._discrete_laplace``, called directly);
* ``float-old``: the float inversion sampler that the exact one replaced (kept here, for comparison
  only: ``floor(log U / log alpha)`` twice, on ``os.urandom`` uniforms);
* ``diffprivlib``: a Python loop of ``diffprivlib.mechanisms.Geometric(epsilon=...,
  sensitivity=...).randomise(0)``, one call per value (the per-value API is the only one it has).
  ``--dpl-cells N`` times ``N`` values only and scales the time linearly to ``--cells`` (marked
  ``extrapolated``); by default all ``--cells`` values are drawn.

Times are medians over ``--repeats`` (diffprivlib: one run), wall clock and CPU time of this
process (``time.process_time``, less sensitive to other jobs on a shared machine). Printed: seconds, the ratio
``diffprivlib / exact`` (the speed target is at least 25), ``float-old / exact``, and a sanity line
(variance against ``2a/(1-a)^2``, the largest ``|noise| / scale`` seen: the old sampler could never
exceed about 36.7). Quote the ratios: the machines are shared and noisy.
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np

from aggpub.budget.ledger import ChargeOnFirstDraw
from aggpub.noise.mechanisms import GeometricMechanism
from aggpub.noise import sampler as smp
from aggpub.noise.sampler import SystemRandomSource

DEFAULT_PAIRS = "0.1:1,1:1,10:1,1:4,0.5:2,0.1:100"


def old_float_sampler(log_alpha: float, size: int, source, chunk: int = 1 << 20) -> np.ndarray:
    """The replaced sampler: G1 - G2, each floor(log U / log alpha) on 52-bit uniforms (benchmark only)."""
    out = np.empty(size, dtype=np.int64)
    for start in range(0, size, chunk):
        m = min(chunk, size - start)
        g = []
        for _ in range(2):
            u = source.uniform(m)
            u = np.log(u)
            u /= log_alpha
            np.floor(u, out=u)
            g.append(u.astype(np.int64))
        np.subtract(g[0], g[1], out=out[start:start + m])
    return out


def timed(fn, repeats: int):
    """Median wall time and median CPU time (``time.process_time``) over ``repeats`` runs."""
    walls, cpus, result = [], [], None
    for _ in range(repeats):
        t0, c0 = time.perf_counter(), time.process_time()
        result = fn()
        walls.append(time.perf_counter() - t0)
        cpus.append(time.process_time() - c0)
    return (statistics.median(walls), statistics.median(cpus)), result


def diffprivlib_time(epsilon: float, sensitivity: int, cells: int, dpl_cells: int):
    from diffprivlib.mechanisms import Geometric

    n = min(cells, dpl_cells) if dpl_cells else cells
    mech = Geometric(epsilon=epsilon, sensitivity=sensitivity)  # diffprivlib wants an int sensitivity
    t0, c0 = time.perf_counter(), time.process_time()
    x = np.fromiter((mech.randomise(0) for _ in range(n)), dtype=np.int64, count=n)
    wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    return (wall * cells / n, cpu * cells / n), n < cells, x


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--cells", type=int, default=2_000_000)
    ap.add_argument("--pairs", default=DEFAULT_PAIRS, help="epsilon:sensitivity,... (default %(default)s)")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--dpl-cells", type=int, default=0, help="time this many diffprivlib values and scale up")
    args = ap.parse_args(argv)
    pairs = [(float(p.split(":")[0]), int(p.split(":")[1])) for p in args.pairs.split(",")]  # integer sensitivities
    src = SystemRandomSource()
    src.random_bytes(16)  # warm the entropy path
    print(f"cells={args.cells:,} repeats={args.repeats} (medians); diffprivlib "
          f"{'all values' if not args.dpl_cells else f'{args.dpl_cells:,} values, scaled'}")
    header = (f"{'epsilon':>8} {'sens':>5} {'scale':>7} {'exact s':>7} {'wrapped s':>9} {'float-old s':>11} "
              f"{'diffprivlib s':>13} {'dpl/exact':>9} {'(cpu)':>7} {'dpl/wrapped':>11} {'(cpu)':>7} "
              f"{'float/exact':>11} {'alg2 s':>7} {'alg2/exact':>10}  sanity")
    print(header)
    ratios, cpu_ratios = [], []
    for eps, sens in pairs:
        mech = GeometricMechanism(eps, sens)
        (t_exact, c_exact), x = timed(lambda: mech.noise(args.cells, src), args.repeats)
        wrapped = ChargeOnFirstDraw(SystemRandomSource(), lambda: None)
        (t_wrap, c_wrap), _ = timed(lambda: mech.noise(args.cells, wrapped), args.repeats)
        (t_old, c_old), _ = timed(lambda: old_float_sampler(mech.log_alpha, args.cells, src), args.repeats)
        s_, k_ = smp.dyadic_rate(mech.rate)
        (t_alg2, _), _ = timed(lambda: smp._discrete_laplace(smp.ByteStream(src, 24 * min(args.cells, 1 << 20)),
                                                              s_, k_, args.cells), args.repeats)
        (t_dpl, c_dpl), extrapolated, ref = diffprivlib_time(eps, sens, args.cells, args.dpl_cells)
        var_ratio = float(np.var(x)) / mech.variance()
        ref_ratio = float(np.var(ref)) / mech.variance()
        max_over_scale = float(np.abs(x).max()) / mech.scale
        ratios.append(t_dpl / t_exact)
        cpu_ratios.append(c_dpl / c_exact)
        print(f"{eps:>8g} {sens:>5d} {mech.scale:>7g} {t_exact:>7.3f} {t_wrap:>9.3f} {t_old:>11.3f} "
              f"{t_dpl:>12.2f}{'*' if extrapolated else ' '} {t_dpl / t_exact:>8.1f}x {c_dpl / c_exact:>6.1f}x "
              f"{t_dpl / t_wrap:>10.1f}x {c_dpl / c_wrap:>6.1f}x {t_old / t_exact:>10.2f}x "
              f"{t_alg2:>7.3f} {t_alg2 / t_exact:>9.2f}x  "
              f"var/theory={var_ratio:.3f} (dpl {ref_ratio:.3f}) max|z|/scale={max_over_scale:.1f} "
              f"rate_exact={mech.rate_is_exact}")
    print(f"diffprivlib / exact: wall min {min(ratios):.1f}x median {statistics.median(ratios):.1f}x; "
          f"cpu min {min(cpu_ratios):.1f}x median {statistics.median(cpu_ratios):.1f}x (target >= 25x)"
          f"{'; * = extrapolated from --dpl-cells' if args.dpl_cells else ''}")


if __name__ == "__main__":
    main()
