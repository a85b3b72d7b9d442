"""Diagnosis, tier 2: probes inside the forward, and the deltas a backward pass claims.

A loss that takes a keyword ``probe`` wraps intermediate values with it:
``z = probe("hidden.z", z)``. The library passes ``probe(name, v) = v + e[name]``
with ``e = 0``, so the derivative of the loss with respect to ``e[name]`` is
dE/d(that value): the *delta* a backward pass computes there. Reference deltas
come from the same machinery as parameter gradients (autodiff when traceable,
central differences always), applied to a loss whose "parameters" are the
offsets ``e``.

Where a layer probes both its pre-activation and its output, the derivative factor the claimed
delta implies is analysed in ``delta_factors``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

from .._check.compare import Judgement
from .._check.inputs import Plan, copy_data
from .._check.run import Claims, run_check
from .._core.errors import input_error
from .._core.evaluator import Evaluator
from .._core.tree import flatten, flatten_like
from .._references.autodiff import Traced, accepts_keyword
from .._report.results import Finding, TensorResult
from .delta_factors import factor_findings
from .kinds import EvidenceTier, RankedFinding
from .signatures import Evidence, tensor_findings

__all__ = ["DeltaCheck", "check_deltas", "record_probes"]


@dataclass(frozen=True, eq=False)
class DeltaCheck:
    """Results of the delta comparison: per-probe rows, findings and evaluations spent."""

    rows: tuple[TensorResult, ...]
    findings: tuple[RankedFinding, ...]
    evaluations: int


def record_probes(plan: Plan) -> tuple[dict[str, np.ndarray], int]:
    """Run the loss once with a recording probe; return probe name -> value, in forward order, and the
    evaluations spent (one: every loss call goes through an Evaluator, so the report counts it)."""
    seen: dict[str, np.ndarray] = {}

    def recorder(name: str, value: Any) -> Any:
        if name in seen:
            raise input_error(f"probe {name!r}", "each probe name once per forward pass", "a repeated name",
                              "Give every probed value its own name, e.g. 'hidden.z' and 'output.z'.")
        seen[name] = np.array(value, dtype=np.float64, copy=True)
        return value

    ev = Evaluator(plan.loss, plan.structure, plan.base, copy_data(plan.data), {**plan.kwargs, "probe": recorder})
    ev()
    return seen, ev.count


def _offset_loss(plan: Plan, names: list[str]) -> Callable:
    """The loss as a function of additive offsets at the probes (params held at the base point)."""
    takes_xp = accepts_keyword(plan.loss, "xp")

    def loss(offsets, xp=None):
        def probe(name, value):
            return value + offsets[name] if name in offsets else value

        tree = plan.structure.rebuild(list(plan.base))
        extra = {"xp": xp} if (takes_xp and xp is not None) else {}
        return plan.loss(tree, *plan.data, **{**plan.kwargs, **extra, "probe": probe})

    if not takes_xp:
        return lambda offsets: loss(offsets)
    return loss


def check_deltas(plan: Plan, deltas: Any, tolerance: float | None, layer_of: Callable[[str], str],
                 seed: int = 0) -> DeltaCheck:
    """Compare claimed deltas with reference deltas at the probes; diagnose the first wrong one."""
    if not accepts_keyword(plan.loss, "probe"):
        raise input_error("deltas", "a loss that takes a keyword `probe`", "a loss without one",
                          "Add `probe=lambda name, v: v` to the loss and wrap values: z = probe('hidden.z', z).")
    recorded, recording = record_probes(plan)
    if callable(deltas):
        params_copy = plan.structure.rebuild([np.array(o, copy=True) for o in plan.originals])
        try:
            deltas = deltas(params_copy, *copy_data(plan.user_data, promote=False))
        except Exception as exc:
            raise input_error("deltas", "a callable deltas(params, *data) returning a dict of claimed deltas",
                              f"{type(exc).__name__}: {exc}", "Fix the error in the backward pass.") from exc
    if not isinstance(deltas, dict):
        raise input_error("deltas", "a dict probe name -> claimed dE/d(value)", type(deltas).__name__,
                          "Pass e.g. deltas={'hidden.z': d_hidden}.")
    unknown = [k for k in deltas if k not in recorded]
    if unknown:
        raise input_error(f"deltas {unknown[0]}", f"names of probes the loss produced ({list(recorded)})",
                          f"{unknown}", "Use the exact names passed to probe() in the forward pass.")
    offsets = {n: np.zeros_like(v) for n, v in recorded.items()}
    structure, leaves = flatten(offsets, layers=lambda path: layer_of(path))
    claimed_tree = {n: deltas.get(n, np.full(recorded[n].shape, np.nan)) for n in recorded}
    claimed = [np.array(a, dtype=np.float64) for a in flatten_like(structure, claimed_tree, "deltas")]
    # as for grads: the precision of the user's backward is the lowest among its inputs and outputs
    lowest = min([np.asarray(o).dtype.itemsize for o in plan.originals] +
                 [a.dtype.itemsize for a in copy_data(plan.user_data, promote=False)
                  if isinstance(a, np.ndarray) and a.dtype.kind == "f"])
    dtypes = [np.dtype(np.float32) if min(lowest, np.asarray(deltas.get(n, 0.0)).dtype.itemsize) <= 4
              else np.dtype(np.float64) for n in recorded]
    loss = _offset_loss(plan, list(recorded))
    sub = Plan(loss, structure, tuple(leaves), tuple(leaves), (), plan.f0, True, plan.f0, plan.loss_eps, 0, {})
    names = list(recorded)

    def diagnose(sub: Plan, claims: Claims, judgement: Judgement, traced: Traced | None,
                 order: tuple[str, ...]) -> list[RankedFinding]:
        """The first wrong delta counting from the loss, and what its derivative factor says."""
        failing = [k for k, n in enumerate(names) if n in deltas and not judgement.tensors[k].ok]
        if not failing:
            return []
        origin = max(failing)  # forward order: the last wrong delta is the one nearest the loss
        name, t = names[origin], judgement.tensors[origin]
        layer = layer_of(name)
        findings: list[RankedFinding] = []
        if name.endswith(".z") and name[:-2] + ".a" in recorded:
            out_name = name[:-2] + ".a"
            factors = factor_findings(name, layer, claimed[origin], recorded[name], recorded[out_name],
                                      judgement.primary.values[names.index(out_name)],
                                      judgement.primary.values[origin], t.tolerance)
            findings += (RankedFinding(*f) for f in factors)
        if not findings:
            batch = tuple(int(d.shape[0]) for d in plan.data if isinstance(d, np.ndarray) and d.ndim >= 1)
            evidence = Evidence(structure, tuple(claimed), tuple(leaves), judgement, batch, tuple(names))
            findings += [RankedFinding(finding=f, misfit=m, evidence=EvidenceTier.MUTANT)
                         for f, m in tensor_findings(evidence, origin)[:1]]
        if not findings:
            findings.append(RankedFinding(finding=Finding("unexplained", layer, name,
                                     f"the claimed delta at {name} is the first wrong one counting from the loss "
                                     f"(relative error {t.error:.3g} at {t.worst_index}); the mistake is in the "
                                     "backward step that computes it; the deltas before it inherit the error", None),
                                          misfit=t.error, evidence=EvidenceTier.MUTANT))
        return findings

    # the same pipeline as the parameters' check: references, comparison, settling (noise, a second
    # reference, kinks), then the delta diagnosis above
    outcome = run_check(sub, Claims(values=claimed, dtypes=dtypes), tolerance=tolerance, seed=seed,
                        diagnose=diagnose)
    rows = tuple(t for t, n in zip(outcome.judgement.tensors, recorded) if n in deltas)
    findings = list(outcome.findings)
    evaluations = recording + outcome.evaluations
    return DeltaCheck(rows, tuple(findings), evaluations)
