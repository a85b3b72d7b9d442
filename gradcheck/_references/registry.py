"""The reference methods: one record each, the single source of their names, costs and accuracies.

A method's stated accuracy is the relative error it reaches on a smooth loss, and it is used twice: as the
floor of the relative error a claimed gradient is judged with, and to decide when two references disagree
by more than they should. Every module that needs one reads it here, so that a method's cost and accuracy
are stated once. The accuracy depends on the precision the loss computes in: a float32 loss rounds at
``EPS32 ~ 1e-7``, so a central difference with steps ``eps^(1/3)`` is good to about ``eps^(2/3) ~ 1e-5``
only, stated with a margin as 1e-2; autodiff in float32 rounds every operation to ~1e-7, stated as 1e-5.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from .._core.errors import input_error
from .._core.precision import EPS64

__all__ = ["ReferenceMethod", "REGISTRY", "METHODS", "accuracy", "evaluations_per_entry"]


@dataclass(frozen=True)
class ReferenceMethod:
    """One reference method.

    Attributes:
        name: how users name it (``method="central"``).
        evaluations_per_entry: loss evaluations per parameter entry (0 for autodiff, one gradient call).
        accuracy: the relative accuracy on smooth losses, by the precision the loss computes in
            (``"float64"``, ``"float32"``); a precision missing here is one the method is not used in.
        description: one line for documentation.
    """

    name: str
    evaluations_per_entry: int
    accuracy: dict = field(default_factory=dict)
    description: str = ""


REGISTRY = (
    ReferenceMethod(name="autodiff", evaluations_per_entry=0, accuracy={"float64": 1e-12, "float32": 1e-5},
                    description="JAX reverse mode on the traced loss: exact up to the rounding of each operation"),
    ReferenceMethod(name="complex", evaluations_per_entry=1, accuracy={"float64": 1e-11},
                    description="the complex step Im f(x + ih) / h: no cancellation, for complex-analytic losses"),
    ReferenceMethod(name="richardson", evaluations_per_entry=4, accuracy={"float64": 1e-9, "float32": 1e-3},
                    description="Richardson extrapolation of central differences at h and h/2: fourth order"),
    ReferenceMethod(name="central", evaluations_per_entry=2, accuracy={"float64": 1e-6, "float32": 1e-2},
                    description="central differences (f(x + h) - f(x - h)) / 2h: second order, any loss"),
)
"""Most accurate first: the order references are preferred in."""

METHODS = tuple(m.name for m in REGISTRY)
_BY_NAME = {m.name: m for m in REGISTRY}


def _method(name: str) -> ReferenceMethod:
    if name not in _BY_NAME:
        raise input_error("method", f"one name among {list(METHODS)}", repr(name), "Pass e.g. method='central'.")
    return _BY_NAME[name]


def accuracy(method: str, loss_eps: float = EPS64) -> float:
    """The stated relative accuracy of ``method`` for a loss computing with machine epsilon ``loss_eps``.

    Example:
        >>> accuracy("central"), accuracy("central", 1.2e-7), accuracy("autodiff")
        (1e-06, 0.01, 1e-12)
    """
    table = _method(method).accuracy
    return table["float64"] if loss_eps <= EPS64 or "float32" not in table else table["float32"]


def evaluations_per_entry(method: str) -> int:
    """Loss evaluations ``method`` spends per parameter entry.

    Example:
        >>> [evaluations_per_entry(m) for m in METHODS]
        [0, 1, 4, 2]
    """
    return _method(method).evaluations_per_entry
