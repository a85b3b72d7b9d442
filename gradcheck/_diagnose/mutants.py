"""Mutants of a traced backward pass: the gradients that typical mistakes would give.

Each *site* of the traced loss (:mod:`gradcheck._diagnose.program`) where hand-written
backward passes usually go wrong gets one replacement rule per mistake, and each
yields the gradient that backward pass would produce. A wrong backward pass is a
deterministic function of the parameters, so a mutant that reproduces every claimed
tensor to rounding names the mistake and the layer, while wrong guesses miss by far.
Sites (composite forms are recognised by value, robust to the many spellings):

* transfer functions: primitives ``logistic``, ``tanh``, ``exp``, ``log``,
  ``max(z, 0)``, and ``1/(1+exp(-z))``, ``log(1+exp(z))`` written out; leaky ReLU as
  ``where(z > 0, z, c z)`` or ``max(z, c z)`` (matched by value against the registry,
  :mod:`gradcheck._diagnose.transfers`, whose records give each function's derivative,
  formula and common slips);
* softmax and log-softmax along an axis, written out or from ``jax.nn``;
* products (``dot_general``) with a square weight, where transposing is silent;
* multiplications and divisions by constants (the 0.5 of a squared error, 1/N).
"""

from __future__ import annotations

import functools
from dataclasses import dataclass, replace
from typing import Any, Callable, Sequence

import numpy as np

from .._core.errors import describe, input_error
from .program import Mutation, Program, trace_program
from .transfers import LEAKY_SLOPE, TRANSFERS

__all__ = ["Mutant", "build_mutants", "rank_mutants", "misfit", "KINDS"]

KINDS = ("missing-transfer-derivative", "extra-transfer-derivative", "transfer-derivative-misplaced",
         "partial-softmax-jacobian", "transposed", "scaled", "sign-flip")
#: A mutant whose gradient is this close to the correct one cannot be told from a correct pass.
_DISTINCT = 1e-6
#: Relative agreement required to recognise a written-out transfer function or softmax by value.
_MATCH = 1e-9
_WINDOW = 12  # steps after an exp searched for the end of the function it belongs to


@dataclass(frozen=True)
class Mutant:
    """The gradient of one backward pass with one specific mistake.

    ``kind`` is one of :data:`KINDS`; ``layer`` the layer label of the mutated
    operation (the parameter that joined its data path last; ``None`` for the
    sign flip); ``factor`` the local ratio wrong/right of a ``scaled`` mutant
    (the ratio of the whole gradient when the constant scales the whole loss);
    ``grads`` one float64 array per tensor, in structure order.
    """

    kind: str
    layer: str | None
    where: str
    detail: str
    factor: float | None
    grads: tuple[np.ndarray, ...]


def _sigmoid(x: np.ndarray) -> np.ndarray:
    """Logistic without overflow: exp is only taken of -|x|."""
    e = np.exp(-np.abs(x))
    return np.where(x >= 0, 1.0 / (1.0 + e), e / (1.0 + e))


def _softmax(z: np.ndarray, axes: tuple, log: bool) -> np.ndarray:
    shifted = z - np.max(z, axis=axes, keepdims=True)
    out = shifted - np.log(np.sum(np.exp(shifted), axis=axes, keepdims=True))
    return out if log else np.exp(out)


_FORWARD = {"logistic": _sigmoid, "softplus": lambda z: np.logaddexp(z, 0.0)}
#: Transfer functions whose derivative, formula and common slips come from the registry.
_REGISTERED = ("logistic", "tanh", "relu", "softplus", "leaky-relu")
#: Correct local derivative of each transfer function from its input z and output a.
_DERIV: dict[str, Callable[[np.ndarray, np.ndarray], np.ndarray]] = {
    "exp": lambda z, a: a, "log": lambda z, a: 1 / z, **{n: TRANSFERS[n].derivative for n in _REGISTERED}}
_FORMULA = {"exp": "exp(z)", "log": "1/z", **{n: TRANSFERS[n].formula for n in _REGISTERED}}
#: Derivative evaluated at the output a instead of the input z (same value for ReLU: omitted).
_AT_OUTPUT: dict[str, tuple[str, Callable[[np.ndarray, np.ndarray], np.ndarray]]] = {
    "exp": ("exp(a)", lambda z, a: np.exp(np.minimum(a, 700.0))),
    **{n: at for n in _REGISTERED if (at := TRANSFERS[n].at_output) is not None}}
#: The other common unit's derivative in place of this one's: (description, multiplier).
_SWAPPED = {n: list(TRANSFERS[n].swapped) for n in _REGISTERED if TRANSFERS[n].swapped}
_NAMES = {"relu": "ReLU max(z, 0)", "leaky-relu": f"leaky ReLU (slope {LEAKY_SLOPE} below 0)"}


def _block(prog: Program, u: int, v: int) -> frozenset | None:
    """Steps computing ``v`` from ``u`` alone, if none of their other outputs is used elsewhere."""
    inner: set[int] = set()
    stack, reached = [v], False
    while stack:
        i = stack.pop()
        if i == u or not prog.active[i]:
            reached = reached or i == u
            continue
        k = prog.producer[i]
        if k is None:
            return None  # another parameter enters: v is not a function of u alone
        if k not in inner:
            inner.add(k)
            stack.extend(prog.steps[k].ins)
    for k in inner:
        for o in prog.steps[k].outs:
            # consumers without cotangents (masks such as z > 0) do not leak gradient
            outside = [c for c in prog.consumers[o] if c not in inner and prog.float_outs(c)]
            if o != v and (o == prog.loss_id or outside):
                return None
    return frozenset(inner) if reached else None


def _recognise(prog: Program, u: int, v: int, axes: list[tuple]) -> tuple | None:
    """(fn, inner steps, axes) when ``v`` equals a known function of ``u`` computed from ``u`` alone."""
    if prog.shapes[v] != prog.shapes[u] or not prog.active[u]:
        return None
    z, a = prog.values[u], prog.values[v]
    tests: list[tuple[str, Callable[[np.ndarray], np.ndarray], tuple]] = [
        (fn, f, ()) for fn, f in _FORWARD.items()]
    tests += [(name, functools.partial(_softmax, axes=ax, log=name == "log-softmax"), ax)
              for ax in axes[:1] for name in ("softmax", "log-softmax")]
    for fn, f, ax in tests:
        with np.errstate(all="ignore"):
            want = f(z)
            ok = np.max(np.abs(a - want), initial=0.0) <= _MATCH * (1 + np.max(np.abs(want), initial=0.0))
        inner = _block(prog, u, v) if ok else None
        if inner is not None:
            return fn, inner, ax
    return None


def _composites(prog: Program) -> list[tuple]:
    """Written-out logistic, softplus, softmax and log-softmax: (fn, u, v, end, inner, axes).

    Each starts at an ``exp``; its input z is the exp's argument or what the
    ``neg``/``abs``/``sub`` before it (``-z``, ``z - max z``) were applied to. The
    first value within a few steps downstream that equals one of the functions of
    z, computed from z alone, ends it.
    """
    found = []
    for k, step in enumerate(prog.steps):
        if step.name != "exp" or not prog.active[step.outs[0]]:
            continue
        e, cands = step.outs[0], [step.ins[0]]
        for _ in range(3):  # -z, z - max(z), -|z - 0|: the outermost candidate is tried first
            p = prog.producer[cands[0]]
            if p is None or prog.steps[p].name not in ("neg", "abs", "sub"):
                break
            cands.insert(0, prog.steps[p].ins[0])
        axes = [tuple(prog.steps[c].params["axes"]) for c in prog.consumers[e]
                if prog.steps[c].name == "reduce_sum"]
        later, reached = [], {e}
        for j in range(k + 1, min(len(prog.steps), k + 1 + _WINDOW)):
            if reached.intersection(prog.steps[j].ins):
                reached.update(prog.steps[j].outs)
                later.append(j)
        hit = next(((u, j, m) for u in cands for j in later
                    for m in [_recognise(prog, u, prog.steps[j].outs[0], axes)] if m is not None), None)
        if hit is not None:
            u, j, (fn, inner, ax) = hit
            found.append((fn, u, prog.steps[j].outs[0], j, inner, ax))
    return found


def _multiplier_rule(u: int, d: np.ndarray) -> Callable:
    """The input's cotangent is the output's times ``d`` (a transfer function's local derivative)."""
    return lambda cts, default: [(u, cts[0] * d)]


def _scaled_rule(factor: float, positions: tuple, at: int) -> Callable:
    """The correct rule with the cotangent of input ``at`` scaled by ``factor``."""
    return lambda cts, default: [(i, c * factor if p == at else c) for p, (i, c) in zip(positions, default)]


def _transposed_rule(prog: Program, k: int, w_pos: int, positions: tuple, propagate: bool) -> Callable:
    """Backward of a product with a square weight that uses the weight (or its gradient) transposed."""
    import jax
    step = prog.steps[k]
    other = 1 - w_pos

    def rule(cts: list, default: list) -> list:
        out = []
        for p, (i, c) in zip(positions, default):
            if propagate and p == other:
                args = [prog.values[x] for x in step.ins]
                args[w_pos] = args[w_pos].T

                def f(x: Any, args: list = args) -> Any:
                    full = list(args)
                    full[other] = x
                    return step.primitive.bind(*full, **step.params)
                c = jax.vjp(f, args[other])[1](cts[0])[0]
            elif not propagate and p == w_pos:
                c = c.T
            out.append((i, c))
        return out
    return rule


def _leaky_site(prog: Program, k: int) -> list[tuple]:
    """Leaky ReLU ending at step ``k``: ``where(z > 0, z, c z)`` (a ``select_n``) or ``max(z, c z)``.

    The input z is one of the step's inputs or an input of the multiplication feeding it;
    the output must equal the registry's leaky ReLU of z and be computed from z alone.
    """
    step, v = prog.steps[k], prog.steps[k].outs[0]
    cands = list(step.ins)
    for i in step.ins:
        p = prog.producer[i]
        if p is not None and prog.steps[p].name == "mul":
            cands += prog.steps[p].ins
    leaky = TRANSFERS["leaky-relu"].numpy_forward
    for u in dict.fromkeys(cands):
        if not prog.active[u] or prog.shapes[u] != prog.shapes[v]:
            continue
        z, a = np.asarray(prog.values[u]), np.asarray(prog.values[v])
        if not np.issubdtype(z.dtype, np.floating) or not np.any(z < 0):
            continue  # without negative entries it cannot be told from the identity or ReLU
        want = leaky(z)
        if np.max(np.abs(a - want), initial=0.0) <= _MATCH * (1 + np.max(np.abs(want), initial=0.0)):
            inner = _block(prog, u, v)
            if inner is not None:
                return [("leaky-relu", u, v, k, inner, ())]
    return []


def _transfer_specs(prog: Program) -> list[tuple]:
    """(Mutant without grads, Mutation) for each transfer function and softmax of the trace."""
    sites = []
    composites = _composites(prog)
    covered = set().union(*[c[4] for c in composites]) if composites else set()
    for k, step in enumerate(prog.steps):
        if k in covered or not prog.float_outs(k):
            continue
        if step.name in ("logistic", "tanh", "exp", "log") and prog.active[step.ins[0]]:
            sites.append((step.name, step.ins[0], step.outs[0], k, frozenset({k}), ()))
        elif step.name == "max" and len(step.ins) == 2:
            consts = [prog.scalar_constant(i) for i in step.ins]
            for p in (0, 1):
                if consts[1 - p] == 0.0 and prog.active[step.ins[p]]:
                    sites.append(("relu", step.ins[p], step.outs[0], k, frozenset({k}), ()))
        if step.name in ("select_n", "max"):
            sites += _leaky_site(prog, k)
    sites += composites
    specs = []
    for fn, u, v, end, inner, axes in sorted(sites, key=lambda s: s[3]):
        z, a, layer = prog.values[u], prog.values[v], prog.step_layer[end]
        skip = inner - {end}

        def spec(kind: str, d: np.ndarray, where: str, detail: str, u: int = u, layer: Any = layer,
                 end: int = end, skip: frozenset = skip) -> tuple:
            rule = _multiplier_rule(u, np.asarray(d, dtype=np.float64))
            return Mutant(kind, layer, where, detail, None, ()), Mutation({end: rule}, skip)
        if fn in ("softmax", "log-softmax"):
            s = _softmax(z, axes, False)
            where = f"{fn} over axis {', '.join(map(str, axes))} in layer {layer}"
            if fn == "softmax":
                d, diag = s * (1 - s), "s*(1-s) of the softmax Jacobian diag(s) - s s^T"
            else:
                d, diag = 1 - s, "1 - s of the log-softmax Jacobian I - 1 s^T"
            specs.append(spec("partial-softmax-jacobian", d, where,
                              f"The backward pass seems to keep only the diagonal {diag}; use the full "
                              "Jacobian, which with cross-entropy gives s - y per example."))
            continue
        name, formula = _NAMES.get(fn, fn), _FORMULA[fn]
        where = f"{name} in layer {layer}"
        with np.errstate(all="ignore"):
            right = _DERIV[fn](z, a)
            specs.append(spec("missing-transfer-derivative", np.ones_like(z), where,
                              f"The backward pass seems to pass the gradient through the {name} without "
                              f"its derivative {formula}; multiply by it."))
            if fn != "relu":
                specs.append(spec("extra-transfer-derivative", right * right, where,
                                  f"The backward pass seems to multiply by the {name}'s derivative "
                                  f"{formula} twice; apply it once."))
            if fn in _AT_OUTPUT:
                text, f = _AT_OUTPUT[fn]
                specs.append(spec("transfer-derivative-misplaced", f(z, a), where,
                                  f"The backward pass seems to evaluate the {name}'s derivative at its "
                                  f"output a, as {text}; at the input z it is {formula} with a = {fn}(z)."))
            for text, f in _SWAPPED.get(fn, ()):
                specs.append(spec("transfer-derivative-misplaced", f(z, a), where,
                                  f"The backward pass seems to use {text}; for a {name} unit use "
                                  f"{formula}."))
    return specs


def _product_specs(prog: Program, paths: dict[int, str]) -> list[tuple]:
    """Both transposition slips for each product with a square weight (a parameter, maybe moved)."""
    specs = []
    for k, step in enumerate(prog.steps):
        if step.name != "dot_general" or not prog.float_outs(k) or len(step.ins) != 2:
            continue
        positions, layer = prog.active_positions(k), prog.step_layer[k]
        for w in (0, 1):
            shape, source = prog.shapes[step.ins[w]], prog.origin(step.ins[w])
            if len(shape) != 2 or shape[0] != shape[1] or source not in paths or w not in positions:
                continue
            path = paths[source]
            where = f"product with {path} in layer {layer}"
            for propagate, detail in (
                    (True, f"The backward pass seems to send the gradient back through {path} where its "
                     "transpose belongs (e.g. delta @ W instead of delta @ W.T for x @ W); transpose it."),
                    (False, f"The gradient of {path} seems to come out transposed (e.g. delta.T @ x instead "
                     "of x.T @ delta for x @ W); swap the operands of that product.")):
                specs.append((Mutant("transposed", layer, where, detail, None, ()),
                              Mutation({k: _transposed_rule(prog, k, w, positions, propagate)})))
    return specs


def _scale_specs(prog: Program) -> list[tuple]:
    """A dropped and a doubled factor for each multiplication or division by a constant number."""
    specs = []
    for k, step in enumerate(prog.steps):
        if step.name not in ("mul", "div") or not prog.float_outs(k) or len(step.ins) != 2:
            continue
        positions, layer = prog.active_positions(k), prog.step_layer[k]
        for p in ((0, 1) if step.name == "mul" else (0,)):
            c = prog.scalar_constant(step.ins[1 - p])
            if c is None or c == 0.0 or not np.isfinite(c) or p not in positions:
                continue
            op = f"multiplication by {c:g}" if step.name == "mul" else f"division by {c:g}"
            dropped = 1.0 / c if step.name == "mul" else c
            for factor, how in ((dropped, "leave out"), (1.0 / dropped, "apply twice")):
                specs.append((Mutant("scaled", layer, f"{op} in layer {layer}",
                                     f"The backward pass seems to {how} the factor of the {op}, so the gradient "
                                     f"through it is {factor:g} times the right one; apply it exactly once.",
                                     factor, ()), Mutation({k: _scaled_rule(factor, positions, p)})))
    return specs


def _numbered(specs: list[tuple]) -> list[tuple]:
    """Tell apart sites that would read the same (two logistics in one layer, say)."""
    sites: dict[tuple, int] = {}
    for m, mutation in specs:
        sites.setdefault((m.where, min(mutation.rules)), sum(w == m.where for w, _ in sites) + 1)
    return [(m if sites[m.where, min(mu.rules)] == 1 else
             replace(m, where=f"{m.where} (occurrence {sites[m.where, min(mu.rules)]})"), mu) for m, mu in specs]


def misfit(claimed: Sequence[np.ndarray], grads: Sequence[np.ndarray]) -> float:
    """Largest per-tensor ``||claimed - grads|| / max(||claimed||, ||grads||)`` (0 when both vanish).

    Example:
        >>> misfit([np.array([1.0, 0.0])], [np.array([2.0, 0.0])])
        0.5
    """
    worst = 0.0
    for c, g in zip(claimed, grads):
        c, g = np.asarray(c, dtype=np.float64), np.asarray(g, dtype=np.float64)
        if not (np.all(np.isfinite(c)) and np.all(np.isfinite(g))):
            return float("inf")
        den = max(float(np.linalg.norm(c.ravel())), float(np.linalg.norm(g.ravel())), np.finfo(float).tiny)
        worst = max(worst, float(np.linalg.norm((c - g).ravel())) / den)
    return worst


def build_mutants(fun: Callable[[Any], Any], leaves: Sequence[np.ndarray], structure: Any, *,
                  max_mutants: int = 200) -> tuple[Mutant, ...]:
    """The gradients a backward pass of ``fun`` with one typical mistake would produce.

    Args:
        fun: ``fun(tree) -> scalar``, traceable by JAX (data and ``xp`` already bound).
        leaves: one float array per tensor of ``structure``.
        structure: the :class:`gradcheck._core.tree.Structure` of the parameters.
        max_mutants: keep at most this many, in catalogue order (transfer functions,
            softmax, products, scale constants, sign).

    Returns:
        Mutants whose gradient differs from the correct one by more than 1e-6
        (relative, per tensor); those closer could not be told from a correct pass.

    Raises:
        InputError: for leaves that do not match ``structure`` or a non-scalar loss.
    """
    import jax
    if not callable(fun):
        raise input_error("fun", "a callable tree -> scalar", describe(fun), "Pass the loss function.")
    if len(leaves) != len(structure.tensors):
        raise input_error("leaves", f"{len(structure.tensors)} arrays, one per tensor of the structure",
                          f"{len(leaves)}", "Pass the leaves returned by flatten(params) with its structure.")
    if isinstance(max_mutants, bool) or not isinstance(max_mutants, (int, np.integer)) or max_mutants < 0:
        raise input_error("max_mutants", "a non-negative integer", repr(max_mutants), "Pass e.g. 200.")
    arrays = [np.asarray(leaf, dtype=np.float64).reshape(t.shape) for leaf, t in zip(leaves, structure.tensors)]
    with jax.enable_x64(True):
        prog = trace_program(fun, arrays, structure)
        paths = dict(zip(prog.param_ids, structure.paths))
        specs = _numbered(_transfer_specs(prog) + _product_specs(prog, paths) + _scale_specs(prog))
        rows = prog.gradients(arrays, [mutation for _, mutation in specs])
    correct = tuple(g[0] for g in rows)
    out = []
    for r, (m, _) in enumerate(specs, start=1):
        grads = tuple(np.ascontiguousarray(g[r]) for g in rows)
        if misfit(correct, grads) > _DISTINCT:
            out.append(replace(m, grads=grads))
    if misfit(correct, [np.zeros_like(c) for c in correct]) > 0.0:
        out.append(Mutant("sign-flip", None, "the gradient of the loss as a whole", "Every gradient has the "
                          "wrong sign, as if the error were taken as target minus output or a descent step's "
                          "minus sign were folded in; return the loss's own gradient.", -1.0,
                          tuple(-c for c in correct)))
    return tuple(out[:max_mutants])


def rank_mutants(mutants: Sequence[Mutant], claimed: Sequence[np.ndarray], *,
                 tolerance: float) -> tuple[tuple[Mutant, float], ...]:
    """Every mutant with its :func:`misfit` to ``claimed``, best first.

    A mutant *explains* the claims when its misfit is at most ``tolerance``. The
    explaining mutants come first in catalogue order (their misfits differ only by
    rounding, which should not pick the diagnosis), then the rest by misfit.

    Raises:
        InputError: for a negative or non-finite tolerance, or claims that do not
            match the mutants' tensors in number or shape.
    """
    if not (isinstance(tolerance, (float, int, np.floating)) and np.isfinite(tolerance) and tolerance >= 0):
        raise input_error("tolerance", "a finite number >= 0", repr(tolerance), "Pass e.g. tolerance=1e-8.")
    claimed = tuple(np.asarray(c, dtype=np.float64) for c in claimed)
    for m in mutants:
        if [g.shape for g in m.grads] != [c.shape for c in claimed]:
            raise input_error("claimed", f"{len(m.grads)} arrays shaped {[g.shape for g in m.grads]}",
                              f"{len(claimed)} shaped {[c.shape for c in claimed]}",
                              "Pass the claimed gradients flattened in the structure's order.")
    scored = [(m, misfit(claimed, m.grads)) for m in mutants]
    worse = [f > tolerance for _, f in scored]
    order = sorted(range(len(scored)), key=lambda i: (worse[i], worse[i] * scored[i][1], i))
    return tuple(scored[i] for i in order)
