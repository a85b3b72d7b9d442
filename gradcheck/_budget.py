"""Checking a large network within a budget of loss evaluations: directional tests and group testing.

Entry-by-entry central differences cost two loss evaluations per parameter. For
a network of a million parameters this module spends a number of evaluations
that does not grow with the parameter count:

* **Directional tests.** For each tensor, a random unit direction ``u`` (uniform
  on the sphere of that tensor's entries) gives two evaluations and the
  directional derivative ``D = (f(x + h u) - f(x - h u)) / 2h``, which must equal
  ``<claimed, u>``. An error vector ``e`` in the tensor shows up as
  ``<e, u>``; for a fixed ``e`` and random ``u`` that is rarely small, which
  gives the pass its meaning as a probability (:func:`miss_probability`).
* **Group testing.** When a tensor fails, the failing direction is restricted to
  each half of the tensor's flat entries (entries outside the half are zeroed),
  and the half whose test fails is halved again, so one wrong entry among ``m``
  is found in about ``4 log2(m)`` evaluations. The entry found is then checked
  on its own with central differences, and its known error is subtracted from
  every test that contains it, so further bisections find further wrong entries.
* **Autodiff.** When JAX can trace the loss, its gradient is the whole reference
  in one evaluation and every entry is compared with it; the directional tests
  then serve as the independent check of autodiff itself (a traced loss that
  computes another function than the numpy one is caught there). A JVP would
  give the same numbers as the dot product with that gradient, so none is
  computed.

Numerical choices. The step along a direction is ``eps^(1/3)`` times the size of
the moved entries, ``max(||x_S||, typical entry)``: the rule of
``_numerical.steps_for`` applied to the line through ``x`` along ``u``, on which
``x`` itself has length ``||x_S||``. (Scaling by ``sqrt(m)`` instead, so that each
entry moves as much as in an entry-by-entry check, moves the next layer's input
``sqrt(fan-in)`` times further; measured on tanh networks of up to 1e6 weights
it made the truncation error some 100 times larger.) A test passes when
``|D - <claimed, u>| <= rtol * max(|D|, |<claimed, u>|, ||claimed_S|| / sqrt(m_S),
noise / rtol)``: the third term is the typical size of ``<claimed, u>`` (a
direction nearly orthogonal to the gradient is not judged relative to a tiny
number), and ``noise = ROUNDOFF_SAFETY * eps * |f| / h`` is the rounding floor
``_numerical`` assigns central differences. ``rtol`` is one tenth of the
entry-by-entry tolerance (1e-6 for float64 gradients, which is the accuracy
``_numerical`` claims for central differences; measured disagreements with JAX's
exact directional derivative on tanh networks stayed below 5e-8).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np

from ._autodiff import autodiff_estimate
from ._compare import FLOOR_FRACTION, Judgement, _cosine_and_scale, judge, relative_error, tolerance_for
from ._errors import describe, input_error
from ._numerical import EPS64, ROUNDOFF_SAFETY, Estimate, _roundoff, steps_for, typical_size
from ._parallel import Entries, ExecutorRunner, Move, SerialRunner, raw_direction
from ._progress import open_bar
from ._report import ReferenceSummary, TensorResult

__all__ = ["check_within_budget", "miss_probability", "detectable_norm", "DEFAULT_BUDGET", "MAX_DIRECTIONS"]

DEFAULT_BUDGET = 1000
"""Loss evaluations for a network above ``FULL_CHECK_LIMIT`` parameters when no budget is given."""

MAX_DIRECTIONS = 8
"""Random directions per tensor at most: eight independent tests make a miss a product of eight small numbers."""

MAX_LOCATED = 3
"""Wrong entries located per tensor at most; a mistake that spreads further is described, not listed."""

DIRECTIONAL_MARGIN = 10.0
"""The directional tolerance is the entry tolerance divided by this (see the module docstring)."""

DETECTION = 0.99
"""The probability used to state what a pass means."""


def miss_probability(taus: Sequence[float], m: int, error_norm: float) -> float:
    """Upper bound on the chance that an error vector of norm ``error_norm`` passes every test.

    For ``u`` uniform on the unit sphere of ``R^m`` and a fixed ``e``,
    ``<e, u>`` is distributed as ``|e| u_1``; the density of ``u_1`` is
    ``c_m (1 - t^2)^((m - 3) / 2) <= c_m = Gamma(m/2) / (sqrt(pi) Gamma((m-1)/2))``,
    and ``c_m < sqrt(m / (2 pi))`` by Gautschi's inequality (both standard facts,
    quoted from memory), so ``P(|u_1| <= a) <= a sqrt(2 m / pi)``. A test passes
    only if ``|<e, u>| <= 2 tau`` (the reference may itself be off by ``tau``),
    so each test misses with probability at most ``2 tau sqrt(2 m / pi) / |e|``,
    and independent directions multiply.

    Example:
        >>> round(miss_probability([1e-3, 1e-3], 100, 1.0), 6)
        0.000255
    """
    if error_norm <= 0:
        return 1.0
    p = 1.0
    for tau in taus:
        p *= min(1.0, 2.0 * tau * math.sqrt(2.0 * m / math.pi) / error_norm)
    return p


def detectable_norm(taus: Sequence[float], m: int, chance: float = DETECTION) -> float:
    """The smallest error norm that the tests would have caught with probability ``chance`` (by the bound)."""
    if not taus:
        return math.inf
    lo = math.log(max(min(taus), 1e-300) * 1e-3)
    hi = math.log(max(max(taus), 1e-300) * 4.0 * math.sqrt(2.0 * m / math.pi) / (1.0 - chance) + 1e-300)
    for _ in range(80):
        mid = 0.5 * (lo + hi)
        if miss_probability(taus, m, math.exp(mid)) > 1.0 - chance:
            lo = mid
        else:
            hi = mid
    return math.exp(hi)


@dataclass(frozen=True)
class Probe:
    """One directional test on flat entries ``lo:hi`` of tensor ``k`` along the direction named ``key``.

    ``num`` is the central-difference derivative along the unit direction,
    ``dot`` the claimed one, ``ref`` autodiff's (NaN without autodiff); ``scale``
    and ``scale_ref`` are the denominators of the relative errors; ``norm`` is
    the length of the raw direction on ``lo:hi`` (to add tests of two halves).
    """

    k: int
    key: tuple
    lo: int
    hi: int
    num: float
    dot: float
    ref: float
    scale: float
    scale_ref: float
    norm: float
    rtol: float

    @property
    def error(self) -> float:
        return abs(self.num - self.dot) / self.scale if math.isfinite(self.dot) else math.inf

    @property
    def ref_error(self) -> float:
        return abs(self.num - self.ref) / self.scale_ref

    @property
    def tau(self) -> float:
        return self.rtol * self.scale

    def fails(self) -> bool:
        return not self.error <= self.rtol


class _Session:
    """The state of one budgeted check: the runner, what is left of the budget, and the claimed values."""

    def __init__(self, plan: Any, claimed: Sequence[np.ndarray], runner: Any, allowance: int, rtol: float,
                 ref: Sequence[np.ndarray] | None, bar: Any):
        self.plan, self.claimed, self.runner, self.allowance = plan, claimed, runner, allowance
        self.rtol, self.ref, self.bar = rtol, ref, bar
        self.eps = plan.loss_eps
        self.extra = 0  # evaluations spent outside the runner (autodiff)
        self.typical = [typical_size(b) if b.size else 1.0 for b in plan.base]

    @property
    def used(self) -> int:
        return self.runner.count + self.extra

    def affordable(self, n: int) -> bool:
        return self.used + n <= self.allowance

    def measure(self, specs: Sequence[tuple[int, tuple, int, int]]) -> list[Probe]:
        """Directional tests for ``(k, key, lo, hi)`` specs, two evaluations each, in one runner call."""
        steps, moves = [], []
        for k, key, lo, hi in specs:
            x = self.plan.base[k].reshape(-1)[lo:hi]
            h = self.eps ** (1.0 / 3.0) * max(float(np.linalg.norm(x)), self.typical[k])
            steps.append(h)
            moves += [Move(k, key, lo, hi, h), Move(k, key, lo, hi, -h)]
        f = self.runner(moves)
        noise_unit = ROUNDOFF_SAFETY * self.eps * max(abs(self.plan.f0), np.finfo(np.float64).tiny)
        out = []
        for j, ((k, key, lo, hi), h) in enumerate(zip(specs, steps)):
            num = (f[2 * j] - f[2 * j + 1]) / (2.0 * h)
            z = raw_direction(key, lo, hi)
            norm = float(np.linalg.norm(z))
            c = self.claimed[k].reshape(-1)[lo:hi]
            dot = float(c @ z) / norm
            floor = noise_unit / h / self.rtol
            scale = max(abs(num), abs(dot), float(np.linalg.norm(c)) / math.sqrt(hi - lo), floor)
            ref, scale_ref = math.nan, math.inf
            if self.ref is not None:
                r = self.ref[k].reshape(-1)[lo:hi]
                ref = float(r @ z) / norm
                scale_ref = max(abs(num), abs(ref), float(np.linalg.norm(r)) / math.sqrt(hi - lo), floor)
            out.append(Probe(k, key, lo, hi, float(num), dot, ref, scale, scale_ref, norm, self.rtol))
        return out

    def entry(self, k: int, j: int) -> tuple[float, float]:
        """Central difference at flat entry ``j`` of tensor ``k`` (two evaluations): value and accuracy."""
        flat = self.plan.base[k].reshape(-1)
        h = float(steps_for(flat, 2, self.eps)[j])
        x = flat[j]
        up, down = x + h, x - h
        fp, fm = self.runner([Entries(k, np.array([j]), np.array([up])), Entries(k, np.array([j]), np.array([down]))])
        return float((fp - fm) / (up - down)), float(_roundoff(self.plan.f0, np.array([h]), self.eps)[0])


@dataclass
class _Search:
    """Group testing in one tensor: the tests measured so far and the wrong entries located."""

    top: Probe
    cache: dict
    found: dict  # flat index -> (reference value, its accuracy)
    outcome: str = "located"
    narrowed: tuple = (0, 0)

    def residual(self, p: Probe, claimed: np.ndarray) -> tuple[float, float]:
        """``<claimed - true, z>`` on the probe's entries, less the located entries' known errors, and its bound."""
        gap = (p.dot - p.num) * p.norm
        bound = p.tau * p.norm
        for j, (g, atol) in self.found.items():
            if p.lo <= j < p.hi:
                zj = float(raw_direction(p.key, j, j + 1)[0])
                gap -= (claimed[j] - g) * zj
                bound += atol * abs(zj)
        return gap, bound

    def ratio(self, p: Probe, claimed: np.ndarray) -> float:
        gap, bound = self.residual(p, claimed)
        return abs(gap) / bound if bound > 0 else math.inf


def _locate(s: _Session, k: int, top: Probe, entry_tol: float, floor: float) -> _Search:
    """Bisect tensor ``k``'s flat entries with restricted directional tests until single wrong entries remain."""
    m = top.hi
    c = s.claimed[k].reshape(-1)
    search = _Search(top, {(0, m): top}, {}, narrowed=(0, m))
    while len(search.found) < MAX_LOCATED:
        if search.ratio(search.cache[(0, m)], c) <= 1.0:
            search.outcome = "explained" if search.found else "passed"
            return search
        lo, hi = 0, m
        while hi - lo > 1:
            mid = (lo + hi) // 2
            halves = [(lo, mid), (mid, hi)]
            todo = [h for h in halves if h not in search.cache]
            if todo and not s.affordable(2 * len(todo)):
                search.outcome, search.narrowed = "budget", (lo, hi)
                return search
            for h, p in zip(todo, s.measure([(k, top.key, a, b) for a, b in todo])):
                search.cache[h] = p
            ra, rb = (search.ratio(search.cache[h], c) for h in halves)
            if max(ra, rb) <= 1.0:
                search.outcome, search.narrowed = "spread", (lo, hi)
                return search
            lo, hi = halves[0] if ra >= rb else halves[1]
        if not s.affordable(2):
            search.outcome, search.narrowed = "budget", (lo, hi)
            return search
        g, atol = s.entry(k, lo)
        search.found[lo] = (g, atol)
        search.narrowed = (lo, hi)
        err = relative_error(np.array([c[lo]]), np.array([g]), max(floor, atol / entry_tol))[0]
        if err <= entry_tol:
            search.outcome = "unconfirmed"
            return search
    search.outcome = "located" if search.ratio(search.cache[(0, m)], c) <= 1.0 else "more"
    return search


def _budget_value(budget: Any) -> int:
    if isinstance(budget, bool) or not isinstance(budget, (int, np.integer)) or budget < 1:
        raise input_error("budget", "a positive whole number of loss evaluations", describe(budget),
                          "Pass e.g. budget=500, or leave it out.")
    return int(budget)


def _localisation_cost(m: int) -> int:
    """Evaluations to locate one wrong entry among ``m``: two tests of two evaluations per halving, and the entry."""
    return 4 * math.ceil(math.log2(m)) + 2 if m > 1 else 2


def default_budget(plan: Any, traced: Any) -> int:
    """:data:`DEFAULT_BUDGET`, or more when the network has so many tensors that four tests each need more."""
    sizes = [t.size for t in plan.structure.tensors if t.size > 0]
    need = plan.evaluations + 1 + 8 * len(sizes) + _localisation_cost(max(sizes, default=1))
    return max(DEFAULT_BUDGET, need)


def _full_cost(plan: Any, traced: Any) -> int:
    """An upper bound on the default entry-by-entry check: central differences, autodiff, and chunk padding."""
    from ._batched import MAX_BATCH

    return 2 * plan.structure.size + (2 + MAX_BATCH if traced is not None else 0)


def _full_check(plan: Any, claimed: list, dtypes: list, seed: int, executor: Any, progress: Any,
                tolerance: float | None, cap: int, avail: int) -> tuple[Judgement, int, tuple[str, ...]]:
    from ._examine import CONFIRM_PER_TENSOR, _confirm, compute_references

    estimates, unavailable, spent, _ = compute_references(plan, None, seed, executor, progress)
    judgement = judge(plan.structure, claimed, dtypes, estimates, unavailable, tolerance)
    n_tensors = len(plan.structure.tensors)
    confirm_cost = 1 + 2 * n_tensors + 4 * CONFIRM_PER_TENSOR * n_tensors
    if len(estimates) == 1 and not all(t.ok for t in judgement.tensors) and avail - spent >= confirm_cost:
        estimates, extra, why = _confirm(plan, judgement, estimates, seed)
        spent += extra
        judgement = judge(plan.structure, claimed, dtypes, estimates, {**unavailable, **why}, tolerance)
    note = (f"the budget of {cap:,} loss evaluations covers the entry-by-entry check, so all "
            f"{plan.structure.size:,} entries were checked one by one.")
    return judgement, spent, (note,)


def check_within_budget(plan: Any, claimed: list, dtypes: list, traced: Any, budget: int | None = None,
                        executor: Any = None, progress: bool | None = None, seed: int = 0,
                        tolerance: float | None = None) -> tuple[Judgement, int, tuple[str, ...]]:
    """Check the claimed gradients spending at most ``budget`` loss evaluations in all (the plan's included).

    Returns the judgement, the evaluations spent here (the plan's are not
    counted again), and notes for the report saying what was checked and what a
    pass means. A budget that covers the entry-by-entry check gets that check.
    """
    from ._examine import FULL_CHECK_LIMIT

    tensors = plan.structure.tensors
    size = plan.structure.size
    cap = default_budget(plan, traced) if budget is None else _budget_value(budget)
    avail = cap - plan.evaluations
    finite = [bool(np.all(np.isfinite(c))) for c in claimed]
    live = [k for k, t in enumerate(tensors) if t.size > 0 and finite[k]]
    need = 2 * len(live) + (1 if traced is not None else 0)
    if avail < need:
        raise input_error("budget", f"at least {plan.evaluations + need} loss evaluations ({plan.evaluations} for "
                          f"the first look at the loss, {'1 for autodiff, ' if traced is not None else ''}2 for one "
                          "directional test of each tensor)", f"budget={budget}",
                          f"Pass budget={plan.evaluations + need} or more, or leave it out for the default.")
    if avail >= _full_cost(plan, traced):
        return _full_check(plan, claimed, dtypes, seed, executor, progress, tolerance, cap, avail)
    eps = plan.loss_eps
    central_like = Estimate("central", (), (), rtol=1e-6 if eps <= EPS64 else 1e-2)
    entry_tol = [tolerance if tolerance is not None else tolerance_for(d, central_like) for d in dtypes]
    rtols = [tolerance if tolerance is not None else t / DIRECTIONAL_MARGIN for t in entry_tol]
    runner = ExecutorRunner(plan, executor) if executor is not None else SerialRunner(plan)
    bar = open_bar(progress, 1, "gradcheck: directional checks")
    runner.progress = bar.callback
    session = _Session(plan, claimed, runner, avail, 0.0, None, bar)
    ad, unavailable = None, {}
    try:
        if traced is not None:
            got = autodiff_estimate(traced, plan.base, plan.f0)
            session.extra += 1
            if isinstance(got, str):
                unavailable["autodiff"] = got
            else:
                ad = got if eps <= EPS64 else dataclasses.replace(
                    got, rtol=1e-5, atol=tuple(a * eps / EPS64 for a in got.atol))
                session.ref = ad.values
        else:
            unavailable["autodiff"] = ("the loss could not be traced by JAX, so central differences along random "
                                       "directions are the reference")
        reserve = _localisation_cost(max([tensors[k].size for k in live], default=1))
        r = int(np.clip((avail - session.used - reserve) // max(2 * len(live), 1), 1, MAX_DIRECTIONS))
        bar.grow(2 * r * len(live) + reserve)
        probes: dict[int, list[Probe]] = {k: [] for k in live}
        for k in live:  # one runner call per tensor keeps the per-probe tolerance the tensor's own
            session.rtol = rtols[k]
            probes[k] = session.measure([(k, (seed, k, d), 0, tensors[k].size) for d in range(r)])
        trusted: set[int] = set()
        jud = None
        if ad is not None:
            trusted = {k for k in range(len(tensors))
                       if k not in live or all(p.ref_error <= p.rtol for p in probes[k])}
            jud = judge(plan.structure, claimed, dtypes, [ad], {}, tolerance)
        scale = jud.gradient_scale if jud is not None else max(
            [float(np.max(np.abs(c))) for c, ok in zip(claimed, finite) if ok and c.size], default=0.0)
        floors = [FLOOR_FRACTION["float32" if np.dtype(d).itemsize <= 4 else "float64"] * scale for d in dtypes]
        failing = [k for k in live if k not in trusted and any(p.fails() for p in probes[k])]
        failing.sort(key=lambda k: -max(p.error / p.rtol for p in probes[k]))
        searches: dict[int, tuple[_Search, int]] = {}
        for k in failing:
            session.rtol = rtols[k]
            before = session.used
            top = max(probes[k], key=lambda p: p.error / p.rtol)
            searches[k] = (_locate(session, k, top, entry_tol[k], floors[k]), session.used - before + 2)
    finally:
        bar.close()
    parts = _assemble(plan, claimed, finite, live, probes, trusted, jud, ad, searches, entry_tol, rtols, floors)
    judgement = _judgement(plan, ad, jud, trusted, parts, unavailable, probes, scale)
    notes = _notes(plan, cap, budget is None, FULL_CHECK_LIMIT, session.used, r, seed, live, probes, trusted,
                   searches, claimed, ad)
    return judgement, session.used, notes


def _unknown(shape: tuple, fill: float) -> np.ndarray:
    """A read-only array of one value, without the memory of a copy of the tensor."""
    return np.broadcast_to(np.float64(fill), shape)


def _assemble(plan, claimed, finite, live, probes, trusted, jud, ad, searches, entry_tol, rtols, floors):
    """Per tensor: (TensorResult, reference values, their accuracy, per-entry errors, floors, unreliable)."""
    out = []
    for k, t in enumerate(plan.structure.tensors):
        if k in trusted:
            out.append((jud.tensors[k], ad.values[k], ad.atol[k], jud.errors[k], jud.floors[k], jud.unreliable[k]))
            continue
        no = np.broadcast_to(False, t.shape)
        if not finite[k]:
            bad = np.flatnonzero(~np.isfinite(claimed[k].reshape(-1)))[0]
            index = tuple(int(i) for i in np.unravel_index(bad, t.shape)) if t.shape else ()
            result = TensorResult(t.path, t.layer, t.shape, math.inf, index, t.size, math.nan, math.nan, False,
                                  entry_tol[k], 0, t.size, _unknown(t.shape, math.nan))
            out.append((result, _unknown(t.shape, math.nan), _unknown(t.shape, math.inf),
                        _unknown(t.shape, math.nan), _unknown(t.shape, floors[k]), no))
            continue
        if k not in live:  # an empty tensor: nothing to check
            result = TensorResult(t.path, t.layer, t.shape, 0.0, (), 0, math.nan, math.nan, True, rtols[k], 0, 0,
                                  _unknown(t.shape, math.nan))
            out.append((result, _unknown(t.shape, math.nan), _unknown(t.shape, math.inf),
                        _unknown(t.shape, math.nan), _unknown(t.shape, floors[k]), no))
            continue
        ps = probes[k]
        cosine, fitted = _cosine_and_scale(np.array([p.dot for p in ps]), np.array([p.num for p in ps]))
        fails = any(p.fails() for p in ps)
        error, index, tol = max(p.error for p in ps), (), rtols[k]
        values, atol, errors = _unknown(t.shape, math.nan), _unknown(t.shape, math.inf), _unknown(t.shape, math.nan)
        search = searches.get(k, (None, 0))[0]
        if search is not None and search.found:
            c = claimed[k].reshape(-1)
            values, atol, errors = np.full(t.shape, math.nan), np.full(t.shape, math.inf), np.full(t.shape, math.nan)
            for j, (g, a) in search.found.items():
                values.reshape(-1)[j], atol.reshape(-1)[j] = g, a
                errors.reshape(-1)[j] = relative_error(np.array([c[j]]), np.array([g]),
                                                       max(floors[k], a / entry_tol[k]))[0]
            worst = int(np.nanargmax(errors.reshape(-1)))
            if errors.reshape(-1)[worst] > entry_tol[k]:
                error, tol = float(errors.reshape(-1)[worst]), entry_tol[k]
                index = tuple(int(i) for i in np.unravel_index(worst, t.shape)) if t.shape else ()
        result = TensorResult(t.path, t.layer, t.shape, float(error), index, t.size, cosine, fitted, not fails, tol,
                              0, t.size, errors)
        out.append((result, values, atol, errors, _unknown(t.shape, floors[k]), no))
    return out


def _judgement(plan, ad, jud, trusted, parts, unavailable, probes, scale) -> Judgement:
    located = any(np.isfinite(p[1]).any() for k, p in enumerate(parts) if k not in trusted)
    if ad is not None and trusted:
        agreement = [p.ref_error for k in trusted for p in probes.get(k, [])]
        methods = ("autodiff", "directional") + (("central",) if located else ())
        summary = ReferenceSummary("autodiff", methods, {"directional": max(agreement, default=0.0)},
                                   dict(unavailable), int(sum(int(np.sum(parts[k][5])) for k in trusted)))
        primary = Estimate("autodiff", tuple(p[1] for p in parts), tuple(p[2] for p in parts), ad.rtol)
    else:
        methods = ("directional",) + (("central",) if located else ())
        summary = ReferenceSummary("directional", methods, {}, dict(unavailable), 0)
        rtol = 1e-6 if plan.loss_eps <= EPS64 else 1e-2
        primary = Estimate("directional", tuple(p[1] for p in parts), tuple(p[2] for p in parts), rtol)
    return Judgement(primary, tuple(p[0] for p in parts), summary, tuple(p[5] for p in parts),
                     tuple(p[3] for p in parts), scale, tuple(p[4] for p in parts))


def _entries(t: Any, js: Sequence[int]) -> str:
    return ", ".join(str(tuple(int(i) for i in np.unravel_index(j, t.shape)) if t.shape else ()) for j in js)


def _notes(plan, cap, default, limit, used, r, seed, live, probes, trusted, searches, claimed, ad) -> tuple[str, ...]:
    size, tensors = plan.structure.size, plan.structure.tensors
    total = plan.evaluations + used
    if default:
        head = (f"{size:,} parameters is more than the {limit:,} checked entry by entry by default, so the check "
                f"ran on a budget of {cap:,} loss evaluations ({total:,} used) instead of about {2 * size:,}; pass "
                "budget= to spend more or fewer.")
    else:
        head = (f"budget: {cap:,} loss evaluations ({total:,} used); an entry-by-entry check of the {size:,} "
                f"parameters would take about {2 * size:,}.")
    notes = [head]
    if ad is not None and trusted:
        n = sum(tensors[k].size for k in trusted)
        worst = max([p.ref_error for k in trusted for p in probes.get(k, [])], default=0.0)
        notes.append(f"autodiff was compared with every claimed entry of {len(trusted)} tensors ({n:,} entries); "
                     f"autodiff itself agreed with central differences of the loss along {r} random direction(s) "
                     f"per tensor (largest relative disagreement {worst:.1e}).")
    directional = [k for k in live if k not in trusted]
    if directional:
        notes.append(f"a pass below means: the claimed gradient agreed with central differences of the loss along {r} "
                     f"random unit direction(s) per tensor (seed {seed}); for an error that does not depend on "
                     "those directions, the chance that it passes every test is at most the figure given.")
    for k in directional:
        t, ps = tensors[k], probes[k]
        if ad is not None:
            notes.append(f"{t.path}: autodiff disagrees with central differences along random directions (relative "
                         f"{max(p.ref_error for p in ps):.2g}), so it was not used for this tensor.")
        if k not in searches:
            taus = [p.tau for p in ps]
            norm = float(np.linalg.norm(claimed[k]))
            e99 = detectable_norm(taus, t.size)
            rms = norm / math.sqrt(t.size)
            miss = miss_probability(taus, t.size, 0.01 * rms)
            share = f" ({e99 / norm:.2g} of the claimed gradient's norm)" if norm > 0 else ""
            notes.append(f"{t.path}: {len(ps)} directional test(s) over all {t.size:,} entries passed; an error of norm "
                         f"{e99:.2g}{share} or more would have been seen with probability at least {DETECTION:.0%}, "
                         f"and one entry off by 1% of the tensor's RMS gradient entry would be missed with "
                         f"probability at most {miss:.2g}.")
            continue
        search, cost = searches[k]
        top = search.top
        start = (f"{t.path}: a directional test failed (relative discrepancy {top.error:.2g}, tolerance "
                 f"{top.rtol:.0e}); ")
        lo, hi = search.narrowed
        found = sorted(search.found)
        if search.outcome in ("located", "explained", "more"):
            text = (f"group testing located the wrong entr{'y' if len(found) == 1 else 'ies'} {_entries(t, found)} in "
                    f"{cost} evaluations, each confirmed by central differences on its own")
            if search.outcome == "more":
                text += "; more wrong entries remain (the test still fails with these accounted for)"
        elif search.outcome == "spread":
            text = (f"bisection narrowed it to flat entries {lo} to {hi - 1} ({hi - lo:,} entries), where neither half "
                    "fails alone: the error is spread over many entries")
        elif search.outcome == "budget":
            text = (f"the budget ran out while bisecting; the wrong entries include some among flat entries {lo} to "
                    f"{hi - 1} ({hi - lo:,} entries)")
        else:
            text = (f"bisection led to entry {_entries(t, [lo])}, where central differences agree with the claimed "
                    "value: the error is spread too thin to locate, or the test was upset by noise")
        notes.append(start + text + ".")
    return tuple(notes)
