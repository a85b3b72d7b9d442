"""Directional tests and their localisation by group testing, for budgeted checks.

The reasoning behind steps and tolerances is in the docstring of ``gradcheck._scale.budgeted``; this
module holds the machinery: a test along one direction (:class:`Probe`), the
session that spends the budget, bisection of a failing tensor's entries, and the
confirmation of the entries found. ``gradcheck._scale.budgeted`` assembles the report from them.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Sequence

import numpy as np

from .._check.compare import relative_error
from .._core.precision import ROUNDOFF_SAFETY, rounding_scale, typical_size
from .._references.finite_difference import central_entry
from .._references.kinks import kink_explains
from .perturbations import Move, raw_direction

if TYPE_CHECKING:
    from gradcheck._check.inputs import Plan

__all__ = ["Probe", "miss_probability", "detectable_norm", "MAX_DIRECTIONS", "MAX_LOCATED", "DETECTION"]

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

    For ``u`` uniform on the unit sphere of ``R^m`` and a fixed ``e``, ``<e, u>`` is distributed as
    ``|e| u_1``, and the density of ``u_1`` is ``c_m (1 - t^2)^((m - 3) / 2) <= c_m < sqrt(m / (2 pi))``
    for ``m >= 3`` (the last step is Gautschi's inequality for ``Gamma(m/2) / Gamma((m-1)/2)``; both are
    standard facts, quoted from memory; ``m <= 2`` satisfies the bound directly). So
    ``P(|u_1| <= a) <= a sqrt(2 m / pi)``. A test passes only if ``|<e, u>| <= 2 tau`` (the reference may
    itself be off by ``tau``), so each misses with probability at most ``2 tau sqrt(2 m / pi) / |e|``, and
    independent directions multiply.

    Example:
        >>> round(miss_probability([1e-3, 1e-3], 100, 1.0), 6)
        0.000255
    """
    p = 1.0
    for tau in taus:
        p *= min(1.0, 2.0 * tau * math.sqrt(2.0 * m / math.pi) / error_norm) if error_norm > 0 else 1.0
    return p


def detectable_norm(taus: Sequence[float], m: int, chance: float = DETECTION) -> float:
    """The smallest error norm the tests catch with probability ``chance`` by the bound (bisection in log)."""
    lo = math.log(max(min(taus), 1e-300) * 1e-3)
    hi = math.log(max(max(taus), 1e-300) * 4.0 * math.sqrt(2.0 * m / math.pi) / (1.0 - chance))
    for _ in range(80):
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if miss_probability(taus, m, math.exp(mid)) > 1.0 - chance else (lo, mid)
    return math.exp(hi)


@dataclass(frozen=True)
class Probe:
    """One directional test on flat entries ``lo:hi`` of tensor ``k`` along the direction named ``key``.

    ``num`` is the central-difference derivative along the unit direction, ``dot`` the claimed one,
    ``ref`` autodiff's (NaN without it); ``scale`` and ``scale_ref`` are the relative errors'
    denominators; ``norm`` is the raw direction's length on ``lo:hi`` (so two halves add up).
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
        return abs(self.num - self.dot) / self.scale

    @property
    def ref_error(self) -> float:
        return abs(self.num - self.ref) / self.scale_ref

    @property
    def tau(self) -> float:
        return self.rtol * self.scale

    def fails(self) -> bool:
        return not self.error <= self.rtol


class _Session:
    """One budgeted check: the runner, the budget left, the claimed values and autodiff's (when traced)."""

    def __init__(self, plan: Plan, claimed: Sequence[np.ndarray], runner: Any, allowance: int, rtols: list[float]):
        self.plan, self.claimed, self.runner, self.allowance, self.rtols = plan, claimed, runner, allowance, rtols
        self.ref: Sequence[np.ndarray] | None = None
        self.eps = plan.loss_eps
        self.extra = 0  # evaluations spent outside the runner (autodiff)
        self.typical = [typical_size(b) if b.size else 1.0 for b in plan.base]

    @property
    def used(self) -> int:
        return self.runner.count + self.extra

    def affordable(self, n: int) -> bool:
        return self.used + n <= self.allowance

    def measure(self, specs: Sequence[tuple[int, tuple, int, int]], fraction: float = 1.0) -> list[Probe]:
        """Directional tests for ``(k, key, lo, hi)`` specs, two evaluations each, in one runner call."""
        steps = [fraction * self.eps ** (1 / 3) * max(float(np.linalg.norm(self.plan.base[k].reshape(-1)[lo:hi])),
                                                      self.typical[k]) for k, _, lo, hi in specs]
        f = self.runner([Move(k, key, lo, hi, sign * h) for (k, key, lo, hi), h in zip(specs, steps)
                         for sign in (1.0, -1.0)])
        noise = ROUNDOFF_SAFETY * self.eps * rounding_scale(self.plan.f0)
        out = []
        for j, ((k, key, lo, hi), h) in enumerate(zip(specs, steps)):
            num, rtol = float((f[2 * j] - f[2 * j + 1]) / (2.0 * h)), self.rtols[k]
            z = raw_direction(key, lo, hi)
            norm = float(np.linalg.norm(z))
            c = self.claimed[k].reshape(-1)[lo:hi]
            dot = float(c @ z) / norm
            scale = max(abs(num), abs(dot), float(np.linalg.norm(c)) / math.sqrt(hi - lo), noise / h / rtol)
            ref, scale_ref = math.nan, math.inf
            if self.ref is not None:
                r = self.ref[k].reshape(-1)[lo:hi]
                ref = float(r @ z) / norm
                scale_ref = max(abs(num), abs(ref), float(np.linalg.norm(r)) / math.sqrt(hi - lo), noise / h / rtol)
            out.append(Probe(k, key, lo, hi, num, dot, ref, scale, scale_ref, norm, rtol))
        return out

    def kink_explains(self, p: Probe) -> bool:
        """Whether a kink of the loss along ``p``'s direction, within its step, explains its failure (six evaluations).

        Along a direction that moves many entries at once, some ReLU unit or max is likely to sit within a
        step of its kink, and the central difference across it is off by up to the jump in slope, whatever
        the claimed values. The second difference ``(f(x + h u) - 2 f(x) + f(x - h u)) / h`` is ``h f''``
        on a smooth loss (to O(h^3)), so it halves exactly each time the step halves; across a kink it does
        not (inside the step it stays near the jump, outside it drops to nearly nothing). Measured at h,
        h/2 and h/4, a ratio of consecutive ones off 1/2 by more than 0.1, above the rounding floor, is a
        kink (``_references.kinks``; ``find_kinks`` uses
        its entry-by-entry criterion); it explains the failure when the
        claimed derivative is within the largest of them (a bound on the jump) of the measured one. A
        gross mistake (a sign, a factor of 2) still fails.
        """
        h = self.eps ** (1 / 3) * max(float(np.linalg.norm(self.plan.base[p.k].reshape(-1)[p.lo:p.hi])),
                                      self.typical[p.k])
        steps = (h, h / 2, h / 4)
        f = self.runner([Move(p.k, p.key, p.lo, p.hi, sign * step) for step in steps for sign in (1.0, -1.0)])
        return kink_explains(self.plan.f0, f[0::2], f[1::2], steps, abs(p.num - p.dot), self.eps, "not_halving")

    def confirm(self, p: Probe) -> Probe:
        """A failing test measured again at half the step and extrapolated (Richardson): two evaluations.

        Truncation error shrinks fourfold when the step halves; a wrong claimed value does not. The
        extrapolated derivative is judged with a tolerance widened by the change between the two steps
        (the first step's own truncation error, which bounds the extrapolated value's while halving the
        step at least halves the error) and by the 1.5 times larger rounding of the combination.
        """
        q = self.measure([(p.k, p.key, p.lo, p.hi)], 0.5)[0]
        extra = abs(p.num - q.num) / p.rtol
        return dataclasses.replace(p, num=(4.0 * q.num - p.num) / 3.0, scale=1.5 * max(p.scale, q.scale) + extra,
                                   scale_ref=1.5 * max(p.scale_ref, q.scale_ref) + extra)

    def entry(self, k: int, j: int) -> tuple[float, float]:
        """Central difference at flat entry ``j`` of tensor ``k`` (two evaluations): value and accuracy."""
        return central_entry(self.runner, self.plan, k, j, self.eps)


@dataclass
class _Search:
    """Group testing in one tensor: the tests measured so far and the wrong entries located."""

    top: Probe
    cache: dict
    found: dict = field(default_factory=dict)  # flat index -> (reference value, its accuracy)
    outcome: str = "located"
    narrowed: tuple = (0, 0)
    cost: int = 2

    def ratio(self, p: Probe, claimed: np.ndarray) -> float:
        """``|<claimed - true, z>|`` on the probe's entries, less the located entries' known errors, over its bound."""
        gap, bound = (p.dot - p.num) * p.norm, p.tau * p.norm
        for j, (g, atol) in self.found.items():
            if p.lo <= j < p.hi:
                zj = float(raw_direction(p.key, j, j + 1)[0])
                gap, bound = gap - (claimed[j] - g) * zj, bound + atol * abs(zj)
        return abs(gap) / bound if bound > 0 else math.inf


def _locate(s: _Session, k: int, top: Probe, entry_tol: float, floor: float) -> _Search:
    """Bisect tensor ``k``'s flat entries with restricted directional tests until single wrong entries remain."""
    m, c, before = top.hi, s.claimed[k].reshape(-1), s.used
    search = _Search(top, {(0, m): top}, narrowed=(0, m))

    def stop(outcome: str, lo: int, hi: int) -> _Search:
        search.outcome, search.narrowed, search.cost = outcome, (lo, hi), s.used - before + 2
        return search

    while len(search.found) < MAX_LOCATED:
        if search.ratio(top, c) <= 1.0:
            return stop("located", *search.narrowed)
        lo, hi = 0, m
        while hi - lo > 1:
            halves = [(lo, (lo + hi) // 2), ((lo + hi) // 2, hi)]
            todo = [h for h in halves if h not in search.cache]
            if todo and not s.affordable(2 * len(todo)):
                return stop("budget", lo, hi)
            search.cache.update(zip(todo, s.measure([(k, top.key, a, b) for a, b in todo])))
            ra, rb = (search.ratio(search.cache[h], c) for h in halves)
            if max(ra, rb) <= 1.0:
                return stop("spread", lo, hi)
            lo, hi = halves[0] if ra >= rb else halves[1]
        if lo in search.found or not s.affordable(2):
            return stop("more" if lo in search.found else "budget", lo, hi)
        g, atol = s.entry(k, lo)
        search.found[lo] = (g, atol)
        if relative_error(np.array([c[lo]]), np.array([g]), max(floor, atol / entry_tol))[0] <= entry_tol:
            return stop("unconfirmed", lo, hi)
        search.narrowed = (lo, hi)
    return stop("located" if search.ratio(top, c) <= 1.0 else "more", *search.narrowed)


def _confirm_suspects(s: _Session, ps: list[Probe], traced: bool) -> None:
    """Re-measure failing tests at half the step (in place), so truncation error is not taken for a mistake.

    Every disagreement with autodiff is confirmed (trust in autodiff rests on them); failures of the
    claimed values are confirmed worst first until one stands, which settles that the tensor is wrong.
    """
    done = set()
    for i, p in enumerate(ps):
        if traced and p.ref_error > p.rtol and s.affordable(2):
            ps[i] = s.confirm(p)
            done.add(i)
    for i in sorted(range(len(ps)), key=lambda i: -ps[i].error / ps[i].rtol):
        if not ps[i].fails() or (i not in done and not s.affordable(2)):
            break
        if i not in done:
            ps[i] = s.confirm(ps[i])
        if ps[i].fails():
            break


def _localisation_cost(m: int) -> int:
    """Evaluations to locate one wrong entry among ``m``: two tests of two evaluations per halving, and the entry."""
    return 4 * math.ceil(math.log2(m)) + 2 if m > 1 else 2
