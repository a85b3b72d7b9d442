"""Numerical references: central differences, Richardson extrapolation and the complex step.

All three differentiate the user's loss one entry at a time on private float64
(or complex128) copies of the parameters, so the caller's arrays are never
touched, whatever the loss does or raises. Each estimate carries its own
expected accuracy (an absolute part per entry and a relative part), which the
comparison uses both to set the floor of the relative error and to decide when
two references disagree by more than they should.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np

from .._core.evaluator import Evaluator
from .._core.precision import EPS64, ROUNDOFF_SAFETY, rounding_scale, roundoff, steps_for

__all__ = ["Estimate", "central", "richardson", "complex_step", "complex_usable", "COMPLEX_STEP"]


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


def _indices(size: int, wanted: np.ndarray | None) -> np.ndarray:
    return np.arange(size) if wanted is None else np.asarray(wanted, dtype=np.int64)


def _empty_like(ev: Evaluator) -> tuple[list[np.ndarray], list[np.ndarray]]:
    return ([np.full(t.shape, np.nan) for t in ev.structure.tensors],
            [np.full(t.shape, np.inf) for t in ev.structure.tensors])


def central(ev: Evaluator, f0: float, wanted: Sequence[np.ndarray | None] | None = None,
            eps: float = EPS64, progress: Callable[[int], None] | None = None) -> Estimate:
    """Central differences (f(x + h) - f(x - h)) / (2h), two evaluations per entry.

    The divisor is the step actually taken, ``(x + h) - (x - h)`` in floating
    point, which removes the representation error of h itself. ``progress``, when
    given, is called with the number of evaluations after each entry.

    Example:
        >>> from gradcheck._core.tree import flatten
        >>> s, leaves = flatten({"w": np.array([1.0, 2.0])})
        >>> ev = Evaluator(lambda p: float(np.sum(p["w"] ** 3)), s, leaves, ())
        >>> est = central(ev, ev())
        >>> np.round(est.values[0], 6)
        array([ 3., 12.])
    """
    values, atol = _empty_like(ev)
    for k, w in enumerate(ev.work):
        flat = w.reshape(-1)
        idx = _indices(flat.size, None if wanted is None else wanted[k])
        h_all = steps_for(ev.base[k].reshape(-1), 2, eps)
        out, err = values[k].reshape(-1), atol[k].reshape(-1)
        for i in idx:
            x = flat[i]
            up, down = x + h_all[i], x - h_all[i]
            flat[i] = up
            fp = ev()
            flat[i] = down
            fm = ev()
            flat[i] = x
            out[i] = (fp - fm) / (up - down)
            if progress is not None:
                progress(2)
        err[idx] = roundoff(f0, h_all[idx], eps)
    return Estimate("central", tuple(values), tuple(atol), rtol=1e-6 if eps <= EPS64 else 1e-2)


def richardson(ev: Evaluator, f0: float, wanted: Sequence[np.ndarray | None] | None = None,
               eps: float = EPS64, progress: Callable[[int], None] | None = None) -> Estimate:
    """Richardson extrapolation of central differences: (4 D(h/2) - D(h)) / 3.

    D(h) has error c2 h^2 + c4 h^4 + ...; the combination cancels the h^2 term,
    leaving a fourth-order estimate, so the step can be larger (eps^(1/5)) and the
    rounding error smaller than for plain central differences. Four evaluations
    per entry. ``progress``, when given, is called with the number of evaluations after each entry.
    """
    values, atol = _empty_like(ev)
    for k, w in enumerate(ev.work):
        flat = w.reshape(-1)
        idx = _indices(flat.size, None if wanted is None else wanted[k])
        h_all = steps_for(ev.base[k].reshape(-1), 4, eps)
        out, err = values[k].reshape(-1), atol[k].reshape(-1)
        for i in idx:
            x = flat[i]
            d = []
            for h in (h_all[i], h_all[i] / 2):
                up, down = x + h, x - h
                flat[i] = up
                fp = ev()
                flat[i] = down
                fm = ev()
                flat[i] = x
                d.append((fp - fm) / (up - down))
            out[i] = (4.0 * d[1] - d[0]) / 3.0
            if progress is not None:
                progress(4)
        err[idx] = 3.0 * roundoff(f0, h_all[idx] / 2, eps)
    return Estimate("richardson", tuple(values), tuple(atol), rtol=1e-9 if eps <= EPS64 else 1e-3)


COMPLEX_STEP = 1e-20
"""The imaginary step. With no subtraction there is no cancellation, so h can be tiny enough that the
O(h^2) truncation error lies far below rounding (Martins, Sturdza & Alonso 2003)."""


def complex_step(cev: Evaluator, f0: float, wanted: Sequence[np.ndarray | None] | None = None) -> Estimate:
    """Complex-step derivative Im f(x + ih) / h, one evaluation per entry.

    Squire & Trapp (1998): for a real-analytic loss, f(x + ih) = f(x) + ih f'(x)
    - h^2 f''(x) / 2 + ..., so the imaginary part gives f'(x) without subtractive
    cancellation, accurate to rounding. ``cev`` is an Evaluator on complex128
    copies.
    """
    values, atol = _empty_like(cev)
    for k, w in enumerate(cev.work):
        flat = w.reshape(-1)
        idx = _indices(flat.size, None if wanted is None else wanted[k])
        scale = np.maximum(np.abs(cev.base[k].reshape(-1).real), 1.0)
        out, err = values[k].reshape(-1), atol[k].reshape(-1)
        for i in idx:
            x = flat[i]
            h = COMPLEX_STEP * scale[i]
            flat[i] = complex(x.real, h)
            val = cev()
            flat[i] = x
            out[i] = complex(val).imag / h
        err[idx] = ROUNDOFF_SAFETY * EPS64 * rounding_scale(f0) / scale[idx]
    return Estimate("complex", tuple(values), tuple(atol), rtol=1e-11)


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
