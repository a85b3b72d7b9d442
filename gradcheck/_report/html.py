"""HTML rendering of a report for notebooks and CI artifacts, and matplotlib heat maps.

The colour scale is our own: the per-entry relative error is placed on a log
scale *relative to the tensor's tolerance*, because what matters to the reader is
not the raw error but how far inside or outside its tolerance an entry lies.
Three anchors: deep teal at a millionth of the tolerance or less, pale sand at
the tolerance, vermilion at a thousand times the tolerance or more; entries not
checked are light grey. The HTML heat maps are inline SVG, so they need no
plotting library; :func:`plot_errors` draws the same maps with matplotlib.
"""

from __future__ import annotations

import html
import math
from typing import TYPE_CHECKING, Sequence

import numpy as np

if TYPE_CHECKING:
    from gradcheck._report.results import Report

__all__ = ["error_colour", "render_html", "plot_errors", "ANCHORS"]

ANCHORS = ((-6.0, (0x1b, 0x6f, 0x6a)), (0.0, (0xf2, 0xe6, 0xc4)), (3.0, (0xd9, 0x48, 0x1c)))
"""(log10(error / tolerance), RGB) anchors of the colour scale."""
UNCHECKED = (0xdd, 0xdd, 0xdd)
MAX_CELLS = 24


def error_colour(error: float, tolerance: float) -> tuple[int, int, int]:
    """RGB colour of one entry's relative error on the tolerance-relative log scale.

    Example:
        >>> error_colour(1e-3, 1e-3), error_colour(float("nan"), 1e-3)
        ((242, 230, 196), (221, 221, 221))
    """
    if not math.isfinite(error) and not (isinstance(error, float) and error == math.inf):
        return UNCHECKED
    if error == math.inf:
        return ANCHORS[-1][1]
    x = math.log10(max(error, 1e-300) / tolerance)
    x = min(max(x, ANCHORS[0][0]), ANCHORS[-1][0])
    for (x0, c0), (x1, c1) in zip(ANCHORS[:-1], ANCHORS[1:]):
        if x <= x1:
            w = (x - x0) / (x1 - x0)
            r, g, b = (int(round(lo + w * (hi - lo))) for lo, hi in zip(c0, c1))
            return r, g, b
    return ANCHORS[-1][1]


def _as_grid(errors: np.ndarray) -> np.ndarray:
    """A 2-d view of a tensor's errors, pooled by block maximum to at most MAX_CELLS per side."""
    e = np.asarray(errors, dtype=float)
    if e.size == 0:  # an empty tensor has nothing to check: one grey cell, not a division by zero
        return np.full((1, 1), np.nan)
    if e.ndim == 0:
        e = e.reshape(1, 1)
    elif e.ndim == 1:
        e = e.reshape(1, -1)
    elif e.ndim > 2:
        e = e.reshape(-1, e.shape[-1])
    rows = -(-e.shape[0] // MAX_CELLS)
    cols = -(-e.shape[1] // MAX_CELLS)
    if rows == 1 and cols == 1:
        return e
    out = np.full((-(-e.shape[0] // rows), -(-e.shape[1] // cols)), np.nan)
    for i in range(out.shape[0]):
        for j in range(out.shape[1]):
            block = e[i * rows:(i + 1) * rows, j * cols:(j + 1) * cols]
            finite = block[~np.isnan(block)]
            out[i, j] = np.max(finite) if finite.size else np.nan
    return out


def _svg(errors: np.ndarray, tolerance: float, cell: int = 10) -> str:
    grid = _as_grid(errors)
    h, w = grid.shape
    rects = []
    for i in range(h):
        for j in range(w):
            r, g, b = error_colour(float(grid[i, j]), tolerance)
            rects.append(f'<rect x="{j * cell}" y="{i * cell}" width="{cell}" height="{cell}" '
                         f'fill="rgb({r},{g},{b})"><title>{grid[i, j]:.2e}</title></rect>')
    return (f'<svg xmlns="http://www.w3.org/2000/svg" width="{w * cell}" height="{h * cell}" '
            f'class="gradcheck-map">{"".join(rects)}</svg>')


def render_html(report: Report) -> str:
    """The report as one self-contained HTML fragment."""
    esc = html.escape
    colour = "#1b6f6a" if report.ok else "#d9481c"
    parts = ['<div class="gradcheck-report" style="font-family:sans-serif;font-size:13px">',
             f'<p style="font-weight:bold;color:{colour}">{esc(report.title)}: {esc(report.verdict())}</p>']
    if len(report.findings) > 1:
        parts.append("<ul>" + "".join(f"<li><code>{esc(f.kind)}</code> {esc(f.sentence())}</li>"
                                      for f in report.findings[1:]) + "</ul>")
    parts.append('<table class="gradcheck-layers" style="border-collapse:collapse">'
                 "<tr><th>layer (loss first)</th><th>worst error</th><th>status</th><th>worst tensor</th></tr>")
    for layer in reversed(report.layers):
        status = "ok" if layer.ok else "WRONG"
        parts.append(f"<tr><td>{esc(layer.name)}</td><td>{layer.error:.2e}</td><td>{status}</td>"
                     f"<td>{esc(layer.worst_tensor)}</td></tr>")
    parts.append("</table>")
    parts.append('<div class="gradcheck-maps" style="display:flex;flex-wrap:wrap;gap:12px;margin-top:8px">')
    for t in report.tensors + report.deltas:
        if t.errors is None:
            continue
        parts.append(f'<figure style="margin:0"><figcaption><code>{esc(t.path)}</code> '
                     f'{t.error:.1e}</figcaption>{_svg(t.errors, t.tolerance)}</figure>')
    parts.append("</div>")
    parts.append(f"<p>reference: {esc(report.references.primary)}; loss evaluated {report.evaluations} times. "
                 "Colour: teal far inside the tolerance, sand at it, vermilion beyond; grey not checked.</p>")
    for note in report.notes:
        parts.append(f"<p>note: {esc(note)}</p>")
    parts.append("</div>")
    return "".join(parts)


def plot_errors(report: Report, tensors: Sequence[str] | None = None):
    """Draw one heat map per tensor on the tolerance-relative colour scale; returns the Figure."""
    try:
        import matplotlib.pyplot as plt
        from matplotlib.colors import LinearSegmentedColormap
    except ImportError as exc:  # the optional extra is missing
        from .._core.errors import input_error

        raise input_error("Report.plot", "matplotlib installed", "ImportError",
                          "pip install 'gradcheck[plot]'") from exc
    chosen = [t for t in report.tensors + report.deltas
              if t.errors is not None and (tensors is None or t.path in tensors)]
    lo, hi = ANCHORS[0][0], ANCHORS[-1][0]
    # with_extremes, not set_bad: set_bad warns of its deprecation from matplotlib 3.11 on
    cmap = LinearSegmentedColormap.from_list(
        "gradcheck", [((x - lo) / (hi - lo), tuple(c / 255 for c in rgb)) for x, rgb in ANCHORS]
    ).with_extremes(bad=(UNCHECKED[0] / 255, UNCHECKED[1] / 255, UNCHECKED[2] / 255))
    fig, axes = plt.subplots(1, max(len(chosen), 1), figsize=(3 * max(len(chosen), 1), 3), squeeze=False)
    for ax, t in zip(axes[0], chosen):
        grid = _as_grid(t.errors if t.errors is not None else np.full(t.shape, np.nan))
        with np.errstate(divide="ignore"):
            scaled = np.log10(np.maximum(grid, 1e-300) / t.tolerance)
        image = ax.imshow(np.ma.masked_invalid(np.clip(scaled, lo, hi)), cmap=cmap, vmin=lo, vmax=hi)
        ax.set_title(f"{t.path}\nmax {t.error:.1e}", fontsize=9)
        ax.set_xticks([])
        ax.set_yticks([])
    if chosen:
        fig.colorbar(image, ax=list(axes[0]), label="log10(error / tolerance)", shrink=0.8)
    return fig
