"""The autodiff reference: JAX on the CPU, 64-bit, imported only when used.

Three routes, tried in order:

1. ``xp``: the loss takes a keyword ``xp`` (an array namespace, as in the Python
   array API standard); it is called with ``xp=jax.numpy``.
2. ``traced``: the loss is JAX-traceable as written (it uses jax.numpy itself, or
   only operators that JAX arrays overload).
3. otherwise autodiff is unavailable for this loss, which is reported, not raised.

Autodiff differentiates the user's own forward exactly (to rounding), which makes
it the tightest reference when it exists; the numerical references then serve to
confirm it, and entries where the two disagree (kinks) are not judged.
"""

from __future__ import annotations

import inspect
from dataclasses import dataclass
from typing import Any, Callable, Sequence

import numpy as np

from .._core.precision import EPS64, ROUNDOFF_SAFETY, rounding_scale
from .._core.tree import Structure
from .finite_difference import Estimate
from .registry import accuracy

__all__ = ["Traced", "accepts_keyword", "trace", "autodiff_estimate"]


def accepts_keyword(fn: Callable, name: str) -> bool:
    """Whether ``fn`` takes a keyword argument called ``name`` explicitly."""
    try:
        params = inspect.signature(fn).parameters
    except (TypeError, ValueError):
        return False
    p = params.get(name)
    return p is not None and p.kind in (p.KEYWORD_ONLY, p.POSITIONAL_OR_KEYWORD)


@dataclass(frozen=True)
class Traced:
    """A loss made into a pure JAX function of the parameter leaves.

    Attributes:
        route: ``xp`` or ``traced``.
        fun: ``fun(leaves) -> scalar`` (a list of arrays in structure order), JAX-traceable.
        order: tensor indices ordered by first use in the trace (input to output).
    """

    route: str
    fun: Callable[[Sequence[Any]], Any]
    order: tuple[int, ...]


def _jax():
    import jax  # lazy: only the autodiff route pays for importing JAX

    return jax


def _unavailable_reason(exc: BaseException) -> str:
    name = type(exc).__name__
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
    if "Tracer" in name or "Concretization" in name or "Tracer" in text:
        return f"the loss is not JAX-traceable as written ({name}); give it an `xp` keyword to enable this route"
    return f"tracing the loss raised {name}: {text[:120]}"


def trace(loss: Callable, structure: Structure, base: Sequence[np.ndarray], data: tuple,
          kwargs: dict | None = None) -> Traced | str:
    """Make the loss a JAX function of its leaves, or return why that is not possible."""
    try:
        jax = _jax()
    except ImportError as exc:  # pragma: no cover - jax is a dependency, but may be broken on a machine
        return f"JAX could not be imported ({exc})"
    import jax.numpy as jnp

    extra = dict(kwargs or {})
    routes = []
    if accepts_keyword(loss, "xp"):
        routes.append(("xp", {**extra, "xp": jnp}))
    routes.append(("traced", extra))
    reason = "no route"
    with jax.enable_x64(True):
        for route, kw in routes:
            def fun(leaves, _kw=kw):
                tree = structure.rebuild(list(leaves))
                out = jnp.asarray(loss(tree, *data, **_kw))
                return jnp.reshape(out, (-1,))[0] if out.size == 1 else out
            try:
                jaxpr = jax.make_jaxpr(fun)([jnp.asarray(b) for b in base])
            except Exception as exc:  # any failure to trace just closes this route
                reason = _unavailable_reason(exc)
                continue
            if jaxpr.out_avals[0].shape != () or not jnp.issubdtype(jaxpr.out_avals[0].dtype, jnp.floating):
                reason = f"the traced loss returns {jaxpr.out_avals[0]}, not a real scalar"
                continue
            return Traced(route, fun, _first_use_order(jaxpr, len(base)))
    return reason


def _first_use_order(closed_jaxpr: Any, n: int) -> tuple[int, ...]:
    """Order tensors by the index of the first equation that reads them (forward order)."""
    jaxpr = closed_jaxpr.jaxpr
    position = {id(v): i for i, v in enumerate(jaxpr.invars[:n])}
    first = [len(jaxpr.eqns)] * n
    for e, eqn in enumerate(jaxpr.eqns):
        for v in eqn.invars:
            i = position.get(id(v))
            if i is not None and first[i] > e:
                first[i] = e
    return tuple(sorted(range(n), key=lambda i: (first[i], i)))


def autodiff_estimate(traced: Traced, base: Sequence[np.ndarray], f0: float) -> Estimate | str:
    """Reverse-mode gradient of the traced loss at ``base``, in float64.

    Its accuracy is that of evaluating the user's forward and its chain rule in
    float64: relative 1e-12 is generous; the absolute part is the same rounding
    floor the numerical references use, scaled by the entry's magnitude.
    """
    jax = _jax()
    import jax.numpy as jnp

    with jax.enable_x64(True):
        try:
            # compiled as one program: op-by-op dispatch of a new shape's gradient measured 0.6-1.0 s
            # per network (about 39 small compilations), the jitted gradient 0.10-0.15 s
            grads = jax.jit(jax.grad(traced.fun))([jnp.asarray(b) for b in base])
        except Exception as exc:  # tracing worked, differentiation did not
            return f"jax.grad failed on the loss ({type(exc).__name__}: {str(exc)[:120]})"
        values = tuple(np.asarray(g, dtype=np.float64).reshape(np.shape(b)) for g, b in zip(grads, base))
    if not all(np.all(np.isfinite(v)) for v in values):
        return "autodiff returned NaN or Inf (a non-differentiable operation such as sqrt at 0)"
    atol = tuple(ROUNDOFF_SAFETY * EPS64 * rounding_scale(f0) / np.maximum(np.abs(b), 1.0) for b in base)
    return Estimate("autodiff", values, atol, rtol=accuracy("autodiff"))
