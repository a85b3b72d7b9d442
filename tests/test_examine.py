"""The entry points against published values, and their input errors."""

from __future__ import annotations

import json

import numpy as np
import pytest

import gradcheck
from gradcheck import BackpropMismatch, InputError
from nets import Net


def sigmoid(z, xp=np):
    return 1.0 / (1.0 + xp.exp(-z))


def two_layer_loss(p, x, t, xp=np):
    h = sigmoid(x @ p["hidden"]["W"] + p["hidden"]["b"], xp)
    o = sigmoid(h @ p["output"]["W"] + p["output"]["b"], xp)
    return 0.5 * xp.sum((t - o) ** 2)


def published_network():
    # M. Mazur, "A Step by Step Backpropagation Example" (2015): a 2-2-2 logistic network with one shared
    # bias per layer and one half of the summed squared error. W[i, j] connects input i to unit j, so
    # w1..w4 = 0.15, 0.20, 0.25, 0.30 and w5..w8 = 0.40, 0.45, 0.50, 0.55 in the published numbering.
    params = {"hidden": {"W": np.array([[0.15, 0.25], [0.20, 0.30]]), "b": 0.35},
              "output": {"W": np.array([[0.40, 0.50], [0.45, 0.55]]), "b": 0.60}}
    return params, np.array([0.05, 0.10]), np.array([0.01, 0.99])


# Published values (from memory of the published example; they agree with an independent computation):
# total error 0.298371109; dE/dw5 = 0.082167041; after one step with learning rate 0.5:
MAZUR_AFTER_STEP = {("output", (0, 0)): 0.35891648, ("output", (1, 0)): 0.408666186,
                    ("output", (0, 1)): 0.511301270, ("output", (1, 1)): 0.561370121,
                    ("hidden", (0, 0)): 0.149780716, ("hidden", (1, 0)): 0.19956143,
                    ("hidden", (0, 1)): 0.24975114, ("hidden", (1, 1)): 0.29950229}


@pytest.mark.parametrize("method", ["central", "richardson", "complex", "autodiff"])
def test_published_backprop_example(method):
    params, x, t = published_network()
    np.testing.assert_allclose(two_layer_loss(params, x, t), 0.298371109, atol=5e-10)
    g = gradcheck.reference(two_layer_loss, params, x, t, method=method)
    np.testing.assert_allclose(g["output"]["W"][0, 0], 0.082167041, atol=5e-10)
    for (layer, index), published in MAZUR_AFTER_STEP.items():
        updated = params[layer]["W"][index] - 0.5 * g[layer]["W"][index]
        digits = len(str(published).split(".")[1])
        np.testing.assert_allclose(updated, published, atol=0.5 * 10.0 ** -digits)


def hand_backward(p, x, t, forget_hidden_derivative=False):
    h = sigmoid(x @ p["hidden"]["W"] + p["hidden"]["b"])
    o = sigmoid(h @ p["output"]["W"] + p["output"]["b"])
    d_out = (o - t) * o * (1 - o)
    d_hid = (p["output"]["W"] @ d_out) * (1.0 if forget_hidden_derivative else h * (1 - h))
    return {"hidden": {"W": np.outer(x, d_hid), "b": d_hid.sum()},
            "output": {"W": np.outer(h, d_out), "b": d_out.sum()}}


def test_correct_hand_written_backprop_passes():
    params, x, t = published_network()
    report = gradcheck.examine(two_layer_loss, params, x, t, grads=hand_backward)
    assert report.ok and report.worst_layer is None and report.findings == ()
    assert report.references.primary == "autodiff" and "central" in report.references.methods


def test_one_mistake_fails_and_names_the_layer():
    params, x, t = published_network()
    wrong = lambda p, x, t: hand_backward(p, x, t, forget_hidden_derivative=True)  # noqa: E731
    report = gradcheck.examine(two_layer_loss, params, x, t, grads=wrong)
    assert not report.ok
    assert report.worst_layer == "hidden"
    assert [layer.name for layer in report.layers] == ["hidden", "output"]
    assert report.tensor("output.W").ok and not report.tensor("hidden.W").ok


def test_assert_backprop_raises_an_assertion_with_the_report():
    params, x, t = published_network()
    wrong = lambda p, x, t: hand_backward(p, x, t, forget_hidden_derivative=True)  # noqa: E731
    with pytest.raises(BackpropMismatch, match=r"(?s)WRONG: .*layers, from the loss backwards") as info:
        gradcheck.assert_backprop(two_layer_loss, params, x, t, grads=wrong)
    assert isinstance(info.value, AssertionError)
    assert info.value.report.worst_layer == "hidden"
    assert gradcheck.assert_backprop(two_layer_loss, params, x, t, grads=hand_backward).ok


def test_report_fields_text_and_json():
    params, x, t = published_network()
    report = gradcheck.examine(two_layer_loss, params, x, t, grads=hand_backward)
    row = report.tensor("hidden.W")
    assert row.shape == (2, 2) and row.checked == 4 and row.layer == "hidden"
    np.testing.assert_allclose([row.cosine, row.scale], [1.0, 1.0], rtol=1e-12)
    assert report.evaluations > 2 * 10
    text = str(report)
    assert text.index("output ") < text.index("hidden ")  # layers listed from the loss backwards
    data = json.loads(json.dumps(report.to_dict()))
    assert data["ok"] is True and len(data["tensors"]) == 4


def test_single_entry_off_by_one_percent_in_ten_thousand_parameters_is_caught():
    rng = np.random.default_rng(7)
    net = Net((40, 125, 40, 1), hidden="tanh")
    params, x, y = net.init(rng, batch=6)
    assert sum(v.size for layer in params.values() for v in layer.values()) > 10_000
    grads = net.backward(params, x, y)[0]
    grads["hidden1"]["W"][3, 17] *= 1.01
    report = gradcheck.examine(net.loss, params, x, y, grads=grads, methods="central")
    assert not report.ok
    assert report.tensor("hidden1.W").worst_index == (3, 17)
    assert all(t.ok for t in report.tensors if t.path != "hidden1.W")


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("hidden, loss_kind", [("logistic", "half_sse"), ("tanh", "softmax_ce"), ("relu", "sse")])
def test_correct_networks_raise_no_alarm(dtype, hidden, loss_kind):
    rng = np.random.default_rng(3)
    net = Net((5, 8, 4), hidden=hidden, loss_kind=loss_kind, reduction="mean")
    params, x, y = net.init(rng, batch=7, dtype=dtype)
    for methods in (None, "central"):
        report = gradcheck.examine(net.loss, params, x, y, grads=net.grads(), methods=methods)
        assert report.ok, str(report)


def test_non_finite_claims_are_a_finding_not_an_error():
    params, x, t = published_network()
    grads = hand_backward(params, x, t)
    grads["output"]["W"][1, 0] = np.nan
    report = gradcheck.examine(two_layer_loss, params, x, t, grads=grads)
    assert not report.ok
    assert report.findings[0].kind == "non-finite" and report.findings[0].where == "output.W"


def _loss_returning(value):
    return lambda p, x, t: value


INPUT_ERRORS = [
    (_loss_returning(np.ones(3)), None, r"gradcheck\.examine: loss at the given params: loss: expected a scalar loss value, got ndarray of dtype float64 and shape \(3,\)"),
    (_loss_returning(float("nan")), None, r"loss: expected a finite loss value at the given params, got nan"),
    (_loss_returning(np.inf), None, r"loss: expected a finite loss value at the given params, got inf"),
    (two_layer_loss, {"hidden": {"W": np.ones((2, 2))}}, r"grads hidden\.b: expected one array per parameter"),
    (two_layer_loss, lambda p, x, t: 1 / 0, r"grads: expected a callable grads\(params, \*data\) that returns the claimed values, got ZeroDivisionError"),
    ("not callable", None, r"loss: expected a callable loss\(params, \*data\), got str"),
]


@pytest.mark.parametrize("loss, grads, message", INPUT_ERRORS)
def test_input_errors_name_what_and_how(loss, grads, message):
    params, x, t = published_network()
    grads = hand_backward if grads is None else grads
    with pytest.raises(InputError, match=message):
        gradcheck.examine(loss, params, x, t, grads=grads)


def test_loss_that_modifies_params_in_place_is_an_input_error():
    def sneaky(p, x):
        p["w"] *= 2.0
        return float(np.sum(p["w"] * x))

    w = np.array([1.0, 2.0])
    with pytest.raises(InputError, match=r"params w: expected a loss that leaves its params unchanged"):
        gradcheck.examine(sneaky, {"w": w}, np.ones(2), grads={"w": np.ones(2)})
    np.testing.assert_array_equal(w, [1.0, 2.0])


def test_grads_callable_error_is_chained():
    params, x, t = published_network()

    def broken(p, x, t):
        raise KeyError("W3")

    with pytest.raises(InputError) as info:
        gradcheck.examine(two_layer_loss, params, x, t, grads=broken)
    assert isinstance(info.value.__cause__, KeyError)


@pytest.mark.parametrize("methods, message", [
    (("fast",), r"methods: expected names among \['autodiff', 'complex', 'richardson', 'central'\], got \['fast'\]"),
    ((), r"methods: expected names among"),
])
def test_unknown_methods(methods, message):
    params, x, t = published_network()
    with pytest.raises(InputError, match=message):
        gradcheck.examine(two_layer_loss, params, x, t, grads=hand_backward, methods=methods)


def test_reference_of_an_untraceable_loss_by_autodiff_says_why():
    params, x, t = published_network()
    numpy_only = lambda p, x, t: two_layer_loss(p, x, t)  # noqa: E731  (no xp keyword: np.exp on tracers fails)
    with pytest.raises(InputError, match=r"methods: expected at least one reference method this loss allows, got autodiff: the loss is not JAX-traceable.*Add 'central'"):
        gradcheck.reference(numpy_only, params, x, t, method="autodiff")
