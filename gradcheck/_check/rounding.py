"""The rounding of a correct backward pass at this point, measured by running it again.

A float32 backward carries rounding that its formulas cannot avoid, and at some
points it is far larger than float32's resolution of 6e-8:

* a logistic or tanh unit in saturation has the derivative ``a * (1 - a)`` or
  ``1 - a**2`` computed from an ``a`` that float32 has rounded at 6e-8 from 1, so
  a derivative of 3e-7 comes out 20% wrong;
* a softmax that is 0.9998 sure gives an output error ``s - y`` of -2e-4 whose
  rounding (6e-8 of ``s``) is 3e-4 of its value, and every gradient below it
  inherits that;
* sums over the batch or over units that cancel keep their terms' absolute
  rounding while their value shrinks.

No fixed relative tolerance covers this without also letting real mistakes
through. But when the backward is given as a callable it can simply be run again
on float64 copies of the params and data. If that float64 run agrees with the
reference, the difference between the float32 claim and the float64 run is
exactly the rounding of the user's own code, and

    |claim32 - ref| <= |claim32 - claim64| + |claim64 - ref|

explains any disagreement within that measured amount. An entry is held to this
*rounding allowance* (on top of the ordinary tolerance) only where the float64
run itself holds at the float64 tolerance, so a mistake in the formulas, which
shows at both precisions, is never excused. A backward that casts to float32
inside returns float32 for float64 input and gives no measurement.

A float64 backward has no higher precision to run in. Its rounding is provoked
instead: run with params and data nudged by one unit in their last place, it
moves by about eps times its values where it is well conditioned, and by eps
times the cancelling terms where it cancels (``s - y`` with ``s`` rounded to
exactly 1). That movement bounds what its claims resolve; failing float64
entries are held to a few times it (:func:`_float64_allowance`).

Array claims cannot be re-run; for those, a failing float32 tensor whose error
is small enough to be rounding gets a hint to pass the backward itself.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np

from .._core.precision import EPS64
from .._core.tree import _rebuild, _walk, flatten_like
from .compare import Judgement, judge
from .inputs import Plan, copy_data

__all__ = ["Allowance", "ROUNDING_REACH", "measure_rounding", "rounding_notes"]

NUDGED_RUNS = 3
"""Runs of a float64 backward at inputs nudged by one rounding unit (random signs each time)."""

NUDGE_SAFETY = 4.0
"""The allowance is this many times the largest movement seen: three samples of a rounding pattern can all
fall short of its extreme."""

ROUNDING_REACH = 0.05
"""The largest relative error the hint calls possibly rounding (a float32 backward through saturated units
measured up to 3e-3 in our runs; planted mistakes change a gradient by far more than 5%)."""


@dataclass(frozen=True, eq=False)
class Allowance:
    """What running the backward again showed.

    Attributes:
        per_tensor: the absolute rounding allowance per entry (zeros where none applies), or None when
            nothing was measured.
        unmeasured: why a failing tensor's rounding was not measured (the backward raised, or casts to
            float32 inside), or "".
    """

    per_tensor: tuple[np.ndarray, ...] | None
    unmeasured: str = ""


def _float64_copy(leaf: Any) -> Any:
    if isinstance(leaf, float):
        return leaf
    arr = np.asarray(leaf)
    return np.array(arr, dtype=np.float64) if arr.dtype.kind == "f" else np.array(arr, copy=True)


def _call(plan: Plan, grads: Any, params: Any, data: Sequence[Any], what: str) -> list[np.ndarray] | str:
    """The callable's result, flattened like params, or why there is none.

    Its first call worked; one that fails here only closes this measurement. Warnings and floating-point
    errors of the extra run are the user's code meeting other input, not news for the report.
    """
    try:
        with warnings.catch_warnings(), np.errstate(all="ignore"):
            warnings.simplefilter("ignore")
            raw = grads(params, *data)
        return flatten_like(plan.structure, raw, "grads")
    except Exception as exc:
        return f"the backward raised {type(exc).__name__} on {what}"


def _run_in_float64(plan: Plan, grads: Any) -> list[np.ndarray] | str:
    """The callable's result on float64 copies of the params and the float data, or why there is none."""
    params = plan.structure.rebuild([_float64_copy(o) for o in plan.originals])
    arrays = _call(plan, grads, params, copy_data(plan.user_data, promote=True), "float64 input")
    if isinstance(arrays, str):
        return arrays
    if any(a.dtype.kind != "f" or a.dtype.itemsize < 8 for a in arrays):
        return "the backward returns float32 for float64 input (it casts inside)"
    return [np.asarray(a, dtype=np.float64) for a in arrays]


def _failing_float32(judgement: Judgement, dtypes: Sequence[np.dtype]) -> list[int]:
    return [k for k, (t, d) in enumerate(zip(judgement.tensors, dtypes)) if not t.ok and d.itemsize <= 4]


def _nudged(leaf: Any, rng: np.random.Generator) -> Any:
    """The leaf moved by one unit of its own precision's rounding, up or down at random, entry by entry."""
    if isinstance(leaf, float):
        return leaf * (1.0 + EPS64 * rng.choice([-1.0, 1.0]))
    arr = np.asarray(leaf)
    if arr.dtype.kind != "f":
        return np.array(arr, copy=True)
    eps = np.finfo(arr.dtype).eps
    return (arr * (1 + eps * rng.choice([-1.0, 1.0], size=arr.shape))).astype(arr.dtype)


def _nudge_tree(item: Any, rng: np.random.Generator) -> Any:
    found: list = []
    recipe = _walk(item, (), found)
    return _rebuild(recipe, [_nudged(v, rng) if isinstance(v, (float, np.ndarray)) else v for _, v in found])


def _run_nudged(plan: Plan, grads: Any, rng: np.random.Generator) -> list[np.ndarray] | str:
    """The callable's result at params and float data nudged by one rounding unit, or why there is none."""
    params = plan.structure.rebuild([_nudged(o, rng) for o in plan.originals])
    data = [_nudge_tree(d, rng) for d in copy_data(plan.user_data, promote=False)]
    arrays = _call(plan, grads, params, data, "inputs moved by one rounding unit")
    return arrays if isinstance(arrays, str) else [np.asarray(a, dtype=np.float64) for a in arrays]


def _float64_allowance(plan: Plan, grads: Any, claimed: Sequence[np.ndarray], failing: list[int],
                       seed: int) -> list[np.ndarray] | str:
    """How far a callable float64 backward moves when its inputs move by one rounding unit.

    A float64 backward has no higher precision to be run in, but its rounding can be provoked: with
    params and float data nudged by one unit in their last place (random signs), a well-conditioned
    backward moves by about eps times its values, while one that cancels (``s - y`` with ``s`` rounded
    to exactly 1 at a logit of 44, where the true value is 1e-19) moves by eps times the cancelling
    terms. That movement is the resolution of its claims here. The largest over ``NUDGED_RUNS`` runs,
    times ``NUDGE_SAFETY``, is the allowance of the failing float64 tensors.
    """
    rng = np.random.default_rng(seed + 11)
    spread = [np.zeros_like(c) for c in claimed]
    for _ in range(NUDGED_RUNS):
        run = _run_nudged(plan, grads, rng)
        if isinstance(run, str):
            return run
        for k in failing:
            with np.errstate(invalid="ignore"):
                moved = np.abs(run[k] - claimed[k])
            # a non-finite claim or run measures no rounding (it is reported as non-finite instead)
            spread[k] = np.maximum(spread[k], np.where(np.isfinite(moved), moved, 0.0))
    return [NUDGE_SAFETY * s if k in failing else np.zeros_like(s) for k, s in enumerate(spread)]


def measure_rounding(plan: Plan, grads: Any, claimed: Sequence[np.ndarray], dtypes: Sequence[np.dtype],
                     judgement: Judgement, estimates: list, unavailable: dict[str, str],
                     tolerance: float | None, seed: int = 0) -> Allowance:
    """Measure the rounding of a callable backward's failing claims.

    float32 tensors: the backward is run in float64; the allowance is ``|claim32 - claim64| +
    |claim64 - ref|`` where the float64 run holds at the float64 tolerance, 0 elsewhere. float64
    tensors: how far the backward moves under a nudge of its inputs by one rounding unit
    (:func:`_float64_allowance`).
    """
    failing = [k for k, t in enumerate(judgement.tensors) if not t.ok]
    if not failing or not callable(grads):
        return Allowance(None)
    low = _failing_float32(judgement, dtypes)
    high = [k for k in failing if k not in low]
    allowances = [np.zeros(t.shape) for t in judgement.tensors]
    unmeasured = ""
    if high:
        nudged = _float64_allowance(plan, grads, claimed, high, seed)
        if isinstance(nudged, str):
            unmeasured = nudged
        else:
            allowances = nudged
    if low:
        wide = _run_in_float64(plan, grads)
        if isinstance(wide, str):
            return Allowance(tuple(allowances) if high and not unmeasured else None, wide)
        wide_judgement = judge(plan.structure, wide, [np.dtype(np.float64)] * len(wide), estimates, unavailable,
                               tolerance)
        for k in low:
            t, err, ref = wide_judgement.tensors[k], wide_judgement.errors[k], judgement.primary.values[k]
            holds = np.nan_to_num(err, nan=np.inf) <= t.tolerance
            measured = np.abs(claimed[k] - wide[k]) + np.abs(wide[k] - np.nan_to_num(ref))
            allowances[k] = np.where(holds, measured, 0.0)
    return Allowance(tuple(allowances), unmeasured)


def rounding_notes(before: Judgement, after: Judgement, dtypes: Sequence[np.dtype], grads: Any,
                   allowance: Allowance) -> list[str]:
    """Sentences for the report: which float32 tensors the measured rounding explained, and hints.

    ``before`` is the judgement without the allowance, ``after`` the final one.
    """
    notes = []
    low = _failing_float32(before, dtypes)
    excused = [k for k in low if after.tensors[k].ok]
    high = [k for k, t in enumerate(before.tensors) if not t.ok and k not in low and after.tensors[k].ok]
    if high and allowance.per_tensor is not None:
        moved = max(float(np.max(allowance.per_tensor[k], initial=0.0)) for k in high) / NUDGE_SAFETY
        notes.append(f"float64 rounding measured: your backward's results move by up to {moved:.2g} when its "
                     "params and data move by one unit in their last place (it cancels large terms here, such "
                     f"as s - y with s rounded to 1), more than {', '.join(before.tensors[k].path for k in high)} "
                     "differ from the reference, so those were not really checked: check at a less saturated "
                     "point.")
    if excused:
        worst = max(excused, key=lambda k: before.tensors[k].error)
        t = before.tensors[worst]
        notes.append(f"float32 rounding measured: gradcheck ran your backward again in float64, where it agrees "
                     f"with the reference; in float32 it is off by up to {t.error:.2g} (relative, {t.path} "
                     f"{t.worst_index}), beyond the float32 tolerance, by its own rounding (saturated units, a "
                     f"confident softmax or cancelling sums do that), not by a wrong formula. "
                     f"{', '.join(before.tensors[k].path for k in excused)} passed within that measured rounding.")
    close = [t.path for k, t in enumerate(after.tensors)
             if k in _failing_float32(after, dtypes) and np.isfinite(t.error) and t.error <= ROUNDING_REACH]
    if close and not callable(grads):
        notes.append(f"{', '.join(close)}: float32 errors this small (at most {ROUNDING_REACH:g}) can be the "
                     "rounding of a correct float32 backward (saturated units, a confident softmax); pass the "
                     "backward itself (grads=backward) so gradcheck can run it in float64 and measure that "
                     "rounding, or check in float64.")
    elif close and allowance.unmeasured:
        notes.append(f"{', '.join(close)}: float32 errors this small can be rounding, but it could not be "
                     f"measured: {allowance.unmeasured}; check in float64.")
    return notes
