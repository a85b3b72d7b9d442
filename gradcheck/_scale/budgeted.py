"""Checking a large network within a budget of loss evaluations: directional tests and group testing.

Entry-by-entry central differences cost two evaluations per parameter; here the cost does not grow with it.

* Directional tests: for each tensor, a random unit direction ``u`` (uniform on the sphere of its entries)
  costs two evaluations and gives ``D = (f(x + h u) - f(x - h u)) / 2h``, which must equal
  ``<claimed, u>``. An error vector ``e`` shows as ``<e, u>``, rarely small for random ``u``; that gives a
  pass its meaning as a probability (:func:`miss_probability`).
* Group testing: when a tensor fails, the failing direction is restricted to each half of its flat entries
  (zero elsewhere) and the failing half is halved again, so one wrong entry among ``m`` costs about
  ``4 log2(m)`` evaluations. The entry found is checked alone by central differences and its known error
  is subtracted from every test containing it, so further bisections find further wrong entries.
* Autodiff: when JAX traces the loss, its gradient is the whole reference in one evaluation and every entry
  is compared with it; the directional tests then check autodiff itself (a traced loss computing another
  function than the numpy one is caught). A JVP would equal the dot product with that gradient.

The step along a direction is ``eps^(1/3) max(||x_S||, typical entry)``: ``_core.precision.steps_for`` applied
to the line through ``x`` along ``u``, on which ``x`` has length ``||x_S||``. (A step of ``sqrt(m)`` times
the per-entry one moves each entry as far as an entry-by-entry check, but the next layer's input
``sqrt(fan-in)`` times further; measured on tanh networks of up to 1e6 weights, it made the truncation
error about 100 times larger.) A test passes when ``|D - <claimed, u>| <= rtol * max(|D|, |<claimed, u>|,
||claimed_S|| / sqrt(m_S), noise / rtol)``: the third term is the typical size of ``<claimed, u>`` (a
direction nearly orthogonal to the gradient is not judged against a tiny number), and
``noise = ROUNDOFF_SAFETY eps |f| / h`` is the rounding floor ``_core.precision.roundoff`` gives central
differences. ``rtol`` is a tenth of the entry tolerance: 1e-6 for float64 gradients, the accuracy the
reference-methods registry states for central differences (measured disagreements with JAX's exact
directional derivatives on tanh networks stayed below 5e-8).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Sequence

import numpy as np

from .._check.budget import FULL_CHECK_LIMIT, default_budget, room_for_full_check
from .._check.compare import (
    FLOOR_FRACTION,
    Judgement,
    _cosine_and_scale,
    judge,
    relative_error,
    tolerance_for,
)
from .._core.errors import input_error
from .._core.precision import EPS64
from .._references.autodiff import autodiff_estimate
from .._references.finite_difference import Estimate
from .._references.registry import accuracy
from .._report.results import ReferenceSummary, TensorResult
from . import directional
from .directional import (
    DETECTION,
    DIRECTIONAL_MARGIN,
    MAX_DIRECTIONS,
    _confirm_suspects,
    _localisation_cost,
    _locate,
    _Session,
    detectable_norm,
    miss_probability,
)
from .progress import open_bar
from .runners import ExecutorRunner, SerialRunner

if TYPE_CHECKING:
    from gradcheck._check.inputs import Plan
    from gradcheck._references.autodiff import Traced

__all__ = ["check_within_budget"]

def check_within_budget(plan: Plan, claimed: list, dtypes: list, traced: Traced | None, budget: int | None = None,
                        executor: Any = None, progress: bool | None = None, seed: int = 0,
                        tolerance: float | None = None) -> tuple[Judgement, int, tuple[str, ...]]:
    """Check the claimed gradients spending at most ``budget`` loss evaluations in all (the plan's included).

    Returns the judgement, the evaluations spent here (the plan's are not counted again), and notes for
    the report saying what was checked and what a pass means. (A budget that covers the entry-by-entry
    check never gets here: ``examine`` asks :func:`room_for_full_check` first and runs that check.)
    """
    tensors = plan.structure.tensors
    room_for_full_check(plan, traced, budget)  # validates the budget
    cap = default_budget(plan) if budget is None else int(budget)
    avail = cap - plan.evaluations
    finite = [bool(np.all(np.isfinite(c))) for c in claimed]
    live = [k for k, t in enumerate(tensors) if t.size > 0 and finite[k]]
    need = 2 * len(live) + (traced is not None)
    if avail < need:
        raise input_error("budget", f"at least {plan.evaluations + need} loss evaluations ({plan.evaluations} for "
                          f"the first look at the loss, {'1 for autodiff, ' if traced is not None else ''}2 for one "
                          "directional test of each tensor)", f"budget={budget}",
                          f"Pass budget={plan.evaluations + need} or more, or leave it out for the default.")
    central_like = Estimate("central", (), (), rtol=accuracy("central", plan.loss_eps))
    entry_tol = [tolerance if tolerance is not None else tolerance_for(d, central_like) for d in dtypes]
    rtols = [tolerance if tolerance is not None else t / DIRECTIONAL_MARGIN for t in entry_tol]
    runner = ExecutorRunner(plan, executor) if executor is not None else SerialRunner(plan)
    session = _Session(plan, claimed, runner, avail, rtols)
    ad, unavailable, jud, trusted, searches = None, {}, None, set(), {}
    with open_bar(progress, 1, "gradcheck: directional checks") as bar:
        runner.progress = bar.callback
        if traced is not None:
            got = autodiff_estimate(traced, plan.base, plan.f0)
            session.extra += 1
            if isinstance(got, str):
                unavailable["autodiff"] = got
            else:
                ad = got if plan.loss_eps <= EPS64 else dataclasses.replace(
                    got, rtol=accuracy("autodiff", plan.loss_eps),
                    atol=tuple(a * plan.loss_eps / EPS64 for a in got.atol))
                session.ref = ad.values
        else:
            unavailable["autodiff"] = ("the loss could not be traced by JAX, so central differences along random "
                                       "directions are the reference")
        reserve = _localisation_cost(max([tensors[k].size for k in live], default=1))
        r = int(np.clip((avail - session.used - reserve) // max(2 * len(live), 1), 1, MAX_DIRECTIONS))
        bar.grow(2 * r * len(live) + reserve)
        probes: dict[int, list[directional.Probe]] = {k: [] for k in live}
        for p in session.measure([(k, (seed, k, d), 0, tensors[k].size) for k in live for d in range(r)]):
            probes[p.k].append(p)
        for k in live:
            _confirm_suspects(session, probes[k], ad is not None)
        if ad is not None:
            trusted = {k for k in range(len(tensors)) if k not in live or all(p.ref_error <= p.rtol for p in probes[k])}
            jud = judge(plan.structure, claimed, dtypes, [ad], {}, tolerance)
        scale = jud.gradient_scale if jud is not None else max(
            [float(np.max(np.abs(c))) for c, ok in zip(claimed, finite) if ok and c.size], default=0.0)
        floors = [FLOOR_FRACTION["float32" if np.dtype(d).itemsize <= 4 else "float64"] * scale for d in dtypes]
        failing = [k for k in live if k not in trusted and any(p.fails() for p in probes[k])]
        # a tensor whose every failing test is explained by a kink of the loss is not judged (nor bisected)
        kinked = {k for k in failing if all(session.affordable(6) and session.kink_explains(p)
                                            for p in probes[k] if p.fails())}
        failing = [k for k in failing if k not in kinked]
        for k in sorted(failing, key=lambda k: -max(p.error / p.rtol for p in probes[k])):
            top = max(probes[k], key=lambda p: p.error / p.rtol)
            searches[k] = _locate(session, k, top, entry_tol[k], floors[k])
    parts = [_tensor_part(k, t, plan, claimed, finite, live, probes, trusted, jud, ad, searches, entry_tol, rtols,
                          floors, k in kinked) for k, t in enumerate(tensors)]
    judgement = _judgement(plan, ad, trusted, parts, unavailable, probes, scale)
    notes = _notes(plan, cap, budget is None, FULL_CHECK_LIMIT, session.used, r, seed, live, probes, trusted,
                   searches, claimed, ad, kinked)
    return judgement, session.used, notes


@dataclass(frozen=True, kw_only=True, eq=False)
class TensorOutcome:
    """One tensor's part of a budgeted check: its result and the per-entry arrays the judgement is made of
    (reference values and their accuracy, relative errors, floors, and the entries not judged)."""

    result: TensorResult
    values: np.ndarray
    atol: np.ndarray
    errors: np.ndarray
    floors: np.ndarray
    unreliable: np.ndarray


def _unknown(shape: tuple, fill: Any) -> np.ndarray:
    """A read-only array of one value, without the memory of a copy of the tensor."""
    return np.broadcast_to(np.asarray(fill), shape)


def _tensor_part(k, t, plan, claimed, finite, live, probes, trusted, jud, ad, searches, entry_tol, rtols, floors,
                 kinked=False):
    """For tensor ``k``: its :class:`TensorOutcome`.

    A ``kinked`` tensor (every failing test straddled a kink) has all its entries unreliable: not judged.
    """
    if k in trusted:
        return TensorOutcome(result=jud.tensors[k], values=ad.values[k], atol=ad.atol[k], errors=jud.errors[k],
                             floors=jud.floors[k], unreliable=jud.unreliable[k])
    values, atol, errors = _unknown(t.shape, math.nan), _unknown(t.shape, math.inf), _unknown(t.shape, math.nan)
    floor, unjudged = _unknown(t.shape, floors[k]), _unknown(t.shape, False)
    if kinked:
        ps = probes[k]
        cosine, fitted = _cosine_and_scale(np.array([p.dot for p in ps]), np.array([p.num for p in ps]))
        result = TensorResult(path=t.path, layer=t.layer, shape=t.shape, error=0.0, worst_index=(), checked=t.size,
                              cosine=cosine, scale=fitted, ok=True, tolerance=rtols[k], unreliable=t.size,
                              size=t.size, errors=errors)
        return TensorOutcome(result=result, values=values, atol=atol, errors=errors, floors=floor,
                             unreliable=_unknown(t.shape, True))
    if k not in live:  # non-finite claims (no evaluation needed to judge them), or an empty tensor
        bad = np.flatnonzero(~np.isfinite(claimed[k].reshape(-1)))
        index = tuple(int(i) for i in np.unravel_index(bad[0], t.shape)) if bad.size and t.shape else ()
        result = TensorResult(path=t.path, layer=t.layer, shape=t.shape, error=math.inf if bad.size else 0.0,
                              worst_index=index, checked=t.size, cosine=math.nan, scale=math.nan, ok=not bad.size,
                              tolerance=entry_tol[k], unreliable=0, size=t.size, errors=errors)
        return TensorOutcome(result=result, values=values, atol=atol, errors=errors, floors=floor, unreliable=unjudged)
    ps = probes[k]
    cosine, fitted = _cosine_and_scale(np.array([p.dot for p in ps]), np.array([p.num for p in ps]))
    error, index, tol = max(p.error for p in ps), (), rtols[k]
    search = searches.get(k)
    if search is not None and search.found:
        c = claimed[k].reshape(-1)
        values, atol, errors = np.full(t.shape, math.nan), np.full(t.shape, math.inf), np.full(t.shape, math.nan)
        for j, (g, a) in search.found.items():
            values.flat[j], atol.flat[j] = g, a
            errors.flat[j] = relative_error(np.array([c[j]]), np.array([g]), max(floors[k], a / entry_tol[k]))[0]
        worst = int(np.nanargmax(errors.reshape(-1)))
        if errors.flat[worst] > entry_tol[k]:
            error, tol = float(errors.flat[worst]), entry_tol[k]
            index = tuple(int(i) for i in np.unravel_index(worst, t.shape)) if t.shape else ()
    ok = not any(p.fails() for p in ps)
    result = TensorResult(path=t.path, layer=t.layer, shape=t.shape, error=float(error), worst_index=index,
                          checked=t.size, cosine=cosine, scale=fitted, ok=ok, tolerance=tol, unreliable=0, size=t.size,
                          errors=errors)
    return TensorOutcome(result=result, values=values, atol=atol, errors=errors, floors=floor, unreliable=unjudged)


def _judgement(plan, ad, trusted, parts, unavailable, probes, scale) -> Judgement:
    located = ("central",) if any(np.isfinite(p.values).any() for k, p in enumerate(parts) if k not in trusted) else ()
    values, atol = tuple(p.values for p in parts), tuple(p.atol for p in parts)
    if ad is not None and trusted:
        agreement = max([p.ref_error for k in trusted for p in probes.get(k, [])], default=0.0)
        summary = ReferenceSummary("autodiff", ("autodiff", "directional") + located, {"directional": agreement},
                                   dict(unavailable), int(sum(int(np.sum(parts[k].unreliable)) for k in trusted)))
        primary = Estimate("autodiff", values, atol, ad.rtol)
    else:
        summary = ReferenceSummary("directional", ("directional",) + located, {}, dict(unavailable),
                                   int(sum(int(np.sum(p.unreliable)) for p in parts)))
        primary = Estimate("directional", values, atol, accuracy("central", plan.loss_eps))
    return Judgement(primary, tuple(p.result for p in parts), summary, tuple(p.unreliable for p in parts),
                     tuple(p.errors for p in parts), scale, tuple(p.floors for p in parts))


def _entries(t: Any, js: Sequence[int]) -> str:
    return ", ".join(str(tuple(int(i) for i in np.unravel_index(j, t.shape)) if t.shape else ()) for j in js)


def _notes(plan, cap, default, limit, used, r, seed, live, probes, trusted, searches, claimed, ad,
           kinked=frozenset()) -> tuple[str, ...]:
    size, tensors, total = plan.structure.size, plan.structure.tensors, plan.evaluations + used
    notes = [f"{size:,} parameters is more than the {limit:,} checked entry by entry by default, so the check ran "
             f"on a budget of {cap:,} loss evaluations ({total:,} used) instead of about {2 * size:,}; pass budget= "
             "to spend more or fewer." if default else f"budget: {cap:,} loss evaluations ({total:,} used); an "
             f"entry-by-entry check of the {size:,} parameters would take about {2 * size:,}."]
    if ad is not None and trusted:
        worst = max([p.ref_error for k in trusted for p in probes.get(k, [])], default=0.0)
        notes.append(f"autodiff was compared with every claimed entry of {len(trusted)} tensors "
                     f"({sum(tensors[k].size for k in trusted):,} entries); autodiff itself agreed with central "
                     f"differences of the loss along {r} random direction(s) per tensor (largest relative "
                     f"disagreement {worst:.1e}).")
    directional = [k for k in live if k not in trusted]
    if directional:
        notes.append(f"a pass below means: the claimed gradient agreed with central differences of the loss along {r} "
                     f"random unit direction(s) per tensor (seed {seed}); for an error that does not depend on those "
                     "directions, the chance that it passes every test is at most the figure given.")
    for k in directional:
        t, ps, search = tensors[k], probes[k], searches.get(k)
        if ad is not None:
            notes.append(f"{t.path}: autodiff disagrees with central differences along random directions (relative "
                         f"{max(p.ref_error for p in ps):.2g}), so it was not used for this tensor.")
        if k in kinked:
            notes.append(f"{t.path}: a directional test failed, but the loss has a kink along that direction (its "
                         "slope jumps within the step: a ReLU unit or a max near a tie), so the test says nothing "
                         "about the claimed values and they were not judged; a budget of at least "
                         f"{2 * size + plan.evaluations:,} checks entry by entry, kinks included.")
            continue
        if search is None:
            taus, norm = [p.tau for p in ps], float(np.linalg.norm(claimed[k]))
            e99 = detectable_norm(taus, t.size)
            share = f" ({e99 / norm:.2g} of the claimed gradient's norm)" if norm > 0 else ""
            notes.append(f"{t.path}: {len(ps)} directional test(s) over all {t.size:,} entries passed; an error of "
                         f"norm {e99:.2g}{share} or more would have been seen with probability at least "
                         f"{DETECTION:.0%}, "
                         "and one entry off by 1% of the tensor's RMS gradient entry would be missed with probability "
                         f"at most {miss_probability(taus, t.size, 0.01 * norm / math.sqrt(t.size)):.2g}.")
            continue
        (lo, hi), found = search.narrowed, sorted(search.found)
        where = f"flat entries {lo} to {hi - 1} ({hi - lo:,} entries)"
        parts = [f"group testing located the wrong entr{'y' if len(found) == 1 else 'ies'} {_entries(t, found)} in "
                 f"{search.cost} evaluations, each confirmed by central differences on its own"] if found else []
        parts += {"more": ["more wrong entries remain (the test still fails with these accounted for)"],
                  "spread": [f"bisection narrowed it to {where}, where neither half fails alone: the error is spread "
                             "over many entries"],
                  "budget": [f"the budget ran out while bisecting; wrong entries remain among {where}"],
                  "unconfirmed": [f"bisection led to entry {_entries(t, [lo])}, where central differences agree with "
                                  "the claimed value: the error is spread too thin to locate, or noise upset the test"],
                  }.get(search.outcome, [])
        if search.outcome == "unconfirmed":
            parts = parts[-1:]
        notes.append(f"{t.path}: a directional test failed (relative discrepancy {search.top.error:.2g}, tolerance "
                     f"{search.top.rtol:.0e}); " + "; then ".join(parts) + ".")
    return tuple(notes)
