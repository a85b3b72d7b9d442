"""The one check pipeline: references -> compare -> settle -> diagnose, which every entry point runs.

``examine``, ``examine_layer`` (once per random upstream gradient), the delta check (on a loss whose
parameters are offsets at the probes) and checks on a budget all come here, so none of them can skip a
stage the others run: a layer check settles its failing entries (measured rounding of the backward, the
loss's measured noise, a second reference, the kink test) and reaches the mutant diagnosis exactly as
``examine`` does. The entry points only prepare the inputs (:mod:`.inputs`), read the claims
(:func:`read_claims`) and turn the :class:`Outcome` into a report.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Sequence

import numpy as np

from .._diagnose.kinds import EvidenceTier, RankedFinding
from .._diagnose.repeat import repeat_findings
from .._diagnose.signatures import Evidence, batch_sizes, mutant_findings, tensor_findings
from .._references.autodiff import Traced, trace
from .._references.choose import compute_references
from .._report.results import Finding
from .budget import FULL_CHECK_LIMIT, full_check_note, room_for_full_check
from .compare import Judgement
from .inputs import Plan, claimed_from
from .rounding import Allowance
from .settle import settle

__all__ = ["Claims", "Outcome", "read_claims", "run_check", "standard_diagnosis", "tensor_level_findings"]


@dataclass(frozen=True, kw_only=True, eq=False)
class Claims:
    """The claimed values of one check.

    Attributes:
        values: one float64 array per tensor.
        dtypes: the precision the user's backward really had, per tensor (sets the default tolerance).
        backward: the callable that produced them, to run again when measuring its rounding; None for
            array claims, and for a backward that answered the same input twice differently (its movement
            would not be rounding).
        repeat: a second call's values (callable claims only), for the repeat diagnosis.
    """

    values: list[np.ndarray]
    dtypes: list[np.dtype]
    backward: Callable | None = None
    repeat: list[np.ndarray] | None = None


def read_claims(plan: Plan, grads: Any, what: str = "grads") -> Claims:
    """Read the claims from a pytree or a callable (called twice: a backward that keeps state shows)."""
    values, dtypes = claimed_from(plan, grads, what)
    if not callable(grads):
        return Claims(values=values, dtypes=dtypes)
    repeat, _ = claimed_from(plan, grads, what)
    steady = all(np.array_equal(a, b, equal_nan=True) for a, b in zip(values, repeat))
    return Claims(values=values, dtypes=dtypes, backward=grads if steady else None, repeat=repeat)


@dataclass(frozen=True, kw_only=True, eq=False)
class Outcome:
    """What the pipeline hands back to an entry point.

    Attributes:
        judgement: the final, settled judgement.
        unallowed: the judgement before the backward's measured rounding was allowed for.
        rounding: what running the backward again measured.
        findings: (finding, misfit, evidence tier) for every failing tensor, unranked.
        notes: sentences for the report about how the check was made.
        evaluations: loss evaluations spent here (the plan's own are not counted again).
        traced: the loss as a JAX program, or None.
        order: layers from input to output (the traced order when there is one).
    """

    judgement: Judgement
    unallowed: Judgement
    rounding: Allowance
    findings: tuple[RankedFinding, ...]
    notes: tuple[str, ...]
    evaluations: int
    traced: Traced | None
    order: tuple[str, ...]


def tensor_level_findings(evidence: Evidence, subject: str = "tensor") -> list[RankedFinding]:
    """Signature findings for every failing tensor, ``unexplained`` where no signature fits, and
    ``unreliable-reference`` where no entry of a tensor could be judged. ``subject`` names what a
    tensor is in the sentences (a ``tensor`` of params, an ``input`` of a layer)."""
    findings: list[RankedFinding] = []
    for k, t in enumerate(evidence.judgement.tensors):
        if t.checked and t.unreliable == t.checked:
            findings.append(RankedFinding(finding=Finding("unreliable-reference", t.layer, t.path,
                                     f"the references disagree with each other at every entry of {t.path} (a kink, "
                                     "a non-smooth or noisy loss), so its claimed values could not be judged; the "
                                     "user's value is not blamed: check it at another point", None),
                                          misfit=1.0, evidence=EvidenceTier.NONE))
        if t.ok:
            continue
        found = tensor_findings(evidence, k)
        if found:
            findings.extend(RankedFinding(finding=f, misfit=m, evidence=EvidenceTier.SIGNATURE) for f, m in found[:3])
        else:
            findings.append(RankedFinding(finding=Finding("unexplained", t.layer, t.path,
                                     f"the claimed gradient differs from the reference by up to {t.error:.3g} "
                                     f"(relative) at entry {t.worst_index}, with no simple pattern; check this "
                                     f"{subject}'s formula in the backward pass", None),
                                          misfit=t.error, evidence=EvidenceTier.NONE))
    return findings


def standard_diagnosis(plan: Plan, claims: Claims, judgement: Judgement, traced: Traced | None,
                       order: tuple[str, ...], subject: str = "tensor", batch: tuple[int, ...] | None = None
                       ) -> list[RankedFinding]:
    """The whole catalogue: signatures per tensor, mutants of the traced backward, repeated calls.

    ``batch`` overrides the batch-size candidates (default: the leading axes of the data)."""
    batch = batch_sizes(plan.data) if batch is None else batch
    evidence = Evidence(plan.structure, tuple(claims.values), plan.base, judgement, batch, order)
    findings = tensor_level_findings(evidence, subject)
    if traced is not None and not all(t.ok for t in judgement.tensors):
        findings.extend(mutant_findings(plan, traced, claims.values, judgement))
    if claims.repeat is not None:
        findings.extend(repeat_findings(plan, claims.values, claims.repeat, judgement))
    return findings


def layer_order(plan: Plan, traced: Traced | None) -> tuple[str, ...]:
    """Layers from input to output: by first use in the traced program, else by the pytree's order."""
    if traced is None:
        return plan.structure.layer_order
    seen: dict[str, None] = {}
    for i in traced.order:
        seen.setdefault(plan.structure.tensors[i].layer, None)
    return tuple(seen)


Diagnosis = Callable[[Plan, Claims, Judgement, "Traced | None", tuple[str, ...]],
                     Sequence[RankedFinding]]


def run_check(plan: Plan, claims: Claims, *, methods: tuple[str, ...] | None = None, tolerance: float | None = None,
              seed: int = 0, budget: int | None = None, executor: Any = None, progress: bool | None = None,
              diagnose: Diagnosis = standard_diagnosis) -> Outcome:
    """Run references, comparison, settling and diagnosis for one prepared check.

    A network above :data:`~gradcheck._check.budget.FULL_CHECK_LIMIT` parameters, or a check with a
    budget, is checked within the budget: entry by entry when the budget covers that (then every settle
    stage runs within what is left), else by directional tests (:mod:`gradcheck._scale.budgeted`).
    """
    notes: list[str] = []
    budgeted = budget is not None or plan.structure.size > FULL_CHECK_LIMIT
    room: int | None = None  # loss evaluations a budget leaves for the entry-by-entry check, None: no limit
    traced: Traced | None = None
    if budgeted:
        traced_or_reason = trace(plan.loss, plan.structure, plan.base, plan.data, plan.kwargs)
        traced = None if isinstance(traced_or_reason, str) else traced_or_reason
        room = room_for_full_check(plan, traced, budget)
    if budgeted and room is None:
        from .._scale.budgeted import check_within_budget

        judgement, evaluations, budget_notes = check_within_budget(
            plan, claims.values, claims.dtypes, traced, budget=budget, executor=executor, progress=progress,
            seed=seed, tolerance=tolerance)
        notes.extend(budget_notes)
        unallowed, rounding = judgement, Allowance(None)
    else:
        estimates, unavailable, evaluations, traced = compute_references(plan, methods, seed, executor, progress)
        if room is not None:
            notes.append(full_check_note(room + plan.evaluations, plan.structure.size))
        settled = settle(plan, claims.values, claims.dtypes, claims.backward, estimates, unavailable, tolerance,
                         seed, None if room is None else room - evaluations)
        judgement, unallowed, rounding = settled.judgement, settled.unallowed, settled.rounding
        evaluations += settled.spent
        notes.extend(settled.notes)
    order = layer_order(plan, traced)
    findings = tuple(diagnose(plan, claims, judgement, traced, order))
    return Outcome(judgement=judgement, unallowed=unallowed, rounding=rounding, findings=findings,
                   notes=tuple(notes), evaluations=evaluations, traced=traced, order=order)
