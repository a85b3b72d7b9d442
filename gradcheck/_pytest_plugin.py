"""The pytest plugin (registered through the ``pytest11`` entry point).

* A failing :func:`gradcheck.assert_backprop` already carries the whole text
  report as its message; the plugin adds each report examined during a failing
  test as a section of that test's output, so the diagnosis is in CI logs.
* ``--gradcheck-report=DIR`` writes every report examined during the run as JSON
  and HTML files in DIR (one pair per report, named after the test), for CI
  artifacts.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest

from ._listeners import add_listener, remove_listener


def pytest_addoption(parser: pytest.Parser) -> None:
    group = parser.getgroup("gradcheck")
    group.addoption("--gradcheck-report", action="store", default=None, metavar="DIR",
                    help="write every gradcheck report examined by the tests as JSON and HTML into DIR")


def _safe(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", name).strip("_")[:120] or "report"


@pytest.hookimpl(hookwrapper=True)
def pytest_runtest_call(item: pytest.Item):
    reports: list = []
    add_listener(reports.append)
    try:
        outcome = yield
    finally:
        remove_listener(reports.append)
    folder = item.config.getoption("--gradcheck-report")
    if folder:
        out = Path(folder)
        out.mkdir(parents=True, exist_ok=True)
        for i, report in enumerate(reports):
            stem = _safe(item.nodeid) + (f"-{i}" if len(reports) > 1 else "")
            (out / f"{stem}.json").write_text(json.dumps(report.to_dict(), indent=2))
            (out / f"{stem}.html").write_text(report.to_html())
    if outcome.excinfo is not None:
        for i, report in enumerate(reports):
            item.add_report_section("call", f"gradcheck report {i + 1}", str(report))
