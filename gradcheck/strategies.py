"""Hypothesis strategies for property tests of a hand-written backward pass.

One property test says it all: for any weights and inputs, my backward pass
agrees with the references.

    from hypothesis import given, settings
    import gradcheck
    from gradcheck.strategies import mlp_cases

    @settings(max_examples=50, deadline=None)
    @given(mlp_cases(losses=["half-squared-error"]))
    def test_my_backward(case):
        net, params, x, y = case
        gradcheck.assert_backprop(gradcheck.NetworkLoss(net), params, x, y, grads=my_backward(net, params, x, y))

Arrays are drawn from a seeded numpy generator rather than element by element:
Hypothesis then shrinks a failure to small sizes and a small seed, and a
64 x 64 weight matrix costs one draw instead of 4,096. Weights are scaled by
1/sqrt(fan-in) so transfer functions are exercised in their informative range
rather than saturated, where every backward pass looks right.

This module needs Hypothesis (``pip install 'gradcheck[test]'``).
"""

from __future__ import annotations

from typing import Sequence

import numpy as np
from hypothesis import strategies as st

from ._case.network import NetworkDescription, describe_network
from ._diagnose.transfers import ELEMENTWISE

__all__ = ["mlp_descriptions", "params_for", "batches_for", "mlp_cases"]

#: Hidden-layer transfers: every elementwise function of the registry (softmax is for the output layer).
HIDDEN = ELEMENTWISE
LOSSES = ("half-squared-error", "mean-squared-error", "softmax-cross-entropy", "logistic-cross-entropy")


@st.composite
def mlp_descriptions(draw, max_layers: int = 3, max_width: int = 16, transfers: Sequence[str] = HIDDEN,
                     losses: Sequence[str] = LOSSES, batch_modes: Sequence[str] = ("sum", "mean")
                     ) -> NetworkDescription:
    """Small fully connected networks: 1..max_layers layers, widths 1..max_width, hidden transfers and losses drawn.

    Example:
        >>> from hypothesis import find
        >>> net = find(mlp_descriptions(max_layers=2), lambda n: len(n.layers) == 2)
        >>> [layer.name for layer in net.layers]
        ['hidden1', 'output']
    """
    depth = draw(st.integers(1, max_layers))
    widths = draw(st.lists(st.integers(1, max_width), min_size=depth + 1, max_size=depth + 1))
    loss = draw(st.sampled_from(list(losses)))
    if loss == "softmax-cross-entropy":
        widths[-1] = max(widths[-1], 2)
    layers = [(f"hidden{i + 1}", widths[i + 1], draw(st.sampled_from(list(transfers)))) for i in range(depth - 1)]
    output = {"softmax-cross-entropy": "softmax", "logistic-cross-entropy": "logistic"}.get(loss, "identity")
    layers.append(("output", widths[-1], output))
    return describe_network(widths[0], layers, loss=loss, batch=draw(st.sampled_from(list(batch_modes))))


@st.composite
def params_for(draw, net: NetworkDescription, dtype=np.float64) -> dict:
    """A parameter dict ``{layer: {"W", "b"}}`` for ``net``, from a drawn seed."""
    rng = np.random.default_rng(draw(st.integers(0, 2 ** 32 - 1)))
    params = {}
    for layer in net.layers:
        shape = net.weight_shape(layer.name)
        fan_in = layer.inputs or shape[0]
        entry = {"W": (rng.standard_normal(shape) / np.sqrt(fan_in)).astype(dtype)}
        bias = net.bias_shape(layer.name)
        if bias is not None:
            entry["b"] = (0.1 * rng.standard_normal(bias)).astype(dtype)
        params[layer.name] = entry
    return params


@st.composite
def batches_for(draw, net: NetworkDescription, min_size: int = 1, max_size: int = 16, dtype=np.float64):
    """An input batch ``x`` (one example per row) and matching targets ``y`` for ``net``'s loss."""
    n = draw(st.integers(min_size, max_size))
    rng = np.random.default_rng(draw(st.integers(0, 2 ** 32 - 1)))
    x = rng.standard_normal((n, net.inputs)).astype(dtype)
    k = net.outputs
    if net.loss == "softmax-cross-entropy":
        y = np.eye(k, dtype=dtype)[rng.integers(0, k, size=n)]
    elif net.loss == "logistic-cross-entropy":
        y = rng.integers(0, 2, size=(n, k)).astype(dtype)
    else:
        y = rng.standard_normal((n, k)).astype(dtype)
    return x, y


@st.composite
def mlp_cases(draw, dtype=np.float64, **description_options):
    """``(description, params, x, y)``: everything one check of a small MLP needs."""
    net = draw(mlp_descriptions(**description_options))
    params = draw(params_for(net, dtype=dtype))
    x, y = draw(batches_for(net, dtype=dtype))
    return net, params, x, y
