"""The audit as a library call: read -> validate -> metrics -> rules -> portfolio.

>>> import pandas as pd, audit
>>> df = pd.DataFrame({"study_id": ["A"], "design": ["estimate"], "realized_se": [1.0]})
>>> round(audit.audit_table(df).metrics.loc[0, "mde"], 2)
2.8
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from audit.metrics import METRICS, compute_metrics
from audit.portfolio import portfolio_summary
from audit.read import RawTable, raw_from_frame, read_table
from audit.schema import Validated, validate

__all__ = ["AuditResult", "audit_file", "audit_table"]

_FINDING_COLUMNS = ["pos", "rule", "severity", "message"]


@dataclass
class AuditResult:
    """Everything one audit produced, as tables; exports and reports only render it.

    Attributes
    ----------
    table : the validated input (typed contract columns, ``_row``, unknown columns).
    metrics : one column per metric, aligned with ``table``; nan where not computed.
    status : ``"audited"`` or ``"invalid"`` per row.
    errors : failures of invalid rows (``pos``, ``row``, ``column``, ``value``, ``reason``).
    notes : ``pos``, ``text``: why metrics are null and what was assumed.
    findings : ``pos``, ``rule``, ``severity``, ``message``: rule flags.
    portfolio : the portfolio block of the JSON contract.
    settings : what the run used (rules in force, defaults, source).
    raw : the table as read, for exports that give the user's columns back untouched.
    """

    table: pd.DataFrame
    metrics: pd.DataFrame
    status: np.ndarray
    errors: pd.DataFrame
    notes: pd.DataFrame
    findings: pd.DataFrame
    portfolio: dict[str, Any]
    settings: dict[str, Any]
    raw: RawTable
    rules: list[Any] = field(default_factory=list)

    @property
    def valid(self) -> np.ndarray:
        return self.status == "audited"

    def metric_names(self) -> list[str]:
        return list(self.metrics.columns)

    def by_row(self, frame: pd.DataFrame, column: str) -> list[list[Any]]:
        """Group a long (pos, ...) table into one list per input row."""
        out: list[list[Any]] = [[] for _ in range(len(self.table))]
        if len(frame):
            for pos, value in zip(frame["pos"].to_numpy(), frame[column].to_numpy(), strict=True):
                out[int(pos)].append(value)
        return out

    def error_texts(self) -> list[list[str]]:
        """One sentence per failure: column, value as written, and the reason."""
        if not len(self.errors):
            return [[] for _ in range(len(self.table))]
        e = self.errors
        text = (
            e["column"].astype(str)
            + np.where(
                e["value"].astype(str) == "", " (blank)", " = '" + e["value"].astype(str) + "'"
            )
            + ": "
            + e["reason"].astype(str)
        )
        return self.by_row(pd.DataFrame({"pos": e["pos"], "text": text}), "text")

    def to_dict(self) -> dict[str, Any]:
        """The JSON document of the output contract (DESIGN.md section 5)."""
        from audit import __version__

        errors = self.error_texts()
        details = self.by_row(
            self.errors.assign(detail=self.errors[["column", "value", "reason"]].to_dict("records"))
            if len(self.errors)
            else self.errors.assign(detail=[]),
            "detail",
        )
        notes = self.by_row(self.notes, "text")
        flag_records = (
            self.findings.assign(
                flag=self.findings[["rule", "severity", "message"]].to_dict("records")
            )
            if len(self.findings)
            else self.findings.assign(flag=[])
        )
        flags = self.by_row(flag_records, "flag")
        metric_records = _metric_records(self.metrics)
        ids = self.table["study_id"].to_numpy(dtype=object)
        designs = self.table["design"].to_numpy(dtype=object)
        rows = self.table["_row"].to_numpy()
        studies = [
            {
                "study_id": ids[i],
                "row": int(rows[i]),
                "design": designs[i],
                "status": str(self.status[i]),
                "errors": errors[i],
                "error_details": details[i],
                "notes": notes[i],
                "metrics": metric_records[i],
                "flags": flags[i],
            }
            for i in range(len(self.table))
        ]
        return {
            "tool": "study-audit",
            "version": __version__,
            "settings": self.settings,
            "studies": studies,
            "portfolio": _jsonable(self.portfolio),
        }


_INTEGER_METRICS = {"n_required_plan", "n_required_realized", "events_required_plan"}


def _metric_records(metrics: pd.DataFrame) -> list[dict[str, Any]]:
    """Metrics per row with nan as None and sizes as integers."""
    cols = list(metrics.columns)
    arrays = []
    for c in cols:
        col = metrics[c]
        if col.dtype == object:
            arrays.append([v if isinstance(v, str) else None for v in col])
        else:
            vals = col.to_numpy(dtype=float)
            obj = vals.astype(object)
            obj[~np.isfinite(vals)] = None
            if c in _INTEGER_METRICS:
                finite = np.isfinite(vals)
                obj[finite] = vals[finite].astype(np.int64).astype(object)
            arrays.append(obj.tolist())
    return (
        [dict(zip(cols, values, strict=True)) for values in zip(*arrays, strict=True)]
        if cols
        else [{} for _ in range(len(metrics))]
    )


def _jsonable(value: Any) -> Any:
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return None if not math.isfinite(float(value)) else float(value)
    return value


def audit_validated(validated: Validated, *, rules: Any = None) -> AuditResult:
    """Audit an already validated table (see :func:`audit_table`)."""
    table = validated.table
    valid = validated.valid
    computed = compute_metrics(table, valid)
    metrics = computed.values[[*METRICS, *[c for c in computed.values if c not in METRICS]]]
    notes = pd.concat([validated.notes, computed.notes], ignore_index=True)
    notes = notes.sort_values("pos", kind="stable").reset_index(drop=True)
    findings = pd.DataFrame({c: pd.Series(dtype=object) for c in _FINDING_COLUMNS})
    status = np.where(valid, "audited", "invalid").astype(object)
    portfolio = portfolio_summary(
        table, metrics, valid, findings, blank_rows=len(validated.raw.blank_rows)
    )
    settings = {
        "rules": [],
        "target_power_default": 0.8,
        "alpha_default": 0.05,
        "source": validated.raw.source,
        "sheet": validated.raw.sheet,
        "header_row": validated.raw.header_row,
        # What the reader assumed or noticed about the file as a whole (encoding, other sheets,
        # title rows, merged or repeated headers).
        "input_notes": list(validated.file_notes),
    }
    return AuditResult(
        table=table,
        metrics=metrics,
        status=status,
        errors=validated.failures,
        notes=notes,
        findings=findings,
        portfolio=portfolio,
        settings=settings,
        raw=validated.raw,
    )


def audit_table(df: pd.DataFrame | RawTable, *, rules: Any = None) -> AuditResult:
    """Audit a table of studies given as a DataFrame (one row per study, contract columns).

    Cells may be numbers or text as in a spreadsheet (``"5%"``, ``"1,234"``). Rows are numbered
    as if the frame were a sheet with its header on row 1.
    """
    raw = df if isinstance(df, RawTable) else raw_from_frame(df)
    return audit_validated(validate(raw), rules=rules)


def audit_file(path: str | Path, *, sheet: str | None = None, rules: Any = None) -> AuditResult:
    """Read and audit a spreadsheet or CSV file."""
    return audit_table(read_table(path, sheet=sheet), rules=rules)
