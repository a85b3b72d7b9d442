"""Settling failing entries before anyone is blamed: the settle stage of the check pipeline.

An entry that fails against a reference is not yet a mistake. Four measurements can explain it, each
cheaper than a false alarm: the rounding of the user's own backward (run again; :mod:`.rounding`), the
rounding noise of the loss (a loss that cancels large values rounds far above its last place, and its
finite differences are only that accurate; :func:`.confirm.measure_noise`), a second, independent
reference for a lone one (:func:`.confirm.confirm_failing`), and the kink test (a valid one-sided slope at
a ReLU or a max; :func:`.confirm.find_kinks`). Every entry point runs this stage through
:func:`gradcheck._check.run.run_check`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from .._references.finite_difference import Estimate
from .compare import Judgement, judge
from .confirm import CONFIRM_PER_TENSOR, NOISE_POINTS, confirm_failing, find_kinks, measure_noise, widen_for_noise
from .inputs import Plan
from .rounding import Allowance, measure_rounding

__all__ = ["Settled", "settle"]


@dataclass(frozen=True, kw_only=True, eq=False)
class Settled:
    """What the settle stage hands on.

    Attributes:
        judgement: the final judgement (allowances, a second reference and kinks applied).
        unallowed: the judgement before the measured rounding of the backward was allowed for.
        rounding: what running the backward again measured.
        spent: loss evaluations the stage spent.
        notes: sentences for the report (a measured noise; stages a budget left out).
    """

    judgement: Judgement
    unallowed: Judgement
    rounding: Allowance
    spent: int
    notes: tuple[str, ...]


def settle(plan: Plan, claimed: list[np.ndarray], dtypes: list[np.dtype], grads: Callable | None,
           estimates: list[Estimate], unavailable: dict[str, str], tolerance: float | None, seed: int,
           room: int | None) -> Settled:
    """Compare, then settle every failing entry before anyone is blamed.

    In order: the measured rounding of a callable backward (``gradcheck._check.rounding``: a float32 one run again in
    float64, a float64 one at inputs nudged by one rounding unit; no loss evaluations), the
    measured rounding noise of the loss (``_confirm.measure_noise``: a loss that cancels large values
    rounds far above its last place, and its finite differences are only that accurate), a second
    reference for a lone one (``_confirm.confirm_failing``), and the kink test. ``room`` caps the loss
    evaluations the last three may spend (a budget); a stage that might exceed it is skipped.
    Returns a :class:`Settled` record.
    """
    judgement = judge(plan.structure, claimed, dtypes, estimates, unavailable, tolerance)
    unallowed, rounding, spent = judgement, Allowance(None), 0

    def failing() -> int:  # entries the next stage looks at (at most CONFIRM_PER_TENSOR per tensor)
        return sum(min(int(np.sum(np.nan_to_num(e, nan=-1.0) > t.tolerance)), CONFIRM_PER_TENSOR)
                   for t, e in zip(judgement.tensors, judgement.errors))

    notes: list[str] = []
    skipped: list[str] = []  # said only when something is still reported wrong at the end

    def affordable(cost: int, stage: str) -> bool:
        if room is None or spent + cost <= room:
            return True
        skipped.append(f"the budget left {room - spent} loss evaluations after the entry-by-entry check, fewer "
                       f"than the {cost} that {stage} needs, so it was skipped; a larger budget (or none) may "
                       "clear entries reported wrong here.")
        return False

    if not all(t.ok for t in judgement.tensors):
        rounding = measure_rounding(plan, grads, claimed, dtypes, judgement, estimates, unavailable, tolerance,
                                    seed)
        if rounding.per_tensor is not None:
            judgement = judge(plan.structure, claimed, dtypes, estimates, unavailable, tolerance,
                              allowances=rounding.per_tensor)
    allowances = rounding.per_tensor
    if (not all(t.ok for t in judgement.tensors) and estimates[0].method != "autodiff"
            and affordable(4 * NOISE_POINTS, "measuring the loss's rounding noise")):
        noise, extra = measure_noise(plan, seed)
        spent += extra
        widened = widen_for_noise(estimates, plan, noise)
        if widened is not estimates:
            estimates = widened
            judgement = judge(plan.structure, claimed, dtypes, estimates, unavailable, tolerance,
                              allowances=allowances)
            resolution = max(float(np.max(a, initial=0.0)) for a in estimates[0].atol)
            notes.append(f"the loss's rounding noise is {noise:.2g} (measured), more than its value {plan.f0:.3g} "
                         "implies (large values cancel inside it), so finite differences resolve gradient entries "
                         f"only down to about {resolution:.1g} here: smaller ones were not really checked.")
    # the complex step: 1 trial, 3 per tensor for its analytic test, 1 per entry; Richardson: 4 per entry
    if (len(estimates) == 1 and not all(t.ok for t in judgement.tensors)
            and affordable(1 + 3 * len(judgement.tensors) + 4 * failing(),
                           "a second reference for the failing entries")):
        estimates, extra, why = confirm_failing(plan, judgement, estimates, seed)
        spent += extra
        unavailable = {**unavailable, **why}
        judgement = judge(plan.structure, claimed, dtypes, estimates, unavailable, tolerance, allowances=allowances)
    if not all(t.ok for t in judgement.tensors) and affordable(4 * failing(), "the kink test of the failing entries"):
        kinks, extra = find_kinks(plan, judgement, claimed)
        spent += extra
        if any(m.any() for m in kinks):
            judgement = judge(plan.structure, claimed, dtypes, estimates, unavailable, tolerance, kinks=kinks,
                              allowances=allowances)
    if not all(t.ok for t in judgement.tensors):
        notes.extend(skipped)
    return Settled(judgement=judgement, unallowed=unallowed, rounding=rounding, spent=spent, notes=tuple(notes))
