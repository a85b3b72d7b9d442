"""Ranking findings, and folding repeats of one mistake across tensors into one finding.

The order comes from the kinds registry (:mod:`.kinds`) and the evidence tier of each finding: the layer
nearest the loss first (in a backprop chain the layers below inherit its error, and a width-one chain makes
an inherited error look like a clean ``scaled`` one), then specific kinds before generic ones, stronger
evidence before weaker, better fits before worse; kinds that blame nobody come after every finding that does.
"""

from __future__ import annotations

from typing import Iterable, Sequence

from .._report.results import Finding
from .kinds import KINDS, NOT_A_BLAME, RankedFinding

__all__ = ["merge_findings"]


def merge_findings(findings: Iterable[RankedFinding | tuple[Finding, float, int]],
                   layer_order: Sequence[str]) -> tuple[Finding, ...]:
    """Rank findings and fold repeats of one mistake across tensors into one finding.

    Args:
        findings: ranked findings (or ``(finding, misfit, evidence tier)`` triples).
        layer_order: layers from input to output.

    Example:
        >>> a = RankedFinding(finding=Finding("unexplained", "out", "out.W", "no pattern"), misfit=1.0, evidence=3)
        >>> b = RankedFinding(finding=Finding("sign-flip", "out", "out.b", "negated"), misfit=0.0, evidence=2)
        >>> [f.kind for f in merge_findings([a, b], ["hidden", "out"])]
        ['sign-flip', 'unexplained']
    """
    rank = {name: i for i, name in enumerate(layer_order)}

    def key(item: RankedFinding) -> tuple:
        kind = KINDS[item.finding.kind]
        return (kind.rank == NOT_A_BLAME, -rank.get(item.finding.layer or "", -1), kind.rank, item.evidence,
                item.misfit)

    merged: list[Finding] = []
    seen: dict[tuple, int] = {}
    also: dict[int, list[str]] = {}
    for item in sorted((RankedFinding(*f) for f in findings), key=key):
        f = item.finding
        sig = (f.kind, None if f.factor is None else round(f.factor, 6))
        if KINDS[f.kind].folds_across_tensors and sig in seen:
            also.setdefault(seen[sig], [])
            if f.where != merged[seen[sig]].where and f.where not in also[seen[sig]]:
                also[seen[sig]].append(f.where)
            continue
        seen.setdefault(sig, len(merged))
        merged.append(f)
    for i, wheres in also.items():
        f = merged[i]
        merged[i] = Finding(f.kind, f.layer, f.where, f"{f.detail} (also in {', '.join(wheres)})", f.factor)
    return tuple(merged)
