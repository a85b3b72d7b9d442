"""Case files: a network's parameters, claimed gradients and data in one ``.npz``.

A case lets a network written in any language be checked: the program writes
its parameters, the gradients its backward pass computed, optionally the
deltas (gradients at each layer's pre-activation and output), the batch of data
and a small description of the network (``_casenet.py``) into one ``.npz``
archive, numpy's open format (a zip of ``.npy`` files). :func:`load_case`
validates all of it against the description and returns a :class:`Case` whose
``loss`` recomputes the forward pass in Python. The format is specified in
``docs/case-format.md``; every malformed file is an :class:`InputError` naming
the array or field, what was expected, what came, and the fix.
"""

from __future__ import annotations

import difflib
import io
import json
import os
import tomllib
from dataclasses import dataclass
from typing import Any, Mapping

import numpy as np

from .._core.errors import InputError, check_shape, describe, input_error
from .network import FORMAT_VERSION, FUSED, NetworkDescription, NetworkLoss

__all__ = ["Case", "save_case", "load_case", "read_description"]

VERSION = "case/version"
DESCRIPTION = "case/description"
_DOC = "See docs/case-format.md."


@dataclass(frozen=True)
class Case:
    """A validated case, ready to check.

    Attributes:
        params: ``{layer: {"W": array, "b": array}}`` in layer order (no ``"b"`` without bias).
        grads: the claimed gradients, same structure and shapes as ``params``.
        deltas: claimed ``d loss / d probe`` per probe name (``"hidden.z"``), or None.
        data: ``(x, y)``, one example per row; integer class labels come back one-hot.
        description: the network the arrays belong to.
        loss: ``loss(params, x, y, *, xp=numpy, probe=None)`` built from the description.
        source: the file it was read from, or None.
    """

    params: dict[str, dict[str, np.ndarray]]
    grads: dict[str, dict[str, np.ndarray]]
    deltas: dict[str, np.ndarray] | None
    data: tuple[np.ndarray, np.ndarray]
    description: NetworkDescription
    loss: NetworkLoss
    source: str | None = None


def read_description(source: Any) -> NetworkDescription:
    """A description from a ``.json`` or ``.toml`` file, a mapping, or a :class:`NetworkDescription`."""
    if isinstance(source, NetworkDescription):
        return source
    if isinstance(source, Mapping):
        return NetworkDescription.from_mapping(source)
    if not isinstance(source, (str, os.PathLike)):
        raise input_error("description", "a .json or .toml path, a mapping or a NetworkDescription",
                          describe(source), "Pass the path of the description file.")
    path = os.fspath(source)
    kind = os.path.splitext(path)[1].lower()
    if kind not in (".json", ".toml"):
        raise input_error(f"description {path}", "a file ending in .json or .toml", f"suffix {kind!r}",
                          "Rename the file so its suffix says which syntax it uses.")
    try:
        with open(path, "rb") as f:
            raw = f.read()
        parsed = json.loads(raw.decode("utf-8")) if kind == ".json" else tomllib.loads(raw.decode("utf-8"))
    except OSError as exc:
        raise input_error(f"description {path}", "a readable file", f"{type(exc).__name__}: {exc}",
                          "Check the path.") from exc
    except ValueError as exc:  # JSONDecodeError, TOMLDecodeError and UnicodeDecodeError are ValueErrors
        raise input_error(f"description {path}", f"valid UTF-8 {kind[1:].upper()}",
                          f"{type(exc).__name__}: {exc}", f"Fix the syntax at the place named. {_DOC}") from exc
    return NetworkDescription.from_mapping(parsed)


def _embedded(arrays: Mapping[str, np.ndarray]) -> NetworkDescription:
    """Decode ``case/description``: UTF-8 JSON as a uint8 byte array, or a one-element string array."""
    value = arrays[DESCRIPTION]
    try:
        if value.dtype == np.uint8 and value.ndim == 1:
            text = value.tobytes().decode("utf-8")
        elif value.dtype.kind in "US" and value.size == 1:
            item = value.reshape(()).item()
            text = item.decode("utf-8") if isinstance(item, bytes) else item
        else:
            raise input_error(DESCRIPTION, "UTF-8 JSON text as a 1-D uint8 array (or a one-element string array)",
                              describe(value), "Store the bytes of the JSON text as uint8.")
        parsed = json.loads(text)
    except (ValueError, RecursionError) as exc:
        if isinstance(exc, InputError):
            raise
        raise input_error(DESCRIPTION, "UTF-8 JSON text", f"{type(exc).__name__}: {exc}",
                          f"Write the description with a JSON library. {_DOC}") from exc
    return NetworkDescription.from_mapping(parsed)


def _read_npz(source: Any) -> tuple[dict[str, np.ndarray], str]:
    """Every array of the archive, read eagerly with pickles refused.

    The bytes are untrusted: besides the listed errors, a damaged zip or ``.npy``
    header can surface from the standard library's zip and header parsers as
    almost any exception, so every failure while reading means "not a usable
    npz" and becomes an InputError. Our own checks run after this block.
    """
    name = os.fspath(source) if isinstance(source, (str, os.PathLike)) else "case"
    if isinstance(source, (bytes, bytearray)):
        source = io.BytesIO(bytes(source))
    fix = ("Write the case with numpy.savez or any NPY writer plus a zip library (one .npy entry per array)."
           f" {_DOC}")
    try:
        if isinstance(source, (str, os.PathLike)):
            with open(source, "rb") as f:
                magic = f.read(6)
        else:
            start = source.tell()
            magic = source.read(6)
            source.seek(start)
        if magic and not magic.startswith((b"PK", b"\x93NUMPY")):
            raise input_error(name, "a .npz archive (a zip of .npy arrays)", f"data starting with {magic!r},"
                              " which is neither a zip archive (starts with 'PK') nor a .npy file", fix)
        loaded = np.load(source, allow_pickle=False)
    except FileNotFoundError as exc:
        raise input_error(name, "an existing .npz file", "no such file", "Check the path.") from exc
    except InputError:
        raise
    except Exception as exc:  # noqa: BLE001 - see docstring
        raise input_error(name, "a .npz archive of .npy arrays (no pickled objects)",
                          f"unreadable data ({type(exc).__name__}: {exc})", fix) from exc
    if not isinstance(loaded, np.lib.npyio.NpzFile):
        raise input_error(name, "a .npz archive (a zip of .npy arrays)", f"a single .npy array ({describe(loaded)})",
                          "Put every array into one zip, one .npy entry per array name.")
    try:
        with loaded:
            arrays = {key: loaded[key] for key in loaded.files}
        # Big-endian entries ('>f8', written by some platforms) are read into native byte order.
        arrays = {k: v if v.dtype.isnative else v.astype(v.dtype.newbyteorder("=")) for k, v in arrays.items()}
    except Exception as exc:  # noqa: BLE001 - see docstring
        raise input_error(name, "a .npz archive of intact .npy arrays (no pickled objects)",
                          f"a damaged entry ({type(exc).__name__}: {exc})", fix) from exc
    return arrays, name


def _expected(net: NetworkDescription) -> dict[str, str]:
    names = {VERSION: "the format version", DESCRIPTION: "the description", "data/x": "inputs", "data/y": "targets"}
    for layer in net.layers:
        for role in ("param", "grad"):
            names[f"{role}/{layer.name}/W"] = role
            if layer.bias != "none":
                names[f"{role}/{layer.name}/b"] = role
    names.update({f"delta/{p}": "delta" for p in net.probe_names})
    return names


def _real(where: str, value: np.ndarray, role: str) -> None:
    if value.dtype not in (np.float32, np.float64):
        fix = {"i": "Cast to float64 before writing.", "u": "Cast to float64 before writing.",
               "b": "Cast to float64 before writing.", "f": "Cast to float32 or float64.",
               "c": "Write the real part only: the gradient of a real loss is real."}
        raise input_error(where, f"a float32 or float64 array ({role})", describe(value),
                          fix.get(value.dtype.kind, "Write float32 or float64 arrays."))


def _finite(where: str, value: np.ndarray) -> None:
    if not np.all(np.isfinite(value)):
        raise input_error(where, "finite values", f"{int(np.sum(~np.isfinite(value)))} NaN or infinite entries",
                          "A case must be checked at a point where the forward pass is defined.")


def _weight(where: str, value: np.ndarray, net: NetworkDescription, layer: str, role: str) -> None:
    expected = net.weight_shape(layer)
    got = tuple(value.shape)
    if got == expected:
        return
    if got == expected[::-1]:
        other = "out-by-in" if net.weight_layout == "in-by-out" else "in-by-out"
        raise input_error(where, f"shape {expected} under weight_layout {net.weight_layout!r}", f"shape {got},"
                          " its transpose", f"Transpose it before writing, or set weight_layout to {other!r}"
                          " if every W is stored that way.")
    if role == "grad":
        check_shape(where, value, expected)
    la = net.layer(layer)
    raise input_error(where, f"shape {expected} ({la.inputs} inputs, {la.units} units, {net.weight_layout})",
                      f"shape {got}", "Make the array match the layer sizes in the description.")


def _labels(y: np.ndarray, net: NetworkDescription, n: int) -> np.ndarray | None:
    """Integer class labels of shape (N,) become one-hot rows (softmax cross-entropy only)."""
    if not (y.dtype.kind in "iu" and y.ndim == 1 and net.loss == "softmax-cross-entropy"):
        return None
    if y.shape[0] != n or y.size and (y.min() < 0 or y.max() >= net.outputs):
        span = f" ranging {y.min()}..{y.max()}" if y.size else ""
        raise input_error("data/y", f"{n} class labels in 0..{net.outputs - 1}", f"{y.shape[0]} labels{span}",
                          "Write one label per row of data/x, counting classes from 0.")
    return np.eye(net.outputs)[y]


def _network_of(arrays: Mapping[str, np.ndarray], description: Any) -> NetworkDescription:
    """The format version checked, and the description (given, or embedded in the archive)."""
    if VERSION not in arrays:
        raise input_error(VERSION, f"an integer array holding the format version {FORMAT_VERSION}",
                          "no such array", f"Add it (any NPY writer: int32, shape (1,)). {_DOC}")
    version = arrays[VERSION]
    if version.dtype.kind not in "iu" or version.size != 1:
        raise input_error(VERSION, "one integer", describe(version), f"Write [{FORMAT_VERSION}] as int32.")
    if int(version.reshape(-1)[0]) != FORMAT_VERSION:
        raise input_error(VERSION, f"format version {FORMAT_VERSION}", f"version {int(version.reshape(-1)[0])}",
                          "This gradcheck reads version 1 only: upgrade gradcheck, or write version 1.")
    if description is not None:
        net = read_description(description)
    elif DESCRIPTION in arrays:
        net = _embedded(arrays)
    else:
        raise input_error(DESCRIPTION, "the network description (embedded or given as a file)", "neither",
                          f"Store the JSON as a uint8 array {DESCRIPTION!r} or pass description=path. {_DOC}")
    return net


def _check_names(arrays: Mapping[str, np.ndarray], net: NetworkDescription) -> None:
    """Every array is one the description names, and every parameter and claimed gradient is there."""
    expected = _expected(net)
    for name in arrays:
        if name not in expected:
            close = difflib.get_close_matches(name, list(expected), n=1)
            hint = f"Did you mean {close[0]!r}? " if close else ""
            if name.endswith("/b") and name[:-1] + "W" in expected:
                hint = f"The description gives layer {name.split('/')[1]!r} no bias. "
            elif name == f"delta/{net.layers[-1].name}.a" and net.loss in FUSED:
                hint = (f"Under {net.loss!r} the loss is computed from the output pre-activation, so claim"
                        f" delta/{net.layers[-1].name}.z instead. ")
            raise input_error(name, f"only the arrays the description names ({', '.join(sorted(expected))})",
                              "an array it does not name", f"{hint}Rename or remove it, or fix the description.")
    roles = {"param": "the parameter", "grad": "the claimed gradient", "inputs": "the inputs",
             "targets": "the targets"}
    for name, role in expected.items():
        if name not in arrays and role in roles:
            raise input_error(name, f"an array ({roles[role]})", "no such array", f"Add it to the archive. {_DOC}")


def _batch(arrays: Mapping[str, np.ndarray], net: NetworkDescription) -> tuple[np.ndarray, np.ndarray]:
    """``data/x`` and ``data/y`` checked (integer class labels become one-hot rows)."""
    x, y = arrays["data/x"], arrays["data/y"]
    _real("data/x", x, "inputs")
    if x.ndim != 2 or x.shape[1] != net.inputs or x.shape[0] < 1:
        fix = "Write one example per row."
        if x.ndim == 2 and x.shape[0] == net.inputs:
            fix = "It looks like one example per column: transpose it to one example per row."
        raise input_error("data/x", f"shape (N, {net.inputs}) with N >= 1", f"shape {x.shape}", fix)
    _finite("data/x", x)
    n = x.shape[0]
    onehot = _labels(y, net, n)
    if onehot is not None:
        y = onehot
    else:
        _real("data/y", y, "targets")
        if y.shape != (n, net.outputs):
            fix = ("It looks like one example per column: transpose it." if y.shape == (net.outputs, n)
                   else f"Write one target row of {net.outputs} values per row of data/x.")
            raise input_error("data/y", f"shape ({n}, {net.outputs})", f"shape {y.shape}", fix)
        _finite("data/y", y)
    return x, y


def _tensors(arrays: Mapping[str, np.ndarray], net: NetworkDescription
             ) -> tuple[dict[str, dict[str, np.ndarray]], dict[str, dict[str, np.ndarray]]]:
    """The parameters and the claimed gradients, layer by layer, checked against the description."""
    params: dict[str, dict[str, np.ndarray]] = {}
    grads: dict[str, dict[str, np.ndarray]] = {}
    for layer in net.layers:
        params[layer.name], grads[layer.name] = {}, {}
        for tensor in ("W", "b") if layer.bias != "none" else ("W",):
            for role, out in (("param", params), ("grad", grads)):
                where = f"{role}/{layer.name}/{tensor}"
                value = arrays[where]
                _real(where, value, "parameter" if role == "param" else "claimed gradient")
                if tensor == "W":
                    _weight(where, value, net, layer.name, role)
                else:
                    check_shape(where, value, net.bias_shape(layer.name) or ())
                if role == "param":
                    _finite(where, value)
                out[layer.name][tensor] = value
    return params, grads


def _deltas(arrays: Mapping[str, np.ndarray], net: NetworkDescription, n: int) -> dict[str, np.ndarray]:
    """The claimed deltas present, each one row per example and one column per unit."""
    deltas = {}
    sizes = {f"{la.name}.{k}": la.units for la in net.layers for k in "za"}
    for probe in net.probe_names:
        where = f"delta/{probe}"
        if where in arrays:
            value = arrays[where]
            _real(where, value, "claimed delta")
            if value.shape != (n, sizes[probe]):
                fix = ("It looks like one example per column: transpose it to one example per row."
                       if value.shape == (sizes[probe], n) else
                       f"Write d loss / d {probe} with one row per example and one column per unit.")
                raise input_error(where, f"shape ({n}, {sizes[probe]})", f"shape {value.shape}", fix)
            deltas[probe] = value
    return deltas


def _build(arrays: Mapping[str, np.ndarray], description: Any, source: str | None) -> Case:
    """Validate the arrays of a case against its description and assemble the :class:`Case`."""
    net = _network_of(arrays, description)
    _check_names(arrays, net)
    x, y = _batch(arrays, net)
    params, grads = _tensors(arrays, net)
    deltas = _deltas(arrays, net, x.shape[0])
    return Case(params, grads, deltas or None, (x, y), net, NetworkLoss(net), source)


def _as_array(where: str, value: Any) -> np.ndarray:
    try:
        arr = np.asarray(value)
    except (ValueError, TypeError) as exc:
        raise input_error(where, "an array", f"{describe(value)} ({exc})", "Pass a numpy array.") from exc
    if arr.dtype == object:
        raise input_error(where, "a numeric array", describe(value), "Pass a float array, not a list of objects.")
    return arr


def _layered(what: str, tree: Any) -> dict[str, np.ndarray]:
    if not isinstance(tree, Mapping):
        raise input_error(what, "a dict {layer: {'W': array, 'b': array}}", describe(tree),
                          "Group the tensors by layer name.")
    out = {}
    for layer, tensors in tree.items():
        if not isinstance(tensors, Mapping) or set(tensors) - {"W", "b"}:
            raise input_error(f"{what} {layer}", "a dict with the keys 'W' and (with bias) 'b'",
                              describe(tensors), "Name the weight 'W' and the bias 'b'.")
        role = "param" if what == "params" else "grad"
        out.update({f"{role}/{layer}/{k}": _as_array(f"{what} {layer}.{k}", v) for k, v in tensors.items()})
    return out


def save_case(path: Any, params: Mapping[str, Any], grads: Mapping[str, Any], x: Any, y: Any,
              description: Any, deltas: Mapping[str, Any] | None = None) -> None:
    """Write a case file that :func:`load_case` reads back bit for bit.

    The case is validated exactly as :func:`load_case` would, before anything is
    written. Entries are stored uncompressed, the form every zip reader handles.

    Args:
        path: the file to write (written as given; no ``.npz`` is appended), or
            an open binary file.
        params, grads: ``{layer: {"W": array, "b": array}}``.
        x, y: the batch, one example per row.
        description: a :class:`NetworkDescription`, a mapping, or a .json/.toml path;
            it is embedded in the archive.
        deltas: optional ``{probe name: array}`` of claimed deltas.
    """
    net = read_description(description)
    arrays: dict[str, np.ndarray] = {VERSION: np.array([FORMAT_VERSION], dtype=np.int32),
                                     DESCRIPTION: np.frombuffer(json.dumps(net.to_mapping()).encode("utf-8"),
                                                                dtype=np.uint8)}
    arrays.update(_layered("params", params))
    arrays.update(_layered("grads", grads))
    arrays["data/x"], arrays["data/y"] = _as_array("x", x), _as_array("y", y)
    if deltas is not None:
        if not isinstance(deltas, Mapping):
            raise input_error("deltas", "a dict {probe name: array}", describe(deltas), "E.g. {'hidden.z': d}.")
        arrays.update({f"delta/{k}": _as_array(f"deltas {k}", v) for k, v in deltas.items()})
    _build(arrays, None, None)
    if hasattr(path, "write"):
        np.savez(path, **arrays)  # type: ignore[arg-type]  # numpy's stub reads **arrays as allow_pickle
        return
    with open(path, "wb") as f:
        np.savez(f, **arrays)  # type: ignore[arg-type]  # (as above)


def load_case(path: Any, description: Any = None) -> Case:
    """Read and validate a case file.

    Args:
        path: a ``.npz`` path, an open binary file, or the file's bytes.
        description: overrides the embedded description: a .json/.toml path, a
            mapping or a :class:`NetworkDescription`.

    Returns:
        The :class:`Case`. Raises :class:`InputError` for anything malformed.
    """
    arrays, name = _read_npz(path)
    return _build(arrays, description, name)
