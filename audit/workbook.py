"""The annotated workbook (``check --xlsx OUT``): the user's table with the audit beside it.

Sheets, in the order a panel reads them:

* ``summary`` — one line per study: id, title, design, status, power at the planned effect, the
  MDE, and the most severe finding (or why the row could not be audited).
* ``audit`` — the user's columns first, as they were (numbers of contract columns stored as
  numbers), then the row number, status, highest severity, findings, every metric (stored as
  numbers with formats) and the notes. Severity shows as text *and* as a fill, so it survives
  black-and-white printing.
* ``portfolio`` — the portfolio summary.
* ``rules`` — the rules in force with their rationale and references.
* ``invalid rows`` — every rejected cell with its reason.
* ``read me`` — what the sheets hold and the cautions that go with them.

Every sheet has its header frozen, an autofilter, set column widths, and row heights that show
every line of a wrapped cell (spreadsheet programs do not grow a row for wrapped text written by
another program, so the lines would be cut off or overprint the next row). Numbers are stored as
numbers, including the user's own number-like cells (``sides`` = 2, a year), where the text can be
recovered exactly from the number.

Text that a spreadsheet would take for a formula is stored as text with a quote prefix, so it
cannot run. Re-auditing the ``audit`` sheet gives the same metrics: the user's cells are written
back exactly as the audit read them, and the reader takes the ``audit`` sheet of a workbook laid
out as this one (``summary`` first) unless ``--sheet`` says otherwise.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import math
import re
from collections.abc import Iterable
from pathlib import Path
from typing import IO, TYPE_CHECKING, Any

import numpy as np
import pandas as pd
import xlsxwriter

from audit._format import format_number
from audit.errors import OutputError
from audit.export import CAUTION, ILLEGAL_XLSX, atomic_output, files_read, refuse_overwrite
from audit.jsonout import portfolio_document
from audit.metrics import METRICS
from audit.numbers import parse_numbers
from audit.schema import SPECS

if TYPE_CHECKING:
    from audit.result import AuditResult

__all__ = ["SEVERITY_FILLS", "SHEETS", "WorkbookExport", "row_heights", "write_workbook"]

#: The sheets of the annotated workbook, in order (the reader recognises the layout).
SHEETS = ("summary", "audit", "portfolio", "rules", "invalid rows", "read me")

#: Fill colours of the severity cell; the severity is also written as text.
SEVERITY_FILLS = {"serious": "#E8A0A0", "warning": "#F5D58C", "note": "#CFE0F1"}
_INVALID_FILL = "#D9D9D9"
_OURS_FILL = "#E4E9DF"
_SEVERITY_ORDER = {"note": 0, "warning": 1, "serious": 2}
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")
#: Excel's limit on the characters of a cell.
_CELL_CHARS = 32_767
#: Points per line of the default 11-point font, and the tallest row a spreadsheet allows.
_LINE_POINTS = 15.0
_MAX_ROW_POINTS = 409.0
#: Column widths (characters) of the audit sheet's own columns.
_WIDE_TEXT = 60
_METRIC_WIDTH = 12
#: User text that is exactly a number's canonical spelling is stored as that number (the text
#: comes back from the number: "2", "-0.5", "2019"; not "007", "1.50", "+3" or "1e3").
_CANONICAL_INT = re.compile(r"-?(?:0|[1-9][0-9]{0,14})")
_CANONICAL_DECIMAL = re.compile(r"-?(?:0|[1-9][0-9]{0,14})\.[0-9]{0,14}[1-9]")

#: Number formats by metric; anything else gets four significant-looking decimals.
_FORMATS = {
    "n_required_plan": "0",
    "n_required_realized": "0",
    "events_required_plan": "0",
    "plan_discrepancy": "+0.0%;-0.0%;0.0%",
}


def _format_for(metric: str) -> str:
    if metric in _FORMATS:
        return _FORMATS[metric]
    if "power" in metric or metric.startswith("type_s") or metric.startswith("share"):
        return "0.000"
    if metric.endswith("_ratio"):
        return "0.00"
    return "0.0000"


class _Styles:
    """The workbook's formats, each made once (xlsxwriter keeps one record per format)."""

    def __init__(self, wb: xlsxwriter.Workbook) -> None:
        self.bold = wb.add_format({"bold": True})
        self.bold_ours = wb.add_format({"bold": True, "bg_color": _OURS_FILL, "pattern": 1})
        self.bold_quoted = wb.add_format({"bold": True, "quote_prefix": True})
        self.quoted = wb.add_format({"quote_prefix": True})
        self.wrap = wb.add_format({"text_wrap": True, "valign": "top"})
        self.invalid = wb.add_format({"bg_color": _INVALID_FILL, "pattern": 1})
        self.severity = {
            name: wb.add_format({"bg_color": colour, "pattern": 1})
            for name, colour in SEVERITY_FILLS.items()
        }
        self.wrap_severity = {
            name: wb.add_format(
                {"bg_color": colour, "pattern": 1, "text_wrap": True, "valign": "top"}
            )
            for name, colour in SEVERITY_FILLS.items()
        }
        self.wrap_quoted = wb.add_format({"text_wrap": True, "valign": "top", "quote_prefix": True})
        self.date = wb.add_format({"num_format": "yyyy-mm-dd hh:mm:ss"})
        self._numbers: dict[str, Any] = {}
        self._wb = wb

    def number(self, pattern: str) -> Any:
        if pattern not in self._numbers:
            self._numbers[pattern] = self._wb.add_format({"num_format": pattern})
        return self._numbers[pattern]


def _clean(value: str) -> str:
    # Control characters cannot be stored in a workbook (XML 1.0); they become U+FFFD.
    return ILLEGAL_XLSX.sub("\ufffd", value)[:_CELL_CHARS]


def _write_text(ws: Any, row: int, col: int, value: str, styles: _Styles, fmt: Any = None) -> None:
    """A string cell, never a formula; text that starts like one gets a quote prefix (shown as
    typed, and kept text when the cell is edited)."""
    value = _clean(value)
    if value.startswith(_FORMULA_START):
        if fmt is None:
            fmt = styles.quoted
        elif fmt is styles.wrap:
            fmt = styles.wrap_quoted
    ws.write_string(row, col, value, fmt)


def row_heights(columns: Iterable[tuple[list[str], float]], n: int) -> list[float | None]:
    """The height (points) each of ``n`` rows needs to show every line of its wrapped cells.

    ``columns`` gives, per wrapped column, its texts (one per row, ``""`` for none) and its width
    in characters. A line longer than the width wraps onto ``ceil(len / width)`` lines. Rows of
    one line keep the default height (``None``), so a sheet of short cells stays compact.
    """
    lines = np.ones(n, dtype=np.int64)
    for texts, width in columns:
        chars = max(int(width) - 1, 1)
        counts = [
            sum(max(1, -(-len(line) // chars)) for line in text.split("\n")) if text else 1
            for text in texts
        ]
        lines = np.maximum(lines, np.asarray(counts, dtype=np.int64))
    points = np.minimum(lines * _LINE_POINTS, _MAX_ROW_POINTS)
    return [
        None if k == 1 else float(h) for k, h in zip(lines.tolist(), points.tolist(), strict=True)
    ]


def _canonical_numbers(values: np.ndarray) -> np.ndarray:
    """``values`` with each text that is exactly a number's canonical spelling replaced by the
    number (decided once per distinct text)."""
    text = np.fromiter((type(v) is str for v in values.tolist()), dtype=bool, count=len(values))
    if not text.any():
        return values
    codes, uniques = pd.factorize(values[text])
    converted: list[object] = []
    for u in uniques.tolist():
        if _CANONICAL_INT.fullmatch(u):
            converted.append(int(u))
        elif _CANONICAL_DECIMAL.fullmatch(u) and repr(float(u)) == u:
            converted.append(float(u))
        else:
            converted.append(u)
    out = values.copy()
    out[text] = np.array(converted, dtype=object)[codes]
    return out


def _write_value(ws: Any, row: int, col: int, value: object, styles: _Styles) -> None:
    """A user's cell as the audit read it: numbers as numbers, text as text, blanks blank."""
    if value is None:
        return
    if isinstance(value, str):
        _write_text(ws, row, col, value, styles)
    elif isinstance(value, (bool, np.bool_)):
        ws.write_boolean(row, col, bool(value))
    elif isinstance(value, (int, float, np.integer, np.floating)):
        number = float(value)
        if math.isfinite(number):
            ws.write_number(row, col, number)
        elif not math.isnan(number):
            _write_text(ws, row, col, str(value), styles)
    elif isinstance(value, (_dt.datetime, _dt.date, _dt.time)):
        ws.write_datetime(row, col, value, styles.date)
    else:
        _write_text(ws, row, col, str(value), styles)


def _header(ws: Any, names: list[str], ours_from: int, styles: _Styles) -> None:
    for j, name in enumerate(names):
        text = _clean(str(name))
        if j >= ours_from:
            fmt = styles.bold_ours
        else:
            fmt = styles.bold_quoted if text.startswith(_FORMULA_START) else styles.bold
        ws.write_string(0, j, text, fmt)


def _user_columns(result: AuditResult) -> tuple[list[str], list[np.ndarray]]:
    """The user's columns as written; contract number columns converted with the audit's own
    parser so that a re-audit reads exactly the same values."""
    raw = result.raw
    names, columns = [], []
    for c in raw.data.columns:
        values = raw.data[c].to_numpy(dtype=object).copy()
        spec = SPECS.get(c)
        if spec is not None and spec.kind in ("number", "integer"):
            parsed, problem = parse_numbers(
                raw.data[c], decimal_comma=raw.decimal_comma, whole=spec.kind == "integer"
            )
            ok = (problem == "").to_numpy() & parsed.notna().to_numpy()
            values[ok] = parsed.to_numpy()[ok]
        elif spec is None or (spec.kind == "choice" and all(x.isdigit() for x in spec.choices)):
            # ``sides`` ("2") and the user's own number-like cells, from a CSV: numbers in the
            # workbook (a re-audit reads 2 as "2"); identifiers and titles stay text.
            values = _canonical_numbers(values)
        names.append(raw.headers[c])
        columns.append(values)
    return names, columns


def _by_row_text(result: AuditResult, frame: pd.DataFrame, column: str) -> list[str]:
    return ["\n".join(str(v) for v in items) for items in result.by_row(frame, column)]


def _text_width(name: str, values: np.ndarray | None, low: int = 8, high: int = 40) -> int:
    """A column width (characters) fitting its header and most of its cells, within bounds."""
    width = len(str(name)) + 2
    if values is not None and len(values):
        lengths = pd.Series(values, dtype=object).dropna().astype(str).str.len()
        if len(lengths):
            width = max(width, int(np.quantile(lengths.to_numpy(), 0.9)) + 2)
    return int(min(max(width, low), high))


def _finding_texts(result: AuditResult) -> tuple[np.ndarray, list[str], list[str]]:
    """Per row: the highest severity (``""`` for none), all findings as lines, and the most
    severe finding (the first in rule order among those of the highest severity)."""
    findings = result.findings
    n = len(result.table)
    worst = np.full(n, "", dtype=object)
    first = np.full(n, "", dtype=object)
    if not len(findings):
        return worst, [""] * n, [""] * n
    text = (
        findings["rule"].astype(str)
        + " ("
        + findings["severity"].astype(str)
        + "): "
        + findings["message"].astype(str)
    )
    rank = findings["severity"].map(_SEVERITY_ORDER).fillna(-1).to_numpy()
    # Ascending severity, stable: the last write per row is the most severe finding, and among
    # equals the one the rules list first.
    order = np.lexsort((-np.arange(len(findings)), rank))
    pos = findings["pos"].to_numpy(dtype=int)[order]
    worst[pos] = findings["severity"].to_numpy(dtype=object)[order]
    first[pos] = text.to_numpy(dtype=object)[order]
    return worst, _by_row_text(result, findings.assign(text=text), "text"), first.tolist()


class _AuditSheet:
    """The ``audit`` sheet, written one part of the studies at a time."""

    def __init__(self, wb: xlsxwriter.Workbook, styles: _Styles) -> None:
        self.ws = wb.add_worksheet("audit")
        self.styles = styles
        self.next_row = 1
        self.columns: list[str] | None = None
        self.wrapped: dict[int, int] = {}

    def add(self, result: AuditResult) -> None:
        """Append the studies of ``result`` (the header with the first ones)."""
        ws, styles = self.ws, self.styles
        user_names, user_values = _user_columns(result)
        metric_names = list(result.metrics.columns)
        ours = ["row", "status", "highest severity", "findings", *metric_names, "errors", "notes"]
        if self.columns is None:
            self.columns = [*user_names, *ours]
            _header(ws, self.columns, len(user_names), styles)
            ws.freeze_panes(1, 1)
            self._widths(user_names, user_values, len(metric_names))
        elif self.columns != [*user_names, *ours]:
            raise ValueError("a part of the studies has other columns than the first")
        _audit_rows(ws, result, self.next_row, len(user_names), user_values, styles, self.wrapped)
        self.next_row += len(result.table)

    def _widths(self, names: list[str], values: list[np.ndarray], metrics: int) -> None:
        """Column widths from the header and the first part's cells (set once: the widths are
        written with the sheet's head, whatever the number of parts)."""
        ws = self.ws
        for j, (name, cells) in enumerate(zip(names, values, strict=True)):
            ws.set_column(j, j, _text_width(name, cells))
        ours = len(names)
        ws.set_column(ours, ours, 6)
        ws.set_column(ours + 1, ours + 2, 16)
        ws.set_column(ours + 3, ours + 3, _WIDE_TEXT)
        if metrics:
            ws.set_column(ours + 4, ours + 3 + metrics, _METRIC_WIDTH)
        after = ours + 4 + metrics
        ws.set_column(after, after + 1, _WIDE_TEXT)
        self.wrapped = {ours + 3: _WIDE_TEXT, after: _WIDE_TEXT, after + 1: _WIDE_TEXT}

    def finish(self) -> None:
        if self.columns is not None:
            self.ws.autofilter(0, 0, max(self.next_row - 1, 0), len(self.columns) - 1)


def _audit_rows(
    ws: Any,
    result: AuditResult,
    first_row: int,
    ours_at: int,
    user_values: list[np.ndarray],
    styles: _Styles,
    wrapped: dict[int, int],
) -> None:
    """The rows of ``result``'s studies, from sheet row ``first_row`` (0-based) on."""
    metrics = result.metrics
    metric_names = list(metrics.columns)
    n = len(result.table)
    worst, finding_text, _ = _finding_texts(result)
    errors = ["\n".join(e) for e in result.error_texts()]
    notes = _by_row_text(result, result.notes, "text")
    rows = result.table["_row"].to_numpy().tolist()
    status = np.asarray(result.status, dtype=object).tolist()
    worst_list = worst.tolist()
    # Per metric: its column, its values (None where not computed) and its format; numbers
    # are Python floats so that the writer does no conversion per cell.
    first = ours_at + 4
    metric_columns = []
    for j, name in enumerate(metric_names):
        values = metrics[name].to_numpy()
        if values.dtype == object:
            cells = [v if isinstance(v, str) else None for v in values.tolist()]
            metric_columns.append((first + j, cells, None))
        else:
            x = values.astype(float)
            cells = np.where(np.isfinite(x), x, np.nan).tolist()
            metric_columns.append((first + j, cells, styles.number(_format_for(name))))
    after = first + len(metric_names)
    heights = row_heights(
        [
            (finding_text, wrapped.get(ours_at + 3, _WIDE_TEXT)),
            (errors, wrapped.get(after, _WIDE_TEXT)),
            (notes, wrapped.get(after + 1, _WIDE_TEXT)),
        ],
        n,
    )
    write_number, write_string, set_row = ws.write_number, ws.write_string, ws.set_row
    wrap = styles.wrap
    # Each user column prepared once: its text cleaned and checked per distinct value.
    user = [(j, *_prepared(values, styles)) for j, values in enumerate(user_values)]
    invalid = styles.invalid
    for i in range(n):
        r = first_row + i
        if heights[i] is not None:
            # Before the row's cells: in constant-memory mode a row is final once left.
            set_row(r, heights[i])
        for j, cells, formats, text in user:
            v = cells[i]
            if v is not None:
                if text[i]:
                    write_string(r, j, v, formats[i])
                else:
                    _write_value(ws, r, j, v, styles)
        write_number(r, ours_at, rows[i])
        write_string(r, ours_at + 1, str(status[i]), None if status[i] == "audited" else invalid)
        if worst_list[i]:
            write_string(r, ours_at + 2, worst_list[i], styles.severity[worst_list[i]])
        if finding_text[i]:
            _write_text(ws, r, ours_at + 3, finding_text[i], styles, wrap)
        for j, cells, fmt in metric_columns:
            v = cells[i]
            if fmt is None:
                if v is not None:
                    write_string(r, j, v)
            elif v == v:  # not nan
                write_number(r, j, v, fmt)
        if errors[i]:
            _write_text(ws, r, after, errors[i], styles, wrap)
        if notes[i]:
            _write_text(ws, r, after + 1, notes[i], styles, wrap)


#: The summary sheet's columns: (header, width in characters).
_SUMMARY_COLUMNS = (
    ("study_id", 14),
    ("title", 40),
    ("design", 22),
    ("status", 10),
    ("power at planned effect", 12),
    ("MDE", 11),
    ("MDE (standardized)", 13),
    ("findings", 9),
    ("highest severity", 10),
    ("most severe finding", 70),
)


class _SummarySheet:
    """The ``summary`` sheet (first): one line per study for a panel, written with each part."""

    def __init__(self, wb: xlsxwriter.Workbook, styles: _Styles) -> None:
        self.ws = wb.add_worksheet("summary")
        self.styles = styles
        self.next_row = 1
        ws = self.ws
        _header(ws, [name for name, _ in _SUMMARY_COLUMNS], len(_SUMMARY_COLUMNS), styles)
        for j, (_, width) in enumerate(_SUMMARY_COLUMNS):
            ws.set_column(j, j, width)
        ws.freeze_panes(1, 1)

    def add(self, result: AuditResult) -> None:
        ws, styles = self.ws, self.styles
        n = len(result.table)
        table, metrics = result.table, result.metrics
        worst, _, most = _finding_texts(result)
        errors = ["; ".join(e) for e in result.error_texts()]
        counts = np.bincount(result.findings["pos"].to_numpy(dtype=int), minlength=n).tolist()
        status = np.asarray(result.status, dtype=object).tolist()
        # Invalid rows say why they were not audited in the same place.
        reason = [
            most[i] if status[i] == "audited" else f"not audited: {errors[i]}" for i in range(n)
        ]
        texts = {
            c: table[c].to_numpy(dtype=object).tolist() if c in table.columns else [None] * n
            for c in ("study_id", "title", "design")
        }
        numbers = []
        for name, fmt in (
            ("power_at_planned_effect", "0.000"),
            ("mde", "0.0000"),
            ("mde_std", "0.000"),
        ):
            if name in metrics.columns and metrics[name].dtype != object:
                x = metrics[name].to_numpy(dtype=float)
                numbers.append((np.where(np.isfinite(x), x, np.nan).tolist(), styles.number(fmt)))
            else:
                numbers.append(([math.nan] * n, None))
        heights = row_heights(
            [(reason, _SUMMARY_COLUMNS[-1][1]), ([str(t or "") for t in texts["title"]], 40)], n
        )
        worst_list = worst.tolist()
        for i in range(n):
            r = self.next_row + i
            if heights[i] is not None:
                ws.set_row(r, heights[i])
            for j, c in enumerate(("study_id", "title", "design")):
                v = texts[c][i]
                if v is not None and v == v:
                    _write_text(ws, r, j, str(v), styles, styles.wrap if j == 1 else None)
            ws.write_string(r, 3, status[i], None if status[i] == "audited" else styles.invalid)
            for j, (cells, fmt) in enumerate(numbers, start=4):
                if cells[i] == cells[i]:
                    ws.write_number(r, j, cells[i], fmt)
            if status[i] == "audited":
                ws.write_number(r, 7, counts[i])
            if worst_list[i]:
                ws.write_string(r, 8, worst_list[i], styles.severity[worst_list[i]])
            if reason[i]:
                _write_text(ws, r, 9, reason[i], styles, styles.wrap)
        self.next_row += n

    def finish(self) -> None:
        self.ws.autofilter(0, 0, max(self.next_row - 1, 0), len(_SUMMARY_COLUMNS) - 1)


def _prepared(values: np.ndarray, styles: _Styles) -> tuple[list, list, list[bool]]:
    """A user column's cells ready for the writer: texts cleaned (and given a quote prefix
    where they start like a formula) once per distinct text; which cells are texts."""
    cells = values.copy()
    text = np.fromiter((type(v) is str for v in cells.tolist()), dtype=bool, count=len(cells))
    formats = np.full(len(cells), None, dtype=object)
    if text.any():
        codes, uniques = pd.factorize(cells[text])
        clean = np.array([_clean(u) for u in uniques.tolist()] or [""], dtype=object)
        quoted = np.array([u.startswith(_FORMULA_START) for u in clean.tolist()], dtype=bool)
        cells[text] = clean[codes]
        formats[np.flatnonzero(text)[quoted[codes]]] = styles.quoted
        # A blank cell as read (an empty field of a CSV) stays blank, not an empty text cell
        # that a filter would list and a number column would hold as text.
        empty = np.flatnonzero(text)[(clean == "")[codes]]
        cells[empty] = None
    return cells.tolist(), formats.tolist(), text.tolist()


def _listed(value: Any) -> str:
    return format_number(value) if isinstance(value, float) else str(value)


def _flatten(prefix: str, value: Any, out: list[tuple[str, Any]]) -> None:
    if isinstance(value, dict):
        if not value:
            out.append((prefix, "(none)"))
        for k, v in value.items():
            _flatten(f"{prefix}.{k}" if prefix else str(k), v, out)
    elif isinstance(value, (list, tuple)):
        if value and all(isinstance(v, dict) for v in value):
            for i, v in enumerate(value, start=1):  # bands of the power distribution, say
                _flatten(f"{prefix}.{i}", v, out)
        else:
            # Numbers as the report shows them (three significant digits).
            out.append((prefix, ", ".join(_listed(v) for v in value)))
    else:
        out.append((prefix, value))


def _portfolio_sheet(wb: xlsxwriter.Workbook, result: AuditResult, styles: _Styles) -> None:
    ws = wb.add_worksheet("portfolio")
    _header(ws, ["quantity", "value"], 2, styles)
    items: list[tuple[str, Any]] = []
    _flatten("", portfolio_document(result), items)
    ws.set_column(
        0, 0, _text_width("quantity", np.array([k for k, _ in items], dtype=object), high=70)
    )
    ws.set_column(1, 1, 40)
    ws.freeze_panes(1, 0)
    for r, (key, value) in enumerate(items, start=1):
        _write_text(ws, r, 0, key, styles)
        if isinstance(value, float):
            ws.write_number(r, 1, value, styles.number("0.000"))
        elif value is None:
            ws.write_string(r, 1, "-")
        else:
            _write_value(ws, r, 1, value, styles)
    ws.autofilter(0, 0, max(len(items), 1), 1)


#: The ``groups`` sheet: one line per (column, value) of ``--group-by``, from result.groups.
_GROUP_HEADER = [
    "column",
    "value",
    "studies",
    "audited",
    "invalid",
    "studies_with_power",
    "median_power_at_planned_effect",
    "share_at_target_power",
    "worst_serious",
    "worst_warning",
    "worst_note",
    "worst_none",
    "excess_observed",
    "excess_expected",
    "excess_p_value",
    "excess_note",
]


def _groups_sheet(wb: xlsxwriter.Workbook, result: AuditResult, styles: _Styles) -> None:
    """The portfolio summary per value of each --group-by column (numbers stored as numbers)."""
    ws = wb.add_worksheet("groups")
    ws.freeze_panes(1, 0)
    ws.set_column(0, 1, 24)
    ws.set_column(2, len(_GROUP_HEADER) - 2, 12)
    ws.set_column(len(_GROUP_HEADER) - 1, len(_GROUP_HEADER) - 1, 60)
    _header(ws, _GROUP_HEADER, 0, styles)
    headers = dict(zip(result.groups, result.settings.get("group_by", []), strict=False))
    r = 0
    for column, groups in result.groups.items():
        for value, g in groups.items():
            r += 1
            worst = g["studies_by_worst_finding"]
            excess = g.get("excess_significance") or {}
            cells = [
                g["studies"],
                g["audited"],
                g["invalid"],
                g["studies_with_power"],
                g["median_power_at_planned_effect"],
                g["share_at_target_power"],
                worst["serious"],
                worst["warning"],
                worst["note"],
                worst["none"],
                excess.get("observed"),
                excess.get("expected"),
                excess.get("p_value"),
            ]
            note = g.get("excess_significance_note")
            height = row_heights([([note or ""], 60)], 1)[0]
            if height is not None:
                ws.set_row(r, height)  # the whole note shown, not cut at the column's edge
            _write_text(ws, r, 0, str(headers.get(column, column)), styles)
            _write_text(ws, r, 1, str(value), styles)
            for j, v in enumerate(cells, start=2):
                if isinstance(v, float) and j in (6, 7, 14):  # power, share, p-value
                    ws.write_number(r, j, v, styles.number("0.000"))
                else:
                    _write_value(ws, r, j, v, styles)
            if note:
                _write_text(ws, r, len(_GROUP_HEADER) - 1, note, styles, styles.wrap)
    ws.autofilter(0, 0, max(r, 1), len(_GROUP_HEADER) - 1)


def _rule_rows(result: AuditResult) -> list[list[str]]:
    rows = []
    for rule in getattr(result, "rules", []) or []:
        get = rule.get if isinstance(rule, dict) else lambda k, r=rule: getattr(r, k, "")
        refs = get("references") or []
        rows.append(
            [
                str(get("id")),
                str(get("severity")),
                str(get("summary") or get("title") or get("message") or ""),
                str(get("rationale") or ""),
                "\n".join(str(r) for r in refs) if not isinstance(refs, str) else refs,
            ]
        )
    return rows


_RULE_COLUMNS = (
    ("rule", 30),
    ("severity", 10),
    ("what it checks", 50),
    ("why it matters", 80),
    ("references", 50),
)


def _rules_sheet(wb: xlsxwriter.Workbook, result: AuditResult, styles: _Styles) -> None:
    ws = wb.add_worksheet("rules")
    for j, (_, width) in enumerate(_RULE_COLUMNS):
        ws.set_column(j, j, width)
    _header(ws, [name for name, _ in _RULE_COLUMNS], len(_RULE_COLUMNS), styles)
    ws.freeze_panes(1, 1)
    rows = _rule_rows(result)
    heights = row_heights(
        [([row[j] for row in rows], width) for j, (_, width) in enumerate(_RULE_COLUMNS)],
        len(rows),
    )
    for r, (row, height) in enumerate(zip(rows, heights, strict=True), start=1):
        if height is not None:
            ws.set_row(r, height)
        for j, value in enumerate(row):
            fmt = styles.wrap
            if j == 1 and value in SEVERITY_FILLS:
                fmt = styles.wrap_severity[value]
            ws.write_string(r, j, _clean(value), fmt)
    ws.autofilter(0, 0, max(len(rows), 1), len(_RULE_COLUMNS) - 1)


_INVALID_COLUMNS = (
    ("row", 6),
    ("study_id", 14),
    ("column", 22),
    ("value as written", 20),
    ("why it was rejected", 80),
)


def _invalid_sheet(wb: xlsxwriter.Workbook, result: AuditResult, styles: _Styles) -> None:
    ws = wb.add_worksheet("invalid rows")
    _header(ws, [name for name, _ in _INVALID_COLUMNS], len(_INVALID_COLUMNS), styles)
    for j, (_, width) in enumerate(_INVALID_COLUMNS):
        ws.set_column(j, j, width)
    ws.freeze_panes(1, 0)
    e = result.errors
    ids = result.table["study_id"].to_numpy(dtype=object)
    reasons = [str(v) for v in e["reason"]]
    heights = row_heights([(reasons, _INVALID_COLUMNS[-1][1])], len(reasons))
    for r, (pos, row, column, value, reason) in enumerate(
        zip(e["pos"], e["row"], e["column"], e["value"], reasons, strict=True), start=1
    ):
        if heights[r - 1] is not None:
            ws.set_row(r, heights[r - 1])
        study = ids[int(pos)]
        ws.write_number(r, 0, int(row))
        if study is not None:
            _write_text(ws, r, 1, str(study), styles)
        _write_text(ws, r, 2, str(column), styles)
        if value not in (None, ""):
            _write_text(ws, r, 3, str(value), styles)
        _write_text(ws, r, 4, reason, styles, styles.wrap)
    ws.autofilter(0, 0, max(len(reasons), 1), len(_INVALID_COLUMNS) - 1)


_READ_ME = (
    "This workbook was written by study-audit.",
    "Sheet 'audit': your columns as given, then the audit: status, highest severity of the "
    "findings (also shown by fill), the findings, every metric and notes on values that could "
    "not be computed.",
    "Metrics are design-based: power and minimal detectable effect follow from the design as "
    "planned and as realized, never from the observed effect. Power computed from the observed "
    "effect ('observed power') is a one-to-one transform of the p-value and adds nothing "
    "(Hoenig & Heisey 2001).",
    "The audit supports, and does not replace, the judgment of a qualified statistician; "
    "conclusions about clinical or policy studies need reading in context.",
    "Metric meanings:",
)


def _readme_sheet(wb: xlsxwriter.Workbook, result: AuditResult, styles: _Styles) -> None:
    ws = wb.add_worksheet("read me")
    ws.set_column(0, 0, 40)
    ws.set_column(1, 1, 100)
    lines: list[tuple[str, str | None]] = [(line, None) for line in _READ_ME]
    lines.append(("Caution", CAUTION))
    for key in ("source", "sheet", "header_row"):
        value = result.settings.get(key)
        lines.append((key, str(value) if value is not None else None))
    lines += [("input note", str(note)) for note in result.settings.get("input_notes", [])]
    lines += list(METRICS.items())
    # A first-column sentence (no second cell) spills over the empty cell beside it, so it is
    # measured against both columns together.
    heights = row_heights(
        [
            ([a if b is not None else "" for a, b in lines], 40),
            ([a if b is None else "" for a, b in lines], 140),
            ([b or "" for _, b in lines], 100),
        ],
        len(lines),
    )
    for r, ((first, second), height) in enumerate(zip(lines, heights, strict=True)):
        if height is not None:
            ws.set_row(r, height)
        if second is None:
            _write_text(ws, r, 0, first, styles)
        else:
            _write_text(ws, r, 0, first, styles, styles.wrap)
            _write_text(ws, r, 1, second, styles, styles.wrap)


def write_workbook(result: AuditResult, path: str | Path) -> None:
    """Write the annotated workbook to ``path`` (atomically; see :class:`WorkbookExport`).

    Raises
    ------
    OutputError
        ``path`` is the input file, a rules file of the run, or a folder.
    """
    with WorkbookExport(path, files_read(result)) as export:
        export.add(result)
        export.finish(result)


class _Guarded:
    """The export's file as xlsxwriter's zip writer sees it: after a failed write, or once the
    export is over, every further call does nothing.

    A write that fails (a full disk) leaves the zip writer inside xlsxwriter unfinished; when
    it is collected, later, it tries again to write its directory to a file that is closed by
    then, and Python prints "Exception ignored ... Traceback" on standard error. The failure
    itself has already been reported (as one sentence) by then.
    """

    def __init__(self, handle: IO[bytes]) -> None:
        self._handle: IO[bytes] | None = handle
        self._position = 0  # kept so that the zip writer's arithmetic stays consistent
        try:
            self._seekable = bool(handle.seekable())
        except (OSError, ValueError, AttributeError):
            self._seekable = False

    def retire(self) -> None:
        self._handle = None

    def write(self, data: bytes) -> int:
        if self._handle is not None:
            try:
                self._handle.write(data)
            except (OSError, ValueError):
                self._handle = None
                raise
        self._position += len(data)
        return len(data)

    def tell(self) -> int:
        if not self._seekable:  # a pipe: the zip writer then writes without seeking back
            raise OSError("not seekable")
        return self._position

    def seek(self, offset: int, whence: int = 0) -> int:
        if self._handle is not None:
            try:
                self._position = self._handle.seek(offset, whence)
            except (OSError, ValueError):
                self._handle = None
                raise
        else:
            self._position = offset if whence == 0 else self._position + offset
        return self._position

    def flush(self) -> None:
        if self._handle is not None:
            try:
                self._handle.flush()
            except (OSError, ValueError):
                self._handle = None
                raise

    def seekable(self) -> bool:
        return self._seekable

    def writable(self) -> bool:
        return True


class WorkbookExport:
    """The annotated workbook, streamed: xlsxwriter's constant-memory mode writes each row as
    it comes, with formats made once. The ``audit`` sheet takes the studies one part at a time
    (``add``); ``finish`` writes the other sheets from the whole result. The file is put in
    place when the context closes without an error.
    """

    def __init__(self, path: str | Path, reads: Iterable[tuple[str, str | Path | None]]) -> None:
        refuse_overwrite(path, reads)
        self._path = path
        self._stack = contextlib.ExitStack()

    def __enter__(self) -> WorkbookExport:
        handle = _Guarded(self._stack.enter_context(atomic_output(self._path, "wb")))
        self._stack.callback(handle.retire)
        self._wb = xlsxwriter.Workbook(
            handle,
            {"constant_memory": True, "strings_to_formulas": False, "strings_to_urls": False},
        )
        self._styles = _Styles(self._wb)
        # Sheets appear in the order they are added: the summary first, a panel's first page.
        self._summary = _SummarySheet(self._wb, self._styles)
        self._audit = _AuditSheet(self._wb, self._styles)
        return self

    def __exit__(self, *exc: object) -> bool | None:
        return self._stack.__exit__(*exc)  # type: ignore[arg-type]

    def add(self, result: AuditResult) -> None:
        """Append the studies of ``result`` to the ``summary`` and ``audit`` sheets."""
        self._summary.add(result)
        self._audit.add(result)

    def finish(self, result: AuditResult) -> None:
        """The portfolio, rules, invalid-rows and read-me sheets of the whole ``result``."""
        self._summary.finish()
        self._audit.finish()
        _portfolio_sheet(self._wb, result, self._styles)
        if result.groups:
            _groups_sheet(self._wb, result, self._styles)
        _rules_sheet(self._wb, result, self._styles)
        _invalid_sheet(self._wb, result, self._styles)
        _readme_sheet(self._wb, result, self._styles)
        from xlsxwriter.exceptions import FileCreateError

        try:
            self._wb.close()
        except FileCreateError as exc:  # xlsxwriter's wrapper of the OSError of a write
            cause = exc.__cause__ or exc.__context__
            reason = getattr(cause, "strerror", None) or str(exc)
            raise OutputError(
                f"{self._path}: the export could not be written ({reason}); nothing was replaced."
            ) from exc
