"""Command line: arguments -> settings -> run -> exit code. No maths and no rendering here.

Exit status (DESIGN.md section 7):

* 0 — the input was audited (invalid rows do not change this);
* 1 — a flag at or above ``--fail-on`` was raised;
* 2 — the input or the configuration could not be used (unreadable file, no header, no
  ``study_id``/``design`` column, bad rules file or option);
* 3 — an internal error (a bug: please report it with the output of ``--debug``).

Conventions: ``check -`` reads the portfolio from standard input (CSV text or an .xlsx
workbook); ``-`` as an export's file sends it to standard output, for at most one export
(JSON, CSV or HTML: a workbook or figures cannot go there), and the report then goes to standard
error; ``study-audit`` alone prints the help.
"""

from __future__ import annotations

import argparse
import contextlib
import math
import os
import signal
import sys
import tempfile
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from audit import __version__
from audit.errors import AuditError, ConfigError, InputError, OutputError
from audit.terminal import clean_line

if TYPE_CHECKING:
    from audit.result import AuditResult

__all__ = ["main"]

SEVERITIES = ("note", "warning", "serious")
EXIT_OK, EXIT_FLAGGED, EXIT_UNUSABLE, EXIT_INTERNAL = 0, 1, 2, 3
#: Standard output was closed by its reader (``study-audit check x --json - | head``): the
#: shell's status for a writer ended by SIGPIPE, with nothing printed.
EXIT_PIPE_CLOSED = 128 + 13
#: A progress bar is shown for input files at least this large (about 2,000 rows of CSV), and
#: only when standard error is a terminal.
PROGRESS_MIN_BYTES = 200_000
#: The name standard input goes by in messages, the report and the exports.
STDIN_NAME = "standard input"

_EXIT_CODES = """exit status:
  0  the portfolio was audited (rows that fail validation are listed, not fatal)
  1  a finding at or above --fail-on was raised
  2  the input, an option or a rules file could not be used (one sentence says why)
  3  internal error (run again with --debug and report the output)"""

_MAIN_EPILOG = f"""examples:
  study-audit demo                          the whole job on a bundled portfolio
  study-audit template studies.xlsx         a blank input workbook to fill in
  study-audit check studies.xlsx --xlsx audited.xlsx --json audit.json
  study-audit check studies.csv --study KF-104
  study-audit columns                       the input columns and the designs using them
  study-audit rules power-below-target      one rule in full

{_EXIT_CODES}"""

_CHECK_EPILOG = f"""examples:
  study-audit check studies.xlsx
  study-audit check studies.csv --fail-on serious --quiet
  study-audit check studies.xlsx --xlsx audited.xlsx --plots figures
  study-audit check studies.csv --json - > audit.json      (the report goes to stderr)
  cat studies.csv | study-audit check - --csv audited.csv
  study-audit check studies.xlsx --rules exempt-pilots.toml

FILE is .xlsx, .csv or .tsv ('-' reads standard input). At most one export may be '-'
(standard output): --json, --csv or --html; --xlsx and --plots need a file or folder.

{_EXIT_CODES}"""


def _formatter(prog: str) -> argparse.HelpFormatter:
    return argparse.RawDescriptionHelpFormatter(prog, max_help_position=30)


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="study-audit",
        description="Audit what completed studies could and could not detect: design-based "
        "power, minimal detectable effects, plan against reality, portfolio statistics.",
        epilog=_MAIN_EPILOG,
        formatter_class=_formatter,
    )
    parser.add_argument("--version", action="version", version=f"study-audit {__version__}")
    parser.add_argument(
        "--debug", action="store_true", help="show the full traceback of an internal error"
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    def command(name: str, summary: str, epilog: str = _EXIT_CODES) -> argparse.ArgumentParser:
        return sub.add_parser(
            name, help=summary, description=summary, epilog=epilog, formatter_class=_formatter
        )

    check = command(
        "check", "audit a portfolio file (.xlsx, .csv, .tsv; '-' for standard input)", _CHECK_EPILOG
    )
    check.add_argument(
        "file", type=Path, metavar="FILE", help="the portfolio, one row per study ('-': stdin)"
    )
    _add_check_options(check)

    demo = command(
        "demo",
        "run the whole audit on the bundled demo portfolio and write every export",
        "writes into DIR: report.txt, audit.json, audit.csv, audit.xlsx, plots/ and one\n"
        "referee response (response_ID.md)\n\nexample:\n  study-audit demo --out demo\n\n"
        + _EXIT_CODES,
    )
    demo.add_argument(
        "--out",
        type=Path,
        metavar="DIR",
        default=Path("study-audit-demo"),
        help="folder for the exports (default: ./study-audit-demo)",
    )
    demo.add_argument("--quiet", action="store_true", help="write the exports only, no report")

    template = command(
        "template",
        "write a blank, documented input workbook to fill in",
        "example:\n  study-audit template studies.xlsx\n\n" + _EXIT_CODES,
    )
    template.add_argument("out", type=Path, metavar="OUT", help="the workbook to write (.xlsx)")
    template.add_argument(
        "--force", action="store_true", help="replace OUT if it exists (default: refuse)"
    )

    rules = command(
        "rules",
        "list the audit rules, or show one in full",
        "examples:\n  study-audit rules\n  study-audit rules power-below-target --rules "
        "mine.toml\n\n" + _EXIT_CODES,
    )
    rules.add_argument(
        "id", nargs="?", metavar="ID", help="a rule id: show its condition, parameters, rationale"
    )
    _add_rules_option(rules)

    columns = command(
        "columns",
        "list the input columns: name, meaning and the designs that use them",
        "example:\n  study-audit columns --design two_means\n\n" + _EXIT_CODES,
    )
    columns.add_argument(
        "--design", metavar="NAME", help="only the columns this design uses (default: all)"
    )

    command(
        "schema",
        "print the JSON Schema (draft 2020-12) of the --json document",
        "example:\n  study-audit schema > study-audit.schema.json\n\n" + _EXIT_CODES,
    )

    respond = command(
        "respond",
        "draft the paragraph on power an author can send to a referee",
        "example:\n  study-audit respond studies.xlsx KF-104 --out response.md\n\n" + _EXIT_CODES,
    )
    respond.add_argument("file", type=Path, metavar="FILE", help="the portfolio file")
    respond.add_argument("study_id", metavar="ID", help="the study_id of the study")
    respond.add_argument(
        "--effect",
        type=_finite_number,
        metavar="X",
        help="also give design-based power at this effect (effect units), instead of the SESOI",
    )
    respond.add_argument(
        "--out", type=Path, metavar="OUT", help="write the Markdown here (default: stdout)"
    )
    respond.add_argument(
        "--sheet", metavar="NAME", help="worksheet to read (default: the first visible one)"
    )
    _add_analysis_options(respond, excess=False)

    for p in sub.choices.values():
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


def _add_analysis_options(p: argparse.ArgumentParser, *, excess: bool = True) -> None:
    group = p.add_argument_group("analysis options")
    group.add_argument(
        "--continuity-correction",
        action="store_true",
        help="two_proportions rows that leave continuity_correction blank use the corrected "
        "test (Fleiss); default: uncorrected",
    )
    if not excess:
        return
    group.add_argument(
        "--excess-basis",
        choices=("planned", "pooled"),
        default="planned",
        help="power basis of the excess-significance test: each study's planned effect "
        "(default) or the pooled estimate of its outcome_family",
    )
    group.add_argument(
        "--excess-method",
        choices=("exact", "chi2"),
        default="exact",
        help="exact Poisson-binomial p-value (default) or the chi-square form",
    )
    group.add_argument(
        "--excess-pooling",
        choices=("fixed", "random"),
        default="fixed",
        help="fixed-effect (default) or random-effects pooling of each outcome_family (the "
        "pooled effect, the families in the report, --excess-basis pooled)",
    )
    group.add_argument(
        "--excess-min-studies",
        type=int,
        default=5,
        metavar="N",
        help="fewest studies with a result for the excess-significance test (default: 5)",
    )
    group.add_argument(
        "--reference-effects",
        type=_reference_effects,
        default=(0.2, 0.5, 0.8),
        metavar="X,Y,...",
        help="standardized effects (each design's unit: d, d_z, h, r, f, f2, log HR) at which "
        "every study's power is given (default: 0.2,0.5,0.8)",
    )


def _finite_number(text: str) -> float:
    """A finite number (``nan`` and ``inf`` are refused)."""
    try:
        value = float(text)
    except ValueError:
        value = float("nan")
    if not math.isfinite(value):
        raise argparse.ArgumentTypeError(f"expected a finite number, such as 0.4, but got {text!r}")
    return value


def _reference_effects(text: str) -> tuple[float, ...]:
    """``--reference-effects 0.2,0.5,0.8``: positive numbers, comma-separated."""
    try:
        values = tuple(float(v) for v in text.split(",") if v.strip())
    except ValueError:
        values = ()
    if not values or not all(0 < v < float("inf") for v in values):
        raise argparse.ArgumentTypeError(
            f"expected positive numbers separated by commas, such as 0.2,0.5,0.8, but got {text!r}"
        )
    return values


def _add_check_options(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--sheet", metavar="NAME", help="worksheet to read (default: the first visible one)"
    )
    _add_rules_option(p)
    p.add_argument(
        "--study",
        metavar="ID",
        action="append",
        help="show this study in depth instead of the portfolio (repeat for several)",
    )
    p.add_argument(
        "--fail-on",
        choices=SEVERITIES,
        help="exit with status 1 when a flag of this severity or above is raised "
        "(default: findings do not change the exit status)",
    )
    out = p.add_argument_group("exports (at most one may be '-', standard output)")
    out.add_argument("--json", metavar="OUT", help="write the JSON document ('-' for stdout)")
    out.add_argument(
        "--csv", metavar="OUT", help="write the per-study table as CSV ('-' for stdout)"
    )
    out.add_argument("--xlsx", metavar="OUT", help="write the annotated workbook (a file)")
    out.add_argument(
        "--html",
        metavar="OUT",
        help="write the report as one self-contained HTML file (opens offline, prints cleanly)",
    )
    out.add_argument("--plots", metavar="DIR", type=Path, help="write figures into this folder")
    out.add_argument(
        "--plot-format",
        choices=("png", "svg"),
        default="png",
        help="figure format (default: png)",
    )
    p.add_argument(
        "--group-by",
        metavar="COLUMN",
        action="append",
        default=[],
        help="also summarise the portfolio per value of this column (a column of the file, such "
        "as a programme or field; blank cells form their own group); repeatable",
    )
    p.add_argument("--quiet", action="store_true", help="write the exports only, no report")
    _add_analysis_options(p)


class _Stopped(BaseException):
    """SIGTERM or SIGHUP arrived: unwinds like Ctrl-C, so unfinished exports are removed."""

    def __init__(self, number: int) -> None:
        super().__init__(number)
        self.number = number


def _stop(number: int, frame: object) -> None:
    raise _Stopped(number)


@contextlib.contextmanager
def _stop_on_signals() -> Iterator[None]:
    """While the command runs, SIGTERM and SIGHUP stop it through :class:`_Stopped` (the
    temporary files of exports are removed on the way out); the previous handlers are put
    back after. Outside the main thread nothing is installed (signals cannot be handled
    there)."""
    previous = {}
    for name in ("SIGTERM", "SIGHUP"):
        number = getattr(signal, name, None)
        if number is None:
            continue
        try:
            previous[number] = signal.signal(number, _stop)
        except (ValueError, OSError):  # not the main thread
            pass
    try:
        yield
    finally:
        for number, handler in previous.items():
            signal.signal(number, handler)


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit status."""
    parser = _parser()
    argv = sys.argv[1:] if argv is None else list(argv)
    if not argv:
        parser.print_help()
        return EXIT_OK
    args = parser.parse_args(argv)
    try:
        with _stop_on_signals():
            return _dispatch(parser, args)
    except BrokenPipeError:
        # The reader of standard output went away: stop quietly. Python would report the
        # failed flush of stdout at exit; point stdout at /dev/null so that it has nothing to do.
        with contextlib.suppress(OSError, ValueError):
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, sys.stdout.fileno())
        return EXIT_PIPE_CLOSED


def _dispatch(parser: argparse.ArgumentParser, args: argparse.Namespace) -> int:
    try:
        if args.command == "check":
            return _check(args)
        if args.command == "demo":
            return _demo(args)
        if args.command == "rules":
            return _rules(args)
        if args.command == "template":
            return _template(args)
        if args.command == "columns":
            return _columns(args)
        if args.command == "schema":
            return _schema()
        if args.command == "respond":
            return _respond(args)
    except AuditError as exc:
        print(f"study-audit: {clean_line(str(exc))}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("study-audit: interrupted.", file=sys.stderr)
        return 130
    except _Stopped as stop:
        from audit.export import remove_pending_temporary_files

        remove_pending_temporary_files()
        name = signal.Signals(stop.number).name
        print(f"study-audit: stopped by {name}; no export was replaced.", file=sys.stderr)
        return 128 + stop.number
    except BrokenPipeError:
        raise
    except Exception as exc:
        if getattr(args, "debug", False):
            raise
        print(
            f"study-audit: internal error ({type(exc).__name__}: {clean_line(str(exc))}); "
            "run again with --debug and report the output.",
            file=sys.stderr,
        )
        return EXIT_INTERNAL
    parser.error(f"unknown command {args.command}")
    return EXIT_UNUSABLE


@dataclass
class CheckRun:
    """Everything ``check`` (and ``demo``) was asked to do."""

    path: Path
    sheet: str | None = None
    rule_files: Sequence[Path] = ()
    study: list[str] | None = None
    fail_on: str | None = None
    json_out: str | None = None
    csv_out: str | None = None
    xlsx_out: str | None = None
    html_out: str | None = None
    group_by: Sequence[str] = ()
    plots_dir: Path | None = None
    plot_format: str = "png"
    report_out: Path | None = None
    quiet: bool = False
    analysis: dict[str, Any] = field(default_factory=dict)
    #: How the input is named in messages and the result (``check -``: standard input).
    source_name: str | None = None


def _analysis(args: argparse.Namespace) -> dict[str, Any]:
    """The keyword arguments of :func:`audit.audit_file` set by the analysis options."""
    out: dict[str, Any] = {"continuity_correction": bool(args.continuity_correction)}
    for key in (
        "excess_basis",
        "excess_method",
        "excess_pooling",
        "excess_min_studies",
        "reference_effects",
    ):
        if hasattr(args, key):
            out[key] = getattr(args, key)
    return out


def _run_check(run: CheckRun) -> tuple[int, AuditResult]:
    from audit.export import refuse_overwrite
    from audit.pipeline import STAGES
    from audit.report import make_console, render_report, render_study, study_ids_hint
    from audit.rules import load_rules

    # The rules are checked before the (possibly long) read, so a typo fails at once; so is
    # an output that would replace a file the run reads, or two outputs to standard output.
    check_stdout(run)
    ruleset = load_rules(run.rule_files)
    reads = [("the input file", run.path), *(("a rules file", f) for f in run.rule_files)]
    for target in (run.json_out, run.csv_out, run.xlsx_out, run.html_out, run.report_out):
        if target is not None:
            refuse_overwrite(target, reads)
    _refuse_shared_targets(run)
    to_stdout = "-" in (run.json_out, run.csv_out, run.html_out)
    exports = [
        ("writing JSON", run.json_out),
        ("writing HTML", run.html_out),
        ("writing CSV", run.csv_out),
        ("writing workbook", run.xlsx_out),
        ("drawing figures", run.plots_dir),
    ]
    stages = [*STAGES, *(stage for stage, target in exports if target)]
    with (
        _stdin_copy(run) as run,
        _progress(run.path, stages, show=not run.quiet) as progress,
    ):
        positions: list[int] = []

        def find_studies(result: AuditResult) -> None:
            # Before the exports are put in place: an unknown id writes none of them.
            for study in run.study or ():
                found = result.positions_of(study)
                if not found:
                    raise ConfigError(
                        f"no study with study_id '{study}' in {run.path} (ids look like: "
                        f"{study_ids_hint(result)})."
                    )
                positions.extend(p for p in found if p not in positions)

        result = _audit_with_exports(run, ruleset, reads, progress, find_studies)
        if run.html_out:
            from audit.html import write_html

            progress("writing HTML")
            write_html(result, run.html_out, fail_on=run.fail_on)
        if run.plots_dir is not None:
            from audit.plots import write_plots

            progress("drawing figures")
            write_plots(result, run.plots_dir, fmt=run.plot_format, study=run.study)
    problems = result.rule_problems
    for rule, problem in zip(problems["rule"], problems["problem"], strict=True):
        # Even with --quiet: an audit with a rule that did not run is incomplete.
        print(
            f"study-audit: rule {rule} could not be evaluated ({problem}); no study was checked "
            "against it. Please report this.",
            file=sys.stderr,
        )
    if run.report_out is not None:
        from rich.console import Console

        from audit.export import atomic_output
        from audit.report import THEME

        with atomic_output(run.report_out) as handle:
            plain = Console(
                file=handle,
                width=100,
                color_system=None,
                theme=THEME,
                highlight=False,
                markup=False,
            )
            render_report(result, plain, fail_on=run.fail_on)
    if not run.quiet:
        console = make_console(stderr=to_stdout)
        if run.study is not None:
            render_study(result, console, positions)
        else:
            render_report(result, console, fail_on=run.fail_on)
    return exit_status(result, run.fail_on), result


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


def check_stdout(run: CheckRun) -> None:
    """Refuse what cannot go to standard output: a workbook or figures (binary files, which
    would mix with the report), or two exports at once (they would run together).

    Raises
    ------
    ConfigError
        ``--xlsx -``, ``--plots -``, or more than one export given as ``-``.
    """
    if run.xlsx_out == "-":
        raise ConfigError(
            "--xlsx - is refused: a workbook is a binary file and cannot go to standard "
            "output; give a file name such as audited.xlsx."
        )
    if run.plots_dir is not None and str(run.plots_dir) == "-":
        raise ConfigError(
            "--plots - is refused: figures are written as files into a folder; give a folder "
            "name such as figures."
        )
    to_stdout = [name for name, target in _stdout_exports(run) if target == "-"]
    if len(to_stdout) > 1:
        raise ConfigError(
            f"{' and '.join(to_stdout)} both ask for standard output ('-'); at most one export "
            "may go there, so give the others a file name."
        )


def _stdout_exports(run: CheckRun) -> list[tuple[str, str | None]]:
    """The exports that may go to standard output, by option."""
    return [("--json", run.json_out), ("--csv", run.csv_out), ("--html", run.html_out)]


@contextlib.contextmanager
def _stdin_copy(run: CheckRun) -> Any:
    """``check -``: standard input copied to a temporary file (the reader decides the format
    from the content, so CSV text and an .xlsx workbook both work), named "standard input" in
    messages and the result; any other run is passed through."""
    if str(run.path) != "-":
        yield run
        return
    from dataclasses import replace

    from audit.read import MAX_FILE_BYTES

    data = sys.stdin.buffer.read(MAX_FILE_BYTES + 1)
    if not data:
        raise InputError(f"{STDIN_NAME} is empty; pipe a .csv, .tsv or .xlsx file into 'check -'.")
    with tempfile.TemporaryDirectory(prefix="study-audit-") as folder:
        zipped = data.startswith(b"PK")
        copy = Path(folder) / ("stdin.xlsx" if zipped else "stdin.csv")
        copy.write_bytes(data)
        del data
        try:
            yield replace(run, path=copy, source_name=STDIN_NAME)
        except AuditError as exc:
            raise type(exc)(str(exc).replace(str(copy), STDIN_NAME)) from None


def _audit_with_exports(
    run: CheckRun,
    ruleset: Any,
    reads: list[tuple[str, Any]],
    progress: Any,
    accept: Callable[[AuditResult], None],
) -> AuditResult:
    """Audit the file a part of the studies at a time, the JSON, CSV and workbook exports
    written as the parts come (the file's cells are let go once written: see
    pipeline.stream_file) and put in place once ``accept`` took the result without raising.
    Unless the HTML report, the figures or one study's view need every detail of every study,
    the result keeps only what the portfolio summary, the report's listing and the exit status
    read, so memory stays about flat however large the file."""
    from audit.export import CsvExport, JsonExport, write_csv, write_json
    from audit.pipeline import audit_file, stream_file

    with contextlib.ExitStack() as exports:
        sinks: list[Any] = []
        document = None
        if run.json_out:
            document = exports.enter_context(JsonExport(run.json_out, reads, run.source_name))
            sinks.append(document)
        table = None
        if run.csv_out:
            table = exports.enter_context(CsvExport(run.csv_out, reads))
            sinks.append(table)
        workbook = None
        if run.xlsx_out:
            from audit.workbook import WorkbookExport  # xlsxwriter only when a workbook is asked

            workbook = exports.enter_context(WorkbookExport(run.xlsx_out, reads))
            sinks.append(workbook)

        def on_part(part: AuditResult) -> None:
            for sink in sinks:
                sink.add(part)

        result = stream_file(
            run.path,
            sheet=run.sheet,
            rules=ruleset,
            progress=progress,
            on_part=on_part if sinks else None,
            group_by=run.group_by,
            lean=run.html_out is None and run.plots_dir is None and run.study is None,
            **run.analysis,
        )
        if run.source_name is not None:
            result.settings["source"] = run.source_name
        if sinks and result.settings.get("rules_reapplied"):
            # A rule failed on a later part: the parts written carry findings a failing rule
            # does not have. The exports are written again from the whole file (rare: a bug),
            # except on standard output, where the parts are gone already.
            for flag, target, sink in (
                ("--json", run.json_out, document),
                ("--csv", run.csv_out, table),
            ):
                if str(target) == "-" and sink is not None and sink.streamed:
                    raise OutputError(
                        f"a rule could not be evaluated on a later part of {run.path} after "
                        f"{flag} - had begun writing to standard output: that output is "
                        f"incomplete and must not be used. Give {flag} a file name: it is then "
                        "written again from the whole file."
                    )
            exports.pop_all()
            for sink in sinks:
                sink.__exit__(RuntimeError, RuntimeError("rewritten"), None)
            full = audit_file(
                run.path, sheet=run.sheet, rules=ruleset, group_by=run.group_by, **run.analysis
            )
            # The whole file's settings (its rule problems), with the source as named.
            full.settings["rules_reapplied"] = True
            if run.source_name is not None:
                full.settings["source"] = run.source_name
            accept(full)
            if run.json_out:
                progress("writing JSON")
                write_json(full, run.json_out)
            if run.csv_out:
                write_csv(full, run.csv_out)
            if run.xlsx_out:
                from audit.workbook import write_workbook

                write_workbook(full, run.xlsx_out)
            return full
        accept(result)
        if document is not None:
            progress("writing JSON")
            document.finish(result)
        if run.csv_out:
            progress("writing CSV")
        if workbook is not None:
            progress("writing workbook")
            workbook.finish(result)
    return result


def _refuse_shared_targets(run: CheckRun) -> None:
    """Two exports given the same file (``--json X --csv X``, or the same file by two names)
    are refused: the second would silently replace the first. Standard output (``-``) is
    checked by :func:`check_stdout`."""
    named = [
        (option, target)
        for option, target in (
            ("--json", run.json_out),
            ("--csv", run.csv_out),
            ("--xlsx", run.xlsx_out),
            ("--report", run.report_out),
            ("--html", run.html_out),
        )
        if target is not None
    ]
    for i, (first, a) in enumerate(named):
        for second, b in named[i + 1 :]:
            if "-" in (str(a), str(b)):
                continue  # standard output: at most one export, see check_stdout
            pa, pb = Path(a), Path(b)
            same = str(a) == str(b) or pa.resolve() == pb.resolve()
            with contextlib.suppress(OSError):
                same = same or (pa.exists() and pb.exists() and os.path.samefile(pa, pb))
            if same:
                raise ConfigError(
                    f"{first} and {second} both write to {a}; give each export its own file."
                )


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
    status, _ = _run_check(
        CheckRun(
            path=args.file,
            sheet=args.sheet,
            rule_files=args.rules,
            study=args.study,
            fail_on=args.fail_on,
            json_out=args.json,
            csv_out=args.csv,
            xlsx_out=args.xlsx,
            html_out=args.html,
            group_by=args.group_by,
            plots_dir=args.plots,
            plot_format=args.plot_format,
            quiet=args.quiet,
            analysis=_analysis(args),
        )
    )
    return status


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
    """The whole job on the bundled demo: report, every export, and one referee response."""
    from audit.export import atomic_output
    from audit.resources import bundled_dir
    from audit.respond import respond_text

    source = bundled_dir("demo_data") / "demo_portfolio.csv"
    out: Path = args.out
    if out.exists() and not out.is_dir():
        raise OutputError(f"--out needs a folder for the demo's files, but {out} is a file.")
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot make the folder {out}: {exc.strerror}.") from exc
    status, result = _run_check(
        CheckRun(
            path=source,
            json_out=str(out / "audit.json"),
            csv_out=str(out / "audit.csv"),
            xlsx_out=str(out / "audit.xlsx"),
            html_out=str(out / "report.html"),
            plots_dir=out / "plots",
            report_out=out / "report.txt",
            quiet=args.quiet,
        )
    )
    written = ["report.txt", "report.html", "audit.json", "audit.csv", "audit.xlsx", "plots/"]
    example = _demo_response_study(result)
    if example is not None:
        name = f"response_{example}.md"
        with atomic_output(out / name) as handle:
            handle.write(respond_text(result, example))
        written.append(name)
    print(f"Demo written to {out.resolve()}: {', '.join(written)}")
    return status


def _demo_response_study(result: AuditResult) -> str | None:
    """The demo's referee response is for the first audited study with an inconclusive null."""
    verdicts = result.metrics["ci_verdict"].to_numpy(dtype=object)
    ids = result.table["study_id"].to_numpy(dtype=object)
    for pos in range(len(ids)):
        if result.valid[pos] and verdicts[pos] == "inconclusive":
            return str(ids[pos])
    audited = [str(ids[p]) for p in range(len(ids)) if result.valid[p]]
    return audited[0] if audited else None


def _template(args: argparse.Namespace) -> int:
    from audit.template import write_template

    out: Path = args.out
    if out.suffix.lower() != ".xlsx":
        raise ConfigError(
            f"template writes an .xlsx workbook; give a name ending in .xlsx, not '{out}'."
        )
    if out.exists() and not args.force:
        raise OutputError(f"{out} exists; add --force to replace it with a blank template.")
    write_template(out)
    print(f"Input template written to {args.out}: fill the 'studies' sheet (see 'guide').")
    return EXIT_OK


def _respond(args: argparse.Namespace) -> int:
    from audit.export import atomic_output, refuse_overwrite
    from audit.pipeline import audit_file
    from audit.respond import respond_text

    if args.out is not None:
        refuse_overwrite(args.out, [("the input file", args.file)])
    result = audit_file(args.file, sheet=args.sheet, **_analysis(args))
    text = respond_text(result, args.study_id, effect=args.effect)
    if args.out is None:
        sys.stdout.write(text)
    else:
        with atomic_output(args.out) as handle:
            handle.write(text)
        print(f"Response for {clean_line(args.study_id)} written to {args.out}", file=sys.stderr)
    return EXIT_OK


def _columns(args: argparse.Namespace) -> int:
    from audit.columns import render_columns
    from audit.report import make_console

    render_columns(make_console(), design=args.design)
    return EXIT_OK


def _schema() -> int:
    from audit.jsonout import schema_text

    sys.stdout.write(schema_text())
    return EXIT_OK
