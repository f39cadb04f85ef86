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
from typing import TYPE_CHECKING, Any

from audit import __version__
from audit.errors import AuditError, ConfigError

if TYPE_CHECKING:
    from audit.pipeline import AuditResult

__all__ = ["main"]

SEVERITIES = ("note", "warning", "serious")
EXIT_OK, EXIT_FLAGGED, EXIT_UNUSABLE, EXIT_INTERNAL = 0, 1, 2, 3
#: A progress bar is shown for input files at least this large (about 2,000 rows of CSV), and
#: only when standard error is a terminal.
PROGRESS_MIN_BYTES = 200_000


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

    rules = sub.add_parser("rules", help="list the audit rules, or show one in full")
    rules.add_argument("id", nargs="?", help="a rule id: show its condition, parameters, rationale")
    _add_rules_option(rules)
    for p in (check, demo, rules):
        p.add_argument(
            "--debug", action="store_true", default=argparse.SUPPRESS, help=argparse.SUPPRESS
        )
    return parser


def _add_rules_option(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--rules",
        metavar="FILE",
        action="append",
        default=[],
        type=Path,
        help="a rules file (TOML) adding rules or overriding severity/parameters by rule id; "
        "repeatable",
    )


def _add_check_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--sheet", help="worksheet to read (default: the first)")
    _add_rules_option(p)
    p.add_argument("--study", metavar="ID", help="show one study in depth instead of the portfolio")
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
        if args.command == "rules":
            return _rules(args)
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
    rule_files: Sequence[Path] = (),
    study: str | None = None,
) -> int:
    from audit.export import write_csv, write_json
    from audit.pipeline import STAGES, audit_file
    from audit.report import make_console, render_report, render_study, study_ids_hint
    from audit.rules import load_rules

    # The rules are checked before the (possibly long) read, so a typo fails at once.
    ruleset = load_rules(rule_files)
    to_stdout = "-" in (json_out, csv_out)
    stages = [
        *STAGES,
        *(["writing JSON"] if json_out else []),
        *(["writing CSV"] if csv_out else []),
    ]
    with _progress(path, stages, show=not quiet) as progress:
        result = audit_file(path, sheet=sheet, rules=ruleset, progress=progress)
        positions: list[int] = []
        if study is not None:
            positions = result.positions_of(study)
            if not positions:
                raise ConfigError(
                    f"no study with study_id '{study}' in {path} (ids look like: "
                    f"{study_ids_hint(result)})."
                )
        if json_out:
            progress("writing JSON")
            write_json(result, json_out)
        if csv_out:
            progress("writing CSV")
            write_csv(result, csv_out)
    problems = result.rule_problems
    for rule, problem in zip(problems["rule"], problems["problem"], strict=True):
        # Even with --quiet: an audit with a rule that did not run is incomplete.
        print(
            f"study-audit: rule {rule} could not be evaluated ({problem}); no study was checked "
            "against it. Please report this.",
            file=sys.stderr,
        )
    if not quiet:
        console = make_console(stderr=to_stdout)
        if study is not None:
            render_study(result, console, positions)
        else:
            render_report(result, console, fail_on=fail_on)
    return exit_status(result, fail_on)


class _NoProgress:
    """Stands in for the progress bar when none is shown."""

    def __enter__(self) -> _NoProgress:
        return self

    def __exit__(self, *exc: object) -> None:
        return None

    def __call__(self, stage: str) -> None:
        return None


def _progress(path: Path, stages: Sequence[str], *, show: bool) -> Any:
    """A progress bar on standard error for a large input in a terminal, else a no-op."""
    from audit.report import StageBar, make_console

    try:
        large = path.stat().st_size >= PROGRESS_MIN_BYTES
    except OSError:
        large = False  # the reader reports the real problem
    if show and large and sys.stderr.isatty():
        return StageBar(make_console(stderr=True), stages)
    return _NoProgress()


def exit_status(result: AuditResult, fail_on: str | None) -> int:
    """1 when a finding (or a rule that failed to run) is at or above ``fail_on``, else 0."""
    if not fail_on:
        return EXIT_OK
    rank = {s: i for i, s in enumerate(SEVERITIES)}
    severities = [*result.findings["severity"], *result.rule_problems["severity"]]
    if severities and max(rank[s] for s in severities) >= rank[fail_on]:
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
        rule_files=args.rules,
        study=args.study,
    )


def _rules(args: argparse.Namespace) -> int:
    from audit.report import make_console, render_rule, render_rules
    from audit.rules import load_rules

    ruleset = load_rules(args.rules)
    console = make_console()
    if args.id:
        render_rule(ruleset.get(args.id), console)
    else:
        render_rules(ruleset, console)
    return EXIT_OK


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
