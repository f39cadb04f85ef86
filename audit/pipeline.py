"""The audit as a library call: read -> validate -> metrics -> rules -> portfolio.

>>> import pandas as pd, audit
>>> df = pd.DataFrame({"study_id": ["A"], "design": ["estimate"], "realized_se": [1.0]})
>>> round(float(audit.audit_table(df).metrics.loc[0, "mde"]), 2)
2.8
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from audit.caveats import caveats
from audit.errors import ConfigError
from audit.metrics import METRICS, REFERENCE_EFFECTS, REFERENCE_PREFIX, compute_metrics
from audit.plan_methods import tolerance_in_force
from audit.portfolio import (
    EXCESS_DEFAULTS,
    MAX_GROUPS,
    ExcessSettings,
    group_labels,
    group_summaries,
    pooled_effect_power,
    portfolio_summary,
)
from audit.rawtable import normalise_header
from audit.read import RawTable, raw_from_frame, read_table
from audit.reaudit import set_aside_output_columns
from audit.result import MAX_LISTED, AuditResult, flagged_rows, listing_order
from audit.rules import Evaluation, RuleSet, evaluate_rules, resolve_rules
from audit.schema import SPECS
from audit.validate import Validated, WholeTable, validate, whole_table

__all__ = [
    "CHUNK_ROWS",
    "STAGES",
    "AuditResult",
    "audit_file",
    "audit_stream",
    "audit_table",
    "stream_file",
]

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


def reference_effects_setting(values: Any) -> tuple[float, ...]:
    """The reference effects of a run, checked: positive finite numbers, each once, in the
    order given.

    Raises
    ------
    ConfigError
        Not a sequence of positive numbers (or a comma-separated text of them).
    """
    if isinstance(values, str):
        values = [v for v in values.split(",") if v.strip()]
    try:
        effects = tuple(float(v) for v in values)
    except (TypeError, ValueError):
        raise ConfigError(
            f"reference_effects must be positive numbers (standardized effects such as "
            f"0.2,0.5,0.8), but got {values!r}."
        ) from None
    bad = [v for v in effects if not (math.isfinite(v) and v > 0)]
    if bad or not effects:
        raise ConfigError(
            "reference_effects must be one or more positive numbers (standardized effects in "
            f"each design's unit, such as 0.2,0.5,0.8), but got {values!r}."
        )
    return tuple(dict.fromkeys(effects))


@dataclass(frozen=True)
class RunSettings:
    """What a run computes with, beyond the rules: passed from the API down to the metrics."""

    continuity_correction: bool = False
    excess: ExcessSettings = EXCESS_DEFAULTS
    reference_effects: tuple[float, ...] = REFERENCE_EFFECTS
    #: Columns (their names in the table) the portfolio is also summarised by, per value.
    group_by: tuple[str, ...] = ()


def group_columns(raw: RawTable, names: Any) -> tuple[str, ...]:
    """The table columns of ``--group-by`` names (matched as headers are: case-insensitively,
    spaces, dashes and underscores alike), each once.

    Raises
    ------
    ConfigError
        A name matches no column of the file, or its column holds more than
        :data:`~audit.portfolio.MAX_GROUPS` distinct values.
    """
    if names is None or isinstance(names, str):
        names = [] if names is None else [names]
    out: list[str] = []
    for name in names:
        column = normalise_header(name)
        if column not in raw.data.columns:
            shown = ", ".join(raw.headers.get(c, c) for c in list(raw.data.columns)[:12])
            more = ", ..." if len(raw.data.columns) > 12 else ""
            raise ConfigError(
                f"--group-by {name!r}: {raw.source} has no column of that name (its columns: "
                f"{shown}{more})."
            )
        distinct = len(pd.unique(group_labels(raw.data[column].to_numpy(dtype=object))))
        if distinct > MAX_GROUPS:
            raise ConfigError(
                f"--group-by {name!r}: the column holds {distinct:,} distinct values; at most "
                f"{MAX_GROUPS:,} groups can be summarised (group by a coarser column)."
            )
        if column not in out:
            out.append(column)
    return tuple(out)


def _with_family_power(
    table: pd.DataFrame,
    metrics: pd.DataFrame,
    notes: pd.DataFrame,
    valid: np.ndarray,
    pooling: str,
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """``power_at_pooled_effect`` filled in (one pooled estimate per outcome_family, over the
    whole table) and its notes merged into the notes."""
    power, family_notes = pooled_effect_power(table, metrics, valid, pooling)
    if not len(family_notes) and not np.isfinite(power).any():
        return metrics, notes
    metrics = metrics.copy()
    metrics["power_at_pooled_effect"] = power
    notes = pd.concat([notes, family_notes], ignore_index=True)
    notes = notes.sort_values("pos", kind="stable").reset_index(drop=True)
    notes["text"] = pd.Categorical(notes["text"].to_numpy(dtype=object))
    return metrics, notes


def _names_families(raw: RawTable) -> bool:
    """Whether any row of ``raw`` fills outcome_family: its rows are then pooled over the whole
    table before the rules (which may read power_at_pooled_effect) are applied."""
    if "outcome_family" not in raw.data.columns:
        return False
    cells = raw.data["outcome_family"]
    return bool(cells.map(lambda v: v is not None and str(v).strip() != "").any())


def audit_validated(
    validated: Validated,
    *,
    rules: Any = None,
    continuity_correction: bool = False,
    excess: ExcessSettings = EXCESS_DEFAULTS,
    reference_effects: tuple[float, ...] = REFERENCE_EFFECTS,
    group_by: Any = (),
    progress: Progress | None = None,
) -> AuditResult:
    """Audit an already validated table (see :func:`audit_table`)."""
    ruleset = resolve_rules(rules)
    run = RunSettings(
        continuity_correction, excess, reference_effects, group_columns(validated.raw, group_by)
    )
    table, metrics, notes, status = _metrics_of(validated, run, ruleset, progress)
    metrics, notes = _with_family_power(table, metrics, notes, validated.valid, excess.pooling)
    _announce(progress, "applying rules")
    evaluation = evaluate_rules(ruleset, table, metrics, validated.valid)
    return _summarised(
        validated, table, metrics, notes, status, evaluation, ruleset, run, progress=progress
    )


def _metrics_of(
    validated: Validated, run: RunSettings, ruleset: RuleSet, progress: Progress | None
) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame, np.ndarray]:
    """The audited table (run defaults applied), its metrics, all notes by row, and status.

    The tolerance of rule sample-size-not-reproducible in force (a user's override counts)
    goes to the metrics: plan_reproduced_by says which published method reproduces the plan
    within it, so that the metric and the rule agree.
    """
    table = validated.table.copy()
    # The run default applies where a row leaves continuity_correction blank.
    table["continuity_correction"] = table["continuity_correction"].fillna(
        1.0 if run.continuity_correction else 0.0
    )
    valid = validated.valid
    _announce(progress, "computing metrics")
    computed = compute_metrics(
        table,
        valid,
        plan_tolerance=tolerance_in_force(ruleset),
        reference_effects=run.reference_effects,
    )
    metrics = computed.values[[*METRICS, *[c for c in computed.values if c not in METRICS]]]
    notes = pd.concat([validated.notes, computed.notes], ignore_index=True)
    notes = notes.sort_values("pos", kind="stable").reset_index(drop=True)
    # Each distinct text once (a portfolio repeats a few thousand notes over many rows).
    notes["text"] = pd.Categorical(notes["text"].to_numpy(dtype=object))
    status = np.where(valid, "audited", "invalid").astype(object)
    return table, metrics, notes, status


def run_settings(
    raw: RawTable,
    file_notes: list[str],
    evaluation: Evaluation,
    ruleset: RuleSet,
    run: RunSettings,
) -> dict[str, Any]:
    """The ``settings`` of a result: what the run used (rules, defaults, source, excess test)."""
    enabled = ruleset.enabled()
    return {
        "rules": [r.id for r in enabled],
        "rules_disabled": [r.id for r in ruleset.rules.values() if not r.enabled],
        "rules_waiting": evaluation.waiting,
        "rule_parameters": {r.id: r.param_values() for r in enabled if r.parameters},
        "rule_files": list(ruleset.files),
        "rule_problems": evaluation.problems.to_dict("records"),
        "target_power_default": 0.8,
        "alpha_default": 0.05,
        "continuity_correction_default": bool(run.continuity_correction),
        "source": raw.source,
        "sheet": raw.sheet,
        "excess_significance": run.excess.as_dict(),
        # The tolerance within which a published method reproduces the plan
        # (plan_reproduced_by): max_discrepancy of rule sample-size-not-reproducible in force.
        "plan_reproduction_tolerance": tolerance_in_force(ruleset),
        "reference_effects": list(run.reference_effects),
        "group_by": [raw.headers.get(c, c) for c in run.group_by],
        "header_row": raw.header_row,
        # What the reader assumed or noticed about the file as a whole (encoding, other sheets,
        # title rows, merged or repeated headers).
        "input_notes": list(file_notes),
    }


def _summarised(
    validated: Validated,
    table: pd.DataFrame,
    metrics: pd.DataFrame,
    notes: pd.DataFrame,
    status: np.ndarray,
    evaluation: Evaluation,
    ruleset: RuleSet,
    run: RunSettings,
    *,
    progress: Progress | None,
) -> AuditResult:
    """The result of an audit whose rows are done: the portfolio summary and the settings."""
    valid = validated.valid
    findings = evaluation.findings
    _announce(progress, "summarising")
    portfolio = portfolio_summary(
        table,
        metrics,
        valid,
        findings,
        blank_rows=len(validated.raw.blank_rows),
        excess=run.excess,
        judged=evaluation.judged,
    )
    groups = (
        group_summaries(table, metrics, valid, findings, list(run.group_by), run.excess)
        if run.group_by
        else {}
    )
    settings = run_settings(validated.raw, validated.file_notes, evaluation, ruleset, run)
    enabled = ruleset.enabled()
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
        rules_judged=dict(evaluation.judged),
        caveats=caveats(metrics, portfolio),
        groups=groups,
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
    reference_effects: Any = REFERENCE_EFFECTS,
    group_by: Any = (),
    progress: Progress | None = None,
) -> AuditResult:
    """Audit a table of studies given as a DataFrame (one row per study, contract columns).

    Cells may be numbers or text as in a spreadsheet (``"5%"``, ``"1,234"``). Rows are numbered
    as if the frame were a sheet with its header on row 1. Rows are validated, computed and
    checked against the rules :data:`CHUNK_ROWS` at a time; the result holds them all.

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
        How each ``outcome_family`` is pooled (fixed-effect, or random-effects with the
        Paule-Mandel tau²): for ``power_at_pooled_effect``, the portfolio's ``families`` and
        ``excess_basis="pooled"``.
    excess_min_studies : int
        Fewest studies with a result and a power for the test to run (default 5).
    reference_effects : sequence of float, or text such as ``"0.2,0.5,0.8"``
        Standardized effects, in each design's standardized unit (d, d_z, h, r, f, f2, log HR),
        at which every study's design-based power is given (``reference_power_<x>``; the JSON
        object ``reference_power``). Default 0.2, 0.5, 0.8.
    group_by : sequence of str
        Columns of the table (user columns or contract columns, named as headers are matched)
        to summarise the portfolio by, per value: the result's ``groups`` (see
        :func:`audit.portfolio.group_summaries`).
    progress
        Called with each stage name of :data:`STAGES` as it starts.

    Raises
    ------
    ConfigError
        A rules file, one of the ``excess_*`` arguments or a ``group_by`` column is not valid.
    """
    ruleset = resolve_rules(rules)  # a bad rules file fails before any work is done
    excess = _excess_settings(excess_basis, excess_method, excess_pooling, excess_min_studies)
    references = reference_effects_setting(reference_effects)
    raw = df if isinstance(df, RawTable) else raw_from_frame(df)
    return audit_stream(
        raw,
        rules=ruleset,
        continuity_correction=continuity_correction,
        excess=excess,
        reference_effects=references,
        group_by=group_by,
        progress=progress,
    )


#: Rows audited together. Rows are independent apart from a study_id used twice (looked for in
#: the whole table) and the portfolio statistics (computed once, on all rows), so validation,
#: metrics and rules run on one chunk of rows at a time and their working memory stays that of
#: a chunk however large the file. Each chunk has fixed costs (a setting's solves, thread start-up
#: for the large special-function calls): 100,000 rows measured faster than 50,000 at 100k and 1M
#: studies (benchmarks/run.py), for about 10 MB more at the peak.
CHUNK_ROWS = 100_000


@dataclass
class Part:
    """The row-by-row audit of the rows ``start`` to ``start + len(table)`` of a table.

    Positions in ``failures``, ``notes`` and the findings count from the part's first row;
    ``raw`` holds the part's cells as read (None once handed on, see :func:`audit_stream`).
    """

    start: int
    raw: RawTable | None
    table: pd.DataFrame
    metrics: pd.DataFrame
    notes: pd.DataFrame
    status: np.ndarray
    failures: pd.DataFrame
    valid: np.ndarray
    evaluation: Evaluation
    file_notes: list[str]
    #: The part's metric columns as computed (a lean stream keeps fewer of them).
    metric_names: list[str]

    def result(self, source: RawTable, ruleset: RuleSet, run: RunSettings) -> AuditResult:
        """The part as a result of its own, for exports written a part at a time; its settings
        are those the whole result will have unless a rule must be applied again."""
        assert self.raw is not None
        return AuditResult(
            table=self.table,
            metrics=self.metrics,
            status=self.status,
            errors=self.failures,
            notes=self.notes,
            findings=self.evaluation.findings,
            portfolio={},
            settings=run_settings(source, self.file_notes, self.evaluation, ruleset, run),
            raw=self.raw,
        )


def _audit_part(
    rows: RawTable,
    start: int,
    whole: WholeTable | None,
    ruleset: RuleSet,
    run: RunSettings,
    progress: Progress | None,
    apply_rules: bool = True,
) -> Part:
    """Validate, compute and apply the rules to ``rows``, the rows from ``start`` on of a table
    (``whole``: what validation needs to know of that table; None: ``rows`` is all of it).
    ``apply_rules`` False leaves the rules to the whole table (see :func:`audit_stream`)."""
    _announce(progress, "checking rows")
    validated = validate(rows, whole)
    table, metrics, notes, status = _metrics_of(validated, run, ruleset, progress)
    if apply_rules:
        _announce(progress, "applying rules")
        evaluation = evaluate_rules(ruleset, table, metrics, validated.valid)
    else:
        evaluation = Evaluation(
            pd.DataFrame(columns=["pos", "rule", "severity", "message"]),
            pd.DataFrame(columns=["rule", "severity", "problem"]),
            {},
        )
    return Part(
        start=start,
        raw=rows,
        table=table,
        metrics=metrics,
        notes=notes,
        status=status,
        failures=validated.failures,
        valid=validated.valid,
        evaluation=evaluation,
        file_notes=validated.file_notes,
        metric_names=list(metrics.columns),
    )


def _header_only(raw: RawTable) -> RawTable:
    """``raw`` without its rows (a copy: a view of no rows would keep all the cells alive)."""
    return dataclasses.replace(raw, data=raw.data.iloc[:0].copy())


def _rows_of(raw: RawTable, start: int, stop: int, data: pd.DataFrame | None) -> RawTable:
    """The rows ``start`` to ``stop`` of ``raw`` as a table of their own (positions from 0);
    ``data``: their cells, where they were cut out already."""
    return dataclasses.replace(
        raw,
        data=raw.data.iloc[start:stop].reset_index(drop=True) if data is None else data,
        rows=raw.rows[start:stop],
        row_notes=[(p - start, t) for p, t in raw.row_notes if start <= p < stop],
        cell_problems=[(p - start, c, r) for p, c, r in raw.cell_problems if start <= p < stop],
    )


def audit_stream(
    raw: RawTable,
    *,
    rules: Any = None,
    continuity_correction: bool = False,
    excess: ExcessSettings = EXCESS_DEFAULTS,
    reference_effects: tuple[float, ...] = REFERENCE_EFFECTS,
    group_by: Any = (),
    progress: Progress | None = None,
    on_part: Callable[[AuditResult], None] | None = None,
    consume: bool = False,
    lean: bool = False,
    chunk_rows: int | None = None,
) -> AuditResult:
    """Audit ``raw`` a chunk of rows at a time; the whole result at the end.

    ``on_part`` is called with each part's result as it is done (an export written a part at a
    time). ``consume``: the cells of ``raw`` are let go once their part is audited and handed
    on (the result's ``raw`` then holds the header only), so a large file's text does not stay
    in memory beside its results. ``lean``: once a part is audited (and handed on), its notes,
    the columns of its table the summary and the report do not read, and the messages of its
    findings are let go, except the messages of the studies the report lists (the first
    :data:`~audit.result.MAX_LISTED` in its order); the result then serves the portfolio
    summary, the report and the exit status, not a study's details or the exports (which
    ``on_part`` wrote). Whether a rule failed on a part is known only at the end: a
    rule that failed anywhere is applied again to the whole table (it then reports no findings
    at all), and the result's ``settings["rules_reapplied"]`` says so; parts handed on before
    then carry that rule's findings.

    A table whose rows name an ``outcome_family`` is pooled per family over all its rows before
    the rules are applied (a rule may read ``power_at_pooled_effect``): its rules then run once,
    on the whole table, and ``on_part`` is called once, with the whole result (the cells are
    kept until then).
    """
    ruleset = resolve_rules(rules)
    raw = set_aside_output_columns(raw)
    run = RunSettings(
        continuity_correction, excess, reference_effects, group_columns(raw, group_by)
    )
    families = _names_families(raw)
    if families:
        consume = lean = False  # the single export at the end needs the cells and notes
    listing = _Listing(MAX_LISTED) if lean else None
    missing = [c for c in ("study_id", "design") if c not in raw.data.columns]
    if missing:
        validate(raw)  # raises the whole-file error naming the missing columns
    size = CHUNK_ROWS if chunk_rows is None else max(int(chunk_rows), 1)
    n = len(raw.data)
    whole = whole_table(raw) if n > size else None
    bounds = [(start, min(n, start + size)) for start in range(0, max(n, 1), size)]
    pieces: list[pd.DataFrame | None] = []
    if consume and whole is not None:
        # The cells cut into one frame per part (a copy of the references, not of the texts),
        # so that each part's texts are freed as soon as it is done.
        pieces = [raw.data.iloc[a:b].reset_index(drop=True).copy() for a, b in bounds]
        raw = _header_only(raw)
    parts: list[Part] = []
    tables, metrics = (_Columns(n), _Columns(n)) if len(bounds) > 1 else (None, None)
    for k, (start, stop) in enumerate(bounds):
        chunk = None if whole is None else dataclasses.replace(whole, start=start)
        # Each stage is announced once, by the first part.
        announce = progress if not parts else None
        rows = raw
        if chunk is not None:
            rows = _rows_of(raw, start, stop, pieces[k] if pieces else None)
        if pieces:
            pieces[k] = None
        part = _audit_part(rows, start, chunk, ruleset, run, announce, apply_rules=not families)
        del rows
        if on_part is not None and not families:
            on_part(part.result(raw, ruleset, run))
        part.raw = None
        if listing is not None:
            part.notes = part.notes.iloc[:0]
            part.table = part.table[_lean_columns(part.table, run)]
            part.metrics = part.metrics[_lean_metrics(part.metrics)]
            listing.keep_messages(part, parts)
        if tables is not None and metrics is not None:
            tables.put(start, part.table)
            metrics.put(start, part.metrics)
            part.table, part.metrics = part.table.iloc[:0].copy(), part.metrics.iloc[:0].copy()
        parts.append(part)
    result = _merged(
        _header_only(raw) if consume else raw,
        parts,
        tables,
        metrics,
        ruleset,
        run,
        families=families,
        lean=listing is not None,
        progress=progress,
    )
    if on_part is not None and families:
        on_part(result)
    return result


def _lean_columns(table: pd.DataFrame, run: RunSettings) -> list[str]:
    """The columns of the table a lean result keeps: the texts but the title (identity, design,
    effect measure, hypothesis: what the report shows and a design's variant is told by), the
    numbers the portfolio summary and the report read, and the ``group_by`` columns. A table
    that names an outcome_family is never lean (its pooling reads the results' columns)."""
    numbers = {"_row", "target_power", "margin", *run.group_by}
    texts = [c for c in table.columns if not pd.api.types.is_numeric_dtype(table[c].dtype)]
    return [c for c in table.columns if c in numbers or (c in texts and c != "title")]


#: The metrics a lean result keeps: those the portfolio summary, the caveats, the report's
#: listing and the command line's exit read (and the powers at the reference effects). A line of
#: the report that reads another metric must add it here (tests/test_pipeline.py checks the
#: modules' metric names against this set).
LEAN_METRICS = frozenset(
    {
        "power_at_planned_effect",
        "power_at_pooled_effect",
        "power_at_sesoi",
        "mde",
        "mde_std",
        "detectable_margin",
        "margin_share_of_control_effect",
        "n_ratio",
        "n_required_closest",
        "plan_closest_method",
        "plan_discrepancy_closest",
        "plan_reproduced_by",
        "direction_used",
        "ci_verdict",
        "ci_halfwidth_observed",
        "result_effect",
        "result_se",
        "result_significant",
        "observed_power",
        "type_s",
        "exaggeration",
        "reported_p_recomputed",
    }
)


def _lean_metrics(metrics: pd.DataFrame) -> list[str]:
    """The metric columns a lean result keeps (:data:`LEAN_METRICS`), in their order."""
    return [c for c in metrics.columns if c in LEAN_METRICS or c.startswith(REFERENCE_PREFIX)]


class _Listing:
    """The studies the report can still list, in a stream of parts: the first ``limit`` in its
    order (:func:`~audit.result.listing_order`) among the parts seen so far. A study's place
    depends on its own findings only, so one that falls out never comes back; the messages of
    every other study's findings are let go."""

    def __init__(self, limit: int) -> None:
        self.limit = limit
        self.kept = (np.empty(0, dtype=int), np.empty(0, dtype=int), np.empty(0, dtype=int))

    def keep_messages(self, part: Part, earlier: list[Part]) -> None:
        findings = part.evaluation.findings
        pos, worst, count = flagged_rows(findings, len(part.status))
        candidates = [
            np.concatenate([a, b])
            for a, b in zip(self.kept, (pos + part.start, worst, count), strict=True)
        ]
        order = listing_order(*candidates)[: self.limit]
        dropped = np.setdiff1d(self.kept[0], candidates[0][order])
        self.kept = tuple(c[order] for c in candidates)
        _drop_messages(part, ~np.isin(findings["pos"].to_numpy() + part.start, self.kept[0]))
        if len(dropped):
            for other in earlier:
                at = other.evaluation.findings["pos"].to_numpy() + other.start
                _drop_messages(other, np.isin(at, dropped))


def _drop_messages(part: Part, mask: np.ndarray) -> None:
    """The messages of ``part``'s findings where ``mask`` is set, replaced by None."""
    if not mask.any():
        return
    findings = part.evaluation.findings
    messages = findings["message"].to_numpy(dtype=object).copy()
    messages[mask] = None
    part.evaluation = dataclasses.replace(
        part.evaluation, findings=findings.assign(message=messages)
    )


class _Columns:
    """The columns of a frame of ``n`` rows, filled a part at a time: the parts' own frames go as
    soon as they are copied in, and no frame is stacked at the end (which would need the
    memory of both)."""

    def __init__(self, n: int) -> None:
        self.n = n
        self.columns: dict[str, np.ndarray] = {}

    def put(self, start: int, frame: pd.DataFrame) -> None:
        stop = start + len(frame)
        for name, column in list(self.columns.items()):
            if name not in frame.columns:  # blank in this part's rows (as in one pass)
                if column.dtype.kind not in "fO":
                    column = self.columns[name] = column.astype(object)
                column[start:stop] = np.nan if column.dtype.kind == "f" else None
        for name in frame.columns:
            values = frame[name].to_numpy()
            column = self.columns.get(name)
            if column is not None and column.dtype != values.dtype:
                column = self.columns[name] = column.astype(object)
                values = values.astype(object)
            if column is None:
                # Allocated, not written: the system gives the memory as the parts fill it.
                # Rows of earlier parts without this column are blank (as in one pass).
                kind = values.dtype.kind
                dtype = values.dtype if kind in "fO" or (kind in "iub" and start == 0) else object
                column = self.columns[name] = np.empty(self.n, dtype=dtype)
                if start:
                    column[:start] = np.nan if dtype.kind == "f" else None
            column[start:stop] = values

    def frame(self) -> pd.DataFrame:
        """The filled columns as one frame (object columns kept as objects)."""
        return pd.DataFrame(
            {
                name: pd.Series(values, dtype=object, copy=False)
                if values.dtype == object
                else values
                for name, values in self.columns.items()
            },
            index=pd.RangeIndex(self.n),
            copy=False,
        )


def _stacked(frames: list[pd.DataFrame], shifts: list[int] | None = None) -> pd.DataFrame:
    """The frames one above the other (``pos`` moved by ``shifts``), renumbered. Empty frames
    are left out, as their column types may be those of an empty frame."""
    if shifts is not None:
        frames = [
            f.assign(pos=f["pos"] + s) if len(f) and s else f
            for f, s in zip(frames, shifts, strict=True)
        ]
    if len(frames) == 1:
        return frames[0]
    kept = [f for f in frames if len(f)] or frames[:1]
    return pd.concat(kept, ignore_index=True)


def _united(columns: list[pd.Series]) -> pd.Categorical:
    """One categorical of the values of categorical columns, each distinct text once."""
    categories = [c.cat.categories.to_numpy(dtype=object) for c in columns]
    united = pd.Index(np.concatenate(categories), dtype=object).unique()
    codes = []
    for column, own in zip(columns, categories, strict=True):
        mapped = np.append(united.get_indexer(own), -1)  # code -1 (missing) stays -1
        codes.append(mapped[column.cat.codes.to_numpy()])
    return pd.Categorical.from_codes(np.concatenate(codes), categories=united)


def _merged(
    raw: RawTable,
    parts: list[Part],
    tables: _Columns | None,
    columns: _Columns | None,
    ruleset: RuleSet,
    run: RunSettings,
    *,
    families: bool,
    lean: bool = False,
    progress: Progress | None,
) -> AuditResult:
    """One result from the parts of a table (each frame stacked once, then let go); with
    ``families``, the pooled powers over the whole table and then the rules. A rule that must be
    applied again to the whole table is not, in a ``lean`` result (the columns it reads are
    gone): its ``settings["rules_reapplied"]`` then tells the caller to audit the file whole."""
    starts = [p.start for p in parts]
    first = parts[0]
    metric_names = [p.metric_names for p in parts]
    if tables is None or columns is None:  # one part: its own frames
        table, metrics = first.table, first.metrics
    else:
        table, metrics = tables.frame(), columns.frame()
    same_metrics = all(names == metric_names[0] for names in metric_names)
    if not same_metrics:  # a design's own metrics in some parts only: contract order first
        metrics = metrics[
            [*[c for c in METRICS if c in metrics], *[c for c in metrics if c not in METRICS]]
        ]
    texts = [p.notes["text"] for p in parts]
    notes = _stacked([p.notes for p in parts], starts)
    if len(parts) > 1:  # the parts' categories united, each text still stored once
        notes["text"] = _united(texts)
    failures = _stacked([p.failures for p in parts], starts)
    valid = np.concatenate([p.valid for p in parts])
    status = np.concatenate([p.status for p in parts])
    evaluations = [p.evaluation for p in parts]
    if families:
        metrics, notes = _with_family_power(table, metrics, notes, valid, run.excess.pooling)
        _announce(progress, "applying rules")
        evaluation = evaluate_rules(ruleset, table, metrics, valid)
        reapplied = False
    else:
        problems = any(len(e.problems) for e in evaluations)
        waiting = [e.waiting for e in evaluations]
        again = problems or not same_metrics or any(w != waiting[0] for w in waiting)
        if again and not lean:
            # As one pass would: a failing rule reports no findings at all (and supersedes none).
            evaluation = evaluate_rules(ruleset, table, metrics, valid)
            reapplied = len(parts) > 1
        else:
            reapplied = again and len(parts) > 1  # lean: the caller audits the file whole
            findings = _stacked([e.findings for e in evaluations], starts)
            judged: dict[str, int] = {}
            for e in evaluations:
                for rule, count in e.judged.items():
                    judged[rule] = judged.get(rule, 0) + count
            evaluation = dataclasses.replace(evaluations[0], findings=findings, judged=judged)
    validated = Validated(
        table=table,
        failures=failures,
        notes=notes.iloc[:0],
        valid=valid,
        extra_columns=[c for c in table.columns if c not in SPECS and c != "_row"],
        raw=raw,
        file_notes=first.file_notes,
    )
    result = _summarised(
        validated, table, metrics, notes, status, evaluation, ruleset, run, progress=progress
    )
    if reapplied:
        result.settings["rules_reapplied"] = True
    return result


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
    reference_effects: Any = REFERENCE_EFFECTS,
    group_by: Any = (),
    progress: Progress | None = None,
) -> AuditResult:
    """Read and audit a spreadsheet or CSV file (keyword arguments as :func:`audit_table`)."""
    ruleset = resolve_rules(rules)
    _excess_settings(excess_basis, excess_method, excess_pooling, excess_min_studies)
    reference_effects_setting(reference_effects)
    _announce(progress, "reading")
    return audit_table(
        read_table(path, sheet=sheet),
        rules=ruleset,
        continuity_correction=continuity_correction,
        excess_basis=excess_basis,
        excess_method=excess_method,
        excess_pooling=excess_pooling,
        excess_min_studies=excess_min_studies,
        reference_effects=reference_effects,
        group_by=group_by,
        progress=progress,
    )


def stream_file(
    path: str | Path,
    *,
    sheet: str | None = None,
    rules: Any = None,
    on_part: Callable[[AuditResult], None] | None = None,
    continuity_correction: bool = False,
    excess_basis: str = "planned",
    excess_method: str = "exact",
    excess_pooling: str = "fixed",
    excess_min_studies: int = 5,
    reference_effects: Any = REFERENCE_EFFECTS,
    group_by: Any = (),
    progress: Progress | None = None,
    lean: bool = False,
) -> AuditResult:
    """Read and audit a file as the command line does: each part of the studies is handed to
    ``on_part`` as it is audited (exports written a part at a time) and the file's cells are let
    go once handed on, so the result's ``raw`` holds the header only; ``lean``: so are the notes
    and the messages the report does not list (see :func:`audit_stream`). For the whole result,
    cells included, use :func:`audit_file`."""
    ruleset = resolve_rules(rules)
    excess = _excess_settings(excess_basis, excess_method, excess_pooling, excess_min_studies)
    references = reference_effects_setting(reference_effects)
    _announce(progress, "reading")
    return audit_stream(
        read_table(path, sheet=sheet),
        rules=ruleset,
        continuity_correction=continuity_correction,
        excess=excess,
        reference_effects=references,
        group_by=group_by,
        progress=progress,
        on_part=on_part,
        consume=True,
        lean=lean,
    )
