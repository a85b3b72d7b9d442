"""Two calls of the user's backward on the same input: buffers that are never reset show up here."""

from __future__ import annotations

import numpy as np

from .._check.compare import Judgement
from .._check.inputs import Plan
from .._report.results import Finding
from .kinds import EvidenceTier, RankedFinding

__all__ = ["repeat_findings"]


def repeat_findings(plan: Plan, first: list[np.ndarray], second: list[np.ndarray],
                     judgement: Judgement) -> list[RankedFinding]:
    """Compare two calls of the ``grads`` callable on the same input: buffers that are never cleared show up here."""
    out = []
    for k, t in enumerate(plan.structure.tensors):
        a, b = first[k], second[k]
        if np.array_equal(a, b, equal_nan=True):
            continue
        if np.allclose(b, 2 * a, rtol=1e-9, atol=0) and np.any(a != 0):
            detail = ("a second call of the grads callable returned twice the first: gradient buffers are "
                      "accumulated (+=) and never reset; zero them at the start of every backward pass")
            out.append(RankedFinding(finding=Finding("accumulating", t.layer, t.path, detail, 2.0), misfit=0.0,
                                     evidence=EvidenceTier.CLAIMED_DELTAS))
        else:
            detail = ("two calls of the grads callable on the same input returned different values; it keeps "
                      "state between calls or uses unseeded randomness")
            out.append(RankedFinding(finding=Finding("accumulating", t.layer, t.path, detail, None), misfit=1.0,
                                     evidence=EvidenceTier.MUTANT))
    return out
