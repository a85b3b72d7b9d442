"""Diagnosis by whole-tensor signatures, and mutants of the traced backward turned into findings.

Each signature is a hypothesis "claimed = T(reference)" for a simple transform T
(negation, a constant factor, a transpose, another tensor's reference, reference
plus a multiple of the parameter, ...). A signature is reported only when it
reproduces the claimed tensor to within the check's own tolerance, measured with
the same floor as the check itself, so a finding is never a guess dressed up.
Tensors that fail and match no signature get ``unexplained``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Sequence

import numpy as np

from .._check.compare import Judgement, relative_error
from .._core.errors import InputError
from .._core.tree import Structure
from .._report.results import Finding
from .kinds import EvidenceTier, RankedFinding

if TYPE_CHECKING:
    from .._check.inputs import Plan
    from .._references.autodiff import Traced

__all__ = ["Evidence", "tensor_findings", "scale_cause", "mutant_findings", "batch_sizes"]


@dataclass(frozen=True, eq=False)
class Evidence:
    """What tier 1 looks at: claimed values, references, params, and the judgement."""

    structure: Structure
    claimed: tuple[np.ndarray, ...]
    params: tuple[np.ndarray, ...]
    judgement: Judgement
    batch_sizes: tuple[int, ...]
    layer_order: tuple[str, ...]


def _misfit(evidence: Evidence, k: int, candidate: np.ndarray) -> float:
    """Largest relative error of the claimed tensor against a candidate, on judged entries."""
    j = evidence.judgement
    mask = np.isfinite(j.primary.values[k]) & ~j.unreliable[k]
    if not np.any(mask):
        return math.inf
    err = relative_error(evidence.claimed[k][mask], candidate[mask], j.floors[k][mask])
    return float(np.max(err))


def scale_cause(factor: float, batch_sizes: Sequence[int]) -> str:
    """Name the likely cause of a constant factor between claimed and true gradient.

    Example:
        >>> scale_cause(0.5, [32])
        'the one-half convention of the squared error: the loss has 1/2 (or not) and the backward disagrees'
        >>> scale_cause(32.0, [32])
        'the batch size 32: the loss is a mean over the batch but the backward sums (divide by 32)'
    """
    def near(a: float, b: float) -> bool:
        return abs(a - b) <= 1e-6 * abs(b)

    if near(factor, 2.0) or near(factor, 0.5):
        return "the one-half convention of the squared error: the loss has 1/2 (or not) and the backward disagrees"
    for n in sorted(set(int(b) for b in batch_sizes if b > 1)):
        if near(factor, n):
            return f"the batch size {n}: the loss is a mean over the batch but the backward sums (divide by {n})"
        if near(factor, 1.0 / n):
            return f"the batch size {n}: the loss is a sum over the batch but the backward averages (multiply by {n})"
        if near(factor, 2.0 * n) or near(factor, 0.5 / n) or near(factor, 0.5 * n) or near(factor, 2.0 / n):
            return f"both the batch size {n} (sum versus mean) and the 1/2 of the squared error"
    return "a constant factor in the backward pass (a learning rate or scale applied too early, or a wrong constant)"


def tensor_findings(evidence: Evidence, k: int) -> list[tuple[Finding, float]]:
    """Signatures that explain failing tensor ``k``, each with its misfit (smaller explains better)."""
    t = evidence.structure.tensors[k]
    j = evidence.judgement
    c, r = evidence.claimed[k], np.nan_to_num(j.primary.values[k])
    tol = j.tensors[k].tolerance
    out: list[tuple[Finding, float]] = []

    def add(kind: str, detail: str, candidate: np.ndarray, factor: float | None = None) -> None:
        m = _misfit(evidence, k, candidate)
        if m <= tol:
            out.append((Finding(kind, t.layer, t.path, detail, factor), m))

    if not np.all(np.isfinite(c)):
        bad = int(np.sum(~np.isfinite(c)))
        return [(Finding("non-finite", t.layer, t.path,
                         f"{bad} of {c.size} claimed entries are NaN or Inf; look for overflow in exp, log(0) or "
                         "0/0 in the backward pass", None), 0.0)]
    ref_norm = float(np.max(np.abs(r))) if r.size else 0.0
    if np.all(c == 0) and ref_norm > 0:
        floor = float(np.max(j.floors[k])) if r.size else 0.0
        if ref_norm > tol * floor:
            out.append((Finding("zero", t.layer, t.path,
                                "the claimed gradient is all zeros while the true one is not; the value is never "
                                "written (or is overwritten) in the backward pass", None), 0.0))
            return out
    add("sign-flip", "the claimed gradient is the negative of the true one; the output error is probably taken as "
        "target minus output, or the update's minus sign was folded into the gradient", -r)
    scale = j.tensors[k].scale
    fitted = t.size >= 2  # a one-entry tensor fits any one-number hypothesis; it is no evidence
    if fitted and math.isfinite(scale) and abs(scale - 1.0) > 10 * tol and abs(scale + 1.0) > 10 * tol and scale:
        add("scaled", f"the claimed gradient is {scale:.6g} times the true one; likely cause: "
            f"{scale_cause(scale, evidence.batch_sizes)}", scale * r, factor=scale)
    if len(t.shape) == 2 and t.shape[0] == t.shape[1] and t.shape[0] > 1:
        add("transposed", "the claimed gradient is the transpose of the true one; swap the operands of the outer "
            "product (x.T @ delta versus delta.T @ x)", r.T)
    if len(t.shape) >= 3 and t.shape[-1] == t.shape[-2] and t.shape[-1] > 1:
        add("flipped-kernel", "the claimed kernel gradient is the true one rotated by 180 degrees in its spatial "
            "axes; correlate instead of convolve (or flip the kernel) in the backward pass",
            np.flip(r, axis=(-2, -1)))
    for m, other in enumerate(evidence.structure.tensors):
        if m != k and other.shape == t.shape:
            add("swapped", f"the claimed gradient of {t.path} is the true gradient of {other.path}; the two are "
                "swapped in the backward pass", np.nan_to_num(j.primary.values[m]))
    p = evidence.params[k]
    pp = float(np.sum(p * p))
    if pp > 0 and fitted:
        lam = float(np.sum((c - r) * p)) / pp
        if lam != 0:
            add("weight-decay-mismatch", f"claimed minus true gradient is {lam:.6g} times the parameter: an L2 term "
                f"(coefficient {lam / 2:.6g} in the loss if it is lam/2 * sum(w**2)) is in the backward pass but not "
                "in the loss, or has another coefficient there", r + lam * p, factor=lam)
    if len(t.shape) == 1 and t.size > 1 and np.all(c == c[0]):
        total = float(np.sum(r))
        if abs(c[0] - total) <= tol * max(abs(total), float(np.max(j.floors[k]))):
            out.append((Finding("bias-sum-over-all-axes", t.layer, t.path,
                                "every entry of the claimed bias gradient is the same number, the sum of the true "
                                "gradient over all its entries; sum the delta over the batch axis only "
                                "(delta.sum(axis=0))", None), 0.0))
    return sorted(out, key=lambda fm: fm[1])


def mutant_findings(plan: Plan, traced: Traced, claimed: list[np.ndarray], judgement: Judgement
                     ) -> list[RankedFinding]:
    """Tier 3: mutants of the traced forward's backward pass that reproduce every claimed tensor."""
    from .._core.tree import _walk
    from .mutants import build_mutants, rank_mutants

    def fun(tree: Any) -> Any:
        found: list = []
        _walk(tree, (), found)
        return traced.fun([leaf for _, leaf in found])

    import jax

    tolerance = min(t.tolerance for t in judgement.tensors)
    try:
        with jax.enable_x64(True):
            mutants = build_mutants(fun, list(plan.base), plan.structure)
        ranked = rank_mutants(mutants, claimed, tolerance=tolerance)
    except InputError:
        # tier 3 is extra evidence: a forward it cannot mutate (e.g. scalar parameters it
        # sees as shape (1,)) leaves the tier-1 and tier-2 diagnosis standing
        return []
    out = []
    for mutant, misfit in ranked:
        if misfit > tolerance:
            break
        detail = mutant.detail
        if mutant.kind == "scaled" and mutant.factor:
            detail += f" Likely cause: {scale_cause(mutant.factor, batch_sizes(plan.data))}."
        out.append(RankedFinding(finding=Finding(mutant.kind, mutant.layer, mutant.where, detail, mutant.factor),
                                 misfit=misfit, evidence=EvidenceTier.MUTANT))
    return out[:3]


def batch_sizes(data: tuple) -> tuple[int, ...]:
    """Leading-axis lengths of the array data: candidates for the batch size in a scale finding."""
    return tuple(int(np.shape(x)[0]) for x in data if isinstance(x, np.ndarray) and np.ndim(x) >= 1)
