"""Accuracy of the degree-histogram consistency methods (not a timing benchmark).

Per-bin mean squared error of raw noisy bins, clamping at 0, the simplex
projection and the cumulative isotonic fit, on simulated Poisson-degree
histograms. Run: /work/venv/bin/python benchmarks/consistency_error.py
"""

import numpy as np

from aggpub.estimates.consistency import cumulative_isotonic_histograms, simplex_histograms
from aggpub.noise.mechanisms import GeometricMechanism
from aggpub.noise.sampler import make_random_source


def main():
    rng = np.random.default_rng(1)
    print("size cap scale | mse/bin relative to raw: clamp0 simplex cumulative_isotonic")
    for size, cap, scale in [(30, 50, 4), (200, 50, 4), (1000, 20, 8), (50, 10, 1)]:
        g = 300
        deg = rng.poisson(8, size=(g, size))
        h = np.stack([np.bincount(np.minimum(d, cap), minlength=cap + 1) for d in deg])
        noisy = GeometricMechanism(1.0, scale).randomise(h, make_random_source(3))
        tot = np.full(g, size)
        raw = np.mean((noisy - h) ** 2)
        rel = [np.mean((est - h) ** 2) / raw for est in
               (np.maximum(noisy, 0), simplex_histograms(noisy, tot), cumulative_isotonic_histograms(noisy, tot))]
        print(f"{size:4d} {cap:3d} {scale:5g} | " + " ".join(f"{r:.3f}" for r in rel))


if __name__ == "__main__":
    main()
