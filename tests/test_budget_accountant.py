"""Our sum accountant against diffprivlib 0.6.6's ``BudgetAccountant`` (the reference).

[DPL] diffprivlib 0.6.6, ``diffprivlib/accountant.py``: with ``delta = 0`` and no
slack its total is the sum of the spent epsilons in order, a spend is allowed
when the total with it stays at most the ceiling, and a spend of 0, a negative
one or a positive one below ``ceiling * 1e-14`` is refused with ``ValueError``.
Sequential composition of pure epsilon: Dwork, Roth, "The Algorithmic
Foundations of Differential Privacy", 2014, Theorem 3.14.
"""

import math

import numpy as np
import pytest

from aggpub.budget import ReleaseBudget, Spend, equal_split
from aggpub.budget.accountant import ExceededError, SumAccountant
from aggpub.errors import BudgetError


def _reference_run(ceiling, spends):
    """(allowed?, total after) of each spend under diffprivlib's accountant, or the exception class."""
    from diffprivlib.accountant import BudgetAccountant
    from diffprivlib.utils import BudgetError as DPLBudgetError

    acc = BudgetAccountant(epsilon=ceiling, delta=0.0)
    out = []
    for e in spends:
        try:
            acc.spend(e, 0.0)
            out.append(("ok", acc.total()[0]))
        except DPLBudgetError:
            out.append(("exceeded", acc.total()[0]))
        except ValueError:
            out.append(("invalid", acc.total()[0]))
    return out


def _our_run(ceiling, spends):
    acc = SumAccountant(ceiling)
    out = []
    for e in spends:
        try:
            acc.spend(e)
            out.append(("ok", acc.total()))
        except ExceededError:
            out.append(("exceeded", acc.total()))
        except ValueError:
            out.append(("invalid", acc.total()))
    return out


def test_agrees_with_diffprivlib_on_random_spend_lists():
    rng = np.random.default_rng(20261202)
    for _ in range(300):
        ceiling = float(rng.choice([0.1, 0.5, 1.0, 3.0, 10.0]))
        n = int(rng.integers(1, 12))
        spends = [float(x) for x in rng.uniform(0, ceiling / rng.integers(1, 6), size=n)]
        assert _our_run(ceiling, spends) == _reference_run(ceiling, spends)


def test_agrees_with_diffprivlib_at_the_ceiling():
    # shares that sum exactly to the ceiling, one ulp above it, and the policy's own splits
    cases = []
    for total in (1.0, 0.3, 2.0 / 3.0, 7.0):
        for k in (2, 3, 7, 10):
            parts = equal_split(total, k)
            cases.append((total, parts))  # sums to at most the total by construction: all allowed
            cases.append((total, parts + [math.ulp(total) * 4]))  # a tiny spend past a full budget
            naive = [total / k] * k
            cases.append((total, naive))  # may round above the total: both must agree
        cases.append((total, [total]))
        cases.append((total, [math.nextafter(total, math.inf)]))
    for ceiling, spends in cases:
        assert _our_run(ceiling, spends) == _reference_run(ceiling, spends), (ceiling, spends)
    # the splits the policy makes are always allowed in full
    assert all(r[0] == "ok" for r in _our_run(1.0, equal_split(1.0, 7)))


def test_agrees_with_diffprivlib_on_invalid_spends():
    for spends in ([0.0], [-0.1], [1e-16], [0.5, 0.0, 0.2], [float("nan")]):
        ours = _our_run(1.0, spends)
        ref = _reference_run(1.0, spends)
        if any(math.isnan(x) for x in spends):
            # diffprivlib lets NaN through its checks (NaN < 0 is False) and then no comparison holds;
            # we refuse it outright: our accountant is stricter, never looser
            assert ours[0][0] == "invalid"
            continue
        assert ours == ref, spends


def test_release_budget_refuses_past_the_total():
    budget = ReleaseBudget(1.0)
    budget.spend(Spend("a", 0.6, 1.0, "discrete_laplace", 1 / 0.6))
    with pytest.raises(BudgetError, match="component 'b' needs epsilon 0.5"):
        budget.spend(Spend("b", 0.5, 1.0, "discrete_laplace", 2.0))
    assert budget.spent() == 0.6 and [s.name for s in budget.spends] == ["a"]
    budget.spend(Spend("c", 0.4, 1.0, "discrete_laplace", 2.5))
    assert budget.remaining() == 0.0


def test_release_does_not_import_diffprivlib():
    import subprocess
    import sys

    code = ("import sys; from aggpub.budget import ReleaseBudget, Spend; b = ReleaseBudget(1.0); "
            "b.spend(Spend('a', 0.5, 1, 'x', 2)); print('diffprivlib' in sys.modules, 'sklearn' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.split() == ["False", "False"]
