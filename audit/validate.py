"""Lazy, vectorised validation of every row against the input contract (:mod:`audit.schema`).

Validation never raises for a bad row. It returns a typed table (numbers as floats, text as
strings), a failure table with one line per bad cell (spreadsheet row, column, value, reason) and
notes about values it interpreted. A row with any failure is *invalid*: it still appears in every
output, with its errors, but is not audited.
"""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from audit.designs import design_groups
from audit.errors import InputError
from audit.inputs import ignored_errors
from audit.numbers import (
    Distinct,
    cell_text,
    distinct_columns,
    flags,
    joined,
    objects,
    parse_column,
    take,
)
from audit.pvalues import p_value_bounds
from audit.read import UNCACHED, RawTable, normalise_header
from audit.reported import statistic_checks
from audit.schema import COLUMNS, FLAG_VALUES, MISSING_TOKENS, SPECS, Column

__all__ = ["Validated", "WholeTable", "study_ids", "validate", "whole_table"]


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


@dataclass(frozen=True)
class WholeTable:
    """What :func:`validate` needs to know of a larger table when it checks a slice of it: the
    positions (in the whole, in order) of the rows whose study_id another row uses too, the
    note for each, and the position in the whole of the slice's first row. Made once for the
    table by :func:`whole_table`."""

    duplicate_pos: np.ndarray
    duplicate_notes: np.ndarray
    start: int = 0


def whole_table(raw: RawTable) -> WholeTable:
    """The :class:`WholeTable` of ``raw`` (its study_ids typed as :func:`validate` types them)."""
    pos, text = _duplicate_ids(study_ids(raw), raw.rows)
    return WholeTable(pos, text)


def study_ids(raw: RawTable) -> pd.Series:
    """The ``study_id`` column of ``raw`` typed as :func:`validate` types it."""
    data = raw.data
    if "study_id" in raw.duplicates:
        data = _merge_duplicates(raw, lambda *_: None, [], [], [])
    columns: dict[str, np.ndarray | pd.Series] = {}
    found = joined(distinct_columns(data, ["study_id"])["study_id"])
    cells = data["study_id"].reset_index(drop=True)
    _text_column(SPECS["study_id"], cells, found, columns, lambda *_: None)
    return pd.Series(columns["study_id"], dtype=object)


class _Findings:
    """What validation finds beside the typed values: failures (position, column, reason) and
    notes (position, text), collected as arrays and made tables once at the end."""

    def __init__(self, raw: RawTable) -> None:
        self.n = len(raw.data)
        self.fail_pos: list[np.ndarray] = []
        self.fail_col: list[str] = []
        self.fail_reason: list[np.ndarray] = []
        self.notes_pos: list[np.ndarray] = [np.array([p for p, _ in raw.row_notes], dtype=int)]
        self.notes_text: list[np.ndarray] = [np.array([t for _, t in raw.row_notes], dtype=object)]
        self.file_notes: list[str] = list(raw.notes)
        for position, column, reason in raw.cell_problems:
            self.fail_at(np.array([position], dtype=np.intp), column, reason)

    def fail(self, mask: np.ndarray, column: str, reason: str | np.ndarray) -> None:
        """Failures where ``mask`` is set; ``reason``: one text, or one per row."""
        pos = np.flatnonzero(mask)
        reasons = np.asarray(reason, dtype=object)
        self.fail_at(
            pos, column, np.broadcast_to(reasons, (self.n,))[pos] if reasons.ndim else reason
        )

    def fail_at(self, pos: np.ndarray, column: str, reason: str | np.ndarray) -> None:
        """Failures at the positions ``pos``; ``reason``: one text, or one per position."""
        if len(pos):
            self.fail_pos.append(pos)
            self.fail_col.append(column)
            self.fail_reason.append(
                np.full(len(pos), reason) if isinstance(reason, str) else reason.astype(object)
            )

    def failure_table(self, data: pd.DataFrame, rows: np.ndarray) -> pd.DataFrame:
        """One line per rejected cell (pos, row, column, value as written, reason), by row."""
        if not self.fail_pos:
            return pd.DataFrame(columns=["pos", "row", "column", "value", "reason"])
        pos = np.concatenate(self.fail_pos)
        cols = np.concatenate(
            [
                np.full(len(p), c, dtype=object)
                for p, c in zip(self.fail_pos, self.fail_col, strict=True)
            ]
        )
        failures = pd.DataFrame(
            {"pos": pos, "column": cols, "reason": np.concatenate(self.fail_reason)}
        )
        failures["row"] = rows[pos] if len(rows) else []
        failures["value"] = [
            cell_text(data[c].iat[p]) if c in data.columns else ""
            for p, c in zip(pos, cols, strict=True)
        ]
        failures = failures.sort_values(["pos"], kind="stable").reset_index(drop=True)
        return failures[["pos", "row", "column", "value", "reason"]]

    def note_table(self) -> pd.DataFrame:
        return pd.DataFrame(
            {
                "pos": np.concatenate(self.notes_pos).astype(int),
                "text": np.concatenate(self.notes_text).astype(object),
            }
        )


def validate(raw: RawTable, whole: WholeTable | None = None) -> Validated:
    """Type and check every cell of ``raw``; see the module docstring.

    ``whole``: ``raw`` is a slice of a larger table (rows are checked one by one, except that a
    study_id used twice is looked for in the whole table).

    Raises
    ------
    InputError
        The table lacks a ``study_id`` or ``design`` column.
    """
    missing = [c for c in ("study_id", "design") if c not in raw.data.columns]
    if missing:
        raise InputError(_missing_columns_message(raw, missing))
    found = _Findings(raw)
    data = _merge_duplicates(raw, found.fail, found.notes_pos, found.notes_text, found.file_notes)
    table = _typed_table(raw, data, found)
    _check_ids(table, whole, found)
    _check_designs(table, found)
    _check_results(table, found)
    _check_df(table, found)
    extra = [c for c in data.columns if c not in SPECS]
    for c in extra:
        table[c] = data[c].reset_index(drop=True)
    failures = found.failure_table(data, raw.rows)
    valid = np.ones(len(table), dtype=bool)
    valid[failures["pos"].to_numpy(dtype=int)] = False
    return Validated(table, failures, found.note_table(), valid, extra, raw, found.file_notes)


def _typed_table(raw: RawTable, data: pd.DataFrame, found: _Findings) -> pd.DataFrame:
    """Every contract column typed (defaults where a column is absent), plus ``_row``."""
    n = len(data)
    # The typed columns are collected first and made one frame at the end: inserting them one
    # by one into a frame costs more, and leaves it in many pieces.
    columns: dict[str, np.ndarray | pd.Series] = {"_row": raw.rows}
    blocks = distinct_columns(data, [spec.name for spec in COLUMNS if spec.name in data])
    for spec in COLUMNS:
        if spec.name not in data.columns:
            columns[spec.name] = _absent(spec, n)
            continue
        cells = data[spec.name].reset_index(drop=True)
        distinct = joined(blocks.pop(spec.name))
        if spec.kind == "flag":
            columns[spec.name] = _flag_column(spec, cells, distinct, found)
        elif spec.kind in ("text", "design", "choice"):
            _text_column(spec, cells, distinct, columns, found.fail)
        else:
            if spec.name == "observed_p":
                cells, distinct = p_value_bounds(
                    cells, distinct, columns, found.notes_pos, found.notes_text
                )
            columns[spec.name] = _number_column(spec, cells, distinct, raw.decimal_comma, found)
    # Per distinct value: the column holds a handful of texts.
    sides = pd.Series(columns["sides"], dtype=object).to_numpy()
    codes, texts = pd.factorize(sides, use_na_sentinel=False)
    numbers = pd.to_numeric(pd.Series(texts, dtype=object), errors="coerce").to_numpy(dtype=float)
    columns["sides"] = numbers[codes]
    _one_sided_margin_tests(data, columns)
    return pd.DataFrame(columns, index=pd.RangeIndex(n))


def _one_sided_margin_tests(data: pd.DataFrame, columns: dict) -> None:
    """A blank ``sides`` on a non-inferiority or equivalence row is 1: their tests are one-sided
    (TOST: two one-sided tests), at the row's ``alpha`` (DESIGN.md 9.1)."""
    hypothesis = pd.Series(columns["hypothesis"], dtype=object).to_numpy()
    margin = np.isin(hypothesis, ("non_inferiority", "equivalence"))
    if not margin.any():
        return
    if "sides" in data.columns:
        text = data["sides"].reset_index(drop=True).astype(object)
        cleaned = text.where(text.notna(), "").map(str).str.strip().str.lower()
        blank = (cleaned.eq("") | cleaned.isin(MISSING_TOKENS - {"-"})).to_numpy(dtype=bool)
    else:
        blank = np.ones(len(margin), dtype=bool)
    columns["sides"] = np.where(margin & blank, 1.0, columns["sides"])


def _absent(spec: Column, n: int) -> np.ndarray | pd.Series:
    """A contract column the table does not have: its default (or blank) on every row."""
    if spec.kind in ("number", "integer", "flag"):
        return np.full(n, np.nan if spec.default is None else float(spec.default))
    if spec.kind == "choice":
        return pd.Series([spec.default] * n, dtype=object)
    return pd.Series([None] * n, dtype=object)


def _flag_column(
    spec: Column, cells: pd.Series, distinct: Distinct | None, found: _Findings
) -> np.ndarray:
    """A yes/no column as 1.0 / 0.0; blank stays nan (the run's default applies, see
    :mod:`audit.pipeline`)."""
    codes, texts, uncached = _trimmed_texts(cells, distinct)
    lowered = list(map(str.lower, texts))
    # A formula without a saved value is not blank: it is rejected as no yes or no.
    tokens = flags(map(MISSING_TOKENS.__contains__, lowered), len(texts))
    blank = take(tokens, codes, True) & ~uncached
    values = np.array([FLAG_VALUES.get(v, np.nan) for v in lowered], dtype=float)
    flag = take(values, codes, np.nan)
    found.fail(~blank & np.isnan(flag), spec.name, f"expected {spec.range_text()}")
    return flag


def _number_column(
    spec: Column,
    cells: pd.Series,
    distinct: Distinct | None,
    decimal_comma: bool,
    found: _Findings,
) -> np.ndarray:
    """A number column: parsed, checked against the spec's range (with a hint where a
    proportion looks like a percentage) and whole-number rule; rejected cells nan."""
    n = len(cells)
    x, at, reasons = parse_column(
        cells, distinct, decimal_comma=decimal_comma, whole=spec.kind == "integer"
    )
    found.fail_at(at, spec.name, reasons)
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
            found.fail(pct, spec.name, hint)
            out_of_range &= ~pct
        found.fail(out_of_range, spec.name, f"must be {spec.range_text()}")
        not_whole = present & ~out_of_range & (spec.kind == "integer") & (x != np.round(x))
        found.fail(not_whole, spec.name, "must be a whole number")
    x = np.where(bad | out_of_range | not_whole, np.nan, x)
    if spec.default is not None:
        x = np.where(present | bad, x, float(spec.default))
    return x


def _check_ids(table: pd.DataFrame, whole: WholeTable | None, found: _Findings) -> None:
    """study_id must be given. Rows sharing one are all kept and all audited (which of them is
    right cannot be known, and dropping one would lose a study); each gets a note naming the
    other rows."""
    sid = table["study_id"]
    found.fail(sid.isna().to_numpy(), "study_id", "blank: every study needs an identifier")
    if whole is None:
        pos, text = _duplicate_ids(sid, table["_row"].to_numpy())
    else:
        lo, hi = np.searchsorted(whole.duplicate_pos, [whole.start, whole.start + len(table)])
        pos = whole.duplicate_pos[lo:hi] - whole.start
        text = whole.duplicate_notes[lo:hi]
    if len(pos):
        found.notes_pos.append(pos)
        found.notes_text.append(text)


def _check_designs(table: pd.DataFrame, found: _Findings) -> None:
    """Design-specific checks, on rows whose design is known, one effect measure at a time: the
    design's own (:meth:`Design.check_rows`), a reported test statistic the design cannot read
    (:func:`audit.reported.statistic_checks`) and the columns it would ignore to a wrong
    result (:func:`audit.inputs.ignored_errors`)."""
    n = len(table)
    for design, positions in design_groups(table):
        sub = table.iloc[positions]
        checks = [
            *design.check_rows(sub),
            *statistic_checks(design, sub),
            *ignored_errors(design, sub),
        ]
        for bad, column, reason in checks:
            full = np.zeros(n, dtype=bool)
            full[positions[np.asarray(bad, dtype=bool)]] = True
            reasons = np.asarray(reason, dtype=object)
            if reasons.ndim:  # one reason per row of the design
                spread = np.full(n, "", dtype=object)
                spread[positions] = reasons + f" for design {design.name}"
                found.fail(full, column, spread)
            else:
                found.fail(full, column, f"{reason} for design {design.name}")


def _check_results(table: pd.DataFrame, found: _Findings) -> None:
    """A reported result must hang together: limits in order, the estimate between them."""
    low, high = table["observed_ci_low"].to_numpy(), table["observed_ci_high"].to_numpy()
    estimate = table["observed_effect"].to_numpy()
    with np.errstate(invalid="ignore"):
        found.fail(low > high, "observed_ci_high", "must not be below observed_ci_low")
        found.fail(
            (low <= high) & ((estimate < low) | (estimate > high)),
            "observed_effect",
            "must lie within the confidence interval (observed_ci_low to observed_ci_high)",
        )


def _check_df(table: pd.DataFrame, found: _Findings) -> None:
    """A ``df`` so small that the t test's critical value at the row's alpha lies beyond double
    precision (it grows like alpha ** (-1 / df): about 1e260 at df 0.005 and alpha 0.05) is
    refused: the critical value cannot be computed, and a power computed from the largest
    representable one would be wrong (0.17 instead of 0.05 at a zero effect). The smallest tail
    any test of the row uses (alpha / comparisons / 2) is checked by computing the critical
    value and its tail back."""
    from audit.designs._power import t_critical_computable

    df = table["df"].to_numpy(dtype=float)
    alpha = table["alpha"].to_numpy(dtype=float) / table["comparisons"].to_numpy(dtype=float)
    check = np.isfinite(df) & (df > 0) & (df < 1) & (alpha > 0) & (alpha < 1)
    if not check.any():
        return
    ok = t_critical_computable(alpha[check] / 2.0, df[check])
    bad = np.zeros(len(table), dtype=bool)
    bad[np.flatnonzero(check)[~ok]] = True
    found.fail(
        bad,
        "df",
        "is too small for a t test at this alpha: the critical value lies beyond the range "
        "of double precision (blank df means a normal test; a t test needs more degrees of "
        "freedom)",
    )


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
        trimmed = objects(list(map(str.strip, texts)))
        return codes, trimmed, np.zeros(len(values), dtype=bool)
    uncached = np.fromiter((v is UNCACHED for v in values), dtype=bool, count=len(values))
    text = [None if v is None or v is UNCACHED else cell_text(v).strip() for v in values]
    codes, texts = pd.factorize(objects(text))
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
        texts = objects([re.sub(r"^(\d+)\.0*$", r"\1", v) for v in texts])
    tokens = MISSING_TOKENS - {"-"}
    blank = take(flags(map(tokens.__contains__, map(str.lower, texts)), len(texts)), codes, True)
    text = take(texts, codes, None)
    if spec.kind == "text":
        columns[spec.name] = pd.Series(np.where(blank, None, text), dtype=object)
        return
    normal = objects([normalise_header(v) for v in texts])
    norm = np.where(blank, None, take(normal, codes, None))
    choices = set(spec.choices)
    known = take(flags(map(choices.__contains__, normal), len(normal)), codes, False) & ~blank
    bad = ~known & ~blank
    if spec.kind == "choice":
        norm = np.where(blank, spec.default, norm)
    else:
        fail(blank & ~uncached, spec.name, "blank: the design must be given")
    fail(bad, spec.name, f"unknown {spec.name.replace('_', ' ')}; expected {spec.range_text()}")
    # A rejected value is kept as written so that outputs show what the row said.
    columns[spec.name] = pd.Series(np.where(bad, text, norm), dtype=object)


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
            a = data[name].map(lambda v: "" if v is None else cell_text(v).strip())
            b = data[dup].map(lambda v: "" if v is None else cell_text(v).strip())
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
