"""Confirmation of failing entries: a second reference, and kinks.

When only one reference was computed, an entry that fails against it is
re-checked by an independent method before the user is blamed (the complex
step where the loss is complex-analytic, Richardson extrapolation otherwise);
and a failing entry that sits on a kink (where any slope between the one-sided
ones is a valid answer) is set aside as unreliable.
"""

from __future__ import annotations

import dataclasses
import math
import warnings
from typing import Any

import numpy as np

from .._core.precision import EPS64, rounding_scale
from .._references.finite_difference import (
    COMPLEX_STEP,
    Estimate,
    central_along,
    complex_step,
    complex_usable,
    richardson,
)
from .._references.kinks import kink_explains
from .compare import Judgement
from .inputs import Plan

__all__ = ["CONFIRM_PER_TENSOR", "NOISE_POINTS", "confirm_failing", "find_kinks", "measure_noise", "widen_for_noise"]

NOISE_POINTS = 8
"""Loss evaluations per table when measuring the loss's own rounding noise (four tables at most)."""

NOISE_CONSISTENCY = 4.0
"""How much larger the noise may look ten times further apart and still count as noise (estimates from so
few differences vary by about a factor of 2)."""

CONFIRM_PER_TENSOR = 32
"""Failing entries per tensor re-checked with a second method when only one reference was computed."""


def _complex_is_analytic(plan: Plan, cev: Any, seed: int) -> tuple[bool, int]:
    """Cross-check the complex step with central differences along one random direction per tensor.

    A loss can accept complex input yet not be complex-analytic (abs, real casts,
    comparisons on the imaginary part); then its complex step is quietly wrong.
    Im f(x + i h v) / h is the directional derivative along v for an analytic
    loss, so one complex and two real evaluations per tensor expose that.
    Returns the verdict and the evaluations spent.
    """
    ev = plan.evaluator()
    rng = np.random.default_rng(seed)
    spent = 0
    for k, b in enumerate(plan.base):
        v = rng.standard_normal(b.shape)
        v /= max(float(np.linalg.norm(v)), 1e-300)
        h = EPS64 ** (1 / 3) * max(float(np.max(np.abs(b), initial=0.0)), 1.0)
        num = central_along(ev, k, v, h)
        cev.work[k][...] = cev.base[k] + 1j * COMPLEX_STEP * v.reshape(b.shape)
        try:
            exact = complex(cev()).imag / COMPLEX_STEP
        finally:
            cev.reset(k)
        spent += 2  # the two real evaluations; the complex one is counted by cev itself
        if abs(num - exact) > 1e-5 * max(abs(num), abs(exact)) + 1e4 * EPS64 * rounding_scale(plan.f0) / h:
            return False, spent
    return True, spent


def confirm_failing(plan: Plan, judgement: Judgement, estimates: list[Estimate], seed: int
             ) -> tuple[list[Estimate], int, dict[str, str]]:
    """With a single reference, re-check its failing entries with an independent method.

    The complex step is used when the loss accepts complex parameters, returns
    the real loss as the real part, and agrees with central differences along a
    random direction per tensor (a loss with abs() or real casts inside accepts
    complex numbers yet is not complex-analytic, and its complex step is quietly
    wrong); otherwise Richardson extrapolation, whose different steps straddle a
    kink differently. A failing entry where the two references disagree is a
    kink or noise, not the user's mistake: it shows up as unreliable when the
    judgement is made again. Returns the estimates, evaluations spent, and why
    the complex step was not used.
    """
    wanted = []
    for t, err in zip(judgement.tensors, judgement.errors):
        flat = np.nan_to_num(err.reshape(-1), nan=-1.0)
        failing = np.flatnonzero(flat > t.tolerance)
        wanted.append(failing[np.argsort(-flat[failing])][:CONFIRM_PER_TENSOR])
    if not any(len(w) for w in wanted):
        return estimates, 0, {}
    spent, unavailable = 0, {}
    if plan.loss_eps <= EPS64:
        with warnings.catch_warnings():
            # a forward that stores complex values into real arrays would silently drop the
            # imaginary step; turned into an error, it makes the complex step unusable instead
            warnings.simplefilter("error", np.exceptions.ComplexWarning)
            found = _complex_confirmation(plan, estimates, wanted, seed)
        if found[0] is not None:
            return estimates + [found[0]], found[1], {}
        spent, unavailable = found[1], {"complex": found[2]}
    ev = plan.evaluator()
    second = richardson(ev, plan.f0, wanted, eps=plan.loss_eps)
    return estimates + [second], spent + ev.count, unavailable


def _complex_confirmation(plan: Plan, estimates: list[Estimate], wanted: list[np.ndarray], seed: int
                          ) -> tuple[Estimate | None, int, str]:
    """The complex step at the wanted entries, or None with the evaluations spent and the reason."""
    cev = plan.evaluator(np.complex128)
    reason = complex_usable(cev, plan.f0)
    if reason is not None:
        return None, cev.count, reason
    try:
        analytic, cost = _complex_is_analytic(plan, cev, seed)
        if not analytic:
            return None, cev.count + cost, ("the loss accepts complex numbers but is not complex-analytic "
                                            "(abs, comparisons or casts)")
        return complex_step(cev, plan.f0, wanted), cev.count + cost, ""
    except Exception as exc:  # the loss failed on complex input it had accepted once
        return None, cev.count, f"the complex step raised {type(exc).__name__}"


def find_kinks(plan: Plan, judgement: Judgement, claimed: list[np.ndarray]) -> tuple[list[np.ndarray], int]:
    """Find failing entries that sit on a kink, where any slope between the one-sided ones is right.

    At a kink (ReLU at 0, max with a tie) autodiff and central differences may
    agree on one number (JAX splits a tie evenly; so does the central average)
    while the user's code takes one side: a valid subgradient, not a mistake.
    The second difference (f(x+h) - 2 f(x) + f(x-h)) / h is h f'' on a smooth
    loss but the jump in slope at a kink, independent of h; computing it at h and
    h/2 tells the two apart. An entry is a kink when the second difference does
    not halve with the step and the claimed value lies between the one-sided
    slopes. Four evaluations per failing entry (at most CONFIRM_PER_TENSOR each).
    """
    ev = plan.evaluator()
    masks = []
    for k, (t, err) in enumerate(zip(judgement.tensors, judgement.errors)):
        mask = np.zeros(t.shape, dtype=bool)
        flat_err = np.nan_to_num(err.reshape(-1), nan=-1.0)
        failing = np.flatnonzero(flat_err > t.tolerance)[:CONFIRM_PER_TENSOR]
        work, base = ev.work[k].reshape(-1), ev.base[k].reshape(-1)
        ref, claim, flat_mask = judgement.primary.values[k].reshape(-1), claimed[k].reshape(-1), mask.reshape(-1)
        for i in failing:
            h = plan.loss_eps ** (1 / 3) * max(abs(base[i]), 1.0)
            ups, downs = [], []
            for step in (h, h / 2):
                work[i] = base[i] + step
                ups.append(ev())
                work[i] = base[i] - step
                downs.append(ev())
                work[i] = base[i]
            flat_mask[i] = kink_explains(plan.f0, ups, downs, (h, h / 2), abs(claim[i] - ref[i]), plan.loss_eps,
                                         "steady")
        masks.append(mask)
    return masks, ev.count


def _noise_along(ev, plan: Plan, directions: list[np.ndarray], spacing: float) -> np.ndarray:
    half = NOISE_POINTS // 2
    values = []
    for i in range(-half, half + 1):
        if i == 0:
            values.append(plan.f0)
            continue
        for k, (b, d) in enumerate(zip(plan.base, directions)):
            ev.work[k][...] = b + i * spacing * d
        try:
            values.append(ev())
        finally:
            ev.reset()
    return np.asarray(values, dtype=np.float64)


def measure_noise(plan: Plan, seed: int) -> tuple[float, int]:
    """The loss's rounding noise, measured from high-order differences along a random direction.

    The accuracy of a finite difference is set by the loss's rounding, assumed to be a few units of
    its last place (``eps * |f0|``). That fails where the loss is small because large values cancelled
    inside it: ``log(1 + e^-31)`` is 3e-14 but moves in steps of 2e-16, the last place of 1. The noise
    is measured instead as in Moré & Wild (2011, "Estimating computational noise", SIAM J. Sci.
    Comput. 33(3)): evaluate the loss at ``NOISE_POINTS`` points around the base point along a random
    direction; the k-th differences of a smooth function are O(spacing^k), so what remains in them is
    noise, and ``sigma_k = sqrt(gamma_k * mean((Delta^k f)^2))`` with ``gamma_k = (k!)^2 / (2k)!``
    estimates its standard deviation; the largest of sigma_4 .. sigma_6 is returned. Rounding is a
    staircase: points spaced as a central difference steps (eps^(1/3) of the parameters' size) can all
    land on one stair, so while fewer than three distinct values come back the spacing grows a
    hundredfold, twice at most. Noise changes the sign of the 4th differences and a smooth function
    does not, so a table without both signs is taken as smooth: no noise measured (0.0). And noise
    stays the same when the points are ten times further apart, while a kink within reach (ReLU) or
    the smooth part grows: unless the wider table agrees within ``NOISE_CONSISTENCY``, 0.0 again.
    Returns the noise and the evaluations spent (16 to 32).
    """
    ev = plan.evaluator()
    rng = np.random.default_rng(seed + 7)
    directions = [rng.standard_normal(b.shape) for b in plan.base]
    norm = math.sqrt(sum(float(np.sum(d ** 2)) for d in directions)) or 1.0
    size = max((float(np.max(np.abs(b), initial=0.0)) for b in plan.base), default=0.0)
    spacing = plan.loss_eps ** (1 / 3) * max(size, 1e-300) / norm
    for _ in range(3):
        table = _noise_along(ev, plan, directions, spacing)
        if len(np.unique(table)) >= 3:
            break
        spacing *= 100.0
    else:
        return 0.0, ev.count
    sigma = _sigma(table)
    # Rounding noise does not depend on the spacing; a kink inside the span, or the smooth part showing
    # through, grows with it. Ten times wider must give about the same sigma, or nothing is measured.
    wider = _sigma(_noise_along(ev, plan, directions, 10.0 * spacing))
    return (sigma if 0.0 < wider <= NOISE_CONSISTENCY * sigma else 0.0), ev.count


def _sigma(values: np.ndarray) -> float:
    """Moré & Wild's noise estimate from a table of values: the largest of sigma_4 .. sigma_6, or 0.0
    when the 4th differences do not change sign (a smooth function, no noise)."""
    sigmas, signs, table = [], set(), values
    for k in range(1, 7):
        table = np.diff(table)
        if k == 4:
            signs = set(np.sign(table[table != 0]))
        if k >= 4:
            gamma = math.factorial(k) ** 2 / math.factorial(2 * k)
            sigmas.append(math.sqrt(gamma * float(np.mean(table ** 2))))
    return max(sigmas) if len(signs) == 2 else 0.0


def widen_for_noise(estimates: list[Estimate], plan: Plan, noise: float) -> list[Estimate]:
    """Numerical estimates with their absolute accuracy scaled up to a measured noise above the assumed one.

    Every numerical accuracy is ``ROUNDOFF_SAFETY * eps * rounding_scale(f0) / h`` times a constant of
    its method; a measured noise ``sigma`` replaces ``eps * rounding_scale(f0)`` where it is larger.
    Autodiff differentiates the formula, not its rounded values, and keeps its accuracy.
    """
    factor = noise / (plan.loss_eps * rounding_scale(plan.f0))
    if not factor > 1.0:
        return estimates
    return [e if e.method == "autodiff" else dataclasses.replace(e, atol=tuple(a * factor for a in e.atol))
            for e in estimates]
