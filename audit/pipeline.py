"""The audit as a library call: read -> validate -> metrics -> rules -> portfolio.

>>> import pandas as pd, audit
>>> df = pd.DataFrame({"study_id": ["A"], "design": ["estimate"], "realized_se": [1.0]})
>>> round(float(audit.audit_table(df).metrics.loc[0, "mde"]), 2)
2.8
"""

from __future__ import annotations

import contextlib
import dataclasses
import math
import pickle
import tempfile
import weakref
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, Any

import numpy as np
import pandas as pd

from audit import parallel
from audit.caveats import caveats
from audit.errors import ConfigError
from audit.metrics import METRICS, REFERENCE_EFFECTS, compute_metrics
from audit.plan_methods import tolerance_in_force
from audit.portfolio import (
    EXCESS_DEFAULTS,
    ExcessSettings,
    pooled_effect_power,
    portfolio_summary,
)
from audit.read import RawTable, raw_from_frame, read_table
from audit.rules import Evaluation, Rule, RuleSet, evaluate_rules, resolve_rules
from audit.schema import Validated, WholeTable, study_ids, validate

__all__ = ["STAGES", "AuditResult", "audit_file", "audit_table"]

#: The steps of an audit, in order, as announced to a ``progress`` callback.
STAGES = ("reading", "checking rows", "computing metrics", "applying rules", "summarising")

#: Called with the name of each stage as it starts (see :data:`STAGES`).
Progress = Callable[[str], None]


def _announce(progress: Progress | None, stage: str) -> None:
    if progress is not None:
        progress(stage)


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
    #: JSON text of the studies from ``start`` on, being encoded by a forked child for
    #: :func:`audit.export.write_json` (set by ``audit_file(..., prepare_json=True)``).
    prepared_studies: PreparedStudies | None = field(default=None, repr=False, compare=False)

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
        values = frame[column].to_numpy(dtype=object)[order].tolist()
        ends = np.cumsum(np.bincount(positions, minlength=n)).tolist()
        starts = [0, *ends[:-1]]
        return [values[a:b] for a, b in zip(starts, ends, strict=True)]

    def error_sentences(self) -> np.ndarray:
        """One sentence per failure (row of ``errors``): column, value as written, reason."""
        e = self.errors
        if not len(e):
            return np.array([], dtype=object)
        value = e["value"].astype(str)
        text = (
            e["column"].astype(str)
            + np.where(value == "", " (blank)", " = '" + value + "'")
            + ": "
            + e["reason"].astype(str)
        )
        return text.to_numpy(dtype=object)

    def error_texts(self) -> list[list[str]]:
        """The failure sentences of each input row (empty for audited rows)."""
        if not len(self.errors):
            return [[] for _ in range(len(self.table))]
        frame = pd.DataFrame({"pos": self.errors["pos"], "text": self.error_sentences()})
        return self.by_row(frame, "text")

    def document_head(self) -> dict[str, Any]:
        """The keys of the JSON document that come before ``studies``."""
        from audit import __version__

        return {"tool": "study-audit", "version": __version__, "settings": self.settings}

    def document_tail(self) -> dict[str, Any]:
        """The keys of the JSON document that come after ``studies``."""
        return {"portfolio": _jsonable(self.portfolio), "caveats": self.caveats}

    def study_json(
        self, chunk: int = 10_000, start: int = 0, stop: int | None = None
    ) -> Iterator[bytes]:
        """The ``studies`` of the JSON document as JSON text, in input order, ``chunk`` studies
        at a time (comma-separated objects; see :mod:`audit.studyjson`), for the studies at
        positions ``start`` to ``stop`` (default: all)."""
        from audit.studyjson import study_chunks

        return study_chunks(self, chunk, start, stop)

    def to_dict(self) -> dict[str, Any]:
        """The JSON document of the output contract (DESIGN.md section 5)."""
        import orjson

        studies = orjson.loads(b"[" + b",".join(self.study_json()) + b"]")
        return {**self.document_head(), "studies": studies, **self.document_tail()}


@dataclass
class PreparedStudies:
    """JSON text of studies encoded during the audit, for :func:`audit.export.write_json`: the
    studies from ``start`` on by a forked child (``task.result()``; None if it failed), and,
    where ``own`` is given, those before ``start``, encoded by this process into that file."""

    start: int
    task: parallel.ChildTask
    own: IO[bytes] | None = None

    def close(self) -> None:
        """Stop the child if it still runs, and drop the text (again: a no-op)."""
        self.task.close()
        if self.own is not None:
            self.own.close()


def _prepare_studies(
    ruleset: RuleSet,
    validated: Validated,
    table: pd.DataFrame,
    metrics: pd.DataFrame,
    notes: pd.DataFrame,
    status: np.ndarray,
) -> PreparedStudies:
    """Start a child on the JSON text of the last studies (a share of 1 - PARENT_SHARE).

    The child applies the rules to its rows itself (rules look at one row at a time, so the
    findings are those of the whole run), then encodes the studies. This process applies the
    rules to all rows meanwhile, as the report and summary need them; the overlap costs less
    than waiting. A rule that fails on the child's rows makes the child give up: the parent
    then encodes those studies from its own findings.
    """
    from audit import export

    start = int(len(table) * export.PARENT_SHARE)
    valid = validated.valid

    def child(out: IO[bytes]) -> None:
        part = evaluate_rules(ruleset, table.iloc[start:], metrics.iloc[start:], valid[start:])
        if len(part.problems):
            raise RuntimeError("a rule failed on the child's rows")
        view = AuditResult(
            table=table,
            metrics=metrics,
            status=status,
            errors=validated.failures,
            notes=notes,
            findings=part.findings.assign(pos=part.findings["pos"] + start),
            portfolio={},
            settings={},
            raw=validated.raw,
        )
        for i, text in enumerate(view.study_json(start=start)):
            out.write(b"," + text if i else text)

    return PreparedStudies(start, parallel.ChildTask(child).start())


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
    notes["text"] = notes["text"].astype(object)
    return metrics, notes


def _has_families(table: pd.DataFrame, valid: np.ndarray) -> bool:
    return bool((valid & table["outcome_family"].notna().to_numpy(dtype=bool)).any())


def audit_validated(
    validated: Validated,
    *,
    rules: Any = None,
    continuity_correction: bool = False,
    excess: ExcessSettings = EXCESS_DEFAULTS,
    reference_effects: tuple[float, ...] = REFERENCE_EFFECTS,
    progress: Progress | None = None,
    prepare_json: bool = False,
) -> AuditResult:
    """Audit an already validated table (see :func:`audit_table`).

    ``prepare_json``: the result is about to be written as JSON (:func:`audit.export.write_json`);
    for a large portfolio a forked child starts encoding part of it now.
    """
    ruleset = resolve_rules(rules)
    table, metrics, notes, status = _metrics_of(
        validated, continuity_correction, progress, tolerance_in_force(ruleset), reference_effects
    )
    valid = validated.valid
    metrics, notes = _with_family_power(table, metrics, notes, valid, excess.pooling)
    _announce(progress, "applying rules")
    prepared = None
    with contextlib.ExitStack() as cleanup:
        if prepare_json and len(table) >= _json_split_min() and parallel.can_fork():
            prepared = _prepare_studies(ruleset, validated, table, metrics, notes, status)
            # Stopped if anything below fails (an interrupted run leaves no child behind).
            cleanup.callback(prepared.task.close)
            evaluation = evaluate_rules(ruleset, table, metrics, valid)
            if len(evaluation.problems):
                # A failing rule reports no findings at all, which the child, seeing only its
                # rows, cannot know: write_json encodes every study here instead.
                prepared.task.close()
                prepared = None
        else:
            evaluation = evaluate_rules(ruleset, table, metrics, valid)
        result = _summarised(
            validated,
            table,
            metrics,
            notes,
            status,
            evaluation,
            ruleset,
            continuity_correction=continuity_correction,
            excess=excess,
            reference_effects=reference_effects,
            progress=progress,
        )
        if prepared is not None:
            _hand_over(result, prepared, cleanup)
    return result


def _hand_over(
    result: AuditResult, prepared: PreparedStudies, cleanup: contextlib.ExitStack
) -> None:
    """Give ``result`` the studies' JSON text being encoded; their child and files then live
    as long as the result (a library caller that never writes JSON stops the child with it)."""
    result.prepared_studies = prepared
    weakref.finalize(result, prepared.close)
    cleanup.pop_all()


def _metrics_of(
    validated: Validated,
    continuity_correction: bool,
    progress: Progress | None,
    plan_tolerance: float,
    reference_effects: tuple[float, ...] = REFERENCE_EFFECTS,
) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame, np.ndarray]:
    """The audited table (run defaults applied), its metrics, all notes by row, and status.

    ``plan_tolerance`` is the tolerance of rule sample-size-not-reproducible in force (a
    user's override counts): the metric plan_reproduced_by says which published method
    reproduces the plan within it, so that the metric and the rule agree.
    """
    table = validated.table.copy()
    # The run default applies where a row leaves continuity_correction blank.
    table["continuity_correction"] = table["continuity_correction"].fillna(
        1.0 if continuity_correction else 0.0
    )
    valid = validated.valid
    _announce(progress, "computing metrics")
    computed = compute_metrics(
        table, valid, plan_tolerance=plan_tolerance, reference_effects=reference_effects
    )
    metrics = computed.values[[*METRICS, *[c for c in computed.values if c not in METRICS]]]
    notes = pd.concat([validated.notes, computed.notes], ignore_index=True)
    notes = notes.sort_values("pos", kind="stable").reset_index(drop=True)
    # Texts as objects whatever the parts were (pandas infers a str type for some of them).
    notes["text"] = notes["text"].astype(object)
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
    reference_effects: tuple[float, ...] = REFERENCE_EFFECTS,
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
        excess=excess,
        judged=evaluation.judged,
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
        # The tolerance within which a published method reproduces the plan
        # (plan_reproduced_by): max_discrepancy of rule sample-size-not-reproducible in force.
        "plan_reproduction_tolerance": tolerance_in_force(ruleset),
        "source": validated.raw.source,
        "sheet": validated.raw.sheet,
        "excess_significance": excess.as_dict(),
        "reference_effects": list(reference_effects),
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
        rules_judged=dict(evaluation.judged),
    )


#: From this many rows a table is audited by two processes, each taking a share of the rows
#: (see :func:`_audit_in_shares`).
SHARE_MIN = 20_000
#: The share of the rows this process audits when a child audits the others. The child's share
#: is the larger: this process also merges, summarises and writes the outputs.
PARENT_SHARE = 0.44


@dataclass
class _Share:
    """The row-by-row audit of some rows of a table (positions counted from its first row)."""

    table: pd.DataFrame
    metrics: pd.DataFrame
    notes: pd.DataFrame
    status: np.ndarray
    failures: pd.DataFrame
    valid: np.ndarray
    evaluation: Evaluation
    file_notes: list[str]
    extra_columns: list[str]


def _audit_share(
    raw: RawTable,
    start: int,
    stop: int,
    ids: pd.Series,
    ruleset: RuleSet,
    continuity_correction: bool,
    progress: Progress | None,
    reference_effects: tuple[float, ...] = REFERENCE_EFFECTS,
) -> _Share:
    """Validate, compute and apply the rules to the rows ``start`` to ``stop`` of ``raw``."""
    _announce(progress, "checking rows")
    validated = validate(_rows_of(raw, start, stop), WholeTable(ids, raw.rows, start))
    table, metrics, notes, status = _metrics_of(
        validated, continuity_correction, progress, tolerance_in_force(ruleset), reference_effects
    )
    _announce(progress, "applying rules")
    evaluation = evaluate_rules(ruleset, table, metrics, validated.valid)
    return _Share(
        table=table,
        metrics=metrics,
        notes=notes,
        status=status,
        failures=validated.failures,
        valid=validated.valid,
        evaluation=evaluation,
        file_notes=validated.file_notes,
        extra_columns=validated.extra_columns,
    )


def _rows_of(raw: RawTable, start: int, stop: int) -> RawTable:
    """The rows ``start`` to ``stop`` of ``raw`` as a table of their own (positions from 0)."""
    return dataclasses.replace(
        raw,
        data=raw.data.iloc[start:stop].reset_index(drop=True),
        rows=raw.rows[start:stop],
        row_notes=[(p - start, t) for p, t in raw.row_notes if start <= p < stop],
        cell_problems=[(p - start, c, r) for p, c, r in raw.cell_problems if start <= p < stop],
    )


def _stacked(first: pd.DataFrame, second: pd.DataFrame, shift: int | None = None) -> pd.DataFrame:
    """``first`` above ``second`` (its ``pos`` moved by ``shift``), renumbered. An empty part is
    left out, as its column types may be those of an empty frame."""
    if shift is not None and len(second):
        second = second.assign(pos=second["pos"] + shift)
    parts = [part for part in (first, second) if len(part)] or [first]
    return pd.concat(parts, ignore_index=True)


def _audit_in_shares(
    raw: RawTable,
    ruleset: RuleSet,
    *,
    continuity_correction: bool,
    excess: ExcessSettings,
    reference_effects: tuple[float, ...] = REFERENCE_EFFECTS,
    progress: Progress | None,
    prepare_json: bool,
) -> AuditResult:
    """Audit a large table in two processes: a forked child audits the last rows (a share of
    1 - :data:`PARENT_SHARE`) while this process audits the first ones, then hands its results
    over pickled and, for ``prepare_json``, goes on to encode its studies' JSON text.

    Rows are audited one at a time, except that a study_id used twice is looked for in the
    whole table (both processes know all ids). The result equals that of one process; where
    the child fails, its rows are audited here. A rule that fails on either share is applied
    again to the whole table (it then reports no findings at all, as in one process) and the
    shares' JSON text is not used. Rules look at one row at a time (the rule language makes
    them so): a rule failing on the whole table fails on a share too.
    """
    n = len(raw.data)
    start = min(max(int(n * PARENT_SHARE), 1), n - 1)
    ids = study_ids(raw)

    def child(facts: IO[bytes], studies: IO[bytes], handover: Callable[[], None]) -> None:
        parallel.ENABLED = False  # this process has its core; it starts no child of its own
        share = _audit_share(
            raw, start, n, ids, ruleset, continuity_correction, None, reference_effects
        )
        pickle.dump(share, facts, protocol=pickle.HIGHEST_PROTOCOL)
        handover()
        if prepare_json and not len(share.evaluation.problems):
            _write_studies(share, raw, studies)

    with contextlib.ExitStack() as cleanup:
        task = parallel.ChildTask(child, parts=2).start()
        cleanup.callback(task.close)
        with parallel.suspended():
            mine = _audit_share(
                raw, 0, start, ids, ruleset, continuity_correction, progress, reference_effects
            )
            own = None
            if prepare_json and not len(mine.evaluation.problems):
                # Done while the child finishes its share (this share is the smaller one).
                try:
                    own = cleanup.enter_context(tempfile.TemporaryFile())
                    _write_studies(mine, raw, own)
                except OSError:  # no room for it: write_json encodes these studies itself
                    own = None
        facts = task.first()
        theirs = pickle.load(facts) if facts is not None else None
        child_json = prepare_json and theirs is not None
        if theirs is None:  # no child, or it failed: its rows are audited here
            theirs = _audit_share(
                raw, start, n, ids, ruleset, continuity_correction, None, reference_effects
            )
        validated = Validated(
            table=_stacked(mine.table, theirs.table),
            failures=_stacked(mine.failures, theirs.failures, start),
            notes=pd.DataFrame({"pos": np.zeros(0, dtype=int), "text": np.zeros(0, dtype=object)}),
            valid=np.concatenate([mine.valid, theirs.valid]),
            extra_columns=mine.extra_columns,
            raw=raw,
            file_notes=mine.file_notes,
        )
        table = validated.table
        metrics = _stacked(mine.metrics, theirs.metrics)
        notes = _stacked(mine.notes, theirs.notes, start)
        status = np.concatenate([mine.status, theirs.status])
        a, b = mine.evaluation, theirs.evaluation
        # The families are pooled over the whole table: their powers and notes come now, so
        # the shares' JSON text (made without them) is not used, and rules reading them are
        # applied again.
        families = _has_families(table, validated.valid)
        if families:
            metrics, notes = _with_family_power(
                table, metrics, notes, validated.valid, excess.pooling
            )
            child_json = False
        reads_family = families and any(
            "power_at_pooled_effect" in rule.columns() for rule in ruleset.enabled()
        )
        if len(a.problems) or len(b.problems) or a.waiting != b.waiting or reads_family:
            # As one process would: the rule reports no findings at all.
            evaluation = evaluate_rules(ruleset, table, metrics, validated.valid)
            child_json = False
        else:
            judged = {k: a.judged.get(k, 0) + b.judged.get(k, 0) for k in {**a.judged, **b.judged}}
            evaluation = dataclasses.replace(
                a, findings=_stacked(a.findings, b.findings, start), judged=judged
            )
        if list(mine.metrics.columns) != list(theirs.metrics.columns):
            metrics = metrics[[*METRICS, *[c for c in metrics if c not in METRICS]]]
            child_json = False  # the child's studies lack a metric the others have
        result = _summarised(
            validated,
            table,
            metrics,
            notes,
            status,
            evaluation,
            ruleset,
            continuity_correction=continuity_correction,
            excess=excess,
            reference_effects=reference_effects,
            progress=progress,
        )
        if child_json:
            _hand_over(result, PreparedStudies(start, task, own), cleanup)
    return result


def _write_studies(share: _Share, raw: RawTable, out: IO[bytes]) -> None:
    """The JSON text of a share's studies (as in ``studies``, comma-separated) into ``out``."""
    view = AuditResult(
        table=share.table,
        metrics=share.metrics,
        status=share.status,
        errors=share.failures,
        notes=share.notes,
        findings=share.evaluation.findings,
        portfolio={},
        settings={},
        raw=raw,
    )
    for i, text in enumerate(view.study_json()):
        out.write(b"," + text if i else text)


def _json_split_min() -> int:
    from audit import export

    return export.PARALLEL_JSON_MIN


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
    progress: Progress | None = None,
    prepare_json: bool = False,
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
        How each ``outcome_family`` is pooled (fixed-effect, or random-effects with the
        Paule-Mandel tau²): for ``power_at_pooled_effect``, the portfolio's ``families`` and
        ``excess_basis="pooled"``.
    excess_min_studies : int
        Fewest studies with a result and a power for the test to run (default 5).
    reference_effects : sequence of float, or text such as ``"0.2,0.5,0.8"``
        Standardized effects, in each design's standardized unit (d, d_z, h, r, f, f2, log HR),
        at which every study's design-based power is given (``reference_power_<x>``; the JSON
        object ``reference_power``). Default 0.2, 0.5, 0.8.
    progress
        Called with each stage name of :data:`STAGES` as it starts.
    prepare_json : bool
        The result will be written with :func:`audit.export.write_json` straight away: a large
        portfolio starts part of that work in a forked child (Linux, two or more cores).

    Raises
    ------
    ConfigError
        A rules file or one of the ``excess_*`` arguments is not valid.
    """
    ruleset = resolve_rules(rules)  # a bad rules file fails before any work is done
    excess = _excess_settings(excess_basis, excess_method, excess_pooling, excess_min_studies)
    references = reference_effects_setting(reference_effects)
    raw = df if isinstance(df, RawTable) else raw_from_frame(df)
    if _in_shares(raw):
        return _audit_in_shares(
            raw,
            ruleset,
            continuity_correction=continuity_correction,
            excess=excess,
            reference_effects=references,
            progress=progress,
            prepare_json=prepare_json,
        )
    _announce(progress, "checking rows")
    return audit_validated(
        validate(raw),
        rules=ruleset,
        continuity_correction=continuity_correction,
        excess=excess,
        reference_effects=references,
        progress=progress,
        prepare_json=prepare_json,
    )


def _in_shares(raw: RawTable) -> bool:
    """Whether :func:`_audit_in_shares` audits ``raw``: a large table with the columns every
    study needs (validate reports their absence), where a child can be forked."""
    columns = raw.data.columns
    return (
        len(raw.data) >= SHARE_MIN
        and "study_id" in columns
        and "design" in columns
        and parallel.can_fork()
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
    reference_effects: Any = REFERENCE_EFFECTS,
    progress: Progress | None = None,
    prepare_json: bool = False,
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
        progress=progress,
        prepare_json=prepare_json,
    )
