"""Precision facts every tolerance is built from: machine epsilons, the rounding floor of a loss, steps.

A finite difference loses accuracy two ways: truncation, which shrinks with the step, and the rounding of the
two loss values it subtracts, which grows as ``eps |f| / h``. Every reference and every tolerance in the package
is derived from these few numbers, so they live in one place: a step or floor computed in two modules must
agree to the last bit for the batched and serial references to be identical.
"""

from __future__ import annotations

import numpy as np

__all__ = ["EPS64", "EPS32", "ROUNDOFF_SAFETY", "rounding_scale", "roundoff", "typical_size", "steps_for"]

EPS64 = float(np.finfo(np.float64).eps)
EPS32 = float(np.finfo(np.float32).eps)
ROUNDOFF_SAFETY = 100.0
"""How many units of the loss's rounding error one evaluation may carry (sums of many terms round more)."""


def typical_size(x: np.ndarray) -> float:
    """The root-mean-square of a tensor's non-zero entries, or 1 when all are zero.

    Example:
        >>> typical_size(np.array([0.0, 3.0, -4.0])) == float(np.sqrt(12.5)), typical_size(np.zeros(2))
        (True, 1.0)
    """
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


def roundoff(f0: float, h: np.ndarray, eps: float) -> np.ndarray:
    """The rounding floor of a central difference of step ``h`` on a loss of ``f0``: ``SAFETY eps |f0| / h``.

    Example:
        >>> roundoff(2.0, np.array([1e-5]), EPS64) == 100.0 * EPS64 * 2.0 / 1e-5
        array([ True])
    """
    return ROUNDOFF_SAFETY * eps * rounding_scale(f0) / h
