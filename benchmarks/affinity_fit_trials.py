"""Trials the affinity fit takes: the bracket started at rho 0 and 1 against rho 1/2 and the end on the root's side.

``aggpub.synthesis.sampler.fit_affinity`` draws one synthetic network per trial density (a draw and an exact
triangle count each: most of the fit's time). This script releases the demo town and every real network
under ``../shared/real-networks`` (skipped when absent) the way ``benchmarks/fidelity.py`` does (its loader
and plainest policy), and runs the root finder on both sides of the audit's comparison (the release's inputs
and the true aggregate's) with a few generator seeds, once with the current start
(``sampler._false_position``) and once with the start it replaced (``previous_start`` below, kept here as
the reference), counting the trials.

Usage::

    .venv/bin/python benchmarks/affinity_fit_trials.py [--seeds 3] [--epsilon 1]
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

import fidelity as FB  # noqa: E402  (the loader and policies of the fidelity benchmark)

import aggpub  # noqa: E402
from aggpub.graph_counts import count_triangles  # noqa: E402
from aggpub.synthesis import inputs_from_release, inputs_from_truth  # noqa: E402
from aggpub.synthesis import sampler  # noqa: E402


def previous_start(f, tolerance: float, steps: int) -> float:
    """The root finder as it was before 2026-12-03: trials at 0 and 1 first, then the Illinois method."""
    lo, f_lo = 0.0, f(0.0)
    if f_lo >= 0:
        return 0.0
    hi, f_hi = 1.0, f(1.0)
    if f_hi <= 0:
        return 1.0
    return sampler.illinois(f, lo, f_lo, hi, f_hi, tolerance, steps)


def trials(inputs, finder, seed: int):
    n, target = int(inputs.sizes.sum()), inputs.triangles
    rng = np.random.default_rng(seed)
    calls = []

    def excess(rho):
        calls.append(rho)
        u, v = sampler._draw(inputs, rho, rng)
        return count_triangles(u, v, n) - target

    rho = finder(excess, sampler.AFFINITY_TOLERANCE * target, sampler.AFFINITY_STEPS)
    return len(calls), rho


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=3, help="generator seeds per side")
    ap.add_argument("--epsilon", type=float, default=1.0)
    args = ap.parse_args(argv)
    totals = {"previous": [], "current": []}
    for name in ("town", "hospital", "kenya", "workplace", "highschool", "email", "facebook"):
        got = FB.load(name)
        if got is None:
            print(f"{name}: absent")
            continue
        edges, people, policy = got
        rel = aggpub.release_tables(edges, people, FB.policy_for(policy, args.epsilon, "after"), seed=3,
                                    charge_ledger=False)
        rin = inputs_from_release(rel)
        parts = []
        for side, inputs in (("release", rin), ("grouping alone", inputs_from_truth(rel, like=rin))):
            if inputs.triangles is None:
                parts.append(f"{side}: no triangle count")
                continue
            for label, finder in (("previous", previous_start), ("current", sampler._false_position)):
                runs = [trials(inputs, finder, seed) for seed in range(args.seeds)]
                totals[label] += [t for t, _ in runs]
                parts.append(f"{side} {label}: trials {[t for t, _ in runs]}, rho {[round(r, 2) for _, r in runs]}")
        print(f"{name}: " + "; ".join(parts), flush=True)
    for label, values in totals.items():
        print(f"{label} start: mean {np.mean(values):.2f} trials over {len(values)} fits")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
