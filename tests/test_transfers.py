"""The registry of transfer functions, and softplus and leaky ReLU added through it.

Outside references: every registry derivative is compared with JAX autodiff of the
registry's own forward (``jax.grad`` under ``jax.vmap`` in float64), an independent
differentiation. The planted-mistake scenario is invented for these tests: a small
irrigation controller maps three soil readings through five hidden units to two valve
openings, and its hand-written backward pass leaves out the hidden derivative.
Softplus' (z) = logistic(z) and the leaky-ReLU slope 0.01 below 0 are common practice.
"""

from __future__ import annotations

import re
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import gradcheck
from gradcheck._case.network import TRANSFERS as CASE_TRANSFERS
from gradcheck._case.network import describe_network
from gradcheck._diagnose.transfers import ELEMENTWISE, TRANSFERS
from gradcheck.strategies import HIDDEN

ROOT = Path(__file__).resolve().parents[1]


@pytest.mark.parametrize("name", ELEMENTWISE)
def test_every_elementwise_derivative_agrees_with_jax_autodiff(name):
    record = TRANSFERS[name]
    rng = np.random.default_rng(11)
    z = rng.uniform(-4, 4, size=200)
    z = z[np.abs(z) > 1e-3]  # away from the kink of relu and leaky ReLU at 0
    with jax.enable_x64(True):
        grad = jax.vmap(jax.grad(lambda u: record.forward(jnp, u)))(jnp.asarray(z))
        reference = np.asarray(grad)
    a = record.numpy_forward(z)
    np.testing.assert_allclose(record.derivative_from_z(z), reference, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(record.derivative(z, a), reference, rtol=1e-12, atol=1e-15)


def test_the_softmax_diagonal_agrees_with_the_jax_jacobian():
    z = np.random.default_rng(12).normal(size=(3, 4))
    with jax.enable_x64(True):
        jac = np.asarray(jax.vmap(jax.jacfwd(lambda u: TRANSFERS["softmax"].forward(jnp, u)))(jnp.asarray(z)))
    diag = np.einsum("nkk->nk", jac)
    np.testing.assert_allclose(TRANSFERS["softmax"].derivative_from_z(z), diag, rtol=1e-12, atol=1e-15)
    assert not TRANSFERS["softmax"].elementwise


def test_softplus_and_leaky_relu_match_their_textbook_formulas():
    z = np.array([-3.0, -0.5, 0.25, 2.0])
    np.testing.assert_allclose(TRANSFERS["softplus"].numpy_forward(z), np.log(1 + np.exp(z)), rtol=1e-14)
    np.testing.assert_allclose(TRANSFERS["softplus"].derivative_from_z(z), 1 / (1 + np.exp(-z)), rtol=1e-14)
    np.testing.assert_allclose(TRANSFERS["leaky-relu"].numpy_forward(z), [-0.03, -0.005, 0.25, 2.0], rtol=1e-14)
    np.testing.assert_allclose(TRANSFERS["leaky-relu"].derivative_from_z(z), [0.01, 0.01, 1.0, 1.0], rtol=0)


def test_softplus_stays_finite_at_extreme_pre_activations():
    with np.errstate(over="raise", invalid="raise", divide="raise"):  # exp(-800) underflowing to 0 is harmless
        out = TRANSFERS["softplus"].numpy_forward(np.array([-800.0, 800.0]))
    np.testing.assert_allclose(out, [0.0, 800.0], atol=1e-300)


def test_the_case_format_and_the_strategies_read_the_registry():
    assert CASE_TRANSFERS == tuple(TRANSFERS)
    assert HIDDEN == ELEMENTWISE and "softmax" not in HIDDEN
    assert {"softplus", "leaky-relu"} <= set(HIDDEN)


def test_the_documented_transfer_names_equal_the_registry():
    text = (ROOT / "docs" / "case-format.md").read_text(encoding="utf-8")
    row = next(line for line in text.splitlines() if line.startswith("| `transfer` |"))
    allowed = row.split("|")[3]
    assert re.findall(r"`([^`]+)`", allowed) == list(TRANSFERS)


# The irrigation controller: soil readings -> hidden units -> valve openings, half squared error summed.
def _hidden(kind, z, xp):
    return xp.log(1 + xp.exp(z)) if kind == "softplus" else xp.where(z > 0, z, 0.01 * z)


def _controller(kind):
    def loss(params, x, y, *, xp=np):
        h = _hidden(kind, x @ params["hidden"]["W"] + params["hidden"]["b"], xp)
        return 0.5 * xp.sum((h @ params["valves"]["W"] - y) ** 2)

    def backward(params, x, y, forget_derivative=False):
        z = x @ params["hidden"]["W"] + params["hidden"]["b"]
        h = _hidden(kind, z, np)
        d_out = h @ params["valves"]["W"] - y
        up = d_out @ params["valves"]["W"].T
        slope = 1 / (1 + np.exp(-z)) if kind == "softplus" else np.where(z > 0, 1.0, 0.01)
        d_z = up if forget_derivative else up * slope
        return {"hidden": {"W": x.T @ d_z, "b": d_z.sum(axis=0)}, "valves": {"W": h.T @ d_out}}
    return loss, backward


def _irrigation_data():
    rng = np.random.default_rng(5)
    params = {"hidden": {"W": rng.standard_normal((3, 5)), "b": 0.1 * rng.standard_normal(5)},
              "valves": {"W": rng.standard_normal((5, 2))}}
    return params, rng.standard_normal((8, 3)), rng.standard_normal((8, 2))


@pytest.mark.parametrize("kind", ["softplus", "leaky-relu"])
def test_a_correct_backward_through_softplus_or_leaky_relu_is_ok(kind):
    loss, backward = _controller(kind)
    params, x, y = _irrigation_data()
    assert gradcheck.examine(loss, params, x, y, grads=backward(params, x, y)).ok


@pytest.mark.parametrize("kind", ["softplus", "leaky-relu"])
def test_a_left_out_softplus_or_leaky_relu_derivative_is_named_in_its_layer(kind):
    loss, backward = _controller(kind)
    params, x, y = _irrigation_data()
    report = gradcheck.examine(loss, params, x, y, grads=backward(params, x, y, forget_derivative=True))
    assert not report.ok
    first = report.findings[0]
    assert (first.kind, first.layer) == ("missing-transfer-derivative", "hidden")


def _network_backward(net, params, x, y):
    """Correct backward of a described in-by-out, per-unit-bias net under half squared error, summed."""
    acts, zs = [x], []
    for layer in net.layers:
        zs.append(acts[-1] @ params[layer.name]["W"] + params[layer.name]["b"])
        acts.append(TRANSFERS[layer.transfer].numpy_forward(zs[-1]))
    delta = (acts[-1] - y) * TRANSFERS[net.layers[-1].transfer].derivative_from_z(zs[-1])
    grads = {}
    for i in range(len(net.layers) - 1, -1, -1):
        name = net.layers[i].name
        grads[name] = {"W": acts[i].T @ delta, "b": delta.sum(axis=0)}
        if i:
            delta = (delta @ params[name]["W"].T) * TRANSFERS[net.layers[i - 1].transfer].derivative_from_z(zs[i - 1])
    return grads


def test_a_case_with_softplus_and_leaky_relu_layers_round_trips_and_checks_ok(tmp_path):
    net = describe_network(3, [("roots", 4, "softplus"), ("stems", 3, "leaky-relu"), ("valves", 2, "identity")],
                           loss="half-squared-error", batch="sum")
    rng = np.random.default_rng(9)
    params = {la.name: {"W": rng.standard_normal(net.weight_shape(la.name)),
                        "b": 0.1 * rng.standard_normal(net.bias_shape(la.name))} for la in net.layers}
    x, y = rng.standard_normal((6, 3)), rng.standard_normal((6, 2))
    grads = _network_backward(net, params, x, y)
    path = tmp_path / "irrigation.npz"
    gradcheck.save_case(path, params, grads, x, y, net)
    case = gradcheck.load_case(path)
    assert [la.transfer for la in case.description.layers] == ["softplus", "leaky-relu", "identity"]
    np.testing.assert_array_equal(case.grads["stems"]["W"], grads["stems"]["W"])
    assert gradcheck.examine(case.loss, case.params, *case.data, grads=case.grads).ok
