"""Tests for gradcheck._references.registry: one record per reference method, read by everything else."""

from __future__ import annotations

import numpy as np
import pytest

import gradcheck
from gradcheck._core.evaluator import Evaluator
from gradcheck._core.tree import flatten
from gradcheck._references import choose
from gradcheck._references.finite_difference import central, complex_step, richardson
from gradcheck._references.registry import REGISTRY, accuracy, evaluations_per_entry

W = np.array([0.3, -1.2, 2.5, 0.0, 4.0])


def sin_loss(p, xp=np):
    return xp.sum(xp.sin(p["w"]))


def test_registry_names_are_the_methods_checks_choose_from_most_accurate_first():
    assert tuple(m.name for m in REGISTRY) == choose.METHODS == ("autodiff", "complex", "richardson", "central")
    float64 = [m.accuracy["float64"] for m in REGISTRY]
    assert float64 == sorted(float64)


@pytest.mark.parametrize("method", [m.name for m in REGISTRY])
def test_reference_accepts_every_registered_name_and_documents_it(method):
    if method == "autodiff":
        pytest.importorskip("jax")
    g = gradcheck.reference(sin_loss, {"w": W}, method=method)
    # The loss of sin has gradient cos in closed form; each method must reach its own stated accuracy.
    # For central differences an accuracy of about eps^(2/3) ~ 1e-11 relative is expected at h ~ eps^(1/3)
    # (common practice; Nocedal & Wright 2006, section 8.1), so the stated 1e-6 holds with a wide margin.
    np.testing.assert_allclose(g["w"], np.cos(W), rtol=accuracy(method), atol=0)
    assert f"``{method}``" in gradcheck.reference.__doc__


def test_float32_accuracy_is_looser_and_complex_has_none_of_its_own():
    eps32 = float(np.finfo(np.float32).eps)
    assert accuracy("central", eps32) == 1e-2 and accuracy("richardson", eps32) == 1e-3
    assert accuracy("autodiff", eps32) == 1e-5 and "float32" not in dict(
        (m.name, m.accuracy) for m in REGISTRY)["complex"]


def test_an_unknown_method_is_an_input_error_naming_the_choices():
    with pytest.raises(gradcheck.InputError, match="method: expected one name among"):
        accuracy("forward")


@pytest.mark.parametrize("method, scheme, dtype", [("central", central, np.float64),
                                                   ("richardson", richardson, np.float64),
                                                   ("complex", complex_step, np.complex128)])
def test_evaluations_per_entry_is_what_the_evaluator_counts_for_one_entry(method, scheme, dtype):
    s, leaves = flatten({"w": W})
    ev = Evaluator(lambda p: np.sum(np.sin(p["w"])), s, leaves, (), dtype=dtype)
    one = [np.array([2])]
    est = scheme(ev, float(np.sum(np.sin(W))), one)
    assert ev.count == evaluations_per_entry(method)
    np.testing.assert_allclose(est.values[0][2], np.cos(W[2]), rtol=accuracy(method), atol=0)


def test_autodiff_spends_no_loss_evaluation_per_entry():
    assert evaluations_per_entry("autodiff") == 0
