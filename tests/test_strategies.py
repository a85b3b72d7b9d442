"""The Hypothesis strategies, used in a real property test of a hand-written backward pass."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import gradcheck
from gradcheck.strategies import batches_for, mlp_cases, mlp_descriptions, params_for


def derivative(transfer, z, a):
    return {"logistic": a * (1 - a), "tanh": 1 - a ** 2, "relu": (z > 0).astype(float),
            "identity": np.ones_like(z)}[transfer]


def forward_values(transfer, z):
    return {"logistic": lambda: 1 / (1 + np.exp(-z)), "tanh": lambda: np.tanh(z),
            "relu": lambda: np.maximum(z, 0.0), "identity": lambda: z}[transfer]()


def my_backward(net, params, x, y, forget_derivative=False):
    """A hand-written backward pass for the described nets (in-by-out, per-unit bias, half-squared error)."""
    acts, zs = [x], []
    for layer in net.layers:
        z = acts[-1] @ params[layer.name]["W"] + params[layer.name]["b"]
        zs.append(z)
        acts.append(forward_values(layer.transfer, z))
    n = x.shape[0] if net.batch == "mean" else 1
    delta = (acts[-1] - y) / n
    grads = {}
    for i in range(len(net.layers) - 1, -1, -1):
        name = net.layers[i].name
        grads[name] = {"W": acts[i].T @ delta, "b": delta.sum(axis=0)}
        if i:
            prev = net.layers[i - 1]
            up = delta @ params[name]["W"].T
            delta = up if forget_derivative else up * derivative(prev.transfer, zs[i - 1], acts[i])
    return grads


@settings(max_examples=12, deadline=None, derandomize=True)
@given(mlp_cases(losses=["half-squared-error"], transfers=["logistic", "tanh", "identity"]))
def test_property_my_backward_agrees_with_the_references(case):
    net, params, x, y = case
    gradcheck.assert_backprop(gradcheck.NetworkLoss(net), params, x, y, grads=my_backward(net, params, x, y))


@settings(max_examples=6, deadline=None, derandomize=True)
@given(mlp_cases(losses=["half-squared-error"], transfers=["logistic", "tanh"], max_layers=3).filter(
    lambda c: len(c[0].layers) >= 2))
def test_property_catches_a_forgotten_derivative(case):
    net, params, x, y = case
    with pytest.raises(gradcheck.BackpropMismatch):
        gradcheck.assert_backprop(gradcheck.NetworkLoss(net), params, x, y,
                                  grads=my_backward(net, params, x, y, forget_derivative=True))


@settings(max_examples=30, deadline=None)
@given(st.data())
def test_drawn_shapes_match_the_description(data):
    net = data.draw(mlp_descriptions(max_layers=4, max_width=8))
    params = data.draw(params_for(net, dtype=np.float32))
    x, y = data.draw(batches_for(net, min_size=2, max_size=5))
    for layer in net.layers:
        assert params[layer.name]["W"].shape == net.weight_shape(layer.name)
        assert params[layer.name]["W"].dtype == np.float32
    assert x.shape[1] == net.inputs and y.shape == (x.shape[0], net.outputs) and 2 <= x.shape[0] <= 5


@pytest.mark.parametrize("transfer", ["softplus", "leaky-relu"])
def test_the_default_hidden_transfers_include_softplus_and_leaky_relu(transfer):
    from hypothesis import find
    net = find(mlp_descriptions(max_layers=3), lambda n: any(layer.transfer == transfer for layer in n.layers))
    assert transfer in [layer.transfer for layer in net.layers[:-1]]
