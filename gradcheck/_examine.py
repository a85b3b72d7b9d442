"""The entry points: ``examine``, ``assert_backprop`` and ``reference``.

Each call runs in stages that hand read-only results along:

1. plan (``_plan``): validate, copy, evaluate the loss once, learn its precision;
2. compute (here): the references the loss allows (autodiff, complex step,
   central differences, Richardson);
3. compare (``_compare``): per-entry relative errors and reference agreement;
4. diagnose (``_diagnose`` and friends): which mistake, and where it starts;
5. report (``_report``).

An :class:`InputError` from any stage is re-raised here once, prefixed with the
entry point's name, so the user sees which call the message belongs to.
"""

from __future__ import annotations

import dataclasses
import functools
import warnings
from typing import Any, Callable, Sequence

import numpy as np

from ._autodiff import Traced, autodiff_estimate, trace
from ._compare import Judgement, judge
from ._diagnose import Evidence, merge_findings, scale_cause, tensor_findings
from ._errors import BackpropMismatch, InputError, input_error
from ._listeners import announce
from ._numerical import COMPLEX_STEP, EPS64, Estimate, central, complex_step, complex_usable, richardson
from ._plan import Plan, claimed_from, make_plan
from ._report import Finding, Report, TensorResult, build_layers
from ._tree import LayerSpec

__all__ = ["examine", "assert_backprop", "reference", "METHODS"]

METHODS = ("autodiff", "complex", "richardson", "central")
"""Every reference method, most accurate first (the first one computed is the primary)."""

FULL_CHECK_LIMIT = 100_000
"""Networks up to this many parameters are checked entry by entry unless a budget is given."""

CONFIRM_PER_TENSOR = 32
"""Failing entries per tensor re-checked with a second method when only one reference was computed."""


def _entry_point(name: str) -> Callable:
    def wrap(fn: Callable) -> Callable:
        @functools.wraps(fn)
        def inner(*args, **kwargs):
            try:
                return fn(*args, **kwargs)
            except InputError as exc:
                raise InputError(f"gradcheck.{name}: {exc}") from exc.__cause__
        return inner
    return wrap


def _check_methods(methods: Sequence[str] | str | None) -> tuple[str, ...] | None:
    if methods is None:
        return None
    if isinstance(methods, str):
        methods = (methods,)
    unknown = [m for m in methods if m not in METHODS]
    if unknown or not methods:
        raise input_error("methods", f"names among {list(METHODS)}", repr(list(methods)),
                          "Pass e.g. methods=('autodiff', 'central').")
    return tuple(m for m in METHODS if m in methods)


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
        num = (ev.along(k, v, h) - ev.along(k, v, -h)) / (2 * h)
        cev.work[k][...] = cev.base[k] + 1j * COMPLEX_STEP * v.reshape(b.shape)
        try:
            exact = complex(cev()).imag / COMPLEX_STEP
        finally:
            cev.reset(k)
        spent += 3
        if abs(num - exact) > 1e-5 * max(abs(num), abs(exact)) + 1e4 * EPS64 * max(abs(plan.f0), 1e-300) / h:
            return False, spent
    return True, spent


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
                    est = dataclasses.replace(est, rtol=1e-5, atol=tuple(a * eps / EPS64 for a in est.atol))
                estimates.append(est)
    if "complex" in wanted:
        cev = plan.evaluator(np.complex128)
        reason = complex_usable(cev, plan.f0)
        if reason is None and eps > EPS64:
            reason = "the loss computes in float32 inside, below the complex step's accuracy"
        if reason is None:
            from ._parallel import complex_reference  # executor, or this process with a progress bar

            est, spent = complex_reference(plan, executor, progress)
            estimates.append(est)
            evaluations += spent
        else:
            unavailable["complex"] = reason
        evaluations += cev.count
    from ._parallel import entrywise_references  # executor, vectorised JAX, or the Python loop

    numeric, spent = entrywise_references(plan, [m for m in ("richardson", "central") if m in wanted], eps,
                                          executor=executor, traced=traced, progress=progress)
    estimates.extend(numeric)
    evaluations += spent
    if not estimates:
        raise input_error("methods", "at least one reference method this loss allows",
                          "; ".join(f"{m}: {why}" for m, why in unavailable.items()),
                          "Add 'central' to methods (it works for any loss).")
    return estimates, unavailable, evaluations, traced


def _confirm(plan: Plan, judgement: Judgement, estimates: list[Estimate], seed: int
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


def _kinks(plan: Plan, judgement: Judgement, claimed: list[np.ndarray]) -> tuple[list[np.ndarray], int]:
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
            seconds = []
            for step in (h, h / 2):
                work[i] = base[i] + step
                up = ev()
                work[i] = base[i] - step
                down = ev()
                work[i] = base[i]
                seconds.append((up - 2 * plan.f0 + down) / step)
            jump = seconds[1]
            noise = 1e3 * plan.loss_eps * max(abs(plan.f0), 1e-300) / h
            steady = abs(jump) > noise and abs(seconds[1]) > 0.75 * abs(seconds[0])
            inside = abs(claim[i] - ref[i]) <= 0.5 * abs(jump) * (1 + 1e-6) + noise
            flat_mask[i] = steady and inside
        masks.append(mask)
    return masks, ev.count


def _layer_order(plan: Plan, traced: Traced | None) -> tuple[str, ...]:
    if traced is None:
        return plan.structure.layer_order
    seen: dict[str, None] = {}
    for i in traced.order:
        seen.setdefault(plan.structure.tensors[i].layer, None)
    return tuple(seen)


def _batch_sizes(data: tuple) -> tuple[int, ...]:
    return tuple(int(np.shape(d)[0]) for d in data if isinstance(d, np.ndarray) and np.ndim(d) >= 1)


def _nondeterministic(plan: Plan, title: str) -> Report:
    from ._report import ReferenceSummary

    finding = Finding("nondeterministic-loss", None, "loss",
                      f"the loss gave {plan.f0!r} and then {plan.second_value!r} for the same params; fix the random "
                      "seed (or pass the dropout mask as data) so that every evaluation sees the same randomness")
    tensors = tuple(TensorResult(t.path, t.layer, t.shape, float("nan"), (), 0, float("nan"), float("nan"), False,
                                 float("nan"), 0, t.size) for t in plan.structure.tensors)
    return Report(False, tensors, build_layers(tensors, plan.structure.layer_order), (finding,), plan.evaluations,
                  ReferenceSummary("none", (), {}, {"all": "the loss is not deterministic"}), title=title)


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
    chosen = _check_methods(methods)
    plan = make_plan(loss, params, data, layers, seed=seed)
    claimed, dtypes, first_raw = claimed_from(plan, grads)
    repeat = claimed_from(plan, grads)[0] if callable(grads) else None
    if not plan.deterministic:
        return announce(_nondeterministic(plan, title))
    notes: list[str] = []
    budgeted = budget is not None or plan.structure.size > FULL_CHECK_LIMIT
    if budgeted:
        from ._budget import check_within_budget

        traced_or_reason = trace(plan.loss, plan.structure, plan.base, plan.data, plan.kwargs)
        traced = None if isinstance(traced_or_reason, str) else traced_or_reason
        judgement, evaluations, budget_notes = check_within_budget(
            plan, claimed, dtypes, traced, budget=budget, executor=executor, progress=progress, seed=seed,
            tolerance=tolerance)
        notes.extend(budget_notes)
        estimates = [judgement.primary]
    else:
        estimates, unavailable, evaluations, traced = compute_references(plan, chosen, seed, executor, progress)
        judgement = judge(plan.structure, claimed, dtypes, estimates, unavailable, tolerance)
    if len(estimates) == 1 and not budgeted and not all(t.ok for t in judgement.tensors):
        estimates, extra, why = _confirm(plan, judgement, estimates, seed)
        evaluations += extra
        unavailable = {**unavailable, **why}
        judgement = judge(plan.structure, claimed, dtypes, estimates, unavailable, tolerance)
    if not budgeted and not all(t.ok for t in judgement.tensors):
        kinks, extra = _kinks(plan, judgement, claimed)
        evaluations += extra
        if any(m.any() for m in kinks):
            judgement = judge(plan.structure, claimed, dtypes, estimates, unavailable, tolerance, kinks=kinks)
    order = _layer_order(plan, traced)
    evidence = Evidence(plan.structure, tuple(claimed), plan.base, judgement, _batch_sizes(plan.data), order)
    findings = []
    for k, t in enumerate(judgement.tensors):
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
    if traced is not None and not all(t.ok for t in judgement.tensors):
        findings.extend(_mutant_findings(plan, traced, claimed, judgement))
    for t in judgement.tensors:
        if t.checked and t.unreliable == t.checked:
            findings.append((Finding("unreliable-reference", t.layer, t.path,
                                     f"the references disagree with each other at every entry of {t.path} (a kink, "
                                     "a non-smooth or noisy loss), so its claimed values could not be judged; the "
                                     "user's value is not blamed: check it at another point", None), 1.0, 3))
    if repeat is not None:
        findings.extend(_repeat_findings(plan, claimed, repeat, judgement))
    delta_rows: tuple[TensorResult, ...] = ()
    if deltas is not None:
        from ._probes import check_deltas

        checked_deltas = check_deltas(plan, deltas, tolerance, lambda name: name.split(".")[0])
        delta_rows = checked_deltas.rows
        findings.extend(checked_deltas.findings)
        evaluations += checked_deltas.evaluations
    rates: dict[str, float] = {}
    if step is not None:
        from ._step import check_step

        checked_step = check_step(plan, step, [np.nan_to_num(v) for v in judgement.primary.values])
        rates = checked_step.rates
        findings.extend(checked_step.findings)
        evaluations += checked_step.evaluations
    if plan.loss_eps > EPS64:
        notes.append("the loss computes in float32 internally (it does not see float64 changes of its params), "
                     f"so the references are float32-accurate and tolerances were widened to "
                     f"{min(t.tolerance for t in judgement.tensors):.1e}")
    ok = all(t.ok for t in judgement.tensors + delta_rows) and not findings
    ranked = merge_findings(findings, order)
    tensors = judgement.tensors
    return announce(Report(ok, tensors, build_layers(tensors, order), ranked if not ok else (),
                  plan.evaluations + evaluations, judgement.summary,
                  deltas=delta_rows, notes=tuple(notes), title=title, rates=rates))


def _mutant_findings(plan: Plan, traced: Traced, claimed: list[np.ndarray], judgement: Judgement
                     ) -> list[tuple[Finding, float, int]]:
    """Tier 3: mutants of the traced forward's backward pass that reproduce every claimed tensor."""
    from ._mutants import build_mutants, rank_mutants
    from ._tree import _walk

    def fun(tree):
        found: list = []
        _walk(tree, (), found)
        return traced.fun([leaf for _, leaf in found])

    import jax

    tolerance = min(t.tolerance for t in judgement.tensors)
    try:
        with jax.enable_x64(True):
            mutants = build_mutants(fun, list(plan.base), plan.structure)
        ranked = rank_mutants(mutants, claimed, tolerance=tolerance)
    except InputError:
        # tier 3 is extra evidence: a forward it cannot mutate (e.g. scalar parameters it
        # sees as shape (1,)) leaves the tier-1 and tier-2 diagnosis standing
        return []
    out = []
    for mutant, misfit in ranked:
        if misfit > tolerance:
            break
        detail = mutant.detail
        if mutant.kind == "scaled" and mutant.factor:
            detail += f" Likely cause: {scale_cause(mutant.factor, _batch_sizes(plan.data))}."
        out.append((Finding(mutant.kind, mutant.layer, mutant.where, detail, mutant.factor), misfit, 1))
    return out[:3]


def _repeat_findings(plan: Plan, first: list[np.ndarray], second: list[np.ndarray],
                     judgement: Judgement) -> list[tuple[Finding, float, int]]:
    """Compare two calls of the ``grads`` callable on the same input: buffers that are never cleared show up here."""
    out = []
    for k, t in enumerate(plan.structure.tensors):
        a, b = first[k], second[k]
        if np.array_equal(a, b, equal_nan=True):
            continue
        if np.allclose(b, 2 * a, rtol=1e-9, atol=0) and np.any(a != 0):
            detail = ("a second call of the grads callable returned twice the first: gradient buffers are "
                      "accumulated (+=) and never reset; zero them at the start of every backward pass")
            out.append((Finding("accumulating", t.layer, t.path, detail, 2.0), 0.0, 0))
        else:
            detail = ("two calls of the grads callable on the same input returned different values; it keeps "
                      "state between calls or uses unseeded randomness")
            out.append((Finding("accumulating", t.layer, t.path, detail, None), 1.0, 1))
    return out


@_entry_point("assert_backprop")
def assert_backprop(loss: Callable, params: Any, *data: Any, grads: Any, **options: Any) -> Report:
    """Like :func:`examine`, but raise :class:`gradcheck.BackpropMismatch` (an AssertionError) when wrong.

    The exception's message is the full text report; its ``report`` attribute is the Report.
    """
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
    chosen = _check_methods(method)
    if chosen is None or len(chosen) != 1:
        raise input_error("method", f"one name among {list(METHODS)}", repr(method), "Pass e.g. method='central'.")
    plan = make_plan(loss, params, data, seed=seed)
    if not plan.deterministic:
        raise input_error("loss", "the same value for the same params", f"{plan.f0!r}, then {plan.second_value!r}",
                          "Fix the random seed inside the loss.")
    estimates, unavailable, _, _ = compute_references(plan, chosen, seed)
    if unavailable.get(chosen[0]):
        raise input_error("method", f"a method this loss allows", f"{chosen[0]} ({unavailable[chosen[0]]})",
                          "Use method='central', which works for any loss.")
    return plan.structure.rebuild(list(estimates[0].values))
