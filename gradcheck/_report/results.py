"""Results: frozen dataclasses for findings, tensors, layers and the whole report.

A :class:`Report` is read-only once built. It renders as a text table
(``str(report)``), as a JSON-ready dict (:meth:`Report.to_dict`) and, in a
notebook, as HTML (see ``_html.py``). The text leads with the verdict and the
first finding in one sentence, then the layers from the loss backwards (where a
backprop chain's mistake starts), then one row per tensor.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Mapping, Sequence

import numpy as np

if TYPE_CHECKING:
    from gradcheck._core.tree import Structure

__all__ = ["Finding", "TensorResult", "LayerResult", "ReferenceSummary", "Report", "build_layers"]


def _json_float(x: float | None) -> float | None:
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


@dataclass(frozen=True)
class Finding:
    """One diagnosed problem.

    Attributes:
        kind: a registered id (``gradcheck._diagnose.kinds``), e.g. ``non-finite``, ``sign-flip``.
        layer: the layer where the mistake most likely starts.
        where: the tensor path or probe name the evidence comes from.
        detail: one plain sentence saying what the code probably does and what it should do.
        factor: the number that applies (a scale, a learning rate), or None.
    """

    kind: str
    layer: str | None
    where: str
    detail: str
    factor: float | None = None

    def __post_init__(self) -> None:
        from .._diagnose.kinds import KINDS

        if self.kind not in KINDS:
            raise ValueError(f"Finding kind: expected one of the registered kinds {sorted(KINDS)}, got "
                             f"{self.kind!r}. Register it in gradcheck/_diagnose/kinds.py.")

    def sentence(self) -> str:
        return f"{self.where}: {self.detail}"

    def to_dict(self) -> dict[str, Any]:
        return {"kind": self.kind, "layer": self.layer, "where": self.where,
                "detail": self.detail, "factor": _json_float(self.factor)}


@dataclass(frozen=True, eq=False, kw_only=True)
class TensorResult:
    """The comparison of one parameter tensor's claimed gradient with the reference.

    Attributes:
        path, layer, shape: which tensor.
        error: the largest per-entry relative error among checked, reliable entries.
        worst_index: the entry where ``error`` occurs (a tuple, ``()`` for scalars).
        checked: how many entries were checked (or covered by directional tests).
        cosine: cosine of the angle between the claimed and the reference tensor.
        scale: least-squares factor a in claimed = a * reference.
        ok: whether every checked, reliable entry is within ``tolerance``.
        tolerance: the relative tolerance applied to this tensor.
        unreliable: entries where the references disagreed with each other (not blamed).
        size: the number of entries in the tensor.
        errors: per-entry relative errors (NaN where not checked), or None when not kept.
    """

    path: str
    layer: str
    shape: tuple[int, ...]
    error: float
    worst_index: tuple[int, ...]
    checked: int
    cosine: float
    scale: float
    ok: bool
    tolerance: float
    unreliable: int = 0
    size: int = 0
    errors: np.ndarray | None = field(default=None, repr=False)

    def to_dict(self) -> dict[str, Any]:
        return {"path": self.path, "layer": self.layer, "shape": list(self.shape),
                "error": _json_float(self.error), "worst_index": [int(i) for i in self.worst_index],
                "checked": int(self.checked), "size": int(self.size), "cosine": _json_float(self.cosine),
                "scale": _json_float(self.scale), "ok": bool(self.ok), "tolerance": _json_float(self.tolerance),
                "unreliable": int(self.unreliable)}


@dataclass(frozen=True)
class LayerResult:
    """Aggregate of a layer's tensors: the worst error and which tensor has it."""

    name: str
    tensors: tuple[str, ...]
    error: float
    worst_tensor: str
    ok: bool

    def to_dict(self) -> dict[str, Any]:
        return {"name": self.name, "tensors": list(self.tensors), "error": _json_float(self.error),
                "worst_tensor": self.worst_tensor, "ok": bool(self.ok)}


@dataclass(frozen=True)
class ReferenceSummary:
    """Which reference methods were used and how well they agreed with each other.

    Attributes:
        primary: the method the claimed values were compared against.
        methods: every method computed, primary first.
        agreement: method -> largest relative disagreement with the primary on reliable entries.
        unavailable: method -> the reason it could not be used for this loss.
        unreliable: how many entries were excluded because the references disagreed there.
    """

    primary: str
    methods: tuple[str, ...]
    agreement: Mapping[str, float]
    unavailable: Mapping[str, str]
    unreliable: int = 0

    def to_dict(self) -> dict[str, Any]:
        return {"primary": self.primary, "methods": list(self.methods),
                "agreement": {k: _json_float(v) for k, v in self.agreement.items()},
                "unavailable": dict(self.unavailable), "unreliable": int(self.unreliable)}


def nondeterministic_report(structure: Structure, where: str, detail: str, evaluations: int, why: str,
                            title: str) -> Report:
    """The report of a check that could not start: the loss (or a layer's forward) is not deterministic."""
    nan = float("nan")
    tensors = tuple(TensorResult(path=t.path, layer=t.layer, shape=t.shape, error=nan, worst_index=(), checked=0,
                                 cosine=nan, scale=nan, ok=False, tolerance=nan, unreliable=0, size=t.size)
                    for t in structure.tensors)
    return Report(False, tensors, build_layers(tensors, structure.layer_order),
                  (Finding("nondeterministic-loss", None, where, detail),), evaluations,
                  ReferenceSummary("none", (), {}, {"all": why}), title=title)


def build_layers(tensors: tuple[TensorResult, ...], order: tuple[str, ...]) -> tuple[LayerResult, ...]:
    """Aggregate tensor results into layers, in ``order`` (input to output)."""
    out = []
    for name in order:
        mine = [t for t in tensors if t.layer == name]
        if not mine:
            continue
        worst = max(mine, key=lambda t: (not t.ok, t.error if math.isfinite(t.error) else math.inf))
        out.append(LayerResult(name, tuple(t.path for t in mine), worst.error, worst.path,
                               all(t.ok for t in mine)))
    return tuple(out)


def _fmt(x: float | None, digits: int = 2) -> str:
    if x is None:
        return "-"
    if not math.isfinite(x):
        return str(x)
    return f"{x:.{digits}e}"


@dataclass(frozen=True)
class Report:
    """Everything one check found. ``str(report)`` is the text report.

    Attributes:
        ok: True when every checked entry of every tensor (and delta) holds.
        tensors: one :class:`TensorResult` per parameter tensor, in pytree order.
        layers: per-layer aggregates, ordered input to output.
        findings: diagnosed problems, most likely first; empty when ``ok``.
        evaluations: how many times the loss was evaluated.
        references: a :class:`ReferenceSummary`.
        deltas: results for claimed deltas (probe name -> TensorResult), if any were given.
        notes: plain sentences about how the check was made (coverage, widened tolerances).
        title: what was checked (shown in the first line).
    """

    ok: bool
    tensors: tuple[TensorResult, ...]
    layers: tuple[LayerResult, ...]
    findings: tuple[Finding, ...]
    evaluations: int
    references: ReferenceSummary
    deltas: tuple[TensorResult, ...] = ()
    notes: tuple[str, ...] = ()
    title: str = "gradient check"
    rates: Mapping[str, float] = field(default_factory=dict)

    @property
    def worst_layer(self) -> str | None:
        """The layer with the largest error, or None when the report is ok.

        When findings exist, the first finding's layer (where the mistake starts) wins.
        """
        if self.ok:
            return None
        for f in self.findings:
            if f.layer is not None:
                return f.layer
        failing = [layer for layer in self.layers if not layer.ok] or list(self.layers)
        return max(failing, key=lambda layer: layer.error if math.isfinite(layer.error) else math.inf).name

    def tensor(self, path: str) -> TensorResult:
        """The result for one tensor path (KeyError names the known paths)."""
        for t in self.tensors + self.deltas:
            if t.path == path:
                return t
        raise KeyError(f"no tensor {path!r}; known: {[t.path for t in self.tensors + self.deltas]}")

    def to_dict(self) -> dict[str, Any]:
        """A JSON-serialisable dict of the whole report."""
        return {"ok": bool(self.ok), "title": self.title, "worst_layer": self.worst_layer,
                "evaluations": int(self.evaluations), "references": self.references.to_dict(),
                "findings": [f.to_dict() for f in self.findings],
                "layers": [layer.to_dict() for layer in self.layers],
                "tensors": [t.to_dict() for t in self.tensors],
                "deltas": [t.to_dict() for t in self.deltas],
                "notes": list(self.notes), "rates": {k: _json_float(v) for k, v in self.rates.items()}}

    def to_html(self) -> str:
        """A self-contained HTML rendering (verdict, first finding, layer table, error heat maps)."""
        from .html import render_html

        return render_html(self)

    def _repr_html_(self) -> str:
        return self.to_html()

    def plot(self, tensors: Sequence[str] | None = None):
        """Draw heat maps of the per-entry relative error of each weight tensor (needs matplotlib).

        Returns the matplotlib Figure.
        """
        from .html import plot_errors

        return plot_errors(self, tensors)

    def verdict(self) -> str:
        """One line: the verdict and, when wrong, the first finding as a sentence."""
        if self.ok:
            n = sum(t.checked for t in self.tensors)
            return f"OK: {len(self.tensors)} tensors, {n} entries hold against the {self.references.primary} reference."
        first = self.findings[0].sentence() if self.findings else "the claimed gradients differ from the reference."
        return f"WRONG: {first}"

    def __str__(self) -> str:
        lines = [f"{self.title}: {self.verdict()}"]
        for f in self.findings[1:]:
            lines.append(f"  also [{f.kind}] {f.sentence()}")
        lines.append("")
        lines.append("layers, from the loss backwards:")
        width = max([len(layer.name) for layer in self.layers] + [5])
        lines.append(f"  {'layer':<{width}}  {'worst error':>11}  {'status':<6}  worst tensor")
        for layer in reversed(self.layers):
            lines.append(f"  {layer.name:<{width}}  {_fmt(layer.error):>11}  {'ok' if layer.ok else 'WRONG':<6}"
                         f"  {layer.worst_tensor}")
        rows = list(self.tensors) + list(self.deltas)
        pw = max([len(t.path) for t in rows] + [6])
        lines.append("")
        lines.append(f"  {'tensor':<{pw}}  {'shape':<12} {'error':>9} {'tol':>8} {'cosine':>8} {'scale':>9}"
                     f"  {'checked':>9}  worst entry")
        for t in rows:
            shape = "x".join(str(s) for s in t.shape) or "scalar"
            mark = "" if t.ok else "  <- WRONG"
            cos = "-" if not math.isfinite(t.cosine) else f"{t.cosine:.4f}"
            scale = "-" if not math.isfinite(t.scale) else f"{t.scale:.4g}"
            lines.append(f"  {t.path:<{pw}}  {shape:<12} {_fmt(t.error):>9} {_fmt(t.tolerance, 0):>8} {cos:>8}"
                         f" {scale:>9}  {t.checked:>4}/{t.size:<4}  {t.worst_index}{mark}")
        refs = self.references
        agree = ", ".join(f"{m} within {_fmt(v)}" for m, v in refs.agreement.items()) or "no second method"
        lines.append("")
        lines.append(f"reference: {refs.primary} ({agree}); loss evaluated {self.evaluations} times.")
        for m, why in refs.unavailable.items():
            lines.append(f"  {m} not used: {why}")
        if refs.unreliable:
            lines.append(f"  {refs.unreliable} entries not judged: the references disagree there (kink or noise).")
        for rate_path, rate in self.rates.items():
            lines.append(f"  update step on {rate_path}: effective learning rate {rate:.4g}")
        for note in self.notes:
            lines.append(f"note: {note}")
        return "\n".join(lines)
