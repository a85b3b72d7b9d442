"""``examine_layer``: check one layer's hand-written backward against its forward.

A layer is a forward ``forward(*inputs) -> out`` and a backward
``backward(upstream, *inputs) -> (d_input0, d_input1, ...)``. The backward of a
layer is the vector-Jacobian product: for an upstream gradient R shaped like the
output it returns the gradient of the scalar <forward(inputs), R>. So each trial
draws R (standard normal, one number per output entry), builds the loss
``L(inputs) = sum(forward(*inputs) * R)`` over the differentiated inputs, and
hands it to the one check pipeline :func:`gradcheck.examine` runs
(:func:`gradcheck._check.run.run_check`): references (autodiff through the ``xp``
route or JAX when the forward allows it, the complex step, central differences),
comparison, settling (measured rounding of the backward, measured noise, a second
reference, the kink test) and the whole diagnosis, mutants included. A random R weights
every output entry, so a backward right for one upstream pattern (all ones, say)
and wrong for others cannot hide; ``trials`` independent draws make a
coincidental pass vanishingly unlikely.

Trials are combined per input by keeping the worst one. The report's paths are
the input names from the forward's signature (``input0``, ``input1``, ... where
it has none); the layer of a tensor is its input's name.
"""

from __future__ import annotations

import inspect
import math
from typing import Any, Callable, Sequence

import numpy as np

from .._check.compare import Judgement
from .._check.inputs import Plan, copy_data, make_plan
from .._check.rounding import rounding_notes
from .._check.run import Claims, Outcome, read_claims, run_check, standard_diagnosis
from .._core.errors import InputError, describe, input_error
from .._core.precision import EPS64
from .._core.tree import _rebuild, _walk, flatten
from .._diagnose.kinds import RankedFinding
from .._diagnose.ranking import merge_findings
from .._layers.stress import overlap_notes, resolution_notes, stabiliser_notes
from .._references.autodiff import Traced, accepts_keyword
from .._references.choose import check_methods
from .._report.listeners import announce
from .._report.results import ReferenceSummary, Report, TensorResult, build_layers, nondeterministic_report
from .entry import entry_point

__all__ = ["examine_layer", "input_names"]


def input_names(forward: Callable, count: int) -> list[str]:
    """The names of a forward's positional inputs, ``input<i>`` where the signature has none.

    Example:
        >>> input_names(lambda x, w, b, xp=None: None, 3), input_names(lambda *a: None, 2)
        (['x', 'w', 'b'], ['input0', 'input1'])
    """
    try:
        params = list(inspect.signature(forward).parameters.values())
    except (TypeError, ValueError):
        return [f"input{i}" for i in range(count)]
    named = [p.name for p in params if p.kind in (p.POSITIONAL_ONLY, p.POSITIONAL_OR_KEYWORD) and p.name != "xp"]
    varargs = any(p.kind == p.VAR_POSITIONAL for p in params)
    if count > len(named) and not varargs:
        raise input_error("inputs", f"at most {len(named)} inputs for forward{inspect.signature(forward)}",
                          f"{count} inputs", "Pass exactly the forward's positional arguments, in order.")
    return named[:count] + [f"input{i}" for i in range(len(named), count)]


def _is_float(value: Any) -> bool:
    if isinstance(value, bool) or isinstance(value, int):
        return False
    if isinstance(value, float):
        return True
    return hasattr(value, "dtype") and np.dtype(value.dtype).kind == "f"


def _float_input(value: Any) -> bool:
    found: list = []
    _walk(value, (), found)
    return bool(found) and all(_is_float(v) for _, v in found)


def _call(fn: Callable, what: str, expected: str, *args: Any, **kwargs: Any) -> Any:
    try:
        return fn(*args, **kwargs)
    except InputError:
        raise
    except Exception as exc:
        raise input_error(what, expected, f"{type(exc).__name__}: {exc}",
                          f"Fix the error shown above in the {what}.") from exc


def _leaves(tree: Any) -> tuple[Any, list[Any]]:
    found: list = []
    recipe = _walk(tree, (), found)
    return recipe, [v for _, v in found]


def _upstreams(out0: Any, upstream: Any, trials: int, seed: int) -> tuple[Any, list[list[Any]]]:
    """The upstream gradients of every trial, one float64 value per float output leaf (None elsewhere)."""
    recipe, leaves = _leaves(out0)
    mask = [_is_float(v) for v in leaves]
    if not any(mask):
        raise input_error("forward", "an output with at least one float array", describe(out0),
                          "Return the layer's output (with a cache-style forward, pass lambda *a: fwd(*a)[0]).")
    shapes = [np.shape(v) for v in leaves]
    if upstream is not None:
        _, given = _leaves(upstream)
        got = [np.shape(g) for g in given]
        want = [s for s, m in zip(shapes, mask) if m]
        if len(given) == len(leaves):
            given = [g for g, m in zip(given, mask) if m]
            got = [np.shape(g) for g in given]
        if got != want:
            raise input_error("upstream", f"one array per float output leaf, shapes {want}", f"shapes {got}",
                              "Pass an upstream gradient shaped like forward's output, or leave it out.")
        values = iter(np.array(g, dtype=np.float64) for g in given)
        return recipe, [[next(values) if m else None for m in mask]]
    rng = np.random.default_rng(seed)
    return recipe, [[(rng.standard_normal(s) if s else float(rng.standard_normal())) if m else None
                     for s, m in zip(shapes, mask)] for _ in range(trials)]


def _pairing(forward: Callable, args_of: Callable, R: list[Any], use_xp: bool) -> Callable:
    """The trial's scalar loss <forward(inputs), R>, written so the xp route (and JAX tracing) can take it."""
    def inner(out: Any, xp: Any) -> Any:
        _, leaves = _leaves(out)
        if len(leaves) != len(R):
            raise input_error("forward", f"the same output structure on every call ({len(R)} leaves)",
                              f"{len(leaves)} leaves", "Return the same kind of output for every input.")
        total = 0.0
        for o, r in zip(leaves, R):
            if r is not None:
                total = total + xp.sum(o * r)
        return total

    def with_xp(params: Any, *rest: Any, xp: Any = np) -> Any:
        return inner(forward(*args_of(params, rest), xp=xp), xp)

    def numpy_only(params: Any, *rest: Any) -> Any:
        return inner(forward(*args_of(params, rest)), np)

    return with_xp if use_xp else numpy_only


def _nondeterministic(names: list[str], inputs: tuple, checked: list[int], gap: float, title: str) -> Report:
    structure, _ = flatten({names[i]: inputs[i] for i in checked}, layers=lambda p: p.split(".")[0])
    return announce(nondeterministic_report(
        structure, "forward", f"two calls of forward on the same inputs differ (by up to {gap:.3g}); a layer with "
        "randomness in training mode (dropout) must be checked with it fixed: seed its generator inside the forward, "
        "or pass the mask as an input and return None for it from backward", 2, "the forward is not deterministic",
        title))


def _which(wrt: Any, names: list[str], inputs: tuple, raw: Sequence[Any]) -> list[int]:
    """Positions of the inputs to check: ``wrt``, or every float input whose backward entry is not None."""
    if wrt is None:
        chosen = [i for i, v in enumerate(inputs) if _float_input(v) and raw[i] is not None]
        if not chosen:
            raise input_error("backward", "a gradient for at least one float input",
                              f"None (or nothing float) for every input {names}",
                              "Return the gradients of the float inputs, e.g. (dx, dw, db).")
        return chosen
    wanted = [wrt] if isinstance(wrt, (str, int)) else list(wrt)
    chosen = []
    for w in wanted:
        i = w if isinstance(w, int) and -len(names) <= w < len(names) else (names.index(w) if w in names else None)
        if i is None:
            raise input_error("wrt", f"input names among {names} (or positions)", repr(w), "Name the inputs to check.")
        i %= len(names)
        if not _float_input(inputs[i]):
            raise input_error(f"wrt {names[i]}", "a float input", describe(inputs[i]),
                              "Only float inputs can be differentiated; leave integer or flag inputs out of wrt.")
        if raw[i] is None:
            raise input_error(f"backward {names[i]}", "a gradient (wrt asks for it)", "None",
                              f"Return the gradient of {names[i]}, or leave it out of wrt.")
        chosen.append(i)
    return sorted(set(chosen))


def _claimed_tuple(raw: Any, names: list[str]) -> Sequence[Any]:
    if len(names) == 1 and not isinstance(raw, (tuple, list)):
        return (raw,)
    if not isinstance(raw, (tuple, list)) or len(raw) != len(names):
        got = f"a {type(raw).__name__} of {len(raw)}" if isinstance(raw, (tuple, list)) else describe(raw)
        raise input_error("backward", f"a tuple of {len(names)} gradients, one per input {names} (None for inputs "
                          "not differentiated)", got, "Return e.g. (dx, dw, db) in the order of forward's inputs.")
    return raw


def _worse(a: TensorResult, b: TensorResult) -> bool:
    """Whether result ``a`` is worse than ``b`` (failing first, then the larger error)."""
    ea = a.error if math.isfinite(a.error) else math.inf
    eb = b.error if math.isfinite(b.error) else math.inf
    return (not a.ok, ea) > (not b.ok, eb)


@entry_point("examine_layer")
def examine_layer(forward: Callable, backward: Callable, *inputs: Any, upstream: Any = None, wrt: Any = None,
                  trials: int = 3, tolerance: float | None = None, methods: Sequence[str] | str | None = None,
                  seed: int = 0, title: str | None = None) -> Report:
    """Check a layer's backward (the gradient of every input) against references of its forward.

    Args:
        forward: ``forward(*inputs) -> out``, an array or a pytree of arrays. If it
            takes a keyword ``xp`` it is also run with ``xp=jax.numpy`` for the
            autodiff reference.
        backward: ``backward(upstream, *inputs) -> grads``, one entry per input
            (None for inputs not differentiated: labels, flags, masks). A layer
            with a single input may return the bare array.
        *inputs: the inputs to check at (never modified; float ones are checked).
        upstream: one upstream gradient shaped like ``out`` to use instead of
            ``trials`` random draws.
        wrt: the names (or positions) of the inputs to check; default every float
            input whose backward entry is not None.
        trials: independent standard-normal upstream gradients to check with.
        tolerance, methods, seed: as for :func:`gradcheck.examine`.
        title: the report's first words (default: ``layer <forward's name>``).

    Returns:
        A :class:`gradcheck.Report` with one tensor per checked input (the worst
        trial of each), the diagnosis findings, and ``weak check`` notes where the
        inputs could hide a class of mistakes (see ``gradcheck._layers.stress``).

    Example:
        >>> import numpy as np
        >>> def scale_shift(x, a, c):
        ...     return a * x + c
        >>> def scale_shift_back(g, x, a, c):
        ...     return a * g, (g * x).sum(axis=0), g.sum(axis=0)
        >>> x = np.random.default_rng(0).standard_normal((4, 3))
        >>> report = examine_layer(scale_shift, scale_shift_back, x, np.ones(3), np.zeros(3))
        >>> report.ok, [t.path for t in report.tensors]
        (True, ['x', 'a', 'c'])
    """
    chosen_methods = check_methods(methods)
    _check_arguments(forward, backward, inputs, trials)
    names = input_names(forward, len(inputs))
    name = getattr(forward, "__name__", "")
    title = title or (f"layer {name}" if name.isidentifier() else "layer check")
    use_xp = accepts_keyword(forward, "xp")
    fwd = (lambda *a: forward(*a, xp=np)) if use_xp else forward
    expected_out = "an output for the given inputs"
    out0 = _call(fwd, "forward", expected_out, *copy_data(inputs, promote=False))
    out1 = _call(fwd, "forward", expected_out, *copy_data(inputs, promote=False))
    l0, gap = _leaves(out0)[1], _gap(out0, out1)
    if gap != 0:
        candidates = [i for i, v in enumerate(inputs) if _float_input(v)]
        return _nondeterministic(names, inputs, candidates, gap, title)
    recipe, draws = _upstreams(out0, upstream, trials, seed)
    batch_sizes = tuple(int(np.shape(v)[0]) for v in inputs if isinstance(v, np.ndarray) and np.ndim(v) >= 1)

    def backward_at(R: list[Any]) -> Sequence[Any]:
        tree = _rebuild(recipe, [np.array(r) if isinstance(r, np.ndarray) else r for r in R])
        raw = _call(backward, "backward", "the gradients of the inputs", tree, *copy_data(inputs, promote=False))
        return _claimed_tuple(raw, names)

    raw0 = backward_at(draws[0])  # which inputs the backward differentiates
    checked = _which(wrt, names, inputs, raw0)
    data_pos = [i for i in range(len(inputs)) if i not in checked]

    def args_of(params: dict, rest: tuple) -> list[Any]:
        args: list[Any] = [None] * len(inputs)
        for i in checked:
            args[i] = params[names[i]]
        for j, i in enumerate(data_pos):
            args[i] = rest[j]
        return args

    def backward_on(R: list[Any]) -> Callable:
        """The layer's backward at upstream R as a grads(params, *data) callable, so that the pipeline can
        call it again (repeat check, float64 re-run, nudged inputs) exactly as it calls examine's."""
        def grads(p: Any, *rest: Any) -> dict[str, Any]:
            tree = _rebuild(recipe, [np.array(r) if isinstance(r, np.ndarray) else r for r in R])
            raw = _claimed_tuple(_call(backward, "backward", "the gradients of the inputs", tree,
                                       *args_of(p, rest)), names)
            return {names[i]: raw[i] for i in checked}
        return grads

    params = {names[i]: inputs[i] for i in checked}
    data = tuple(inputs[i] for i in data_pos)

    def diagnose(plan: Plan, claims: Claims, judgement: Judgement, traced: Traced | None,
                 order: tuple[str, ...]) -> list[RankedFinding]:
        return standard_diagnosis(plan, claims, judgement, traced, plan.structure.layer_order, subject="input",
                                  batch=batch_sizes)

    evaluations, notes = 2, list[str]()
    outcomes: list[tuple[Plan, Outcome]] = []
    for t, R in enumerate(draws):
        loss = _pairing(forward, args_of, R, use_xp)
        plan = make_plan(loss, params, data, layers=lambda p: p.split(".")[0], seed=seed + t)
        if not plan.deterministic:
            return _nondeterministic(names, inputs, checked, abs(plan.f0 - plan.second_value), title)
        grads = backward_on(R)
        claims = read_claims(plan, grads, "backward")
        outcome = run_check(plan, claims, methods=chosen_methods, tolerance=tolerance, seed=seed + t,
                            diagnose=diagnose)
        outcomes.append((plan, outcome))
        evaluations += plan.evaluations + outcome.evaluations
        notes.extend(n for n in outcome.notes + tuple(rounding_notes(outcome.unallowed, outcome.judgement,
                                                                    claims.dtypes, grads, outcome.rounding))
                     if not any(n[:40] == old[:40] for old in notes))
    first_plan, first = outcomes[0]
    structure = first_plan.structure
    tensors, findings = _worst_trials([o for _, o in outcomes], structure.paths)
    ok = all(r.ok for r in tensors) and not findings
    ranked = merge_findings(findings, structure.layer_order) if not ok else ()
    notes.append(f"each input checked against {len(draws)} " + ("given upstream gradient" if upstream is not None
                 else "random upstream gradients (standard normal)") + "; the worst is shown")
    if first_plan.loss_eps > EPS64:
        notes.append("the forward computes in float32 internally, so the references are float32-accurate and "
                     f"tolerances were widened to {min(r.tolerance for r in tensors):.1e}")
    tolerances = {r.path: r.tolerance for r in tensors}
    probe_args = list(copy_data(inputs))

    def run(args: list) -> list[np.ndarray]:
        return [np.asarray(v, dtype=np.float64) for v in _leaves(fwd(*args))[1] if _is_float(v)]

    base_out = [np.asarray(v, dtype=np.float64) for v in l0 if _is_float(v)]
    for probe in (stabiliser_notes(run, probe_args, names, checked, base_out, tolerances),
                  overlap_notes(run, probe_args, names, checked, base_out, seed)):
        notes.extend(probe[0])
        evaluations += probe[1]
    notes.extend(resolution_notes(first.judgement, structure))
    summary = _combined_summary([o.judgement.summary for _, o in outcomes])
    return announce(Report(ok, tensors, build_layers(tensors, structure.layer_order), ranked, evaluations,
                           summary, notes=tuple(notes), title=title))


def _check_arguments(forward: Any, backward: Any, inputs: tuple, trials: Any) -> None:
    if not callable(forward) or not callable(backward):
        bad = "forward" if not callable(forward) else "backward"
        raise input_error(bad, "a callable", describe(forward if bad == "forward" else backward),
                          "Pass the functions themselves: examine_layer(forward, backward, *inputs).")
    if not inputs:
        raise input_error("inputs", "the layer's inputs after forward and backward", "none",
                          "Call examine_layer(forward, backward, x, w, b).")
    if isinstance(trials, bool) or not isinstance(trials, int) or trials < 1:
        raise input_error("trials", "a positive integer", repr(trials), "Pass e.g. trials=3.")


def _gap(out0: Any, out1: Any) -> float:
    """How far two calls of the forward on the same inputs differ (0 for a deterministic forward)."""
    l0, l1 = _leaves(out0)[1], _leaves(out1)[1]
    gaps = [float(np.max(np.abs(np.asarray(a, float) - np.asarray(b, float)), initial=0.0))
            for a, b in zip(l0, l1) if _is_float(a) and np.shape(a) == np.shape(b)]
    if len(l0) != len(l1):
        return math.nan
    return next((g for g in gaps if g != 0 or math.isnan(g)), 0.0)


def _worst_trials(outcomes: Sequence[Outcome], paths: Sequence[str]
                  ) -> tuple[tuple[TensorResult, ...], list[RankedFinding]]:
    """Per input, the result and findings of its worst trial; findings about no single input (mutants,
    repeated calls) from the first trial that has any."""
    best: dict[str, tuple[TensorResult, list[RankedFinding]]] = {}
    shared: list[RankedFinding] = []
    for outcome in outcomes:
        if not shared:
            shared = [f for f in outcome.findings if f.finding.where not in paths or f.finding.kind == "accumulating"]
        for result in outcome.judgement.tensors:
            if result.path in best and not _worse(result, best[result.path][0]):
                continue
            best[result.path] = (result, [f for f in outcome.findings
                                          if f.finding.where == result.path and f.finding.kind != "accumulating"])
    return tuple(best[p][0] for p in paths), [f for p in paths for f in best[p][1]] + shared


def _combined_summary(summaries: Sequence[ReferenceSummary]) -> ReferenceSummary:
    """One reference summary for all trials: every method used, the largest disagreements."""
    methods = tuple(dict.fromkeys(m for s in summaries for m in s.methods))
    agreement = {m: max(s.agreement.get(m, 0.0) for s in summaries) for m in methods
                 if any(m in s.agreement for s in summaries)}
    return ReferenceSummary(summaries[0].primary, methods, agreement,
                            {k: v for s in summaries for k, v in s.unavailable.items()},
                            max(s.unreliable for s in summaries))
