"""The entry points: ``examine``, ``assert_backprop`` and ``reference``.

Each call runs in stages that hand read-only results along:

1. plan (``_plan``): validate, copy, evaluate the loss once, learn its precision;
2. compute (``_references``, ``_confirm``): the references the loss allows (autodiff, complex step,
   central differences, Richardson);
3. compare (``_compare``): per-entry relative errors and reference agreement;
4. diagnose (``_diagnose`` and friends): which mistake, and where it starts;
5. report (``_report``).

An :class:`InputError` from any stage is re-raised here once, prefixed with the
entry point's name, so the user sees which call the message belongs to.
"""

from __future__ import annotations

import functools
from typing import Any, Callable, Sequence

import numpy as np

from .._check.compare import judge
from .._check.confirm import (
    CONFIRM_PER_TENSOR,
    NOISE_POINTS,
    confirm_failing,
    find_kinks,
    measure_noise,
    widen_for_noise,
)
from .._check.inputs import Plan, claimed_from, make_plan
from .._check.rounding import Allowance, measure_rounding, rounding_notes
from .._core.errors import BackpropMismatch, InputError, input_error
from .._core.precision import EPS64
from .._core.tree import LayerSpec
from .._diagnose.signatures import (
    Evidence,
    batch_sizes,
    merge_findings,
    mutant_findings,
    repeat_findings,
    tensor_findings,
)
from .._references.autodiff import Traced, trace
from .._references.choose import METHODS, check_methods, compute_references
from .._report.listeners import announce
from .._report.results import Finding, Report, TensorResult, build_layers

__all__ = ["examine", "assert_backprop", "reference", "METHODS"]

FULL_CHECK_LIMIT = 100_000
"""Networks up to this many parameters are checked entry by entry unless a budget is given."""

def _entry_point(name: str) -> Callable:
    def wrap(fn: Callable) -> Callable:
        @functools.wraps(fn)
        def inner(*args, **kwargs):
            __tracebackhide__ = True  # pytest shows the user's call, not gradcheck's frames
            try:
                return fn(*args, **kwargs)
            except InputError as exc:
                raise InputError(f"gradcheck.{name}: {exc}") from exc.__cause__
        return inner
    return wrap


def _layer_order(plan: Plan, traced: Traced | None) -> tuple[str, ...]:
    if traced is None:
        return plan.structure.layer_order
    seen: dict[str, None] = {}
    for i in traced.order:
        seen.setdefault(plan.structure.tensors[i].layer, None)
    return tuple(seen)


def _nondeterministic(plan: Plan, title: str) -> Report:
    from .._report.results import ReferenceSummary

    finding = Finding("nondeterministic-loss", None, "loss",
                      f"the loss gave {plan.f0!r} and then {plan.second_value!r} for the same params; fix the random "
                      "seed (or pass the dropout mask as data) so that every evaluation sees the same randomness")
    tensors = tuple(TensorResult(t.path, t.layer, t.shape, float("nan"), (), 0, float("nan"), float("nan"), False,
                                 float("nan"), 0, t.size) for t in plan.structure.tensors)
    return Report(False, tensors, build_layers(tensors, plan.structure.layer_order), (finding,), plan.evaluations,
                  ReferenceSummary("none", (), {}, {"all": "the loss is not deterministic"}), title=title)


def _tensor_findings(evidence: Evidence) -> list[tuple[Finding, float, int]]:
    """Tier-1 findings for every failing tensor, ``unexplained`` where no signature fits, and
    ``unreliable-reference`` where no entry of a tensor could be judged."""
    findings: list[tuple[Finding, float, int]] = []
    for k, t in enumerate(evidence.judgement.tensors):
        if t.checked and t.unreliable == t.checked:
            findings.append((Finding("unreliable-reference", t.layer, t.path,
                                     f"the references disagree with each other at every entry of {t.path} (a kink, "
                                     "a non-smooth or noisy loss), so its claimed values could not be judged; the "
                                     "user's value is not blamed: check it at another point", None), 1.0, 3))
        if t.ok:
            continue
        found = tensor_findings(evidence, k)
        if found:
            findings.extend((f, m, 2) for f, m in found[:3])
        else:
            findings.append((Finding("unexplained", t.layer, t.path,
                                     f"the claimed gradient differs from the reference by up to {t.error:.3g} "
                                     f"(relative) at entry {t.worst_index}, with no simple pattern; check this "
                                     "tensor's formula in the backward pass", None), t.error, 3))
    return findings


def _settle(plan: Plan, claimed: list[np.ndarray], dtypes: list[np.dtype], grads: Any, estimates: list,
            unavailable: dict[str, str], tolerance: float | None, seed: int, room: int | None):
    """Compare, then settle every failing entry before anyone is blamed.

    In order: the measured rounding of a callable backward (``_rounding``: a float32 one run again in
    float64, a float64 one at inputs nudged by one rounding unit; no loss evaluations), the
    measured rounding noise of the loss (``_confirm.measure_noise``: a loss that cancels large values
    rounds far above its last place, and its finite differences are only that accurate), a second
    reference for a lone one (``_confirm.confirm_failing``), and the kink test. ``room`` caps the loss
    evaluations the last three may spend (a budget); a stage that might exceed it is skipped.
    Returns the final judgement, the judgement without the rounding allowance, the allowance, the
    evaluations spent, and notes (a measured noise; stages the budget left out).
    """
    judgement = judge(plan.structure, claimed, dtypes, estimates, unavailable, tolerance)
    unallowed, rounding, spent = judgement, Allowance(None), 0

    def failing() -> int:  # entries the next stage looks at (at most CONFIRM_PER_TENSOR per tensor)
        return sum(min(int(np.sum(np.nan_to_num(e, nan=-1.0) > t.tolerance)), CONFIRM_PER_TENSOR)
                   for t, e in zip(judgement.tensors, judgement.errors))

    notes: list[str] = []
    skipped: list[str] = []  # said only when something is still reported wrong at the end

    def affordable(cost: int, stage: str) -> bool:
        if room is None or spent + cost <= room:
            return True
        skipped.append(f"the budget left {room - spent} loss evaluations after the entry-by-entry check, fewer "
                       f"than the {cost} that {stage} needs, so it was skipped; a larger budget (or none) may "
                       "clear entries reported wrong here.")
        return False

    if not all(t.ok for t in judgement.tensors):
        rounding = measure_rounding(plan, grads, claimed, dtypes, judgement, estimates, unavailable, tolerance,
                                    seed)
        if rounding.per_tensor is not None:
            judgement = judge(plan.structure, claimed, dtypes, estimates, unavailable, tolerance,
                              allowances=rounding.per_tensor)
    allowances = rounding.per_tensor
    if (not all(t.ok for t in judgement.tensors) and estimates[0].method != "autodiff"
            and affordable(4 * NOISE_POINTS, "measuring the loss's rounding noise")):
        noise, extra = measure_noise(plan, seed)
        spent += extra
        widened = widen_for_noise(estimates, plan, noise)
        if widened is not estimates:
            estimates = widened
            judgement = judge(plan.structure, claimed, dtypes, estimates, unavailable, tolerance,
                              allowances=allowances)
            resolution = max(float(np.max(a, initial=0.0)) for a in estimates[0].atol)
            notes.append(f"the loss's rounding noise is {noise:.2g} (measured), more than its value {plan.f0:.3g} "
                         "implies (large values cancel inside it), so finite differences resolve gradient entries "
                         f"only down to about {resolution:.1g} here: smaller ones were not really checked.")
    # the complex step: 1 trial, 3 per tensor for its analytic test, 1 per entry; Richardson: 4 per entry
    if (len(estimates) == 1 and not all(t.ok for t in judgement.tensors)
            and affordable(1 + 3 * len(judgement.tensors) + 4 * failing(),
                           "a second reference for the failing entries")):
        estimates, extra, why = confirm_failing(plan, judgement, estimates, seed)
        spent += extra
        unavailable = {**unavailable, **why}
        judgement = judge(plan.structure, claimed, dtypes, estimates, unavailable, tolerance, allowances=allowances)
    if not all(t.ok for t in judgement.tensors) and affordable(4 * failing(), "the kink test of the failing entries"):
        kinks, extra = find_kinks(plan, judgement, claimed)
        spent += extra
        if any(m.any() for m in kinks):
            judgement = judge(plan.structure, claimed, dtypes, estimates, unavailable, tolerance, kinks=kinks,
                              allowances=allowances)
    if not all(t.ok for t in judgement.tensors):
        notes.extend(skipped)
    return judgement, unallowed, rounding, spent, notes


@_entry_point("examine")
def examine(loss: Callable, params: Any, *data: Any, grads: Any, deltas: Any = None, step: Callable | None = None,
            layers: LayerSpec = None,
            methods: Sequence[str] | str | None = None, tolerance: float | None = None, seed: int = 0,
            title: str = "gradient check", budget: int | None = None, executor: Any = None,
            progress: bool | None = None) -> Report:
    """Check claimed gradients against independent references and diagnose what is wrong.

    Args:
        loss: ``loss(params, *data) -> scalar``.
        params: a pytree (dicts, lists, tuples) of float arrays or floats.
        *data: the inputs the loss takes after params (float data is promoted to float64).
        grads: the claimed dE/dparams, a pytree like params, or a callable ``grads(params, *data)``.
        deltas: claimed dE/d(probed value), a dict probe name -> array or a callable like ``grads``;
            the loss must take a keyword ``probe`` (see ``_probes``).
        step: the user's update ``step(params, grads) -> new_params``; its effective learning rate
            is inferred per tensor and an ascent step is reported.
        layers: a mapping path -> layer name, or a callable, overriding the default grouping.
        methods: reference methods to use (default: autodiff when available plus central differences).
        tolerance: relative tolerance for every tensor (default: by the claimed dtype and the reference).
        seed: seed for the random directions and perturbations the check draws.
        title: the first words of the text report.
        budget: the most loss evaluations to spend; networks larger than
            ``FULL_CHECK_LIMIT`` parameters get a default budget (see ``_budget``).
        executor: a ``concurrent.futures.Executor`` to farm loss evaluations out to.
        progress: show a progress bar (default: only on a terminal).

    Returns:
        A :class:`gradcheck.Report`.

    Raises:
        InputError: the input cannot be checked (the message says where, what was expected and the fix).

    Example:
        >>> import numpy as np, gradcheck
        >>> def loss(p, x):
        ...     return float(np.sum(np.tanh(x @ p["W"]) ** 2))
        >>> x, W = np.array([[0.3, -0.2]]), np.array([[0.5], [0.1]])
        >>> def backward(p, x):
        ...     a = np.tanh(x @ p["W"])
        ...     return {"W": x.T @ (2 * a * (1 - a ** 2))}
        >>> gradcheck.examine(loss, {"W": W}, x, grads=backward).ok
        True
    """
    chosen = check_methods(methods)
    plan = make_plan(loss, params, data, layers, seed=seed)
    claimed, dtypes, _ = claimed_from(plan, grads)
    repeat = claimed_from(plan, grads)[0] if callable(grads) else None
    if not plan.deterministic:
        return announce(_nondeterministic(plan, title))
    notes: list[str] = []
    budgeted = budget is not None or plan.structure.size > FULL_CHECK_LIMIT
    room: int | None = None  # loss evaluations a budget leaves for the entry-by-entry check, None: no limit
    traced: Traced | None = None
    if budgeted:
        from .._scale.budgeted import full_check_note, room_for_full_check

        traced_or_reason = trace(plan.loss, plan.structure, plan.base, plan.data, plan.kwargs)
        traced = None if isinstance(traced_or_reason, str) else traced_or_reason
        room = room_for_full_check(plan, traced, budget)
    if budgeted and room is None:
        from .._scale.budgeted import check_within_budget

        judgement, evaluations, budget_notes = check_within_budget(
            plan, claimed, dtypes, traced, budget=budget, executor=executor, progress=progress, seed=seed,
            tolerance=tolerance)
        notes.extend(budget_notes)
        unallowed, rounding = judgement, Allowance(None)
    else:
        estimates, unavailable, evaluations, traced = compute_references(plan, chosen, seed, executor, progress)
        if room is not None:
            notes.append(full_check_note(room + plan.evaluations, plan.structure.size))
        # a backward that gave two different answers to the same input (buffers never reset, unseeded
        # randomness) is not run again to measure its rounding: its movement would not be rounding
        steady = repeat is None or all(np.array_equal(a, b, equal_nan=True) for a, b in zip(claimed, repeat))
        judgement, unallowed, rounding, spent, settle_notes = _settle(
            plan, claimed, dtypes, grads if steady else None, estimates, unavailable, tolerance, seed,
            None if room is None else room - evaluations)
        evaluations += spent
        notes.extend(settle_notes)
    order = _layer_order(plan, traced)
    evidence = Evidence(plan.structure, tuple(claimed), plan.base, judgement, batch_sizes(plan.data), order)
    findings = _tensor_findings(evidence)
    if traced is not None and not all(t.ok for t in judgement.tensors):
        findings.extend(mutant_findings(plan, traced, claimed, judgement))
    if repeat is not None:
        findings.extend(repeat_findings(plan, claimed, repeat, judgement))
    delta_rows: tuple[TensorResult, ...] = ()
    if deltas is not None:
        from .._diagnose.deltas import check_deltas

        checked_deltas = check_deltas(plan, deltas, tolerance, lambda name: name.split(".")[0])
        delta_rows = checked_deltas.rows
        findings.extend(checked_deltas.findings)
        evaluations += checked_deltas.evaluations
    rates: dict[str, float] = {}
    if step is not None:
        from .._diagnose.step import check_step

        checked_step = check_step(plan, step, [np.nan_to_num(v) for v in judgement.primary.values])
        rates = checked_step.rates
        findings.extend(checked_step.findings)
        evaluations += checked_step.evaluations
    if plan.loss_eps > EPS64:
        notes.append("the loss computes in float32 internally (it does not see float64 changes of its params), "
                     f"so the references are float32-accurate and tolerances were widened to "
                     f"{min(t.tolerance for t in judgement.tensors):.1e}")
    notes.extend(rounding_notes(unallowed, judgement, dtypes, grads, rounding))
    ok = all(t.ok for t in judgement.tensors + delta_rows) and not findings
    ranked = merge_findings(findings, order)
    tensors = judgement.tensors
    return announce(Report(ok, tensors, build_layers(tensors, order), ranked if not ok else (),
                  plan.evaluations + evaluations, judgement.summary,
                  deltas=delta_rows, notes=tuple(notes), title=title, rates=rates))


@_entry_point("assert_backprop")
def assert_backprop(loss: Callable, params: Any, *data: Any, grads: Any, **options: Any) -> Report:
    """Like :func:`examine`, but raise :class:`gradcheck.BackpropMismatch` (an AssertionError) when wrong.

    The exception's message is the full text report; its ``report`` attribute is the Report.
    """
    __tracebackhide__ = True
    report = examine.__wrapped__(loss, params, *data, grads=grads, **options)
    if not report.ok:
        raise BackpropMismatch(report)
    return report


@_entry_point("reference")
def reference(loss: Callable, params: Any, *data: Any, method: str = "central", seed: int = 0) -> Any:
    """The reference gradient of ``loss`` at ``params`` by one method, as a pytree shaped like params.

    Args:
        method: ``central``, ``richardson``, ``complex`` or ``autodiff``.

    Example:
        >>> import numpy as np, gradcheck
        >>> g = gradcheck.reference(lambda p: float(np.sum(p["w"] ** 2)), {"w": np.array([1.0, -3.0])})
        >>> np.round(g["w"], 8)
        array([ 2., -6.])
    """
    chosen = check_methods(method)
    if chosen is None or len(chosen) != 1:
        raise input_error("method", f"one name among {list(METHODS)}", repr(method), "Pass e.g. method='central'.")
    plan = make_plan(loss, params, data, seed=seed)
    if not plan.deterministic:
        raise input_error("loss", "the same value for the same params", f"{plan.f0!r}, then {plan.second_value!r}",
                          "Fix the random seed inside the loss.")
    estimates, unavailable, _, _ = compute_references(plan, chosen, seed)
    if unavailable.get(chosen[0]):
        raise input_error("method", "a method this loss allows", f"{chosen[0]} ({unavailable[chosen[0]]})",
                          "Use method='central', which works for any loss.")
    return plan.structure.rebuild(list(estimates[0].values))
