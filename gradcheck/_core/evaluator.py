"""The one caller of the user's loss: private working copies, a call counter, and the scalar it returns.

Every reference perturbs copies, never the caller's arrays, and restores the saved value exactly (never
``x + h - h``, which rounds), so no scheme leaves a drift that the next one would difference against. The
counter is what ``Report.evaluations`` reports, so every loss call of a serial scheme goes through here.
"""

from __future__ import annotations

from typing import Any, Callable, Sequence

import numpy as np

from .errors import describe, input_error
from .tree import Structure

__all__ = ["Evaluator", "to_scalar"]


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
