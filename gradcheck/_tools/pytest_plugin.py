"""The pytest plugin (registered through the ``pytest11`` entry point).

* A failing :func:`gradcheck.assert_backprop` already carries the whole text
  report as its message; the plugin adds each report examined during a failing
  test (in its fixtures or its body) as a section of that test's output, so the
  diagnosis is in CI logs.
* ``--gradcheck-report=DIR`` writes every report examined during the run as JSON
  and HTML files in DIR (one pair per report, named after the test, written when
  the test's teardown is done), for CI artifacts.
"""

from __future__ import annotations

import html
import json
import re

import pytest

from .._report.listeners import add_listener, remove_listener
from .._report.results import Report


def pytest_addoption(parser: pytest.Parser) -> None:
    group = parser.getgroup("gradcheck")
    group.addoption("--gradcheck-report", action="store", default=None, metavar="DIR",
                    help="write every gradcheck report examined by the tests as JSON and HTML into DIR")


def _safe(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", name).strip("_")[:120] or "report"


_REPORTS = pytest.StashKey[list[Report]]()


def _listen(item: pytest.Item):
    """Collect the reports examined while one phase of ``item`` runs (a generator for the hookwrappers)."""
    reports = item.stash.setdefault(_REPORTS, [])

    def keep(report: object) -> None:
        if isinstance(report, Report):  # anything else announced (a test of the listeners) is not ours to write
            reports.append(report)

    add_listener(keep)
    try:
        outcome = yield
    finally:
        remove_listener(keep)
    return outcome


# Setup and teardown are listened to as well as the call: a report made once in a fixture and asserted on by the
# tests is part of the run too (a module-scoped fixture's reports go with the first test that set it up).
@pytest.hookimpl(hookwrapper=True)
def pytest_runtest_setup(item: pytest.Item):
    yield from _listen(item)


@pytest.hookimpl(hookwrapper=True)
def pytest_runtest_call(item: pytest.Item):
    outcome = yield from _listen(item)
    if outcome.excinfo is not None:
        stored: list[Report] = item.stash[_REPORTS]
        for i, report in enumerate(stored):
            item.add_report_section("call", f"gradcheck report {i + 1}", str(report))


@pytest.hookimpl(hookwrapper=True)
def pytest_runtest_teardown(item: pytest.Item):
    yield from _listen(item)
    reports = item.stash.get(_REPORTS, [])
    item.stash[_REPORTS] = []  # items live as long as the session; their reports need not
    folder = item.config.getoption("--gradcheck-report")
    if folder and reports:
        out = item.config.invocation_params.dir / folder  # relative to where pytest started, not a test's chdir
        out.mkdir(parents=True, exist_ok=True)
        for i, report in enumerate(reports):
            stem = _safe(item.nodeid) + (f"-{i}" if len(reports) > 1 else "")
            (out / f"{stem}.json").write_text(json.dumps(report.to_dict(), indent=2), encoding="utf-8")
            (out / f"{stem}.html").write_text(_page(report), encoding="utf-8")


def _page(report: Report) -> str:
    """A whole HTML page around the report: a bare fragment opened from disk has no declared encoding, and
    browsers then guess, garbling any non-ASCII title or tensor name."""
    return (f'<!DOCTYPE html>\n<html><head><meta charset="utf-8"><title>{html.escape(report.title)}</title></head>'
            f"<body>{report.to_html()}</body></html>\n")
