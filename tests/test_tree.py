"""Tree handling: paths, layers, rebuilding, and the input errors of claimed pytrees."""

from __future__ import annotations

from collections import OrderedDict, namedtuple

import numpy as np
import pytest

from gradcheck import InputError
from gradcheck._core.tree import flatten, flatten_like, render_key

Dense = namedtuple("Dense", ["W", "b"])
A = np.ones((2, 3))
B = np.zeros(3)

PATH_CASES = [
    # (params, expected paths, expected layers)
    ({"hidden": {"W": A, "b": B}}, ["hidden.W", "hidden.b"], ["hidden", "hidden"]),
    ([{"W": A}, {"b": B}], ["0.W", "1.b"], ["0", "1"]),
    ({"W1": A, "b1": B, "W2": A, "b2": B}, ["W1", "b1", "W2", "b2"], ["1", "1", "2", "2"]),
    ({("W", 1): A, ("b", 1): B}, ["(W,1)", "(b,1)"], ["(W,1)", "(b,1)"]),
    ({3: A}, ["3"], ["3"]),
    (A, ["params"], ["params"]),
    (1.5, ["params"], ["params"]),
    (Dense(A, B), ["W", "b"], ["W", "b"]),
    ({"enc": (A, B)}, ["enc.0", "enc.1"], ["enc", "enc"]),
]


@pytest.mark.parametrize("params, paths, layers", PATH_CASES)
def test_paths_and_layers(params, paths, layers):
    structure, leaves = flatten(params)
    assert [t.path for t in structure.tensors] == paths
    assert [t.layer for t in structure.tensors] == layers
    assert len(leaves) == len(paths)


@pytest.mark.parametrize("params", [{"a": {"W": A}}, OrderedDict(x=A, y=B), [A, (B, A)], Dense(A, B), (A,)])
def test_rebuild_keeps_container_types(params):
    structure, leaves = flatten(params)
    rebuilt = structure.rebuild(leaves)
    assert type(rebuilt) is type(params)
    again, leaves2 = flatten(rebuilt)
    assert again.paths == structure.paths
    assert all(a is b for a, b in zip(leaves, leaves2))


def test_working_copies_are_fresh_float64():
    structure, leaves = flatten({"W": A.astype(np.float32)[:, ::2]})
    (copy,) = structure.working_copies(leaves)
    assert copy.dtype == np.float64 and copy.flags.c_contiguous and copy.flags.writeable
    assert not np.shares_memory(copy, A)


@pytest.mark.parametrize("layers, expected", [
    ({"W1": "input"}, ["input", "1", "2"]),
    (lambda path: path[0], ["W", "b", "W"]),
])
def test_layers_override(layers, expected):
    structure, _ = flatten({"W1": A, "b1": B, "W2": A}, layers=layers)
    assert [t.layer for t in structure.tensors] == expected


@pytest.mark.parametrize("key", ["W", 7, ("W", 1), ("a", ("b", 2))])
def test_render_key_round_trip_is_readable(key):
    text = render_key(key)
    assert "'" not in text and text


BAD_PARAMS = [
    ({}, r"params: expected at least one parameter array, got an empty pytree"),
    ({"W": np.ones(3, dtype=int)}, r"params W: expected a float32 or float64 parameter, got dtype int64\. .*astype"),
    ({"W": np.array([True])}, r"params W: expected a float32 or float64 parameter, got dtype bool"),
    ({"W": np.array([1j])}, r"params W: .*got dtype complex128\. Parameters must be real"),
    ({"W": "text"}, r"params W: expected a float array or a Python float, got str"),
    ({"W": 3}, r"params W: expected a float array or a Python float, got int 3"),
]


@pytest.mark.parametrize("params, message", BAD_PARAMS)
def test_bad_params_are_input_errors(params, message):
    with pytest.raises(InputError, match=message):
        flatten(params)


def test_unknown_layer_paths_are_named():
    with pytest.raises(InputError, match=r"layers: expected keys among the tensor paths .*unknown paths \['W9'\]"):
        flatten({"W1": A}, layers={"W9": "x"})


STRUCTURE, _ = flatten({"hidden": {"W": np.ones((2, 3)), "b": np.ones(3)}})
BAD_CLAIMS = [
    ({"hidden": {"W": np.ones((2, 3))}}, r"grads hidden\.b: expected one array per parameter .*no entry for \['hidden\.b'\]"),
    ({"hidden": {"W": np.ones((2, 3)), "b": np.ones(3), "c": np.ones(1)}}, r"grads hidden\.c: .*extra entries \['hidden\.c'\]"),
    ({"hidden": {"W": np.ones((3, 2)), "b": np.ones(3)}},
     r"grads hidden\.W: expected shape \(2, 3\), got shape \(3, 2\)\. The claimed array is the transpose"),
    ({"hidden": {"W": np.ones((2, 3)), "b": np.ones((8, 3))}},
     r"grads hidden\.b: expected shape \(3,\), got shape \(8, 3\)\. It still carries a leading batch axis of length 8: sum"),
    ({"hidden": {"W": np.ones((2, 3)), "b": None}}, r"grads hidden\.b: .*no entry"),
]


@pytest.mark.parametrize("claimed, message", BAD_CLAIMS)
def test_bad_claims_name_the_tensor(claimed, message):
    with pytest.raises(InputError, match=message):
        flatten_like(STRUCTURE, claimed, "grads")


def test_claims_may_use_other_container_types():
    structure, _ = flatten({"layers": (np.ones(2), np.ones(1))})
    arrays = flatten_like(structure, {"layers": [np.zeros(2), np.zeros(1)]}, "grads")
    assert [a.shape for a in arrays] == [(2,), (1,)]
