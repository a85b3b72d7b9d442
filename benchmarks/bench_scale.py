"""Scale and speed figures for gradcheck, measured in one run on this machine.

Run from a clone:  python benchmarks/bench_scale.py

It prints, with the target beside each figure:

1. the overhead of an entry-by-entry check of a numpy MLP of about 10,000
   parameters against a bare Python loop that evaluates the same loss 2P times
   (the check uses methods=("central",), so both do 2P evaluations);
2. the speed-up of the vectorised JAX route (``_batched``) for the same central
   differences against that bare numpy loop, and against the unbatched JAX route
   (one compiled call per point);
3. the loss evaluations needed to locate one entry off by 1% in a 1,000 x 1,000
   weight matrix, and whether the located index is right;
4. the speed-up of a process pool of 2 workers against 1 on a loss that takes
   about 10 ms.

Times are the best of a few repeats (the least disturbed by other work on the
machine; the overhead figure interleaves its two timings). Networks and data are invented for the benchmark.
"""

from __future__ import annotations

import math
import multiprocessing
import os
import sys
import time
from concurrent.futures import ProcessPoolExecutor

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

import gradcheck  # noqa: E402
from gradcheck._check.inputs import make_plan  # noqa: E402
from gradcheck._core.precision import steps_for  # noqa: E402
from gradcheck._references.autodiff import trace  # noqa: E402
from gradcheck._references.finite_difference import central_by  # noqa: E402
from gradcheck._scale.batched import BatchedRunner  # noqa: E402

REPEATS = 3


def mlp_params(n_in=64, n_h=128, n_out=10, batch=8, seed=0):
    """A one-hidden-layer tanh MLP of 9,610 parameters and a batch of 8 examples."""
    rng = np.random.default_rng(seed)
    params = {"W1": rng.standard_normal((n_in, n_h)) / math.sqrt(n_in), "b1": 0.1 * rng.standard_normal(n_h),
              "W2": rng.standard_normal((n_h, n_out)) / math.sqrt(n_h), "b2": np.zeros(n_out)}
    return params, rng.standard_normal((batch, n_in)), rng.standard_normal((batch, n_out))


def mlp_loss(p, x, y):
    h = np.tanh(x @ p["W1"] + p["b1"])
    return 0.5 * np.sum((h @ p["W2"] + p["b2"] - y) ** 2) / x.shape[0]


def mlp_loss_xp(p, x, y, xp=np):
    h = xp.tanh(x @ p["W1"] + p["b1"])
    return 0.5 * xp.sum((h @ p["W2"] + p["b2"] - y) ** 2) / x.shape[0]


def mlp_grads(p, x, y):
    h = np.tanh(x @ p["W1"] + p["b1"])
    d = (h @ p["W2"] + p["b2"] - y) / x.shape[0]
    dh = d @ p["W2"].T * (1 - h ** 2)
    return {"W1": x.T @ dh, "b1": dh.sum(0), "W2": h.T @ d, "b2": d.sum(0)}


def linear_loss(p, x, y):
    r = x @ p["W"] - y
    return 0.5 * float(np.sum(r * r)) / x.shape[0]


def slow_loss(p, t):
    """About 10 ms per call: 20 parameters, each against 64,000 points (numpy ufuncs, one thread)."""
    w = p["w"]
    return float(sum(np.sum(np.sin(w[i] * t + i) ** 2) for i in range(w.size)))


def best(fn, repeats=REPEATS):
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return min(times)


def bare_loop(loss, params, *data):
    """2P evaluations, each entry moved up and down by the check's own step and put back."""
    work = {k: np.array(v, dtype=np.float64) for k, v in params.items()}
    for key, arr in work.items():
        flat = arr.reshape(-1)
        steps = steps_for(flat, 2, np.finfo(np.float64).eps)
        for i in range(flat.size):
            x = flat[i]
            flat[i] = x + steps[i]
            loss(work, *data)
            flat[i] = x - steps[i]
            loss(work, *data)
            flat[i] = x


def mlp_loss_float(p, x, y):
    return float(mlp_loss(p, x, y))


def overhead_figures():
    p, x, y = mlp_params()
    g = mlp_grads(p, x, y)
    size = sum(v.size for v in p.values())
    print(f"1. entry-by-entry check of a numpy MLP, {size:,} parameters (methods=('central',), so both do 2P "
          f"evaluations):")
    loops = []
    for loss, returns in ((mlp_loss, "a numpy float64 (np.sum)"), (mlp_loss_float, "a Python float")):
        report = gradcheck.examine(loss, p, x, y, grads=g, methods=("central",))
        assert report.ok
        loop, check = math.inf, math.inf
        for _ in range(7):  # interleaved, so that a slow spell of the machine hits both alike
            loop = min(loop, best(lambda: bare_loop(loss, p, x, y), repeats=1))
            check = min(check, best(lambda: gradcheck.examine(loss, p, x, y, grads=g, methods=("central",)), repeats=1))
        ratio = check / loop
        print(f"   loss returning {returns}: bare loop of {2 * size:,} evaluations {loop:.3f} s, "
              f"gradcheck.examine ({report.evaluations:,} evaluations) {check:.3f} s")
        print(f"   overhead ratio: {ratio:.3f}  (target at most 1.10: {'met' if ratio <= 1.10 else 'NOT met'})")
        loops.append(loop)
    print("   (both return types take _core.evaluator.to_scalar's fast path; a numpy float64 is a Python float)")
    return loops[0]


def batched_figures(numpy_loop):
    p, x, y = mlp_params()
    plan = make_plan(mlp_loss_xp, p, (x, y))
    traced = trace(plan.loss, plan.structure, plan.base, plan.data, plan.kwargs)

    def vectorised(batch=None):
        runner = BatchedRunner(traced, plan, batch=batch)  # compiles on first use: part of the route's cost
        central_by(runner, plan, plan.loss_eps)
        return runner

    runner = vectorised()
    batched = best(vectorised)
    compiled = BatchedRunner(traced, plan)
    central_by(compiled, plan, plan.loss_eps)
    warm = best(lambda: central_by(compiled, plan, plan.loss_eps))
    single = best(lambda: vectorised(1), repeats=1)
    print(f"2. central differences of the same network through JAX (loss with an xp keyword), "
          f"chunks of {runner.batch}:")
    print(f"   vectorised route: {batched:.3f} s with compiling, {warm:.3f} s compiled; unbatched JAX route "
          f"(one call per point): {single:.3f} s; bare numpy loop: {numpy_loop:.3f} s")
    for name, ratio in (("against the bare numpy loop", numpy_loop / batched),
                        ("against the unbatched JAX route", single / batched)):
        print(f"   speed-up {name}: {ratio:.2f}x  (target at least 10x: {'met' if ratio >= 10 else 'NOT met'})")
    print("   why: on this CPU, XLA's float64 forward pass costs as much per perturbed copy as numpy's (the MLP's")
    print("   matrix products dominate both); vectorising removes only Python's per-call cost, which numpy's")
    print("   evaluation of this network hardly has. The route pays where copies run in parallel (an accelerator).")


def locate_figures():
    rng = np.random.default_rng(7)
    n = 1000
    p = {"W": rng.standard_normal((n, n)) / math.sqrt(n)}
    x, y = rng.standard_normal((4, n)), rng.standard_normal((4, n))
    g = {"W": x.T @ (x @ p["W"] - y) / x.shape[0]}
    planted = (421, 87)
    g["W"][planted] *= 1.01
    start = time.perf_counter()
    report = gradcheck.examine(linear_loss, p, x, y, grads=g, budget=200)
    took = time.perf_counter() - start
    t = report.tensor("W")
    right = t.worst_index == planted
    print(f"3. one entry off by 1% in a {n:,} x {n:,} weight matrix (numpy loss, not traceable, budget=200):")
    print(f"   located {t.worst_index} (planted {planted}: {'right' if right else 'WRONG'}) in "
          f"{report.evaluations} loss evaluations, {took:.1f} s  (target at most 200: "
          f"{'met' if report.evaluations <= 200 and right else 'NOT met'})")


def pool_figures():
    p = {"w": np.linspace(0.5, 2.0, 20)}
    t = np.linspace(0.0, 10.0, 64_000)
    grads = {"w": np.array([np.sum(2 * np.sin(w * t + i) * np.cos(w * t + i) * t)
                            for i, w in enumerate(p["w"])])}
    per_call = best(lambda: slow_loss(p, t), repeats=5)
    context = multiprocessing.get_context("spawn")
    times = {}
    for workers in (1, 2):
        with ProcessPoolExecutor(workers, mp_context=context) as pool:
            list(pool.map(math.sqrt, range(workers * 4)))  # start the workers before timing
            report = gradcheck.examine(slow_loss, p, t, grads=grads, methods=("central",), executor=pool)
            assert report.ok, str(report)
            times[workers] = best(lambda: gradcheck.examine(slow_loss, p, t, grads=grads, methods=("central",),
                                                            executor=pool), repeats=2)
    print(f"4. process pool on a loss of {1e3 * per_call:.1f} ms per call ({report.evaluations} evaluations):")
    print(f"   1 worker: {times[1]:.2f} s; 2 workers: {times[2]:.2f} s; speed-up {times[1] / times[2]:.2f}x "
          f"(on {os.cpu_count()} cores; no target set)")


def main():
    print(f"gradcheck {gradcheck.__version__} scale benchmark, numpy {np.__version__}, {os.cpu_count()} cores")
    loop = overhead_figures()
    batched_figures(loop)
    locate_figures()
    pool_figures()


if __name__ == "__main__":
    main()
