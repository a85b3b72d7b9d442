"""Comparison: per-entry relative errors, tolerances, and agreement between references.

The per-entry relative error is ``|claimed - ref| / max(|claimed|, |ref|, floor)``.
The floor is what keeps an entry whose true gradient is zero (a bias feeding a
normalisation, a dead unit) from dividing rounding noise by nothing. It is the
larger of

* a fraction of the network's largest reference entry (the claimed values carry
  rounding of that size from the user's own sums), and
* the reference's own absolute accuracy at that entry divided by the tolerance
  (so reference noise alone can never exceed the tolerance).

Where two references disagree with each other by more than their stated
accuracies allow, the entry is *unreliable* (a kink such as ReLU at 0, a noisy
loss) and is excluded from the verdict rather than blamed on the user.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from .._core.tree import Structure
from .._references.finite_difference import Estimate
from .._report.results import ReferenceSummary, TensorResult

__all__ = ["Judgement", "tolerance_for", "relative_error", "disagreement", "judge"]

FLOOR_FRACTION = {"float64": 1e-6, "float32": 1e-3}
"""Floor as a fraction of the largest reference entry, by the claimed gradient's dtype."""

BASE_TOLERANCE = {"float64": 1e-6, "float32": 1e-3}
"""Smallest relative tolerance by the claimed dtype: float64 hand-written sums agree with a float64
reference to ~1e-12 on healthy entries; float32 ones to ~1e-5; both leave two to three decades of margin."""


def tolerance_for(claimed_dtype: np.dtype, primary: Estimate) -> float:
    """Default relative tolerance: by the claimed dtype, never tighter than ten times the reference's accuracy.

    Example:
        >>> e = Estimate("central", (), (), rtol=1e-6)
        >>> print(f"{tolerance_for(np.dtype('float64'), e):.0e}", tolerance_for(np.dtype("float32"), e))
        1e-05 0.001
    """
    key = "float32" if np.dtype(claimed_dtype).itemsize <= 4 else "float64"
    return max(BASE_TOLERANCE[key], 10.0 * primary.rtol)


def relative_error(claimed: np.ndarray, ref: np.ndarray, floor: np.ndarray | float) -> np.ndarray:
    """``|claimed - ref| / max(|claimed|, |ref|, floor)``, entry by entry (inf where claimed is not finite).

    Example:
        >>> relative_error(np.array([1.01, 0.0, 1e-20]), np.array([1.0, 1e-12, 0.0]), 1e-9)
        array([9.9009901e-03, 1.0000000e-03, 1.0000000e-11])
    """
    c = np.asarray(claimed, dtype=np.float64)
    r = np.asarray(ref, dtype=np.float64)
    with np.errstate(invalid="ignore", over="ignore"):
        denom = np.maximum(np.maximum(np.abs(c), np.abs(r)), floor)
        err = np.abs(c - r) / denom
    return np.where(np.isfinite(c), err, np.inf)


def disagreement(a: Estimate, b: Estimate, k: int) -> tuple[np.ndarray, float]:
    """Per-entry disagreement of two references on tensor ``k`` and the threshold it must stay under.

    The threshold is ten times the looser method's relative accuracy; the floor is
    the two methods' absolute accuracies over that threshold, so two estimates
    that are both within their noise of zero agree.
    """
    rt = 10.0 * max(a.rtol, b.rtol)
    floor = (a.atol[k] + b.atol[k]) / rt
    va, vb = a.values[k], b.values[k]
    with np.errstate(invalid="ignore"):
        d = np.abs(va - vb) / np.maximum(np.maximum(np.abs(va), np.abs(vb)), floor)
    return np.where(np.isfinite(va) & np.isfinite(vb), d, np.nan), rt


@dataclass(frozen=True, eq=False)
class Judgement:
    """Everything the comparison stage hands on to diagnosis and the report."""

    primary: Estimate
    tensors: tuple[TensorResult, ...]
    summary: ReferenceSummary
    unreliable: tuple[np.ndarray, ...]
    errors: tuple[np.ndarray, ...]
    gradient_scale: float
    floors: tuple[np.ndarray, ...] = ()


def _cosine_and_scale(c: np.ndarray, r: np.ndarray) -> tuple[float, float]:
    if c.size == 0 or not np.all(np.isfinite(c)):
        return math.nan, math.nan
    cr, rr, cc = float(c @ r), float(r @ r), float(c @ c)
    if rr == 0.0 and cc == 0.0:
        return 1.0, math.nan
    if rr == 0.0 or cc == 0.0:
        return 0.0, (cr / rr if rr else math.nan)
    return cr / (math.sqrt(rr) * math.sqrt(cc)), cr / rr


def judge(structure: Structure, claimed: Sequence[np.ndarray], claimed_dtypes: Sequence[np.dtype],
          estimates: Sequence[Estimate], unavailable: dict[str, str], tolerance: float | None = None,
          gradient_scale: float | None = None, kinks: Sequence[np.ndarray] | None = None,
          allowances: Sequence[np.ndarray] | None = None) -> Judgement:
    """Compare claimed values with the best reference, tensor by tensor.

    Args:
        structure: the parameter structure (paths and layers).
        claimed: the user's values, one float64 array per tensor.
        claimed_dtypes: the dtypes the user gave (they set the default tolerance).
        estimates: every reference computed, the primary (compared against) first.
        unavailable: method -> reason, for the summary.
        tolerance: overrides the default relative tolerance for every tensor.
        gradient_scale: overrides the largest reference entry used for the floor.
        kinks: per-tensor masks of entries found to sit on a kink (not judged).
        allowances: per-tensor absolute rounding measured for the user's own backward (see
            ``gradcheck._check.rounding``); an entry that differs by no more than its allowance holds.
    """
    primary = estimates[0]
    others = list(estimates[1:])
    if gradient_scale is None:
        finite = [np.max(np.abs(v[np.isfinite(v)])) for v in primary.values if np.any(np.isfinite(v))]
        gradient_scale = float(max(finite)) if finite else 0.0
    agreement: dict[str, float] = {}
    results, unreliable_all, errors_all, floors_all = [], [], [], []
    for k, t in enumerate(structure.tensors):
        ref = primary.values[k]
        bad = np.zeros(t.shape, dtype=bool) if kinks is None else np.array(kinks[k], dtype=bool)
        for other in others:
            d, rt = disagreement(primary, other, k)
            with np.errstate(invalid="ignore"):
                bad |= d > rt
            good = np.isfinite(d) & ~(d > rt)
            if np.any(good):
                agreement[other.method] = max(agreement.get(other.method, 0.0), float(np.max(d[good])))
        key = "float32" if np.dtype(claimed_dtypes[k]).itemsize <= 4 else "float64"
        tol = tolerance if tolerance is not None else tolerance_for(claimed_dtypes[k], primary)
        floor = np.maximum(FLOOR_FRACTION[key] * gradient_scale, primary.atol[k] / tol)
        if allowances is not None:
            floor = np.maximum(floor, allowances[k] / tol)
        floor = np.maximum(floor, np.finfo(np.float64).tiny)
        err = relative_error(claimed[k], ref, floor)
        checked = np.isfinite(ref)
        err = np.where(checked, err, np.nan)
        judged = checked & ~bad
        results.append(_tensor_result(t, claimed[k], ref, err, judged, checked, bad, tol))
        unreliable_all.append(bad)
        errors_all.append(err)
        floors_all.append(floor)
    summary = ReferenceSummary(primary.method, (primary.method,) + tuple(e.method for e in others),
                               agreement, dict(unavailable), int(sum(int(b.sum()) for b in unreliable_all)))
    return Judgement(primary, tuple(results), summary, tuple(unreliable_all), tuple(errors_all), gradient_scale,
                     tuple(floors_all))


def _tensor_result(t, claimed: np.ndarray, ref: np.ndarray, err: np.ndarray, judged: np.ndarray,
                   checked: np.ndarray, bad: np.ndarray, tol: float) -> TensorResult:
    if np.any(judged):
        masked = np.where(judged, err, -1.0)
        flat = int(np.argmax(masked))
        worst = float(masked.reshape(-1)[flat])
        index = tuple(int(i) for i in np.unravel_index(flat, t.shape)) if t.shape else ()
    else:
        worst, index = 0.0, ()
    c, r = claimed[checked].astype(np.float64), ref[checked]
    cosine, scale = _cosine_and_scale(c, r)
    finite = bool(np.all(np.isfinite(claimed)))
    ok = finite and worst <= tol
    return TensorResult(path=t.path, layer=t.layer, shape=t.shape, error=worst, worst_index=index,
                        checked=int(checked.sum()), cosine=cosine, scale=scale, ok=ok, tolerance=tol,
                        unreliable=int(bad.sum()), size=t.size, errors=err)
