"""Numerical references against published values and SciPy."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import differentiate

import gradcheck
from gradcheck._core.evaluator import Evaluator
from gradcheck._core.precision import EPS64, steps_for
from gradcheck._core.tree import flatten
from gradcheck._references.finite_difference import central, complex_step, complex_usable, richardson


def squire_trapp(p, xp=np):
    x = p["x"]
    return xp.exp(x) / xp.sqrt(xp.sin(x) ** 3 + xp.cos(x) ** 3)


# Squire & Trapp (1998), "Using complex variables to estimate derivatives of real functions",
# SIAM Review 40(1): the test function above at x = 1.5 has derivative 4.05342789389862.
SQUIRE_TRAPP_DERIVATIVE = 4.05342789389862


@pytest.mark.parametrize("method, rtol", [("complex", 1e-14), ("richardson", 1e-11), ("central", 1e-9)])
def test_squire_trapp_published_derivative(method, rtol):
    g = gradcheck.reference(squire_trapp, {"x": 1.5}, method=method)
    np.testing.assert_allclose(g["x"], SQUIRE_TRAPP_DERIVATIVE, rtol=rtol, atol=0)


def test_logistic_derivative_is_a_quarter_at_zero_and_s_one_minus_s():
    # Common practice: the logistic function's derivative is s(1 - s), 0.25 at 0.
    def logistic(p):
        return float(np.sum(1.0 / (1.0 + np.exp(-p["z"]))))

    z = np.array([0.0, -2.0, 0.7, 3.0])
    g = gradcheck.reference(logistic, {"z": z}, method="richardson")["z"]
    s = 1.0 / (1.0 + np.exp(-z))
    np.testing.assert_allclose(g[0], 0.25, rtol=1e-10)
    np.testing.assert_allclose(g, s * (1 - s), rtol=1e-9)


SMOOTH = [
    # (name, loss of a vector w, point)
    ("quartic", lambda w: np.sum(w ** 4 - 3 * w, axis=0), np.array([0.3, -1.2, 2.0])),
    ("log-sum-exp", lambda w: np.log(np.sum(np.exp(w), axis=0)), np.array([0.1, 0.5, -0.4, 1.0])),
    ("coupled", lambda w: np.sin(w[0] * w[1]) + w[2] ** 2 * np.cos(w[0]), np.array([0.7, -0.3, 1.1])),
]


@pytest.mark.parametrize("name, f, w", SMOOTH, ids=[c[0] for c in SMOOTH])
@pytest.mark.parametrize("method, rtol", [("central", 1e-7), ("richardson", 1e-9), ("complex", 1e-9)])
def test_agrees_with_scipy_differentiate(name, f, w, method, rtol):
    # scipy.differentiate.jacobian (SciPy >= 1.15) is an independent numerical reference;
    # it evaluates f on arrays of shape (n, k), so the loss is summed along axis 0 there.
    expected = differentiate.jacobian(lambda v: f(v), w).df
    got = gradcheck.reference(lambda p: f(p["w"]), {"w": w}, method=method)["w"]
    np.testing.assert_allclose(got, expected, rtol=rtol, atol=1e-12)


def test_step_follows_cube_root_of_epsilon():
    # Nocedal & Wright, Numerical Optimization, 2nd ed., section 8.1: h ~ eps^(1/3) for central differences.
    x = np.array([0.0, 0.5, -300.0])
    typical = np.sqrt((0.5 ** 2 + 300.0 ** 2) / 2)  # the tensor's typical size stands in for entries below it
    h = steps_for(x, order=2, eps=EPS64)
    np.testing.assert_allclose(h, EPS64 ** (1 / 3) * np.array([typical, typical, 300.0]))
    np.testing.assert_allclose(steps_for(np.zeros(2), 2, EPS64), EPS64 ** (1 / 3))


def test_evaluator_restores_exactly_and_counts():
    s, leaves = flatten({"w": np.array([0.1, 0.2, 0.3])})
    ev = Evaluator(lambda p: float(np.sum(np.sin(p["w"]))), s, leaves, ())
    f0 = ev()
    central(ev, f0)
    richardson(ev, f0)
    assert ev.count == 1 + 6 + 12
    np.testing.assert_array_equal(ev.work[0], leaves[0])


def test_complex_step_is_detected_by_trying():
    s, leaves = flatten({"w": np.array([0.5, 1.5])})
    analytic = Evaluator(lambda p: np.sum(np.exp(p["w"])), s, leaves, (), dtype=np.complex128)
    real_only = Evaluator(lambda p: float(np.sum(np.exp(p["w"].real))), s, leaves, (), dtype=np.complex128)
    f0 = float(np.sum(np.exp(leaves[0])))
    assert complex_usable(analytic, f0) is None
    assert "real value" in complex_usable(real_only, f0)
    est = complex_step(analytic, f0)
    np.testing.assert_allclose(est.values[0], np.exp(leaves[0]), rtol=1e-15)


class Boom(RuntimeError):
    pass


@pytest.mark.parametrize("method", ["central", "richardson", "complex"])
def test_callers_params_bit_identical_when_loss_raises_half_way(method):
    w = np.array([0.25, -1.5, 3.0, 1e-30, 1e30])
    before = w.copy()
    calls = {"n": 0}

    def loss(p):
        calls["n"] += 1
        if calls["n"] == 7:
            raise Boom("raised on the 7th call")
        return np.sum(p["w"] ** 2)

    with pytest.raises(Boom):
        gradcheck.reference(loss, {"w": w}, method=method)
    assert w.tobytes() == before.tobytes()
