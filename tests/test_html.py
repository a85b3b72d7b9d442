"""The HTML rendering of a report, its heat maps with matplotlib, and the page as a real headless browser draws it.

The reports come from real checks of a small network of ours (3-4-2, tanh hidden layer, half squared error) with a
correct backward pass and with planted mistakes; what is tested here is how they are shown: the verdict and first
finding, a layer-table row per layer, one SVG heat map per tensor on the tolerance-relative colour scale, escaping,
and that Chromium actually paints the verdict colours.
"""

from __future__ import annotations

import html
import math
import os
import shutil
import subprocess
import xml.etree.ElementTree as ET
from pathlib import Path

import matplotlib

matplotlib.use("Agg")  # no display: draw into memory

import matplotlib.image  # noqa: E402
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pytest  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

import gradcheck  # noqa: E402
from gradcheck._report.html import ANCHORS, UNCHECKED, error_colour  # noqa: E402

SVG = "{http://www.w3.org/2000/svg}"
VERMILION, SAND, TEAL = ANCHORS[-1][1], ANCHORS[1][1], ANCHORS[0][1]


def small_net(hidden_name: str = "hidden"):
    rng = np.random.default_rng(11)
    params = {hidden_name: {"W": rng.standard_normal((3, 4)), "b": 0.1 * rng.standard_normal(4)},
              "out": {"W": rng.standard_normal((4, 2)), "b": np.zeros(2)}}
    x, y = rng.standard_normal((5, 3)), rng.standard_normal((5, 2))

    def loss(p, x, y, xp=np, probe=lambda name, v: v):
        z = probe(f"{hidden_name}.z", x @ p[hidden_name]["W"] + p[hidden_name]["b"])
        a = probe(f"{hidden_name}.a", xp.tanh(z))
        return 0.5 * xp.sum((a @ p["out"]["W"] + p["out"]["b"] - y) ** 2) / x.shape[0]

    def backward(p, x, y, mistake=None):
        a = np.tanh(x @ p[hidden_name]["W"] + p[hidden_name]["b"])
        d_out = (a @ p["out"]["W"] + p["out"]["b"] - y) / x.shape[0]
        d_a = d_out @ p["out"]["W"].T
        d_z = d_a if mistake == "forget-derivative" else d_a * (1 - a ** 2)
        grads = {hidden_name: {"W": x.T @ d_z, "b": d_z.sum(axis=0)}, "out": {"W": a.T @ d_out, "b": d_out.sum(0)}}
        if mistake == "sign":
            grads["out"]["W"] = -grads["out"]["W"]
        return grads, {f"{hidden_name}.z": d_z, f"{hidden_name}.a": d_a}

    return loss, backward, params, x, y


def make_report(case: str):
    hidden = "enc<1>&co" if case == "escaping" else "hidden"
    loss, backward, params, x, y = small_net(hidden)
    mistake = {"correct": None, "sign": "sign", "escaping": "sign", "deltas": "forget-derivative"}[case]
    grads, deltas = backward(params, x, y, mistake)
    return gradcheck.examine(loss, params, x, y, grads=grads, deltas=deltas if case == "deltas" else None,
                             title="<b>html</b> check" if case == "escaping" else "html check")


CASES = ("correct", "sign", "escaping", "deltas")


@pytest.fixture(scope="module")
def reports():
    return {case: make_report(case) for case in CASES}


def parse(report) -> ET.Element:
    # the fragment is written as well-formed XHTML, so it embeds in any page and the XML parser reads it here
    return ET.fromstring(report.to_html())


@pytest.mark.parametrize("case, verdict, colour", [
    ("correct", "OK:", "#1b6f6a"), ("sign", "WRONG:", "#d9481c"), ("deltas", "WRONG:", "#d9481c")])
def test_verdict_comes_first_in_its_colour(reports, case, verdict, colour):
    root = parse(reports[case])
    first = root[0]
    assert first.tag == "p" and f"color:{colour}" in first.get("style")
    assert first.text == f"html check: {reports[case].verdict()}" and verdict in first.text


@pytest.mark.parametrize("case, kind, where", [("sign", "sign-flip", "out.W"),
                                               ("deltas", "missing-transfer-derivative", "hidden.z")])
def test_first_finding_is_in_the_verdict_line_and_the_rest_are_listed(reports, case, kind, where):
    report = reports[case]
    assert (report.findings[0].kind, report.findings[0].where) == (kind, where)
    root = parse(report)
    assert report.findings[0].sentence() in root[0].text
    listed = ["".join(li.itertext()) for li in root.iter("li")]
    assert listed == [f"{f.kind} {f.sentence()}" for f in report.findings[1:]]


@pytest.mark.parametrize("case", CASES)
def test_one_layer_row_per_layer_from_the_loss_backwards(reports, case):
    report = reports[case]
    table = parse(report).find("table[@class='gradcheck-layers']")
    rows = [[cell.text for cell in tr] for tr in table.iter("tr")]
    assert rows[0] == ["layer (loss first)", "worst error", "status", "worst tensor"]
    assert [r[0] for r in rows[1:]] == [layer.name for layer in reversed(report.layers)]
    assert [r[2] for r in rows[1:]] == ["ok" if layer.ok else "WRONG" for layer in reversed(report.layers)]
    assert [r[3] for r in rows[1:]] == [layer.worst_tensor for layer in reversed(report.layers)]


@pytest.mark.parametrize("case", CASES)
def test_one_heat_map_per_tensor_with_a_cell_per_entry(reports, case):
    report = reports[case]
    root = parse(report)
    figures = list(root.iter("figure"))
    shown = list(report.tensors + report.deltas)
    assert len(figures) == len(shown) == len(list(root.iter(f"{SVG}svg")))
    for fig, t in zip(figures, shown):
        assert fig.find("figcaption/code").text == t.path
        rects = list(fig.iter(f"{SVG}rect"))
        assert len(rects) == max(t.size, 1)  # small tensors are drawn entry by entry, row-major
        fills = [r.get("fill") for r in rects]
        expected = [error_colour(float(e), t.tolerance) for e in np.asarray(t.errors).reshape(-1)]
        assert fills == [f"rgb({r},{g},{b})" for r, g, b in expected]


def test_wrong_tensor_is_vermilion_and_right_one_teal(reports):
    root = parse(reports["sign"])
    fills = {fig.find("figcaption/code").text: {r.get("fill") for r in fig.iter(f"{SVG}rect")}
             for fig in root.iter("figure")}
    assert fills["out.W"] == {"rgb(217,72,28)"}  # a sign flip: every entry 100 % off, far beyond 1e-6
    assert fills["hidden.W"] == {"rgb(27,111,106)"}  # exact to rounding: a millionth of the tolerance or less


def test_tensor_path_and_title_are_escaped(reports):
    text = reports["escaping"].to_html()
    assert "<b>" not in text and "enc<1>" not in text and "&lt;b&gt;html&lt;/b&gt;" in text
    assert html.escape("enc<1>&co.W") in text
    root = parse(reports["escaping"])  # would raise on a stray '<' or '&'
    assert "enc<1>&co.W" in [c.text for c in root.iter("code")]
    assert "enc<1>&co" in [td.text for td in root.iter("td")]


@pytest.mark.parametrize("ratio, colour", [
    (1e-9, TEAL), (1e-6, TEAL), (1.0, SAND), (1e3, VERMILION), (1e7, VERMILION), (math.inf, VERMILION),
    (math.nan, UNCHECKED)])
def test_colour_scale_anchors(ratio, colour):
    # the scale documented in _html.py: teal at 1e-6 x tolerance or less, sand at it, vermilion at 1e3 x or more
    assert error_colour(ratio * 1e-6, 1e-6) == colour


@pytest.mark.parametrize("ratio, low, high, weight", [(1e-3, TEAL, SAND, 0.5), (10 ** 1.5, SAND, VERMILION, 0.5),
                                                     (1e-4, TEAL, SAND, 2 / 6)])
def test_colour_scale_is_linear_in_log_error_between_anchors(ratio, low, high, weight):
    got = error_colour(ratio * 1e-3, 1e-3)
    np.testing.assert_allclose(got, [a + weight * (b - a) for a, b in zip(low, high)], atol=0.51)


def test_empty_tensor_renders_as_one_unchecked_cell():
    def loss(p, x):
        return float(np.sum((x @ p["W"]) ** 2) + np.sum(p["unused"]))

    x, w = np.array([[1.0, 2.0]]), np.array([[0.5], [-1.0]])
    report = gradcheck.examine(loss, {"W": w, "unused": np.zeros(0)}, x,
                               grads={"W": 2 * x.T @ (x @ w), "unused": np.zeros(0)})
    rects = [fig for fig in parse(report).iter("figure") if fig.find("figcaption/code").text == "unused"][0]
    assert [r.get("fill") for r in rects.iter(f"{SVG}rect")] == ["rgb(221,221,221)"]
    fig = report.plot()
    try:
        assert sum(len(ax.images) for ax in fig.axes) == 2
    finally:
        plt.close(fig)


@pytest.mark.parametrize("case, chosen", [("sign", None), ("deltas", None), ("deltas", ["out.W", "hidden.z"])])
def test_plot_draws_one_image_per_tensor(reports, case, chosen):
    report = reports[case]
    fig = report.plot(chosen)
    try:
        assert isinstance(fig, Figure)
        images = [image for ax in fig.axes for image in ax.images]
        shown = [t for t in report.tensors + report.deltas if chosen is None or t.path in chosen]
        assert len(images) == len(shown)
        titles = [ax.get_title().split("\n")[0] for ax in fig.axes if ax.images]
        assert titles == [t.path for t in shown]
        for image, t in zip(images, shown):
            data = np.ma.getdata(image.get_array())
            expected = np.clip(np.log10(np.maximum(np.asarray(t.errors, float), 1e-300) / t.tolerance), -6, 3)
            np.testing.assert_allclose(data.reshape(-1), expected.reshape(-1), rtol=1e-12)
    finally:
        plt.close(fig)


# --- a real browser ------------------------------------------------------------------------------------------

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
WINDOW = (1000, 700)


@pytest.fixture
def artifacts(tmp_path) -> Path:
    """Where screenshots are kept: $GRADCHECK_ARTIFACTS (for CI to upload), else pytest's tmp_path."""
    folder = os.environ.get("GRADCHECK_ARTIFACTS")
    if not folder:
        return tmp_path
    path = Path(folder)
    path.mkdir(parents=True, exist_ok=True)
    return path


def screenshot(page: Path, png: Path, profile: Path) -> subprocess.CompletedProcess:
    args = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
            "--disable-background-networking", "--disable-component-update", "--disable-sync",
            "--disable-dev-shm-usage", f"--user-data-dir={profile}", f"--screenshot={png}",
            f"--window-size={WINDOW[0]},{WINDOW[1]}", page.as_uri()]
    return subprocess.run(args, capture_output=True, text=True, timeout=180)


def solid_squares(rgb: np.ndarray, colour: tuple[int, int, int], side: int = 8, within: int = 3) -> int:
    """How many side x side squares of the image are entirely ``colour`` (within a few levels).

    A heat-map cell is a 10 x 10 square; the verdict line's text in the same colour has strokes far thinner than 8
    pixels, so a solid square is a painted heat map, not the text.
    """
    near = np.all(np.abs(rgb - np.array(colour)) <= within, axis=-1).astype(int)
    summed = np.pad(near.cumsum(0).cumsum(1), ((1, 0), (1, 0)))
    windows = summed[side:, side:] - summed[:-side, side:] - summed[side:, :-side] + summed[:-side, :-side]
    return int(np.sum(windows == side * side))


@pytest.mark.skipif(CHROMIUM is None, reason="headless Chromium is not installed (Debian package `chromium`); "
                                             "the HTML structure tests above check the markup without a browser")
@pytest.mark.parametrize("case, present, absent", [("sign", VERMILION, None), ("correct", TEAL, VERMILION)])
def test_headless_chromium_paints_the_verdict_colours(reports, artifacts, tmp_path, case, present, absent):
    page = artifacts / f"report-{case}.html"
    page.write_text('<!DOCTYPE html>\n<html><head><meta charset="utf-8"><title>gradcheck report</title></head>'
                    f'<body style="background:#ffffff;margin:8px">{reports[case].to_html()}</body></html>\n',
                    encoding="utf-8")
    png = artifacts / f"report-{case}.png"
    png.unlink(missing_ok=True)
    done = screenshot(page, png, tmp_path / "chromium-profile")
    assert done.returncode == 0 and png.exists(), f"chromium failed ({done.returncode}):\n{done.stderr[-2000:]}"
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    image = matplotlib.image.imread(png)
    assert image.shape[:2] == (WINDOW[1], WINDOW[0])
    rgb = np.round(image[..., :3] * 255).astype(int)
    assert len(np.unique(rgb.reshape(-1, 3), axis=0)) > 10, "the screenshot is blank"
    assert solid_squares(rgb, present) > 0, "no heat-map cell in the verdict's colour was painted"
    if absent is not None:
        assert solid_squares(rgb, absent) == 0
