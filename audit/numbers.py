"""Cells read as numbers: ``0.05``, ``5%``, ``1,234``, a decimal comma in ``;`` files, digits
of any script; each distinct text of a column parsed once and mapped back by its codes.

Parsing never raises for a bad cell: it gives nan and a reason, which validation turns into a
row error (a cell that does not parse is never read as blank).
"""

from __future__ import annotations

import math
import re
import unicodedata
from collections.abc import Iterable

import numpy as np
import pandas as pd

from audit.read import UNCACHED
from audit.schema import MISSING_TOKENS

__all__ = [
    "Distinct",
    "cell_text",
    "distinct_columns",
    "flags",
    "joined",
    "objects",
    "parse_column",
    "parse_numbers",
    "take",
]


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
    x, at, reasons = parse_column(
        values, _distinct_of(values), decimal_comma=decimal_comma, whole=whole
    )
    problem = np.full(len(values), "", dtype=object)
    problem[at] = reasons
    return pd.Series(x, index=values.index), pd.Series(problem, index=values.index, dtype=object)


def parse_column(
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
        codes = take(merged, codes, -1)
        text_x, text_why = _parse_texts(texts, decimal_comma=decimal_comma, whole=whole)
        text_bad = text_why != ""
        _reject_infinite(text_x, text_bad, text_why)
        at = np.flatnonzero(take(text_bad, codes, False))
        return take(text_x, codes, np.nan), at, text_why[codes[at]]
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


def distinct_columns(data: pd.DataFrame, names: list[str]) -> dict[str, list[Distinct] | None]:
    """:func:`_distinct_texts` of the columns ``names`` of ``data``, per block of rows.

    Each column gets its blocks' ``(codes, texts)`` (join them with :func:`joined`), or None
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


def joined(parts: list[Distinct] | None) -> Distinct | None:
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


def take(per_text: np.ndarray, codes: np.ndarray, empty: object) -> np.ndarray:
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


def cell_text(value: object) -> str:
    if value is None:
        return ""
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value)


def flags(items: Iterable[bool], count: int) -> np.ndarray:
    return np.fromiter(items, dtype=bool, count=count)


def objects(items: list[object]) -> np.ndarray:
    """A 1-d object array of ``items`` (never a 2-d array, even of equal-length sequences)."""
    out = np.empty(len(items), dtype=object)
    out[:] = items
    return out
