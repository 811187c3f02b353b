"""Sequential composition of pure epsilon: a sum of spends against a ceiling.

Our own accountant, so that a release does not import diffprivlib (and with it
scikit-learn and scipy.stats, about a second) to add a few numbers. It keeps
the semantics of diffprivlib 0.6.6's ``BudgetAccountant`` with ``delta = 0``
and no slack, which stays the reference in the tests
(``tests/test_budget_accountant.py`` compares the two on random spend lists):

* the total is the floating-point sum of the spends in the order they were
  made (basic sequential composition, Dwork and Roth 2014, Theorem 3.14);
* a spend is allowed when the total with it is at most the ceiling;
* a spend must be a finite non-negative number, not zero, and not a positive
  number below ``ceiling * 1e-14`` (diffprivlib's smallest spend).

References
----------
C. Dwork, A. Roth, "The Algorithmic Foundations of Differential Privacy",
Foundations and Trends in Theoretical Computer Science 9(3-4), 2014 (Theorem 3.14).
"""

from __future__ import annotations

__all__ = ["SumAccountant", "ExceededError"]

import math
from numbers import Real


class ExceededError(Exception):
    """A spend would take the total above the ceiling."""


class SumAccountant:
    """Pure-epsilon spends summed in order against a ceiling.

    Parameters
    ----------
    epsilon : float
        The ceiling (``> 0``; ``inf`` allows everything).
    """

    def __init__(self, epsilon: float):
        if not isinstance(epsilon, Real) or math.isnan(epsilon) or not epsilon > 0:
            raise ValueError(f"'epsilon' must be a number > 0, got {epsilon!r}")
        self.epsilon = float(epsilon)
        self._min = 0.0 if math.isinf(self.epsilon) else self.epsilon * 1e-14
        self._spent: list[float] = []

    def _valid(self, epsilon) -> float:
        if not isinstance(epsilon, Real):
            raise TypeError(f"a spend must be a number, got {type(epsilon).__name__}")
        if math.isnan(epsilon) or epsilon < 0:
            raise ValueError(f"a spend must be >= 0, got {epsilon!r}")
        if epsilon == 0:
            raise ValueError("a spend of epsilon 0 (with delta 0) is no spend")
        if epsilon < self._min:
            raise ValueError(f"a spend must be at least {self._min!r} if non-zero, got {epsilon!r}")
        return float(epsilon)

    @staticmethod
    def _sum(spends) -> float:
        total = 0.0
        for e in spends:  # left to right, as the spends were made
            total += e
        return total

    def total(self) -> float:
        """The epsilon spent so far."""
        return self._sum(self._spent)

    def check(self, epsilon) -> None:
        """Raise :class:`ExceededError` when spending ``epsilon`` now would pass the ceiling."""
        e = self._valid(epsilon)
        if math.isinf(self.epsilon):
            return
        if not self._sum(self._spent + [e]) <= self.epsilon:
            raise ExceededError(f"a spend of {e!r} would exceed the ceiling {self.epsilon!r} "
                                f"({self.total()!r} spent)")

    def spend(self, epsilon) -> None:
        """Check, then record ``epsilon``."""
        self.check(epsilon)
        self._spent.append(float(epsilon))

    @property
    def spent_budget(self) -> list[float]:
        """The spends, in order."""
        return list(self._spent)
