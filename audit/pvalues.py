"""Reported p-values written as bounds (``< 0.001``, ``> .1``, ``n.s.``, ``0.000``): read into a
bound and a relation that decide significance where no interval does; nothing is derived from
them. ``p = 0.03`` is 0.03.
"""

from __future__ import annotations

import re

import numpy as np
import pandas as pd

from audit.numbers import Distinct, flags, objects, take

__all__ = ["p_value_bounds"]


_P_BOUND = re.compile(
    r"^\s*(?:p\s*)?(?P<rel><=|>=|<|>|\u2264|\u2265)\s*(?P<num>[0-9]*[.,]?[0-9]+(?:[eE][-+]?[0-9]+)?)\s*$",
    re.IGNORECASE,
)
_P_EQUALS = re.compile(r"^\s*p\s*=\s*(?P<num>\S+)\s*$", re.IGNORECASE)
_NOT_SIGNIFICANT = frozenset({"ns", "n.s.", "n.s", "not significant"})


def p_value_bounds(
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
    replaced = objects([c for _, _, c in read])[codes]
    cleaned[at[changed]] = replaced[changed]
    relation[numeric_zero] = -1.0
    bound[numeric_zero] = 0.001
    cleaned[numeric_zero] = None
    columns["observed_p_bound"] = bound
    columns["observed_p_relation"] = relation
    marked = np.flatnonzero(~np.isnan(relation))
    if len(marked):
        note = np.empty(n, dtype=object)
        note[at] = objects([_p_note(t) for t in texts])[codes]
        zero_at = np.flatnonzero(numeric_zero)
        note[zero_at] = [_p_note(values[i]) for i in zero_at]
        notes_pos.append(marked)
        notes_text.append(note[marked])
    cleaned_distinct = None
    if distinct is not None:
        # The texts cleaned; a cell cleaned to None gets code -1, and its text (referred to by
        # no cell any more) becomes "", which the number parser passes over.
        gone = flags((c is None for _, _, c in read), len(read))
        cleaned_texts = objects(
            [t if c is _AS_WRITTEN else c or "" for t, (_, _, c) in zip(texts, read, strict=True)]
        )
        cleaned_distinct = (np.where(take(gone, cell_codes, True), -1, cell_codes), cleaned_texts)
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
