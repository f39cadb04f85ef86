"""The audit as a library call: read -> validate -> metrics -> rules -> portfolio.

>>> import pandas as pd, audit
>>> df = pd.DataFrame({"study_id": ["A"], "design": ["estimate"], "realized_se": [1.0]})
>>> round(float(audit.audit_table(df).metrics.loc[0, "mde"]), 2)
2.8
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from audit.caveats import caveats
from audit.errors import ConfigError
from audit.metrics import METRICS, compute_metrics
from audit.portfolio import EXCESS_DEFAULTS, ExcessSettings, portfolio_summary
from audit.read import RawTable, raw_from_frame, read_table
from audit.reaudit import set_aside_output_columns
from audit.result import AuditResult
from audit.rules import Evaluation, RuleSet, evaluate_rules, resolve_rules
from audit.validate import Validated, validate

__all__ = ["STAGES", "AuditResult", "audit_file", "audit_table"]

#: The steps of an audit, in order, as announced to a ``progress`` callback.
STAGES = ("reading", "checking rows", "computing metrics", "applying rules", "summarising")

#: Called with the name of each stage as it starts (see :data:`STAGES`).
Progress = Callable[[str], None]


def _announce(progress: Progress | None, stage: str) -> None:
    if progress is not None:
        progress(stage)


def _excess_settings(basis: str, method: str, pooling: str, min_studies: int) -> ExcessSettings:
    settings = ExcessSettings(basis, method, pooling, min_studies)
    problems = settings.problems()
    if problems:
        raise ConfigError("; ".join(problems) + ".")
    return settings


def audit_validated(
    validated: Validated,
    *,
    rules: Any = None,
    continuity_correction: bool = False,
    excess: ExcessSettings = EXCESS_DEFAULTS,
    progress: Progress | None = None,
) -> AuditResult:
    """Audit an already validated table (see :func:`audit_table`)."""
    ruleset = resolve_rules(rules)
    table, metrics, notes, status = _metrics_of(validated, continuity_correction, progress)
    _announce(progress, "applying rules")
    evaluation = evaluate_rules(ruleset, table, metrics, validated.valid)
    return _summarised(
        validated,
        table,
        metrics,
        notes,
        status,
        evaluation,
        ruleset,
        continuity_correction=continuity_correction,
        excess=excess,
        progress=progress,
    )


def _metrics_of(
    validated: Validated, continuity_correction: bool, progress: Progress | None
) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame, np.ndarray]:
    """The audited table (run defaults applied), its metrics, all notes by row, and status."""
    table = validated.table.copy()
    # The run default applies where a row leaves continuity_correction blank.
    table["continuity_correction"] = table["continuity_correction"].fillna(
        1.0 if continuity_correction else 0.0
    )
    valid = validated.valid
    _announce(progress, "computing metrics")
    computed = compute_metrics(table, valid)
    metrics = computed.values[[*METRICS, *[c for c in computed.values if c not in METRICS]]]
    notes = pd.concat([validated.notes, computed.notes], ignore_index=True)
    notes = notes.sort_values("pos", kind="stable").reset_index(drop=True)
    # Each distinct text once (a portfolio repeats a few thousand notes over many rows).
    notes["text"] = pd.Categorical(notes["text"].to_numpy(dtype=object))
    status = np.where(valid, "audited", "invalid").astype(object)
    return table, metrics, notes, status


def _summarised(
    validated: Validated,
    table: pd.DataFrame,
    metrics: pd.DataFrame,
    notes: pd.DataFrame,
    status: np.ndarray,
    evaluation: Evaluation,
    ruleset: RuleSet,
    *,
    continuity_correction: bool,
    excess: ExcessSettings,
    progress: Progress | None,
) -> AuditResult:
    """The result of an audit whose rows are done: the portfolio summary and the settings."""
    valid = validated.valid
    findings = evaluation.findings
    _announce(progress, "summarising")
    portfolio = portfolio_summary(
        table, metrics, valid, findings, blank_rows=len(validated.raw.blank_rows), excess=excess
    )
    enabled = ruleset.enabled()
    settings = {
        "rules": [r.id for r in enabled],
        "rules_disabled": [r.id for r in ruleset.rules.values() if not r.enabled],
        "rules_waiting": evaluation.waiting,
        "rule_parameters": {r.id: r.param_values() for r in enabled if r.parameters},
        "rule_files": list(ruleset.files),
        "rule_problems": evaluation.problems.to_dict("records"),
        "target_power_default": 0.8,
        "alpha_default": 0.05,
        "continuity_correction_default": bool(continuity_correction),
        "source": validated.raw.source,
        "sheet": validated.raw.sheet,
        "excess_significance": excess.as_dict(),
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
        rules=enabled,
        rules_waiting=evaluation.waiting,
        rule_problems=evaluation.problems,
        caveats=caveats(metrics, portfolio),
    )


def audit_table(
    df: pd.DataFrame | RawTable,
    *,
    rules: Any = None,
    continuity_correction: bool = False,
    excess_basis: str = "planned",
    excess_method: str = "exact",
    excess_pooling: str = "fixed",
    excess_min_studies: int = 5,
    progress: Progress | None = None,
) -> AuditResult:
    """Audit a table of studies given as a DataFrame (one row per study, contract columns).

    Cells may be numbers or text as in a spreadsheet (``"5%"``, ``"1,234"``). Rows are numbered
    as if the frame were a sheet with its header on row 1.

    Parameters
    ----------
    rules
        None for the bundled rules; a :class:`audit.rules.RuleSet`; or a rules file path (or a
        parsed mapping of the same shape), or a list of them, applied on top of the bundled
        rules: ``[[rule]]`` tables add rules, ``[override.RULE-ID]`` tables change severity,
        ``enabled`` or parameters.
    continuity_correction : bool
        The run's default for ``two_proportions`` rows that leave the column of that name blank.
    excess_basis : {"planned", "pooled"}
        Power basis of the test of excess significance: each study's design-based power at its
        planned effect, or its power at the pooled estimate of its ``outcome_family``.
    excess_method : {"exact", "chi2"}
        Exact Poisson-binomial p-value, or the chi-square form of Ioannidis & Trikalinos (2007).
    excess_pooling : {"fixed", "random"}
        Pooled estimate for ``excess_basis="pooled"``: fixed-effect or random-effects.
    excess_min_studies : int
        Fewest studies with a result and a power for the test to run (default 5).
    progress
        Called with each stage name of :data:`STAGES` as it starts.

    Raises
    ------
    ConfigError
        A rules file or one of the ``excess_*`` arguments is not valid.
    """
    ruleset = resolve_rules(rules)  # a bad rules file fails before any work is done
    excess = _excess_settings(excess_basis, excess_method, excess_pooling, excess_min_studies)
    raw = set_aside_output_columns(df if isinstance(df, RawTable) else raw_from_frame(df))
    _announce(progress, "checking rows")
    return audit_validated(
        validate(raw),
        rules=ruleset,
        continuity_correction=continuity_correction,
        excess=excess,
        progress=progress,
    )


def audit_file(
    path: str | Path,
    *,
    sheet: str | None = None,
    rules: Any = None,
    continuity_correction: bool = False,
    excess_basis: str = "planned",
    excess_method: str = "exact",
    excess_pooling: str = "fixed",
    excess_min_studies: int = 5,
    progress: Progress | None = None,
) -> AuditResult:
    """Read and audit a spreadsheet or CSV file (keyword arguments as :func:`audit_table`)."""
    ruleset = resolve_rules(rules)
    _excess_settings(excess_basis, excess_method, excess_pooling, excess_min_studies)
    _announce(progress, "reading")
    return audit_table(
        read_table(path, sheet=sheet),
        rules=ruleset,
        continuity_correction=continuity_correction,
        excess_basis=excess_basis,
        excess_method=excess_method,
        excess_pooling=excess_pooling,
        excess_min_studies=excess_min_studies,
        progress=progress,
    )
