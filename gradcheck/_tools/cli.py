"""The command line: ``gradcheck check CASE.npz`` and ``gradcheck demo``.

Exit codes are part of the contract, so a CI step can branch on them:
0 when the gradients hold, 1 when they do not, 2 on unusable input (a malformed
case, a missing file, bad options). The report goes to stdout; progress and
errors go to stderr.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Sequence

from .._core.errors import InputError

__all__ = ["main", "build_parser"]

EXIT_OK, EXIT_WRONG, EXIT_INPUT = 0, 1, 2


def _positive_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a positive number, got {text!r}") from None
    if not value > 0:
        raise argparse.ArgumentTypeError(f"expected a positive number, got {text!r}")
    return value


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a positive whole number, got {text!r}") from None
    if value <= 0:
        raise argparse.ArgumentTypeError(f"expected a positive whole number, got {text!r}")
    return value


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="gradcheck",
        description="Verify hand-written gradients against independent references and diagnose the mistake.",
        epilog="Exit codes: 0 gradients hold, 1 they do not, 2 unusable input.")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    check = sub.add_parser("check", help="check the gradients stored in a case file (see docs/case-format.md)",
                           description="Check the claimed gradients (and deltas) stored in a case file.",
                           epilog="Exit codes: 0 gradients hold, 1 they do not, 2 unusable input.")
    check.add_argument("case", metavar="CASE.npz", help="the case file: parameters, claimed gradients, data")
    check.add_argument("--description", metavar="FILE", help="network description (.toml or .json); "
                       "overrides the one stored in the case")
    check.add_argument("--json", metavar="FILE", help="also write the report as JSON to FILE")
    check.add_argument("--tolerance", type=_positive_float, metavar="X",
                       help="relative tolerance for every tensor (default: by dtype and reference)")
    check.add_argument("--budget", type=_positive_int, metavar="N", help="spend at most N loss evaluations")
    check.add_argument("--no-progress", action="store_true", help="never show a progress bar")
    demo = sub.add_parser("demo", help="run a built-in example with one planted backward-pass mistake",
                          description="Examine a small built-in network whose backward pass has one planted "
                          "mistake, and print the report.")
    demo.add_argument("--json", metavar="FILE", help="also write the report as JSON to FILE")
    return parser


def _write_json(report, path: str | None) -> None:
    if path:
        Path(path).write_text(json.dumps(report.to_dict(), indent=2))


def _check(args: argparse.Namespace) -> int:
    from .._api.examine import examine
    from .._case.file import load_case

    if args.budget is not None:
        import importlib.util

        if importlib.util.find_spec("gradcheck._scale.budgeted") is None:
            raise InputError("--budget: expected a build of gradcheck with budgeted checks, got one without "
                             "gradcheck._scale.budgeted. Reinstall gradcheck.")
    print(f"gradcheck: reading {args.case}", file=sys.stderr)
    case = load_case(args.case, description=args.description)
    options = {}
    if args.budget is not None:
        options["budget"] = args.budget
    if args.no_progress:
        options["progress"] = False
    report = examine(case.loss, case.params, *case.data, grads=case.grads, deltas=case.deltas,
                     tolerance=args.tolerance, title=f"check of {Path(args.case).name}", **options)
    print(report)
    _write_json(report, args.json)
    return EXIT_OK if report.ok else EXIT_WRONG


def _demo(args: argparse.Namespace) -> int:
    from .demo import run_demo

    report = run_demo()
    print(report)
    print("\n(The demo's backward pass has a planted mistake, so the report above is expected to say WRONG.)")
    _write_json(report, args.json)
    return EXIT_OK


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the exit code (the console script exits with it)."""
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse exits 2 on bad usage and 0 on --help
        return int(exc.code or 0)
    try:
        return _check(args) if args.command == "check" else _demo(args)
    except InputError as exc:
        print(f"gradcheck: unusable input: {exc}", file=sys.stderr)
        return EXIT_INPUT
    except OSError as exc:
        print(f"gradcheck: {exc}", file=sys.stderr)
        return EXIT_INPUT


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
