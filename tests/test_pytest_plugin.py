"""The pytest plugin, run the way users meet it: a test file with assert_backprop, run by pytest in a subprocess.

Subprocess runs keep the inner session's reports apart from this session's own plugin (whose listener would
otherwise see them, and write them under this test's name when this session runs with --gradcheck-report).
"""

from __future__ import annotations

import html
import json

import jax  # noqa: F401  (see below)
import numpy as np
import pytest

import gradcheck

# jax is imported here, before any pytester fixture exists: pytester snapshots sys.modules and, after each test,
# removes the modules first imported during it; jaxlib's compiled extension cannot be imported a second time in one
# process (it aborts), which the next test module to use autodiff would do.

pytest_plugins = ["pytester"]

# A network of ours for planted-mistake tests: one tanh layer, half squared error summed over the batch; the
# planted mistake forgets the tanh derivative in the delta.
INNER = '''
import numpy as np
import pytest

import gradcheck

X = np.array([[0.2, -0.4, 0.9], [1.1, 0.3, -0.7], [-0.6, 0.5, 0.1]])
Y = np.array([[0.5, -0.1], [0.0, 0.3], [-0.2, 0.4]])
P = {"layer": {"W": np.array([[0.3, -0.2], [0.8, 0.1], [-0.5, 0.6]])}}


def loss(p, x, y, xp=np):
    return 0.5 * xp.sum((xp.tanh(x @ p["layer"]["W"]) - y) ** 2)


def backward(p, x, y, forget=False):
    a = np.tanh(x @ p["layer"]["W"])
    delta = (a - y) if forget else (a - y) * (1 - a ** 2)
    return {"layer": {"W": x.T @ delta}}


def test_wrong_backward():
    gradcheck.assert_backprop(loss, P, X, Y, grads=backward(P, X, Y, forget=True), title="inner")


def test_right_backward():
    gradcheck.assert_backprop(loss, P, X, Y, grads=backward(P, X, Y), title="inner")


@pytest.mark.parametrize("scale", [0.5])
def test_two_checks(scale):
    for forget in (False, True):
        gradcheck.examine(loss, P, scale * X, Y, grads=backward(P, scale * X, Y, forget), title="inner \u00b0C")


@pytest.fixture
def checked_in_a_fixture():
    return gradcheck.examine(loss, P, 2 * X, Y, grads=backward(P, 2 * X, Y, forget=True), title="inner")


def test_report_from_a_fixture(checked_in_a_fixture, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)  # the report folder stays where pytest started
    assert checked_in_a_fixture.ok


def test_something_else_announced():
    from gradcheck._report.listeners import announce

    assert announce("not a report") == "not a report"  # nothing to write, and no error at teardown
'''

WRONG, RIGHT, TWO, FIXTURE = ("test_inner.py_test_wrong_backward", "test_inner.py_test_right_backward",
                              "test_inner.py_test_two_checks_0.5", "test_inner.py_test_report_from_a_fixture")


@pytest.fixture(scope="module")
def expected() -> dict[str, dict]:
    """The same checks made here, as the JSON the plugin should have written for them."""
    space: dict = {}
    exec(compile(INNER, "test_inner.py", "exec"), space)
    loss, backward, params, x, y = space["loss"], space["backward"], space["P"], space["X"], space["Y"]

    def check(scale, forget, title="inner"):
        report = gradcheck.examine(loss, params, scale * x, y, grads=backward(params, scale * x, y, forget),
                                   title=title)
        return json.loads(json.dumps(report.to_dict()))

    return {WRONG: check(1.0, True), RIGHT: check(1.0, False), f"{TWO}-0": check(0.5, False, "inner \u00b0C"),
            f"{TWO}-1": check(0.5, True, "inner \u00b0C"), FIXTURE: check(2.0, True)}


def assert_same_report(got, want, where="report"):
    """Equal JSON, numbers compared to 1e-9 relative (the two processes compute them independently)."""
    if isinstance(want, dict):
        assert isinstance(got, dict) and sorted(got) == sorted(want), where
        for key in want:
            assert_same_report(got[key], want[key], f"{where}.{key}")
    elif isinstance(want, list):
        assert isinstance(got, list) and len(got) == len(want), where
        for i, (g, w) in enumerate(zip(got, want)):
            assert_same_report(g, w, f"{where}[{i}]")
    elif isinstance(want, float) and not isinstance(got, bool):
        np.testing.assert_allclose(got, want, rtol=1e-9, atol=1e-300, err_msg=where)
    else:
        assert got == want, where


@pytest.fixture
def inner(pytester: pytest.Pytester) -> pytest.Pytester:
    # the inner session is as strict as ours: any warning from gradcheck or the plugin fails it
    pytester.makeini("[pytest]\nfilterwarnings =\n    error\n")
    pytester.makepyfile(test_inner=INNER)
    return pytester


def test_failing_check_shows_the_whole_diagnosis_and_nothing_is_written(inner):
    result = inner.runpytest_subprocess("-p", "no:cacheprovider", "-rP")  # -rP: passing tests' sections too
    result.assert_outcomes(failed=2, passed=3)
    # a section comes after its traceback; the lines matched after its header are the section's own
    section = ["*Captured gradcheck report 1 call*", "inner: WRONG: *", "layers, from the loss backwards:",
               "*layer*WRONG*", "reference: *"]
    result.stdout.fnmatch_lines(["*_ test_wrong_backward _*", *section, "*_ test_report_from_a_fixture _*",
                                 "*checked_in_a_fixture.ok*", *section])
    # only the failing tests have sections: the assertion on a fixture's report gets the report it asserts on
    assert result.stdout.str().count("Captured gradcheck report") == 2
    written = sorted(p.name for p in inner.path.rglob("*") if p.suffix in (".json", ".html"))
    assert written == []


def test_report_option_writes_json_and_html_per_report_named_after_the_test(expected, inner):
    folder = inner.path / "artifacts" / "gradcheck"
    result = inner.runpytest_subprocess("-p", "no:cacheprovider", "--gradcheck-report=artifacts/gradcheck")
    result.assert_outcomes(failed=2, passed=3)
    assert sorted(p.name for p in folder.iterdir()) == sorted(f"{stem}.{ext}" for stem in expected
                                                               for ext in ("json", "html"))
    for stem, want in expected.items():
        got = json.loads((folder / f"{stem}.json").read_text(encoding="utf-8"))
        assert_same_report(got, want, stem)
        page = (folder / f"{stem}.html").read_text(encoding="utf-8")
        assert page.startswith('<!DOCTYPE html>\n<html><head><meta charset="utf-8">')
        assert '<div class="gradcheck-report"' in page and ("WRONG:" in page) == (not want["ok"])
        assert html.escape(f"{want['title']}: {'OK' if want['ok'] else 'WRONG'}:", quote=True) in page
    wrong, right = expected[WRONG], expected[RIGHT]
    assert wrong["ok"] is False and wrong["findings"] and wrong["worst_layer"] == "layer"
    assert {"kind", "layer", "where", "detail", "factor"} <= set(wrong["findings"][0])
    assert right["ok"] is True and right["findings"] == []
    assert [expected[f"{TWO}-{i}"]["ok"] for i in (0, 1)] == [True, False]  # in the order they were examined
    # nothing landed anywhere else (the chdir-ing test's tmp_path is under the inner session's basetemp, in here)
    assert {p.parent for p in inner.path.rglob("*.json")} == {folder}


def test_option_is_documented_in_pytest_help(inner):
    result = inner.runpytest_subprocess("--help")
    result.stdout.fnmatch_lines(["*gradcheck:*", "*--gradcheck-report=DIR*"])
