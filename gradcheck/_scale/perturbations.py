"""Perturbations of the base point: what a runner is asked to evaluate, whoever evaluates it.

A difference scheme is a list of perturbations and a rule combining the loss values at them:

* :class:`Entries` sets entries of one tensor to given values, one evaluation per entry (central
  differences, Richardson extrapolation, the complex step);
* :class:`Move` moves a contiguous range of one tensor's entries along a random unit direction named by a
  key (directional checks); the direction is drawn again wherever it is needed, never shipped.

A direction is regenerated from its key rather than sent, because its entries are drawn in independently
seeded blocks: a worker evaluating a slice draws exactly the numbers the caller drew, to the last bit, and
pays only for its own blocks. This module imports nothing else of the package, so the serial, executor and
batched runners can all depend on it without depending on each other.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, NamedTuple, Sequence, Union

import numpy as np

__all__ = ["Entries", "Move", "Block", "size_of", "raw_direction", "unit_direction", "DIRECTION_BLOCK",
           "Directions", "evaluate"]

DIRECTION_BLOCK = 4096
"""Entries per independently seeded block of a random direction (any sub-range is drawn without the rest)."""


@dataclass(frozen=True)
class Entries:
    """Set entry ``index[j]`` (flat) of tensor ``k`` to ``value[j]``: one evaluation per j. (A dataclass, not a
    NamedTuple: a field called ``index`` would shadow ``tuple.index``.)"""

    k: int
    index: np.ndarray
    value: np.ndarray


class Move(NamedTuple):
    """Move flat entries ``lo:hi`` of tensor ``k`` by ``step`` times the unit direction ``key``: one evaluation."""

    k: int
    key: tuple
    lo: int
    hi: int
    step: float


Block = Union[Entries, Move]


def size_of(block: Block) -> int:
    """How many evaluations a perturbation costs: one per entry of :class:`Entries`, one for a :class:`Move`."""
    return 1 if isinstance(block, Move) else int(block.index.size)


def raw_direction(key: tuple, lo: int, hi: int) -> np.ndarray:
    """Entries ``lo:hi`` of the standard-normal vector named ``key``.

    Block ``b`` (entries ``4096 b`` to ``4096 b + 4095``) always comes from the
    generator seeded with ``(*key, b)``, so a sub-range is the same numbers
    whichever range it is drawn as part of, and costs only its own blocks.

    Example:
        >>> whole = raw_direction((0, 1, 2), 0, 10000)
        >>> bool(np.array_equal(raw_direction((0, 1, 2), 5000, 5003), whole[5000:5003]))
        True
    """
    first, last = lo // DIRECTION_BLOCK, (hi - 1) // DIRECTION_BLOCK
    parts = [np.random.default_rng([*key, b]).standard_normal(DIRECTION_BLOCK) for b in range(first, last + 1)]
    start = lo - first * DIRECTION_BLOCK
    return np.concatenate(parts)[start:start + (hi - lo)]


def unit_direction(key: tuple, lo: int, hi: int) -> np.ndarray:
    """:func:`raw_direction` scaled to unit length: uniform on the sphere of the range's entries."""
    z = raw_direction(key, lo, hi)
    return z / max(float(np.linalg.norm(z)), 1e-300)


class Directions:
    """The last unit direction drawn, kept because the +h and -h moves of one test share it."""

    def __init__(self) -> None:
        self._last: tuple = (None, None)

    def __call__(self, key: tuple, lo: int, hi: int) -> np.ndarray:
        if self._last[0] != (key, lo, hi):
            self._last = ((key, lo, hi), unit_direction(key, lo, hi))
        return self._last[1]


def evaluate(ev: Any, blocks: Sequence[Block], progress: Callable[[int], None] | None = None,
             directions: Directions | None = None) -> np.ndarray:
    """The loss at each perturbation of ``blocks``, in order, on the working copies of Evaluator ``ev``.

    Each perturbation writes its values into ``ev.work`` and the saved values are written back afterwards,
    even when the loss raises, so the working copies always return to the base point exactly.
    ``progress``, when given, is called with 1 after each evaluation.
    """
    directions = directions or Directions()
    out = []
    for block in blocks:
        if isinstance(block, Move):
            seg = ev.work[block.k].reshape(-1)[block.lo:block.hi]
            base = ev.base[block.k].reshape(-1)[block.lo:block.hi]
            np.add(base, block.step * directions(block.key, block.lo, block.hi), out=seg)
            try:
                out.append(ev())
            finally:
                np.copyto(seg, base)
        else:
            flat = ev.work[block.k].reshape(-1)
            for i, v in zip(block.index.tolist(), block.value.tolist()):
                x = flat[i]
                flat[i] = v
                try:
                    out.append(ev())
                finally:
                    flat[i] = x
                if progress is not None:
                    progress(1)
            continue
        if progress is not None:
            progress(1)
    return np.array(out)
