"""Diagnosis: each finding kind from its planted mistake, and no finding on correct networks.

The networks and their mistakes are our own (tests/nets.py); which kind a mistake
must produce is the definition of the kind, not an outside value.
"""

from __future__ import annotations

import numpy as np
import pytest

import gradcheck
from nets import Net

RNG_SEED = 11

# (hidden transfer, loss, reduction, sizes, bug, bug layer, with deltas, expected kind, expected layer)
PLANTED = [
    ("tanh", "half_sse", "sum", (3, 5, 2), "sign-flip", None, False, "sign-flip", "output"),
    ("tanh", "half_sse", "mean", (3, 5, 2), "sum-not-mean", None, False, "scaled", "output"),
    ("logistic", "half_sse", "sum", (3, 5, 2), "half", None, False, "scaled", "output"),
    ("tanh", "half_sse", "sum", (4, 4, 4, 2), "transposed", "hidden2", False, "transposed", "hidden2"),
    ("tanh", "half_sse", "sum", (3, 5, 2), "zero", "hidden1", False, "zero", "hidden1"),
    ("tanh", "half_sse", "sum", (4, 4, 4), "swapped", None, False, "swapped", "output"),  # nearest the loss
    ("relu", "half_sse", "sum", (3, 6, 2), "weight-decay", "hidden1", False, "weight-decay-mismatch", "hidden1"),
    ("tanh", "half_sse", "sum", (3, 5, 2), "bias-sum-all", "hidden1", False, "bias-sum-over-all-axes", "hidden1"),
    ("logistic", "half_sse", "sum", (3, 5, 4, 2), "missing-transfer-derivative", "hidden2", True,
     "missing-transfer-derivative", "hidden2"),
    ("tanh", "half_sse", "sum", (3, 5, 4, 2), "missing-transfer-derivative", "hidden1", True,
     "missing-transfer-derivative", "hidden1"),
    ("logistic", "half_sse", "sum", (3, 5, 2), "transfer-derivative-misplaced", "hidden1", True,
     "transfer-derivative-misplaced", "hidden1"),
    ("tanh", "half_sse", "sum", (3, 5, 2), "wrong-transfer", "hidden1", True, "transfer-derivative-misplaced",
     "hidden1"),
    ("tanh", "half_sse", "sum", (3, 5, 4, 2), "double-transfer-derivative", "hidden1", True,
     "extra-transfer-derivative", "hidden1"),
    # tier 3 (mutants of the traced forward), without deltas
    ("tanh", "half_sse", "mean", (3, 5, 4, 2), "double-transfer-derivative", "hidden2", False,
     "extra-transfer-derivative", "hidden2"),
    ("tanh", "half_sse", "mean", (3, 5, 4, 2), "missing-transfer-derivative", "hidden2", False,
     "missing-transfer-derivative", "hidden2"),
    ("tanh", "softmax_ce", "mean", (3, 5, 4, 3), "transfer-derivative-misplaced", "hidden1", False,
     "transfer-derivative-misplaced", "hidden1"),
    ("tanh", "softmax_ce", "mean", (3, 5, 3), "partial-softmax-jacobian", None, False, "partial-softmax-jacobian",
     "output"),
]


@pytest.mark.parametrize("hidden, loss, reduction, sizes, bug, bug_layer, with_deltas, kind, layer", PLANTED,
                         ids=[f"{c[4]}-{c[0]}" for c in PLANTED])
def test_planted_mistake_gives_its_kind_and_layer(hidden, loss, reduction, sizes, bug, bug_layer, with_deltas,
                                                  kind, layer):
    net = Net(sizes, hidden=hidden, loss_kind=loss, reduction=reduction)
    params, x, y = net.init(np.random.default_rng(RNG_SEED), batch=6)
    grads, deltas = net.backward(params, x, y, bug=bug, bug_layer=bug_layer)
    report = gradcheck.examine(net.loss, params, x, y, grads=grads, deltas=deltas if with_deltas else None)
    assert not report.ok
    first = report.findings[0]
    assert (first.kind, first.layer) == (kind, layer), str(report)
    assert report.worst_layer == layer
    # nothing else: every other finding is the same kind elsewhere, or a consequence with no kind of its own
    assert {f.kind for f in report.findings} <= {kind, "unexplained"}, str(report)


@pytest.mark.parametrize("bug, batch, factor, cause", [
    ("sum-not-mean", 6, 6.0, "the batch size 6"),
    ("half", 6, 2.0, "one-half convention"),
])
def test_scaled_reports_factor_and_cause(bug, batch, factor, cause):
    net = Net((3, 4, 2), hidden="tanh", reduction="mean")
    params, x, y = net.init(np.random.default_rng(5), batch=batch)
    report = gradcheck.examine(net.loss, params, x, y, grads=net.grads(bug=bug))
    first = report.findings[0]
    assert first.kind == "scaled"
    np.testing.assert_allclose(first.factor, factor, rtol=1e-9)
    assert cause in first.detail


def test_accumulating_backward_is_found():
    net = Net((3, 4, 2))
    params, x, y = net.init(np.random.default_rng(2))
    buffers = {}

    def leaky_backward(p, x, y):
        fresh = net.backward(p, x, y)[0]
        for name, layer in fresh.items():
            for key, value in layer.items():
                buffers[(name, key)] = buffers.get((name, key), 0.0) + value  # never reset
        return {name: {key: buffers[(name, key)] for key in layer} for name, layer in fresh.items()}

    report = gradcheck.examine(net.loss, params, x, y, grads=leaky_backward)
    assert report.findings[0].kind == "accumulating" and report.findings[0].factor == 2.0


def test_nondeterministic_loss_is_found():
    net = Net((3, 4, 2))
    params, x, y = net.init(np.random.default_rng(2))
    rng = np.random.default_rng()

    def dropout_loss(p, x, y):
        keep = rng.random(x.shape) > 0.2
        return net.loss(p, x * keep, y)

    report = gradcheck.examine(dropout_loss, params, x, y, grads=net.grads())
    assert not report.ok and report.findings[0].kind == "nondeterministic-loss"
    assert "seed" in report.findings[0].detail


@pytest.mark.parametrize("rate, kind", [(0.1, None), (-0.1, "ascent-step")])
def test_update_step_rate_and_ascent(rate, kind):
    net = Net((3, 4, 2))
    params, x, y = net.init(np.random.default_rng(4))

    def update(p, g):
        return {n: {k: p[n][k] - rate * g[n][k] for k in p[n]} for n in p}

    report = gradcheck.examine(net.loss, params, x, y, grads=net.grads(), step=update)
    np.testing.assert_allclose(list(report.rates.values()), rate, rtol=1e-9)
    assert report.ok is (kind is None)
    if kind:
        assert report.findings[0].kind == kind


@pytest.mark.parametrize("hidden", ["logistic", "tanh", "relu"])
@pytest.mark.parametrize("loss", ["half_sse", "softmax_ce", "logistic_ce"])
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_correct_networks_have_no_finding(hidden, loss, dtype):
    net = Net((4, 6, 3), hidden=hidden, loss_kind=loss, reduction="mean")
    params, x, y = net.init(np.random.default_rng(8), batch=5, dtype=dtype)
    grads, deltas = net.backward(params, x, y)
    report = gradcheck.examine(net.loss, params, x, y, grads=grads, deltas=deltas)
    assert report.ok and report.findings == (), str(report)


def test_deltas_need_a_probe_keyword_and_known_names():
    net = Net((3, 4, 2))
    params, x, y = net.init(np.random.default_rng(1))
    with pytest.raises(gradcheck.InputError, match=r"deltas: expected a loss that takes a keyword `probe`"):
        gradcheck.examine(lambda p, x, y: net.loss(p, x, y), params, x, y, grads=net.grads(), deltas={"a": 1})
    with pytest.raises(gradcheck.InputError, match=r"deltas hidden9\.z: expected names of probes the loss produced"):
        gradcheck.examine(net.loss, params, x, y, grads=net.grads(), deltas={"hidden9.z": np.zeros(2)})


def test_unreliable_reference_when_every_entry_sits_on_a_kink():
    # ReLU at exactly 0: any slope in [0, 1] is a valid answer, so a one-sided claim of 0 cannot be judged
    def loss(p, xp=np):
        return xp.sum(xp.maximum(p["w"], 0.0))

    report = gradcheck.examine(loss, {"w": np.zeros(3)}, grads={"w": np.zeros(3)})
    assert not report.ok
    assert [f.kind for f in report.findings] == ["unreliable-reference"]
    assert "not blamed" in report.findings[0].detail


def test_a_finding_that_blames_nobody_never_heads_the_report():
    # an unreliable reference nearer the loss (a kink in hidden2) must not hide a mistake further back
    from gradcheck import Finding
    from gradcheck._diagnose.ranking import merge_findings

    kink = Finding("unreliable-reference", "hidden2", "hidden2.W", "not judged")
    wrong = Finding("unexplained", "hidden1", "hidden1.W", "differs")
    merged = merge_findings([(kink, 1.0, 3), (wrong, 1.65, 3)], ("hidden1", "hidden2", "output"))
    assert [f.kind for f in merged] == ["unexplained", "unreliable-reference"]
