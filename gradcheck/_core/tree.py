"""Tree handling: flatten parameter pytrees into named tensors and build them again.

A parameter pytree is nested dicts, lists, tuples and namedtuples whose leaves are
float arrays or Python floats. Every leaf gets a *path* (its keys joined by dots:
``params["hidden"]["W"]`` is ``hidden.W``) and a *layer* (the first component,
or the number in the hand-written ``W1, b1, W2`` convention). Nothing here copies
the caller's arrays except :meth:`Structure.working_copies`, which always does.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any, Callable, Hashable, Mapping, Sequence, Union

import numpy as np

from .errors import check_float_dtype, check_shape, describe, input_error

__all__ = ["Tensor", "Structure", "flatten", "render_key", "flatten_like"]

LayerSpec = Union[None, Mapping[str, str], Callable[[str], str]]

_NUMBERED = re.compile(r"^([A-Za-z_]+?)_?(\d+)$")
ROOT_PATH = "params"


def render_key(key: Hashable) -> str:
    """Render one dict key or sequence index readably for a path.

    Example:
        >>> [render_key(k) for k in ("W", 3, ("W", 1))]
        ['W', '3', '(W,1)']
    """
    if isinstance(key, str):
        return key
    if isinstance(key, (int, np.integer)):
        return str(int(key))
    if isinstance(key, tuple):
        return "(" + ",".join(render_key(k) for k in key) + ")"
    return repr(key)


@dataclass(frozen=True)
class Tensor:
    """One parameter tensor of the pytree: where it is and what it looks like."""

    path: str
    layer: str
    shape: tuple[int, ...]
    dtype: np.dtype

    @property
    def size(self) -> int:
        return int(np.prod(self.shape, dtype=np.int64))


@dataclass(frozen=True)
class Structure:
    """The shape of a pytree: its named tensors and a recipe to rebuild it from arrays."""

    tensors: tuple[Tensor, ...]
    recipe: Any

    @property
    def paths(self) -> tuple[str, ...]:
        return tuple(t.path for t in self.tensors)

    @property
    def layer_order(self) -> tuple[str, ...]:
        """Layers in the order their first tensor appears in the pytree (input to output)."""
        seen: dict[str, None] = {}
        for t in self.tensors:
            seen.setdefault(t.layer, None)
        return tuple(seen)

    @property
    def size(self) -> int:
        return sum(t.size for t in self.tensors)

    def rebuild(self, arrays: Sequence[Any]) -> Any:
        """Build a pytree of the original container types holding ``arrays`` as leaves."""
        return _rebuild(self.recipe, arrays)

    def working_copies(self, leaves: Sequence[Any], dtype: Any = np.float64) -> list[np.ndarray]:
        """Fresh, writable, contiguous copies of ``leaves`` in ``dtype`` (never views of the caller's arrays)."""
        return [np.array(leaf, dtype=dtype, copy=True, order="C").reshape(t.shape)
                for leaf, t in zip(leaves, self.tensors)]


def _walk(node: Any, keys: tuple, out: list[tuple[tuple, Any]]) -> Any:
    if isinstance(node, Mapping):
        items = list(node.items())
        children = [_walk(v, keys + (k,), out) for k, v in items]
        return ("dict", type(node), [k for k, _ in items], children)
    if isinstance(node, tuple) and hasattr(node, "_fields"):
        children = [_walk(v, keys + (f,), out) for f, v in zip(node._fields, node)]
        return ("namedtuple", type(node), children)
    if isinstance(node, (list, tuple)):
        children = [_walk(v, keys + (i,), out) for i, v in enumerate(node)]
        return ("seq", type(node), children)
    if node is None:
        return ("none",)
    out.append((keys, node))
    return ("leaf", len(out) - 1)


def _rebuild(recipe: Any, arrays: Sequence[Any]) -> Any:
    kind = recipe[0]
    if kind == "leaf":
        return arrays[recipe[1]]
    if kind == "none":
        return None
    if kind == "dict":
        _, cls, keys, children = recipe
        pairs = [(k, _rebuild(c, arrays)) for k, c in zip(keys, children)]
        try:
            return cls(pairs)
        except TypeError:
            return dict(pairs)
    if kind == "namedtuple":
        _, cls, children = recipe
        return cls(*[_rebuild(c, arrays) for c in children])
    _, cls, children = recipe
    built = [_rebuild(c, arrays) for c in children]
    return built if cls is list else (tuple(built) if cls is tuple else cls(built))


def _path_of(keys: tuple) -> str:
    return ".".join(render_key(k) for k in keys) if keys else ROOT_PATH


def _default_layers(all_keys: list[tuple]) -> list[str]:
    """First path component; flat ``W1, b1, W2`` names group by their number."""
    flat = all(len(k) == 1 for k in all_keys) and len(all_keys) > 1
    names = []
    for keys in all_keys:
        if not keys:
            names.append(ROOT_PATH)
            continue
        first = render_key(keys[0])
        match = _NUMBERED.match(first) if flat and isinstance(keys[0], str) else None
        names.append(match.group(2) if match else first)
    return names


def flatten(tree: Any, layers: LayerSpec = None, what: str = "params") -> tuple[Structure, list[Any]]:
    """Name every tensor of a parameter pytree and return its structure and its leaves.

    Args:
        tree: nested dicts, lists, tuples and namedtuples of float arrays or floats.
        layers: ``None`` for the default grouping, a mapping from path to layer
            name (paths it omits keep their default), or a callable ``path -> name``.
        what: the argument's name, used in error messages.

    Returns:
        ``(structure, leaves)``; the leaves are the caller's own objects, uncopied.

    Example:
        >>> s, _ = flatten({"W1": np.ones((2, 3)), "b1": np.zeros(3), "W2": np.ones((3, 1))})
        >>> [(t.path, t.layer) for t in s.tensors]
        [('W1', '1'), ('b1', '1'), ('W2', '2')]
    """
    found: list[tuple[tuple, Any]] = []
    recipe = _walk(tree, (), found)
    if not found:
        raise input_error(what, "at least one parameter array", f"an empty pytree ({describe(tree)})",
                          "Pass the weights and biases to check, e.g. {'W1': W1, 'b1': b1}.")
    all_keys = [k for k, _ in found]
    paths = [_path_of(k) for k in all_keys]
    names = _default_layers(all_keys)
    if isinstance(layers, Mapping):
        unknown = sorted(set(layers) - set(paths))
        if unknown:
            raise input_error("layers", f"keys among the tensor paths {paths}", f"unknown paths {unknown}",
                              "Name tensors by their dotted path, as printed in the report.")
        names = [str(layers.get(p, n)) for p, n in zip(paths, names)]
    elif callable(layers):
        names = [str(layers(p)) for p in paths]
    elif layers is not None:
        raise input_error("layers", "a mapping path -> layer name or a callable", describe(layers),
                          "Pass e.g. layers={'W_in': 'hidden'} or layers=lambda path: path.split('_')[0].")
    tensors = []
    for path, layer, (_, leaf) in zip(paths, names, found):
        if not (isinstance(leaf, (float, np.ndarray, np.generic)) or hasattr(leaf, "__array__")):
            raise input_error(f"{what} {path}", "a float array or a Python float", describe(leaf),
                              "Use numpy arrays (np.asarray(value, dtype=float)) as leaves.")
        arr = np.asarray(leaf)
        check_float_dtype(f"{what} {path}", arr)
        tensors.append(Tensor(path=path, layer=layer, shape=tuple(arr.shape), dtype=arr.dtype))
    return Structure(tuple(tensors), recipe), [leaf for _, leaf in found]


def flatten_like(structure: Structure, tree: Any, what: str) -> list[np.ndarray]:
    """Match a claimed pytree (gradients, say) to ``structure`` by path and return its arrays.

    Container types may differ (a list where the params had a tuple); paths must
    not. A missing or extra tensor, or a shape that differs, is an InputError that
    names the path. Values are returned as arrays without copying.
    """
    found: list[tuple[tuple, Any]] = []
    _walk(tree, (), found)
    claimed = {_path_of(k): v for k, v in found}
    missing = [p for p in structure.paths if p not in claimed]
    extra = [p for p in claimed if p not in structure.paths]
    if missing:
        raise input_error(f"{what} {missing[0]}", f"one array per parameter ({list(structure.paths)})",
                          f"no entry for {missing}" + (f" and extra entries {extra}" if extra else ""),
                          f"Return a {what} pytree with the same keys as params.")
    if extra:
        raise input_error(f"{what} {extra[0]}", f"exactly the parameter paths {list(structure.paths)}",
                          f"extra entries {extra}", "Remove them, or add the matching parameters to params.")
    out = []
    for t in structure.tensors:
        value = claimed[t.path]
        arr = np.asarray(value)
        if arr.dtype == object:
            raise input_error(f"{what} {t.path}", "a numeric array", describe(value),
                              "Return numpy arrays, not lists of arrays or None.")
        check_shape(f"{what} {t.path}", arr, t.shape)
        out.append(arr)
    return out
