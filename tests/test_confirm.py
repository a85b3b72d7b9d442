"""Settling failing entries before blaming them: the loss's measured rounding noise.

(Kinks and the second reference are tested in test_trust.py and test_examine.py.)
"""

from __future__ import annotations

import hashlib

import numpy as np
import pytest

import gradcheck
from gradcheck._check.confirm import measure_noise, widen_for_noise
from gradcheck._check.inputs import make_plan
from gradcheck._core.evaluator import Evaluator
from gradcheck._core.precision import EPS64
from gradcheck._references.finite_difference import central

W = np.array([0.3, -1.2, 2.0, 0.7])


def _planted_noise(w, sigma):
    """Deterministic pseudo-random noise of standard deviation sigma: the same w always gives the same value."""
    seed = int.from_bytes(hashlib.sha256(np.asarray(w, dtype=np.float64).tobytes()).digest()[:8], "little")
    return sigma * np.random.default_rng(seed).standard_normal()


@pytest.mark.parametrize("sigma", [1e-12, 1e-9, 1e-6])
def test_measured_noise_recovers_a_planted_noise_level(sigma):
    # Moré & Wild (2011), "Estimating computational noise", SIAM J. Sci. Comput. 33(3): the estimate from
    # 4th-6th differences of 9 values recovers the noise's standard deviation to within a small factor
    # (their experiments, from memory: a factor of about 2); we assert a factor of 4 either way.
    plan = make_plan(lambda p: float(np.sum(np.sin(p["w"]))) + _planted_noise(p["w"], sigma), {"w": W}, ())
    noise, spent = measure_noise(plan, seed=0)
    assert sigma / 4 <= noise <= 4 * sigma
    assert spent == 16  # one table, and one ten times wider to tell noise from a kink


def test_a_smooth_loss_measures_no_noise_beyond_its_rounding():
    plan = make_plan(lambda p: float(np.sum(np.sin(p["w"]))), {"w": W}, ())
    noise, _ = measure_noise(plan, seed=0)
    assert noise <= 10 * EPS64 * abs(plan.f0)
    ev = Evaluator(plan.loss, plan.structure, plan.base, ())
    estimates = [central(ev, plan.f0)]
    assert widen_for_noise(estimates, plan, noise) is estimates


def test_a_flat_loss_measures_no_noise():
    plan = make_plan(lambda p: 2.5, {"w": W}, ())
    assert measure_noise(plan, seed=0) == (0.0, 24)  # three tables, each spaced a hundred times wider


def test_a_kink_within_reach_is_not_mistaken_for_noise():
    # |w3 - (0.7 + 1e-6)| has its kink among the measuring points (w3 = 0.7; with seed 0 the random direction
    # moves w3 by about 1.1e-5 a point): its 4th differences change sign like noise, of size 1e-5, but they
    # grow tenfold with the spacing, and rounding noise would not
    def loss(p):
        return float(abs(p["w"][3] - (0.7 + 1e-6)) + np.sum(p["w"] ** 2))

    plan = make_plan(loss, {"w": W}, ())
    step = np.array([0, 0, 0, 1e-5])
    assert loss({"w": W + step}) - 2 * loss({"w": W}) + loss({"w": W - step}) > 1e-6  # a jump in slope nearby
    noise, spent = measure_noise(plan, seed=0)
    assert noise == 0.0 and spent == 16


X = np.array([1.0, 2.0, -1.5])
W_SAT = np.array([-10.0, -9.0, 2.0])  # w @ x = -31


def _naive_softplus(p):
    # log(1 + e^z) for z = -31 is 3.4e-14, but 1 + e^z rounds to steps of 2.2e-16 (common practice:
    # softplus should be written log1p(exp(z)) or logaddexp(0, z) for this reason)
    return float(np.log(1.0 + np.exp(p["w"] @ X)))


def test_a_loss_that_rounds_far_above_its_last_place_does_not_blame_a_correct_gradient():
    claimed = {"w": X / (1.0 + np.exp(-(W_SAT @ X)))}  # the logistic times x: exact, about 1e-14
    report = gradcheck.examine(_naive_softplus, {"w": W_SAT}, grads=claimed)
    assert report.ok, str(report)
    assert any(n.startswith("the loss's rounding noise is") and "not really checked" in n for n in report.notes)
    # a claim the loss can resolve is still judged
    wrong = gradcheck.examine(_naive_softplus, {"w": W_SAT}, grads={"w": claimed["w"] + 1e-3})
    assert not wrong.ok and wrong.tensors[0].error > 0.5
