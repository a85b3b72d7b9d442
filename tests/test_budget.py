"""Tests for gradcheck._scale.budgeted: directional checks, group testing and the evaluation budget.

Outside references: the bound on the chance that a random direction misses an
error is checked against the exact law of one coordinate of a uniform point on
the sphere, ``u_1^2 ~ Beta(1/2, (m - 1)/2)`` (a standard fact, quoted from
memory), evaluated by SciPy's beta distribution; autodiff in the traced route is
JAX's. Networks, planted mistakes and positions are invented for these tests.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import gradcheck
import gradcheck._scale.budgeted as budget_module
from gradcheck._check.budget import DEFAULT_BUDGET
from gradcheck._scale.directional import MAX_DIRECTIONS, detectable_norm, miss_probability
from gradcheck._core.errors import InputError


def linear_loss(p, x, y):
    r = x @ p["W"] - y
    return 0.5 * float(np.sum(r * r)) / x.shape[0]


def linear_grads(p, x, y):
    return {"W": x.T @ (x @ p["W"] - y) / x.shape[0]}


def mlp_loss(p, x, y, xp=np):
    h = xp.tanh(x @ p["l1"]["W"] + p["l1"]["b"])
    return 0.5 * xp.sum((h @ p["l2"]["W"] + p["l2"]["b"] - y) ** 2) / x.shape[0]


def mlp_loss_numpy(p, x, y):
    return mlp_loss(p, x, y)


def mlp_grads(p, x, y):
    h = np.tanh(x @ p["l1"]["W"] + p["l1"]["b"])
    d = (h @ p["l2"]["W"] + p["l2"]["b"] - y) / x.shape[0]
    dh = d @ p["l2"]["W"].T * (1 - h ** 2)
    return {"l1": {"W": x.T @ dh, "b": dh.sum(0)}, "l2": {"W": h.T @ d, "b": d.sum(0)}}


def make_linear(n, batch=4, seed=0):
    rng = np.random.default_rng(seed)
    return ({"W": rng.standard_normal((n, n)) / math.sqrt(n)}, rng.standard_normal((batch, n)),
            rng.standard_normal((batch, n)))


def make_mlp(n_in=400, n_h=300, n_out=5, batch=8, seed=1):
    rng = np.random.default_rng(seed)
    p = {"l1": {"W": rng.standard_normal((n_in, n_h)) / math.sqrt(n_in), "b": 0.1 * rng.standard_normal(n_h)},
         "l2": {"W": rng.standard_normal((n_h, n_out)) / math.sqrt(n_h), "b": np.zeros(n_out)}}
    return p, rng.standard_normal((batch, n_in)), rng.standard_normal((batch, n_out))


def planted(g, path, index, factor):
    g = {k: ({kk: vv.copy() for kk, vv in v.items()} if isinstance(v, dict) else v.copy()) for k, v in g.items()}
    node = g
    for key in path[:-1]:
        node = node[key]
    node[path[-1]][index] *= factor
    return g


MISS_CASES = [(3, 0.01), (3, 0.4), (10, 0.05), (1000, 1e-3), (1000, 0.02), (10 ** 6, 1e-5)]


@pytest.mark.parametrize("m, a", MISS_CASES)
def test_miss_bound_holds_against_the_exact_law(m, a):
    from scipy.stats import beta

    exact = beta.cdf(a * a, 0.5, (m - 1) / 2)  # P(|u_1| <= a), u uniform on the sphere in R^m
    bound = miss_probability([a / 2], m, 1.0)  # one test of threshold tau = a/2 against an error of norm 1
    assert exact <= bound <= 1.0
    if m >= 1000 and a * math.sqrt(m) <= 0.05:
        np.testing.assert_allclose(bound, exact, rtol=0.01)  # tight where the density near 0 is nearly flat


@pytest.mark.parametrize("taus, m", [([1e-3] * 4, 100), ([1e-6, 3e-6, 2e-6], 10 ** 6), ([0.2], 5)])
def test_detectable_norm_inverts_the_miss_bound(taus, m):
    e = detectable_norm(taus, m)
    np.testing.assert_allclose(miss_probability(taus, m, e), 0.01, rtol=1e-6)
    assert miss_probability(taus, m, 1.01 * e) < 0.01 < miss_probability(taus, m, 0.99 * e)


def test_one_entry_off_by_one_percent_is_located_among_a_million():
    p, x, y = make_linear(1000)
    g = planted(linear_grads(p, x, y), ("W",), (123, 456), 1.01)
    report = gradcheck.examine(linear_loss, p, x, y, grads=g, budget=200)
    t = report.tensor("W")
    assert not report.ok and t.worst_index == (123, 456)
    assert t.checked == t.size == 10 ** 6
    assert report.evaluations <= 200
    assert any("group testing located the wrong entry (123, 456)" in n for n in report.notes)


LOCATE_CASES = [((0, 0), 1.01), ((99, 99), 0.99), ((37, 80), -1.0), ((50, 1), 1.001)]


@pytest.mark.parametrize("index, factor", LOCATE_CASES)
def test_group_testing_finds_the_planted_entry(index, factor):
    p, x, y = make_linear(100, seed=2)
    g = planted(linear_grads(p, x, y), ("W",), index, factor)
    report = gradcheck.examine(linear_loss, p, x, y, grads=g, budget=120)
    assert report.tensor("W").worst_index == index
    assert report.evaluations <= 120
    np.testing.assert_allclose(report.tensor("W").error, abs(1 - factor) / max(1, abs(factor)), rtol=0.05)


def test_two_wrong_entries_are_both_located():
    p, x, y = make_linear(100, seed=3)
    g = planted(planted(linear_grads(p, x, y), ("W",), (10, 20), 1.05), ("W",), (70, 3), 0.9)
    report = gradcheck.examine(linear_loss, p, x, y, grads=g, budget=300)
    assert any("wrong entries (10, 20), (70, 3)" in n for n in report.notes)


@pytest.mark.parametrize("seed", range(4))
def test_a_correct_large_network_passes_without_false_alarms(seed):
    p, x, y = make_mlp(seed=seed)  # 121,805 parameters: above FULL_CHECK_LIMIT, so the default budget applies
    report = gradcheck.examine(mlp_loss_numpy, p, x, y, grads=mlp_grads(p, x, y), seed=seed)
    assert report.ok, str(report)
    assert report.evaluations <= DEFAULT_BUDGET
    assert all(t.checked == t.size for t in report.tensors)
    assert report.references.primary == "directional"
    assert "ran on a budget of 1,000 loss evaluations" in report.notes[0]


def make_saturated(seed):
    """tanh units driven hard (weights x10, inputs x30): the loss curves sharply, so truncation error is large."""
    rng = np.random.default_rng(seed)
    p = {"l1": {"W": 10 * rng.standard_normal((40, 20)) / math.sqrt(40), "b": np.zeros(20)},
         "l2": {"W": 10 * rng.standard_normal((20, 5)) / math.sqrt(20), "b": np.zeros(5)}}
    return p, 30 * rng.standard_normal((10, 40)), rng.standard_normal((10, 5))


@pytest.mark.parametrize("seed", [1, 3, 4, 5])
def test_truncation_error_is_not_taken_for_a_mistake(seed, monkeypatch):
    p, x, y = make_saturated(seed)
    g = mlp_grads(p, x, y)
    assert gradcheck.examine(mlp_loss_numpy, p, x, y, grads=g, budget=80, seed=seed).ok
    # Without the half-step confirmation the same tests fail: the check above is not vacuous.
    monkeypatch.setattr(budget_module, "_confirm_suspects", lambda *args: None)
    assert not gradcheck.examine(mlp_loss_numpy, p, x, y, grads=g, budget=80, seed=seed).ok


@pytest.mark.parametrize("seed", [1, 3])
def test_a_real_mistake_survives_the_half_step_confirmation(seed):
    p, x, y = make_saturated(seed)
    g = planted(mlp_grads(p, x, y), ("l2", "W"), (4, 2), 1.01)
    report = gradcheck.examine(mlp_loss_numpy, p, x, y, grads=g, budget=80, seed=seed)
    assert report.tensor("l2.W").worst_index == (4, 2)


def test_a_pass_states_its_meaning_with_a_probability():
    p, x, y = make_mlp()
    report = gradcheck.examine(mlp_loss_numpy, p, x, y, grads=mlp_grads(p, x, y))
    text = str(report)
    assert f"along {MAX_DIRECTIONS} random unit direction(s) per tensor" in text
    assert "would have been seen with probability at least 99%" in text
    assert "off by 1% of the tensor's RMS gradient entry would be missed with probability at most" in text


def test_traced_route_compares_every_entry_with_autodiff():
    p, x, y = make_mlp()
    g = planted(mlp_grads(p, x, y), ("l1", "b"), (17,), 1.01)
    report = gradcheck.examine(mlp_loss, p, x, y, grads=g, budget=100)
    assert report.references.primary == "autodiff"
    assert report.tensor("l1.b").worst_index == (17,)
    np.testing.assert_allclose(report.tensor("l1.b").error, 0.01 / 1.01, rtol=1e-6)
    assert report.references.agreement["directional"] < 1e-6
    assert report.evaluations <= 100


def drifting_loss(p, x, y, xp=np):
    """The JAX version of this loss is 1% larger than the numpy one: autodiff is then not its gradient."""
    factor = 1.0 if xp is np else 1.01
    return factor * mlp_loss(p, x, y, xp=xp)


def test_autodiff_of_a_different_function_is_caught_by_the_directional_tests():
    p, x, y = make_mlp()
    report = gradcheck.examine(drifting_loss, p, x, y, grads=mlp_grads(p, x, y))
    assert report.ok, str(report)
    assert sum("autodiff disagrees with central differences" in n for n in report.notes) == 4


def test_a_scaled_tensor_is_diagnosed_from_the_located_entries():
    p, x, y = make_mlp()
    g = mlp_grads(p, x, y)
    g["l2"]["W"] = 2 * g["l2"]["W"]
    report = gradcheck.examine(mlp_loss_numpy, p, x, y, grads=g)
    assert report.findings[0].kind == "scaled" and report.findings[0].where == "l2.W"
    np.testing.assert_allclose(report.findings[0].factor, 2.0, rtol=1e-6)


def test_nan_in_a_claimed_tensor_costs_no_evaluations():
    p, x, y = make_mlp()
    g = mlp_grads(p, x, y)
    g["l1"]["W"][3, 4] = np.nan
    report = gradcheck.examine(mlp_loss_numpy, p, x, y, grads=g, budget=50)
    assert report.tensor("l1.W").worst_index == (3, 4)
    assert report.findings[0].kind == "non-finite"


@pytest.mark.parametrize("budget", [14, 20, 40, 60])
def test_the_budget_is_never_exceeded(budget):
    p, x, y = make_linear(100, seed=4)
    g = planted(linear_grads(p, x, y), ("W",), (5, 5), 1.01)
    report = gradcheck.examine(linear_loss, p, x, y, grads=g, budget=budget)
    assert report.evaluations <= budget
    assert not report.ok
    if budget < 40:  # too few to bisect 10,000 entries: the report says how far it got
        assert any("the budget ran out while bisecting" in n for n in report.notes)


def test_a_budget_covering_the_full_check_gets_it():
    p, x, y = make_linear(10, seed=5)
    report = gradcheck.examine(linear_loss, p, x, y, grads=linear_grads(p, x, y), budget=1000)
    assert report.ok and report.references.primary == "central"
    assert "covers the entry-by-entry check" in report.notes[0]


BAD_BUDGETS = [(0, "expected a positive whole number of loss evaluations, got int 0"),
               (2.5, "expected a positive whole number of loss evaluations, got float 2.5"),
               (True, "expected a positive whole number of loss evaluations, got bool True")]


@pytest.mark.parametrize("budget, message", BAD_BUDGETS)
def test_bad_budgets_are_input_errors(budget, message):
    p, x, y = make_linear(10)
    with pytest.raises(InputError, match="gradcheck.examine: budget: " + message):
        gradcheck.examine(linear_loss, p, x, y, grads=linear_grads(p, x, y), budget=budget)


def test_a_budget_too_small_for_one_test_per_tensor_says_how_much_is_needed():
    p, x, y = make_mlp(n_in=20, n_h=10)
    with pytest.raises(InputError, match=r"budget: expected at least 12 loss evaluations \(3 for the first look at "
                                         r"the loss, 1 for autodiff, 2 for one directional test of each tensor\), "
                                         r"got budget=6. Pass budget=12 or more"):
        gradcheck.examine(mlp_loss, p, x, y, grads=mlp_grads(p, x, y), budget=6)


def _relu_weighted(p, x):
    return float(np.sum(np.maximum(x @ p["W"], 0.0) * np.arange(1, 9)))


def _relu_on_a_kink():
    # our own case: unit 0 of sample 0 sits at z = 1e-7, so every directional step (about 7e-5) crosses
    # the ReLU's kink, while each entry on its own can be stepped (and kink-tested) one at a time
    rng = np.random.default_rng(0)
    x, W = rng.standard_normal((4, 8)), rng.standard_normal((8, 8))
    W[0, 0] -= (x[0] @ W[:, 0] - 1e-7) / x[0, 0]
    claimed = x.T @ (((x @ W) > 0) * np.arange(1, 9.0))
    return W, x, claimed


@pytest.mark.parametrize("factor, kind", [(1.0, "unreliable-reference"), (1.01, "unexplained"), (-1.0, "sign-flip")])
def test_a_kink_across_every_direction_is_not_blamed_but_mistakes_beyond_its_jump_are(factor, kind):
    # a failing directional test is set aside when the second differences at h, h/2, h/4 show a kink within
    # the step and the discrepancy is within the jump; 1% and a sign are beyond it (common practice: a
    # central difference across a kink is off by at most the jump in slope)
    W, x, claimed = _relu_on_a_kink()
    report = gradcheck.examine(_relu_weighted, {"W": W}, x, grads={"W": factor * claimed}, budget=120)
    assert report.references.primary == "directional"
    assert not report.ok and report.findings[0].kind == kind, str(report)
    assert (factor == 1.0) == any("has a kink along that direction" in n for n in report.notes)
    # entry by entry the same correct claims pass: the kink test there finds the few entries it concerns
    if factor == 1.0:
        assert gradcheck.examine(_relu_weighted, {"W": W}, x, grads={"W": claimed}).ok
