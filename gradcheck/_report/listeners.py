"""A tiny registry of callbacks told about every finished report (used by the pytest plugin).

Kept separate so the entry points need not know who listens: a listener is any
callable ``listener(report)``; exceptions inside listeners propagate, since a
listener that fails silently would lose reports without anyone noticing.
"""

from __future__ import annotations

from typing import Any, Callable

_LISTENERS: list[Callable[[Any], None]] = []


def add_listener(fn: Callable[[Any], None]) -> None:
    """Register ``fn`` to be called with every report that :func:`gradcheck.examine` returns."""
    _LISTENERS.append(fn)


def remove_listener(fn: Callable[[Any], None]) -> None:
    """Unregister ``fn`` (no error when it was not registered)."""
    if fn in _LISTENERS:
        _LISTENERS.remove(fn)


def announce(report: Any) -> Any:
    """Tell every listener about ``report`` and return it unchanged.

    Example:
        >>> seen = []
        >>> add_listener(seen.append); announce("a report"); remove_listener(seen.append)
        'a report'
        >>> seen
        ['a report']
    """
    for fn in list(_LISTENERS):
        fn(report)
    return report
