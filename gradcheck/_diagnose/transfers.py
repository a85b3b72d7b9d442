"""The registry of transfer functions: one record per function, the single place to add one.

A transfer function is known to several stages: the case format (its name and a
forward pass that runs in numpy, ``jax.numpy`` and with complex steps), the
Hypothesis strategies (which hidden units to draw) and the diagnosis (its correct
derivative, the formula a message quotes, the wrong derivatives people write).
Keeping all of that in one :class:`Transfer` record means a new function is added
once and every stage learns it together, instead of drifting tables.

Forward passes take the array namespace first, ``forward(xp, z)``; piecewise forms
branch on ``xp.real(z) > 0`` so they stay analytic for complex steps, and exp only
ever sees a non-positive real part, so nothing overflows.

Example:
    >>> import numpy as np
    >>> t = TRANSFERS["softplus"]
    >>> np.round(t.forward(np, np.array([-1.0, 0.0, 800.0])), 6).tolist()
    [0.313262, 0.693147, 800.0]
    >>> TRANSFERS["leaky-relu"].derivative_from_z(np.array([-2.0, 3.0])).tolist()
    [0.01, 1.0]
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

__all__ = ["Transfer", "WrongDerivative", "TRANSFERS", "LEAKY_SLOPE", "ELEMENTWISE"]

#: Slope of leaky ReLU for z <= 0, as commonly used (common practice).
LEAKY_SLOPE = 0.01


@dataclass(frozen=True)
class WrongDerivative:
    """A derivative people write in place of the right one: ``factor(z, a)`` is what it multiplies in."""

    kind: str
    says: str
    factor: Callable[[np.ndarray, np.ndarray], np.ndarray]


@dataclass(frozen=True)
class Transfer:
    """One transfer function, everything the stages need of it.

    Attributes:
        name: the case format's name.
        forward: ``forward(xp, z)``, for numpy, ``jax.numpy`` and complex z.
        derivative_from_z: the correct local derivative as a function of z (numpy, real).
        derivative_from_a: the same from the output a, or ``None`` where a does not determine it.
        formula: how a message writes the derivative.
        wrong_derivatives: common wrong derivatives, each a :class:`WrongDerivative`.
        elementwise: ``False`` for softmax (a whole row at once; output layer only).
        at_output: (how it reads, factor) of the derivative evaluated at the output a instead of z,
            for the traced-mutant diagnosis; ``None`` where that gives the same value (ReLU).
        swapped: (description, factor) of other units' derivatives used in its place.
    """

    name: str
    forward: Callable[[Any, Any], Any]
    derivative_from_z: Callable[[np.ndarray], np.ndarray]
    derivative_from_a: Callable[[np.ndarray], np.ndarray] | None
    formula: str
    wrong_derivatives: tuple[WrongDerivative, ...] = ()
    elementwise: bool = True
    at_output: tuple[str, Callable[[np.ndarray, np.ndarray], np.ndarray]] | None = None
    swapped: tuple[tuple[str, Callable[[np.ndarray, np.ndarray], np.ndarray]], ...] = ()

    def numpy_forward(self, z: np.ndarray) -> np.ndarray:
        """The forward pass in numpy."""
        return np.asarray(self.forward(np, z))

    def derivative(self, z: np.ndarray, a: np.ndarray) -> np.ndarray:
        """The correct derivative, from a where that is how it is usually written, else from z."""
        return self.derivative_from_a(a) if self.derivative_from_a is not None else self.derivative_from_z(z)


def _positive(xp: Any, z: Any) -> Any:
    """``Re z > 0``: the branch test of the piecewise forms; real part so complex steps stay analytic."""
    return xp.real(z) > 0


def logistic(xp: Any, z: Any) -> Any:
    """``1 / (1 + e^-z)``; exp only ever sees a non-positive real part, so neither branch overflows."""
    pos = _positive(xp, z)
    e = xp.exp(xp.where(pos, -z, z))
    return xp.where(pos, 1 / (1 + e), e / (1 + e))


def softplus(xp: Any, z: Any) -> Any:
    """``log(1 + e^z) = max(z, 0) + log1p(e^{-|z|})``, written with where so it is analytic branch by branch."""
    pos = _positive(xp, z)
    return xp.where(pos, z, 0) + xp.log1p(xp.exp(xp.where(pos, -z, z)))


def _shifted(xp: Any, z: Any) -> Any:
    # Subtracting the row maximum leaves softmax unchanged and keeps exp from overflowing.
    return z - xp.max(xp.real(z), axis=-1, keepdims=True)


def softmax(xp: Any, z: Any) -> Any:
    """Softmax over the last axis."""
    e = xp.exp(_shifted(xp, z))
    return e / xp.sum(e, axis=-1, keepdims=True)


def log_softmax(xp: Any, z: Any) -> Any:
    """Log-softmax over the last axis."""
    s = _shifted(xp, z)
    return s - xp.log(xp.sum(xp.exp(s), axis=-1, keepdims=True))


def _s(u: np.ndarray) -> np.ndarray:
    return np.asarray(logistic(np, u))


_MISPLACED = "transfer-derivative-misplaced"

_RECORDS = (
    Transfer(
        name="logistic", forward=logistic, derivative_from_z=lambda z: _s(z) * (1 - _s(z)),
        derivative_from_a=lambda a: a * (1 - a), formula="a*(1-a)",
        wrong_derivatives=(
            WrongDerivative(_MISPLACED, "the logistic derivative s(1-s) is applied to the pre-activation z instead "
                            "of the output s(z); use a * (1 - a) with a = s(z)", lambda z, a: z * (1 - z)),
            WrongDerivative(_MISPLACED, "the logistic derivative is evaluated at s(a), the function applied twice; "
                            "use a * (1 - a) with a the layer's output", lambda z, a: _s(a) * (1 - _s(a))),
            WrongDerivative(_MISPLACED, "the tanh derivative 1 - a^2 is used for a logistic layer; use a * (1 - a)",
                            lambda z, a: 1 - a ** 2)),
        at_output=("logistic(a)*(1-logistic(a))", lambda z, a: _s(a) * (1 - _s(a))),
        swapped=(("the tanh derivative 1 - a**2 applied to the logistic output a", lambda z, a: 1 - a ** 2),
                 ("the tanh derivative 1 - tanh(z)**2 at the logistic's input z",
                  lambda z, a: 1 - np.tanh(z) ** 2))),
    Transfer(
        name="tanh", forward=lambda xp, z: xp.tanh(z), derivative_from_z=lambda z: 1 - np.tanh(z) ** 2,
        derivative_from_a=lambda a: 1 - a ** 2, formula="1 - a**2",
        wrong_derivatives=(
            WrongDerivative(_MISPLACED, "the tanh derivative 1 - a^2 is applied to the pre-activation z instead of "
                            "the output; use 1 - tanh(z)^2", lambda z, a: 1 - z ** 2),
            WrongDerivative(_MISPLACED, "the tanh derivative is evaluated at tanh(a), the function applied twice; "
                            "use 1 - a^2 with a the layer's output", lambda z, a: 1 - np.tanh(a) ** 2),
            WrongDerivative(_MISPLACED, "the logistic derivative a(1 - a) is used for a tanh layer; use 1 - a^2",
                            lambda z, a: a * (1 - a))),
        at_output=("1 - tanh(a)**2", lambda z, a: 1 - np.tanh(a) ** 2),
        swapped=(("the logistic derivative a*(1-a) applied to the tanh output a", lambda z, a: a * (1 - a)),
                 ("the logistic derivative logistic(z)*(1-logistic(z)) at the tanh's input z",
                  lambda z, a: _s(z) * (1 - _s(z))))),
    Transfer(
        name="relu", forward=lambda xp, z: xp.where(_positive(xp, z), z, 0),
        derivative_from_z=lambda z: (z > 0).astype(float), derivative_from_a=None, formula="the step (z > 0)"),
    Transfer(
        name="identity", forward=lambda xp, z: z, derivative_from_z=lambda z: np.ones_like(z),
        derivative_from_a=None, formula="1"),
    Transfer(
        name="softmax", forward=softmax, derivative_from_z=lambda z: softmax(np, z) * (1 - softmax(np, z)),
        derivative_from_a=lambda a: a * (1 - a), formula="the Jacobian diag(s) - s s^T", elementwise=False),
    Transfer(
        name="softplus", forward=softplus, derivative_from_z=_s, derivative_from_a=None, formula="logistic(z)",
        wrong_derivatives=(
            WrongDerivative(_MISPLACED, "the softplus derivative logistic(z) is evaluated at the output a; "
                            "use logistic(z) of the pre-activation", lambda z, a: _s(a)),),
        at_output=("logistic(a)", lambda z, a: _s(a))),
    Transfer(
        name="leaky-relu", forward=lambda xp, z: xp.where(_positive(xp, z), z, LEAKY_SLOPE * z),
        derivative_from_z=lambda z: np.where(z > 0, 1.0, LEAKY_SLOPE), derivative_from_a=None,
        formula=f"1 for z > 0, {LEAKY_SLOPE} otherwise",
        wrong_derivatives=(
            WrongDerivative(_MISPLACED, f"the ReLU step (z > 0) is used for a leaky-ReLU layer; below 0 the slope is "
                            f"{LEAKY_SLOPE}, not 0", lambda z, a: (z > 0).astype(float)),)),
)

#: Name -> record; the single place to add a transfer function.
TRANSFERS: dict[str, Transfer] = {t.name: t for t in _RECORDS}
#: Names of the functions that act entry by entry (every one but softmax): the hidden-layer choices.
ELEMENTWISE: tuple[str, ...] = tuple(name for name, t in TRANSFERS.items() if t.elementwise)
