"""Budget policy: when a check runs entry by entry, and how many loss evaluations a budget allows.

Networks up to :data:`FULL_CHECK_LIMIT` parameters are checked entry by entry (two evaluations per entry)
unless a budget is given; larger ones, or any check with a budget too small for that, run the directional
tests of :mod:`gradcheck._scale.budgeted`, whose cost does not grow with the number of parameters.
"""

from __future__ import annotations

import numpy as np

from .._core.errors import describe, input_error
from .._references.autodiff import Traced
from .._scale.directional import _localisation_cost
from .inputs import Plan

__all__ = ["FULL_CHECK_LIMIT", "DEFAULT_BUDGET", "default_budget", "full_check_note", "room_for_full_check"]

FULL_CHECK_LIMIT = 100_000
"""Networks up to this many parameters are checked entry by entry unless a budget is given."""

DEFAULT_BUDGET = 1000
"""Loss evaluations for a network above ``FULL_CHECK_LIMIT`` parameters when no budget is given."""

def default_budget(plan: Plan) -> int:
    """:data:`DEFAULT_BUDGET`, or more when the network has so many tensors that four tests each need more."""
    sizes = [t.size for t in plan.structure.tensors if t.size > 0]
    return max(DEFAULT_BUDGET, plan.evaluations + 1 + 8 * len(sizes) + _localisation_cost(max(sizes, default=1)))


def full_check_note(cap: int, size: int) -> str:
    """The report's note when a budget covers the entry-by-entry check."""
    return (f"the budget of {cap:,} loss evaluations covers the entry-by-entry check, so all {size:,} entries were "
            "checked one by one.")


def room_for_full_check(plan: Plan, traced: Traced | None, budget: int | None) -> int | None:
    """Validate the budget; return the evaluations left for the entry-by-entry check when it fits, else None."""
    from .._scale.batched import MAX_BATCH

    if budget is not None and (isinstance(budget, bool) or not isinstance(budget, (int, np.integer)) or budget < 1):
        raise input_error("budget", "a positive whole number of loss evaluations", describe(budget),
                          "Pass e.g. budget=500, or leave it out.")
    cap = default_budget(plan) if budget is None else int(budget)
    avail = cap - plan.evaluations
    if avail >= 2 * plan.structure.size + (2 + MAX_BATCH if traced is not None else 0):
        return avail
    return None
