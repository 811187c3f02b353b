"""The number of triangles of the whole network, released with the ladder mechanism (unit ``edge``).

Why a ladder. Under unit ``edge`` one contact ``{i, j}`` closes one triangle with
every common contact of ``i`` and ``j``: the global sensitivity is ``n - 2``,
useless, and no public contact cap exists under ``edge``. The ladder mechanism
(:mod:`aggpub.noise.ladder`) needs instead *ladder widths* ``I_t(G)``: an upper
bound on how much one contact can change the count on any network within ``t``
contacts of ``G``, growing by at most one rung per contact.

Our widths: ``I_t(G) = min(d_2(G) + t, n - 2)``, with ``d_2`` the second largest
degree of ``G`` and ``n`` the (public) number of people.

* ``I_0(G) >= |q(G) - q(G')|``: adding or removing the contact ``{i, j}`` changes
  the number of triangles by ``a_ij``, the number of common contacts of ``i`` and
  ``j``; ``a_ij <= min(d_i, d_j) <= d_2`` (the smaller degree of two different people
  is at most the second largest degree) and ``a_ij <= n - 2``.
* ``I_{t+1}(G) >= I_t(G')`` for neighbours: one contact changes two degrees by one,
  and every order statistic of a vector moves by at most the largest change of an
  entry, so ``d_2(G') <= d_2(G) + 1`` and ``min(d_2(G') + t, n - 2) <= min(d_2(G) + t + 1, n - 2)``.

They are looser than the local sensitivity at distance ``t`` (Nissim, Raskhodnikova,
Smith, STOC 2007: ``max_{i != j} min(a_ij + floor((t + min(t, b_ij)) / 2), n - 2)``),
which needs every pair's common contacts, a computation as large as the sum of
squared degrees; ``d_2`` comes from the degrees the release counts anyway. On the
development networks the difference is small against the count (the benchmark,
``benchmarks/fidelity.py``, measures the whole effect).

Cost. The count itself is exact: people are ranked by degree (ties by id), each
contact points from the lower rank to the higher, and the triangles are the
closed oriented wedges, counted by a sparse product in batches of rows (Latapy,
"Main-memory triangle computations for very large (sparse (power-law)) graphs",
Theoretical Computer Science 407, 2008; citation recalled from memory). Work grows
with the sum over people of their squared number of contacts to higher-ranked
people, bounded by ``m^1.5`` for ``m`` contacts. That is why the statistic is on by
default only up to :data:`aggpub.policy.TRIANGLE_AUTO_MAX_PEOPLE` people (a public
figure under ``edge``).

Unit ``person``: not derived (one person closes up to ``C(D, 2)`` triangles and moves
other people's widths); the policy refuses it.

References
----------
J. Zhang, G. Cormode, C. M. Procopiuc, D. Srivastava, X. Xiao, "Private release of
graph statistics using ladder functions", SIGMOD 2015.

K. Nissim, S. Raskhodnikova, A. Smith, "Smooth sensitivity and sampling in private
data analysis", STOC 2007.
"""

from __future__ import annotations

__all__ = ["TriangleTruth", "ManifestFields", "count_triangles", "triangle_truth", "ladder_widths",
           "release_triangle_count"]

from dataclasses import dataclass

import numpy as np

from ..budget import Spend
from ..graph_counts import count_triangles  # triangle_truth counts with it (also re-exported: it lived here)
from ..noise.ladder import LadderMechanism


class ManifestFields(dict):
    """Fields a statistic releases in the manifest itself rather than as a table (the triangle count)."""


@dataclass(frozen=True)
class TriangleTruth:
    """The true triangle count and what its ladder widths need (confidential; never published)."""

    count: int
    second_degree: int
    n_people: int


def triangle_truth(engine, n_people: int) -> TriangleTruth:
    """The true count and the second largest degree, from the engine's existing methods.

    A plain function over ``engine.edge_arrays()`` and ``engine.degrees(n)`` (both
    existing engine methods); the engines may later count triangles themselves.
    """
    u, v = engine.edge_arrays()
    deg = engine.degrees(n_people)
    d2 = int(np.partition(deg, -2)[-2]) if len(deg) >= 2 else 0
    return TriangleTruth(count=count_triangles(u, v, n_people), second_degree=d2, n_people=int(n_people))


def ladder_widths(second_degree: int, n_people: int, rungs: int) -> np.ndarray:
    """``I_t = min(d_2 + t, n - 2)`` for ``t = 0 .. rungs - 1`` (see the module docstring)."""
    cap = max(int(n_people) - 2, 0)
    t = np.arange(int(rungs), dtype=np.int64)
    return np.minimum(int(second_degree) + t, cap)


def release_triangle_count(truth: TriangleTruth, epsilon: float, source):
    """The ladder mechanism's output for the triangle count.

    Returns
    -------
    fields : dict
        ``{"triangle_count": k}`` for the manifest (``k`` an integer, possibly negative or
        above the possible number of triangles; clip it when you use it).
    spend : Spend
        ``mechanism = "ladder"``, ``sensitivity = 1`` (of the rung score), ``scale = 2 / epsilon``.
    mechanism : LadderMechanism
    """
    mech = LadderMechanism(epsilon=epsilon)
    cap = max(truth.n_people - 2, 0)
    if cap == 0:  # fewer than 3 people (public): no triangle can exist, nothing is read
        k = 0
    else:
        k = mech.sample(truth.count, lambda t: np.minimum(truth.second_degree + np.asarray(t, np.int64), cap),
                        cap, source)
    return ManifestFields(triangle_count=int(k)), Spend.of("triangle_count", mech), mech
