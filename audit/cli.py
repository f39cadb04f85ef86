"""Command line: arguments -> settings -> run -> exit code. No maths and no rendering here.

Exit status (DESIGN.md section 7):

* 0 — the input was audited (invalid rows do not change this);
* 1 — a flag at or above ``--fail-on`` was raised;
* 2 — the input or the configuration could not be used (unreadable file, no header, no
  ``study_id``/``design`` column, bad rules file or option);
* 3 — an internal error (a bug: please report it with the output of ``--debug``).
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from pathlib import Path

from audit import __version__
from audit.errors import AuditError

__all__ = ["main"]

SEVERITIES = ("note", "warning", "serious")
EXIT_OK, EXIT_FLAGGED, EXIT_UNUSABLE, EXIT_INTERNAL = 0, 1, 2, 3


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="study-audit",
        description="Audit what completed studies could and could not detect.",
    )
    parser.add_argument("--version", action="version", version=f"study-audit {__version__}")
    parser.add_argument(
        "--debug", action="store_true", help="show the full traceback of an internal error"
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    check = sub.add_parser("check", help="audit a portfolio file (.xlsx, .csv, .tsv)")
    check.add_argument("file", type=Path, help="the portfolio: one row per study")
    _add_check_options(check)

    demo = sub.add_parser("demo", help="run the whole audit on the bundled demo portfolio")
    demo.add_argument(
        "--out",
        type=Path,
        default=Path("study-audit-demo"),
        help="folder for the exports (default: ./study-audit-demo)",
    )
    demo.add_argument("--quiet", action="store_true", help="write the exports only")
    for p in (check, demo):
        p.add_argument(
            "--debug", action="store_true", default=argparse.SUPPRESS, help=argparse.SUPPRESS
        )
    return parser


def _add_check_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--sheet", help="worksheet to read (default: the first)")
    p.add_argument(
        "--fail-on",
        choices=SEVERITIES,
        help="exit with status 1 when a flag of this severity or above is raised",
    )
    p.add_argument("--json", metavar="OUT", help="write the JSON document ('-' for stdout)")
    p.add_argument("--csv", metavar="OUT", help="write the per-study table as CSV ('-' for stdout)")
    p.add_argument("--quiet", action="store_true", help="write the exports only, no report")


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit status."""
    parser = _parser()
    args = parser.parse_args(argv)
    try:
        if args.command == "check":
            return _check(args)
        if args.command == "demo":
            return _demo(args)
    except AuditError as exc:
        print(f"study-audit: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("study-audit: interrupted.", file=sys.stderr)
        return 130
    except Exception as exc:
        if getattr(args, "debug", False):
            raise
        print(
            f"study-audit: internal error ({type(exc).__name__}: {exc}); "
            "run again with --debug and report the output.",
            file=sys.stderr,
        )
        return EXIT_INTERNAL
    parser.error(f"unknown command {args.command}")
    return EXIT_UNUSABLE


def _run_check(
    path: Path,
    *,
    sheet: str | None,
    json_out: str | None,
    csv_out: str | None,
    quiet: bool,
    fail_on: str | None,
) -> int:
    from audit.export import write_csv, write_json
    from audit.pipeline import audit_file
    from audit.report import make_console, render_overview

    result = audit_file(path, sheet=sheet)
    if json_out:
        write_json(result, json_out)
    if csv_out:
        write_csv(result, csv_out)
    to_stdout = "-" in (json_out, csv_out)
    if not quiet:
        render_overview(result, make_console(stderr=to_stdout))
    if fail_on and len(result.findings):
        rank = {s: i for i, s in enumerate(SEVERITIES)}
        worst = max(rank.get(s, -1) for s in result.findings["severity"])
        if worst >= rank[fail_on]:
            return EXIT_FLAGGED
    return EXIT_OK


def _check(args: argparse.Namespace) -> int:
    return _run_check(
        args.file,
        sheet=args.sheet,
        json_out=args.json,
        csv_out=args.csv,
        quiet=args.quiet,
        fail_on=args.fail_on,
    )


def _demo(args: argparse.Namespace) -> int:
    from audit.resources import bundled_dir

    source = bundled_dir("demo_data") / "demo_portfolio.csv"
    out: Path = args.out
    out.mkdir(parents=True, exist_ok=True)
    json_out, csv_out = out / "audit.json", out / "audit.csv"
    status = _run_check(
        source,
        sheet=None,
        json_out=str(json_out),
        csv_out=str(csv_out),
        quiet=args.quiet,
        fail_on=None,
    )
    print(f"Demo exports written to {out.resolve()}: audit.json, audit.csv")
    return status
