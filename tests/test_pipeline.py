"""The one check pipeline: layer checks and delta checks settle and diagnose exactly as ``examine`` does.

The layers below are written for these tests (numpy, with an ``xp`` keyword where autodiff is wanted). The
outside facts: d tanh(z)/dz = 1 - tanh(z)^2, the ReLU's one-sided slopes at 0 are 0 and 1 (any value between
is a valid subgradient), and the softmax Jacobian is diag(s) - s s^T (common practice).
"""

from __future__ import annotations

import numpy as np
import pytest

import gradcheck

# saturated tanh units (z = x @ w between 6 and 8): 1 - tanh(z)^2 is 5e-7 to 2e-5 there, and float32 rounds
# tanh(z) near 1 by 6e-8, so a float32 backward is off by up to a few 1e-3 relative (common practice)
X32 = np.array([[1.0, 2.0], [1.5, 1.0], [2.0, 1.5]], dtype=np.float32)
W32 = np.array([[3.0, 2.5], [2.0, 2.2]], dtype=np.float32)
UPSTREAM = np.array([[0.7, -1.2], [0.4, 0.9], [-1.1, 0.3]])


def tanh_layer(x, w):
    return np.tanh(x @ w)


def tanh_layer_back(g, x, w):
    a = np.tanh(x @ w)
    d = g.astype(x.dtype) * (1 - a ** 2)  # in the inputs' precision, as a float32 program would
    return d @ w.T, x.T @ d


def test_a_layer_check_measures_a_float32_backwards_rounding_exactly_as_examine_does():
    layer = gradcheck.examine_layer(tanh_layer, tanh_layer_back, X32, W32, upstream=UPSTREAM, wrt="w")

    def loss(p, x):
        return float(np.sum(tanh_layer(x, p["w"]) * UPSTREAM))

    def backward(p, x):
        return {"w": tanh_layer_back(UPSTREAM, x, p["w"])[1]}

    whole = gradcheck.examine(loss, {"w": W32}, X32, grads=backward)
    assert layer.ok and whole.ok, f"{layer}\n{whole}"
    note = "float32 rounding measured: gradcheck ran your backward again in float64"
    assert any(n.startswith(note) for n in layer.notes), layer.notes
    assert any(n.startswith(note) for n in whole.notes), whole.notes
    # the same loss, claims and stages: the same error, to the last bits
    np.testing.assert_allclose(layer.tensor("w").error, whole.tensor("w").error, rtol=1e-12)


def test_the_measured_rounding_of_a_layer_check_does_not_excuse_a_mistake():
    def doubled(g, x, w):
        dx, dw = tanh_layer_back(g, x, w)
        return dx, 2 * dw

    report = gradcheck.examine_layer(tanh_layer, doubled, X32, W32, upstream=UPSTREAM, wrt="w")
    assert not report.ok and report.worst_layer == "w", str(report)
    assert not any(n.startswith("float32 rounding measured") for n in report.notes), report.notes


def relu(x):
    return np.maximum(x, 0.0)


def test_a_layer_check_excuses_a_kink_exactly_as_examine_does():
    # x[0] = 0 sits on the ReLU's kink: the backward takes the right-hand slope 0 there, a valid subgradient
    x = np.array([0.0, 0.5, -0.3, 1.0])
    layer = gradcheck.examine_layer(relu, lambda g, x: g * (x > 0), x, upstream=np.ones(4))
    whole = gradcheck.examine(lambda p: float(np.sum(relu(p["x"]))), {"x": x}, grads={"x": (x > 0).astype(float)})
    for report in (layer, whole):
        assert report.ok or all(f.kind == "unreliable-reference" for f in report.findings), str(report)
    assert layer.references.unreliable == whole.references.unreliable == 1
    # a real mistake at the same point is still blamed
    wrong = gradcheck.examine_layer(relu, lambda g, x: -g * (x > 0), x, upstream=np.ones(4))
    assert not wrong.ok and wrong.findings[0].kind == "sign-flip", str(wrong)


def tanh_xp(z, xp=np):
    return xp.tanh(z)


def softmax_xp(z, xp=np):
    e = xp.exp(z - xp.max(z, axis=-1, keepdims=True))
    return e / xp.sum(e, axis=-1, keepdims=True)


Z = np.random.default_rng(5).standard_normal((4, 3))


@pytest.mark.parametrize("forward,backward,kind", [
    (tanh_xp, lambda g, z: g, "missing-transfer-derivative"),
    (tanh_xp, lambda g, z: g * (1 - np.tanh(z) ** 2) ** 2, "extra-transfer-derivative"),
    (softmax_xp, lambda g, z: g * softmax_xp(z) * (1 - softmax_xp(z)), "partial-softmax-jacobian"),
])
def test_a_layer_check_reaches_the_mutant_diagnosis(forward, backward, kind):
    report = gradcheck.examine_layer(forward, backward, Z)
    assert not report.ok
    assert report.findings[0].kind == kind, str(report)


def test_a_correct_softmax_layer_passes():
    def back(g, z):
        s = softmax_xp(z)
        return s * (g - np.sum(g * s, axis=-1, keepdims=True))

    report = gradcheck.examine_layer(softmax_xp, back, Z)
    assert report.ok and not report.findings, str(report)
