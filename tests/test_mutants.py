"""Tests for gradcheck._diagnose.mutants and gradcheck._diagnose.program.

Outside reference: ``jax.grad`` (JAX, a general-purpose autodiff library) for the
unmutated reverse pass of the interpreter, and XLA's own evaluation of the trace for
the numpy stand-ins. Everything else is planted-mistake testing: small networks and
data invented for these tests (a 4-feature toy classifier/regressor), each with a
backward pass written by hand in numpy that contains one deliberate slip. The slips
are the familiar ones of hand-written backprop (common practice, listed from memory):
a dropped or misplaced f'(z), the diagonal-only softmax Jacobian, a missing
transpose, a lost 1/N or 0.5, a flipped sign.
"""

from __future__ import annotations

import functools

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from gradcheck._core.errors import InputError
from gradcheck._diagnose.program import trace_program
from gradcheck._diagnose.mutants import KINDS, Mutant, build_mutants, misfit, rank_mutants
from gradcheck._diagnose.mutants import _product_specs, _scale_specs, _transfer_specs
from gradcheck._core.tree import flatten, flatten_like

N = 6  # batch size; not 2, so that 1/N and the 0.5 of a squared error differ
RNG = np.random.default_rng(20240611)
X = RNG.normal(size=(N, 4))
T_REG = RNG.normal(size=(N, 3))
T_CLS = np.eye(3)[[0, 2, 1, 1, 0, 2]]

# name -> (hidden activations, output loss, use jax.nn functions in the JAX forward, flat W1/b1 names)
NETS = {
    "logistic-mse": (("logistic",), "mse", False, False),
    "tanh-mse": (("tanh",), "mse", False, False),
    "relu-softmax": (("relu",), "softmax", False, False),
    "logistic-lse": (("logistic",), "lse", False, False),
    "tanh-logistic-mse": (("tanh", "logistic"), "mse", False, False),
    "nn-logistic-lse": (("logistic",), "lse", True, False),
    "nn-relu-softmax": (("relu",), "softmax", True, False),
    "flat-logistic-mse": (("logistic",), "mse", False, True),
}


def _names(net: str) -> list[str]:
    acts, _, _, flat = NETS[net]
    if flat:
        return [str(n + 1) for n in range(len(acts) + 1)]
    return ["hidden", "middle"][: len(acts)] + ["out"]


def _params(net: str) -> dict:
    acts, _, _, flat = NETS[net]
    sizes = [4] + [5] * len(acts) + [3]
    rng = np.random.default_rng(len(net))
    out = {}
    for name, m, n in zip(_names(net), sizes[:-1], sizes[1:]):
        W, b = rng.normal(scale=0.8, size=(m, n)), rng.normal(scale=0.3, size=n)
        out.update({f"W{name}": W, f"b{name}": b} if flat else {name: {"W": W, "b": b}})
    return out


def _wb(params: dict, name: str, flat: bool) -> tuple:
    return (params[f"W{name}"], params[f"b{name}"]) if flat else (params[name]["W"], params[name]["b"])


def _act(kind: str, z, xp, nn: bool):
    if kind == "logistic":
        return jax.nn.sigmoid(z) if nn else 1.0 / (1.0 + xp.exp(-z))
    if kind == "tanh":
        return xp.tanh(z)
    return jax.nn.relu(z) if nn else xp.maximum(z, 0.0)


def loss(params: dict, net: str, xp=np):
    """The invented networks, written once for numpy and jax.numpy (``xp``)."""
    acts, out, nn, flat = NETS[net]
    nn = nn and xp is jnp
    names = _names(net)
    h = X
    for name, kind in zip(names, acts):
        W, b = _wb(params, name, flat)
        h = _act(kind, h @ W + b, xp, nn)
    W, b = _wb(params, names[-1], flat)
    o = h @ W + b
    if out == "mse":
        return 0.5 * xp.sum((o - T_REG) ** 2) / N
    if out == "softmax":
        if nn:
            s = jax.nn.softmax(o, axis=1)
        else:
            e = xp.exp(o - o.max(axis=1, keepdims=True))
            s = e / e.sum(axis=1, keepdims=True)
        return -xp.sum(T_CLS * xp.log(s)) / N
    if nn:
        return -xp.sum(T_CLS * jax.nn.log_softmax(o, axis=1)) / N
    m = o.max(axis=1, keepdims=True)
    lse = m + xp.log(xp.exp(o - m).sum(axis=1, keepdims=True))
    return -xp.sum(T_CLS * (o - lse)) / N


def _sig(z):
    return 1.0 / (1.0 + np.exp(-z))


def backward(params: dict, net: str, mistake: str | None = None, at: str | None = None) -> dict:
    """A hand-written numpy backward pass of ``loss`` with at most one planted mistake at layer ``at``."""
    acts, out, _, flat = NETS[net]
    names = _names(net)
    hs, zs = [X], []
    for name, kind in zip(names, acts):
        W, b = _wb(params, name, flat)
        zs.append(hs[-1] @ W + b)
        hs.append(_act(kind, zs[-1], np, False))
    W, b = _wb(params, names[-1], flat)
    o = hs[-1] @ W + b
    if out == "mse":
        half = {"doubled-0.5": 0.25, "dropped-0.5": 1.0}.get(mistake, 0.5)
        delta = half * 2.0 * (o - T_REG)
    else:
        s = np.exp(o - o.max(axis=1, keepdims=True))
        s /= s.sum(axis=1, keepdims=True)
        delta = -T_CLS * (1 - s) if mistake == "diag-softmax" else s - T_CLS
    delta = delta / (1.0 if mistake == "missing-1/N" else N)
    if mistake == "sign-flip":
        delta = -delta
    grads = {}
    for layer in range(len(names) - 1, -1, -1):
        name = names[layer]
        W, b = _wb(params, name, flat)
        here = name == at
        dW = delta.T @ hs[layer] if here and mistake == "transposed-grad" else hs[layer].T @ delta
        grads.update({f"W{name}": dW, f"b{name}": delta.sum(0)} if flat else
                     {name: {"W": dW, "b": delta.sum(0)}})
        if layer == 0:
            break
        dh = delta @ W if here and mistake == "transposed-propagation" else delta @ W.T
        z, a, kind = zs[layer - 1], hs[layer], acts[layer - 1]
        right = {"logistic": a * (1 - a), "tanh": 1 - a ** 2, "relu": (z > 0) * 1.0}[kind]
        here = names[layer - 1] == at
        if here and mistake == "drop-derivative":
            d = 1.0
        elif here and mistake == "derivative-twice":
            d = right ** 2
        elif here and mistake == "derivative-at-output":
            d = _sig(a) * (1 - _sig(a)) if kind == "logistic" else 1 - np.tanh(a) ** 2
        elif here and mistake == "tanh-for-logistic":
            d = 1 - a ** 2
        elif here and mistake == "logistic-for-tanh":
            d = a * (1 - a)
        else:
            d = right
        delta = dh * d
    return grads


@functools.lru_cache(maxsize=None)
def _built(net: str) -> tuple:
    params = _params(net)
    structure, leaves = flatten(params)
    with jax.enable_x64(True):
        mutants = build_mutants(functools.partial(loss, net=net, xp=jnp), leaves, structure)
    return params, structure, leaves, mutants


def _claimed(net: str, mistake: str | None, at: str | None) -> tuple:
    params, structure, _, _ = _built(net)
    return tuple(np.asarray(g) for g in flatten_like(structure, backward(params, net, mistake, at), "claimed"))


PLANTED = [  # (network, planted mistake, at layer, expected kind, expected layer, expected factor)
    ("logistic-mse", "drop-derivative", "hidden", "missing-transfer-derivative", "hidden", None),
    ("logistic-mse", "derivative-at-output", "hidden", "transfer-derivative-misplaced", "hidden", None),
    ("logistic-mse", "tanh-for-logistic", "hidden", "transfer-derivative-misplaced", "hidden", None),
    ("logistic-mse", "derivative-twice", "hidden", "extra-transfer-derivative", "hidden", None),
    ("logistic-mse", "missing-1/N", None, "scaled", "out", N),
    ("logistic-mse", "doubled-0.5", None, "scaled", "out", 0.5),
    ("logistic-mse", "sign-flip", None, "sign-flip", None, -1.0),
    ("tanh-mse", "drop-derivative", "hidden", "missing-transfer-derivative", "hidden", None),
    ("tanh-mse", "derivative-at-output", "hidden", "transfer-derivative-misplaced", "hidden", None),
    ("tanh-mse", "logistic-for-tanh", "hidden", "transfer-derivative-misplaced", "hidden", None),
    ("tanh-mse", "dropped-0.5", None, "scaled", "out", 2.0),
    ("relu-softmax", "drop-derivative", "hidden", "missing-transfer-derivative", "hidden", None),
    ("relu-softmax", "diag-softmax", None, "partial-softmax-jacobian", "out", None),
    ("relu-softmax", "missing-1/N", None, "scaled", "out", N),
    ("logistic-lse", "diag-softmax", None, "partial-softmax-jacobian", "out", None),
    ("logistic-lse", "missing-1/N", None, "scaled", "out", N),
    ("logistic-lse", "sign-flip", None, "sign-flip", None, -1.0),
    ("tanh-logistic-mse", "transposed-propagation", "middle", "transposed", "middle", None),
    ("tanh-logistic-mse", "transposed-grad", "middle", "transposed", "middle", None),
    ("tanh-logistic-mse", "drop-derivative", "hidden", "missing-transfer-derivative", "hidden", None),
    ("tanh-logistic-mse", "drop-derivative", "middle", "missing-transfer-derivative", "middle", None),
    ("tanh-logistic-mse", "tanh-for-logistic", "middle", "transfer-derivative-misplaced", "middle", None),
    ("nn-logistic-lse", "drop-derivative", "hidden", "missing-transfer-derivative", "hidden", None),
    ("nn-logistic-lse", "diag-softmax", None, "partial-softmax-jacobian", "out", None),
    ("nn-relu-softmax", "drop-derivative", "hidden", "missing-transfer-derivative", "hidden", None),
    ("nn-relu-softmax", "diag-softmax", None, "partial-softmax-jacobian", "out", None),
    ("flat-logistic-mse", "drop-derivative", "1", "missing-transfer-derivative", "1", None),
    ("flat-logistic-mse", "missing-1/N", None, "scaled", "2", N),
]


@pytest.mark.parametrize("net, mistake, at, kind, layer, factor", PLANTED)
def test_planted_mistake_is_named_first(net, mistake, at, kind, layer, factor):
    *_, mutants = _built(net)
    ranked = rank_mutants(mutants, _claimed(net, mistake, at), tolerance=1e-8)
    best, fit = ranked[0]
    assert (best.kind, best.layer) == (kind, layer), best.where
    assert fit < 1e-8
    if factor is not None:
        np.testing.assert_allclose(best.factor, factor, rtol=1e-12)
    # nothing of another kind or layer comes close: the diagnosis is unambiguous
    rivals = [f for m, f in ranked[1:] if (m.kind, m.layer) != (kind, layer)]
    assert min(rivals) > 1e-3


@pytest.mark.parametrize("net", sorted(NETS))
def test_correct_backward_is_explained_by_no_mutant(net):
    params, structure, leaves, mutants = _built(net)
    claimed = _claimed(net, None, None)
    ranked = rank_mutants(mutants, claimed, tolerance=1e-8)
    assert len(ranked) == len(mutants) > 5
    assert all(f > 1e-3 for _, f in ranked), [(m.where, m.detail) for m, f in ranked if f <= 1e-3]
    assert set(m.kind for m in mutants) <= set(KINDS)
    assert all(len(m.grads) == len(structure.tensors) for m in mutants)
    with jax.enable_x64(True):
        # outside reference: jax.grad of the same loss
        want = flatten_like(structure, jax.jit(jax.grad(functools.partial(loss, net=net, xp=jnp)))(params),
                            "ref")
        got = trace_program(functools.partial(loss, net=net, xp=jnp), leaves, structure).gradients(leaves)
    for g, w, c in zip(got, want, claimed):
        np.testing.assert_allclose(g[0], w, rtol=1e-12, atol=1e-12 * np.max(np.abs(w)))
        np.testing.assert_allclose(c, w, rtol=1e-10, atol=1e-12)  # the hand-written pass is right too


def _sink(p, xp=jnp):
    """Odd but common spellings: weight decay first, transposed weight, mean, softplus, where, clip."""
    decay = 1e-2 * (jnp.sum(p["a"]["W"] ** 2) + jnp.sum(p["c"]["W"] ** 2))
    z = X @ p["a"]["W"].T + p["a"]["b"]
    h = jnp.where(z > 0, z, 0.1 * z)
    h = jax.nn.softplus(h) + jnp.clip(h, -1.0, 1.0)
    o = jnp.tanh(h @ p["c"]["W"]) ** 2
    rows = jnp.einsum("ij,ij->i", o, h)  # a dot_general with a batch axis
    return jnp.mean(jax.nn.logsumexp(o, axis=1)) + decay + jnp.sum(jax.nn.gelu(o)) / 7 + jnp.sum(rows) / 9


def _gather_ce(p, xp=jnp):
    """Cross-entropy by integer labels: gather and iota have no numpy stand-in (compiled path)."""
    o = jnp.tanh(X @ p["a"]["W"].T + p["a"]["b"]) @ p["c"]["W"]
    return jnp.mean(jax.nn.logsumexp(o, axis=1) - o[jnp.arange(N), jnp.array([0, 4, 1, 3, 3, 2])])


SINK = {"a": {"W": RNG.normal(size=(5, 4)), "b": RNG.normal(size=5)}, "c": {"W": RNG.normal(size=(5, 5))}}


@pytest.mark.parametrize("fun", [_sink, _gather_ce])
def test_interpreter_matches_jax_grad(fun):
    structure, leaves = flatten(SINK)
    with jax.enable_x64(True):
        want = flatten_like(structure, jax.jit(jax.grad(fun))(SINK), "ref")  # outside reference: jax.grad
        got = trace_program(fun, leaves, structure).gradients(leaves)
    for g, w in zip(got, want):
        np.testing.assert_allclose(g[0], w, rtol=1e-12, atol=1e-12 * np.max(np.abs(w)))


def test_sites_seen_through_library_functions():
    structure, leaves = flatten(SINK)
    with jax.enable_x64(True):
        prog = trace_program(_sink, leaves, structure)
        mutants = build_mutants(_sink, leaves, structure)
    assert not any(s.name in ("jit", "pjit", "custom_jvp_call") for s in prog.steps)
    by_kind = {(m.kind, m.layer) for m in mutants}
    # the square weight c.W is found; jax.nn.softplus is seen through its jit and custom_jvp as one
    # softplus of layer a, so the max(z, 0) inside it is not mistaken for a ReLU
    assert ("transposed", "c") in by_kind
    assert {m.layer for m in mutants if m.where.startswith("softplus")} == {"a"}
    assert not any("ReLU" in m.where for m in mutants)
    # the weight decay (parameter-only side chain, traced first) does not pull the loss's 1/N into layer a
    assert {m.layer for m in mutants if m.where.startswith("division by 6")} == {"c"}
    # the tanh inside jax.nn.gelu is a second tanh site of layer c, told apart from the first
    assert {m.where for m in mutants if m.where.startswith("tanh")} == {"tanh in layer c",
                                                                       "tanh in layer c (occurrence 2)"}


def _specs(prog, paths):
    return _transfer_specs(prog) + _product_specs(prog, paths) + _scale_specs(prog)


@pytest.mark.parametrize("net", ["tanh-logistic-mse", "nn-relu-softmax", "sink"])
def test_numpy_evaluation_agrees_with_compiled_xla(net):
    """The numpy stand-ins (used to avoid compile time) against XLA's own evaluation of the trace."""
    if net == "sink":
        fun, (structure, leaves) = _sink, flatten(SINK)
    else:
        fun, (_, structure, leaves, _) = functools.partial(loss, net=net, xp=jnp), _built(net)
    with jax.enable_x64(True):
        prog = trace_program(fun, leaves, structure)
        fast = list(prog.values)
        prog.evaluate(leaves, use_numpy=False)
        specs = [mu for _, mu in _specs(prog, dict(zip(prog.param_ids, structure.paths)))]
        rows = [prog.gradients(leaves, specs, use_numpy=flag) for flag in (True, False)]
    assert len(specs) > 5
    for i, (a, b) in enumerate(zip(fast, prog.values)):
        np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-13, err_msg=f"slot {i}")
    for a, b in zip(*rows):
        np.testing.assert_allclose(a, b, rtol=1e-11, atol=1e-12 * np.max(np.abs(b)))


def test_max_mutants_caps_in_catalogue_order():
    _, structure, leaves, mutants = _built("logistic-mse")
    with jax.enable_x64(True):
        few = build_mutants(functools.partial(loss, net="logistic-mse", xp=jnp), leaves, structure,
                            max_mutants=3)
    assert [m.where for m in few] == [m.where for m in mutants[:3]]


@pytest.mark.parametrize("tolerance, first", [(1e-8, "close"), (1e-12, "exact")])
def test_explaining_mutants_keep_catalogue_order(tolerance, first):
    """Misfits within the tolerance differ by rounding only and must not reorder the diagnosis."""
    claimed = (np.array([1.0, -2.0]),)
    close = Mutant("scaled", "out", "close", "", 1.0, (claimed[0] * (1 + 1e-10),))
    exact = Mutant("sign-flip", None, "exact", "", -1.0, (claimed[0].copy(),))
    far = Mutant("transposed", "out", "far", "", None, (claimed[0][::-1].copy(),))
    ranked = rank_mutants([far, close, exact], claimed, tolerance=tolerance)
    assert [m.where for m, _ in ranked] == ([first, "exact" if first == "close" else "close", "far"])
    np.testing.assert_allclose([f for _, f in ranked][:2], sorted([1e-10, 0.0], reverse=first == "close"),
                               rtol=1e-6, atol=1e-300)


@pytest.mark.parametrize("claimed, grads, want", [
    ([np.array([1.0, 0.0])], [np.array([2.0, 0.0])], 0.5),
    ([np.zeros(3)], [np.zeros(3)], 0.0),
    ([np.ones(2), np.array([3.0, 4.0])], [np.ones(2), np.array([3.0, 4.0]) * -1], 2.0),  # a sign flip misses by 2
    ([np.array([np.nan])], [np.array([1.0])], np.inf),
])
def test_misfit_values(claimed, grads, want):
    assert misfit(claimed, grads) == want


@pytest.mark.parametrize("call, match", [
    (lambda m, c: rank_mutants(m, c[:-1], tolerance=1e-8), r"claimed: expected 4 arrays shaped .*got 3 shaped"),
    (lambda m, c: rank_mutants(m, (c[0].T,) + c[1:], tolerance=1e-8),
     r"claimed: expected 4 arrays shaped \[\(4, 5\), \(5,\), \(5, 3\), \(3,\)\], got 4 shaped \[\(5, 4\)"),
    (lambda m, c: rank_mutants(m, c, tolerance=-1.0), r"tolerance: expected a finite number >= 0"),
])
def test_rank_errors(call, match):
    *_, mutants = _built("logistic-mse")
    with pytest.raises(InputError, match=match):
        call(mutants, _claimed("logistic-mse", None, None))


@pytest.mark.parametrize("fun, leaves, kwargs, match", [
    (lambda p: jnp.sum(p["w"]), [], {}, r"leaves: expected 1 arrays.*got 0"),
    (lambda p: p["w"] * 2.0, None, {}, r"loss: expected one float scalar, got outputs float64\[3\]"),
    (lambda p: jnp.sum(p["w"]), None, {"max_mutants": -1}, r"max_mutants: expected a non-negative"),
])
def test_build_errors(fun, leaves, kwargs, match):
    structure, own = flatten({"w": np.arange(3.0)})
    with jax.enable_x64(True), pytest.raises(InputError, match=match):
        build_mutants(fun, own if leaves is None else leaves, structure, **kwargs)


def _leaky_where(z):
    return jnp.where(z > 0, z, 0.01 * z)  # leaky ReLU, slope 0.01 below 0 (common practice)


def _leaky_max(z):
    return jnp.maximum(z, 0.01 * z)


@pytest.mark.parametrize("leaky", [_leaky_where, _leaky_max], ids=["where", "maximum"])
def test_both_traced_spellings_of_leaky_relu_are_transfer_sites_of_their_layer(leaky):
    rng = np.random.default_rng(31)
    params = {"h": {"W": rng.normal(size=(4, 3))}, "o": {"W": rng.normal(size=(3, 2))}}

    def fun(p):
        return 0.5 * jnp.sum((leaky(X @ p["h"]["W"]) @ p["o"]["W"]) ** 2)
    structure, leaves = flatten(params)
    with jax.enable_x64(True):
        mutants = build_mutants(fun, leaves, structure)
    sites = {(m.kind, m.layer) for m in mutants if m.where.startswith("leaky ReLU")}
    assert ("missing-transfer-derivative", "h") in sites
    assert not any(m.where.startswith("ReLU") for m in mutants)
