"""The library's two exceptions and the small ``check_*`` helpers that raise them.

Every message about unusable input follows one pattern, so a user can act on it
without reading our source: *where* (the tensor path or argument), *expected*,
*got*, and *fix*. The helpers below build that message; the entry points
(:func:`gradcheck.examine` and friends) re-raise with the user's context.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = [
    "InputError",
    "BackpropMismatch",
    "input_error",
    "check_shape",
    "check_float_dtype",
    "describe",
]


class InputError(ValueError):
    """The input cannot be checked: the message says where, what was expected, what came, and the fix."""


class BackpropMismatch(AssertionError):
    """Raised by :func:`gradcheck.assert_backprop` when the claimed gradients are wrong.

    The message is the full text report; the :class:`gradcheck.Report` itself is
    kept on the ``report`` attribute for programmatic use.
    """

    def __init__(self, report: Any):
        super().__init__(str(report))
        self.report = report


def describe(value: Any) -> str:
    """A short human description of a value: type, dtype and shape for arrays."""
    if isinstance(value, np.ndarray) or hasattr(value, "shape") and hasattr(value, "dtype"):
        return f"{type(value).__name__} of dtype {value.dtype} and shape {tuple(value.shape)}"
    text = repr(value)
    if len(text) > 60:
        text = text[:57] + "..."
    return f"{type(value).__name__} {text}"


def input_error(where: str, expected: str, got: str, fix: str) -> InputError:
    """Build an :class:`InputError` whose message reads ``where: expected X, got Y. Fix.``.

    Example:
        >>> print(input_error("hidden.W", "a float array", "int64", "Cast it with .astype(float)."))
        hidden.W: expected a float array, got int64. Cast it with .astype(float).
    """
    return InputError(f"{where}: expected {expected}, got {got}. {fix}")


def check_shape(where: str, claimed: np.ndarray, expected_shape: tuple[int, ...]) -> None:
    """Raise when a claimed array's shape differs from its parameter's.

    The message names both shapes and, because it is the most common slip in a
    hand-written backward pass, says so when the claimed one is the transpose, or
    when it still carries a batch axis that should have been summed over.
    """
    got = tuple(np.shape(claimed))
    if got == tuple(expected_shape):
        return
    fix = "Return an array with exactly the parameter's shape."
    if len(got) == 2 and got[::-1] == tuple(expected_shape):
        fix = (
            "The claimed array is the transpose of the parameter; check the order of the"
            " operands of the product that computes it (for example x.T @ delta versus delta.T @ x)."
        )
    elif len(got) == len(expected_shape) + 1 and got[1:] == tuple(expected_shape):
        fix = (
            f"It still carries a leading batch axis of length {got[0]}: sum (or average, to match the"
            " loss) over axis 0."
        )
    elif len(got) == len(expected_shape) + 1 and got[:-1] == tuple(expected_shape):
        fix = (
            f"It still carries a trailing batch axis of length {got[-1]}: sum (or average, to match the"
            f" loss) over axis {len(got) - 1}."
        )
    raise input_error(where, f"shape {tuple(expected_shape)}", f"shape {got}", fix)


def check_float_dtype(where: str, value: Any) -> None:
    """Raise unless ``value`` holds real floating-point numbers."""
    dtype = np.asarray(value).dtype
    if dtype.kind == "f":
        return
    if dtype.kind in "iub":
        fix = "Parameters must be float arrays: cast with .astype(np.float64)."
    elif dtype.kind == "c":
        fix = "Parameters must be real; pass the real part and keep complex numbers inside the loss."
    else:
        fix = "Parameters must be numpy float arrays or Python floats."
    raise input_error(where, "a float32 or float64 parameter", f"dtype {dtype}", fix)
