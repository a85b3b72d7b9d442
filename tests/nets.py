"""Hand-written test networks with a correct backward pass and planted mistakes.

Invented for gradcheck's own tests (a scenario of ours: small fully connected
nets of any depth). The forward is written against an array namespace ``xp`` so
it runs in numpy and in jax.numpy; the backward is plain numpy, written the way
people write it by hand, with an optional planted mistake (``bug``) in one
layer. Only planted-mistake tests and property tests use these nets; checks of
the main job against outside values live beside their sources in the tests.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

TRANSFERS = ("logistic", "tanh", "relu", "identity")
LOSSES = ("half_sse", "sse", "softmax_ce", "logistic_ce")


def logistic(z, xp=np):
    # the tanh form is exact algebra (s = (1 + tanh(z/2)) / 2) and never overflows
    return 0.5 * (1.0 + xp.tanh(0.5 * z))


def transfer(name, z, xp=np):
    if name == "logistic":
        return logistic(z, xp)
    if name == "tanh":
        return xp.tanh(z)
    if name == "relu":
        return xp.maximum(z, 0.0)
    return z


def transfer_derivative(name, z, a):
    """f'(z) written from the output a where that is the usual hand-written form."""
    if name == "logistic":
        return a * (1.0 - a)
    if name == "tanh":
        return 1.0 - a ** 2
    if name == "relu":
        return (z > 0).astype(float)
    return np.ones_like(z)


@dataclass(frozen=True)
class Net:
    """A fully connected net: ``sizes`` from input to output, one transfer for hidden layers."""

    sizes: tuple[int, ...]
    hidden: str = "tanh"
    loss_kind: str = "half_sse"
    reduction: str = "sum"
    bias: bool = True
    names: tuple[str, ...] = field(default=())

    @property
    def layer_names(self) -> tuple[str, ...]:
        n = len(self.sizes) - 1
        return self.names or tuple([f"hidden{i + 1}" for i in range(n - 1)] + ["output"])

    @property
    def output_transfer(self) -> str:
        return {"softmax_ce": "softmax", "logistic_ce": "logistic"}.get(self.loss_kind, "identity")

    def init(self, rng, batch=5, dtype=np.float64, scale=1.0):
        params = {}
        for name, (m, n) in zip(self.layer_names, zip(self.sizes[:-1], self.sizes[1:])):
            layer = {"W": (scale * rng.standard_normal((m, n)) / np.sqrt(m)).astype(dtype)}
            if self.bias:
                layer["b"] = (0.1 * rng.standard_normal(n)).astype(dtype)
            params[name] = layer
        x = rng.standard_normal((batch, self.sizes[0])).astype(dtype)
        k = self.sizes[-1]
        if self.loss_kind == "softmax_ce":
            y = np.eye(k, dtype=dtype)[rng.integers(0, k, size=batch)]
        elif self.loss_kind == "logistic_ce":
            y = rng.integers(0, 2, size=(batch, k)).astype(dtype)
        else:
            y = rng.standard_normal((batch, k)).astype(dtype)
        return params, x, y

    def loss(self, params, x, y, xp=np, probe=None):
        probe = probe or (lambda name, v: v)
        a = x
        names = self.layer_names
        for i, name in enumerate(names):
            z = a @ params[name]["W"]
            if self.bias:
                z = z + params[name]["b"]
            z = probe(f"{name}.z", z)
            if i < len(names) - 1:
                a = probe(f"{name}.a", transfer(self.hidden, z, xp))
        n = x.shape[0] if self.reduction == "mean" else 1
        if self.loss_kind == "softmax_ce":
            shifted = z - xp.max(z, axis=1, keepdims=True)
            logp = shifted - xp.log(xp.sum(xp.exp(shifted), axis=1, keepdims=True))
            total = -xp.sum(y * logp)
        elif self.loss_kind == "logistic_ce":
            # log s = -softplus(-z), log(1 - s) = -softplus(z), softplus(u) = log(1 + exp(u))
            total = xp.sum(y * xp.logaddexp(0.0, -z) + (1 - y) * xp.logaddexp(0.0, z))
        else:
            o = probe(f"{names[-1]}.a", z)
            half = 0.5 if self.loss_kind == "half_sse" else 1.0
            total = half * xp.sum((o - y) ** 2)
        return total / n

    def backward(self, params, x, y, bug=None, bug_layer=None, factor=0.1):
        """Hand-written backprop; returns (grads, deltas keyed by probe name)."""
        names = self.layer_names
        bug_layer = bug_layer or names[0]
        acts, zs = [x], []
        a = x
        for i, name in enumerate(names):
            z = a @ params[name]["W"] + (params[name]["b"] if self.bias else 0.0)
            zs.append(z)
            if i < len(names) - 1:
                a = transfer(self.hidden, z)
                acts.append(a)
        n = x.shape[0] if self.reduction == "mean" else 1
        if self.loss_kind == "softmax_ce":
            s = np.exp(z - z.max(axis=1, keepdims=True))
            s /= s.sum(axis=1, keepdims=True)
            if bug == "partial-softmax-jacobian":
                delta = (-y / s) * s * (1 - s)
            else:
                delta = s - y
            if bug == "extra-transfer-derivative":
                delta = delta * s * (1 - s)
        elif self.loss_kind == "logistic_ce":
            s = logistic(z)
            delta = s - y
            if bug == "extra-transfer-derivative":
                delta = delta * s * (1 - s)
        else:
            delta = (z - y) * (1.0 if self.loss_kind == "half_sse" else 2.0)
            if bug == "half":
                delta = delta * 2.0
        if bug == "sign-flip":
            delta = -delta
        if bug != "sum-not-mean":
            delta = delta / n
        grads, deltas = {}, {}
        for i in range(len(names) - 1, -1, -1):
            name = names[i]
            deltas[f"{name}.z"] = delta
            gW = acts[i].T @ delta
            if bug == "transposed" and name == bug_layer:
                gW = gW.T
            if bug == "weight-decay" and name == bug_layer:
                gW = gW + factor * params[name]["W"]
            grads[name] = {"W": gW}
            if self.bias:
                gb = delta.sum(axis=0)
                if bug == "zero" and name == bug_layer:
                    gb = np.zeros_like(gb)
                if bug == "bias-sum-all" and name == bug_layer:
                    gb = np.full_like(gb, delta.sum())
                grads[name]["b"] = gb
            if i == 0:
                break
            up = delta @ params[name]["W"].T
            deltas[f"{names[i - 1]}.a"] = up
            prev = names[i - 1]
            fprime = transfer_derivative(self.hidden, zs[i - 1], acts[i])
            if prev == bug_layer and bug == "missing-transfer-derivative":
                fprime = 1.0
            elif prev == bug_layer and bug == "double-transfer-derivative":
                fprime = fprime ** 2
            elif prev == bug_layer and bug == "transfer-derivative-misplaced":
                s_of_s = logistic(acts[i]) if self.hidden == "logistic" else np.tanh(acts[i])
                fprime = transfer_derivative(self.hidden, acts[i], s_of_s)
            elif prev == bug_layer and bug == "wrong-transfer":
                fprime = 1.0 - acts[i] ** 2 if self.hidden == "logistic" else acts[i] * (1 - acts[i])
            delta = up * fprime
        grads = {name: grads[name] for name in names}
        if bug == "swapped":
            a, b = names[0], names[1]
            grads[a]["W"], grads[b]["W"] = grads[b]["W"], grads[a]["W"]
        return grads, deltas

    def grads(self, bug=None, **kw):
        return lambda params, x, y: self.backward(params, x, y, bug=bug, **kw)[0]
