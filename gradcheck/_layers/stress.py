"""Conditioning of a layer check: stress variants of the inputs, and notes on what a check could not see.

A gradient check is only as strong as the point it is made at. Some mistakes
change the gradient by an amount that depends on the inputs, and at ordinary
random inputs that amount can be far below the check's tolerance:

* a normalisation backward that leaves out the epsilon added to the variance is
  wrong by a factor sqrt((var + eps) / var), about 1 + eps / (2 var): 5e-6 at unit
  variance with eps = 1e-5 (below a float64 tolerance of 1e-5), 5 percent at
  variance 1e-4;
* a pooling (or strided convolution) backward that assigns (``=``) where it must
  accumulate (``+=``) is exactly right when no input entry feeds two windows,
  that is when the stride is not smaller than the window;
* at saturated units the true gradient sits below the check's resolution, so any
  small claimed value passes.

Two things answer this. :func:`stress_inputs` builds input variants where such
mistakes show (small-variance batches, overlapping or ragged windows, near-ties,
saturating values, zero-size batches). The probes below run during
:func:`gradcheck.examine_layer` and add a ``weak check`` note to the report when
the inputs given made the check blind to one of these classes; they look at the
forward from outside (a layer's window or epsilon is not visible), so each note
says what was measured, never what the layer "is".
"""

from __future__ import annotations

import warnings
from typing import TYPE_CHECKING, Any, Callable, Sequence

import numpy as np

from .._core.errors import describe, input_error

if TYPE_CHECKING:
    from gradcheck._check.compare import Judgement
    from gradcheck._core.tree import Structure

__all__ = ["stress_inputs", "KINDS", "stabiliser_notes", "overlap_notes", "resolution_notes"]

WEAK_MARGIN = 10.0
"""A stabilising term is called invisible when its effect on the output is under this many tolerances.
The gradient error of a mishandled epsilon is of the order of its effect on the output (4/3 of it for a
normalisation, see the module docstring), so a decade of margin keeps the note on the safe side."""

ROUNDING_LEVEL = 1e-12
"""Output changes below this (relative) are rounding: the layer is exactly invariant, nothing is hidden."""

MAX_PERTURBED = 256
"""Entries perturbed by the overlap probe (a random sample beyond this), one forward call each."""

UNRESOLVED_FRACTION = 0.9
"""A tensor whose nonzero true gradient entries are under the check's floor in this fraction gets a note."""


def _standardised(x: np.ndarray, axis: Any, rng: np.random.Generator) -> np.ndarray:
    std = x.std(axis=axis, keepdims=True)
    if np.any(std == 0):
        x = rng.standard_normal(x.shape)
        std = x.std(axis=axis, keepdims=True)
    return (x - x.mean(axis=axis, keepdims=True)) / std


def _signs(rng: np.random.Generator, shape: tuple) -> np.ndarray:
    return rng.choice([-1.0, 1.0], size=shape)


def _empty(x: np.ndarray, axis: int) -> np.ndarray:
    return np.take(x, np.arange(0), axis=axis)


def _activation(x, axis, rng):
    return [
        ("saturating", _signs(rng, x.shape) * rng.uniform(10.0, 30.0, x.shape)),
        ("near-kink", _signs(rng, x.shape) * rng.uniform(1e-3, 1e-2, x.shape)),
        ("wide-range", _signs(rng, x.shape) * 10.0 ** rng.uniform(-3.0, 1.0, x.shape)),
        ("empty-batch", _empty(x, axis)),
    ]


def _normalisation(x, axis, rng):
    axes = tuple(a % x.ndim for a in ((axis,) if isinstance(axis, int) else axis))
    mean = x.mean(axis=axes, keepdims=True)
    out = [("small-variance", mean + 1e-2 * _standardised(x, axes, rng))]
    if len(axes) < x.ndim:
        const = x.copy()
        index = tuple(slice(None) if a in axes else 0 for a in range(x.ndim))
        const[index] = const[index].mean()
        out.append(("constant-feature", const))
    out.append(("offset", x + 3.0))
    if axes == (0,) and x.shape[0] > 2:
        out.append(("two-samples", np.take(x, np.arange(2), axis=axes[0])))
    return out


def _softmax(x, axis, rng):
    confident = x.copy()
    rows = confident.reshape(-1, x.shape[-1])
    rows[np.arange(len(rows)), rng.integers(0, x.shape[-1], len(rows))] += 20.0
    return [
        ("confident", confident),
        ("ties", np.broadcast_to(x.mean(axis=-1, keepdims=True), x.shape).copy()),
        ("tiny-scores", 1e-3 * x),
    ]


def _peaked(x, spatial, rng):
    """Distinct values falling away from one peak (steps 1e-2, in random order among equal distances)."""
    shape = [x.shape[a] for a in spatial]
    centre = [rng.integers(0, n) for n in shape]
    grid = np.indices(shape)
    dist = np.sqrt(sum((g - c) ** 2 for g, c in zip(grid, centre))).ravel()
    order = np.lexsort((rng.random(dist.size), dist))
    values = np.empty(dist.size)
    values[order] = -1e-2 * np.arange(dist.size)
    layout = [1] * x.ndim
    for a, n in zip(spatial, shape):
        layout[a] = n
    return np.broadcast_to(values.reshape(layout), x.shape).copy()


def _window(x, axis, rng):
    near = 1.0 + 1e-4 * rng.permutation(x.size).reshape(x.shape)
    spatial = tuple(range(2, x.ndim)) if x.ndim >= 3 else (x.ndim - 1,)
    ragged = x
    for a in spatial:
        extra = list(ragged.shape)
        extra[a] = 1
        ragged = np.concatenate([ragged, rng.standard_normal(extra)], axis=a)
    return [
        ("peaked", _peaked(x, spatial, rng)),
        ("near-ties", near),
        ("negative", -1.0 - np.abs(x)),
        ("ragged", ragged),
        ("empty-batch", _empty(x, axis)),
    ]


def _recurrent(x, axis, rng):
    return [
        ("one-step", np.take(x, np.arange(1), axis=axis)),
        ("zero-steps", _empty(x, axis)),
        ("longer", np.concatenate([x, rng.standard_normal(x.shape)], axis=axis)),
        ("saturating", 10.0 * x),
    ]


KINDS: dict[str, Callable] = {
    "activation": _activation, "normalisation": _normalisation, "normalization": _normalisation,
    "softmax": _softmax, "pooling": _window, "convolution": _window, "recurrent": _recurrent,
}


def stress_inputs(kind: str, *inputs: Any, which: int = 0, axis: int | tuple[int, ...] = 0,
                  seed: int = 0) -> list[tuple[str, tuple]]:
    """Input variants where a layer's typical backward mistakes become visible.

    Only ``inputs[which]`` (the layer's data, default the first input) is
    replaced; every other input is passed on as it is, so each variant can go
    straight to ``examine_layer(forward, backward, *variant)``. Variants by kind:

    * ``activation`` (elementwise): ``saturating`` (|x| in 10..30: overflow and
      0/0 in the backward; the gradient itself is mostly below resolution, which
      the report says), ``near-kink`` (|x| in 1e-3..1e-2, both sides of 0),
      ``wide-range`` (magnitudes 1e-3..10), ``empty-batch``.
    * ``normalisation`` (statistics over ``axis``: 0 for batch, -1 for layer
      normalisation): ``small-variance`` (std 1e-2, where a missing epsilon costs
      eps / (2e-4), 5 percent for eps = 1e-5), ``constant-feature`` (one feature
      of zero variance: only epsilon keeps it finite), ``offset`` (mean moved by 3:
      a backward that uses x where it needs x - mean), ``two-samples`` (only for
      statistics over the batch axis 0, the one no parameter's shape depends on).
    * ``softmax`` (classes on the last axis): ``confident`` (one score 20 above
      the others: p - 1 cancels), ``ties`` (equal scores; softmax is smooth there),
      ``tiny-scores``.
    * ``pooling`` / ``convolution`` (spatial axes from 2 on): ``peaked`` (values
      falling away from one peak, so overlapping windows share their maxima, which
      a pooling backward must then add up), ``near-ties``
      (distinct values 1e-4 apart, far above the difference step, so a backward
      that finds the maximum with a tolerance fails), ``negative`` (a running
      maximum started at 0, a mask x > 0), ``ragged`` (one more row and column:
      windows that do not tile), ``empty-batch``. Exact ties are left out on
      purpose: the maximum has no derivative there and central differences
      return the average of the one-sided ones, so no backward can pass.
      Overlapping windows are a setting of the forward, not an input: check the
      layer once more with the stride smaller than the window.
    * ``recurrent`` (time on ``axis``): ``one-step``, ``zero-steps``, ``longer``
      (twice the steps), ``saturating`` (inputs times 10).

    Args:
        kind: one of the kinds above.
        *inputs: the layer's inputs, as for ``examine_layer``.
        which: the position of the input to vary (a float array).
        axis: the batch (or statistics, or time) axis the variants work along.
        seed: seed for the random parts of the variants.

    Returns:
        A list of ``(variant name, inputs tuple)``; the varied input keeps its dtype.

    Example:
        >>> import numpy as np
        >>> x = np.random.default_rng(0).standard_normal((8, 3))
        >>> variants = dict(stress_inputs("normalisation", x, np.ones(3), np.zeros(3)))
        >>> list(variants)
        ['small-variance', 'constant-feature', 'offset', 'two-samples']
        >>> np.round(variants["small-variance"][0].std(axis=0), 6)
        array([0.01, 0.01, 0.01])
    """
    if kind not in KINDS:
        raise input_error("stress_inputs kind", f"one of {sorted(KINDS)}", repr(kind),
                          "Name the layer family, e.g. stress_inputs('normalisation', x, gamma, beta).")
    if not inputs:
        raise input_error("stress_inputs inputs", "the layer's inputs", "none",
                          "Pass them as for examine_layer: stress_inputs(kind, x, w, b).")
    if not isinstance(which, int) or not -len(inputs) <= which < len(inputs):
        raise input_error("stress_inputs which", f"a position among the {len(inputs)} inputs", repr(which),
                          "Pass which=0 for the first input (the layer's data).")
    original = inputs[which]
    x = np.asarray(original)
    if x.dtype.kind != "f" or x.ndim == 0 or x.size == 0:
        raise input_error(f"stress_inputs input {which}", "a non-empty float array with at least one axis",
                          describe(original), "Point `which` at the layer's data input.")
    axes = (axis,) if isinstance(axis, int) else tuple(axis)
    if any(not -x.ndim <= a < x.ndim for a in axes):
        raise input_error("stress_inputs axis", f"axes of an array with {x.ndim} dimensions", repr(axis),
                          "Pass axis=0 for the batch axis, or axis=-1 for the last one.")
    rng = np.random.default_rng(seed)
    made = KINDS[kind](np.array(x, dtype=np.float64), axis if kind.startswith("normali") else axes[0], rng)
    position = which % len(inputs)
    return [(name, inputs[:position] + (np.asarray(v, dtype=x.dtype),) + inputs[position + 1:])
            for name, v in made]


def _quiet(run: Callable[[list], Any], args: list) -> list[np.ndarray] | None:
    """Call the forward for a probe, with numpy's warnings silenced: a probe must never disturb the user."""
    try:
        with warnings.catch_warnings(), np.errstate(all="ignore"):
            warnings.simplefilter("ignore")
            out = run(args)
    except Exception:  # a probe that the forward cannot take is skipped, not reported
        return None
    if out is None or not all(np.all(np.isfinite(o)) for o in out):
        return None
    return out


def stabiliser_notes(run: Callable[[list], Any], args: list, names: Sequence[str], checked: Sequence[int],
                     base_out: list[np.ndarray], tolerances: dict[str, float]) -> tuple[list[str], int]:
    """Notes for inputs the layer is (almost) insensitive to rescaling, one forward call per input.

    A normalisation is exactly invariant to x -> 2x except through its epsilon:
    x_hat(2x) / x_hat(x) = sqrt((var + eps) / (var + eps / 4)), about 1 + 3 eps / (8 var). The measured
    relative change delta therefore is the size of everything epsilon does at these inputs; when it is
    under ``WEAK_MARGIN`` tolerances (and above rounding), a backward that mishandles epsilon passes.
    Saturated units show the same symptom and get the same note.
    """
    notes, calls = [], 0
    scale = max((float(np.max(np.abs(o))) for o in base_out if o.size), default=0.0)
    for i in checked:
        x = args[i]
        if not isinstance(x, np.ndarray) or x.size < 2 or scale == 0.0 or names[i] not in tolerances:
            continue
        calls += 1
        out = _quiet(run, args[:i] + [2.0 * x] + args[i + 1:])
        if out is None or [o.shape for o in out] != [o.shape for o in base_out]:
            continue
        delta = max(float(np.max(np.abs(a - b), initial=0.0)) for a, b in zip(out, base_out)) / scale
        tol = tolerances[names[i]]
        if ROUNDING_LEVEL < delta < WEAK_MARGIN * tol:
            notes.append(
                f"weak check for {names[i]}: doubling {names[i]} changes the output by only {delta:.2g} (relative), "
                f"so the layer normalises {names[i]} (or saturates in it) and its stabilising terms, such as the "
                f"epsilon added to a variance, move the result by about that much, under {WEAK_MARGIN:g} times the "
                f"tolerance {tol:.0e}; a backward that mishandles them may pass here. Check again with "
                "stress_inputs('normalisation', ...) (small-variance batches).")
    return notes, calls


def overlap_notes(run: Callable[[list], Any], args: list, names: Sequence[str], checked: Sequence[int],
                  base_out: list[np.ndarray], seed: int = 0) -> tuple[list[str], int]:
    """Notes for windowed inputs where no entry feeds two outputs, one forward call per perturbed entry.

    Only inputs with three or more axes (batch, channels, positions) and outputs of the same rank but
    fewer entries (a pooling or strided layout) are probed. Each sampled entry is moved by a tiny step
    (1e-6 of its size, far below any gap between values, so no maximum changes) and the output entries
    that move are counted: that is the number of outputs the entry feeds *at these inputs*, which for a
    maximum counts only the windows it wins. If no entry feeds two outputs, the true gradient has one
    contribution per entry and a backward that assigns where it must accumulate is exactly right here.
    """
    notes, calls = [], 0
    rng = np.random.default_rng(seed)
    for i in checked:
        x = args[i]
        if not isinstance(x, np.ndarray) or x.ndim < 3 or x.size < 2:
            continue
        targets = [k for k, o in enumerate(base_out) if o.ndim == x.ndim and 2 <= o.size < x.size]
        if not targets:
            continue
        sample = np.arange(x.size) if x.size <= MAX_PERTURBED else rng.choice(x.size, MAX_PERTURBED, replace=False)
        widest, seen = 0, 0
        for j in sample:
            moved = x.copy()
            moved.reshape(-1)[j] += 1e-6 * max(abs(float(moved.reshape(-1)[j])), 1.0)
            calls += 1
            out = _quiet(run, args[:i] + [moved] + args[i + 1:])
            if out is None:
                continue
            seen += 1
            widest = max(widest, max(int(np.count_nonzero(out[k] != base_out[k])) for k in targets))
        if seen and widest == 1:
            notes.append(
                f"weak check for {names[i]}: each of {seen} perturbed entries of {names[i]} moved at most one "
                f"entry of the smaller output, so no entry of the gradient of {names[i]} collects contributions "
                "from two outputs here (no entry is in, or for a maximum wins, two windows) and a backward that "
                "assigns (=) where it must accumulate (+=) passes; check also with the stride smaller than the "
                "window, at inputs such as stress_inputs('pooling', ...) 'peaked'.")
    return notes, calls


def resolution_notes(judgement: Judgement, structure: Structure) -> list[str]:
    """Notes for tensors whose true gradient is zero, or below the check's floor, almost everywhere it is not zero.

    Where 0 < |reference| is under the relative-error floor (a saturated unit), an
    entry only tests that the claimed value is small too: a wrong factor there
    cannot show. Exact zeros are structural (an entry that is not a window's
    maximum, a dead unit) and are checked as zeros; they are left out of the
    count, except that a tensor whose whole true gradient is zero gets a note,
    since then nothing but zeros was checked.
    """
    notes = []
    for k, t in enumerate(structure.tensors):
        ref = judgement.primary.values[k]
        finite = np.isfinite(ref)
        if not np.any(finite):
            continue
        values, floors = np.abs(ref[finite]), np.broadcast_to(judgement.floors[k], ref.shape)[finite]
        tiny = int(np.sum((values > 0) & (values <= floors)))
        nonzero = int(np.sum(values > 0))
        if nonzero == 0:
            notes.append(f"weak check for {t.path}: its true gradient is exactly zero at these inputs (nothing "
                         "flows to it, or every unit is saturated or inactive), so only zeros were checked.")
        elif tiny >= UNRESOLVED_FRACTION * nonzero:
            notes.append(
                f"weak check for {t.path}: the true gradient is below the check's resolution ({np.max(floors):.1e}) "
                f"on {tiny} of its {nonzero} nonzero entries (saturated units), so errors there cannot be seen; "
                "check also at inputs where the layer is not saturated.")
    return notes
