"""The built-in demo: a small network of our own scenario with one planted backward-pass mistake.

Scenario (invented for gradcheck): a rooftop garden's watering controller learns,
from three readings a day (soil moisture, afternoon temperature, hours of
sunshine), how many litres to give each of two beds. A 3-5-2 network, logistic
hidden layer, linear outputs, one half of the squared error averaged over eight
days. The hand-written backward pass below forgets the logistic derivative in
the hidden layer's delta, the mistake the demo's report diagnoses.
"""

from __future__ import annotations

import numpy as np

__all__ = ["garden_case", "garden_loss", "garden_backward", "run_demo"]

READINGS = np.array([  # moisture (fraction), temperature (deg C / 10), sunshine (hours / 10)
    [0.31, 2.4, 0.62], [0.18, 2.9, 0.85], [0.44, 1.9, 0.30], [0.27, 2.6, 0.71],
    [0.52, 1.7, 0.22], [0.22, 3.1, 0.90], [0.36, 2.2, 0.48], [0.15, 3.3, 0.95]])
LITRES = np.array([[2.1, 1.4], [3.4, 2.6], [1.2, 0.7], [2.6, 1.9], [0.8, 0.5], [3.9, 3.0], [1.7, 1.1], [4.2, 3.3]])


def garden_case(seed: int = 2026):
    """Parameters and data of the demo network."""
    rng = np.random.default_rng(seed)
    params = {"hidden": {"W": 0.6 * rng.standard_normal((3, 5)), "b": 0.1 * rng.standard_normal(5)},
              "output": {"W": 0.6 * rng.standard_normal((5, 2)), "b": np.array([1.5, 1.0])}}
    return params, READINGS.copy(), LITRES.copy()


def garden_loss(params, x, y, xp=np, probe=lambda name, v: v):
    """Forward pass and loss, written once for numpy and (through ``xp``) for JAX."""
    z = probe("hidden.z", x @ params["hidden"]["W"] + params["hidden"]["b"])
    a = probe("hidden.a", 1.0 / (1.0 + xp.exp(-z)))
    out = probe("output.z", a @ params["output"]["W"] + params["output"]["b"])
    return 0.5 * xp.sum((out - y) ** 2) / x.shape[0]


def garden_backward(params, x, y, planted_mistake: bool = True):
    """The hand-written backward pass; returns (grads, deltas)."""
    n = x.shape[0]
    a = 1.0 / (1.0 + np.exp(-(x @ params["hidden"]["W"] + params["hidden"]["b"])))
    out = a @ params["output"]["W"] + params["output"]["b"]
    d_out = (out - y) / n
    d_a = d_out @ params["output"]["W"].T
    d_z = d_a if planted_mistake else d_a * a * (1 - a)
    grads = {"hidden": {"W": x.T @ d_z, "b": d_z.sum(axis=0)},
             "output": {"W": a.T @ d_out, "b": d_out.sum(axis=0)}}
    return grads, {"hidden.z": d_z, "hidden.a": d_a, "output.z": d_out}


def run_demo(planted_mistake: bool = True):
    """Examine the demo network's backward pass and return the Report."""
    from .._api.examine import examine

    params, x, y = garden_case()
    grads, deltas = garden_backward(params, x, y, planted_mistake)
    return examine(garden_loss, params, x, y, grads=grads, deltas=deltas,
                   title="demo: rooftop garden watering network")
