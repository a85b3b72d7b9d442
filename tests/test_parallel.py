"""Tests for gradcheck._scale.runners (and the progress bar of gradcheck._scale.progress it drives).

Outside references: the schemes routed through runners are compared bit for bit
with gradcheck._references.finite_difference's own loops, and those with SciPy's
``scipy.differentiate.derivative`` on a closed-form loss; the executors under test
are the standard library's thread and process pools and a local Dask
distributed cluster. Networks and values are invented for these tests. The
losses are module-level functions so that worker processes can import them.
"""

from __future__ import annotations

import io
import multiprocessing
from concurrent.futures import ProcessPoolExecutor, ThreadPoolExecutor

import numpy as np
import pytest

import gradcheck
from gradcheck._check.inputs import make_plan
from gradcheck._core.errors import InputError
from gradcheck._references.finite_difference import (
    central,
    central_by,
    complex_by,
    complex_step,
    richardson,
    richardson_by,
)
from gradcheck._scale.perturbations import Entries, Move, raw_direction, unit_direction
from gradcheck._scale.progress import ProgressBar, open_bar
from gradcheck._scale.runners import SerialRunner, _split, entrywise_references, worker_count


def mlp_loss(p, x, y):
    h = np.tanh(x @ p["W1"] + p["b1"])
    return 0.5 * float(np.sum((h @ p["W2"] + p["b2"] - y) ** 2))


def mlp_grads(p, x, y):
    h = np.tanh(x @ p["W1"] + p["b1"])
    d = h @ p["W2"] + p["b2"] - y
    dh = d @ p["W2"].T * (1 - h ** 2)
    return {"W1": x.T @ dh, "b1": dh.sum(0), "W2": h.T @ d, "b2": d.sum(0)}


def cubic_loss(p):
    return np.sum(np.sin(p["w"]) * p["w"] ** 2) + p["s"] ** 3


def exploding_loss(p, x, y):
    """Raises once an evaluation moves W1[2, 3] up: the exception arrives from inside a worker."""
    if p["W1"][2, 3] > 0.5 + 1e-9:
        raise FloatingPointError("planted failure inside the loss")
    return mlp_loss(p, x, y)


def make_mlp(seed=0, n_in=4, n_h=6, n_out=2, batch=5):
    rng = np.random.default_rng(seed)
    p = {"W1": 0.6 * rng.standard_normal((n_in, n_h)), "b1": 0.1 * rng.standard_normal(n_h),
         "W2": 0.6 * rng.standard_normal((n_h, n_out)), "b2": np.zeros(n_out)}
    p["W1"][2, 3] = 0.5
    return p, rng.standard_normal((batch, n_in)), rng.standard_normal((batch, n_out))


@pytest.fixture(scope="module")
def process_pool():
    # spawn, not fork: other tests have started JAX's threads in this process, and forking a
    # multithreaded process is what JAX warns about (and can deadlock on).
    with ProcessPoolExecutor(2, mp_context=multiprocessing.get_context("spawn")) as pool:
        yield pool


@pytest.fixture(scope="module")
def dask_executor():
    distributed = pytest.importorskip("dask.distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        yield client.get_executor()


DIRECTION_RANGES = [(0, 1), (0, 4096), (4095, 4097), (5000, 5003), (100, 9000), (8191, 8192)]


@pytest.mark.parametrize("lo, hi", DIRECTION_RANGES)
def test_a_direction_range_is_the_same_numbers_as_part_of_the_whole(lo, hi):
    whole = raw_direction((3, 1, 4), 0, 9000)
    np.testing.assert_array_equal(raw_direction((3, 1, 4), lo, hi), whole[lo:hi])
    np.testing.assert_allclose(np.linalg.norm(unit_direction((3, 1, 4), lo, hi)), 1.0, rtol=1e-12)


def test_directions_with_different_keys_differ():
    assert not np.array_equal(raw_direction((0, 0, 0), 0, 50), raw_direction((0, 0, 1), 0, 50))


BLOCKS = [Entries(0, np.arange(10), np.zeros(10)), Move(1, (0,), 0, 3, 1.0), Entries(2, np.arange(7), np.ones(7))]


@pytest.mark.parametrize("parts", [1, 2, 3, 5, 18, 40])
def test_chunks_keep_every_evaluation_in_order(parts):
    chunks = _split(BLOCKS, parts)
    assert len(chunks) <= parts
    flat = []
    for chunk in chunks:
        for b in chunk:
            flat += [("move", b.k)] if isinstance(b, Move) else [(b.k, int(i)) for i in b.index]
    assert flat == [(0, i) for i in range(10)] + [("move", 1)] + [(2, i) for i in range(7)]


SCHEMES = [("central", central, central_by), ("richardson", richardson, richardson_by)]


@pytest.mark.parametrize("name, loop, routed", SCHEMES)
@pytest.mark.parametrize("seed", [0, 1])
def test_routed_schemes_equal_the_loops_bit_for_bit(name, loop, routed, seed):
    p, x, y = make_mlp(seed)
    plan = make_plan(mlp_loss, p, (x, y))
    a = loop(plan.evaluator(), plan.f0, eps=plan.loss_eps)
    b = routed(SerialRunner(plan), plan, plan.loss_eps)
    for va, vb, ta, tb in zip(a.values, b.values, a.atol, b.atol):
        np.testing.assert_array_equal(va, vb)
        np.testing.assert_array_equal(ta, tb)
    assert (a.method, a.rtol) == (b.method, b.rtol)


def test_routed_complex_step_equals_the_loop_bit_for_bit():
    p = {"w": np.array([0.3, -1.2, 2.0]), "s": 0.7}
    plan = make_plan(cubic_loss, p, ())
    a = complex_step(plan.evaluator(np.complex128), plan.f0)
    b = complex_by(SerialRunner(plan, np.complex128), plan)
    for va, vb in zip(a.values, b.values):
        np.testing.assert_array_equal(va, vb)


def test_routed_central_matches_scipy_derivative():
    from scipy.differentiate import derivative

    # Outside reference: SciPy's adaptive finite differences on the closed-form loss, entry by entry.
    p = {"w": np.array([0.3, -1.2, 2.0]), "s": 0.7}
    plan = make_plan(cubic_loss, p, ())
    est = central_by(SerialRunner(plan), plan)
    # The loss is a sum of one-variable terms, so each entry's derivative is that of its own term.
    np.testing.assert_allclose(est.values[0], derivative(lambda t: np.sin(t) * t ** 2, p["w"]).df, rtol=1e-8)
    np.testing.assert_allclose(est.values[1], derivative(lambda t: t ** 3, 0.7).df, rtol=1e-8)


def _executors(process_pool, dask_executor):
    return {"thread": ThreadPoolExecutor(3), "process": process_pool, "dask": dask_executor}


@pytest.mark.parametrize("kind", ["thread", "process", "dask"])
@pytest.mark.parametrize("budget", [None, 40])
def test_executors_give_identical_reports(kind, budget, process_pool, dask_executor):
    p, x, y = make_mlp(2)
    g = mlp_grads(p, x, y)
    g["W2"] = g["W2"].copy()
    g["W2"][1, 0] *= 1.01
    here = gradcheck.examine(mlp_loss, p, x, y, grads=g, methods=("central",), budget=budget)
    executor = _executors(process_pool, dask_executor)[kind]
    there = gradcheck.examine(mlp_loss, p, x, y, grads=g, methods=("central",), budget=budget, executor=executor)
    assert there.to_dict() == here.to_dict()
    assert not here.ok and here.tensor("W2").worst_index == (1, 0)


@pytest.mark.parametrize("kind", ["thread", "process", "dask"])
def test_executor_central_equals_the_loop(kind, process_pool, dask_executor):
    p, x, y = make_mlp(3)
    plan = make_plan(mlp_loss, p, (x, y))
    loop = central(plan.evaluator(), plan.f0, eps=plan.loss_eps)
    (routed,), spent = entrywise_references(plan, ["central"], plan.loss_eps,
                                            executor=_executors(process_pool, dask_executor)[kind])
    assert spent == 2 * plan.structure.size
    for a, b in zip(loop.values, routed.values):
        np.testing.assert_array_equal(a, b)


UNPICKLABLE = [("a lambda", lambda p, x, y: mlp_loss(p, x, y)), ("a local function", None)]


@pytest.mark.parametrize("what, loss", UNPICKLABLE)
def test_unpicklable_loss_is_an_input_error_with_the_fix(what, loss, process_pool):
    if loss is None:
        def loss(p, x, y):
            return mlp_loss(p, x, y)
    p, x, y = make_mlp()
    with pytest.raises(InputError, match=r"gradcheck.examine: executor: expected a loss \(and data\) that can be "
                                         r"pickled .*Define the loss with def at the top level"):
        gradcheck.examine(loss, p, x, y, grads=mlp_grads(p, x, y), methods=("central",), executor=process_pool)


def test_not_an_executor_is_an_input_error():
    p, x, y = make_mlp()
    with pytest.raises(InputError, match="executor: expected a concurrent.futures.Executor, got list"):
        gradcheck.examine(mlp_loss, p, x, y, grads=mlp_grads(p, x, y), methods=("central",), executor=[])


@pytest.mark.parametrize("budget", [None, 40])
def test_params_untouched_when_a_worker_raises(budget, process_pool):
    p, x, y = make_mlp()
    saved = {k: v.copy() for k, v in p.items()}
    with pytest.raises(FloatingPointError, match="planted failure inside the loss"):
        gradcheck.examine(exploding_loss, p, x, y, grads=mlp_grads(p, x, y), methods=("central",),
                          budget=budget, executor=process_pool)
    for k in p:
        np.testing.assert_array_equal(p[k], saved[k])
    assert gradcheck.examine(mlp_loss, p, x, y, grads=mlp_grads(p, x, y), methods=("central",),
                             executor=process_pool).ok  # the pool survived


def test_worker_count_reads_the_pools():
    with ThreadPoolExecutor(3) as pool:
        assert worker_count(pool) == 3


def test_dask_worker_count(dask_executor):
    assert worker_count(dask_executor) == 2


class FakeTerminal(io.StringIO):
    def isatty(self):
        return True


@pytest.mark.parametrize("progress, stream, drawn", [
    (True, FakeTerminal, True), (None, FakeTerminal, False), (False, FakeTerminal, False),
    (True, io.StringIO, False), (None, io.StringIO, False)])
def test_progress_bar_only_on_a_terminal(progress, stream, drawn):
    out = stream()
    bar = open_bar(progress, 50, "gradcheck: demo", stream=out)
    for _ in range(50):
        bar.advance(1)
    bar.close()
    text = out.getvalue()
    assert (text != "") is drawn  # progress=None waits DELAY seconds before drawing, longer than this loop
    if drawn:
        assert text.endswith("\n") and "50/50 evaluations 100%" in text and "gradcheck: demo [" in text


def test_progress_bar_counts_a_routed_check():
    p, x, y = make_mlp()
    plan = make_plan(mlp_loss, p, (x, y))
    out = FakeTerminal()
    bar = ProgressBar(2 * plan.structure.size, "gradcheck: central", enabled=True, stream=out)
    central(plan.evaluator(), plan.f0, progress=bar.advance)
    bar.close()
    assert bar.done == 2 * plan.structure.size
    assert f"{bar.done}/{bar.done} evaluations" in out.getvalue()


def test_examine_draws_nothing_when_stderr_is_not_a_terminal(capsys):
    p, x, y = make_mlp()
    gradcheck.examine(mlp_loss, p, x, y, grads=mlp_grads(p, x, y), progress=True)
    assert capsys.readouterr().err == ""
