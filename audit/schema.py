"""The input contract: one spec per column, and lazy, vectorised validation of every row.

Validation never raises for a bad row. It returns a typed table (numbers as floats, text as
strings), a failure table with one line per bad cell (spreadsheet row, column, value, reason) and
notes about values it interpreted. A row with any failure is *invalid*: it still appears in every
output, with its errors, but is not audited.
"""

from __future__ import annotations

import math
import re
import unicodedata
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
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
    file_notes : sentences about the file as a whole (from the reader, and duplicate columns).
    """

    table: pd.DataFrame
    failures: pd.DataFrame
    notes: pd.DataFrame
    valid: np.ndarray
    extra_columns: list[str]
    raw: RawTable
    file_notes: list[str] = field(default_factory=list)


_MINUS_SIGNS = "[\u2212\u2012\u2013\u2014\ufe63\uff0d]"
_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")
_THOUSANDS_DOT = re.compile(r"^[+-]?\d{1,3}(,\d{3})+(\.\d+)?$")
_THOUSANDS_COMMA = re.compile(r"^[+-]?\d{1,3}(\.\d{3})+(,\d+)?$")
# Point-grouped digits with no decimal comma, as in "1.234" (a leading 0 is never a group).
_DOT_GROUPS = re.compile(r"^[+-]?[1-9]\d{0,2}(\.\d{3})+$")


def _ascii_digits(text: str) -> str:
    """``text`` with every decimal digit of any script (Unicode category Nd) as 0-9; other
    characters unchanged (so a full-width '１２' is '12', and a stray letter stays a letter)."""
    return _ANY_DIGIT.sub(lambda m: str(unicodedata.decimal(m.group(0))), text)


_ANY_DIGIT = re.compile(r"\d")  # in a str pattern, \d is any Unicode decimal digit


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
    x, at, reasons = _numbers(
        values, _distinct_of(values), decimal_comma=decimal_comma, whole=whole
    )
    problem = np.full(len(values), "", dtype=object)
    problem[at] = reasons
    return pd.Series(x, index=values.index), pd.Series(problem, index=values.index, dtype=object)


def _numbers(
    values: pd.Series, distinct: Distinct | None, *, decimal_comma: bool, whole: bool
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`parse_numbers` as ``(floats, positions of rejected cells, their reasons)``.

    ``distinct`` is the column's :func:`_distinct_texts` (None unless it holds only text).
    """
    if distinct is not None:
        # Each distinct text parsed and checked once, then mapped to its cells. (A text found
        # in several blocks of rows is one text here; texts alone always factorize.)
        codes, texts = distinct
        merged, texts = _distinct_texts(texts) or pd.factorize(texts)
        codes = _take(merged, codes, -1)
        text_x, text_why = _parse_texts(texts, decimal_comma=decimal_comma, whole=whole)
        text_bad = text_why != ""
        _reject_infinite(text_x, text_bad, text_why)
        at = np.flatnonzero(_take(text_bad, codes, False))
        return _take(text_x, codes, np.nan), at, text_why[codes[at]]
    if isinstance(values.dtype, np.dtype) and values.dtype.kind in "fiu":
        # Numbers already (a frame built in Python): nothing to read.
        x = values.to_numpy(dtype=float, copy=True)
        bad = np.zeros(len(x), dtype=bool)
        why = np.empty(len(x), dtype=object)
    else:
        cells = values.to_numpy(dtype=object)
        x, bad, why = _numbers_by_kind(cells, decimal_comma=decimal_comma, whole=whole)
    _reject_infinite(x, bad, why)
    at = np.flatnonzero(bad)
    return x, at, why[at]


def _reject_infinite(x: np.ndarray, bad: np.ndarray, why: np.ndarray) -> None:
    """Reject infinite numbers not rejected already, and make them nan (in place)."""
    with np.errstate(invalid="ignore"):
        infinite = np.isinf(x)
    why[infinite & ~bad] = "not a finite number"
    bad |= infinite
    x[infinite] = np.nan


#: ``(codes, texts)``: the text of cell i is ``texts[codes[i]]``, or None where the code is -1.
Distinct = tuple[np.ndarray, np.ndarray]

#: Rows whose cells are hashed together. A file's text objects lie in memory in the order they
#: were read, row by row: hashing a block of rows column by column stays within memory the
#: processor has at hand, and takes half the time of going down each whole column in turn.
_BLOCK_ROWS = 5000


def _distinct_columns(data: pd.DataFrame, names: list[str]) -> dict[str, list[Distinct] | None]:
    """:func:`_distinct_texts` of the columns ``names`` of ``data``, per block of rows.

    Each column gets its blocks' ``(codes, texts)`` (join them with :func:`_joined`), or None
    when it does not hold only text. Block codes are kept small: all columns' codes exist at
    once here.
    """
    cells = data.to_numpy(dtype=object)
    where = {name: data.columns.get_loc(name) for name in names}
    small = np.min_scalar_type(-_BLOCK_ROWS)
    parts: dict[str, list[Distinct] | None] = {name: [] for name in names}
    for start in range(0, len(cells), _BLOCK_ROWS):
        block = cells[start : start + _BLOCK_ROWS]
        for name, j in where.items():
            found = parts[name]
            if found is None:
                continue  # not a column of text only
            part = _distinct_texts(block[:, j])
            if part is None:
                parts[name] = None
            else:
                found.append((part[0].astype(small), part[1]))
    return parts


def _joined(parts: list[Distinct] | None) -> Distinct | None:
    """One column's ``(codes, texts)`` from those of its blocks of rows. A text may recur in
    several blocks, which only repeats the work on it."""
    if parts is None:
        return None
    codes, offset = [], 0
    for part_codes, part_texts in parts:
        codes.append(np.where(part_codes >= 0, part_codes.astype(np.intp) + offset, -1))
        offset += len(part_texts)
    return (
        np.concatenate(codes) if codes else np.zeros(0, dtype=np.intp),
        np.concatenate([t for _, t in parts]) if parts else np.zeros(0, dtype=object),
    )


def _distinct_of(values: pd.Series) -> Distinct | None:
    """:func:`_distinct_texts` of a series (None for one of numbers)."""
    if isinstance(values.dtype, np.dtype) and values.dtype.kind in "fiu":
        return None
    return _distinct_texts(values.to_numpy(dtype=object))


def _distinct_texts(cells: np.ndarray) -> Distinct | None:
    """``(codes, texts)`` of a column holding only text and None (code -1), else None.

    Every column of a text file is such a column. Its cells are read once per distinct text
    (portfolios repeat designs, choices and numbers), by a C-level hash of the column, and
    mapped back by the codes.
    """
    try:
        codes, texts = pd.factorize(cells)
    except TypeError:  # an unhashable cell (a list in a frame built in Python)
        return None
    if len(texts) and pd.api.types.infer_dtype(texts, skipna=False) != "string":
        return None
    # Every cell with code -1 must be an empty cell (None), not a number or a missing-value
    # marker of another kind.
    if not all(v is None for v in cells[codes < 0]):
        return None
    return codes, texts.astype(object, copy=False)


def _take(per_text: np.ndarray, codes: np.ndarray, empty: object) -> np.ndarray:
    """Per-cell values from per-text values; ``empty`` where the code is -1 (no text)."""
    return np.append(per_text, np.array([empty], dtype=per_text.dtype))[codes]


def _numbers_by_kind(
    cells: np.ndarray, *, decimal_comma: bool, whole: bool
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Numbers of a column of mixed cells (a workbook's): by kind, text per distinct value.

    Returns ``(floats, rejected, reasons)`` with one entry per cell (a reason counts where the
    cell is rejected).
    """
    n = len(cells)
    x = np.full(n, np.nan)
    why = np.empty(n, dtype=object)
    kind = _cell_kinds(cells)
    is_num = kind == _NUM
    if is_num.any():
        x[is_num] = _as_floats(cells[is_num])
    other_at = np.flatnonzero(kind == _OTHER)
    uncached = np.zeros(n, dtype=bool)
    uncached[other_at] = [cells[i] is UNCACHED for i in other_at]
    why[uncached] = "formula without a saved value (open and save the file, or paste values)"
    boolean = kind == _BOOL
    why[boolean] = "not a number (TRUE/FALSE)"
    # Anything else a spreadsheet cell can hold (a date, a time, an error value's object) is not
    # a number either; it must never pass as blank.
    other = (kind == _OTHER) & ~uncached
    why[other] = "not a number (a date or another kind of value)"
    bad = uncached | boolean | other
    text_at = np.flatnonzero(kind == _TEXT)
    if len(text_at):
        codes, texts = pd.factorize(cells[text_at])
        text_x, text_why = _parse_texts(
            texts.astype(object, copy=False), decimal_comma=decimal_comma, whole=whole
        )
        x[text_at] = text_x[codes]
        why[text_at] = text_why[codes]
        bad[text_at] = (text_why != "")[codes]
    return x, bad, why


def _parse_texts(
    texts: np.ndarray, *, decimal_comma: bool, whole: bool
) -> tuple[np.ndarray, np.ndarray]:
    """Numbers (nan if none) and rejection reasons ("" if none) of distinct cell texts."""
    index = pd.RangeIndex(len(texts))
    out = pd.Series(np.nan, index=index, dtype=float)
    problem = pd.Series("", index=index, dtype=object)
    # Empty cells (half of a wide sheet) are blank; whitespace-only cells go to the careful
    # path below, which reads them as blank too.
    text = pd.Series(texts, index=index, dtype=object)
    text = text[text.to_numpy() != ""]
    # Fast path for the common case, a plain number (C-speed parsing); everything else
    # (percentages, separators, markers of missing values, junk) takes the careful path.
    quick = pd.to_numeric(text, errors="coerce").astype(float)
    plain = np.isfinite(quick.to_numpy())
    if decimal_comma and plain.any():
        plain &= ~text.str.contains(".", regex=False).to_numpy(dtype=bool, na_value=False)
    out[quick.index[plain]] = quick[plain]
    if not plain.all():
        s = text[~plain].astype(str).str.strip().str.replace("\u00a0", "", regex=False)
        # The typographic minus (U+2212) and dashes pasted from documents mean a minus sign.
        s = s.str.replace(" ", "", regex=False).str.replace(_MINUS_SIGNS, "-", regex=True)
        # Digits of other scripts (Arabic-Indic, full-width, ...) are the digits they are.
        foreign = ~s.map(str.isascii).astype(bool)
        if foreign.any():
            s = s.where(~foreign, s[foreign].map(_ascii_digits))
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
        # A text that looked like a number but did not parse is rejected, never blank.
        bad = ~ok | parsed.isna().to_numpy()
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
    return np.array(out, dtype=float), np.array(problem, dtype=object)


_NONE, _NUM, _TEXT, _BOOL, _OTHER = range(5)
_KINDS = {
    type(None): _NONE,
    int: _NUM,
    float: _NUM,
    np.float64: _NUM,
    np.int64: _NUM,
    str: _TEXT,
    bool: _BOOL,
    np.bool_: _BOOL,
}


def _cell_kinds(cells: np.ndarray) -> np.ndarray:
    """Kind of each cell (none, number, text, boolean, other), at C speed when the column is
    uniform."""
    inferred = pd.api.types.infer_dtype(cells, skipna=True)
    present = pd.notna(cells)
    if inferred in ("string", "empty"):
        return np.where(present, _TEXT, _NONE).astype(np.int8)
    if inferred in ("floating", "integer", "mixed-integer-float"):
        return np.where(present, _NUM, _NONE).astype(np.int8)
    return np.fromiter(
        (_KINDS.get(type(v), _OTHER) for v in cells), dtype=np.int8, count=len(cells)
    )


def _as_floats(cells: np.ndarray) -> np.ndarray:
    try:
        return cells.astype(float)
    except OverflowError:  # Python ints beyond float range: inf, rejected as not finite
        return np.array([_as_float(v) for v in cells], dtype=float)


def _as_float(value: object) -> float:
    try:
        return float(value)  # type: ignore[arg-type]
    except OverflowError:
        return math.inf


def _fmt(value: object) -> str:
    if value is None:
        return ""
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value)


@dataclass(frozen=True)
class WholeTable:
    """What :func:`validate` needs to know of a larger table when it checks a slice of it: the
    typed ``study_id`` of every row of the whole (:func:`study_ids`), their spreadsheet rows,
    and the position in the whole of the slice's first row."""

    ids: pd.Series
    rows: np.ndarray
    start: int


def study_ids(raw: RawTable) -> pd.Series:
    """The ``study_id`` column of ``raw`` typed as :func:`validate` types it."""
    data = raw.data
    if "study_id" in raw.duplicates:
        data = _merge_duplicates(raw, lambda *_: None, [], [], [])
    columns: dict[str, np.ndarray | pd.Series] = {}
    found = _joined(_distinct_columns(data, ["study_id"])["study_id"])
    cells = data["study_id"].reset_index(drop=True)
    _text_column(SPECS["study_id"], cells, found, columns, lambda *_: None)
    return pd.Series(columns["study_id"], dtype=object)


def validate(raw: RawTable, whole: WholeTable | None = None) -> Validated:
    """Type and check every cell of ``raw``; see the module docstring.

    ``whole``: ``raw`` is a slice of a larger table (rows are checked one by one, except that a
    study_id used twice is looked for in the whole table).

    Raises
    ------
    InputError
        The table lacks a ``study_id`` or ``design`` column.
    """
    data = raw.data
    missing = [c for c in ("study_id", "design") if c not in data.columns]
    if missing:
        raise InputError(_missing_columns_message(raw, missing))
    n = len(data)
    # The typed columns are collected first and made one frame at the end of the loop below:
    # inserting them one by one into a frame costs more, and leaves it in many pieces.
    columns: dict[str, np.ndarray | pd.Series] = {"_row": raw.rows}
    fail_pos: list[np.ndarray] = []
    fail_col: list[str] = []
    fail_reason: list[np.ndarray] = []
    notes_pos: list[np.ndarray] = [np.array([p for p, _ in raw.row_notes], dtype=int)]
    notes_text: list[np.ndarray] = [np.array([t for _, t in raw.row_notes], dtype=object)]
    file_notes: list[str] = list(raw.notes)

    def fail(mask: np.ndarray, column: str, reason: str | np.ndarray) -> None:
        """Failures where ``mask`` is set; ``reason``: one text, or one per row."""
        pos = np.flatnonzero(mask)
        reasons = np.asarray(reason, dtype=object)
        fail_at(pos, column, np.broadcast_to(reasons, (n,))[pos] if reasons.ndim else reason)

    def fail_at(pos: np.ndarray, column: str, reason: str | np.ndarray) -> None:
        """Failures at the positions ``pos``; ``reason``: one text, or one per position."""
        if len(pos):
            fail_pos.append(pos)
            fail_col.append(column)
            fail_reason.append(
                np.full(len(pos), reason) if isinstance(reason, str) else reason.astype(object)
            )

    for position, column, reason in raw.cell_problems:
        fail_at(np.array([position], dtype=np.intp), column, reason)

    data = _merge_duplicates(raw, fail, notes_pos, notes_text, file_notes)
    blocks = _distinct_columns(data, [spec.name for spec in COLUMNS if spec.name in data])

    for spec in COLUMNS:
        if spec.name not in data.columns:
            if spec.kind in ("number", "integer", "flag"):
                default = np.nan if spec.default is None else float(spec.default)
                columns[spec.name] = np.full(n, default)
            elif spec.kind == "choice":
                columns[spec.name] = pd.Series([spec.default] * n, dtype=object)
            else:
                columns[spec.name] = pd.Series([None] * n, dtype=object)
            continue
        cells = data[spec.name].reset_index(drop=True)
        found = _joined(blocks.pop(spec.name))
        if spec.kind == "flag":
            codes, texts, uncached = _trimmed_texts(cells, found)
            lowered = list(map(str.lower, texts))
            # A formula without a saved value is not blank: it is rejected as no yes or no.
            tokens = _flags(map(MISSING_TOKENS.__contains__, lowered), len(texts))
            blank = _take(tokens, codes, True) & ~uncached
            values = np.array([FLAG_VALUES.get(v, np.nan) for v in lowered], dtype=float)
            flag = _take(values, codes, np.nan)
            fail(~blank & np.isnan(flag), spec.name, f"expected {spec.range_text()}")
            # Blank stays nan: the run's default applies (see audit.pipeline).
            columns[spec.name] = flag
            continue
        if spec.kind in ("text", "design", "choice"):
            _text_column(spec, cells, found, columns, fail)
            continue
        if spec.name == "observed_p":
            cells, found = _p_value_bounds(cells, found, columns, notes_pos, notes_text)
        x, at, reasons = _numbers(
            cells, found, decimal_comma=raw.decimal_comma, whole=spec.kind == "integer"
        )
        fail_at(at, spec.name, reasons)
        bad = np.zeros(n, dtype=bool)
        bad[at] = True
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
        columns[spec.name] = x
    # Per distinct value: the column holds a handful of texts.
    sides = pd.Series(columns["sides"], dtype=object).to_numpy()
    codes, texts = pd.factorize(sides, use_na_sentinel=False)
    numbers = pd.to_numeric(pd.Series(texts, dtype=object), errors="coerce").to_numpy(dtype=float)
    columns["sides"] = numbers[codes]
    table = pd.DataFrame(columns, index=pd.RangeIndex(n))
    del columns  # copied into the frame

    # study_id must be given. Rows sharing one are all kept and all audited (which of them is
    # right cannot be known, and dropping one would lose a study); each gets a note naming the
    # other rows.
    sid = table["study_id"]
    no_id = sid.isna().to_numpy()
    fail(no_id, "study_id", "blank: every study needs an identifier")
    if whole is None:
        pos, text = _duplicate_ids(sid, table["_row"].to_numpy())
    else:
        pos, text = _duplicate_ids(whole.ids, whole.rows)
        mine = (pos >= whole.start) & (pos < whole.start + n)
        pos, text = pos[mine] - whole.start, text[mine]
    if len(pos):
        notes_pos.append(pos)
        notes_text.append(text)

    # Design-specific checks, on rows whose design is known.
    codes, designs = pd.factorize(table["design"].to_numpy(dtype=object))
    code_of = {d: k for k, d in enumerate(designs)}
    for name, design in DESIGNS.items():
        if name not in code_of:
            continue
        mask = codes == code_of[name]
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
            "pos": np.concatenate(notes_pos).astype(int),
            "text": np.concatenate(notes_text).astype(object),
        }
    )
    return Validated(table, failures, notes, valid, extra, raw, file_notes)


def _duplicate_ids(ids: pd.Series, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Positions whose study_id another row uses too, and the note for each (naming the rows)."""
    ids = ids.reset_index(drop=True)
    dup = (ids.notna() & ids.duplicated(keep=False)).to_numpy()
    if not dup.any():
        return np.zeros(0, dtype=np.intp), np.zeros(0, dtype=object)
    same = pd.DataFrame({"study_id": ids[dup], "_row": rows[dup]})
    rows_of = same.groupby("study_id")["_row"].transform(lambda r: ", ".join(str(v) for v in r))
    text = (
        "study_id '"
        + same["study_id"].astype(str)
        + "' is used by more than one row (rows "
        + rows_of.astype(str)
        + "); every row is audited, check whether they are the same study"
    )
    return np.flatnonzero(dup), text.to_numpy(dtype=object)


_P_BOUND = re.compile(
    r"^\s*(?:p\s*)?(?P<rel><=|>=|<|>|\u2264|\u2265)\s*(?P<num>[0-9]*[.,]?[0-9]+(?:[eE][-+]?[0-9]+)?)\s*$",
    re.IGNORECASE,
)
_P_EQUALS = re.compile(r"^\s*p\s*=\s*(?P<num>\S+)\s*$", re.IGNORECASE)
_NOT_SIGNIFICANT = frozenset({"ns", "n.s.", "n.s", "not significant"})


def _p_value_bounds(
    cells: pd.Series,
    distinct: Distinct | None,
    columns: dict[str, np.ndarray | pd.Series],
    notes_pos: list[np.ndarray],
    notes_text: list[np.ndarray],
) -> tuple[pd.Series, Distinct | None]:
    """Read p-values as papers print them: ``p < 0.001``, ``< .05``, ``>0.1``, ``0.000``, ``n.s.``.

    A bound is not a p-value: it can decide whether the test was significant but no standard
    error can be derived from it. Bounds go to ``observed_p_bound`` with ``observed_p_relation``
    (-1 for "below", +1 for "above"); "n.s." is "above the study's alpha" (bound nan, relation
    +1); a p printed as zero (``0.000``) is below half its last printed digit. ``p = 0.03`` is
    simply 0.03. The cells returned keep only plain p-values for the number parser; they come
    with their :func:`_distinct_texts` where ``distinct`` (that of ``cells``) is given.
    """
    n = len(cells)
    values = cells.to_numpy(dtype=object)
    if distinct is not None:
        cell_codes, texts = distinct
        at = np.flatnonzero(cell_codes >= 0)
        codes = cell_codes[at]
        numeric_zero = np.zeros(n, dtype=bool)
    else:  # workbook cells: numbers and other values beside the texts
        at = np.flatnonzero(np.fromiter((isinstance(v, str) for v in values), bool, count=n))
        codes, texts = pd.factorize(values[at])
        numeric_zero = np.array(
            [isinstance(v, (int, float)) and not isinstance(v, bool) and v == 0 for v in values],
            dtype=bool,
        )
    # Each distinct text read once. Most are plain p-values: a finite number other than zero
    # matches none of the patterns of _p_text, so those texts skip it.
    number = pd.to_numeric(pd.Series(texts, dtype=object), errors="coerce")
    plain = np.isfinite(number.to_numpy(dtype=float)) & (number.to_numpy(dtype=float) != 0)
    read = [_PLAIN_P if p else _p_text(t) for t, p in zip(texts, plain, strict=True)]
    relation = np.full(n, np.nan)
    bound = np.full(n, np.nan)
    relation[at] = np.array([r for r, _, _ in read], dtype=float)[codes]
    bound[at] = np.array([b for _, b, _ in read], dtype=float)[codes]
    cleaned = values.copy()
    changed = np.array([c is not _AS_WRITTEN for _, _, c in read], dtype=bool)[codes]
    replaced = _objects([c for _, _, c in read])[codes]
    cleaned[at[changed]] = replaced[changed]
    relation[numeric_zero] = -1.0
    bound[numeric_zero] = 0.001
    cleaned[numeric_zero] = None
    columns["observed_p_bound"] = bound
    columns["observed_p_relation"] = relation
    marked = np.flatnonzero(~np.isnan(relation))
    if len(marked):
        note = np.empty(n, dtype=object)
        note[at] = _objects([_p_note(t) for t in texts])[codes]
        zero_at = np.flatnonzero(numeric_zero)
        note[zero_at] = [_p_note(values[i]) for i in zero_at]
        notes_pos.append(marked)
        notes_text.append(note[marked])
    cleaned_distinct = None
    if distinct is not None:
        # The texts cleaned; a cell cleaned to None gets code -1, and its text (referred to by
        # no cell any more) becomes "", which the number parser passes over.
        gone = _flags((c is None for _, _, c in read), len(read))
        cleaned_texts = _objects(
            [t if c is _AS_WRITTEN else c or "" for t, (_, _, c) in zip(texts, read, strict=True)]
        )
        cleaned_distinct = (np.where(_take(gone, cell_codes, True), -1, cell_codes), cleaned_texts)
    return pd.Series(cleaned, index=cells.index, dtype=object, name=cells.name), cleaned_distinct


#: :func:`_p_text` leaves the cell as written.
_AS_WRITTEN = object()
#: What :func:`_p_text` gives a plain p-value: no bound, the cell as written.
_PLAIN_P = (np.nan, np.nan, _AS_WRITTEN)


def _p_text(raw: str) -> tuple[float, float, object]:
    """``(relation, bound, cell for the number parser)`` of one p-value text; nan where the
    text is no bound, and ``_AS_WRITTEN`` where the cell goes to the parser unchanged."""
    if not raw.strip():
        return np.nan, np.nan, _AS_WRITTEN
    text = raw.strip().replace("\u2212", "-")
    if text.lower() in _NOT_SIGNIFICANT:
        return 1.0, np.nan, None
    cleaned: object = _AS_WRITTEN
    equals = _P_EQUALS.match(text)
    if equals:
        cleaned = text = equals.group("num")
    match = _P_BOUND.match(text)
    if match:
        number = float(match.group("num").replace(",", "."))
        return (-1.0 if match.group("rel") in ("<", "<=", "\u2264") else 1.0), number, None
    zero = re.fullmatch(r"0?[.,](0+)", text)
    if zero or text == "0":
        digits = len(zero.group(1)) if zero else 0
        return -1.0, 0.5 * 10.0 ** (-digits) if digits else 0.001, None
    return np.nan, np.nan, cleaned


def _p_note(value: object) -> str:
    return (
        f"observed_p '{value}' read as a bound, not a p-value: it decides significance where no "
        "interval does, and nothing is derived from it"
    )


def _trimmed_texts(
    cells: pd.Series, distinct: Distinct | None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Each cell's text as written, trimmed: ``(codes, texts, uncached)``.

    A cell's text is ``texts[code]``; code -1 marks an empty cell or a formula without a saved
    value (``uncached``). A text file's column (``distinct`` given) is trimmed once per
    distinct value; a workbook's cells (numbers, dates) are formatted one by one first.
    """
    values = cells.to_numpy(dtype=object)
    if distinct is not None:
        codes, texts = distinct
        trimmed = _objects(list(map(str.strip, texts)))
        return codes, trimmed, np.zeros(len(values), dtype=bool)
    uncached = np.fromiter((v is UNCACHED for v in values), dtype=bool, count=len(values))
    text = [None if v is None or v is UNCACHED else _fmt(v).strip() for v in values]
    codes, texts = pd.factorize(_objects(text))
    return codes, texts.astype(object, copy=False), uncached


def _text_column(
    spec: Column,
    cells: pd.Series,
    distinct: Distinct | None,
    columns: dict[str, np.ndarray | pd.Series],
    fail: Callable[[np.ndarray, str, str | np.ndarray], None],
) -> None:
    """Type a text, design or choice column into ``columns`` (object Series, None for blank)."""
    codes, texts, uncached = _trimmed_texts(cells, distinct)
    fail(uncached, spec.name, "formula without a saved value (open and save the file)")
    # Object arrays throughout: a pandas string column would turn None into nan. Everything
    # below is worked out per distinct text and mapped to the cells by the codes.
    if spec.kind == "choice":
        # "2.0" typed as text means 2, as the number 2.0 in a spreadsheet cell does.
        texts = _objects([re.sub(r"^(\d+)\.0*$", r"\1", v) for v in texts])
    tokens = MISSING_TOKENS - {"-"}
    blank = _take(_flags(map(tokens.__contains__, map(str.lower, texts)), len(texts)), codes, True)
    text = _take(texts, codes, None)
    if spec.kind == "text":
        columns[spec.name] = pd.Series(np.where(blank, None, text), dtype=object)
        return
    normal = _objects([normalise_header(v) for v in texts])
    norm = np.where(blank, None, _take(normal, codes, None))
    choices = set(spec.choices)
    known = _take(_flags(map(choices.__contains__, normal), len(normal)), codes, False) & ~blank
    bad = ~known & ~blank
    if spec.kind == "choice":
        norm = np.where(blank, spec.default, norm)
    else:
        fail(blank & ~uncached, spec.name, "blank: the design must be given")
    fail(bad, spec.name, f"unknown {spec.name.replace('_', ' ')}; expected {spec.range_text()}")
    # A rejected value is kept as written so that outputs show what the row said.
    columns[spec.name] = pd.Series(np.where(bad, text, norm), dtype=object)


def _flags(items: Iterable[bool], count: int) -> np.ndarray:
    return np.fromiter(items, dtype=bool, count=count)


def _objects(items: list[object]) -> np.ndarray:
    """A 1-d object array of ``items`` (never a 2-d array, even of equal-length sequences)."""
    out = np.empty(len(items), dtype=object)
    out[:] = items
    return out


def _missing_columns_message(raw: RawTable, missing: list[str]) -> str:
    shown = [raw.headers[c] for c in raw.data.columns][:12]
    shown = [h if len(h) <= 40 else h[:37] + "..." for h in shown]
    more = len(raw.data.columns) - len(shown)
    found = ", ".join(f"'{h}'" for h in shown) or "none"
    if more > 0:
        found += f" and {more} more"
    where = f" (sheet '{raw.sheet}')" if raw.sheet else ""
    return (
        f"{raw.source}{where}: required column{'s' if len(missing) > 1 else ''} "
        f"{' and '.join(missing)} not found in the header row (row {raw.header_row}; columns "
        f"found: {found})."
    )


def _merge_duplicates(
    raw: RawTable,
    fail: Callable[[np.ndarray, str, str | np.ndarray], None],
    notes_pos: list[np.ndarray],
    notes_text: list[np.ndarray],
    file_notes: list[str],
) -> pd.DataFrame:
    """Reconcile contract columns given twice (two headers that mean the same column).

    Where the copies agree, or one is blank, the value given is used; where they differ the row
    is invalid (which one is right cannot be known). Unknown columns given twice are carried
    through as they are.
    """
    data = raw.data
    wanted = {name: dups for name, dups in raw.duplicates.items() if name in SPECS}
    if not wanted:
        return data
    data = data.copy()
    for name, dups in wanted.items():
        first = raw.headers[name]
        file_notes.append(
            f"{len(dups) + 1} columns mean {name} ("
            + ", ".join(f"'{raw.headers[c].split(' (duplicate')[0]}'" for c in [name, *dups])
            + "); where one is blank the other is used, where they differ the row is invalid"
        )
        for dup in dups:
            a = data[name].map(lambda v: "" if v is None else _fmt(v).strip())
            b = data[dup].map(lambda v: "" if v is None else _fmt(v).strip())
            differ = ((a != b) & (a != "") & (b != "")).to_numpy()
            fill = ((a == "") & (b != "")).to_numpy()
            label = raw.headers[dup].split(" (duplicate")[0]
            fail(
                differ,
                name,
                np.asarray(
                    [
                        f"given twice with different values: '{x}' under '{first}' and '{y}' "
                        f"under '{label}'; keep one of the columns"
                        for x, y in zip(a, b, strict=True)
                    ],
                    dtype=object,
                ),
            )
            if fill.any():
                data.loc[fill, name] = data.loc[fill, dup]
                pos = np.flatnonzero(fill)
                notes_pos.append(pos)
                notes_text.append(
                    np.full(
                        len(pos),
                        f"{name} taken from the column '{label}' (the column '{first}' is blank)",
                        dtype=object,
                    )
                )
    return data
