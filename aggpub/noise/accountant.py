"""Budget accounting for one release: sequential composition of pure epsilon.

A thin layer over diffprivlib's :class:`~diffprivlib.accountant.BudgetAccountant`
(check before spending, spend once, raise when the ceiling would be exceeded)
that also keeps the manifest's record of each spend.

References
----------
C. Dwork, A. Roth, "The Algorithmic Foundations of Differential Privacy",
Foundations and Trends in Theoretical Computer Science 9(3-4), 2014 (Theorem 3.14,
basic sequential composition).
"""

from __future__ import annotations

__all__ = ["ReleaseBudget"]

from ..errors import BudgetError

# diffprivlib is imported where it is used: importing it loads scikit-learn (about 1.5 s), which
# commands that spend no budget (check, sample, ledger) need not pay


class ReleaseBudget:
    """The epsilon of one release, spent component by component.

    Parameters
    ----------
    epsilon : float
        Total epsilon of the release (pure DP, delta = 0).
    """

    def __init__(self, epsilon: float):
        from diffprivlib.accountant import BudgetAccountant

        self.epsilon = float(epsilon)
        self._accountant = BudgetAccountant(epsilon=self.epsilon, delta=0.0)
        self.spends = []

    def check(self, spend) -> None:
        """Raise :class:`BudgetError` if ``spend`` would exceed what is left."""
        from diffprivlib.utils import BudgetError as _DPLBudgetError

        try:
            self._accountant.check(spend.epsilon, 0.0)
        except _DPLBudgetError:
            raise BudgetError(f"component '{spend.name}' needs epsilon {spend.epsilon:g} but only "
                              f"{self.remaining():g} of {self.epsilon:g} is left") from None

    def spend(self, spend) -> None:
        """Check, then record ``spend`` (a :class:`~aggpub.grouping.Spend`) once."""
        self.check(spend)
        self._accountant.spend(spend.epsilon, 0.0)
        self.spends.append(spend)

    def spent(self) -> float:
        return float(self._accountant.total()[0])

    def remaining(self) -> float:
        return max(0.0, self.epsilon - self.spent())
