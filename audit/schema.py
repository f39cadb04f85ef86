"""The input contract: one spec per column, and lazy, vectorised validation of every row.

Validation never raises for a bad row. It returns a typed table (numbers as floats, text as
strings), a failure table with one line per bad cell (spreadsheet row, column, value, reason) and
notes about values it interpreted. A row with any failure is *invalid*: it still appears in every
output, with its errors, but is not audited.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Literal

import numpy as np
import pandas as pd

from audit.designs import DESIGNS
from audit.errors import InputError
from audit.read import UNCACHED, RawTable, normalise_header

__all__ = ["COLUMNS", "Column", "Validated", "parse_numbers", "validate"]

Kind = Literal["text", "design", "number", "integer", "choice", "flag"]


@dataclass(frozen=True)
class Column:
    """Specification of one contract column: type, allowed range, default and meaning."""

    name: str
    kind: Kind
    group: str
    meaning: str
    default: float | str | None = None
    low: float | None = None
    high: float | None = None
    low_open: bool = True
    high_open: bool = True
    choices: tuple[str, ...] = ()
    #: A proportion: values above 1 are almost surely percentages written without '%'.
    proportion: bool = False

    def range_text(self) -> str:
        if self.kind == "flag":
            return "yes or no (also true/false, 1/0)"
        if self.kind in ("choice", "design"):
            return "one of " + ", ".join(self.choices)
        lo = "" if self.low is None else f"{self.low:g}"
        hi = "" if self.high is None else f"{self.high:g}"
        whole = "a whole number" if self.kind == "integer" else "a number"
        if self.low is not None and self.high is not None:
            left = "(" if self.low_open else "["
            right = ")" if self.high_open else "]"
            return f"{whole} in {left}{lo}, {hi}{right}"
        if self.low is not None:
            return f"{whole} {'>' if self.low_open else '>='} {lo}"
        return whole


def _p(name: str, group: str, meaning: str, **kw: object) -> Column:
    return Column(name, "number", group, meaning, low=0.0, high=1.0, proportion=True, **kw)


def _count(name: str, group: str, meaning: str, low: float = 1.0) -> Column:
    return Column(name, "integer", group, meaning, low=low, low_open=False)


#: Every column of the input contract (DESIGN.md section 3), in the order of the template.
COLUMNS: tuple[Column, ...] = (
    Column("study_id", "text", "identity", "Unique identifier of the study (required)."),
    Column("title", "text", "identity", "Free text: the study's title or short description."),
    Column(
        "design",
        "design",
        "identity",
        "Study design; one of the design names (required).",
        choices=tuple(DESIGNS),
    ),
    _p("alpha", "test", "Significance level per comparison.", default=0.05),
    Column(
        "sides",
        "choice",
        "test",
        "1 for a one-sided, 2 for a two-sided test.",
        default="2",
        choices=("1", "2"),
    ),
    _p("target_power", "test", "Power the study aimed for.", default=0.8),
    Column(
        "comparisons",
        "integer",
        "test",
        "Number of primary comparisons sharing alpha (Bonferroni).",
        default=1.0,
        low=1.0,
        low_open=False,
    ),
    _count(
        "planned_n1",
        "sizes",
        "Planned analysable units in group 1 (one-group designs: N; cluster designs: clusters).",
    ),
    _count("planned_n2", "sizes", "Planned analysable units in group 2."),
    _count("realized_n1", "sizes", "Units actually analysed in group 1."),
    _count("realized_n2", "sizes", "Units actually analysed in group 2."),
    Column(
        "planned_sd",
        "number",
        "variability",
        "Outcome SD assumed in planning (paired: SD of differences).",
        low=0.0,
    ),
    Column("realized_sd", "number", "variability", "Outcome SD observed.", low=0.0),
    Column(
        "effect_scale",
        "choice",
        "effects",
        "'raw' (outcome units) or 'd' (standardized mean differences).",
        default="raw",
        choices=("raw", "d"),
    ),
    Column("planned_effect", "number", "effects", "Effect the study was powered for."),
    _p("planned_p1", "effects", "Planned control-group proportion."),
    _p("planned_p2", "effects", "Planned intervention-group proportion."),
    _p("realized_p1", "effects", "Realized control-group proportion."),
    Column("sesoi", "number", "effects", "Smallest effect size of interest, in effect units."),
    Column("groups", "integer", "sizes", "Number of groups (k_means).", low=2.0, low_open=False),
    Column(
        "predictors",
        "integer",
        "sizes",
        "Predictors tested (regression numerator df).",
        low=1.0,
        low_open=False,
    ),
    Column("covariates", "integer", "sizes", "Covariates adjusted for.", low=0.0, low_open=False),
    _p(
        "covariate_r2",
        "variability",
        "Share of outcome variance the covariates explain.",
        low_open=False,
    ),
    _p(
        "planned_icc",
        "variability",
        "Intracluster correlation assumed in planning.",
        low_open=False,
    ),
    _p("realized_icc", "variability", "Intracluster correlation observed.", low_open=False),
    Column(
        "planned_cluster_size",
        "number",
        "sizes",
        "Planned mean units per cluster.",
        low=1.0,
        low_open=False,
    ),
    Column(
        "realized_cluster_size",
        "number",
        "sizes",
        "Realized mean units per cluster.",
        low=1.0,
        low_open=False,
    ),
    Column(
        "cluster_size_cv",
        "number",
        "variability",
        "Coefficient of variation of cluster sizes.",
        default=0.0,
        low=0.0,
        low_open=False,
    ),
    Column(
        "continuity_correction",
        "flag",
        "test",
        "two_proportions: continuity-corrected z test (yes/no; blank: the run's default).",
    ),
    _count("planned_events", "sizes", "Events expected in planning (survival)."),
    _count("realized_events", "sizes", "Events observed (survival)."),
    Column(
        "planned_se", "number", "variability", "Planned standard error of the estimate.", low=0.0
    ),
    Column(
        "realized_se", "number", "variability", "Realized standard error of the estimate.", low=0.0
    ),
    Column("df", "number", "test", "Degrees of freedom of the estimate (blank: normal).", low=0.0),
    Column("observed_effect", "number", "results", "The reported effect estimate."),
    Column("observed_se", "number", "results", "Its standard error.", low=0.0),
    Column("observed_ci_low", "number", "results", "Lower confidence limit."),
    Column("observed_ci_high", "number", "results", "Upper confidence limit."),
    _p(
        "observed_ci_level",
        "results",
        "Level of the reported confidence interval (blank: the level matching the study's test, "
        "1 - 2 alpha / (comparisons x sides), e.g. 0.95).",
    ),
    _p("observed_p", "results", "Reported p-value of the study's test.", high_open=False),
    _p(
        "reported_power",
        "results",
        "A post-hoc power value the study reported.",
        low_open=False,
        high_open=False,
    ),
    Column(
        "outcome_family",
        "text",
        "results",
        "Label grouping studies of the same outcome on the same effect scale (for the pooled "
        "basis of the excess-significance test).",
    ),
)

SPECS: dict[str, Column] = {c.name: c for c in COLUMNS}

#: Accepted spellings of a yes/no column (``flag``), after lower-casing and trimming.
FLAG_VALUES: dict[str, float] = {
    "yes": 1.0,
    "y": 1.0,
    "true": 1.0,
    "1": 1.0,
    "no": 0.0,
    "n": 0.0,
    "false": 0.0,
    "0": 0.0,
}

#: Cell text meaning "not reported", compared after lower-casing and trimming.
MISSING_TOKENS = frozenset(
    {"", "na", "n/a", "n.a.", "nr", "not reported", "-", "--", "—", "–", ".", "nan", "none", "null"}
)


@dataclass
class Validated:
    """Result of :func:`validate`.

    Attributes
    ----------
    table : typed contract columns (float, or string for text and choices), plus ``_row`` (the
        spreadsheet row) and every unknown column as read; index 0..n-1 in input order.
    failures : one line per rejected cell: ``pos`` (0-based row position), ``row``, ``column``,
        ``value`` (as written), ``reason``.
    notes : ``pos``, ``text`` for interpretations made (not errors).
    valid : boolean array, True for rows without failures.
    extra_columns : unknown columns carried through, in file order.
    """

    table: pd.DataFrame
    failures: pd.DataFrame
    notes: pd.DataFrame
    valid: np.ndarray
    extra_columns: list[str]
    raw: RawTable


_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")
_THOUSANDS_DOT = re.compile(r"^[+-]?\d{1,3}(,\d{3})+(\.\d+)?$")
_THOUSANDS_COMMA = re.compile(r"^[+-]?\d{1,3}(\.\d{3})+(,\d+)?$")
# Point-grouped digits with no decimal comma, as in "1.234" (a leading 0 is never a group).
_DOT_GROUPS = re.compile(r"^[+-]?[1-9]\d{0,2}(\.\d{3})+$")


def parse_numbers(
    values: pd.Series, *, decimal_comma: bool, whole: bool = False
) -> tuple[pd.Series, pd.Series]:
    """Parse cells as numbers: ``0.05``, ``5%``, ``1,234``; ``0,05`` with a decimal comma.

    Returns ``(numbers, problem)``: floats (nan where blank or unparseable) and a reason string
    where a non-blank cell was rejected (empty string otherwise).

    In a decimal-comma file a point separates thousands (``1.234,5``). A value such as ``1.234``
    with no comma is ambiguous there (1234, or 1.234 written with a decimal point): it is read as
    1234 in a column of whole numbers (``whole=True``: a count cannot be 1.234) and rejected with
    an explanation elsewhere, rather than guessed.

    >>> n, why = parse_numbers(pd.Series(["5%", "1,234", " 0.8 ", "", "abc"]), decimal_comma=False)
    >>> n.tolist()[:3]
    [0.05, 1234.0, 0.8]
    >>> why.tolist()[4]
    'not a number'
    """
    out = pd.Series(np.nan, index=values.index, dtype=float)
    problem = pd.Series("", index=values.index, dtype=object)
    is_num = values.map(lambda v: isinstance(v, (int, float)) and not isinstance(v, bool))
    if is_num.any():
        out[is_num] = values[is_num].astype(float)
    uncached = values.map(lambda v: v is UNCACHED)
    problem[uncached] = "formula without a saved value (open and save the file, or paste values)"
    text_mask = values.map(lambda v: isinstance(v, str))
    if text_mask.any():
        s = values[text_mask].astype(str).str.strip().str.replace("\u00a0", "", regex=False)
        s = s.str.replace(" ", "", regex=False)
        missing = s.str.lower().isin(MISSING_TOKENS)
        s = s[~missing]
        percent = s.str.endswith("%")
        body = s.str.rstrip("%")
        ambiguous = pd.Series(False, index=body.index)
        if decimal_comma:
            grouped = body.str.match(_THOUSANDS_COMMA.pattern) & body.str.contains(",")
            dotted = body.str.match(_DOT_GROUPS.pattern)
            if whole:
                grouped |= dotted
            else:
                ambiguous = dotted
            body = body.where(~grouped, body.str.replace(".", "", regex=False))
            body = body.str.replace(",", ".", regex=False)
        else:
            grouped = body.str.match(_THOUSANDS_DOT.pattern)
            body = body.where(~grouped, body.str.replace(",", "", regex=False))
        ok = body.str.match(_NUMBER.pattern) & ~ambiguous
        parsed = pd.to_numeric(body.where(ok), errors="coerce")
        parsed = parsed.where(~percent, parsed / 100.0)
        out[parsed.index] = parsed
        bad = ~ok
        if bad.any():
            low = s[bad].str.lower()
            reason = pd.Series("not a number", index=low.index, dtype=object)
            reason[low.isin({"inf", "+inf", "-inf", "infinity", "-infinity"})] = (
                "not a finite number"
            )
            reason[ambiguous[bad]] = (
                "ambiguous in a decimal-comma file: a point could separate thousands or "
                "decimals; write the number without a thousands separator (1234 or 1,234)"
            )
            if not decimal_comma:
                comma = s[bad].str.match(r"^[+-]?\d*,\d+%?$")
                reason[comma] = (
                    "not a number (a decimal comma? use a decimal point, or ';' as the "
                    "separator of a decimal-comma file)"
                )
            problem[reason.index] = reason
    bool_mask = values.map(lambda v: isinstance(v, bool))
    problem[bool_mask] = "not a number (TRUE/FALSE)"
    return out, problem


def _fmt(value: object) -> str:
    if value is None:
        return ""
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value)


def validate(raw: RawTable) -> Validated:
    """Type and check every cell of ``raw``; see the module docstring.

    Raises
    ------
    InputError
        The table lacks a ``study_id`` or ``design`` column.
    """
    data = raw.data
    missing = [c for c in ("study_id", "design") if c not in data.columns]
    if missing:
        found = ", ".join(raw.headers[c] for c in data.columns) or "none"
        raise InputError(
            f"{raw.source}: required column{'s' if len(missing) > 1 else ''} "
            f"{' and '.join(missing)} not found (columns found: {found})."
        )
    n = len(data)
    table = pd.DataFrame(index=pd.RangeIndex(n))
    table["_row"] = raw.rows
    fail_pos: list[np.ndarray] = []
    fail_col: list[str] = []
    fail_reason: list[np.ndarray] = []
    notes_pos: list[np.ndarray] = []
    notes_text: list[str] = []

    def fail(mask: np.ndarray, column: str, reason: str | np.ndarray) -> None:
        pos = np.flatnonzero(mask)
        if len(pos):
            fail_pos.append(pos)
            fail_col.append(column)
            reasons = np.asarray(reason, dtype=object)
            fail_reason.append(
                np.broadcast_to(reasons, (n,))[pos] if reasons.ndim else np.full(len(pos), reason)
            )

    for spec in COLUMNS:
        if spec.name not in data.columns:
            if spec.kind in ("number", "integer", "flag"):
                default = np.nan if spec.default is None else float(spec.default)
                table[spec.name] = np.full(n, default)
            elif spec.kind == "choice":
                table[spec.name] = pd.Series([spec.default] * n, dtype=object)
            else:
                table[spec.name] = pd.Series([None] * n, dtype=object)
            continue
        cells = data[spec.name].reset_index(drop=True)
        if spec.kind == "flag":
            text = cells.map(lambda v: None if v is None else _fmt(v).strip().lower())
            blank = text.isna() | text.isin(MISSING_TOKENS)
            flag = text.map(lambda v: FLAG_VALUES.get(v, np.nan) if v is not None else np.nan)
            bad = (~blank & flag.isna()).to_numpy()
            fail(bad, spec.name, f"expected {spec.range_text()}")
            # Blank stays nan: the run's default applies (see audit.pipeline).
            table[spec.name] = flag.to_numpy(dtype=float)
            continue
        if spec.kind in ("text", "design", "choice"):
            text = cells.map(lambda v: None if v is None else _fmt(v).strip())
            blank = text.isna() | (text == "") | text.str.lower().isin(MISSING_TOKENS - {"-"})
            if spec.kind == "text":
                table[spec.name] = text.where(~blank, None)
                continue
            norm = text.map(lambda v: normalise_header(v) if v is not None else None)
            if spec.kind == "choice":
                norm = norm.where(~blank, spec.default)
            else:
                norm = norm.where(~blank, None)
            bad = ~norm.isin(spec.choices) & ~(blank & (spec.kind == "choice"))
            if spec.kind == "design":
                bad &= ~blank
                fail(blank.to_numpy(), spec.name, "blank: the design must be given")
            fail(
                bad.to_numpy(),
                spec.name,
                f"unknown {spec.name.replace('_', ' ')}; expected {spec.range_text()}",
            )
            # A rejected value is kept as written so that outputs show what the row said.
            table[spec.name] = norm.where(~bad, text).astype(object)
            continue
        numbers, problem = parse_numbers(
            cells, decimal_comma=raw.decimal_comma, whole=spec.kind == "integer"
        )
        bad = (problem != "").to_numpy()
        fail(bad, spec.name, problem.to_numpy(dtype=object))
        x = numbers.to_numpy(dtype=float)
        with np.errstate(invalid="ignore"):
            present = ~np.isnan(x)
            out_of_range = np.zeros(n, dtype=bool)
            if spec.low is not None:
                out_of_range |= (x <= spec.low) if spec.low_open else (x < spec.low)
            if spec.high is not None:
                out_of_range |= (x >= spec.high) if spec.high_open else (x > spec.high)
            out_of_range &= present
            if spec.proportion:
                pct = out_of_range & (x > 1) & (x < 100)
                hint = np.full(n, "", dtype=object)
                hint[pct] = [
                    f"must be {spec.range_text()}; {v:g} looks like a percentage: write it as "
                    f"a proportion ({v / 100:g}) or with a per cent sign ({v:g}%)"
                    for v in x[pct]
                ]
                fail(pct, spec.name, hint)
                out_of_range &= ~pct
            fail(out_of_range, spec.name, f"must be {spec.range_text()}")
            not_whole = present & ~out_of_range & (spec.kind == "integer") & (x != np.round(x))
            fail(not_whole, spec.name, "must be a whole number")
        x = np.where(bad | out_of_range | not_whole, np.nan, x)
        if spec.default is not None:
            x = np.where(present | bad, x, float(spec.default))
        table[spec.name] = x

    # study_id must be given; duplicates are kept and both marked.
    sid = table["study_id"]
    fail(sid.isna().to_numpy(), "study_id", "blank: every study needs an identifier")
    dup = sid.notna() & sid.duplicated(keep=False)
    if dup.any():
        first_row = (
            table.loc[dup]
            .groupby("study_id")["_row"]
            .transform(lambda r: ", ".join(str(v) for v in r))
        )
        for pos, rows in first_row.items():
            notes_pos.append(np.array([pos]))
            notes_text.append(f"study_id '{sid[pos]}' appears on more than one row ({rows})")

    sides = pd.to_numeric(table["sides"], errors="coerce").to_numpy(dtype=float)
    table["sides"] = sides

    # Design-specific checks, on rows whose design is known.
    for name, design in DESIGNS.items():
        mask = (table["design"] == name).to_numpy()
        if not mask.any():
            continue
        sub = table.loc[mask]
        for bad, column, reason in design.check_rows(sub):
            full = np.zeros(n, dtype=bool)
            full[np.flatnonzero(mask)[np.asarray(bad, dtype=bool)]] = True
            fail(full, column, f"{reason} for design {name}")

    # A reported result must hang together: limits in order, the estimate between them.
    low, high = table["observed_ci_low"].to_numpy(), table["observed_ci_high"].to_numpy()
    estimate = table["observed_effect"].to_numpy()
    with np.errstate(invalid="ignore"):
        fail(low > high, "observed_ci_high", "must not be below observed_ci_low")
        fail(
            (low <= high) & ((estimate < low) | (estimate > high)),
            "observed_effect",
            "must lie within the confidence interval (observed_ci_low to observed_ci_high)",
        )

    extra = [c for c in data.columns if c not in SPECS]
    for c in extra:
        table[c] = data[c].reset_index(drop=True)

    if fail_pos:
        pos = np.concatenate(fail_pos)
        cols = np.concatenate(
            [np.full(len(p), c, dtype=object) for p, c in zip(fail_pos, fail_col, strict=True)]
        )
        reasons = np.concatenate(fail_reason)
        failures = pd.DataFrame({"pos": pos, "column": cols, "reason": reasons})
        failures["row"] = raw.rows[pos] if len(raw.rows) else []
        failures["value"] = [
            _fmt(data[c].iat[p]) if c in data.columns else ""
            for p, c in zip(pos, cols, strict=True)
        ]
        failures = failures.sort_values(["pos"], kind="stable").reset_index(drop=True)
        failures = failures[["pos", "row", "column", "value", "reason"]]
    else:
        failures = pd.DataFrame(columns=["pos", "row", "column", "value", "reason"])
    valid = np.ones(n, dtype=bool)
    valid[failures["pos"].to_numpy(dtype=int)] = False
    notes = pd.DataFrame(
        {
            "pos": np.concatenate(notes_pos) if notes_pos else np.empty(0, dtype=int),
            "text": np.asarray(notes_text, dtype=object),
        }
    )
    return Validated(table, failures, notes, valid, extra, raw)
