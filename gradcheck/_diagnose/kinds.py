"""The registry of finding kinds: the single place a kind of mistake is named.

Every :class:`~gradcheck.Finding` carries a ``kind`` registered here (a Finding of an unregistered kind cannot
be built), with its one-line meaning (the README's list of kinds is tested against this table), its rank
among the findings of one layer, whether it blames the user's code, and whether repeats of it across tensors
fold into one finding. How strong the evidence behind one finding is depends on where it came from, not on
its kind: :class:`EvidenceTier` orders that, and :class:`RankedFinding` carries a finding with its tier.

To add a kind: one :func:`register` call below, a producer that emits it (see DEVELOPERS.md), a planted-mistake
test, and the id in README.md's list.
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import IntEnum
from typing import TYPE_CHECKING, NamedTuple

if TYPE_CHECKING:
    from .._report.results import Finding

__all__ = ["FindingKind", "KINDS", "register", "EvidenceTier", "RankedFinding", "SPECIFIC", "GENERIC",
           "NOT_A_BLAME"]

SPECIFIC, GENERIC, NOT_A_BLAME = 0, 1, 2
"""Ranks within a layer: a specific diagnosis first, then the generic one, then findings that blame nobody."""


@dataclass(frozen=True, kw_only=True)
class FindingKind:
    """One kind of finding.

    Attributes:
        id: the plain-English id (lowercase, hyphens) that says what the code does wrong.
        meaning: one line for the README and for readers of a JSON report.
        rank: :data:`SPECIFIC`, :data:`GENERIC` or :data:`NOT_A_BLAME` (ordering within a layer).
        blames_user_code: whether it says the user's code is wrong (a reference that cannot judge does not).
        folds_across_tensors: whether the same kind with the same factor in several tensors is one mistake
            (a sign flip of the output error reaches every tensor below it).
    """

    id: str
    meaning: str
    rank: int = SPECIFIC
    blames_user_code: bool = True
    folds_across_tensors: bool = False


KINDS: dict[str, FindingKind] = {}


def register(kind: FindingKind) -> FindingKind:
    """Add a kind to :data:`KINDS` (an id may be registered once)."""
    if kind.id in KINDS:
        raise ValueError(f"finding kind {kind.id!r} is registered twice")
    KINDS[kind.id] = kind
    return kind


for _kind in (
    FindingKind(id="non-finite", meaning="claimed entries are NaN or Inf"),
    FindingKind(id="sign-flip", meaning="the claimed gradient is the negative of the true one",
                folds_across_tensors=True),
    FindingKind(id="scaled", meaning="the claimed gradient is a constant multiple of the true one (batch size, "
                "the 1/2 of a squared error, a learning rate)", folds_across_tensors=True),
    FindingKind(id="transposed", meaning="a product's operands are swapped, so a gradient comes out transposed"),
    FindingKind(id="zero", meaning="the claimed gradient is all zeros while the true one is not"),
    FindingKind(id="swapped", meaning="the claimed gradient of one tensor is the true gradient of another"),
    FindingKind(id="missing-transfer-derivative", meaning="the delta lacks a transfer function's derivative"),
    FindingKind(id="extra-transfer-derivative", meaning="a transfer function's derivative is applied twice"),
    FindingKind(id="transfer-derivative-misplaced", meaning="a transfer derivative is evaluated at the wrong "
                "quantity (the input instead of the output, or another function's derivative)"),
    FindingKind(id="partial-softmax-jacobian", meaning="only the diagonal of the softmax Jacobian is used"),
    FindingKind(id="flipped-kernel", meaning="a kernel gradient is rotated by 180 degrees (convolution versus "
                "correlation)"),
    FindingKind(id="weight-decay-mismatch", meaning="an L2 term is in the backward pass but not in the loss, "
                "or with another coefficient", folds_across_tensors=True),
    FindingKind(id="bias-sum-over-all-axes", meaning="the bias gradient sums the delta over every axis, not the "
                "batch axis only"),
    FindingKind(id="accumulating", meaning="the backward keeps state between calls (gradient buffers never "
                "reset)"),
    FindingKind(id="ascent-step", meaning="the update step moves up the gradient"),
    FindingKind(id="nondeterministic-loss", meaning="the loss (or a layer's forward) gives different values for "
                "the same input, so nothing can be checked"),
    FindingKind(id="unexplained", meaning="the claims are wrong in a way no catalogued mistake reproduces",
                rank=GENERIC),
    FindingKind(id="unreliable-reference", meaning="the references disagree with each other everywhere in a "
                "tensor (a kink, a noisy loss), so it was not judged", rank=NOT_A_BLAME, blames_user_code=False),
):
    register(_kind)


class EvidenceTier(IntEnum):
    """How direct the evidence behind one finding is (lower is stronger)."""

    CLAIMED_DELTAS = 0  # the user's own deltas locate the step (or a repeated call, an update step, shows it)
    MUTANT = 1  # a mutant of the traced backward reproduces every claimed tensor
    SIGNATURE = 2  # a whole-tensor transform of the reference reproduces one tensor
    NONE = 3  # nothing reproduces the claims (``unexplained``, ``unreliable-reference``)


class RankedFinding(NamedTuple):
    """A finding with what ranks it: how well its hypothesis fits (``misfit``, smaller is better) and the
    tier of its evidence."""

    finding: Finding
    misfit: float
    evidence: int
