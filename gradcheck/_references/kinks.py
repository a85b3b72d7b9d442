"""One kink test: does the loss have a jump in slope within a step, and does that jump explain a failure?

The second difference ``(f(x + h) - 2 f(x) + f(x - h)) / h`` is ``h f''`` on a smooth loss (to O(h^3)), so
it halves exactly each time the step halves; across a kink (ReLU at 0, max with a tie) it is the jump in
slope, independent of h while the kink is inside the step. Measuring it at a few halving steps tells the
two apart, and the size of the jump bounds how far from the central difference a valid one-sided slope
(a subgradient) can lie. Below ``1e3 eps |f0| / h`` the second difference is rounding and says nothing.

Two criteria are used, kept as the two values of ``criterion`` because each was tuned to its caller:

* ``"steady"`` (entry by entry, steps h and h/2): a kink when the second difference at h/2 is at least
  three quarters of that at h, above the rounding floor; it explains a failure when the claimed slope is
  within half the jump of the reference, i.e. between the one-sided slopes.
* ``"not_halving"`` (along a direction that moves many entries, steps h, h/2, h/4): a kink when any ratio of
  consecutive second differences is off 1/2 by more than 0.1, the first above the rounding floor (outside
  the step a kink makes the second difference drop to nearly nothing, which also is not halving); it
  explains a failure when the gap is within the largest second difference (a bound on the jump).
"""

from __future__ import annotations

from typing import Sequence

from .._core.precision import rounding_scale

__all__ = ["second_differences", "kink_explains", "KINK_NOISE"]

KINK_NOISE = 1e3
"""Units of ``eps |f0| / h`` below which a second difference is rounding, not curvature or a kink."""


def second_differences(f0: float, ups: Sequence[float], downs: Sequence[float],
                       steps: Sequence[float]) -> list[float]:
    """``(f(x + h) - 2 f(x) + f(x - h)) / h`` at each step.

    Example:
        >>> second_differences(0.0, [0.1, 0.05], [0.1, 0.05], [0.1, 0.05])  # |x| at 0: the jump in slope, 2
        [2.0, 2.0]
    """
    return [(up - 2 * f0 + down) / step for up, down, step in zip(ups, downs, steps)]


def kink_explains(f0: float, ups: Sequence[float], downs: Sequence[float], steps: Sequence[float], gap: float,
                  eps: float, criterion: str = "steady") -> bool:
    """Whether a kink within the first step explains a claimed slope ``gap`` away from the reference.

    ``ups[i]`` and ``downs[i]`` are the loss at ``x + steps[i]`` and ``x - steps[i]`` (steps halving);
    ``criterion`` is ``"steady"`` or ``"not_halving"`` (see the module docstring).

    Example:
        >>> h = [1e-3, 5e-4]
        >>> kink_explains(0.0, h, h, h, gap=0.5, eps=2.2e-16)  # |x| at 0: slopes -1 and 1; 0.5 lies between
        True
        >>> kink_explains(0.0, [1e-6, 2.5e-7], [1e-6, 2.5e-7], h, gap=0.5, eps=2.2e-16)  # x**2: smooth
        False
    """
    second = second_differences(f0, ups, downs, steps)
    noise = KINK_NOISE * eps * rounding_scale(f0) / steps[0]
    if criterion == "steady":
        jump = second[1]
        steady = abs(jump) > noise and abs(second[1]) > 0.75 * abs(second[0])
        return bool(steady and gap <= 0.5 * abs(jump) * (1 + 1e-6) + noise)
    if criterion == "not_halving":
        kink = abs(second[0]) > noise and any(abs(b / a - 0.5) > 0.1 for a, b in zip(second, second[1:]) if a)
        return bool(kink and gap <= max(abs(v) for v in second))
    raise ValueError(f"criterion: expected 'steady' or 'not_halving', got {criterion!r}")
