"""Measured rounding: a callable float32 backward re-run in float64, and the hint for array claims.

The networks are our own (tests/nets.py); the two saturated float32 cases are in test_trust.py.
"""

from __future__ import annotations

import numpy as np
import pytest

import gradcheck
from gradcheck._check.compare import judge
from gradcheck._core.tree import flatten
from gradcheck._references.finite_difference import Estimate


def _tanh_loss(p, x):
    return float(np.sum(np.tanh(x @ p["W"])))


def _tanh_backward(p, x):
    a = np.tanh(x @ p["W"])
    return {"W": x.T @ (1 - a ** 2)}


# One tanh unit at z = 7 and 6.5 (common practice: 1 - tanh(z)^2 is 3.3e-6 and 9e-6 there, while float32
# rounds a = tanh(z) by up to 3e-8, so a float32 backward's derivative is off by up to 2e-3 relative).
X32 = np.array([[1.0, 2.0], [1.5, 1.0]], dtype=np.float32)
W32 = np.array([[3.0], [2.0]], dtype=np.float32)


def test_a_callable_float32_backward_is_held_to_its_measured_rounding():
    arrays = gradcheck.examine(_tanh_loss, {"W": W32}, X32, grads=_tanh_backward({"W": W32}, X32))
    measured = gradcheck.examine(_tanh_loss, {"W": W32}, X32, grads=_tanh_backward)
    assert not arrays.ok and arrays.tensors[0].error > 1e-3
    assert any("grads=backward" in n for n in arrays.notes), arrays.notes
    assert measured.ok, str(measured)
    assert measured.notes[0].startswith("float32 rounding measured: gradcheck ran your backward again in float64")
    # the measurement excuses rounding, not mistakes: twice the derivative is wrong in both precisions
    doubled = gradcheck.examine(_tanh_loss, {"W": W32}, X32, grads=lambda p, x: {"W": 2 * _tanh_backward(p, x)["W"]})
    assert not doubled.ok and doubled.findings[0].kind == "scaled"


def test_a_backward_that_casts_to_float32_inside_says_rounding_was_not_measured():
    def casting_backward(p, x):
        return {k: v.astype(np.float32) for k, v in _tanh_backward(p, x).items()}

    report = gradcheck.examine(_tanh_loss, {"W": W32}, X32, grads=casting_backward)
    assert not report.ok
    assert any("could not be measured: the backward returns float32 for float64 input (it casts inside)" in n
               for n in report.notes), report.notes


def test_a_backward_that_fails_in_float64_only_closes_the_measurement():
    def float32_only(p, x):
        if p["W"].dtype != np.float32:
            raise TypeError("this backward is written for float32")
        return _tanh_backward(p, x)

    report = gradcheck.examine(_tanh_loss, {"W": W32}, X32, grads=float32_only)
    assert any("the backward raised TypeError on float64 input" in n for n in report.notes), report.notes


def test_float64_claims_are_not_measured():
    W, X = W32.astype(np.float64), X32.astype(np.float64)
    report = gradcheck.examine(_tanh_loss, {"W": W}, X, grads=lambda p, x: {"W": 1.001 * _tanh_backward(p, x)["W"]})
    assert not report.ok and not any("float32" in n for n in report.notes)


@pytest.mark.parametrize("excess, holds", [(0.99, True), (1.01, False)])
def test_an_allowance_holds_exactly_the_measured_amount(excess, holds):
    # computed two ways: the judged verdict, and |claim - ref| <= the larger of the allowance and the
    # float32 tolerance's share (1e-3 of max(|claim|, |ref|), at most 5e-4 at the third entry)
    structure, _ = flatten({"w": np.zeros(3)})
    ref = np.array([1.0, -2.0, 1e-2])
    allowance = np.array([0.0, 0.0, 0.5])
    claimed = ref + np.array([0.0, 0.0, excess * 0.5])
    estimate = Estimate("central", (ref,), (np.zeros(3),), rtol=1e-6)
    judged = judge(structure, [claimed], [np.dtype(np.float32)], [estimate], {}, allowances=[allowance])
    assert judged.tensors[0].ok is holds
    within = np.abs(claimed - ref) <= np.maximum(allowance, 1e-3 * np.maximum(np.abs(claimed), np.abs(ref)))
    assert bool(within.all()) is holds


def test_a_backward_that_answers_differently_each_call_is_not_measured():
    # buffers never reset: every call adds another copy, so runs at nudged inputs would move by whole
    # gradients; that is not rounding, and a wrong (1.5 times) gradient must stay wrong
    W, X = W32.astype(np.float64), X32.astype(np.float64)
    total = {"W": 0.0}

    def leaky(p, x):
        total["W"] = total["W"] + 1.5 * _tanh_backward(p, x)["W"]
        return {"W": total["W"]}

    report = gradcheck.examine(_tanh_loss, {"W": W}, X, grads=leaky)
    assert not report.tensors[0].ok
    assert {f.kind for f in report.findings} >= {"accumulating", "scaled"}
    assert not any("rounding measured" in n for n in report.notes)
