"""The compute stage: the reference gradients a loss allows, primary first.

Autodiff (when the loss is traceable) plus central differences by default; the
complex step and Richardson extrapolation on request. Where the numerical
evaluations run (this process, an executor, a vectorised JAX call) is decided in
``gradcheck._scale.runners``; this module decides which references to compute.
"""

from __future__ import annotations

import dataclasses
from typing import Any, Sequence

import numpy as np

from .._check.inputs import Plan
from .._core.errors import input_error
from .._core.precision import EPS64
from .autodiff import Traced, autodiff_estimate, trace
from .finite_difference import Estimate, complex_usable
from .registry import METHODS, accuracy

__all__ = ["METHODS", "check_methods", "compute_references"]

"""Every reference method, most accurate first (the first one computed is the primary)."""


def check_methods(methods: Sequence[str] | str | None) -> tuple[str, ...] | None:
    if methods is None:
        return None
    if isinstance(methods, str):
        methods = (methods,)
    unknown = [m for m in methods if m not in METHODS]
    if unknown or not methods:
        raise input_error("methods", f"names among {list(METHODS)}", repr(list(methods)),
                          "Pass e.g. methods=('autodiff', 'central').")
    return tuple(m for m in METHODS if m in methods)


def compute_references(plan: Plan, methods: tuple[str, ...] | None, seed: int = 0, executor: Any = None,
                       progress: bool | None = None) -> tuple[list[Estimate], dict[str, str], int, Traced | None]:
    """Compute the requested (or default) references; return them primary first.

    The default is autodiff when the loss allows it plus central differences.
    The complex step is exact too, but a complex evaluation of a numpy loss costs
    up to twenty real ones (complex transcendental functions), so by default it
    is spent only where it decides something: on the entries that fail against a
    lone central-difference reference (see :func:`_confirm`).
    """
    eps = plan.loss_eps
    estimates: list[Estimate] = []
    unavailable: dict[str, str] = {}
    evaluations = 0
    wanted = methods or ("autodiff", "central")
    traced: Traced | None = None
    if "autodiff" in wanted:
        got = trace(plan.loss, plan.structure, plan.base, plan.data, plan.kwargs)
        if isinstance(got, str):
            unavailable["autodiff"] = got
        else:
            est = autodiff_estimate(got, plan.base, plan.f0)
            evaluations += 1
            if isinstance(est, str):
                unavailable["autodiff"] = est
            else:
                traced = got
                if eps > EPS64:
                    est = dataclasses.replace(est, rtol=accuracy("autodiff", eps),
                                              atol=tuple(a * eps / EPS64 for a in est.atol))
                estimates.append(est)
    if "complex" in wanted:
        cev = plan.evaluator(np.complex128)
        reason = complex_usable(cev, plan.f0)
        if reason is None and eps > EPS64:
            reason = "the loss computes in float32 inside, below the complex step's accuracy"
        if reason is None:
            from .._scale.runners import (
                complex_reference,  # executor, or this process with a progress bar
            )

            est, spent = complex_reference(plan, executor, progress)
            estimates.append(est)
            evaluations += spent
        else:
            unavailable["complex"] = reason
        evaluations += cev.count
    from .._scale.runners import (
        entrywise_references,  # executor, vectorised JAX, or the Python loop
    )

    numeric, spent = entrywise_references(plan, [m for m in ("richardson", "central") if m in wanted], eps,
                                          executor=executor, traced=traced, progress=progress)
    estimates.extend(numeric)
    evaluations += spent
    if not estimates:
        raise input_error("methods", "at least one reference method this loss allows",
                          "; ".join(f"{m}: {why}" for m, why in unavailable.items()),
                          "Add 'central' to methods (it works for any loss).")
    return estimates, unavailable, evaluations, traced
