"""Trace a loss to one flat list of primitive steps and run its reverse pass step by step.

``jax.nn`` and ``jax.numpy`` functions reach a jaxpr as nested ``jit`` or
``custom_jvp_call`` calls; the mutation catalogue must see the primitives inside,
so :func:`trace_program` inlines every call with one inner jaxpr into a flat
:class:`Program`. Each step's reverse rule is ``jax.vjp`` of that primitive's own
``bind``, the rule ``jax.grad`` applies, so the unmutated pass matches ``jax.grad``
to rounding. :meth:`Program.gradients` runs the correct pass and every mutant at
once: cotangents carry a leading *row* axis (row 0 correct, row ``r`` with the
rules of mutation ``r``), and a linear pass never mixes rows. Compiling that with
XLA takes 0.5 s or more while running it takes microseconds, so it runs with numpy
stand-ins for the primitives (:data:`_NUMPY`) and is compiled only if one is missing.

Inlining forgets custom derivative rules: a ``custom_jvp``/``custom_vjp`` function is
differentiated through its primal code, exact for the ``jax.nn`` activations (up to
ties such as ReLU at 0) but not for deliberate rules such as gradient clipping.
``cond``, ``scan`` and ``while`` stay opaque steps.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, Mapping, Sequence

import numpy as np

__all__ = ["Step", "Program", "Mutation", "trace_program", "PASSTHROUGH"]

#: Primitives that move or retype values without arithmetic; followed to find a value's origin.
PASSTHROUGH = frozenset({"broadcast_in_dim", "reshape", "convert_element_type", "squeeze",
                         "expand_dims", "transpose", "stop_gradient", "copy", "copy_p"})
#: A replacement rule: (cotangents of the step's float outputs, the correct
#: ``[(slot, cotangent)]`` pairs) -> the ``[(slot, cotangent)]`` pairs to use instead.
Rule = Callable[[list, list], list]


@dataclass(frozen=True)
class Step:
    """One primitive application: ``outs = primitive.bind(*ins, **params)`` on slot ids."""

    primitive: Any
    params: Mapping[str, Any]
    ins: tuple[int, ...]
    outs: tuple[int, ...]

    @property
    def name(self) -> str:
        return self.primitive.name


@dataclass(frozen=True)
class Mutation:
    """Replacement rules for some steps, and the steps whose cotangents are dropped."""

    rules: Mapping[int, Rule]
    skip: frozenset = frozenset()


def _inner(eqn: Any) -> Any:
    """The single inner jaxpr of a call-like equation, or None for a genuine primitive."""
    if eqn.primitive.name in ("cond", "while", "scan"):
        return None
    for key in ("jaxpr", "call_jaxpr", "fun_jaxpr"):
        sub = eqn.params.get(key)
        inner = sub.jaxpr if hasattr(sub, "consts") else sub
        if hasattr(inner, "eqns") and (len(inner.invars), len(inner.outvars)) == (len(eqn.invars),
                                                                                   len(eqn.outvars)):
            return sub
    return None


def _walk(closed: Any, args: Sequence[Any], const: Callable, apply: Callable) -> list:
    """Interpret a (closed) jaxpr, inlining nested calls: ``const(value, dtype)`` makes
    constants and literals, ``apply(eqn, inputs)`` runs one primitive equation."""
    from jax.extend.core import Literal
    jaxpr, consts = (closed.jaxpr, closed.consts) if hasattr(closed, "consts") else (closed, ())
    env: dict[Any, Any] = {v: const(c, None) for v, c in zip(jaxpr.constvars, consts)}
    env.update(zip(jaxpr.invars, args))

    def read(atom: Any) -> Any:
        return const(atom.val, getattr(atom.aval, "dtype", None)) if isinstance(atom, Literal) else env[atom]

    for eqn in jaxpr.eqns:
        ins = [read(a) for a in eqn.invars]
        sub = _inner(eqn)
        env.update(zip(eqn.outvars, _walk(sub, ins, const, apply) if sub is not None else apply(eqn, ins)))
    return [read(v) for v in jaxpr.outvars]


class Program:
    """A flattened loss: slots (ids into :attr:`values`) for every value, steps between them.

    Each slot knows its producing step (``None`` for parameters and constants) and
    whether it depends on a parameter (*active*); each step carries a layer label.
    """

    def __init__(self, layers: Sequence[str]):
        self.steps: list[Step] = []
        self.values: list[Any] = []
        self.shapes: list[tuple] = []
        self.dtypes: list[np.dtype] = []
        self.producer: list[int | None] = []
        self.active: list[bool] = []
        self.consumers: list[list[int]] = []
        self.step_layer: list[str | None] = []
        self.param_ids: list[int] = []
        self.loss_id = -1
        self._layers = list(layers)
        self._consts: dict[int, np.ndarray] = {}
        self._label: list[tuple] = []  # per slot: (layer, time it joined, depends on data, fresh)
        self._diff: dict[int, tuple] = {}  # step -> (active input positions, float output positions)

    # ----- building -------------------------------------------------------------------------
    def _slot(self, shape: tuple, dtype: Any, producer: int | None, active: bool, label: tuple) -> int:
        self.shapes.append(tuple(shape))
        self.dtypes.append(np.dtype(dtype))
        self.producer.append(producer)
        self.active.append(active)
        self.consumers.append([])
        self._label.append(label)
        self.values.append(None)
        return len(self.shapes) - 1

    def add_param(self, shape: tuple, index: int) -> int:
        self.param_ids.append(self._slot(shape, np.float64, None, True, (self._layers[index], -1, False, True)))
        return self.param_ids[-1]

    def add_const(self, value: Any, dtype: Any = None) -> int:
        arr = np.asarray(value, dtype=dtype)
        i = self._slot(arr.shape, arr.dtype, None, False, (None, -1, arr.size > 1, False))
        self._consts[i] = self.values[i] = arr
        return i

    def _label_step(self, k: int, ins: Sequence[int], passthrough: bool) -> tuple:
        """Layer of a step: the parameter that joined its data path most recently.

        A parameter reached only through data movement (``W.T``, a broadcast bias)
        is *fresh* and joins at the consuming step. Parameter-only side chains
        (weight decay) lose to the data path and to fresh parameters; the rest
        compare by when their layer joined, so ``h @ W2`` gets ``W2``'s layer and
        all after it (activation, loss, its scale constants) stays in that layer.
        """
        labels = [self._label[i] for i in ins if self._label[i][0] is not None]
        data = any(self._label[i][2] for i in ins)
        if passthrough and len(labels) == 1 and labels[0][3]:
            return labels[0]
        cands = [(layer, k if fresh else t, d, fresh) for layer, t, d, fresh in labels]
        if any(c[2] or c[3] for c in cands):
            cands = [c for c in cands if c[2] or c[3]]
        best = max(cands, key=lambda c: c[1], default=(None, -1))
        return (best[0], best[1], data, False)

    def add_step(self, eqn: Any, ins: list[int]) -> list[int]:
        if not eqn.outvars:
            return []  # effects only (debug callbacks): nothing to differentiate
        k = len(self.steps)
        act = tuple(p for p, i in enumerate(ins) if self.active[i] and np.issubdtype(self.dtypes[i], np.inexact))
        floats = tuple(n for n, v in enumerate(eqn.outvars) if act and np.issubdtype(v.aval.dtype, np.inexact))
        label = self._label_step(k, ins, eqn.primitive.name in PASSTHROUGH)
        outs = [self._slot(v.aval.shape, v.aval.dtype, k, n in floats, label) for n, v in enumerate(eqn.outvars)]
        self.steps.append(Step(eqn.primitive, dict(eqn.params), tuple(ins), tuple(outs)))
        self.step_layer.append(label[0])
        for i in ins:
            self.consumers[i].append(k)
        if floats:
            self._diff[k] = (act, floats)
        return outs

    # ----- queries --------------------------------------------------------------------------
    def origin(self, i: int) -> int:
        """Follow data-movement steps back to the slot a value was copied from."""
        while True:
            k = self.producer[i]
            if k is None or self.steps[k].name not in PASSTHROUGH or len(self.steps[k].ins) != 1:
                return i
            i = self.steps[k].ins[0]

    def scalar_constant(self, i: int) -> float | None:
        """The value of a slot that is one number independent of the parameters, else None."""
        o = self.origin(i)
        if self.active[i] or self.active[o] or int(np.prod(self.shapes[o])) != 1:
            return None
        return float(np.asarray(self.values[o]).reshape(()))

    def active_positions(self, k: int) -> tuple[int, ...]:
        """Positions of step ``k``'s inputs that receive cotangents, in the order rules see them."""
        return self._diff[k][0] if k in self._diff else ()

    def float_outs(self, k: int) -> tuple[int, ...]:
        """Slots of step ``k`` that carry cotangents (its float outputs, if it is active)."""
        return tuple(self.steps[k].outs[n] for n in self._diff[k][1]) if k in self._diff else ()

    # ----- evaluation -----------------------------------------------------------------------
    def _forward(self, params: Sequence[Any], pulls: dict | None) -> dict:
        """Bind every step in order (traceable); with ``pulls``, keep each active step's pullback."""
        import jax
        env: dict[int, Any] = dict(self._consts)
        env.update(zip(self.param_ids, params))
        for k, step in enumerate(self.steps):
            args = [env[i] for i in step.ins]
            act, floats = self._diff.get(k, ((), ()))
            split = _split(step, args, act, floats)
            if pulls is not None and floats:
                _, pulls[k], outs = jax.vjp(split, *[args[p] for p in act], has_aux=True)
            else:
                outs = split(*[args[p] for p in act])[1]
            env.update(zip(step.outs, outs))
        return env

    def evaluate(self, leaves: Sequence[np.ndarray], use_numpy: bool = True) -> None:
        """Fill :attr:`values` with every intermediate (they locate sites and weight mutated rules)."""
        ids = [o for s in self.steps for o in s.outs]
        outs = _execute(lambda *p: [self._forward(p, None)[i] for i in ids], leaves, use_numpy)
        for i, v in zip(self.param_ids + ids, list(leaves) + list(outs)):
            self.values[i] = np.asarray(v)

    def gradients(self, leaves: Sequence[np.ndarray], mutations: Sequence[Mutation] = (),
                  use_numpy: bool = True) -> list[np.ndarray]:
        """The correct gradient (row 0) and one row per mutation, from one traced program.

        Returns:
            One float64 array per parameter, shaped ``(1 + len(mutations),) + shape``.
        """
        import jax
        import jax.numpy as jnp
        rows = 1 + len(mutations)
        special: dict[int, list[tuple[int, Rule | None]]] = {}
        for r, m in enumerate(mutations, start=1):
            for k, rule in [(k, None) for k in m.skip] + list(m.rules.items()):
                special.setdefault(k, []).append((r, rule))

        def add(ct: dict, i: int, c: Any, row: int | None = None) -> None:
            if row is not None:  # a one-hot product keeps the traced program free of scatters
                pick = np.zeros((rows,) + (1,) * len(self.shapes[i]))
                pick[row] = 1.0
                c = pick * jnp.reshape(jnp.asarray(c, self.dtypes[i]), self.shapes[i])[None]
            if self.active[i]:
                ct[i] = c + ct[i] if i in ct else c

        def run(*params: Any) -> list:
            pulls: dict[int, Any] = {}
            env = self._forward(params, pulls)
            ct = {self.loss_id: jnp.ones((rows,), env[self.loss_id].dtype)} if self.active[self.loss_id] else {}
            for k in sorted(pulls, reverse=True):
                cts = [ct.pop(o, None) for o in self.float_outs(k)]
                if all(c is None for c in cts):
                    continue
                full = tuple(jnp.zeros((rows,) + self.shapes[o], self.dtypes[o]) if c is None else c
                             for c, o in zip(cts, self.float_outs(k)))
                ins = [self.steps[k].ins[p] for p in self._diff[k][0]]
                dflt = jax.vmap(pulls[k])(full)
                keep = np.ones(rows)
                keep[[r for r, _ in special.get(k, ())]] = 0.0
                for i, d in zip(ins, dflt):
                    add(ct, i, d * keep.reshape((rows,) + (1,) * (d.ndim - 1)))
                for r, rule in special.get(k, ()):
                    for i, c in rule([c[r] for c in full], [(i, d[r]) for i, d in zip(ins, dflt)]) if rule else ():
                        add(ct, i, c, r)
            return [ct[p] if p in ct else jnp.zeros((rows,) + self.shapes[p]) for p in self.param_ids]

        return [np.asarray(g, dtype=np.float64) for g in _execute(run, leaves, use_numpy)]


def _split(step: Step, args: list, act: tuple, floats: tuple) -> Callable:
    """``step`` as a function of its active inputs: (float outputs, all outputs)."""
    def split(*xs: Any) -> tuple:
        full = list(args)
        for p, x in zip(act, xs):
            full[p] = x
        out = step.primitive.bind(*full, **step.params)
        outs = list(out) if step.primitive.multiple_results else [out]
        return tuple(outs[n] for n in floats), outs
    return split


def trace_program(fun: Callable[[Any], Any], leaves: Sequence[Any], structure: Any) -> Program:
    """Trace ``fun(structure.rebuild(leaves))``, flatten it and evaluate every intermediate.

    Args:
        fun: a JAX-traceable function of the parameter pytree returning a scalar.
        leaves: one float array per tensor of ``structure`` (used as float64).
        structure: the :class:`gradcheck._core.tree.Structure` of the parameters.

    Returns:
        The evaluated :class:`Program`; ``program.gradients(leaves)`` is the gradient.

    Example:
        >>> import jax, jax.numpy as jnp
        >>> from gradcheck._core.tree import flatten
        >>> s, leaves = flatten({"w": np.array([1.0, 2.0])})
        >>> with jax.enable_x64(True):
        ...     prog = trace_program(lambda p: jnp.sum(jnp.tanh(p["w"])), leaves, s)
        ...     grads = prog.gradients(leaves)
        >>> np.round(grads[0][0], 6)  # row 0 is the correct pass: 1 - tanh(w)**2
        array([0.419974, 0.070651])
    """
    import jax

    from .._core.errors import input_error
    arrays = [np.asarray(leaf, dtype=np.float64).reshape(t.shape) for leaf, t in zip(leaves, structure.tensors)]
    closed = jax.make_jaxpr(lambda *xs: fun(structure.rebuild(list(xs))))(*arrays)
    out = closed.out_avals
    if len(out) != 1 or out[0].shape != () or not np.issubdtype(out[0].dtype, np.floating):
        got = ", ".join(f"{a.dtype}{list(a.shape)}" for a in out)
        raise input_error("loss", "one float scalar", f"outputs {got}",
                          "Return the loss reduced to a single number (sum or mean over the batch).")
    prog = Program([t.layer for t in structure.tensors])
    params = [prog.add_param(a.shape, n) for n, a in enumerate(arrays)]
    prog.loss_id = _walk(closed, params, prog.add_const, prog.add_step)[0]
    prog.evaluate(arrays)
    return prog


#: For the rare program that must be compiled: it runs once on tiny arrays, so compile
#: time is everything; optimisation level 0 roughly halves it, the arithmetic is the same.
_FAST_COMPILE: dict[str, Any] = {"xla_backend_optimization_level": 0, "xla_llvm_disable_expensive_passes": True}


class _Unsupported(Exception):
    """A primitive without a numpy stand-in: compile instead."""


def _np_apply(eqn: Any, ins: list) -> list:
    if eqn.primitive.name not in _NUMPY or len(eqn.outvars) != 1:
        raise _Unsupported(eqn.primitive.name)
    aval = eqn.outvars[0].aval
    return [np.asarray(_NUMPY[eqn.primitive.name](*ins, **eqn.params), aval.dtype).reshape(aval.shape)]


def _execute(fun: Callable, args: Sequence[Any], use_numpy: bool) -> list:
    """Run ``fun`` once: traced and evaluated with numpy stand-ins if it can be, else compiled."""
    import jax
    if use_numpy:
        closed = jax.make_jaxpr(fun)(*args)
        try:
            with np.errstate(all="ignore"):
                return _walk(closed, args, lambda v, dtype: np.asarray(v, dtype), _np_apply)
        except _Unsupported:
            pass
    return jax.jit(fun).lower(*args).compile(_FAST_COMPILE)(*args)


def _np_dot(a: np.ndarray, b: np.ndarray, dimension_numbers: Any, **_: Any) -> np.ndarray:
    """``lax.dot_general`` as an einsum: batch axes, then free axes of a, then of b."""
    (ca, cb), (ba, bb) = dimension_numbers
    sa, sb = [chr(97 + i) for i in range(a.ndim)], [chr(110 + j) for j in range(b.ndim)]
    for i, j in list(zip(ca, cb)) + list(zip(ba, bb)):
        sb[j] = sa[i]
    out = [sa[i] for i in ba] + [sa[i] for i in range(a.ndim) if i not in ca and i not in ba]
    out += [sb[j] for j in range(b.ndim) if j not in cb and j not in bb]
    return np.einsum(f"{''.join(sa)},{''.join(sb)}->{''.join(out)}", a, b)


def _np_broadcast(x: np.ndarray, shape: tuple, broadcast_dimensions: tuple, **_: Any) -> np.ndarray:
    full = [1] * len(shape)
    for d, n in zip(broadcast_dimensions, x.shape):
        full[d] = n
    return np.broadcast_to(x.reshape(full), shape)


def _reduction(g: Callable) -> Callable:
    return lambda x, axes, **_: g(x, axis=tuple(axes))


def _plain(f: Callable) -> Callable:
    return lambda *xs, **_: f(*xs)


#: numpy stand-ins for the primitives of typical losses and their pullbacks (single output).
_NUMPY: dict[str, Callable] = {
    **{n: _plain(f) for n, f in dict[str, Callable]({
        "neg": np.negative, "exp": np.exp, "log": np.log, "log1p": np.log1p, "expm1": np.expm1,
        "tanh": np.tanh, "abs": np.abs, "sqrt": np.sqrt, "sign": np.sign, "square": np.square,
        "logistic": lambda x: 0.5 * (1.0 + np.tanh(0.5 * x)), "rsqrt": lambda x: 1.0 / np.sqrt(x),
        "stop_gradient": lambda x: x, "copy": lambda x: x, "copy_p": lambda x: x, "sin": np.sin,
        "cos": np.cos, "exp2": np.exp2, "is_finite": np.isfinite, "not": np.invert,
        "add": np.add, "sub": np.subtract, "mul": np.multiply, "max": np.maximum, "min": np.minimum,
        "pow": np.power, "ne": np.not_equal, "eq": np.equal, "gt": np.greater, "lt": np.less,
        "ge": np.greater_equal, "le": np.less_equal, "add_any": np.add, "and": np.bitwise_and,
        "or": np.bitwise_or, "select_n": lambda p, *cases: np.choose(np.asarray(p).astype(int), cases),
        "clamp": lambda lo, x, hi: np.clip(x, lo, hi)}).items()},
    "argmax": lambda x, axes, index_dtype, **_: np.argmax(x, axis=axes[0]).astype(index_dtype),
    "div": lambda x, y, **_: np.true_divide(x, y) if np.issubdtype(np.result_type(x, y), np.inexact)
    else np.fix(np.true_divide(x, y)),
    "integer_pow": lambda x, y, **_: x ** y,
    "dot_general": _np_dot,
    "broadcast_in_dim": _np_broadcast,
    "reshape": lambda x, new_sizes, **_: np.reshape(x, new_sizes),
    "squeeze": lambda x, dimensions, **_: np.squeeze(x, axis=tuple(dimensions)),
    "expand_dims": lambda x, dimensions, **_: np.expand_dims(x, tuple(dimensions)),
    "transpose": lambda x, permutation, **_: np.transpose(x, permutation),
    "convert_element_type": lambda x, new_dtype, **_: np.asarray(x).astype(new_dtype),
    **{f"reduce_{n}": _reduction(g) for n, g in (("sum", np.sum), ("max", np.max), ("min", np.min))},
    "slice": lambda x, start_indices, limit_indices, strides, **_: x[tuple(
        slice(a, b, c) for a, b, c in zip(start_indices, limit_indices, strides or [None] * x.ndim))],
}
