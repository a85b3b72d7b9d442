"""A small text progress bar for long checks, written to stderr only when stderr is a terminal.

An entry-by-entry check of a large network spends minutes in loss evaluations,
and a user watching a terminal should see that it is moving. Nothing is ever
written when the stream is not a terminal (pipes, CI logs, notebooks capture
stderr into cells where a carriage-return bar is noise), nor when the caller
passes ``progress=False``. With ``progress=None`` (the default) the bar appears
only once the check has run for :data:`DELAY` seconds, so short checks stay
silent; ``progress=True`` shows it from the start.

The bar is updated from the evaluation loops, so :meth:`ProgressBar.advance`
must cost next to nothing: it adds to a counter and looks at the clock only
every ``stride`` evaluations.
"""

from __future__ import annotations

import sys
import time
from typing import Any, Callable, TextIO

__all__ = ["ProgressBar", "open_bar", "DELAY"]

DELAY = 1.0
"""Seconds a check must have run before the default (``progress=None``) bar appears."""

REFRESH = 0.1
"""Seconds between redraws: ten a second is smooth to the eye and cheap for the loop."""

WIDTH = 28
"""Characters in the bar itself."""


def _is_terminal(stream: Any) -> bool:
    try:
        return bool(stream.isatty())
    except (AttributeError, ValueError):  # no isatty, or a closed stream
        return False


class ProgressBar:
    """Counts loss evaluations and redraws one line on a terminal.

    Args:
        total: the number of evaluations expected (the bar copes with more).
        label: the words in front of the bar, e.g. ``central differences``.
        enabled: whether to draw at all (decided by :func:`open_bar`).
        delay: seconds to wait before the first draw.
        stream: where to draw (stderr by default).

    Example:
        >>> import io
        >>> bar = ProgressBar(10, "demo", enabled=False, stream=io.StringIO())
        >>> bar.advance(4); bar.close(); bar.done
        4
    """

    def __init__(self, total: int, label: str, enabled: bool, delay: float = 0.0, stream: TextIO | None = None):
        self.total = max(int(total), 1)
        self.label = label
        self.enabled = enabled
        self.stream = stream if stream is not None else sys.stderr
        self.done = 0
        self.drawn = False
        self.start = time.monotonic()
        self._show_after = self.start + delay
        self._last = 0.0
        self._width = 0
        self._stride = max(1, self.total // 2000)
        self._next = self._stride

    @property
    def callback(self) -> Callable[[int], None] | None:
        """``advance`` when the bar is enabled, else None (so loops skip the call altogether)."""
        return self.advance if self.enabled else None

    def advance(self, n: int = 1) -> None:
        """Record ``n`` more evaluations; redraw when enough time has passed."""
        self.done += n
        if self.enabled and self.done >= self._next:
            self._next = self.done + self._stride
            now = time.monotonic()
            if now >= self._show_after and now - self._last >= REFRESH:
                self._draw(now)

    def grow(self, extra: int) -> None:
        """Raise the expected total (an adaptive search found more work to do)."""
        self.total += max(int(extra), 0)

    def _draw(self, now: float) -> None:
        self._last = now
        frac = min(self.done / self.total, 1.0)
        filled = int(round(frac * WIDTH))
        elapsed = now - self.start
        eta = elapsed * (1.0 - frac) / frac if frac > 0 else float("nan")
        eta_text = f", {eta:.0f}s left" if frac < 1.0 and eta == eta else ""
        line = (f"\r{self.label} [{'#' * filled}{'.' * (WIDTH - filled)}] {self.done}/{self.total} "
                f"evaluations {100 * frac:3.0f}% ({elapsed:.0f}s{eta_text})")
        self._width = max(self._width, len(line))
        self.stream.write(line.ljust(self._width))  # blanks over the rest of a longer earlier line
        self.stream.flush()
        self.drawn = True

    def close(self) -> None:
        """Draw the final state (the work is done, so it is 100%) and end the line, if anything was drawn."""
        if self.enabled and self.drawn:
            self.total = max(self.done, 1)
            self._draw(time.monotonic())
            self.stream.write("\n")
            self.stream.flush()

    def __enter__(self) -> "ProgressBar":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()


def open_bar(progress: bool | None, total: int, label: str, stream: TextIO | None = None) -> ProgressBar:
    """A bar for ``total`` evaluations, enabled only on a terminal and when ``progress`` is not False.

    Example:
        >>> import io
        >>> open_bar(True, 100, "x", stream=io.StringIO()).enabled  # a StringIO is not a terminal
        False
    """
    stream = stream if stream is not None else sys.stderr
    enabled = progress is not False and _is_terminal(stream)
    return ProgressBar(total, label, enabled, delay=0.0 if progress else DELAY, stream=stream)
