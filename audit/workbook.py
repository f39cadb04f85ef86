"""The annotated workbook (``check --xlsx OUT``): the user's table with the audit beside it.

Sheets:

* ``audit`` — the user's columns first, as they were (numbers of contract columns stored as
  numbers), then the row number, status, highest severity, findings, every metric (stored as
  numbers with formats) and the notes. Severity shows as text *and* as a fill, so it survives
  black-and-white printing.
* ``portfolio`` — the portfolio summary.
* ``rules`` — the rules in force with their rationale and references.
* ``invalid rows`` — every rejected cell with its reason.
* ``read me`` — what the sheets hold and the cautions that go with them.

Text that a spreadsheet would take for a formula is stored as text with a quote prefix, so it
cannot run. Re-auditing the ``audit`` sheet gives the same metrics: the user's cells are written
back exactly as the audit read them.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from openpyxl import Workbook
from openpyxl.cell import WriteOnlyCell
from openpyxl.styles import Alignment, Font, PatternFill

from audit.export import CAUTION, ILLEGAL_XLSX, atomic_output, refuse_input
from audit.metrics import METRICS
from audit.schema import SPECS, parse_numbers

if TYPE_CHECKING:
    import pandas as pd

    from audit.pipeline import AuditResult

__all__ = ["SEVERITY_FILLS", "write_workbook"]

#: Fills for the severity cell; the severity is also written as text.
SEVERITY_FILLS = {
    "serious": PatternFill("solid", fgColor="E8A0A0"),
    "warning": PatternFill("solid", fgColor="F5D58C"),
    "note": PatternFill("solid", fgColor="CFE0F1"),
}
_INVALID_FILL = PatternFill("solid", fgColor="D9D9D9")
_OURS_FILL = PatternFill("solid", fgColor="E4E9DF")
_BOLD = Font(bold=True)
_WRAP = Alignment(wrap_text=True, vertical="top")
_SEVERITY_ORDER = {"note": 0, "warning": 1, "serious": 2}
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")

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


def _text_cell(ws: Any, value: str) -> WriteOnlyCell:
    # Control characters cannot be stored in a workbook (XML 1.0); they become U+FFFD.
    value = ILLEGAL_XLSX.sub("\ufffd", value)
    cell = WriteOnlyCell(ws, value=None)
    cell.value = value
    cell.data_type = "s"
    if value.startswith(_FORMULA_START):
        # Stored as a string, never a formula; the quote prefix keeps it text when edited.
        cell.quotePrefix = True
    return cell


def _header(ws: Any, names: list[str], ours_from: int) -> None:
    cells = []
    for j, name in enumerate(names):
        cell = _text_cell(ws, str(name))
        cell.font = _BOLD
        if j >= ours_from:
            cell.fill = _OURS_FILL
        cells.append(cell)
    ws.append(cells)


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
        names.append(raw.headers[c])
        columns.append(values)
    return names, columns


def _by_row_text(result: AuditResult, frame: pd.DataFrame, column: str) -> list[str]:
    return ["\n".join(str(v) for v in items) for items in result.by_row(frame, column)]


def _audit_sheet(wb: Workbook, result: AuditResult) -> None:
    ws = wb.create_sheet("audit")
    user_names, user_values = _user_columns(result)
    metrics = result.metrics
    metric_names = list(metrics.columns)
    ours = ["row", "status", "highest severity", "findings", *metric_names, "errors", "notes"]
    _header(ws, [*user_names, *ours], len(user_names))
    ws.freeze_panes = "B2"

    findings = result.findings
    worst = np.full(len(result.table), "", dtype=object)
    if len(findings):
        rank = findings["severity"].map(_SEVERITY_ORDER).fillna(-1).to_numpy()
        order = np.argsort(rank, kind="stable")
        pos = findings["pos"].to_numpy(dtype=int)[order]
        worst[pos] = findings["severity"].to_numpy(dtype=object)[order]
        text = (
            findings["rule"].astype(str)
            + " ("
            + findings["severity"].astype(str)
            + "): "
            + findings["message"].astype(str)
        )
        finding_text = _by_row_text(result, findings.assign(text=text), "text")
    else:
        finding_text = [""] * len(result.table)
    errors = ["\n".join(e) for e in result.error_texts()]
    notes = _by_row_text(result, result.notes, "text")
    rows = result.table["_row"].to_numpy()
    metric_arrays = [metrics[m].to_numpy() for m in metric_names]
    formats = [_format_for(m) for m in metric_names]

    for i in range(len(result.table)):
        cells: list[Any] = []
        for values in user_values:
            v = values[i]
            if v is None or (isinstance(v, float) and math.isnan(v)):
                cells.append(None)
            elif isinstance(v, str):
                cells.append(_text_cell(ws, v))
            else:
                cells.append(v)
        cells.append(int(rows[i]))
        status = WriteOnlyCell(ws, value=str(result.status[i]))
        if result.status[i] != "audited":
            status.fill = _INVALID_FILL
        cells.append(status)
        sev = WriteOnlyCell(ws, value=worst[i] or None)
        if worst[i]:
            sev.fill = SEVERITY_FILLS[worst[i]]
        cells.append(sev)
        cells.append(_text_cell(ws, finding_text[i]) if finding_text[i] else None)
        for arr, fmt in zip(metric_arrays, formats, strict=True):
            v = arr[i]
            if isinstance(v, str):
                cells.append(v)
            elif v is None or not np.isfinite(v):
                cells.append(None)
            else:
                cell = WriteOnlyCell(ws, value=float(v))
                cell.number_format = fmt
                cells.append(cell)
        cells.append(_text_cell(ws, errors[i]) if errors[i] else None)
        cells.append(_text_cell(ws, notes[i]) if notes[i] else None)
        ws.append(cells)


def _flatten(prefix: str, value: Any, out: list[tuple[str, Any]]) -> None:
    if isinstance(value, dict):
        if not value:
            out.append((prefix, "(none)"))
        for k, v in value.items():
            _flatten(f"{prefix}.{k}" if prefix else str(k), v, out)
    elif isinstance(value, (list, tuple)):
        out.append((prefix, ", ".join(str(v) for v in value)))
    else:
        out.append((prefix, value))


def _portfolio_sheet(wb: Workbook, result: AuditResult) -> None:
    ws = wb.create_sheet("portfolio")
    _header(ws, ["quantity", "value"], 0)
    items: list[tuple[str, Any]] = []
    _flatten("", result.to_dict()["portfolio"], items)
    for key, value in items:
        # Keys can hold the user's text (outcome_family names): string cells, never formulas.
        label = _text_cell(ws, key)
        if isinstance(value, float):
            cell = WriteOnlyCell(ws, value=value)
            cell.number_format = "0.000"
            ws.append([label, cell])
        elif isinstance(value, str):
            ws.append([label, _text_cell(ws, value)])
        else:
            ws.append([label, "-" if value is None else value])


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


def _rules_sheet(wb: Workbook, result: AuditResult) -> None:
    ws = wb.create_sheet("rules")
    _header(ws, ["rule", "severity", "what it checks", "why it matters", "references"], 0)
    for row in _rule_rows(result):
        cells = [_text_cell(ws, v) for v in row]
        for c in cells:
            c.alignment = _WRAP
        if row[1] in SEVERITY_FILLS:
            cells[1].fill = SEVERITY_FILLS[row[1]]
        ws.append(cells)
    ws.column_dimensions["A"].width = 30
    ws.column_dimensions["C"].width = 50
    ws.column_dimensions["D"].width = 80
    ws.column_dimensions["E"].width = 50


def _invalid_sheet(wb: Workbook, result: AuditResult) -> None:
    ws = wb.create_sheet("invalid rows")
    _header(ws, ["row", "study_id", "column", "value as written", "why it was rejected"], 0)
    e = result.errors
    ids = result.table["study_id"].to_numpy(dtype=object)
    for pos, row, column, value, reason in zip(
        e["pos"], e["row"], e["column"], e["value"], e["reason"], strict=True
    ):
        study = ids[int(pos)]
        ws.append(
            [
                int(row),
                _text_cell(ws, str(study)) if study is not None else None,
                str(column),
                _text_cell(ws, str(value)) if value not in (None, "") else None,
                str(reason),
            ]
        )


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


def _readme_sheet(wb: Workbook, result: AuditResult) -> None:
    ws = wb.create_sheet("read me")
    for line in _READ_ME:
        ws.append([line])
    ws.append(["Caution", CAUTION])
    for key in ("source", "sheet", "header_row"):
        value = result.settings.get(key)
        ws.append([key, _text_cell(ws, str(value)) if value is not None else None])
    for note in result.settings.get("input_notes", []):
        ws.append(["input note", _text_cell(ws, str(note))])
    for name, meaning in METRICS.items():
        ws.append([name, meaning])
    ws.column_dimensions["A"].width = 40
    ws.column_dimensions["B"].width = 100


def write_workbook(result: AuditResult, path: str | Path) -> None:
    """Write the annotated workbook to ``path`` (atomically; write-only mode for large files).

    Raises
    ------
    OutputError
        ``path`` is the input file or a folder.
    """
    refuse_input(result, path)
    wb = Workbook(write_only=True)
    _audit_sheet(wb, result)
    _portfolio_sheet(wb, result)
    _rules_sheet(wb, result)
    _invalid_sheet(wb, result)
    _readme_sheet(wb, result)
    with atomic_output(path, "wb") as handle:
        wb.save(handle)
