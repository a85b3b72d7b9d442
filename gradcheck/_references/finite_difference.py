"""Finite-difference references: central differences, Richardson extrapolation and the complex step.

Each scheme is written once, as a list of perturbations (``_scale.perturbations.Entries``) handed to a runner
and a rule combining the loss values it returns. Whoever evaluates them (a serial runner on an Evaluator's
private copies, an executor's workers, the vectorised JAX runner) receives the same float64 points, so the
references agree to the last bit for a loss that is deterministic; only where the loss is evaluated differs.
The caller's arrays are never touched, whatever the loss does or raises. Each estimate carries its own
expected accuracy (an absolute part per entry and a relative part), which the comparison uses both to set
the floor of the relative error and to decide when two references disagree by more than they should.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Callable, NamedTuple, Sequence

import numpy as np

from .._core.evaluator import Evaluator
from .._core.precision import EPS64, ROUNDOFF_SAFETY, rounding_scale, roundoff, steps_for
from .._scale.perturbations import Block, Directions, Entries, evaluate
from .registry import accuracy

if TYPE_CHECKING:
    from gradcheck._check.inputs import Plan
    from gradcheck._core.tree import Structure

__all__ = ["Estimate", "At", "on_evaluator", "central_by", "richardson_by", "complex_by", "central_entry",
           "central_along", "central", "richardson", "complex_step", "complex_usable", "COMPLEX_STEP"]


@dataclass(frozen=True, eq=False)
class Estimate:
    """One reference gradient with its expected accuracy.

    Attributes:
        method: ``central``, ``richardson``, ``complex`` or ``autodiff``.
        values: one float64 array per tensor; NaN where the entry was not computed.
        atol: per-entry absolute accuracy (same shapes as ``values``).
        rtol: relative accuracy of the method on smooth losses.
    """

    method: str
    values: tuple[np.ndarray, ...]
    atol: tuple[np.ndarray, ...]
    rtol: float


class At(NamedTuple):
    """The point a scheme differentiates at: the tensors, their float64 values, the loss there (a Plan fits)."""

    structure: Structure
    base: Sequence[np.ndarray]
    f0: float


def on_evaluator(ev: Evaluator,
                 progress: Callable[[int], None] | None = None) -> Callable[[Sequence[Block]], np.ndarray]:
    """A serial runner on the Evaluator's own working copies, so that ``ev.count`` counts every loss call."""
    directions = Directions()
    return lambda blocks: evaluate(ev, blocks, progress, directions)


def _indices(size: int, wanted: Sequence[np.ndarray | None] | None, k: int) -> np.ndarray:
    return np.arange(size) if wanted is None or wanted[k] is None else np.asarray(wanted[k], np.int64)


def _differences(run: Callable, plan: Plan | At, eps: float, wanted: Sequence[np.ndarray | None] | None, order: int,
                 fractions: Sequence[float]) -> tuple[list, list[np.ndarray], list[np.ndarray]]:
    """Per tensor: its entries, steps, and the central differences at each fraction of the step.

    The divisor is the step really taken, ``(x + h) - (x - h)`` in floating point, which removes the
    representation error of h itself.
    """
    parts = []
    for k, b in enumerate(plan.base):
        flat = b.reshape(-1)
        idx = _indices(flat.size, wanted, k)
        parts.append((k, idx, flat[idx], steps_for(flat, order, eps)[idx]))
    f = run([Entries(k, idx, x + sign * h * q) for k, idx, x, h in parts for q in fractions for sign in (1.0, -1.0)])
    out, at = [], 0
    for _, idx, x, h in parts:
        ds = []
        for q in fractions:  # h * q is exact: q is 1 or 1/2
            hq, n = h * q, idx.size
            ds.append((f[at:at + n] - f[at + n:at + 2 * n]) / ((x + hq) - (x - hq)))
            at += 2 * n
        out.append(ds)
    values = [np.full(t.shape, np.nan) for t in plan.structure.tensors]
    atol = [np.full(t.shape, np.inf) for t in plan.structure.tensors]
    return [(k, idx, h, ds) for (k, idx, _, h), ds in zip(parts, out)], values, atol


def central_by(run: Callable, plan: Plan | At, eps: float = EPS64,
               wanted: Sequence[np.ndarray | None] | None = None) -> Estimate:
    """Central differences (f(x + h) - f(x - h)) / (2h) through a runner, two evaluations per entry.

    Example:
        >>> from gradcheck._core.evaluator import Evaluator
        >>> from gradcheck._core.tree import flatten
        >>> s, leaves = flatten({"w": np.array([1.0, 2.0])})
        >>> ev = Evaluator(lambda p: float(np.sum(p["w"] ** 3)), s, leaves, ())
        >>> est = central_by(on_evaluator(ev), At(ev.structure, ev.base, ev()))
        >>> np.round(est.values[0], 6), ev.count
        (array([ 3., 12.]), 5)
    """
    parts, values, atol = _differences(run, plan, eps, wanted, 2, (1.0,))
    for k, idx, h, (d,) in parts:
        values[k].reshape(-1)[idx], atol[k].reshape(-1)[idx] = d, roundoff(plan.f0, h, eps)
    return Estimate("central", tuple(values), tuple(atol), rtol=accuracy("central", eps))


def richardson_by(run: Callable, plan: Plan | At, eps: float = EPS64,
                  wanted: Sequence[np.ndarray | None] | None = None) -> Estimate:
    """Richardson extrapolation of central differences through a runner: (4 D(h/2) - D(h)) / 3.

    D(h) has error c2 h^2 + c4 h^4 + ...; the combination cancels the h^2 term,
    leaving a fourth-order estimate, so the step can be larger (eps^(1/5)) and the
    rounding error smaller than for plain central differences. Four evaluations per entry.
    """
    parts, values, atol = _differences(run, plan, eps, wanted, 4, (1.0, 0.5))
    for k, idx, h, (d1, d2) in parts:
        values[k].reshape(-1)[idx] = (4.0 * d2 - d1) / 3.0
        atol[k].reshape(-1)[idx] = 3.0 * roundoff(plan.f0, h / 2, eps)
    return Estimate("richardson", tuple(values), tuple(atol), rtol=accuracy("richardson", eps))


def complex_by(run: Callable, plan: Plan | At, wanted: Sequence[np.ndarray | None] | None = None) -> Estimate:
    """Complex-step derivative Im f(x + ih) / h through a runner on complex128 copies, one evaluation per entry.

    Squire & Trapp (1998): for a real-analytic loss, f(x + ih) = f(x) + ih f'(x)
    - h^2 f''(x) / 2 + ..., so the imaginary part gives f'(x) without subtractive
    cancellation, accurate to rounding.
    """
    values = [np.full(t.shape, np.nan) for t in plan.structure.tensors]
    atol = [np.full(t.shape, np.inf) for t in plan.structure.tensors]
    blocks, parts = [], []
    for k, b in enumerate(plan.base):
        flat = np.real(b.reshape(-1))
        idx = _indices(flat.size, wanted, k)
        scale = np.maximum(np.abs(flat[idx]), 1.0)
        h = COMPLEX_STEP * scale
        moved = np.empty(idx.size, dtype=np.complex128)
        moved.real, moved.imag = flat[idx], h
        blocks.append(Entries(k, idx, moved))
        parts.append((k, idx, h, scale))
    f = run(blocks)
    at = 0
    for k, idx, h, scale in parts:
        n = h.size
        values[k].reshape(-1)[idx] = np.imag(f[at:at + n]) / h
        atol[k].reshape(-1)[idx] = ROUNDOFF_SAFETY * EPS64 * rounding_scale(plan.f0) / scale
        at += n
    return Estimate("complex", tuple(values), tuple(atol), rtol=accuracy("complex"))


COMPLEX_STEP = 1e-20
"""The imaginary step. With no subtraction there is no cancellation, so h can be tiny enough that the
O(h^2) truncation error lies far below rounding (Martins, Sturdza & Alonso 2003)."""


def central_entry(run: Callable, plan: Plan | At, k: int, j: int, eps: float = EPS64) -> tuple[float, float]:
    """Central difference at flat entry ``j`` of tensor ``k`` alone (two evaluations): value and accuracy."""
    wanted = [np.array([j]) if i == k else np.array([], dtype=np.int64) for i in range(len(plan.base))]
    est = central_by(run, plan, eps, wanted)
    return float(est.values[k].reshape(-1)[j]), float(est.atol[k].reshape(-1)[j])


def central_along(ev: Evaluator, k: int, direction: np.ndarray, h: float) -> float:
    """Central difference (f(x + h v) - f(x - h v)) / 2h of tensor ``k`` along ``direction`` (two evaluations).

    Example:
        >>> from gradcheck._core.tree import flatten
        >>> s, leaves = flatten({"w": np.array([1.0, 2.0])})
        >>> ev = Evaluator(lambda p: float(np.sum(p["w"] ** 2)), s, leaves, ())
        >>> round(central_along(ev, 0, np.array([1.0, 0.0]), 1e-3), 9)
        2.0
    """
    return (ev.along(k, direction, h) - ev.along(k, direction, -h)) / (2 * h)


def central(ev: Evaluator, f0: float, wanted: Sequence[np.ndarray | None] | None = None,
            eps: float = EPS64, progress: Callable[[int], None] | None = None) -> Estimate:
    """:func:`central_by` on the Evaluator's working copies (every call counted by ``ev``)."""
    return central_by(on_evaluator(ev, progress), At(ev.structure, ev.base, f0), eps, wanted)


def richardson(ev: Evaluator, f0: float, wanted: Sequence[np.ndarray | None] | None = None,
               eps: float = EPS64, progress: Callable[[int], None] | None = None) -> Estimate:
    """:func:`richardson_by` on the Evaluator's working copies (every call counted by ``ev``)."""
    return richardson_by(on_evaluator(ev, progress), At(ev.structure, ev.base, f0), eps, wanted)


def complex_step(cev: Evaluator, f0: float, wanted: Sequence[np.ndarray | None] | None = None) -> Estimate:
    """:func:`complex_by` on an Evaluator's complex128 working copies (every call counted by ``cev``)."""
    return complex_by(on_evaluator(cev), At(cev.structure, cev.base, f0), wanted)


def complex_usable(cev: Evaluator, f0: float) -> str | None:
    """Try the complex step once; return None when usable, else the reason it is not.

    Usable means: the loss accepts complex parameters and returns a complex value
    whose real part equals the real loss. Detected by trying, never assumed.
    """
    try:
        value = cev()
    except Exception as exc:  # any failure means the loss is not written for complex input
        return f"the loss raised {type(exc).__name__} for complex parameters"
    if not isinstance(value, complex):
        return "the loss returns a real value for complex parameters"
    if not np.isfinite(value.real) or abs(value.real - f0) > 1e-12 * max(abs(f0), 1e-300) + 1e-300:
        return f"the real part of the complex loss ({value.real!r}) differs from the real loss ({f0!r})"
    return None
