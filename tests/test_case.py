"""Tests for gradcheck._case.file: writing, reading and validating case files.

The scenario (a small soil-moisture classifier with 3 sensor inputs) is invented
for these tests. The outside references are numpy's own NPY/NPZ reader and
writer (``numpy.lib.format``, ``zipfile``), standing in for a program in another
language, and the standard library's JSON and TOML parsers.
"""

from __future__ import annotations

import io
import json
import struct
import zipfile

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from gradcheck._case.file import Case, load_case, read_description, save_case
from gradcheck._case.network import NetworkLoss, describe_network
from gradcheck._core.errors import InputError


def make_case(dtype=np.float64, bias="per-unit", layout="in-by-out", loss="softmax-cross-entropy", seed=0):
    out = {"softmax-cross-entropy": "softmax", "logistic-cross-entropy": "logistic"}.get(loss, "identity")
    net = describe_network(3, [("hidden", 4, "tanh"), ("out", 2, out)], loss=loss, weight_layout=layout, bias=bias)
    rng = np.random.default_rng(seed)
    params, grads = {}, {}
    for layer in net.layers:
        shapes = {"W": net.weight_shape(layer.name), "b": net.bias_shape(layer.name)}
        params[layer.name] = {k: rng.normal(size=s).astype(dtype) for k, s in shapes.items() if s is not None}
        grads[layer.name] = {k: rng.normal(size=s).astype(dtype) for k, s in shapes.items() if s is not None}
    x = rng.normal(size=(6, 3)).astype(dtype)
    y = np.eye(2, dtype=dtype)[rng.integers(0, 2, 6)]
    deltas = {p: rng.normal(size=(6, 4 if p.startswith("hidden") else 2)).astype(dtype) for p in net.probe_names}
    return net, params, grads, x, y, deltas


def valid_arrays(**kw) -> dict[str, np.ndarray]:
    net, params, grads, x, y, deltas = make_case(**kw)
    buf = io.BytesIO()
    save_case(buf, params, grads, x, y, net, deltas=deltas)
    with np.load(io.BytesIO(buf.getvalue())) as f:
        return {k: f[k] for k in f.files}


def npz_bytes(arrays: dict[str, np.ndarray]) -> bytes:
    buf = io.BytesIO()
    np.savez(buf, **arrays)
    return buf.getvalue()


def assert_same_tree(a, b):
    assert list(a) == list(b)
    for layer in a:
        assert list(a[layer]) == list(b[layer])
        for k in a[layer]:
            assert a[layer][k].dtype == b[layer][k].dtype
            assert a[layer][k].tobytes() == b[layer][k].tobytes()


ROUND_TRIPS = [
    (np.float64, "per-unit", "in-by-out", "softmax-cross-entropy", True),
    (np.float32, "per-unit", "in-by-out", "softmax-cross-entropy", False),
    (np.float64, "shared", "out-by-in", "half-squared-error", True),
    (np.float32, "none", "out-by-in", "logistic-cross-entropy", True),
    (np.float64, "none", "in-by-out", "mean-squared-error", False),
]


@pytest.mark.parametrize("dtype,bias,layout,loss,with_deltas", ROUND_TRIPS)
def test_round_trip_is_bit_identical(tmp_path, dtype, bias, layout, loss, with_deltas):
    net, params, grads, x, y, deltas = make_case(dtype, bias, layout, loss)
    save_case(tmp_path / "case.npz", params, grads, x, y, net, deltas=deltas if with_deltas else None)
    case = load_case(tmp_path / "case.npz")
    assert isinstance(case, Case) and case.source == str(tmp_path / "case.npz")
    assert_same_tree(case.params, params)
    assert_same_tree(case.grads, grads)
    for got, want in zip(case.data, (x, y)):
        assert got.dtype == want.dtype and got.tobytes() == want.tobytes()
    if with_deltas:
        assert list(case.deltas) == list(net.probe_names)
        assert all(case.deltas[k].tobytes() == deltas[k].tobytes() for k in deltas)
    else:
        assert case.deltas is None
    assert case.description == net
    assert case.loss(case.params, *case.data) == NetworkLoss(net)(params, x, y)


def hand_written_npy(arr: np.ndarray, fortran: bool = False) -> bytes:
    """An NPY 1.0 file built byte by byte as docs/case-format.md tells other languages to (no numpy writer)."""
    descr = {"f": f"<f{arr.itemsize}", "i": f"<i{arr.itemsize}", "u": "|u1"}[arr.dtype.kind]
    shape = "(" + "".join(f"{d}, " for d in arr.shape).rstrip(" ").rstrip(",") + ("," if arr.ndim == 1 else "") + ")"
    header = f"{{'descr': '{descr}', 'fortran_order': {fortran}, 'shape': {shape}, }}"
    header += " " * (-(10 + len(header) + 1) % 64) + "\n"
    data = arr.astype(arr.dtype.newbyteorder("<")).tobytes(order="F" if fortran else "C")
    return b"\x93NUMPY\x01\x00" + struct.pack("<H", len(header)) + header.encode("latin-1") + data


def write_with_zip(arrays: dict[str, np.ndarray], compression=zipfile.ZIP_STORED) -> bytes:
    """A case built the way another language would: a zip of hand-written .npy entries."""
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", compression=compression) as z:
        for name, arr in arrays.items():
            z.writestr(name + ".npy", hand_written_npy(arr))
    return buf.getvalue()


def test_hand_written_npy_matches_numpy_reader():
    # numpy's own reader is the outside reference for the byte recipe given in the docs.
    for arr in (np.arange(12.0).reshape(3, 4), np.arange(5, dtype=np.float32), np.array([1], np.int32),
                np.frombuffer(b'{"a": 1}', np.uint8), np.zeros((0, 3))):
        back = np.load(io.BytesIO(hand_written_npy(arr)), allow_pickle=False)
        assert back.dtype == arr.dtype and back.shape == arr.shape and back.tobytes() == arr.tobytes()
    column_major = np.arange(6.0).reshape(2, 3)
    np.testing.assert_array_equal(np.load(io.BytesIO(hand_written_npy(column_major, fortran=True))), column_major)


@pytest.mark.parametrize("encoding,compression", [("uint8", zipfile.ZIP_STORED), ("unicode", zipfile.ZIP_DEFLATED),
                                                  ("bytes", zipfile.ZIP_STORED)])
def test_foreign_writer_and_description_encodings(encoding, compression):
    arrays = valid_arrays()
    text = arrays["case/description"].tobytes().decode("utf-8")
    described = {"uint8": arrays["case/description"], "unicode": np.array(text),
                 "bytes": np.array([text.encode("utf-8")])}[encoding]
    arrays["case/version"] = np.array(1, dtype=np.int64)  # a 0-d version is accepted too
    if encoding == "uint8":
        blob = write_with_zip(arrays, compression)
    else:  # string arrays are a numpy convenience, so numpy writes them
        del arrays["case/description"]
        buf = io.BytesIO()
        with zipfile.ZipFile(io.BytesIO(write_with_zip(arrays, compression))) as src, \
                zipfile.ZipFile(buf, "w", compression=compression) as dst:
            for info in src.infolist():
                dst.writestr(info.filename, src.read(info.filename))
            with dst.open("case/description.npy", "w") as f:
                np.lib.format.write_array(f, described)
        blob = buf.getvalue()
    case = load_case(blob)
    assert case.description.loss == "softmax-cross-entropy" and case.source == "case"
    np.testing.assert_array_equal(case.params["hidden"]["W"], arrays["param/hidden/W"])


TOML_OVERRIDE = """\
version = 1
inputs = 3
loss = "softmax-cross-entropy"
batch = "sum"

[[layers]]
name = "hidden"
units = 4
transfer = "tanh"

[[layers]]
name = "out"
units = 2
transfer = "softmax"
"""


@pytest.mark.parametrize("suffix", [".json", ".toml"])
def test_separate_description_overrides_the_embedded_one(tmp_path, suffix):
    arrays = valid_arrays()
    path = tmp_path / f"net{suffix}"
    if suffix == ".json":
        path.write_text(json.dumps({**json.loads(arrays["case/description"].tobytes()), "batch": "sum"}))
    else:
        path.write_text(TOML_OVERRIDE)
    assert load_case(npz_bytes(arrays)).description.batch == "mean"
    assert load_case(npz_bytes(arrays), description=path).description.batch == "sum"
    del arrays["case/description"]
    case = load_case(npz_bytes(arrays), description=str(path))
    assert case.description == read_description(path)
    x, y = case.data
    assert case.loss(case.params, x, y) == pytest.approx(6 * load_case(npz_bytes(valid_arrays())).loss(
        case.params, x, y), rel=1e-12)  # sum over 6 examples is 6 times the mean


def test_big_endian_entries_are_read_as_native():
    arrays = valid_arrays()
    swapped = {k: v.astype(v.dtype.newbyteorder(">")) if v.dtype.kind == "f" else v for k, v in arrays.items()}
    case = load_case(npz_bytes(swapped))
    assert case.params["hidden"]["W"].dtype.isnative
    np.testing.assert_array_equal(case.params["hidden"]["W"], arrays["param/hidden/W"])
    np.testing.assert_array_equal(case.data[0], arrays["data/x"])


def test_integer_class_labels_become_one_hot():
    arrays = valid_arrays()
    labels = np.argmax(arrays["data/y"], axis=1).astype(np.int32)
    arrays["data/y"] = labels
    case = load_case(npz_bytes(arrays))
    np.testing.assert_array_equal(case.data[1], np.eye(2)[labels])


def drop(name):
    return lambda a: a.pop(name)


def put(name, value):
    return lambda a: a.__setitem__(name, value(a) if callable(value) else value)


def edit_description(**changes):
    def edit(a):
        d = json.loads(a["case/description"].tobytes())
        layer1 = changes.pop("layer1", {})
        d.update(changes)
        d["layers"][1].update(layer1)
        a["case/description"] = np.frombuffer(json.dumps(d).encode(), dtype=np.uint8)
    return edit


MALFORMED = [
    (drop("case/version"), r"case/version: expected an integer array holding the format version 1, got no such"),
    (put("case/version", np.array([2], np.int32)), r"case/version: expected format version 1, got version 2\. "
                                                   r"This gradcheck reads version 1 only"),
    (put("case/version", np.array([1.0])), r"case/version: expected one integer, got ndarray of dtype float64"),
    (drop("case/description"), r"case/description: expected the network description .* got neither"),
    (put("case/description", np.frombuffer(b"{not json", np.uint8)), r"case/description: expected UTF-8 JSON"
                                                                       r" text, got JSONDecodeError"),
    (put("case/description", np.frombuffer(b"\xff\xfe", np.uint8)), r"got UnicodeDecodeError"),
    (put("case/description", np.zeros((2, 2))), r"case/description: expected UTF-8 JSON text as a 1-D uint8"),
    (edit_description(layer1={"transfer": "sigmoid"}), r"description\.layers\[1\]\.transfer: .* Write 'logistic'"),
    (edit_description(loss="hinge"), r"description\.loss: expected a loss, got unknown loss 'hinge'"),
    (edit_description(dropout=0.5), r"description: expected keys among .* got unknown key 'dropout'"),
    (edit_description(layer1={"inputs": 3}), r"description\.layers\[1\]\.inputs: expected 4 .* layer sizes do not"),
    (drop("param/hidden/W"), r"param/hidden/W: expected an array \(the parameter\), got no such array"),
    (drop("grad/out/b"), r"grad/out/b: expected an array \(the claimed gradient\), got no such array"),
    (drop("data/y"), r"data/y: expected an array \(the targets\), got no such array"),
    (put("param/hidden/W", lambda a: a["param/hidden/W"].T.copy()),
     r"param/hidden/W: expected shape \(3, 4\) under weight_layout 'in-by-out', got shape \(4, 3\), its transpose\."
     r" Transpose it before writing, or set weight_layout to 'out-by-in'"),
    (put("grad/out/W", lambda a: a["grad/out/W"].T.copy()), r"grad/out/W: .* got shape \(2, 4\), its transpose"),
    (put("param/hidden/W", np.zeros((3, 5))), r"param/hidden/W: expected shape \(3, 4\) \(3 inputs, 4 units, "
                                              r"in-by-out\), got shape \(3, 5\)\. Make the array match"),
    (put("grad/hidden/b", np.zeros((6, 4))), r"grad/hidden/b: expected shape \(4,\), got shape \(6, 4\)\. It still"
                                             r" carries a leading batch axis"),
    (put("param/out/b", np.zeros(2, np.int64)), r"param/out/b: expected a float32 or float64 array \(parameter\), "
                                                r"got ndarray of dtype int64 .* Cast to float64"),
    (put("grad/out/W", np.zeros((4, 2), complex)), r"grad/out/W: expected a float32 or float64 array \(claimed "
                                                   r"gradient\), got ndarray of dtype complex128 .* Write the real part only"),
    (put("param/out/W", np.zeros((4, 2), np.float16)), r"param/out/W: .* dtype float16 .* Cast to float32 or float64"),
    (put("param/hidden/b", np.array([0.0, np.nan, 0.0, np.inf])), r"param/hidden/b: expected finite values, got 2"),
    (put("data/x", lambda a: a["data/x"].T.copy()), r"data/x: expected shape \(N, 3\) with N >= 1, got shape"
                                                    r" \(3, 6\)\. It looks like one example per column"),
    (put("data/x", lambda a: np.where(a["data/x"] > 1, np.nan, a["data/x"])), r"data/x: expected finite values"),
    (put("data/x", np.zeros((0, 3))), r"data/x: expected shape \(N, 3\) with N >= 1, got shape \(0, 3\)"),
    (put("data/y", np.zeros((6, 3))), r"data/y: expected shape \(6, 2\), got shape \(6, 3\)"),
    (put("data/y", np.array([0, 1, 2, 0, 1, 0])), r"data/y: expected 6 class labels in 0\.\.1, got 6 labels "
                                                  r"ranging 0\.\.2"),
    (put("param/hiden/W", np.zeros((3, 4))), r"param/hiden/W: expected only the arrays the description names .*"
                                             r" Did you mean 'param/hidden/W'\?"),
    (put("delta/out.a", np.zeros((6, 2))), r"delta/out\.a: .* claim delta/out\.z instead"),
    (put("delta/hidden.z", np.zeros((4, 6))), r"delta/hidden\.z: expected shape \(6, 4\), got shape \(4, 6\)\. It looks like one example per"
                                                  r" column"),
    (put("delta/out.z", np.zeros((6, 3))), r"delta/out\.z: expected shape \(6, 2\), got shape \(6, 3\)\. Write d loss"
                                           r" / d out\.z with one row per example"),
]


@pytest.mark.parametrize("corrupt,message", MALFORMED)
def test_malformed_cases_are_input_errors(corrupt, message):
    arrays = valid_arrays()
    corrupt(arrays)
    with pytest.raises(InputError, match=message):
        load_case(npz_bytes(arrays))


def test_bias_on_a_layer_without_bias_is_named():
    arrays = valid_arrays(bias="none")
    arrays["param/hidden/b"] = np.zeros(4)
    with pytest.raises(InputError, match=r"param/hidden/b: .* The description gives layer 'hidden' no bias"):
        load_case(npz_bytes(arrays))


def one_npy() -> bytes:
    buf = io.BytesIO()
    np.save(buf, np.zeros(3))
    return buf.getvalue()


def pickled_npz() -> bytes:
    buf = io.BytesIO()
    np.savez(buf, **{"param/hidden/W": np.array([None, 1.0], dtype=object)})
    return buf.getvalue()


NOT_NPZ = [
    (b"", r"case: expected a \.npz archive of \.npy arrays \(no pickled objects\), got unreadable data \(EOFError"),
    (b"hello, this is text\n", r"case: expected a \.npz archive \(a zip of \.npy arrays\), got data starting with"
                              r" b'hello,', which is neither a zip archive"),
    (b"\x80\x04K\x01.", r"got data starting with b'\\x80\\x04K\\x01\.', which is neither"),
    (b"PK\x03\x04" + bytes(40), r"got unreadable data \(BadZipFile"),
    (one_npy(), r"case: expected a \.npz archive \(a zip of \.npy arrays\), got a single \.npy array"),
    (pickled_npz(), r"expected a \.npz archive of intact \.npy arrays \(no pickled objects\), got a damaged entry"
                    r" \(ValueError: Object arrays cannot be loaded"),
]


@pytest.mark.parametrize("blob,message", NOT_NPZ)
def test_files_that_are_not_npz_archives(blob, message):
    with pytest.raises(InputError, match=message):
        load_case(blob)


def test_missing_file_and_bad_description_files(tmp_path):
    with pytest.raises(InputError, match=r"nope\.npz: expected an existing \.npz file, got no such file"):
        load_case(tmp_path / "nope.npz")
    blob = npz_bytes(valid_arrays())
    cases = [("net.yaml", "x: 1", r"net\.yaml: expected a file ending in \.json or \.toml, got suffix '\.yaml'"),
             ("net.json", "{'single': quotes}", r"net\.json: expected valid UTF-8 JSON, got JSONDecodeError"),
             ("net.toml", "version = ", r"net\.toml: expected valid UTF-8 TOML, got TOMLDecodeError"),
             ("net.toml", "version = 1\nsizes = [3, 4]\n", r"description: expected keys among .* 'sizes'")]
    for name, text, message in cases:
        (tmp_path / name).write_text(text)
        with pytest.raises(InputError, match=message):
            load_case(blob, description=tmp_path / name)
    with pytest.raises(InputError, match=r"missing\.json: expected a readable file, got FileNotFoundError"):
        load_case(blob, description=tmp_path / "missing.json")


def test_save_case_validates_before_writing(tmp_path):
    net, params, grads, x, y, deltas = make_case()
    target = tmp_path / "bad.npz"
    bad_calls = [
        (dict(params={**params, "hidden": {**params["hidden"], "bias": np.zeros(4)}}),
         r"params hidden: expected a dict with the keys 'W' and \(with bias\) 'b'"),
        (dict(params=[params["hidden"], params["out"]]), r"params: expected a dict \{layer"),
        (dict(grads={**grads, "out": {"W": [[1.0, 2.0], [3.0]], "b": np.zeros(2)}}),
         r"grads out\.W: expected an array, got list"),
        (dict(params={**params, "out": {"W": np.array([None, 1.0], dtype=object), "b": np.zeros(2)}}),
         r"params out\.W: expected a numeric array, got ndarray of dtype object"),
        (dict(x=x.astype(np.int64)), r"data/x: expected a float32 or float64 array \(inputs\), got ndarray of"
                                     r" dtype int64"),
        (dict(deltas=[1, 2]), r"deltas: expected a dict \{probe name: array\}"),
        (dict(deltas={"hidden.q": np.zeros((6, 4))}), r"delta/hidden\.q: expected only the arrays"),
    ]
    for change, message in bad_calls:
        call = dict(params=params, grads=grads, x=x, y=y, description=net, deltas=deltas)
        call.update(change)
        with pytest.raises(InputError, match=message):
            save_case(target, **call)
        assert not target.exists()


VALID_BLOB = npz_bytes(valid_arrays())


@settings(max_examples=200, deadline=None)
@given(st.binary(max_size=600))
def test_random_bytes_are_input_errors(blob):
    with pytest.raises(InputError):
        load_case(blob)


@settings(max_examples=200, deadline=None)
@given(st.integers(0, len(VALID_BLOB) - 1))
def test_truncated_files_are_input_errors(length):
    # A zip's directory sits at its end, so every proper prefix of the archive is unreadable.
    with pytest.raises(InputError):
        load_case(VALID_BLOB[:length])


@settings(max_examples=200, deadline=None)
@given(st.integers(0, len(VALID_BLOB) - 1), st.integers(1, 255))
def test_damaged_bytes_give_a_case_or_an_input_error(position, flip):
    # Some bytes of a zip (timestamps, attributes) are not checked by any reader, so a flipped byte may still
    # load; what must never happen is another kind of exception.
    blob = bytearray(VALID_BLOB)
    blob[position] ^= flip
    try:
        assert isinstance(load_case(bytes(blob)), Case)
    except InputError:
        pass
