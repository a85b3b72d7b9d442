"""The plan stage: validate the inputs, copy them, and learn what the loss is like.

Everything later stages need about the user's input is gathered here once and
handed on read-only in a :class:`Plan`: the named tensors, private float64
copies of params and data, the loss value at the base point, whether the loss is
deterministic and whether it really computes in float64, and the claimed
gradients as float64 arrays. Nothing here ever writes to the caller's arrays.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Sequence

import numpy as np

from .._core.errors import InputError, describe, input_error
from .._core.evaluator import Evaluator
from .._core.precision import EPS32, EPS64
from .._core.tree import LayerSpec, Structure, _rebuild, _walk, flatten, flatten_like

__all__ = ["Plan", "make_plan", "copy_data", "claimed_from"]


@dataclass(frozen=True, eq=False)
class Plan:
    """Read-only facts about one check.

    Attributes:
        loss: the user's loss.
        structure: the named tensors.
        originals: the caller's own leaves (never written to).
        base: float64 copies of the leaves (the point the check is made at).
        data: private copies of the data, float arrays promoted to float64.
        f0: the loss at ``base``.
        deterministic: whether two evaluations at ``base`` gave the same value.
        loss_eps: the machine epsilon the loss really computes with (float64, or
            float32 when it casts internally).
        evaluations: loss evaluations spent by the plan itself.
        kwargs: extra keyword arguments for every loss call (e.g. ``probe``).
        user_data: the caller's data as given (never written to; copied before each use).
    """

    loss: Callable
    structure: Structure
    originals: tuple[Any, ...]
    base: tuple[np.ndarray, ...]
    data: tuple
    f0: float
    deterministic: bool
    second_value: float
    loss_eps: float
    evaluations: int
    kwargs: dict
    user_data: tuple = ()

    def evaluator(self, dtype: Any = np.float64) -> Evaluator:
        """A fresh evaluator on new private copies of the base point."""
        return Evaluator(self.loss, self.structure, self.base, self.data, self.kwargs, dtype=dtype)


def copy_data(data: Sequence[Any], promote: bool = True) -> tuple:
    """Private copies of the data: float arrays as float64 (when ``promote``), other arrays copied as they are.

    Integer data (labels, indices) keep their dtype; objects that are not arrays
    are passed through untouched.
    """
    def copy_leaf(leaf: Any) -> Any:
        if isinstance(leaf, float):
            return leaf
        if isinstance(leaf, (np.ndarray, np.generic)) or (hasattr(leaf, "__array__") and hasattr(leaf, "dtype")):
            arr = np.asarray(leaf)
            if promote and arr.dtype.kind == "f":
                return np.array(arr, dtype=np.float64)
            return np.array(arr, copy=True)
        return leaf

    out = []
    for item in data:
        found: list = []
        recipe = _walk(item, (), found)
        out.append(_rebuild(recipe, [copy_leaf(v) for _, v in found]))
    return tuple(out)


def _float_leaves(data: tuple) -> list[np.ndarray]:
    found: list = []
    for item in data:
        _walk(item, (), found)
    return [v for _, v in found if isinstance(v, np.ndarray)]


def _ignores_float64(ev: Evaluator, f0: float, seed: int) -> bool:
    """Whether the loss cannot see a change of one part in 1e9 of every parameter, and rounds to float32.

    A float64 loss changes by about 1e-9 of its gradient-weighted parameter size,
    far above its rounding; a loss that casts to float32 inside (resolution 6e-8)
    returns exactly the same value. One evaluation.
    """
    rng = np.random.default_rng(seed)
    for k, b in enumerate(ev.base):
        ev.work[k][...] = b * (1.0 + 1e-9 * rng.choice([-1.0, 1.0], size=b.shape))
    try:
        moved = ev()
    finally:
        ev.reset()
    # A float32 loss also returns values that float32 represents exactly; a float64 loss
    # that is merely flat here (saturated units) almost never does (odds about 2**-29),
    # except at exactly 0.0, which both represent (a loss that rounds to zero is flat in
    # either precision, so it tells nothing about the precision).
    with np.errstate(over="ignore"):
        representable = abs(f0) <= float(np.finfo(np.float32).max) and float(np.float32(f0)) == f0
    return moved == f0 and f0 != 0 and representable and any(np.any(b != 0) for b in ev.base)


def make_plan(loss: Callable, params: Any, data: Sequence[Any], layers: LayerSpec = None,
              kwargs: dict | None = None, seed: int = 0) -> Plan:
    """Validate and copy the inputs, evaluate the loss at the base point, and learn its precision."""
    if not callable(loss):
        raise input_error("loss", "a callable loss(params, *data)", describe(loss), "Pass the function itself.")
    structure, originals = flatten(params, layers)
    base = structure.working_copies(originals)
    data64 = copy_data(data)
    ev = Evaluator(loss, structure, base, data64, kwargs)
    data_before = [d.copy() for d in _float_leaves(data64)]
    try:
        f0 = ev()
    except InputError as exc:
        raise InputError(f"loss at the given params: {exc}") from None
    for t, w, b in zip(structure.tensors, ev.work, ev.base):
        if not np.array_equal(w, b, equal_nan=True):
            raise input_error(f"params {t.path}", "a loss that leaves its params unchanged",
                              "a loss that modified them in place",
                              "Compute on copies inside the loss (e.g. W = W - lr * g, not W -= ...).")
    if any(not np.array_equal(a, b, equal_nan=True) for a, b in zip(_float_leaves(data64), data_before)):
        raise input_error("data", "a loss that leaves its data unchanged", "a loss that modified them in place",
                          "Copy the data inside the loss before changing it.")
    if not np.isfinite(f0):
        raise input_error("loss", "a finite loss value at the given params", repr(f0),
                          "Check the forward pass for overflow, log(0) or 0/0 at these params and data.")
    second = ev()
    deterministic = second == f0
    loss_eps = EPS64
    if deterministic and _ignores_float64(ev, f0, seed):
        loss_eps = EPS32
    return Plan(loss, structure, tuple(originals), tuple(ev.base), data64, f0, deterministic, second,
                loss_eps, ev.count, dict(kwargs or {}), tuple(data))


def claimed_from(plan: Plan, grads: Any, what: str = "grads") -> tuple[list[np.ndarray], list[np.dtype]]:
    """The claimed gradients as float64 arrays (plus their dtypes), from a pytree or a callable.

    A callable is called on fresh copies of the params (in the caller's dtypes) and
    of the data, so it cannot disturb the check or the caller. Returns the arrays and their dtypes.
    """
    if grads is None:
        raise input_error(what, "the claimed gradients (a pytree like params, or a callable)", "None",
                          "Pass grads=my_backward(params, *data) or grads=my_backward.")
    raw = grads
    if callable(grads):
        params_copy = plan.structure.rebuild([np.array(o, copy=True) if not isinstance(o, float) else o
                                              for o in plan.originals])
        try:
            raw = grads(params_copy, *copy_data(plan.user_data, promote=False))
        except Exception as exc:
            raise input_error(what, f"a callable {what}(params, *data) that returns the claimed values",
                              f"{type(exc).__name__}: {exc}",
                              "Fix the error shown above in the backward pass.") from exc
    arrays = flatten_like(plan.structure, raw, what)
    # The precision the user's backward really had is the lowest among the claimed
    # array, its parameter and the float data: a float32 product upcast by a float64
    # mask still carries float32 rounding, and its tolerance must say so.
    data_sizes = [a.dtype.itemsize for a in _float_leaves(copy_data(plan.user_data, promote=False))
                  if a.dtype.kind == "f"]
    dtypes = []
    for a, t in zip(arrays, plan.structure.tensors):
        size = min([a.dtype.itemsize if a.dtype.kind == "f" else 8, t.dtype.itemsize] + data_sizes)
        dtypes.append(np.dtype(np.float32) if size <= 4 else np.dtype(np.float64))
    for t, a in zip(plan.structure.tensors, arrays):
        if a.dtype.kind not in "fiu" or a.dtype == bool:
            raise input_error(f"{what} {t.path}", "real numbers", f"dtype {a.dtype}",
                              "Return float arrays of the parameter's shape.")
    return [np.array(a, dtype=np.float64) for a in arrays], dtypes
