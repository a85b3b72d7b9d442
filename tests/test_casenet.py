"""Tests for gradcheck._case.network: network descriptions and the loss built from them.

Outside references: each loss is compared with an independent numpy formula
written here (the textbook definitions, common practice), and its JAX gradient
with SciPy's ``scipy.differentiate.jacobian`` (adaptive high-order central
differences). Network sizes and values are invented for these tests.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.differentiate import jacobian

from gradcheck._case.network import (LayerDescription, NetworkDescription, NetworkLoss, describe_network)
from gradcheck._core.errors import InputError


def make_params(net: NetworkDescription, seed: int = 0, scale: float = 0.7) -> dict:
    rng = np.random.default_rng(seed)
    params = {}
    for layer in net.layers:
        params[layer.name] = {"W": scale * rng.normal(size=net.weight_shape(layer.name))}
        if layer.bias != "none":
            params[layer.name]["b"] = scale * rng.normal(size=net.bias_shape(layer.name))
    return params


def make_data(net: NetworkDescription, n: int = 5, seed: int = 1) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, net.inputs))
    if net.loss == "softmax-cross-entropy":
        y = np.eye(net.outputs)[rng.integers(0, net.outputs, n)]
    elif net.loss == "logistic-cross-entropy":
        y = rng.integers(0, 2, (n, net.outputs)).astype(float)
    else:
        y = rng.normal(size=(n, net.outputs))
    return x, y


def to_vector(params: dict) -> np.ndarray:
    return np.concatenate([np.ravel(t) for layer in params.values() for t in layer.values()])


def from_vector(theta: np.ndarray, like: dict) -> dict:
    out, i = {}, 0
    for name, layer in like.items():
        out[name] = {}
        for key, t in layer.items():
            out[name][key] = theta[i:i + t.size].reshape(t.shape)
            i += t.size
    return out


def scipy_gradient(loss, params, x, y) -> np.ndarray:
    """The gradient by scipy.differentiate.jacobian (outside reference), one loss call per point."""
    def f(theta):
        flat = theta.reshape(theta.shape[0], -1)
        vals = [loss(from_vector(flat[:, j], params), x, y) for j in range(flat.shape[1])]
        return np.asarray(vals).reshape((1,) + theta.shape[1:])
    res = jacobian(f, to_vector(params), initial_step=0.05, tolerances={"atol": 1e-10, "rtol": 1e-9})
    assert np.all(res.success)
    return res.df[0]


def jax_gradient(loss, params, x, y) -> np.ndarray:
    with jax.enable_x64(True):
        g = jax.grad(lambda p: loss(p, jnp.asarray(x), jnp.asarray(y), xp=jnp))(params)
        return to_vector(jax.tree_util.tree_map(np.asarray, g))


# Independent formulas (the textbook definitions, common practice), written without the library's stable forms.
def ref_transfer(name: str, z: np.ndarray) -> np.ndarray:
    return {"logistic": lambda: 1 / (1 + np.exp(-z)),
            "tanh": lambda: np.sinh(z) / np.cosh(z),
            "relu": lambda: z * (z > 0),
            "identity": lambda: z,
            "softmax": lambda: np.exp(z) / np.exp(z).sum(axis=1, keepdims=True),
            "softplus": lambda: np.log(1 + np.exp(z)),
            "leaky-relu": lambda: np.where(z > 0, z, 0.01 * z)}[name]()  # slope 0.01 as commonly used


def ref_loss(net: NetworkDescription, params: dict, x: np.ndarray, y: np.ndarray) -> float:
    a = x
    for layer in net.layers:
        w = params[layer.name]["W"]
        z = a @ (w if net.weight_layout == "in-by-out" else w.T) + params[layer.name].get("b", 0.0)
        a = ref_transfer(layer.transfer, z)
    n = x.shape[0]
    if net.loss == "half-squared-error":
        total = 0.5 * np.sum((a - y) ** 2)
    elif net.loss == "mean-squared-error":
        total = np.mean((a - y) ** 2) * n  # mean over output units, summed over examples
    elif net.loss == "softmax-cross-entropy":
        total = -np.sum(y * np.log(a))
    else:
        total = -np.sum(y * np.log(a) + (1 - y) * np.log(1 - a))
    return total / n if net.batch == "mean" else total


TRANSFER_CASES = ["logistic", "tanh", "relu", "identity", "softmax", "softplus", "leaky-relu"]


@pytest.mark.parametrize("transfer", TRANSFER_CASES)
def test_each_transfer_matches_formula_and_scipy(transfer):
    net = describe_network(3, [("hidden", 4, transfer), ("out", 2, "identity")], loss="half-squared-error",
                           batch="sum")
    params, (x, y) = make_params(net), make_data(net)
    loss = NetworkLoss(net)
    np.testing.assert_allclose(loss(params, x, y), ref_loss(net, params, x, y), rtol=1e-12)
    np.testing.assert_allclose(jax_gradient(loss, params, x, y), scipy_gradient(loss, params, x, y),
                               rtol=1e-6, atol=1e-9)


LOSS_CASES = [
    ("half-squared-error", "logistic", "sum"),
    ("half-squared-error", "tanh", "mean"),
    ("mean-squared-error", "identity", "mean"),
    ("mean-squared-error", "softmax", "sum"),
    ("softmax-cross-entropy", "softmax", "mean"),
    ("softmax-cross-entropy", "softmax", "sum"),
    ("logistic-cross-entropy", "logistic", "mean"),
    ("logistic-cross-entropy", "logistic", "sum"),
]


@pytest.mark.parametrize("loss_name,out_transfer,batch", LOSS_CASES)
def test_each_loss_matches_formula_and_scipy(loss_name, out_transfer, batch):
    net = describe_network(3, [("h", 4, "tanh"), ("out", 3, out_transfer)], loss=loss_name, batch=batch)
    params, (x, y) = make_params(net, seed=2), make_data(net, n=6, seed=3)
    loss = NetworkLoss(net)
    np.testing.assert_allclose(loss(params, x, y), ref_loss(net, params, x, y), rtol=1e-12)
    np.testing.assert_allclose(jax_gradient(loss, params, x, y), scipy_gradient(loss, params, x, y),
                               rtol=1e-6, atol=1e-9)


@pytest.mark.parametrize("bias", ["per-unit", "shared", "none"])
def test_bias_conventions_match_formula(bias):
    net = describe_network(2, [("h", 3, "logistic"), ("out", 2, "identity", "per-unit")],
                           loss="half-squared-error", bias=bias)
    params, (x, y) = make_params(net, seed=4), make_data(net)
    assert ("b" in params["h"]) == (bias != "none")
    expected_b = {"per-unit": (3,), "shared": (1,), "none": None}[bias]
    assert net.bias_shape("h") == expected_b and net.bias_shape("out") == (2,)
    np.testing.assert_allclose(NetworkLoss(net)(params, x, y), ref_loss(net, params, x, y), rtol=1e-12)


@pytest.mark.parametrize("loss_name,out_transfer", [("half-squared-error", "logistic"),
                                                    ("softmax-cross-entropy", "softmax")])
def test_both_weight_layouts_give_the_same_loss(loss_name, out_transfer):
    a = describe_network(3, [("h", 4, "relu"), ("out", 2, out_transfer)], loss=loss_name)
    b = describe_network(3, [("h", 4, "relu"), ("out", 2, out_transfer)], loss=loss_name, weight_layout="out-by-in")
    pa, (x, y) = make_params(a, seed=5), make_data(a)
    pb = {k: {"W": v["W"].T, "b": v["b"]} for k, v in pa.items()}
    assert b.weight_shape("h") == (4, 3) and a.weight_shape("h") == (3, 4)
    np.testing.assert_allclose(NetworkLoss(b)(pb, x, y), NetworkLoss(a)(pa, x, y), rtol=1e-14)
    ga = from_vector(jax_gradient(NetworkLoss(a), pa, x, y), pa)
    gb = from_vector(jax_gradient(NetworkLoss(b), pb, x, y), pb)
    np.testing.assert_allclose(gb["h"]["W"], ga["h"]["W"].T, rtol=1e-12)


@pytest.mark.parametrize("loss_name,out_transfer,expected", [
    ("half-squared-error", "identity", ["in.z", "in.a", "mid.z", "mid.a", "out.z", "out.a"]),
    ("softmax-cross-entropy", "softmax", ["in.z", "in.a", "mid.z", "mid.a", "out.z"]),
    ("logistic-cross-entropy", "logistic", ["in.z", "in.a", "mid.z", "mid.a", "out.z"]),
])
def test_probe_names_are_produced_in_order(loss_name, out_transfer, expected):
    net = describe_network(2, [("in", 3, "tanh"), ("mid", 3, "relu"), ("out", 2, out_transfer)], loss=loss_name)
    params, (x, y) = make_params(net), make_data(net)
    seen = []
    def probe(name, value):
        seen.append((name, np.shape(value)))
        return value
    plain = NetworkLoss(net)(params, x, y)
    probed = NetworkLoss(net)(params, x, y, probe=probe)
    assert [s[0] for s in seen] == expected == list(net.probe_names)
    assert [s[1] for s in seen] == [(5, 3), (5, 3), (5, 3), (5, 3), (5, 2), (5, 2)][:len(expected)]
    assert probed == plain
    assert [(p.layer, p.transfer) for p in net.probe_plan] == [("in", "tanh"), ("mid", "relu"), ("out", out_transfer)]


def probe_deltas(net, params, x, y):
    """d loss / d probe for every probe, by JAX: each probe adds a zero whose gradient is the delta."""
    sizes = {f"{la.name}.{k}": la.units for la in net.layers for k in "za"}
    with jax.enable_x64(True):
        eps = {p: jnp.zeros((x.shape[0], sizes[p])) for p in net.probe_names}
        def f(e):
            probe = lambda name, v: v + e[name]
            return NetworkLoss(net)(params, jnp.asarray(x), jnp.asarray(y), xp=jnp, probe=probe)
        return {k: np.asarray(v) for k, v in jax.grad(f)(eps).items()}


@pytest.mark.parametrize("batch", ["mean", "sum"])
def test_softmax_cross_entropy_delta_is_softmax_minus_target(batch):
    # Common practice: for softmax outputs with cross-entropy, d loss / d z = softmax(z) - y per example
    # (divided by N when the loss is a mean over the batch).
    net = describe_network(3, [("h", 4, "tanh"), ("out", 3, "softmax")], loss="softmax-cross-entropy", batch=batch)
    params, (x, y) = make_params(net, seed=6), make_data(net, n=7)
    deltas = probe_deltas(net, params, x, y)
    z = np.tanh(x @ params["h"]["W"] + params["h"]["b"]) @ params["out"]["W"] + params["out"]["b"]
    expected = ref_transfer("softmax", z) - y
    np.testing.assert_allclose(deltas["out.z"], expected / (7 if batch == "mean" else 1), rtol=1e-10, atol=1e-14)


def test_logistic_derivative_is_s_times_one_minus_s():
    # Common practice: the logistic function s has derivative s (1 - s), so delta_z = delta_a * s (1 - s).
    net = describe_network(3, [("h", 4, "logistic"), ("out", 2, "identity")], loss="half-squared-error")
    params, (x, y) = make_params(net, seed=7), make_data(net)
    deltas = probe_deltas(net, params, x, y)
    s = ref_transfer("logistic", x @ params["h"]["W"] + params["h"]["b"])
    np.testing.assert_allclose(deltas["h.z"], deltas["h.a"] * s * (1 - s), rtol=1e-10, atol=1e-15)


@pytest.mark.parametrize("loss_name,transfer,z,y,expected", [
    # Analytic limits (common practice): -log softmax picks the logit gap; softplus(z) - y z tends to |z| or 0.
    ("softmax-cross-entropy", "softmax", [[1000.0, 0.0]], [[0.0, 1.0]], 1000.0),
    ("softmax-cross-entropy", "softmax", [[-1000.0, 0.0]], [[0.0, 1.0]], 0.0),
    ("logistic-cross-entropy", "logistic", [[-800.0]], [[1.0]], 800.0),
    ("logistic-cross-entropy", "logistic", [[800.0]], [[0.0]], 800.0),
    ("half-squared-error", "logistic", [[-800.0]], [[0.0]], 0.0),
    ("half-squared-error", "softmax", [[900.0, 0.0]], [[1.0, 0.0]], 0.0),
    # softplus(z) tends to z for large z and to 0 for very negative z (common practice).
    ("half-squared-error", "softplus", [[800.0]], [[800.0]], 0.0),
    ("half-squared-error", "softplus", [[-800.0]], [[0.0]], 0.0),
])
def test_extreme_pre_activations_stay_finite(loss_name, transfer, z, y, expected):
    z = np.array(z)
    net = describe_network(z.shape[1], [("out", z.shape[1], transfer, "none")], loss=loss_name, batch="sum")
    params, x = {"out": {"W": np.eye(z.shape[1])}}, z  # identity weights: the pre-activation is x itself
    np.testing.assert_allclose(NetworkLoss(net)(params, x, np.array(y)), expected, atol=1e-12)  # warnings are errors
    g = jax_gradient(NetworkLoss(net), params, x, np.array(y))
    assert np.all(np.isfinite(g))


@pytest.mark.parametrize("transfer,loss_name", [("logistic", "logistic-cross-entropy"),
                                                ("softmax", "softmax-cross-entropy"),
                                                ("tanh", "half-squared-error"),
                                                ("identity", "mean-squared-error"),
                                                ("relu", "half-squared-error"),
                                                ("softplus", "half-squared-error"),
                                                ("leaky-relu", "mean-squared-error")])
def test_complex_step_agrees_with_jax(transfer, loss_name):
    # Complex-step derivative Im f(x + ih) / h (Squire & Trapp, SIAM Review 40(1), 1998; cited from memory):
    # it needs the loss to be analytic in the parameters, which the where/real-part forms keep.
    out = {"logistic-cross-entropy": "logistic", "softmax-cross-entropy": "softmax"}.get(loss_name, "identity")
    net = describe_network(3, [("h", 4, transfer), ("out", 2, out)], loss=loss_name)
    params, (x, y) = make_params(net, seed=8), make_data(net)
    loss, theta, h = NetworkLoss(net), to_vector(params), 1e-30
    step = np.array([loss(from_vector(theta + 1j * h * e, params), x, y).imag / h for e in np.eye(theta.size)])
    np.testing.assert_allclose(step, jax_gradient(loss, params, x, y), rtol=1e-10, atol=1e-14)


def test_mapping_round_trip_and_defaults():
    net = describe_network(2, [("h", 3, "relu", "shared"), {"name": "out", "units": 1, "transfer": "logistic",
                                                           "inputs": 3}],
                           loss="logistic-cross-entropy", batch="sum", weight_layout="out-by-in", bias="none")
    assert [(la.bias, la.inputs) for la in net.layers] == [("shared", 2), ("none", 3)]
    assert NetworkDescription.from_mapping(net.to_mapping()) == net
    assert net.outputs == 1 and net.weight_shape("out") == (1, 3)


def mapping(**changes):
    base = {"version": 1, "inputs": 3, "loss": "half-squared-error",
            "layers": [{"name": "h", "units": 4, "transfer": "tanh"}, {"name": "out", "units": 2, "transfer": "identity"}]}
    layer_changes = changes.pop("layer1", None)
    base.update(changes)
    if layer_changes is not None:
        base["layers"][1] = {**base["layers"][1], **layer_changes}
        base["layers"][1] = {k: v for k, v in base["layers"][1].items() if v is not None}
    return base


BAD_DESCRIPTIONS = [
    (mapping(layer1={"transfer": "sigmoid"}), r"description\.layers\[1\]\.transfer: expected a transfer function, "
                                              r"got unknown transfer function 'sigmoid'\. Write 'logistic'"),
    (mapping(layer1={"transfer": "tanhh"}), r"unknown transfer function 'tanhh'\. Write 'tanh'"),
    (mapping(loss="cross_entropy"), r"description\.loss: expected a loss, got unknown loss 'cross_entropy'"),
    (mapping(loss="huber"), r"unknown loss 'huber'\. Write one of 'half-squared-error'"),
    (mapping(batch="avg"), r"description\.batch: expected a batch mode"),
    (mapping(weight_layout="row-major"), r"description\.weight_layout: expected a weight layout"),
    (mapping(bias="per-neuron"), r"description\.bias: .* Write 'per-unit'"),
    (mapping(layer="x"), r"description: expected keys among .* got unknown key 'layer'\. Did you mean 'layers'\?"),
    (mapping(layer1={"activation": "tanh"}), r"description\.layers\[1\]: .*unknown key 'activation'"),
    (mapping(layer1={"units": None}), r"description\.layers\[1\]: expected the keys .* got no 'units'\. Add 'units'"),
    (mapping(version=2), r"description\.version: expected format version 1, got int 2"),
    ({k: v for k, v in mapping().items() if k != "version"}, r"description: .* got no 'version'"),
    (mapping(layer1={"inputs": 5}), r"description\.layers\[1\]\.inputs: expected 4 \(the units of layer 'h'.*"
                                    r"got 5\. The layer sizes do not chain"),
    (mapping(layer1={"units": 2.0}), r"description\.layers\[1\]\.units: expected a positive whole number, got float"),
    (mapping(inputs=0), r"description\.inputs: expected a positive whole number, got int 0"),
    (mapping(layer1={"name": "h"}), r"description\.layers: expected distinct layer names, got repeated names \['h'\]"),
    (mapping(layer1={"name": "out.put"}), r"description\.layers\[1\]\.name: expected a name of letters"),
    (mapping(loss="softmax-cross-entropy"), r"description\.loss: expected an output layer with transfer 'softmax'"),
    (mapping(layer1={"transfer": "softmax", "units": 1}), r"layers\[1\]\.units: expected at least 2 units"),
    (mapping(layers=[]), r"description\.layers: expected a non-empty list of layers"),
    (mapping(layers="h,out"), r"description\.layers: expected a list of layer tables"),
    ([1, 2], r"description: expected a table of keys"),
]


@pytest.mark.parametrize("bad,message", BAD_DESCRIPTIONS)
def test_malformed_descriptions_are_input_errors(bad, message):
    with pytest.raises(InputError, match=message):
        NetworkDescription.from_mapping(bad)


def test_layer_objects_and_missing_params_are_checked():
    with pytest.raises(InputError, match=r"description\.layers\[0\]: expected a LayerDescription"):
        NetworkDescription(2, ("h",), "half-squared-error")
    with pytest.raises(InputError, match=r"description\.layers\[1\]: expected \(name, units, transfer\) .* got tuple"):
        describe_network(2, [("h", 3, "tanh"), ("out", 1)], loss="half-squared-error")
    net = NetworkDescription(2, (LayerDescription("out", 1, "identity"),), "half-squared-error")
    with pytest.raises(InputError, match=r"params out: expected a mapping with 'W'"):
        NetworkLoss(net)({"output": {"W": np.ones((2, 1))}}, np.ones((1, 2)), np.ones((1, 1)))


JSON_VALUES = st.recursive(
    st.none() | st.booleans() | st.integers(-3, 5) | st.floats(allow_nan=True) | st.sampled_from(
        ["tanh", "softmax", "logistic", "none", "sum", "in-by-out", "softmax-cross-entropy", "h", "a.b", ""]),
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.sampled_from(
        ["name", "units", "transfer", "bias", "inputs", "x"]), inner, max_size=5),
    max_leaves=12)
LAYER_TABLES = st.fixed_dictionaries({"name": JSON_VALUES, "units": JSON_VALUES, "transfer": JSON_VALUES},
                                     optional={"bias": JSON_VALUES, "inputs": JSON_VALUES})


@settings(max_examples=200, deadline=None)
@given(st.fixed_dictionaries({"version": st.sampled_from([1, 2, "1", None]), "inputs": JSON_VALUES,
                              "layers": st.lists(LAYER_TABLES, max_size=3) | JSON_VALUES,
                              "loss": JSON_VALUES}, optional={"batch": JSON_VALUES, "bias": JSON_VALUES,
                                                              "weight_layout": JSON_VALUES, "extra": JSON_VALUES}))
def test_any_parsed_json_gives_a_description_or_an_input_error(mapping):
    try:
        net = NetworkDescription.from_mapping(mapping)
    except InputError:
        return
    assert NetworkDescription.from_mapping(net.to_mapping()) == net
