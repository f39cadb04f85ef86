"""The result of an audit: frames and settings only. Renderers (JSON, CSV, workbook, report,
plots, referee text) read it; it holds no encoder, no process and no prepared output.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from audit.read import RawTable
from audit.rules import SEVERITY_RANK, Rule

__all__ = ["MAX_LISTED", "AuditResult", "flagged_rows", "listing_order"]

#: At most this many studies with findings, and this many invalid rows, are listed by the
#: report; the exports hold them all.
MAX_LISTED = 50


def flagged_rows(findings: pd.DataFrame, n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The rows of ``n`` with findings: their positions (ascending), the rank of each one's most
    severe finding (:data:`~audit.rules.SEVERITY_RANK`) and its number of findings."""
    worst = np.full(n, -1)
    count = np.zeros(n, dtype=int)
    if len(findings):
        ranks = findings["severity"].map(SEVERITY_RANK).to_numpy(dtype=int)
        positions = findings["pos"].to_numpy(dtype=int)
        np.maximum.at(worst, positions, ranks)
        np.add.at(count, positions, 1)
    flagged = np.flatnonzero(worst >= 0)
    return flagged, worst[flagged], count[flagged]


def listing_order(positions: np.ndarray, worst: np.ndarray, count: np.ndarray) -> np.ndarray:
    """The order in which the report lists studies with findings (indices into the arrays of
    :func:`flagged_rows`): most severe first, then most findings, then input order. Each
    study's place depends on its own findings only, so the first ``k`` of a whole table are the
    first ``k`` of the first ``k`` of each of its parts."""
    return np.lexsort((positions, -count, -worst))


@dataclass
class AuditResult:
    """Everything one audit produced, as tables; exports and reports only render it.

    Attributes
    ----------
    table : the validated input (typed contract columns, ``_row``, unknown columns).
    metrics : one column per metric, aligned with ``table``; nan where not computed.
    status : ``"audited"`` or ``"invalid"`` per row.
    errors : failures of invalid rows (``pos``, ``row``, ``column``, ``value``, ``reason``).
    notes : ``pos``, ``text``: why metrics are null and what was assumed. ``text`` is a
        categorical column: each distinct note is stored once.
    findings : ``pos``, ``rule``, ``severity``, ``message``: rule flags, by row then rule.
    portfolio : the portfolio block of the JSON contract.
    settings : what the run used (rules in force, defaults, source, excess-significance test).
    raw : the table as read, for exports that give the user's columns back untouched.
    rules : the enabled rules of the run, in listing order.
    rules_waiting : rule id -> metrics it needs that this run does not compute (no flags).
    rule_problems : ``rule``, ``severity``, ``problem``: rules that failed internally.
    rules_judged : rule id -> audited rows its condition could judge (true or false).
    caveats : plain-language caveats that apply (``topic``, ``title``, ``text``), for the
        report's caveats section.
    groups : ``{column: {value: summary}}``, the portfolio summary per value of each
        ``group_by`` column (see :func:`audit.portfolio.group_summaries`); empty without one.
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
    rules: list[Rule] = field(default_factory=list)
    rules_waiting: dict[str, list[str]] = field(default_factory=dict)
    rule_problems: pd.DataFrame = field(
        default_factory=lambda: pd.DataFrame(columns=["rule", "severity", "problem"])
    )
    caveats: list[dict[str, str]] = field(default_factory=list)
    #: rule id -> audited rows on which the rule's condition was known (true or false).
    rules_judged: dict[str, int] = field(default_factory=dict)
    groups: dict[str, dict[str, dict[str, Any]]] = field(default_factory=dict)

    @property
    def valid(self) -> np.ndarray:
        return self.status == "audited"

    def metric_names(self) -> list[str]:
        return list(self.metrics.columns)

    def positions_of(self, study_id: str) -> list[int]:
        """Row positions whose ``study_id`` is ``study_id`` (trimmed; exact match)."""
        ids = self.table["study_id"].to_numpy(dtype=object)
        wanted = str(study_id).strip()
        return [i for i, v in enumerate(ids) if v is not None and str(v).strip() == wanted]

    def by_row(self, frame: pd.DataFrame, column: str) -> list[list[Any]]:
        """Group a long (pos, ...) table into one list per input row."""
        n = len(self.table)
        if not len(frame):
            return [[] for _ in range(n)]
        # Sort once (stable: the order within a row is kept), then slice a plain list per row.
        positions = frame["pos"].to_numpy(dtype=np.int64)
        order = np.argsort(positions, kind="stable")
        values = np.asarray(frame[column].to_numpy(dtype=object))[order].tolist()
        ends = np.cumsum(np.bincount(positions, minlength=n)).tolist()
        starts = [0, *ends[:-1]]
        return [values[a:b] for a, b in zip(starts, ends, strict=True)]

    def error_sentences(self) -> np.ndarray:
        """One sentence per failure (row of ``errors``): column, value as written, reason."""
        e = self.errors
        if not len(e):
            return np.array([], dtype=object)
        value = e["value"].astype(object).astype(str)
        text = (
            e["column"].astype(object).astype(str)
            + np.where(value == "", " (blank)", " = '" + value + "'")
            + ": "
            + e["reason"].astype(object).astype(str)
        )
        return text.to_numpy(dtype=object)

    def error_texts(self) -> list[list[str]]:
        """The failure sentences of each input row (empty for audited rows)."""
        if not len(self.errors):
            return [[] for _ in range(len(self.table))]
        frame = pd.DataFrame({"pos": self.errors["pos"], "text": self.error_sentences()})
        return self.by_row(frame, "text")

    def to_dict(self) -> dict[str, Any]:
        """The JSON document of the output contract (DESIGN.md section 5): the JSON export's
        own text, decoded, so the file and this document cannot disagree."""
        import orjson

        from audit.jsonout import document_bytes

        return orjson.loads(document_bytes(self))
