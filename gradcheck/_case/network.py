"""The network of a case file: its description and the forward loss built from it.

A *case* (see ``_case.py`` and ``docs/case-format.md``) carries a fully connected
network written in any language. This module holds the language-neutral
description of that network (:class:`NetworkDescription`, one
:class:`LayerDescription` per layer) and turns it into a Python loss,
:class:`NetworkLoss`, written against an array namespace ``xp`` so that the same
code runs in numpy (numerical differences, complex step) and in ``jax.numpy``
(the autodiff reference). Every check of a description happens in
``NetworkDescription.__post_init__``, so a description built in code and one read
from a file are held to the same rules.
"""

from __future__ import annotations

import difflib
import re
from dataclasses import dataclass, field
from typing import Any, Callable, Mapping, Sequence

import numpy as np

from .._core.errors import describe, input_error
from .._diagnose.transfers import TRANSFERS as _REGISTRY
from .._diagnose.transfers import log_softmax as _log_softmax
from .._diagnose.transfers import softplus as _softplus

__all__ = ["FORMAT_VERSION", "TRANSFERS", "LOSSES", "BATCH_MODES", "WEIGHT_LAYOUTS", "BIAS_MODES",
           "LayerDescription", "LayerProbes", "NetworkDescription", "NetworkLoss", "describe_network"]

FORMAT_VERSION = 1
#: The transfer functions a layer may name: those of the registry (:mod:`gradcheck._diagnose.transfers`).
TRANSFERS = tuple(_REGISTRY)
LOSSES = ("half-squared-error", "mean-squared-error", "softmax-cross-entropy", "logistic-cross-entropy")
BATCH_MODES = ("sum", "mean")
WEIGHT_LAYOUTS = ("in-by-out", "out-by-in")
BIAS_MODES = ("per-unit", "shared", "none")
# A cross-entropy loss is computed from the output pre-activation, fused with its transfer.
FUSED = {"softmax-cross-entropy": "softmax", "logistic-cross-entropy": "logistic"}
_HINTS = {"sigmoid": "logistic", "linear": "identity", "none": "identity", "mse": "mean-squared-error",
          "sse": "half-squared-error", "cross-entropy": "softmax-cross-entropy",
          "binary-cross-entropy": "logistic-cross-entropy", "average": "mean", "total": "sum",
          "per-layer": "shared", "per-neuron": "per-unit"}
NETWORK_KEYS = ("version", "inputs", "layers", "loss", "batch", "weight_layout", "bias")
LAYER_KEYS = ("name", "units", "transfer", "bias", "inputs")
_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_-]*$")


def _choice(where: str, value: Any, allowed: Sequence[str], what: str) -> str:
    """Return ``value`` if it is one of ``allowed``, else raise naming the closest spelling."""
    if isinstance(value, str) and value in allowed:
        return value
    fix = f"Write one of {', '.join(repr(a) for a in allowed)}."
    if isinstance(value, str):
        hint = _HINTS.get(value.lower()) if _HINTS.get(value.lower()) in allowed else None
        close = difflib.get_close_matches(value.lower(), allowed, n=1)
        hint = hint or (close[0] if close else None)
        if hint:
            fix = f"Write {hint!r} (the format's name for it); the choices are {', '.join(map(repr, allowed))}."
    raise input_error(where, f"a {what}", f"unknown {what} {value!r}" if isinstance(value, str)
                      else describe(value), fix)


def _count(where: str, value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise input_error(where, "a positive whole number", describe(value), "Give the number of units, e.g. 4.")
    return int(value)


@dataclass(frozen=True)
class LayerDescription:
    """One fully connected layer: ``z = a_in W + b`` (layout ``in-by-out``), ``a = transfer(z)``.

    Attributes:
        name: identifier used in array names (``param/<name>/W``) and probe names
            (``<name>.z``); letters, digits, ``_`` and ``-``, no dots or slashes.
        units: number of units (outputs) of the layer.
        transfer: one of :data:`TRANSFERS`.
        bias: ``per-unit``, ``shared`` or ``none``; ``None`` takes the network's default.
        inputs: number of inputs; ``None`` takes the previous layer's units. When
            given, it must agree (a consistency check for hand-written files).
    """

    name: str
    units: int
    transfer: str
    bias: str | None = None
    inputs: int | None = None


@dataclass(frozen=True)
class LayerProbes:
    """What the diagnosis needs of one layer: its transfer and the probe names the loss reports."""

    layer: str
    transfer: str
    probes: tuple[str, ...]


@dataclass(frozen=True)
class NetworkDescription:
    """A fully connected network and its loss, validated on construction.

    After construction every layer has its ``bias`` and ``inputs`` filled in.

    Attributes:
        inputs: number of input features (columns of ``data/x``).
        layers: the layers from input to output.
        loss: one of :data:`LOSSES`; the cross-entropy losses need the matching
            output transfer (``softmax`` or ``logistic``).
        batch: ``sum`` or ``mean``: how per-example losses combine over the batch.
        weight_layout: ``in-by-out`` (``W`` has shape ``(inputs, units)``, ``z = a @ W``)
            or ``out-by-in`` (shape ``(units, inputs)``, ``z = a @ W.T``).
        bias: the default bias convention for layers that do not set one.
        version: the case format version; only :data:`FORMAT_VERSION` is understood.

    Example:
        >>> net = describe_network(3, [("hidden", 4, "tanh"), ("out", 2, "softmax")],
        ...                        loss="softmax-cross-entropy")
        >>> [(p.layer, p.transfer, p.probes) for p in net.probe_plan]
        [('hidden', 'tanh', ('hidden.z', 'hidden.a')), ('out', 'softmax', ('out.z',))]
        >>> net.weight_shape("out"), net.bias_shape("out")
        ((4, 2), (2,))
    """

    inputs: int
    layers: tuple[LayerDescription, ...]
    loss: str
    batch: str = "mean"
    weight_layout: str = "in-by-out"
    bias: str = "per-unit"
    version: int = FORMAT_VERSION
    _index: dict = field(default_factory=dict, init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        w = "description"
        if isinstance(self.version, bool) or self.version != FORMAT_VERSION:
            raise input_error(f"{w}.version", f"format version {FORMAT_VERSION}", describe(self.version),
                              f"Write version {FORMAT_VERSION} as documented in docs/case-format.md, or upgrade"
                              " gradcheck if the file was written for a newer format.")
        inputs = _count(f"{w}.inputs", self.inputs)
        _choice(f"{w}.loss", self.loss, LOSSES, "loss")
        _choice(f"{w}.batch", self.batch, BATCH_MODES, "batch mode")
        _choice(f"{w}.weight_layout", self.weight_layout, WEIGHT_LAYOUTS, "weight layout")
        _choice(f"{w}.bias", self.bias, BIAS_MODES, "bias convention")
        if isinstance(self.layers, (str, bytes)) or not isinstance(self.layers, Sequence) or not self.layers:
            raise input_error(f"{w}.layers", "a non-empty list of layers", describe(self.layers),
                              "List the layers from input to output.")
        resolved: list[LayerDescription] = []
        previous = inputs
        for i, layer in enumerate(self.layers):
            lw = f"{w}.layers[{i}]"
            if not isinstance(layer, LayerDescription):
                raise input_error(lw, "a LayerDescription", describe(layer),
                                  "Build descriptions with describe_network(...) or from a mapping.")
            if not isinstance(layer.name, str) or not _NAME.match(layer.name):
                raise input_error(f"{lw}.name", "a name of letters, digits, '_' or '-' (no dots or slashes)",
                                  describe(layer.name), "Rename the layer, e.g. 'hidden' or 'layer_1'.")
            units = _count(f"{lw}.units", layer.units)
            transfer = _choice(f"{lw}.transfer", layer.transfer, TRANSFERS, "transfer function")
            bias = self.bias if layer.bias is None else _choice(f"{lw}.bias", layer.bias, BIAS_MODES,
                                                                "bias convention")
            if layer.inputs is not None and _count(f"{lw}.inputs", layer.inputs) != previous:
                source = f"layer {resolved[-1].name!r}" if resolved else "the network"
                raise input_error(f"{lw}.inputs", f"{previous} (the units of {source}, which feed it)",
                                  f"{layer.inputs}", "The layer sizes do not chain: fix the sizes, or drop"
                                  " 'inputs' and let each layer take the previous layer's units.")
            if transfer == "softmax" and units < 2:
                raise input_error(f"{lw}.units", "at least 2 units for a softmax layer", f"{units}",
                                  "A softmax over one unit is constantly 1; use 'logistic' for one output.")
            resolved.append(LayerDescription(layer.name, units, transfer, bias, previous))
            previous = units
        names = [layer.name for layer in resolved]
        dup = sorted({n for n in names if names.count(n) > 1})
        if dup:
            raise input_error(f"{w}.layers", "distinct layer names", f"repeated names {dup}",
                              "Give every layer its own name.")
        needed = FUSED.get(self.loss)
        if needed and resolved[-1].transfer != needed:
            raise input_error(f"{w}.loss", f"an output layer with transfer {needed!r} for loss {self.loss!r}",
                              f"output layer {resolved[-1].name!r} with transfer {resolved[-1].transfer!r}",
                              f"Set the output transfer to {needed!r}, or choose a squared-error loss.")
        object.__setattr__(self, "inputs", inputs)
        object.__setattr__(self, "layers", tuple(resolved))
        object.__setattr__(self, "_index", {layer.name: layer for layer in resolved})

    @property
    def outputs(self) -> int:
        """Number of output units (columns of ``data/y``)."""
        return self.layers[-1].units

    def layer(self, name: str) -> LayerDescription:
        """The layer called ``name``."""
        if name not in self._index:
            raise input_error("layer", f"one of {list(self._index)}", repr(name), "Use a layer name of the case.")
        return self._index[name]

    def weight_shape(self, name: str) -> tuple[int, int]:
        """Shape of the layer's ``W`` under the network's weight layout."""
        layer = self.layer(name)
        inputs = int(layer.inputs or 0)  # filled in by __post_init__ for every layer
        if self.weight_layout == "in-by-out":
            return (inputs, layer.units)
        return (layer.units, inputs)

    def bias_shape(self, name: str) -> tuple[int, ...] | None:
        """Shape of the layer's ``b``: ``(units,)``, ``(1,)`` when shared, ``None`` when it has none."""
        layer = self.layer(name)
        return {"per-unit": (layer.units,), "shared": (1,), "none": None}[layer.bias or self.bias]

    @property
    def probe_plan(self) -> tuple[LayerProbes, ...]:
        """Per layer, in order: its transfer and the probe names the loss calls.

        Every layer reports ``<name>.z`` (pre-activation) and ``<name>.a`` (output),
        except the output layer under a cross-entropy loss: that loss is computed
        from the pre-activation (log-sum-exp, stable softplus), so the output
        activation is not on the path to the loss and has no delta of its own.
        """
        plan = []
        for i, layer in enumerate(self.layers):
            fused = i == len(self.layers) - 1 and self.loss in FUSED
            names = (f"{layer.name}.z",) if fused else (f"{layer.name}.z", f"{layer.name}.a")
            plan.append(LayerProbes(layer.name, layer.transfer, names))
        return tuple(plan)

    @property
    def probe_names(self) -> tuple[str, ...]:
        """All probe names in the order the forward pass reaches them."""
        return tuple(name for p in self.probe_plan for name in p.probes)

    @classmethod
    def from_mapping(cls, mapping: Any) -> "NetworkDescription":
        """Build a description from parsed JSON or TOML, rejecting unknown or missing keys."""
        _keys("description", mapping, NETWORK_KEYS, ("version", "inputs", "layers", "loss"))
        layers = mapping["layers"]
        if isinstance(layers, (str, bytes, Mapping)) or not isinstance(layers, Sequence):
            raise input_error("description.layers", "a list of layer tables", describe(layers),
                              "Write layers as a JSON list or TOML [[layers]] tables.")
        built = []
        for i, item in enumerate(layers):
            _keys(f"description.layers[{i}]", item, LAYER_KEYS, ("name", "units", "transfer"))
            built.append(LayerDescription(**item))
        rest = {k: v for k, v in mapping.items() if k != "layers"}
        return cls(layers=tuple(built), **rest)

    def to_mapping(self) -> dict[str, Any]:
        """A JSON/TOML-ready dict that :meth:`from_mapping` reads back to an equal description."""
        return {"version": self.version, "inputs": self.inputs, "loss": self.loss, "batch": self.batch,
                "weight_layout": self.weight_layout, "bias": self.bias,
                "layers": [{"name": la.name, "units": la.units, "transfer": la.transfer, "bias": la.bias}
                           for la in self.layers]}


def _keys(where: str, mapping: Any, allowed: Sequence[str], required: Sequence[str]) -> None:
    if not isinstance(mapping, Mapping):
        raise input_error(where, "a table of keys (JSON object or TOML table)", describe(mapping),
                          "See the example in docs/case-format.md.")
    unknown = [k for k in mapping if k not in allowed]
    if unknown:
        close = difflib.get_close_matches(str(unknown[0]), allowed, n=1)
        hint = f"Did you mean {close[0]!r}? " if close else ""
        raise input_error(where, f"keys among {list(allowed)}", f"unknown key {unknown[0]!r}",
                          f"{hint}Remove or rename it.")
    missing = [k for k in required if k not in mapping]
    if missing:
        raise input_error(where, f"the keys {list(required)}", f"no {missing[0]!r}", f"Add {missing[0]!r}.")


def describe_network(inputs: int, layers: Sequence[Any], *, loss: str, batch: str = "mean",
                     weight_layout: str = "in-by-out", bias: str = "per-unit") -> NetworkDescription:
    """Describe a network in code.

    Args:
        inputs: number of input features.
        layers: from input to output, each a :class:`LayerDescription`, a tuple
            ``(name, units, transfer)`` or ``(name, units, transfer, bias)``, or a
            mapping with the keys of a layer table.
        loss, batch, weight_layout, bias: as in :class:`NetworkDescription`.
    """
    built = []
    for i, item in enumerate(layers):
        if isinstance(item, Mapping):
            _keys(f"description.layers[{i}]", item, LAYER_KEYS, ("name", "units", "transfer"))
            item = LayerDescription(**item)
        elif isinstance(item, tuple) and 3 <= len(item) <= 4:
            item = LayerDescription(*item)
        elif not isinstance(item, LayerDescription):
            raise input_error(f"description.layers[{i}]", "(name, units, transfer) or (name, units, transfer, bias)",
                              describe(item), "Give each layer as such a tuple, e.g. ('hidden', 4, 'tanh').")
        built.append(item)
    return NetworkDescription(inputs, tuple(built), loss, batch, weight_layout, bias)


#: Forward pass of each transfer function, ``f(xp, z)``, read from the registry.
TRANSFER_FUNCTIONS: dict[str, Callable[[Any, Any], Any]] = {name: t.forward for name, t in _REGISTRY.items()}


@dataclass(frozen=True)
class NetworkLoss:
    """The forward loss of a described network: ``loss(params, x, y, *, xp=numpy, probe=None)``.

    ``params`` is ``{layer: {"W": ..., "b": ...}}`` (no ``"b"`` without bias), ``x``
    has one example per row, ``y`` one target row per example. With ``probe``,
    each pre-activation passes through ``probe("<layer>.z", z)`` and each output
    through ``probe("<layer>.a", a)`` (see :attr:`NetworkDescription.probe_plan`).
    Only ``xp.matmul/exp/log/log1p/tanh/where/real/max/sum`` are used, so it runs
    in numpy and ``jax.numpy``, and with complex parameters for complex steps.

    Example:
        >>> net = describe_network(2, [("out", 1, "identity")], loss="half-squared-error", batch="sum")
        >>> f = NetworkLoss(net)
        >>> float(f({"out": {"W": np.array([[1.0], [2.0]]), "b": np.array([0.5])}},
        ...         np.array([[1.0, 1.0]]), np.array([[1.5]])))
        2.0
    """

    description: NetworkDescription

    def __call__(self, params: Mapping[str, Any], x: Any, y: Any, *, xp: Any = np,
                 probe: Callable[[str, Any], Any] | None = None) -> Any:
        net = self.description
        a = x
        for i, layer in enumerate(net.layers):
            tensors = params.get(layer.name) if isinstance(params, Mapping) else None
            if not isinstance(tensors, Mapping) or "W" not in tensors:
                raise input_error(f"params {layer.name}", "a mapping with 'W' (and 'b' unless bias is 'none')",
                                  describe(tensors), f"Pass params[{layer.name!r}] = {{'W': ..., 'b': ...}}.")
            w = tensors["W"]
            z = xp.matmul(a, w if net.weight_layout == "in-by-out" else w.T)
            if layer.bias != "none":
                z = z + tensors["b"]
            if probe is not None:
                z = probe(f"{layer.name}.z", z)
            if i == len(net.layers) - 1 and net.loss in FUSED:
                return self._reduce(xp, self._fused(xp, z, y), x)
            a = TRANSFER_FUNCTIONS[layer.transfer](xp, z)
            if probe is not None:
                a = probe(f"{layer.name}.a", a)
        r = a - y
        per = xp.sum(r * r, axis=-1)  # r * r, not |r|^2: keeps the loss analytic for complex steps
        per = 0.5 * per if net.loss == "half-squared-error" else per / net.outputs
        return self._reduce(xp, per, x)

    def _fused(self, xp: Any, z: Any, y: Any) -> Any:
        if self.description.loss == "softmax-cross-entropy":
            return -xp.sum(y * _log_softmax(xp, z), axis=-1)
        # -[y log s(z) + (1 - y) log(1 - s(z))] = softplus(z) - y z, which never takes log(0).
        return xp.sum(_softplus(xp, z) - y * z, axis=-1)

    def _reduce(self, xp: Any, per_example: Any, x: Any) -> Any:
        total = xp.sum(per_example)
        return total / x.shape[0] if self.description.batch == "mean" else total
