"""Spends and the budget of one release: sequential composition of pure epsilon.

A :class:`Spend` is one use of the budget (recorded in the manifest's
``components``); :class:`ReleaseBudget` checks before spending, spends once and
raises :class:`~aggpub.errors.BudgetError` when the release's epsilon would be
exceeded (a thin layer over :class:`aggpub.budget.accountant.SumAccountant`, which the
tests hold against diffprivlib's ``BudgetAccountant``);
:func:`split_epsilon` is the one place a total is cut into shares.

References
----------
C. Dwork, A. Roth, "The Algorithmic Foundations of Differential Privacy",
Foundations and Trends in Theoretical Computer Science 9(3-4), 2014 (Theorem 3.14,
basic sequential composition).
"""

from __future__ import annotations

__all__ = ["Spend", "ReleaseBudget", "split_epsilon", "equal_split"]

import math
from dataclasses import dataclass

from ..errors import BudgetError
from .accountant import ExceededError, SumAccountant


@dataclass(frozen=True)
class Spend:
    """One use of the privacy budget, as recorded in the manifest's ``components``."""

    name: str
    epsilon: float
    sensitivity: float
    mechanism: str
    scale: float

    @classmethod
    def of(cls, name: str, mechanism) -> "Spend":
        """The spend of one use of ``mechanism`` (its epsilon, sensitivity, name and scale)."""
        return cls(name=name, epsilon=float(mechanism.epsilon), sensitivity=float(mechanism.sensitivity),
                   mechanism=mechanism.name, scale=float(mechanism.scale))

    def as_dict(self) -> dict:
        return {"name": self.name, "epsilon": self.epsilon, "sensitivity": self.sensitivity,
                "mechanism": self.mechanism, "scale": self.scale}


def split_epsilon(total: float, leading) -> list[float]:
    """``leading`` parts of ``total`` followed by a last part that takes what is left.

    The last part is ``total - sum(leading)``, lowered by one ulp at a time until
    the floating-point sum of all parts is at most ``total``: sequential
    composition never passes the declared epsilon through rounding. This is the
    one place a total is cut into shares (the policy's component shares, the
    rounds of a private grouping).

    Parameters
    ----------
    total : float
    leading : sequence of float
        Every part but the last (for an equal split in ``k`` parts: ``[total / k] * (k - 1)``).

    Returns
    -------
    list of float
        ``len(leading) + 1`` parts.
    """
    out = [float(x) for x in leading]
    last = total - sum(out)
    while sum(out) + last > total:
        last = math.nextafter(last, 0.0)
    return out + [last]


def equal_split(total: float, parts: int) -> list[float]:
    """``total`` in ``parts`` equal shares whose floating-point sum never exceeds it."""
    if parts < 1:
        raise ValueError("'parts' must be >= 1")
    return split_epsilon(total, [total / parts] * (parts - 1))


class ReleaseBudget:
    """The epsilon of one release, spent component by component.

    Parameters
    ----------
    epsilon : float
        Total epsilon of the release (pure DP, delta = 0).
    """

    def __init__(self, epsilon: float):
        self.epsilon = float(epsilon)
        self._accountant = SumAccountant(self.epsilon)
        self.spends = []

    def check(self, spend) -> None:
        """Raise :class:`BudgetError` if ``spend`` would exceed what is left."""
        try:
            self._accountant.check(spend.epsilon)
        except ExceededError:
            raise BudgetError(f"component '{spend.name}' needs epsilon {spend.epsilon:g} but only "
                              f"{self.remaining():g} of {self.epsilon:g} is left") from None

    def spend(self, spend) -> None:
        """Check, then record ``spend`` (a :class:`Spend`) once."""
        self.check(spend)
        self._accountant.spend(spend.epsilon)
        self.spends.append(spend)

    def spent(self) -> float:
        return float(self._accountant.total())

    def remaining(self) -> float:
        return max(0.0, self.epsilon - self.spent())
