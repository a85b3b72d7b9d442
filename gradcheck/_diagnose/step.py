"""The update step: infer the effective learning rate of the user's parameter update.

``update(params, grads) -> new_params`` is called on private copies with the
*reference* gradient, so what is checked is the step itself, not the backward
pass. Gradient descent moves each tensor by ``-lr * g``; the least-squares rate
``lr = -<new - old, g> / <g, g>`` is exact for such a step, and the remainder
``new - old + lr * g`` says whether the step is parallel to the gradient at all.
A negative rate (or a step that raises the loss) is an ascent step.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np

from .._check.inputs import Plan, copy_data
from .._core.errors import input_error
from .._core.tree import flatten_like
from .._report.results import Finding
from .kinds import EvidenceTier, RankedFinding

__all__ = ["StepCheck", "check_step"]


@dataclass(frozen=True)
class StepCheck:
    """Learning rates per tensor, findings, and the loss evaluations spent."""

    rates: dict[str, float]
    findings: tuple[RankedFinding, ...]
    evaluations: int


def check_step(plan: Plan, update: Callable, reference: Sequence[np.ndarray]) -> StepCheck:
    """Run the user's update once with the reference gradient and judge the step it takes."""
    originals = [np.array(o, copy=True) for o in plan.originals]
    dtypes = [np.asarray(o).dtype for o in plan.originals]
    params = plan.structure.rebuild(originals)
    grads = plan.structure.rebuild([np.asarray(g, dtype=d) for g, d in zip(reference, dtypes)])
    try:
        new = update(params, grads)
    except Exception as exc:
        raise input_error("step", "a callable step(params, grads) -> new params", f"{type(exc).__name__}: {exc}",
                          "Fix the error shown above in the update function.") from exc
    new_leaves = [np.asarray(a, dtype=np.float64) for a in flatten_like(plan.structure, new, "step result")]
    rates: dict[str, float] = {}
    findings: list[RankedFinding] = []
    for t, old, g, n, d in zip(plan.structure.tensors, plan.base, reference, new_leaves, dtypes):
        move = n - np.asarray(np.asarray(old, dtype=d), dtype=np.float64)
        gg = float(np.sum(g * g))
        if gg == 0.0:
            continue
        lr = -float(np.sum(move * g)) / gg
        rates[t.path] = lr
        rest = float(np.linalg.norm(move + lr * g))
        size = max(float(np.linalg.norm(move)), 1e-300)
        tol = 1e-3 if d.itemsize <= 4 else 1e-7
        if rest > tol * size:
            findings.append(RankedFinding(finding=Finding(
                "unexplained", t.layer, t.path, f"the update of {t.path} is not a multiple of its gradient (the part "
                f"not parallel to it is {rest / size:.2g} of the step); check which gradient the update uses", lr),
                misfit=rest / size, evidence=EvidenceTier.MUTANT))
        elif lr < 0:
            findings.append(RankedFinding(finding=Finding(
                "ascent-step", t.layer, t.path, f"the update moves {t.path} up the gradient (effective learning rate "
                f"{lr:.4g}); subtract the gradient: w = w - lr * g", lr),
                misfit=0.0, evidence=EvidenceTier.CLAIMED_DELTAS))
    evaluations = 0
    if not findings and rates:
        evaluations, raised = _small_step_raises_loss(plan, new_leaves)
        if raised:
            findings.append(RankedFinding(finding=Finding(
                "ascent-step", None, "step", "a small step in the direction of the update raises the loss; the "
                "update's sign is flipped", None), misfit=0.0, evidence=EvidenceTier.CLAIMED_DELTAS))
    return StepCheck(rates, tuple(findings), evaluations)


def _small_step_raises_loss(plan: Plan, new_leaves: Sequence[np.ndarray]) -> tuple[int, bool]:
    """Whether the loss rises along a short piece of the user's step (two evaluations)."""
    moves = [n - b for n, b in zip(new_leaves, plan.base)]
    largest = max(float(np.max(np.abs(m), initial=0.0)) for m in moves)
    if largest == 0.0:
        return 0, False
    scale = max(max(float(np.max(np.abs(b), initial=0.0)) for b in plan.base), 1.0)
    t = min(1.0, 1e-4 * scale / largest)
    values = []
    for sign in (1.0, -1.0):
        tree = plan.structure.rebuild([b + sign * t * m for b, m in zip(plan.base, moves)])
        values.append(float(np.asarray(plan.loss(tree, *copy_data(plan.data), **plan.kwargs))))
    return 2, values[0] > values[1]
