"""Vectorised evaluation of a JAX-traceable loss at many perturbed points at once.

When the loss can be traced by JAX (``_autodiff.trace``), the loss values that
central differences or Richardson extrapolation need are computed by one
compiled, vectorised function (``jax.vmap`` over perturbations) per chunk,
instead of one Python call per point. Every value is still a genuine
evaluation of the loss at a perturbed point, so the result is a numerical
reference with the same steps as the Python loop (``_references.finite_difference``); it differs
from the loop's only by the rounding of the loss itself, since XLA may sum in
another order than numpy.

All tensors are handled by one compiled function: the params are laid end to
end in one flat vector, a perturbation is ``(flat index, new value)``, and the
perturbed copy is ``where(positions == index, value, theta)``, which compiles
to a vectorised select rather than a scatter. A chunk of ``B`` perturbations
holds ``B`` perturbed copies of the params, and ``B`` is chosen so that those
copies take at most :data:`BATCH_BYTES`, which bounds memory however large the
network is (a million-parameter network gets chunks of two).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Callable, Sequence

import numpy as np

from .._core.precision import ROUNDOFF_SAFETY
from .perturbations import Entries

if TYPE_CHECKING:
    from gradcheck._check.inputs import Plan
    from gradcheck._references.autodiff import Traced

__all__ = ["BatchedRunner", "BATCH_BYTES", "MAX_BATCH"]

BATCH_BYTES = 16 * 2 ** 20
"""The most memory the perturbed copies of one chunk may take."""

MAX_BATCH = 128
"""The most perturbations per chunk. Measured on this project's 2-core machine, larger chunks run slower per
evaluation: the perturbed copies then no longer fit in the processor's cache."""


def _jax():
    import jax  # lazy: only this route pays for importing JAX

    return jax


class BatchedRunner:
    """Evaluates :class:`~gradcheck._scale.perturbations.Entries` perturbations with a vectorised, compiled loss.

    Args:
        traced: the loss as a JAX function of its leaves (``_autodiff.Traced``).
        plan: the check's plan (structure, base point, loss value).
        batch: perturbations per chunk; by default as many as :data:`BATCH_BYTES` allows,
            at most :data:`MAX_BATCH`. ``batch=1`` is the unbatched route (one call per point).
        progress: called with the number of evaluations after each chunk.

    The last chunk is padded to the full chunk size with copies of the base
    point (so the function is compiled once); those evaluations are real and
    are counted in ``count``.
    """

    def __init__(self, traced: Traced, plan: Plan, batch: int | None = None,
                 progress: Callable[[int], None] | None = None, batch_bytes: int = BATCH_BYTES):
        jax = _jax()
        import jax.numpy as jnp

        self.plan = plan
        sizes = [t.size for t in plan.structure.tensors]
        shapes = [t.shape for t in plan.structure.tensors]
        self.offsets = np.concatenate([[0], np.cumsum(sizes)]).astype(np.int64)
        total = int(self.offsets[-1])
        if batch is None:
            batch = int(np.clip(batch_bytes // (8 * max(total, 1)), 1, MAX_BATCH))
        self.batch = int(batch)
        self.progress = progress
        self.count = 0
        bounds = [(int(a), int(b)) for a, b in zip(self.offsets[:-1], self.offsets[1:])]

        def leaves_of(theta):
            return [theta[a:b].reshape(shape) for (a, b), shape in zip(bounds, shapes)]

        with jax.enable_x64(True):
            self.theta = jnp.asarray(np.concatenate([np.ravel(b) for b in plan.base]), dtype=jnp.float64)
            positions = jnp.arange(total)

            def one(index, value, theta):
                return traced.fun(leaves_of(jnp.where(positions == index, value, theta)))

            self._many = jax.jit(jax.vmap(one, in_axes=(0, 0, None)))
            self._single = jax.jit(lambda theta: traced.fun(leaves_of(theta)))

    def agrees_at_base(self) -> bool:
        """Whether the traced loss gives the loss's own value at the base point, to rounding (one evaluation).

        The vectorised route evaluates the traced version of the loss (with
        ``xp=jax.numpy`` on the ``xp`` route), so it is used only when that
        version computes the same function: a relative difference above
        ``ROUNDOFF_SAFETY * 10`` units of the loss's precision means it does not.
        """
        jax = _jax()
        with jax.enable_x64(True):
            value = float(self._single(self.theta))
        self.count += 1
        f0 = self.plan.f0
        return bool(np.isfinite(value)) and abs(value - f0) <= 10 * ROUNDOFF_SAFETY * self.plan.loss_eps * max(
            abs(f0), np.finfo(np.float64).tiny)

    def __call__(self, blocks: Sequence[Entries]) -> np.ndarray:
        jax = _jax()
        if any(not isinstance(b, Entries) for b in blocks):
            raise TypeError("the vectorised route evaluates entry perturbations only")
        if not blocks:
            return np.array([])
        index = np.concatenate([self.offsets[b.k] + np.asarray(b.index, np.int64) for b in blocks])
        value = np.concatenate([np.asarray(b.value, np.float64) for b in blocks])
        n, size = index.size, self.batch
        pad = (-n) % size
        if pad:
            index = np.concatenate([index, np.zeros(pad, np.int64)])
            value = np.concatenate([value, np.full(pad, float(self.theta[0]) if self.theta.size else 0.0)])
        out = np.empty(index.size)
        with jax.enable_x64(True):
            for start in range(0, index.size, size):
                stop = start + size
                out[start:stop] = np.asarray(self._many(index[start:stop], value[start:stop], self.theta))
                self.count += size
                if self.progress is not None:
                    self.progress(size)
        return out[:n]
