"""Evaluating the loss at many perturbed points: in this process, or farmed out to an executor.

Every difference scheme is written as a list of *perturbations* (``perturbations.Entries`` and
``perturbations.Move``) and a rule combining the loss values; a runner evaluates the list.

One function, :func:`evaluate_chunk`, evaluates a chunk here or in a worker: it copies the base point, sets
each perturbation, calls the loss and restores the saved value. Serial and parallel runs do the same
floating-point arithmetic on the same float64 values, so a report does not depend on the executor (for a
loss deterministic across processes). A worker receives the loss, the base params and the data once per
chunk, with the chunk's perturbations; the caller's arrays are never sent anywhere nor written to.
"""

from __future__ import annotations

import math
import os
import pickle
from concurrent.futures import Executor, ProcessPoolExecutor, as_completed
from typing import TYPE_CHECKING, Any, Callable, Sequence

import numpy as np

from .._core.errors import InputError, input_error
from .._core.evaluator import Evaluator
from .._references.finite_difference import Estimate, central_by, complex_by, richardson_by
from .._references.registry import evaluations_per_entry
from .perturbations import Block, Directions, Entries, Move, evaluate, size_of
from .progress import open_bar

if TYPE_CHECKING:
    from gradcheck._check.inputs import Plan
    from gradcheck._core.tree import Structure
    from gradcheck._references.autodiff import Traced

__all__ = ["evaluate_chunk", "SerialRunner", "ExecutorRunner", "entrywise_references", "worker_count"]

CHUNKS_PER_WORKER = 4
"""Chunks per worker: enough to balance uneven workers and to move the progress bar, few enough that
sending the params once per chunk costs little."""

MAX_CHUNK = 4096
"""The most evaluations in one chunk, so that progress is reported at least this often."""

BATCHED_MIN_EVALUATIONS = 2000
"""Below this many evaluations the vectorised JAX route is not tried: compiling it takes longer
(0.2 to 1 s measured on this project's 2-core machine) than the Python loop needs for the whole check."""

BATCHED_ON_CPU = False
"""Whether the vectorised route is used when JAX runs on the CPU. Measured on this project's 2-core machine
(benchmarks/bench_scale.py), XLA's float64 forward pass of a 10,000-parameter MLP costs the same per copy as
numpy's (about 15 us), so vectorising saves nothing and compiling costs 0.2 to 1 s: the Python loop is
faster there. On an accelerator the copies run in parallel and the route pays."""


class _Point:
    """Private working copies of the base point that perturbations are applied to and undone from."""

    def __init__(self, loss: Callable, structure: Structure, base: Sequence[np.ndarray], data: tuple, kwargs: dict,
                 dtype: Any):
        self.ev = Evaluator(loss, structure, base, data, kwargs, dtype=dtype)
        self.directions = Directions()

    def run(self, blocks: Sequence[Block], progress: Callable[[int], None] | None = None) -> np.ndarray:
        return evaluate(self.ev, blocks, progress, self.directions)


def evaluate_chunk(payload: tuple, blocks: Sequence[Block]) -> np.ndarray:
    """The loss at each perturbation of ``blocks``, in order (the function every worker runs).

    ``payload`` is ``(loss, structure, base, data, kwargs, dtype)``; the base is
    copied before anything is perturbed, so the sender's arrays are never touched.
    """
    return _Point(*payload).run(blocks)


def worker_count(executor: Executor) -> int:
    """How many evaluations the executor runs at once (its workers, or a Dask cluster's threads)."""
    n = getattr(executor, "_max_workers", None)
    if isinstance(n, int) and n > 0:
        return n
    client = getattr(executor, "_client", None)  # dask.distributed's ClientExecutor
    if client is not None:
        try:
            return max(1, sum(client.nthreads().values()))
        except Exception:  # a client that cannot answer just gets the default
            pass
    return os.cpu_count() or 1


def _split(blocks: Sequence[Block], parts: int) -> list[list[Block]]:
    """Cut the blocks into at most ``parts`` chunks of nearly equal numbers of evaluations, in order."""
    total = sum(size_of(b) for b in blocks)
    target = max(1, math.ceil(total / max(parts, 1)))
    chunks: list[list[Block]] = []
    current: list[Block] = []
    room = target
    for block in blocks:
        while size_of(block) > 0:
            if room == 0:
                chunks.append(current)
                current, room = [], target
            if isinstance(block, Move):
                current.append(block)
                room -= 1
                break
            take = min(room, int(block.index.size))
            current.append(Entries(block.k, block.index[:take], block.value[:take]))
            block = Entries(block.k, block.index[take:], block.value[take:])
            room -= take
    if current:
        chunks.append(current)
    return chunks


_PICKLE_WORDS = ("pickle", "Can't get attribute", "Can't get local object")


def _not_sendable(exc: BaseException) -> InputError:
    return input_error("executor", "a loss (and data) that can be pickled and sent to worker processes",
                       f"{type(exc).__name__}: {str(exc)[:160]}",
                       "Define the loss with def at the top level of an importable module (not a lambda, a "
                       "function inside another function, or a function typed into an interactive session), "
                       "or pass a concurrent.futures.ThreadPoolExecutor, which sends nothing.")


class SerialRunner:
    """Evaluates perturbations one after another in this process."""

    def __init__(self, plan: Plan, dtype: Any = np.float64, progress: Callable[[int], None] | None = None):
        self.point = _Point(plan.loss, plan.structure, plan.base, plan.data, plan.kwargs, dtype)
        self.progress = progress
        self.count = 0

    def __call__(self, blocks: Sequence[Block]) -> np.ndarray:
        values = self.point.run(blocks, self.progress)
        self.count += len(values)
        return values


class ExecutorRunner:
    """Farms chunks of perturbations out to a ``concurrent.futures.Executor`` and gathers them in order.

    A process pool needs a picklable loss: that is tried once, before anything
    is sent, and an unpicklable loss is an :class:`InputError` saying how to fix
    it. When a worker raises, the pending chunks are cancelled and the worker's
    exception is raised here; the caller's params are untouched, since workers
    only ever see copies.
    """

    def __init__(self, plan: Plan, executor: Executor, dtype: Any = np.float64,
                 progress: Callable[[int], None] | None = None):
        if not isinstance(executor, Executor):
            raise input_error("executor", "a concurrent.futures.Executor", type(executor).__name__,
                              "Pass e.g. concurrent.futures.ProcessPoolExecutor(4), or a Dask client's "
                              "client.get_executor().")
        self.executor = executor
        self.payload = (plan.loss, plan.structure, plan.base, plan.data, plan.kwargs, np.dtype(dtype).str)
        if isinstance(executor, ProcessPoolExecutor):
            try:
                pickle.dumps(self.payload, protocol=pickle.HIGHEST_PROTOCOL)
            except (pickle.PicklingError, AttributeError, TypeError) as exc:
                raise _not_sendable(exc) from None
        self.workers = worker_count(executor)
        self.progress = progress
        self.count = 0

    def __call__(self, blocks: Sequence[Block]) -> np.ndarray:
        total = sum(size_of(b) for b in blocks)
        if total == 0:
            return np.array([])
        # Several chunks per worker for balance, but no more chunks than quarter-lists: each chunk ships the params.
        parts = max(min(total, self.workers * CHUNKS_PER_WORKER, max(self.workers, total // 4)),
                    math.ceil(total / MAX_CHUNK))
        chunks = _split(blocks, parts)
        futures = {}
        results: list[Any] = [None] * len(chunks)
        try:
            for j, chunk in enumerate(chunks):
                futures[self.executor.submit(evaluate_chunk, self.payload, chunk)] = j
            for future in as_completed(futures):
                j = futures[future]
                results[j] = future.result()
                if self.progress is not None:
                    self.progress(len(results[j]))
        except BaseException as exc:
            for future in futures:
                future.cancel()
            if (not isinstance(exc, InputError) and isinstance(exc, (pickle.PicklingError, AttributeError, TypeError))
                    and any(w in str(exc) for w in _PICKLE_WORDS)):
                raise _not_sendable(exc) from exc
            raise
        self.count += total
        return np.concatenate(results)




def _vectorising_pays() -> bool:
    """Whether JAX runs on an accelerator (or :data:`BATCHED_ON_CPU` asks for the route anyway)."""
    import jax  # only called once the loss has been traced, so JAX is loaded already

    return BATCHED_ON_CPU or jax.default_backend() != "cpu"


def entrywise_references(plan: Plan, methods: Sequence[str], eps: float, executor: Executor | None = None,
                         traced: Traced | None = None, progress: bool | None = None) -> tuple[list[Estimate], int]:
    """Richardson extrapolation and/or central differences for every entry, by the route this check allows.

    With an executor, the evaluations are farmed out to it. Without one, a loss
    that JAX can trace is evaluated in vectorised chunks (``gradcheck._scale.batched``) when
    that pays (an accelerator, see :data:`BATCHED_ON_CPU`; enough evaluations to
    repay compiling) and the traced loss agrees with the loss itself at the base
    point; otherwise a serial runner evaluates them here. Returns the estimates (in ``methods`` order) and
    the number of loss evaluations spent.
    """
    methods = [m for m in methods if m in ("richardson", "central")]
    if not methods:
        return [], 0
    total = sum(evaluations_per_entry(m) for m in methods) * plan.structure.size
    bar = open_bar(progress, total, "gradcheck: " + " and ".join(m + " differences" if m == "central" else m
                                                                   for m in methods))
    schemes = {"central": central_by, "richardson": richardson_by}
    spent = 0
    try:
        runner: Any = None
        if executor is not None:
            runner = ExecutorRunner(plan, executor, progress=bar.callback)
        elif traced is not None and total >= BATCHED_MIN_EVALUATIONS and _vectorising_pays():
            from .batched import BatchedRunner

            runner = BatchedRunner(traced, plan, progress=bar.callback)
            if not runner.agrees_at_base():
                spent, runner = runner.count, None
        if runner is not None:
            estimates = [schemes[m](runner, plan, eps) for m in methods]
            return estimates, spent + runner.count
        runner = SerialRunner(plan, progress=bar.callback)
        estimates = [schemes[m](runner, plan, eps) for m in methods]
        return estimates, spent + runner.count
    finally:
        bar.close()


def complex_reference(plan: Plan, executor: Executor | None, progress: bool | None) -> tuple[Estimate, int]:
    """The complex step for every entry, farmed out to ``executor`` or run here with a progress bar."""
    bar = open_bar(progress, plan.structure.size, "gradcheck: complex step")
    try:
        if executor is not None:
            runner: Any = ExecutorRunner(plan, executor, dtype=np.complex128, progress=bar.callback)
        else:
            runner = SerialRunner(plan, dtype=np.complex128, progress=bar.callback)
        est = complex_by(runner, plan)
        return est, runner.count
    finally:
        bar.close()
