"""What a claimed delta at a transfer function says about the derivative factor the backward multiplied in.

Where a layer probes both its pre-activation ``L.z`` and its output ``L.a``, the claimed dE/dz divided by
the reference dE/da is, entry by entry, the derivative factor the user's code applied. Comparing it with
f'(z), 1, f'(a), the formula applied to z, f'(z)^2 and another transfer function's derivative names the
mistake.
"""

from __future__ import annotations

import numpy as np

from .._report.results import Finding

__all__ = ["factor_findings"]


def _transfer_of(z: np.ndarray, a: np.ndarray) -> str | None:
    """Which transfer function maps the probed pre-activation z to the probed output a."""
    candidates = {"logistic": 0.5 * (1 + np.tanh(0.5 * z)), "tanh": np.tanh(z), "relu": np.maximum(z, 0.0),
                  "identity": z}
    for name, value in candidates.items():
        if z.shape == a.shape and np.allclose(value, a, rtol=1e-7, atol=1e-12):
            return name
    return None


def _factor_hypotheses(kind: str, z: np.ndarray, a: np.ndarray) -> list[tuple[str, str, np.ndarray]]:
    """(finding kind, detail, implied factor) for each hypothesis about the derivative factor."""
    logistic = lambda u: 0.5 * (1 + np.tanh(0.5 * u))  # noqa: E731
    correct = {"logistic": a * (1 - a), "tanh": 1 - a ** 2, "relu": (z > 0).astype(float), "identity": np.ones_like(z)}
    out = [("missing-transfer-derivative", f"the delta lacks the {kind} derivative f'(z); multiply it by f'(z)",
            np.ones_like(z)),
           ("extra-transfer-derivative", f"the delta carries the {kind} derivative twice (f'(z) squared); "
            "multiply by it once", correct[kind] ** 2)]
    if kind == "logistic":
        out += [("transfer-derivative-misplaced", "the logistic derivative s(1-s) is applied to the pre-activation "
                 "z instead of the output s(z); use a * (1 - a) with a = s(z)", z * (1 - z)),
                ("transfer-derivative-misplaced", "the logistic derivative is evaluated at s(a), the function "
                 "applied twice; use a * (1 - a) with a the layer's output", logistic(a) * (1 - logistic(a))),
                ("transfer-derivative-misplaced", "the tanh derivative 1 - a^2 is used for a logistic layer; "
                 "use a * (1 - a)", 1 - a ** 2)]
    if kind == "tanh":
        out += [("transfer-derivative-misplaced", "the tanh derivative 1 - a^2 is applied to the pre-activation z "
                 "instead of the output; use 1 - tanh(z)^2", 1 - z ** 2),
                ("transfer-derivative-misplaced", "the tanh derivative is evaluated at tanh(a), the function applied "
                 "twice; use 1 - a^2 with a the layer's output", 1 - np.tanh(a) ** 2),
                ("transfer-derivative-misplaced", "the logistic derivative a(1 - a) is used for a tanh layer; use "
                 "1 - a^2", a * (1 - a))]
    return out


def factor_findings(name: str, layer: str, claimed_dz: np.ndarray, z: np.ndarray, a: np.ndarray,
                     ref_da: np.ndarray, ref_dz: np.ndarray, tol: float) -> list[tuple[Finding, float, int]]:
    kind = _transfer_of(z, a)
    if kind is None or kind == "identity":
        return []
    big = np.abs(ref_da) > 1e-8 * max(float(np.max(np.abs(ref_da))), 1e-300)
    if not np.any(big):
        return []
    implied = np.where(big, claimed_dz / np.where(big, ref_da, 1.0), np.nan)
    out = []
    hypotheses = _factor_hypotheses(kind, z, a)
    correct = {"logistic": a * (1 - a), "tanh": 1 - a ** 2, "relu": (z > 0).astype(float)}[kind]
    for finding_kind, detail, factor in hypotheses:
        if np.allclose(factor[big], correct[big], rtol=1e-9, atol=0):
            continue  # indistinguishable from the right derivative here (ReLU: f'(z)^2 = f'(z))
        with np.errstate(invalid="ignore", divide="ignore"):
            misfit = np.abs(implied - factor)[big] / np.maximum(np.abs(factor[big]), 1e-3)
        m = float(np.max(misfit)) if misfit.size else np.inf
        if m <= max(tol, 1e-9) * 10 and not np.allclose(claimed_dz, ref_dz, rtol=tol, atol=0):
            out.append((Finding(finding_kind, layer, name, detail, None), m, 0))
    return out
