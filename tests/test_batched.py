"""Tests for gradcheck._scale.batched: vectorised JAX evaluation of perturbed copies.

Outside reference: JAX's own reverse-mode gradient (``jax.grad`` in float64) of
the same traced loss; the vectorised central differences must agree with it to
their stated accuracy, and with the Python loop of gradcheck._references.finite_difference, whose
loss values differ from XLA's only by rounding. Networks are invented.
"""

from __future__ import annotations

import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import gradcheck
from gradcheck._check.inputs import make_plan
from gradcheck._references.autodiff import trace
from gradcheck._references.finite_difference import central, central_by, richardson, richardson_by
from gradcheck._scale.batched import BATCH_BYTES, MAX_BATCH, BatchedRunner
from gradcheck._scale.perturbations import Entries
from gradcheck._scale.runners import entrywise_references


def mlp_loss(p, x, y, xp=np):
    h = xp.tanh(x @ p["W1"] + p["b1"])
    return 0.5 * xp.sum((h @ p["W2"] + p["b2"] - y) ** 2) / x.shape[0]


def make(n_in=5, n_h=7, n_out=3, batch=4, seed=0, scalar_bias=False):
    rng = np.random.default_rng(seed)
    p = {"W1": 0.7 * rng.standard_normal((n_in, n_h)), "b1": 0.1 * rng.standard_normal(n_h),
         "W2": 0.7 * rng.standard_normal((n_h, n_out)), "b2": 0.2 if scalar_bias else np.zeros(n_out)}
    return p, rng.standard_normal((batch, n_in)), rng.standard_normal((batch, n_out))


def runner_for(p, x, y, loss=mlp_loss, **kw):
    plan = make_plan(loss, p, (x, y))
    traced = trace(plan.loss, plan.structure, plan.base, plan.data, plan.kwargs)
    return plan, BatchedRunner(traced, plan, **kw)


def assert_within_accuracy(est, other, factor=1.0):
    for v, w, a in zip(est.values, other.values, est.atol):
        np.testing.assert_array_less(np.abs(v - w), factor * a + 1e-6 * np.abs(w))


NETWORKS = [dict(), dict(seed=1, n_h=16), dict(seed=2, scalar_bias=True), dict(n_in=1, n_h=1, n_out=1, batch=2)]


@pytest.mark.parametrize("net", NETWORKS)
@pytest.mark.parametrize("batch", [1, 7, None])
def test_batched_central_agrees_with_the_loop(net, batch):
    p, x, y = make(**net)
    plan, runner = runner_for(p, x, y, batch=batch)
    loop = central(plan.evaluator(), plan.f0, eps=plan.loss_eps)
    assert_within_accuracy(loop, central_by(runner, plan, plan.loss_eps))


@pytest.mark.parametrize("net", NETWORKS[:2])
def test_batched_richardson_agrees_with_the_loop(net):
    p, x, y = make(**net)
    plan, runner = runner_for(p, x, y)
    loop = richardson(plan.evaluator(), plan.f0, eps=plan.loss_eps)
    assert_within_accuracy(loop, richardson_by(runner, plan, plan.loss_eps))


@pytest.mark.parametrize("net", NETWORKS)
def test_batched_central_agrees_with_jax_grad(net):
    p, x, y = make(**net)
    plan, runner = runner_for(p, x, y)
    est = central_by(runner, plan, plan.loss_eps)
    with jax.enable_x64(True):
        g = jax.grad(lambda q: mlp_loss(q, jnp.asarray(x), jnp.asarray(y), xp=jnp))(
            {k: jnp.asarray(v) for k, v in p.items()})
    for path, v, a in zip(plan.structure.paths, est.values, est.atol):
        np.testing.assert_allclose(v, np.asarray(g[path]).reshape(v.shape), rtol=1e-6, atol=float(np.max(a)))


def test_batched_and_unbatched_routes_give_the_same_values():
    p, x, y = make(seed=3, n_h=12)
    plan, one = runner_for(p, x, y, batch=1)
    _, many = runner_for(p, x, y)
    a, b = central_by(one, plan, plan.loss_eps), central_by(many, plan, plan.loss_eps)
    for va, vb, at in zip(a.values, b.values, a.atol):
        np.testing.assert_allclose(va, vb, rtol=0, atol=1e-3 * float(np.max(at)))


@pytest.mark.parametrize("n, batch", [(1, 4), (9, 4), (12, 4), (5, 1)])
def test_padding_evaluations_are_counted(n, batch):
    p, x, y = make()
    plan, runner = runner_for(p, x, y, batch=batch)
    values = runner([Entries(0, np.arange(n) % plan.structure.tensors[0].size, np.full(n, 0.1))])
    assert values.shape == (n,)
    assert runner.count == math.ceil(n / batch) * batch


@pytest.mark.parametrize("sizes, expected", [((4, 4), MAX_BATCH), ((1000, 1000), BATCH_BYTES // (8 * 10 ** 6)),
                                             ((3000, 1000), 1)])
def test_chunks_bound_memory(sizes, expected):
    p = {"W": np.full(sizes, 0.5)}
    plan = make_plan(lambda q: jnp.sum(q["W"] ** 2), p, ())
    traced = trace(plan.loss, plan.structure, plan.base, plan.data, plan.kwargs)
    runner = BatchedRunner(traced, plan)
    assert runner.batch == expected
    assert runner.batch * 8 * p["W"].size <= max(BATCH_BYTES, 8 * p["W"].size)


def test_directional_moves_are_not_batched():
    from gradcheck._scale.perturbations import Move

    p, x, y = make()
    _, runner = runner_for(p, x, y)
    with pytest.raises(TypeError, match="entry perturbations only"):
        runner([Move(0, (0,), 0, 3, 1e-3)])


def drifting_loss(p, x, y, xp=np):
    """Its JAX version is another function: 1% larger than the numpy one."""
    return (1.0 if xp is np else 1.01) * mlp_loss(p, x, y, xp=xp)


@pytest.fixture
def vectorise_on_cpu(monkeypatch):
    import gradcheck._scale.runners

    monkeypatch.setattr(gradcheck._scale.runners, "BATCHED_ON_CPU", True)


@pytest.mark.skipif(jax.default_backend() != "cpu", reason="the default differs on an accelerator")
def test_on_the_cpu_the_loop_is_used_by_default():
    p, x, y = make(n_h=200)
    plan = make_plan(mlp_loss, p, (x, y))
    traced = trace(plan.loss, plan.structure, plan.base, plan.data, plan.kwargs)
    (est,), spent = entrywise_references(plan, ["central"], plan.loss_eps, traced=traced)
    loop = central(plan.evaluator(), plan.f0, eps=plan.loss_eps)
    for a, b in zip(est.values, loop.values):
        np.testing.assert_array_equal(a, b)
    assert spent == 2 * plan.structure.size


def test_a_traced_loss_that_computes_another_function_falls_back_to_the_loop(vectorise_on_cpu):
    p, x, y = make(n_h=200)  # 1,000+ entries, enough evaluations for the vectorised route
    plan = make_plan(drifting_loss, p, (x, y))
    traced = trace(plan.loss, plan.structure, plan.base, plan.data, plan.kwargs)
    assert not BatchedRunner(traced, plan).agrees_at_base()
    (est,), spent = entrywise_references(plan, ["central"], plan.loss_eps, traced=traced)
    loop = central(plan.evaluator(), plan.f0, eps=plan.loss_eps)
    for a, b in zip(est.values, loop.values):
        np.testing.assert_array_equal(a, b)
    assert spent == 2 * plan.structure.size + 1


def test_examine_takes_the_vectorised_route_for_a_traceable_loss(vectorise_on_cpu):
    p, x, y = make(n_h=200)
    plan = make_plan(mlp_loss, p, (x, y))
    traced = trace(plan.loss, plan.structure, plan.base, plan.data, plan.kwargs)
    (est,), spent = entrywise_references(plan, ["central"], plan.loss_eps, traced=traced)
    size = plan.structure.size
    batch = BatchedRunner(traced, plan).batch
    assert spent == 1 + math.ceil(2 * size / batch) * batch  # one check at the base point, padded chunks
    report = gradcheck.examine(mlp_loss, p, x, y, grads=gradcheck.reference(mlp_loss, p, x, y, method="autodiff"))
    assert report.ok and report.references.methods == ("autodiff", "central")
    assert report.evaluations == plan.evaluations + 1 + spent
