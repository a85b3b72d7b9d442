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
from typing import Any, Callable, Sequence

import numpy as np

from .._core.errors import describe, input_error
from .._core.tree import Structure

__all__ = ["Estimate", "Evaluator", "to_scalar", "central", "richardson", "complex_step", "steps_for",
           "EPS64", "EPS32", "rounding_scale"]

EPS64 = float(np.finfo(np.float64).eps)
EPS32 = float(np.finfo(np.float32).eps)
ROUNDOFF_SAFETY = 100.0
"""How many units of the loss's rounding error one evaluation may carry (sums of many terms round more)."""


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


def to_scalar(out: Any, where: str = "loss", allow_complex: bool = False) -> Any:
    """Turn what a loss returned into a Python float (or complex), or raise InputError.

    Accepts Python floats, 0-d and one-element arrays (numpy or JAX), numpy scalars.
    """
    if isinstance(out, float):  # Python floats and numpy float64 scalars: the hot path, no array round trip
        return float(out)
    try:
        arr = np.asarray(out)
    except Exception as exc:  # a value numpy cannot read at all
        raise input_error(where, "a scalar loss value", describe(out), "Return a float, e.g. float(total).") from exc
    if arr.size != 1 or arr.dtype.kind not in "fiuc" or arr.dtype == bool:
        raise input_error(where, "a scalar loss value", describe(out),
                          "Reduce the loss to one number (sum or mean over the batch and the outputs).")
    value = arr.reshape(())[()]
    if arr.dtype.kind == "c":
        return complex(value) if allow_complex else float(value.real)
    return float(value)


class Evaluator:
    """Calls ``loss(tree, *data, **kwargs)`` on private working copies and counts the calls.

    The working arrays ``work`` are perturbed in place by the difference schemes
    and restored exactly afterwards (the saved value is written back, never
    ``x + h - h``), so a scheme leaves no drift behind.
    """

    def __init__(self, loss: Callable, structure: Structure, base: Sequence[np.ndarray], data: tuple,
                 kwargs: dict | None = None, dtype: Any = np.float64):
        self.loss = loss
        self.structure = structure
        self.base = [np.array(b, dtype=dtype) for b in base]
        self.work = [b.copy() for b in self.base]
        self.tree = structure.rebuild([self._leaf_view(i) for i in range(len(self.work))])
        self.data = data
        self.kwargs = dict(kwargs or {})
        self.count = 0
        self.complex = np.dtype(dtype).kind == "c"

    def _leaf_view(self, i: int) -> Any:
        return self.work[i] if self.structure.tensors[i].shape else self.work[i].reshape(())

    def __call__(self) -> Any:
        self.count += 1
        return to_scalar(self.loss(self.tree, *self.data, **self.kwargs), allow_complex=self.complex)

    def reset(self, k: int | None = None) -> None:
        """Copy the base point back into the working arrays (all, or tensor ``k``)."""
        for i in range(len(self.work)) if k is None else (k,):
            np.copyto(self.work[i], self.base[i])

    def along(self, k: int, direction: np.ndarray, h: float) -> float:
        """The loss with tensor ``k`` moved to base + h * direction (restored afterwards)."""
        np.add(self.base[k], h * direction.reshape(self.base[k].shape), out=self.work[k])
        try:
            return self()
        finally:
            np.copyto(self.work[k], self.base[k])


def typical_size(x: np.ndarray) -> float:
    """The root-mean-square of a tensor's non-zero entries, or 1 when all are zero."""
    nonzero = np.abs(x[x != 0])
    return float(np.sqrt(np.mean(nonzero ** 2))) if nonzero.size else 1.0


def steps_for(x: np.ndarray, order: int, eps: float) -> np.ndarray:
    """Per-entry steps that balance truncation against rounding error.

    For a scheme whose truncation error is O(h^order) and whose rounding error is
    O(eps / h), the total is smallest at h ~ eps^(1 / (order + 1)) (Nocedal &
    Wright, Numerical Optimization, 2nd ed., section 8.1: h = eps^(1/3) for
    central differences), times the scale on which the loss varies with that
    entry. That scale is taken as the entry's magnitude, or the tensor's typical
    magnitude when the entry is smaller (a zero bias among weights of 0.3; a
    tensor whose entries are all near 1e-30, where a step of 1e-5 would be
    absurd).
    """
    x = np.asarray(x, dtype=np.float64)
    return eps ** (1.0 / (order + 1)) * np.maximum(np.abs(x), typical_size(x))


def _indices(size: int, wanted: np.ndarray | None) -> np.ndarray:
    return np.arange(size) if wanted is None else np.asarray(wanted, dtype=np.int64)


def _empty_like(ev: Evaluator) -> tuple[list[np.ndarray], list[np.ndarray]]:
    return ([np.full(t.shape, np.nan) for t in ev.structure.tensors],
            [np.full(t.shape, np.inf) for t in ev.structure.tensors])


def rounding_scale(f0: float) -> float:
    """The size of the values a loss of ``f0`` rounds at: ``|f0|``, or 1 when the loss is exactly zero.

    A loss's rounding error is a few units of its last place, which ``|f0|`` measures. A loss that is
    exactly 0.0 carries no scale of its own: it is almost always made by values that cancel (a fit that is
    exact to the last bit, ``log(1 + 1e-34)`` rounding to ``log(1)``), and those values round at their own
    size, taken here to be of order one. Without this, a loss that rounded to zero would claim an
    infinitely accurate reference of 0 and blame a correct gradient of 1e-34.

    Example:
        >>> rounding_scale(-2.5), rounding_scale(1e-300), rounding_scale(0.0)
        (2.5, 1e-300, 1.0)
    """
    return abs(f0) if f0 != 0 else 1.0


def _roundoff(f0: float, h: np.ndarray, eps: float) -> np.ndarray:
    return ROUNDOFF_SAFETY * eps * rounding_scale(f0) / h


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
        err[idx] = _roundoff(f0, h_all[idx], eps)
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
        err[idx] = 3.0 * _roundoff(f0, h_all[idx] / 2, eps)
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
