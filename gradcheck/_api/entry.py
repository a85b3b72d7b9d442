"""The wrapper every public entry point wears: one InputError, re-raised with the entry point's name.

An :class:`InputError` from any stage is re-raised here once, prefixed with the entry point's name
(``gradcheck.examine: params hidden.W: expected ...``), so the user sees which call the message belongs to,
and pytest shows the user's call rather than gradcheck's frames.
"""

from __future__ import annotations

import functools
from typing import Any, Callable

from .._core.errors import InputError

__all__ = ["entry_point"]


def entry_point(name: str) -> Callable:
    def wrap(fn: Callable) -> Callable:
        @functools.wraps(fn)
        def inner(*args: Any, **kwargs: Any) -> Any:
            __tracebackhide__ = True  # pytest shows the user's call, not gradcheck's frames
            try:
                return fn(*args, **kwargs)
            except InputError as exc:
                raise InputError(f"gradcheck.{name}: {exc}") from exc.__cause__
        return inner
    return wrap
