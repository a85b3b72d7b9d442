"""The entry points ``examine``, ``assert_backprop`` and ``reference``.

``examine`` prepares the inputs (:mod:`gradcheck._check.inputs`), reads the claims, and hands both to the
one check pipeline (:func:`gradcheck._check.run.run_check`: references, comparison, settling, diagnosis);
claimed deltas go through the same pipeline (:mod:`gradcheck._diagnose.deltas`), an update step is judged
on the reference gradient (:mod:`gradcheck._diagnose.step`), and the findings are ranked into a
:class:`gradcheck.Report`.
"""

from __future__ import annotations

from typing import Any, Callable, Sequence

import numpy as np

from .._check.inputs import Plan, make_plan
from .._check.rounding import rounding_notes
from .._check.run import read_claims, run_check
from .._core.errors import BackpropMismatch, input_error
from .._core.precision import EPS64
from .._core.tree import LayerSpec
from .._diagnose.ranking import merge_findings
from .._references.choose import METHODS, check_methods, compute_references
from .._report.listeners import announce
from .._report.results import Report, TensorResult, build_layers, nondeterministic_report
from .entry import entry_point

__all__ = ["examine", "assert_backprop", "reference", "METHODS"]


def _nondeterministic(plan: Plan, title: str) -> Report:
    return nondeterministic_report(
        plan.structure, "loss", f"the loss gave {plan.f0!r} and then {plan.second_value!r} for the same params; fix "
        "the random seed (or pass the dropout mask as data) so that every evaluation sees the same randomness",
        plan.evaluations, "the loss is not deterministic", title)


@entry_point("examine")
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
            the loss must take a keyword ``probe`` (see ``gradcheck._diagnose.deltas``).
        step: the user's update ``step(params, grads) -> new_params``; its effective learning rate
            is inferred per tensor and an ascent step is reported.
        layers: a mapping path -> layer name, or a callable, overriding the default grouping.
        methods: reference methods to use (default: autodiff when available plus central differences).
        tolerance: relative tolerance for every tensor (default: by the claimed dtype and the reference).
        seed: seed for the random directions and perturbations the check draws.
        title: the first words of the text report.
        budget: the most loss evaluations to spend; networks larger than
            ``FULL_CHECK_LIMIT`` parameters get a default budget (see ``gradcheck._check.budget``).
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
    claims = read_claims(plan, grads)
    if not plan.deterministic:
        return announce(_nondeterministic(plan, title))
    outcome = run_check(plan, claims, methods=chosen, tolerance=tolerance, seed=seed, budget=budget,
                        executor=executor, progress=progress)
    judgement, order, evaluations = outcome.judgement, outcome.order, outcome.evaluations
    findings = list(outcome.findings)
    notes = list(outcome.notes)
    delta_rows: tuple[TensorResult, ...] = ()
    if deltas is not None:
        from .._diagnose.deltas import check_deltas

        checked_deltas = check_deltas(plan, deltas, tolerance, lambda name: name.split(".")[0], seed=seed)
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
    notes.extend(rounding_notes(outcome.unallowed, judgement, claims.dtypes, grads, outcome.rounding))
    ok = all(t.ok for t in judgement.tensors + delta_rows) and not findings
    ranked = merge_findings(findings, order)
    tensors = judgement.tensors
    return announce(Report(ok, tensors, build_layers(tensors, order), ranked if not ok else (),
                  plan.evaluations + evaluations, judgement.summary,
                  deltas=delta_rows, notes=tuple(notes), title=title, rates=rates))


@entry_point("assert_backprop")
def assert_backprop(loss: Callable, params: Any, *data: Any, grads: Any, **options: Any) -> Report:
    """Like :func:`examine`, but raise :class:`gradcheck.BackpropMismatch` (an AssertionError) when wrong.

    The exception's message is the full text report; its ``report`` attribute is the Report.
    """
    __tracebackhide__ = True
    report = examine.__wrapped__(loss, params, *data, grads=grads, **options)
    if not report.ok:
        raise BackpropMismatch(report)
    return report


@entry_point("reference")
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
