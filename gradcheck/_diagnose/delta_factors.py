"""What a claimed delta at a transfer function says about the derivative factor the backward multiplied in.

Where a layer probes both its pre-activation ``L.z`` and its output ``L.a``, the claimed dE/dz divided by
the reference dE/da is, entry by entry, the derivative factor the user's code applied. Comparing it with
f'(z), 1, f'(z)^2 and the registry's wrong derivatives of that function (:mod:`gradcheck._diagnose.transfers`:
the formula applied to z, f'(a), another transfer function's derivative) names the mistake.
"""

from __future__ import annotations

import numpy as np

from .._report.results import Finding
from .transfers import ELEMENTWISE, TRANSFERS

__all__ = ["factor_findings"]


def _transfer_of(z: np.ndarray, a: np.ndarray) -> str | None:
    """Which elementwise transfer function of the registry maps the probed pre-activation z to the output a.

    Records are tried in registry order, so where two agree (ReLU and leaky ReLU on positive z, both
    and the identity) the first one named wins; their derivatives agree there too.
    """
    for name in ELEMENTWISE:
        if z.shape != a.shape:
            return None
        with np.errstate(all="ignore"):
            value = TRANSFERS[name].numpy_forward(z)
        if np.allclose(value, a, rtol=1e-7, atol=1e-12):
            return name
    return None


def _factor_hypotheses(kind: str, z: np.ndarray, a: np.ndarray) -> list[tuple[str, str, np.ndarray]]:
    """(finding kind, detail, implied factor) for each hypothesis about the derivative factor."""
    record = TRANSFERS[kind]
    out = [("missing-transfer-derivative", f"the delta lacks the {kind} derivative f'(z); multiply it by f'(z)",
            np.ones_like(z)),
           ("extra-transfer-derivative", f"the delta carries the {kind} derivative twice (f'(z) squared); "
            "multiply by it once", record.derivative(z, a) ** 2)]
    return out + [(w.kind, w.says, w.factor(z, a)) for w in record.wrong_derivatives]


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
    correct = TRANSFERS[kind].derivative(z, a)
    for finding_kind, detail, factor in hypotheses:
        if np.allclose(factor[big], correct[big], rtol=1e-9, atol=0):
            continue  # indistinguishable from the right derivative here (ReLU: f'(z)^2 = f'(z))
        with np.errstate(invalid="ignore", divide="ignore"):
            misfit = np.abs(implied - factor)[big] / np.maximum(np.abs(factor[big]), 1e-3)
        m = float(np.max(misfit)) if misfit.size else np.inf
        if m <= max(tol, 1e-9) * 10 and not np.allclose(claimed_dz, ref_dz, rtol=tol, atol=0):
            out.append((Finding(finding_kind, layer, name, detail, None), m, 0))
    return out
