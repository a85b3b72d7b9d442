"""Tests for gradcheck._api.layer (examine_layer) and gradcheck._layers.stress (stress_inputs, conditioning notes).

Every layer below is written here for these tests (numpy, naive where the issue
asks for it), with a correct backward and planted mistakes selected by a ``bug``
argument. Outside references:

* the forwards are compared with SciPy (``scipy.special.expit``,
  ``scipy.special.softplus``, ``scipy.special.log_softmax``,
  ``scipy.signal.correlate``) and with the textbook definitions (common practice);
* every correct backward is compared with the vector-Jacobian product computed
  by ``scipy.differentiate.jacobian`` (adaptive high-order central differences)
  on the forward, so "correct" does not rest on gradcheck itself;
* the factor of the epsilon mistake, sqrt((var + eps) / var), follows from the
  batch-normalisation formula (derived in the test's comment; common practice).

Input values are invented for these tests (seeded random draws).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import scipy.signal
import scipy.special
from scipy.differentiate import jacobian

from gradcheck._core.errors import InputError
from gradcheck._api.layer import examine_layer, input_names
from gradcheck._layers.stress import stress_inputs

EPS = 1e-5  # the normalisation layers' epsilon (the common default)


# ----------------------------------------------------------------------------- the layers

def affine(x, w, b):
    return x @ w + b


def affine_back(g, x, w, b, bug=None):
    dw = x.T @ g / (len(x) if bug == "dw-averaged" else 1)
    db = np.full_like(b, g.sum()) if bug == "db-all-axes" else g.sum(axis=0)
    return g @ w.T, dw, db


def logistic(x):
    return 1.0 / (1.0 + np.exp(-x))


def logistic_back(g, x, bug=None):
    s = logistic(x)
    return (g * s if bug == "no-one-minus" else g * s * (1.0 - s),)


def tanh(x):
    return np.tanh(x)


def tanh_back(g, x, bug=None):
    t = np.tanh(x)
    return (g * (1.0 - t) if bug == "no-square" else g * (1.0 - t ** 2),)


def relu(x):
    return np.maximum(x, 0.0)


def relu_back(g, x, bug=None):
    return (g * ((g if bug == "mask-from-upstream" else x) > 0),)


def leaky_relu(x, slope):
    return np.where(x > 0, x, slope * x)


def leaky_relu_back(g, x, slope, bug=None):
    return g * np.where(x > 0, 1.0, 0.0 if bug == "no-slope" else slope), None


def softplus(x):
    return np.logaddexp(0.0, x)


def softplus_back(g, x, bug=None):
    return (g * logistic(-x if bug == "mirrored" else x),)


def softmax_ce(scores, labels):
    shifted = scores - scores.max(axis=1, keepdims=True)
    logp = shifted - np.log(np.exp(shifted).sum(axis=1, keepdims=True))
    return -logp[np.arange(len(labels)), labels].mean()


def softmax_ce_back(g, scores, labels, bug=None):
    e = np.exp(scores - scores.max(axis=1, keepdims=True))
    p = e / e.sum(axis=1, keepdims=True)
    if bug != "no-label-term":
        p[np.arange(len(labels)), labels] -= 1.0
    return g * p / (1 if bug == "no-mean" else len(labels)), None


def _normalise(x, axis):
    mu = x.mean(axis=axis, keepdims=True)
    var = ((x - mu) ** 2).mean(axis=axis, keepdims=True)
    return (x - mu) / np.sqrt(var + EPS), var


def batchnorm(x, gamma, beta):
    return gamma * _normalise(x, 0)[0] + beta


def layernorm(x, gamma, beta):
    return gamma * _normalise(x, 1)[0] + beta


def _norm_back(g, x, gamma, axis, bug):
    xhat, var = _normalise(x, axis)
    gh = g * gamma
    projection = 0.0 if bug == "no-projection" else xhat * (gh * xhat).mean(axis=axis, keepdims=True)
    centre = 0.0 if bug == "no-mean-term" else gh.mean(axis=axis, keepdims=True)
    sigma = np.sqrt(var if bug == "no-eps" else var + EPS)
    dgamma = (g * (x if bug == "dgamma-raw-x" else xhat)).sum(axis=0)
    dbeta = g.mean(axis=0) if bug == "dbeta-averaged" else g.sum(axis=0)
    return (gh - centre - projection) / sigma, dgamma, dbeta


def batchnorm_back(g, x, gamma, beta, bug=None):
    return _norm_back(g, x, gamma, 0, bug)


def layernorm_back(g, x, gamma, beta, bug=None):
    return _norm_back(g, x, gamma, 1, bug)


def conv2d(x, w, b, stride, pad):
    """Cross-correlation of x (N, C, H, W) with w (F, C, k, k), naive loops over every output entry."""
    n, _, h, wd = x.shape
    f, _, k, _ = w.shape
    xp = np.pad(x, ((0, 0), (0, 0), (pad, pad), (pad, pad)))
    out = np.zeros((n, f, (h + 2 * pad - k) // stride + 1, (wd + 2 * pad - k) // stride + 1))
    for s in range(n):
        for o in range(f):
            for i in range(out.shape[2]):
                for j in range(out.shape[3]):
                    patch = xp[s, :, i * stride:i * stride + k, j * stride:j * stride + k]
                    out[s, o, i, j] = np.sum(patch * w[o]) + b[o]
    return out


def conv2d_back(g, x, w, b, stride, pad, bug=None):
    k = w.shape[2]
    xp = np.pad(x, ((0, 0), (0, 0), (pad, pad), (pad, pad)))
    dxp, dw = np.zeros_like(xp), np.zeros_like(w)
    for s in range(g.shape[0]):
        for o in range(g.shape[1]):
            for i in range(g.shape[2]):
                for j in range(g.shape[3]):
                    rows, cols = slice(i * stride, i * stride + k), slice(j * stride, j * stride + k)
                    dw[o] += g[s, o, i, j] * xp[s, :, rows, cols]
                    if bug == "dx-assigned":
                        dxp[s, :, rows, cols] = g[s, o, i, j] * w[o]
                    else:
                        dxp[s, :, rows, cols] += g[s, o, i, j] * w[o]
    if bug == "dw-flipped":
        dw = dw[:, :, ::-1, ::-1]
    dx = dxp[:, :, pad:pad + x.shape[2], pad:pad + x.shape[3]]
    return dx, dw, g.sum(axis=(0, 2, 3)), None, None


def _windows(shape, size, stride):
    for i in range((shape[2] - size) // stride + 1):
        for j in range((shape[3] - size) // stride + 1):
            yield i, j, slice(i * stride, i * stride + size), slice(j * stride, j * stride + size)


def maxpool(x, size, stride):
    n, c, h, w = x.shape
    out = np.zeros((n, c, (h - size) // stride + 1, (w - size) // stride + 1))
    for i, j, rows, cols in _windows(x.shape, size, stride):
        out[:, :, i, j] = x[:, :, rows, cols].max(axis=(2, 3))
    return out


def maxpool_back(g, x, size, stride, bug=None):
    dx = np.zeros_like(x)
    n, c = x.shape[:2]
    s_idx, c_idx = np.meshgrid(np.arange(n), np.arange(c), indexing="ij")
    for i, j, rows, cols in _windows(x.shape, size, stride):
        a, b = np.divmod(x[:, :, rows, cols].reshape(n, c, size * size).argmax(axis=2), size)
        where = (s_idx, c_idx, rows.start + a, cols.start + b)
        if bug == "assigned":
            dx[where] = g[:, :, i, j]
        else:
            dx[where] += g[:, :, i, j]
    return dx, None, None


def meanpool(x, size, stride):
    n, c, h, w = x.shape
    out = np.zeros((n, c, (h - size) // stride + 1, (w - size) // stride + 1))
    for i, j, rows, cols in _windows(x.shape, size, stride):
        out[:, :, i, j] = x[:, :, rows, cols].mean(axis=(2, 3))
    return out


def meanpool_back(g, x, size, stride, bug=None):
    dx = np.zeros_like(x)
    area = 1 if bug == "not-divided" else size * size
    for i, j, rows, cols in _windows(x.shape, size, stride):
        dx[:, :, rows, cols] += g[:, :, i, j][:, :, None, None] / area
    return dx, None, None


def rnn(xs, h0, wx, wh, b):
    """A tanh recurrent cell over the time axis of xs (T, N, D); returns every state and the last one."""
    hs = np.zeros((len(xs),) + h0.shape)
    h = h0
    for t in range(len(xs)):
        h = np.tanh(xs[t] @ wx + h @ wh + b)
        hs[t] = h
    return hs, h


def rnn_back(g, xs, h0, wx, wh, b, bug=None):
    g_states, g_last = g
    hs, _ = rnn(xs, h0, wx, wh, b)
    dxs, dwx, dwh, db = np.zeros_like(xs), np.zeros_like(wx), np.zeros_like(wh), np.zeros_like(b)
    dh = np.array(g_last, dtype=float)
    for t in reversed(range(len(xs))):
        da = (dh + g_states[t]) * (1.0 - hs[t] ** 2)
        prev = hs[t - 1] if t > 0 else h0
        dxs[t] = da @ wx.T
        dwx += xs[t].T @ da
        dwh = prev.T @ da if bug == "dwh-assigned" else dwh + prev.T @ da
        db += da.sum(axis=0)
        dh = da if (bug == "dh0-no-carry" and t == 0) else da @ wh.T
    return dxs, dh, dwx, dwh, db


# ----------------------------------------------------------------------------- inputs and the tables

def _rng(seed):
    return np.random.default_rng(seed)


def _away_from_zero(rng, shape):
    """Values with |x| in 0.1..2: far from the kinks of ReLU-like layers, for the SciPy reference's wide steps."""
    return rng.choice([-1.0, 1.0], shape) * rng.uniform(0.1, 2.0, shape)


def _spaced(rng, shape):
    """Distinct values 0.1 apart, so no difference step moves the maximum of a pooling window."""
    return 0.1 * rng.permutation(int(np.prod(shape))).reshape(shape) - 2.0


def _peak(rng, shape):
    """Values 0.1 apart that fall away from the centre of every channel, so overlapping windows share maxima."""
    rows, cols = np.indices(shape[2:])
    dist = np.hypot(rows - shape[2] // 2, cols - shape[3] // 2).ravel()
    values = np.empty(dist.size)
    values[np.lexsort((rng.random(dist.size), dist))] = -0.1 * np.arange(dist.size)
    return values.reshape(shape[2:]) + 0.1 * dist.size * rng.permutation(shape[0] * shape[1]).reshape(
        shape[:2] + (1, 1))


def _unit_variance(x):
    return (x - x.mean(axis=0)) / x.std(axis=0)


LAYERS = {
    # name: (forward, backward(g, *inputs, bug=...), inputs, stress kind, stress options)
    "affine": (affine, affine_back, lambda r: (r.normal(size=(5, 4)), r.normal(size=(4, 3)), r.normal(size=3)),
               None, {}),
    "logistic": (logistic, logistic_back, lambda r: (r.normal(size=(4, 3)),), "activation", {}),
    "tanh": (tanh, tanh_back, lambda r: (r.normal(size=(4, 3)),), "activation", {}),
    "relu": (relu, relu_back, lambda r: (_away_from_zero(r, (4, 3)),), "activation", {}),
    "leaky_relu": (leaky_relu, leaky_relu_back, lambda r: (_away_from_zero(r, (4, 3)), 0.1), "activation", {}),
    "softplus": (softplus, softplus_back, lambda r: (r.normal(size=(4, 3)),), "activation", {}),
    "softmax_ce": (softmax_ce, softmax_ce_back, lambda r: (r.normal(size=(6, 4)), r.integers(0, 4, 6)),
                   "softmax", {}),
    "batchnorm": (batchnorm, batchnorm_back,
                  lambda r: (r.normal(size=(8, 3)), r.uniform(0.5, 1.5, 3), r.normal(size=3)),
                  "normalisation", {"axis": 0}),
    "layernorm": (layernorm, layernorm_back,
                  lambda r: (r.normal(size=(4, 6)), r.uniform(0.5, 1.5, 6), r.normal(size=6)),
                  "normalisation", {"axis": -1}),
    "conv2d": (conv2d, conv2d_back,
               lambda r: (r.normal(size=(2, 2, 4, 4)), r.normal(size=(2, 2, 3, 3)), r.normal(size=2), 1, 1),
               "convolution", {}),
    "maxpool": (maxpool, maxpool_back, lambda r: (_peak(r, (2, 2, 5, 5)), 3, 2), "pooling", {}),
    "meanpool": (meanpool, meanpool_back, lambda r: (r.normal(size=(2, 2, 5, 5)), 3, 2), "pooling", {}),
    "rnn": (rnn, rnn_back,
            lambda r: (r.normal(size=(3, 2, 3)), r.normal(size=(2, 4)), 0.5 * r.normal(size=(3, 4)),
                       0.5 * r.normal(size=(4, 4)), r.normal(size=4)),
            "recurrent", {}),
}

BUGS = [
    # (layer, planted bug, the input it must be located to, the finding expected first or None)
    ("affine", "db-all-axes", "b", "bias-sum-over-all-axes"),
    ("affine", "dw-averaged", "w", "scaled"),
    ("logistic", "no-one-minus", "x", None),
    ("tanh", "no-square", "x", None),
    ("relu", "mask-from-upstream", "x", None),
    ("leaky_relu", "no-slope", "x", None),
    ("softplus", "mirrored", "x", None),
    ("softmax_ce", "no-mean", "scores", "scaled"),
    ("softmax_ce", "no-label-term", "scores", None),
    ("batchnorm", "no-mean-term", "x", None),
    ("batchnorm", "dgamma-raw-x", "gamma", None),
    ("layernorm", "no-projection", "x", None),
    ("layernorm", "dbeta-averaged", "beta", "scaled"),
    ("conv2d", "dw-flipped", "w", "flipped-kernel"),
    ("conv2d", "dx-assigned", "x", None),
    ("maxpool", "assigned", "x", None),
    ("meanpool", "not-divided", "x", "scaled"),
    ("rnn", "dwh-assigned", "wh", None),
    ("rnn", "dh0-no-carry", "h0", None),
]


def layer_case(name, seed=0):
    forward, backward, make, _, _ = LAYERS[name]
    return forward, backward, make(_rng(seed))


def buggy(backward, bug):
    return lambda g, *inputs: backward(g, *inputs, bug=bug)


# ----------------------------------------------------------------------------- outside references

def test_forwards_match_scipy():
    # SciPy's special functions and correlate are the outside definitions of these forwards.
    x = _rng(1).normal(size=(4, 5))
    np.testing.assert_allclose(logistic(x), scipy.special.expit(x), rtol=1e-14)
    np.testing.assert_allclose(softplus(x), scipy.special.softplus(x), rtol=1e-14)
    labels = np.array([0, 4, 2, 1])
    expected = -scipy.special.log_softmax(x, axis=1)[np.arange(4), labels].mean()
    np.testing.assert_allclose(softmax_ce(x, labels), expected, rtol=1e-13)
    xc, w, b = layer_case("conv2d")[2][:3]
    xp = np.pad(xc, ((0, 0), (0, 0), (1, 1), (1, 1)))
    ref = np.stack([np.stack([scipy.signal.correlate(xp[s], w[o], mode="valid")[0] + b[o] for o in range(2)])
                    for s in range(2)])
    np.testing.assert_allclose(conv2d(xc, w, b, 1, 1), ref, rtol=1e-12, atol=1e-12)
    # Textbook definitions (common practice): batch statistics per feature, layer statistics per sample.
    xb = _rng(2).normal(size=(8, 3))
    np.testing.assert_allclose(batchnorm(xb, np.ones(3), np.zeros(3)),
                               (xb - xb.mean(0)) / np.sqrt(xb.var(0) + EPS), rtol=1e-12)
    np.testing.assert_allclose(layernorm(xb, np.ones(3), np.zeros(3)),
                               (xb - xb.mean(1, keepdims=True)) / np.sqrt(xb.var(1, keepdims=True) + EPS),
                               rtol=1e-12)


def _scipy_vjp(forward, inputs, upstream, positions):
    """The gradient of <forward(inputs), upstream> in the inputs at ``positions``, by scipy.differentiate."""
    shapes = [np.shape(inputs[i]) for i in positions]
    sizes = [int(np.prod(s)) for s in shapes]

    def pair(vector):
        args, start = list(inputs), 0
        for i, s, n in zip(positions, shapes, sizes):
            args[i] = vector[start:start + n].reshape(s)
            start += n
        out = forward(*args)
        outs = out if isinstance(out, tuple) else (out,)
        ups = upstream if isinstance(upstream, tuple) else (upstream,)
        return sum(float(np.sum(o * u)) for o, u in zip(outs, ups))

    def f(theta):
        flat = theta.reshape(theta.shape[0], -1)
        return np.array([pair(flat[:, j]) for j in range(flat.shape[1])]).reshape((1,) + theta.shape[1:])

    point = np.concatenate([np.ravel(inputs[i]) for i in positions])
    res = jacobian(f, point, initial_step=1e-2, tolerances={"atol": 1e-11, "rtol": 1e-10})
    assert np.all(res.success)
    return np.split(res.df[0], np.cumsum(sizes)[:-1])


@pytest.mark.parametrize("name", sorted(LAYERS))
def test_correct_backwards_agree_with_scipy(name):
    forward, backward, inputs = layer_case(name)
    out = forward(*inputs)
    upstream = (tuple(_rng(3).normal(size=np.shape(o)) for o in out) if isinstance(out, tuple)
                else _rng(3).normal(size=np.shape(out)))
    grads = backward(upstream, *inputs)
    positions = [i for i, g in enumerate(grads) if g is not None]
    for i, ref in zip(positions, _scipy_vjp(forward, inputs, upstream, positions)):
        np.testing.assert_allclose(np.ravel(grads[i]), ref, rtol=1e-7, atol=1e-9)


# ----------------------------------------------------------------------------- the main job

@pytest.mark.parametrize("name", sorted(LAYERS))
def test_correct_layers_pass(name):
    forward, backward, inputs = layer_case(name)
    report = examine_layer(forward, backward, *inputs)
    assert report.ok, str(report)
    assert all(t.checked == t.size > 0 for t in report.tensors)
    assert not report.findings


@pytest.mark.parametrize("name,bug,where,kind", BUGS)
def test_planted_bugs_are_caught_and_located(name, bug, where, kind):
    forward, backward, inputs = layer_case(name)
    report = examine_layer(forward, buggy(backward, bug), *inputs)
    assert not report.ok
    assert [t.path for t in report.tensors if not t.ok] == [where], str(report)
    assert report.findings[0].layer == where
    assert report.worst_layer == where
    if kind is not None:
        assert report.findings[0].kind == kind, str(report)


@pytest.mark.parametrize("name", sorted(n for n in LAYERS if LAYERS[n][3]))
def test_correct_layers_pass_every_stress_variant(name):
    forward, backward, inputs = layer_case(name)
    kind, options = LAYERS[name][3], LAYERS[name][4]
    for variant, stressed in stress_inputs(kind, *inputs, **options):
        report = examine_layer(forward, backward, *stressed, trials=1)
        assert report.ok, f"{variant}:\n{report}"


def test_the_epsilon_mistake_is_weak_at_unit_variance_and_caught_under_stress():
    x, gamma, beta = _unit_variance(_rng(4).normal(size=(8, 3))), _rng(5).uniform(0.5, 1.5, 3), np.zeros(3)
    for backward in (batchnorm_back, buggy(batchnorm_back, "no-eps")):
        report = examine_layer(batchnorm, backward, x, gamma, beta)
        assert any(n.startswith("weak check for x: doubling x") for n in report.notes), str(report)
    assert examine_layer(batchnorm, buggy(batchnorm_back, "no-eps"), x, gamma, beta).tensor("x").error < 1e-5
    stressed = dict(stress_inputs("normalisation", x, gamma, beta))["small-variance"]
    report = examine_layer(batchnorm, buggy(batchnorm_back, "no-eps"), *stressed)
    assert not report.ok and [t.path for t in report.tensors if not t.ok] == ["x"]
    assert not any(n.startswith("weak check for x") for n in report.notes)
    # Derivation (common practice formula): dx = (1 / sqrt(var + eps)) (g' - mean g' - xhat mean(g' xhat)); the
    # mistake divides by sqrt(var) instead, a uniform factor sqrt((var + eps) / var) at the stressed var = 1e-4.
    assert report.findings[0].kind == "scaled"
    np.testing.assert_allclose(report.findings[0].factor, np.sqrt((1e-4 + EPS) / 1e-4), rtol=1e-6)


def test_zero_variance_feature_exposes_the_epsilon_mistake_as_non_finite():
    x, gamma, beta = layer_case("batchnorm")[2]
    stressed = dict(stress_inputs("normalisation", x, gamma, beta))["constant-feature"]
    with np.errstate(divide="ignore", invalid="ignore"):
        report = examine_layer(batchnorm, buggy(batchnorm_back, "no-eps"), *stressed, trials=1)
    assert report.findings[0].kind == "non-finite" and report.findings[0].where == "x"
    with pytest.raises(InputError, match=r"examine_layer: backward: expected the gradients of the inputs, got "
                                         r"RuntimeWarning: divide by zero"):
        examine_layer(batchnorm, buggy(batchnorm_back, "no-eps"), *stressed, trials=1)


@pytest.mark.parametrize("layer", ["maxpool", "meanpool"])
def test_non_overlapping_windows_are_reported_weak(layer):
    forward, backward, (x, _, _) = layer_case(layer)
    wrong = {"maxpool": "assigned", "meanpool": None}[layer]
    report = examine_layer(forward, buggy(backward, wrong), x[:, :, :4, :4], 2, 2)
    assert report.ok  # the assign mistake is exactly right when no entry is in two windows
    assert any(n.startswith("weak check for x: each of 64 perturbed entries") for n in report.notes)
    overlapping = examine_layer(forward, backward, x, 3, 2)
    assert overlapping.ok and not any("perturbed" in n for n in overlapping.notes), str(overlapping)


def test_overlapping_windows_without_shared_maxima_are_reported_weak():
    # Values that grow along both spatial axes: every window's maximum is its own last corner, so even with
    # the stride (1) smaller than the window (2) no entry wins two windows and the assign mistake hides.
    ramp = np.add.outer(np.arange(4.0), 0.1 * np.arange(4.0))[None, None] + np.zeros((2, 1, 1, 1))
    report = examine_layer(maxpool, buggy(maxpool_back, "assigned"), ramp, 2, 1)
    assert report.ok and any(n.startswith("weak check for x: each of 32 perturbed") for n in report.notes)
    peaked = dict(stress_inputs("pooling", ramp, 2, 1))["peaked"]
    caught = examine_layer(maxpool, buggy(maxpool_back, "assigned"), *peaked)
    assert not caught.ok and caught.findings[0].where == "x"


def test_saturated_units_are_reported_below_resolution():
    x = dict(stress_inputs("activation", _rng(6).normal(size=(4, 3))))["saturating"][0]
    report = examine_layer(tanh, tanh_back, x, trials=1)
    assert report.ok
    assert any(n.startswith("weak check for x: the true gradient is below the check's resolution")
               for n in report.notes), str(report)
    rnn_inputs = layer_case("rnn")[2]
    no_steps = dict(stress_inputs("recurrent", *rnn_inputs))["zero-steps"]
    report = examine_layer(rnn, rnn_back, *no_steps, trials=1)
    assert report.ok and report.tensor("h0").checked == 8
    assert sum(n.endswith("so only zeros were checked.") for n in report.notes) == 3  # wx, wh and b


def test_random_upstreams_catch_a_backward_that_ignores_the_upstream():
    x = layer_case("relu")[2][0]
    ignores = lambda g, x: ((x > 0) * 1.0,)  # noqa: E731 - right only when the upstream is all ones
    assert examine_layer(relu, ignores, x, upstream=np.ones_like(x)).ok
    report = examine_layer(relu, ignores, x)
    assert not report.ok and report.findings[0].where == "x"
    assert "3 random upstream gradients" in report.notes[0]


# ----------------------------------------------------------------------------- randomness, glue and routes

def dropout_unseeded(x):
    keep = np.random.default_rng().random(x.shape) < 0.5
    return x * keep / 0.5


def dropout(x, keep):
    return x * keep / 0.5


def test_a_dropout_forward_with_free_randomness_is_reported():
    x = _rng(7).normal(size=(6, 5))
    report = examine_layer(dropout_unseeded, lambda g, x: (g,), x)
    assert not report.ok and [f.kind for f in report.findings] == ["nondeterministic-loss"]
    assert "seed" in report.findings[0].detail and "pass the mask as an input" in report.findings[0].detail
    keep = np.random.default_rng(8).random(x.shape) < 0.5
    fixed = examine_layer(dropout, lambda g, x, keep: (g * keep / 0.5, None), x, keep)
    assert fixed.ok and [t.path for t in fixed.tensors] == ["x"]


def cache_affine_forward(x, w, b):
    out = x @ w + b
    return out, (x, w)


def cache_affine_backward(dout, cache):
    x, w = cache
    return dout @ w.T, x.T @ dout, dout.sum(axis=0)


def test_cache_style_code_needs_one_line_of_glue_each():
    forward = lambda x, w, b: cache_affine_forward(x, w, b)[0]  # noqa: E731 - the glue docs/layers.md shows
    backward = lambda g, x, w, b: cache_affine_backward(g, cache_affine_forward(x, w, b)[1])  # noqa: E731
    report = examine_layer(forward, backward, *layer_case("affine")[2])
    assert report.ok and [t.path for t in report.tensors] == ["x", "w", "b"]


def xp_layer(x, w, xp=np):
    return xp.tanh(x @ w)


def test_a_forward_with_an_xp_keyword_gets_the_autodiff_reference():
    x, w = _rng(9).normal(size=(3, 4)), _rng(10).normal(size=(4, 2))
    back = lambda g, x, w: (g * (1 - np.tanh(x @ w) ** 2) @ w.T, x.T @ (g * (1 - np.tanh(x @ w) ** 2)))  # noqa
    report = examine_layer(xp_layer, back, x, w)
    assert report.ok and report.references.primary == "autodiff"
    wrong = examine_layer(xp_layer, lambda g, x, w: (back(g, x, w)[0], 2.0 * back(g, x, w)[1]), x, w)
    assert [t.path for t in wrong.tensors if not t.ok] == ["w"] and wrong.findings[0].factor == pytest.approx(2.0)


def test_names_wrt_and_unnamed_inputs():
    assert input_names(affine, 3) == ["x", "w", "b"]
    x, w, b = layer_case("affine")[2]
    report = examine_layer(lambda *a: affine(*a), affine_back, x, w, b, wrt=["input1"])
    assert [t.path for t in report.tensors] == ["input1"] and report.ok
    slope_given = examine_layer(leaky_relu, leaky_relu_back, *layer_case("leaky_relu")[2])
    assert [t.path for t in slope_given.tensors] == ["x"]


def dense(x, p):
    return x @ p["w"] + p["b"]


def dense_back(g, x, p, bug=None):
    return g @ p["w"].T, {"w": x.T @ g, "b": -g.sum(axis=0) if bug == "db-negated" else g.sum(axis=0)}


def test_a_pytree_input_is_checked_tensor_by_tensor_under_its_input_name():
    x, w, b = layer_case("affine")[2]
    report = examine_layer(dense, dense_back, x, {"w": w, "b": b})
    assert report.ok and [(t.path, t.layer) for t in report.tensors] == [("x", "x"), ("p.w", "p"), ("p.b", "p")]
    wrong = examine_layer(dense, buggy(dense_back, "db-negated"), x, {"w": w, "b": b})
    assert [t.path for t in wrong.tensors if not t.ok] == ["p.b"]
    assert (wrong.findings[0].kind, wrong.findings[0].layer) == ("sign-flip", "p")


def test_float32_inputs_are_checked_at_the_float32_tolerance():
    x = _rng(11).normal(size=(4, 3)).astype(np.float32)
    report = examine_layer(tanh, tanh_back, x)
    assert report.ok and report.tensor("x").tolerance == pytest.approx(1e-3)


def test_the_caller_inputs_are_left_untouched():
    forward, backward, inputs = layer_case("batchnorm")
    before = [np.copy(v) for v in inputs]
    examine_layer(forward, buggy(backward, "no-mean-term"), *inputs)
    for a, b in zip(inputs, before):
        np.testing.assert_array_equal(a, b)


@pytest.mark.parametrize("call,message", [
    (lambda x: examine_layer(affine, lambda g, x, w, b: (g @ w.T, None), x, x.T[:, :3], x[0, :3]),
     r"examine_layer: backward: expected a tuple of 3 gradients, one per input \['x', 'w', 'b'\].*got a tuple of 2"),
    (lambda x: examine_layer(affine, lambda g, x, w, b: (g @ w.T, (x.T @ g).T, g.sum(0)), x, x.T[:, :3], x[0, :3]),
     r"backward w: expected shape \(4, 3\), got shape \(3, 4\)\. The claimed array is the transpose"),
    (lambda x: examine_layer(affine, affine_back, x, x, x[0]),
     r"examine_layer: forward: expected an output for the given inputs, got ValueError: matmul"),
    (lambda x: examine_layer(affine, affine_back, x, x.T[:, :3], x[0, :3], wrt="v"),
     r"wrt: expected input names among \['x', 'w', 'b'\] \(or positions\), got 'v'"),
    (lambda x: examine_layer(softmax_ce, softmax_ce_back, x, np.zeros(5, int), wrt="labels"),
     r"wrt labels: expected a float input, got ndarray of dtype int64"),
    (lambda x: examine_layer(softmax_ce, softmax_ce_back, x, np.zeros(5, int), trials=0),
     r"trials: expected a positive integer, got 0"),
    (lambda x: examine_layer(affine, affine_back, x, x.T[:, :3], x[0, :3], np.ones(3)),
     r"inputs: expected at most 3 inputs for forward\(x, w, b\), got 4 inputs"),
    (lambda x: examine_layer(relu, relu_back, x, upstream=np.ones(3)),
     r"upstream: expected one array per float output leaf, shapes \[\(5, 4\)\], got shapes \[\(3,\)\]"),
    (lambda x: examine_layer(lambda x: x > 0, relu_back, x),
     r"forward: expected an output with at least one float array, got ndarray of dtype bool"),
    (lambda x: stress_inputs("pooled", x), r"stress_inputs kind: expected one of \["),
    (lambda x: stress_inputs("activation", x, which=2), r"stress_inputs which: expected a position among the 1"),
    (lambda x: stress_inputs("softmax", x, np.zeros(5, int), which=1),
     r"stress_inputs input 1: expected a non-empty float array"),
])
def test_unusable_input_is_explained(call, message):
    with pytest.raises(InputError, match=message):
        call(_rng(12).normal(size=(5, 4)))


# ----------------------------------------------------------------------------- stress_inputs itself

STRESS = [
    ("activation", (4, 3), 0, ["saturating", "near-kink", "wide-range", "empty-batch"]),
    ("normalisation", (8, 3), 0, ["small-variance", "constant-feature", "offset", "two-samples"]),
    ("softmax", (6, 4), 0, ["confident", "ties", "tiny-scores"]),
    ("pooling", (2, 2, 5, 5), 0, ["peaked", "near-ties", "negative", "ragged", "empty-batch"]),
    ("recurrent", (3, 2, 3), 0, ["one-step", "zero-steps", "longer", "saturating"]),
]


@pytest.mark.parametrize("kind,shape,axis,expected", STRESS)
def test_stress_variants_replace_only_the_chosen_input(kind, shape, axis, expected):
    x, other = _rng(13).normal(size=shape).astype(np.float32), object()
    variants = stress_inputs(kind, x, other, axis=axis)
    assert [name for name, _ in variants] == expected
    for _, (v, o) in variants:
        assert o is other and v.dtype == np.float32 and v is not x
    np.testing.assert_array_equal(x, _rng(13).normal(size=shape).astype(np.float32))


def test_stress_variants_have_the_stated_properties():
    x = _rng(14).normal(size=(8, 3))
    norm = dict(stress_inputs("normalisation", x, axis=0))
    np.testing.assert_allclose(norm["small-variance"][0].std(axis=0), 1e-2, rtol=1e-12)
    np.testing.assert_allclose(norm["small-variance"][0].mean(axis=0), x.mean(axis=0), rtol=1e-12)
    assert norm["constant-feature"][0][:, 0].std() < 1e-15 and norm["two-samples"][0].shape == (2, 3)
    rows = dict(stress_inputs("normalisation", x, axis=-1))["small-variance"][0]
    np.testing.assert_allclose(rows.std(axis=1), 1e-2, rtol=1e-12)
    pool = dict(stress_inputs("pooling", _rng(15).normal(size=(2, 2, 5, 5))))
    gaps = np.diff(np.sort(pool["near-ties"][0].ravel()))
    np.testing.assert_allclose(gaps, 1e-4, rtol=1e-8)
    assert pool["ragged"][0].shape == (2, 2, 6, 6) and pool["empty-batch"][0].shape == (0, 2, 5, 5)
    assert np.all(pool["negative"][0] <= -1.0)
    act = dict(stress_inputs("activation", x))
    assert np.all((np.abs(act["saturating"][0]) >= 10) & (np.abs(act["saturating"][0]) <= 30))
    ties = dict(stress_inputs("softmax", x))["ties"][0]
    assert np.all(ties == ties[:, :1])
    steps = dict(stress_inputs("recurrent", _rng(16).normal(size=(3, 2, 3))))
    assert steps["zero-steps"][0].shape == (0, 2, 3) and steps["longer"][0].shape == (6, 2, 3)


def test_probes_never_warn():
    # A forward that overflows when its input is doubled must not leak a warning from the conditioning probes.
    x = np.array([[400.0, -1.0], [2.0, 380.0]])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        report = examine_layer(lambda x: np.exp(x) * 1e-150, lambda g, x: (g * np.exp(x) * 1e-150,), x, trials=1)
    assert report.ok
