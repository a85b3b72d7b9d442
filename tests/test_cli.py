"""The command line: exit codes, JSON output, help, and the demo."""

from __future__ import annotations

import json
import re
import subprocess
import sys

import numpy as np
import pytest

import gradcheck
from gradcheck._tools.cli import main


def write_case(folder, mistake=None):
    net = gradcheck.describe_network(3, [("hidden", 4, "tanh"), ("out", 2, "identity")],
                                     loss="half-squared-error", batch="mean")
    rng = np.random.default_rng(0)
    params = {"hidden": {"W": rng.standard_normal((3, 4)), "b": rng.standard_normal(4)},
              "out": {"W": rng.standard_normal((4, 2)), "b": rng.standard_normal(2)}}
    x, y = rng.standard_normal((5, 3)), rng.standard_normal((5, 2))
    grads = gradcheck.reference(gradcheck.NetworkLoss(net), params, x, y, method="autodiff")
    if mistake == "sign":
        grads["hidden"]["W"] = -grads["hidden"]["W"]
    path = folder / f"case-{mistake}.npz"
    gradcheck.save_case(path, params, grads, x, y, net)
    return path


@pytest.mark.parametrize("mistake, code, verdict", [(None, 0, "OK"), ("sign", 1, "WRONG")])
def test_check_exit_code_and_json(tmp_path, capsys, mistake, code, verdict):
    case = write_case(tmp_path, mistake)
    out_json = tmp_path / "report.json"
    assert main(["check", str(case), "--json", str(out_json), "--no-progress"]) == code
    printed = capsys.readouterr()
    assert f": {verdict}" in printed.out.splitlines()[0]
    data = json.loads(out_json.read_text())
    assert data["ok"] is (code == 0)
    if mistake:
        assert data["findings"][0]["kind"] == "sign-flip" and data["worst_layer"] == "hidden"


@pytest.mark.parametrize("argv, message", [
    (["check", "no-such-file.npz"], r"No such file|no-such-file\.npz"),
    (["check", "CASE", "--tolerance", "-1"], r"expected a positive number, got '-1'"),
])
def test_unusable_input_exits_two(tmp_path, capsys, argv, message):
    argv = [str(tmp_path / a) if a == "no-such-file.npz" else a for a in argv]
    assert main(argv) == 2
    assert re.search(message, capsys.readouterr().err)


def test_malformed_case_exits_two(tmp_path, capsys):
    bad = tmp_path / "bad.npz"
    bad.write_bytes(b"certainly not a zip archive")
    assert main(["check", str(bad)]) == 2
    assert "unusable input" in capsys.readouterr().err


@pytest.mark.parametrize("argv", [["--help"], ["check", "--help"], ["demo", "--help"]])
def test_help_on_every_command(capsys, argv):
    assert main(argv) == 0
    assert "usage: gradcheck" in capsys.readouterr().out


def test_demo_console_script_runs_and_diagnoses():
    done = subprocess.run([sys.executable, "-m", "gradcheck._tools.cli", "demo"], capture_output=True, text=True,
                          timeout=120)
    assert done.returncode == 0, done.stderr
    first = done.stdout.splitlines()[0]
    assert "WRONG: hidden.z: the delta lacks the logistic derivative" in first
