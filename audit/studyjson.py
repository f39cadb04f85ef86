"""The ``studies`` array of the JSON contract, encoded column by column.

A study object holds about sixty values (identity, status, messages and forty metrics). Built as
one Python dict per study and then encoded, a 100k-study portfolio spends seconds creating and
discarding dicts. Here each column is encoded for a whole chunk of studies in one call (orjson
encodes a numpy float array in C; a column of repeated texts is encoded once per distinct text),
the pieces are laid out row by row in one object array, and the chunk is joined once. Messages
per study (errors, notes, flags) are grouped by row from their long tables.

The output is the same document :meth:`audit.pipeline.AuditResult.to_dict` returns (that method
decodes it): one encoder, so the streamed file and the in-memory document cannot disagree.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from typing import TYPE_CHECKING

import numpy as np
import orjson
import pandas as pd

if TYPE_CHECKING:
    from audit.pipeline import AuditResult

__all__ = ["INTEGER_METRICS", "json_default", "study_chunks"]

#: Metrics written as JSON integers (sizes).
INTEGER_METRICS = frozenset(
    {
        "n_required_plan",
        "n_required_realized",
        "events_required_plan",
        "n_required_with_dropout",
        "n_required_closest",
    }
)

_NULL = b"null"
_EMPTY_LIST = b"[]"
_OPTIONS = orjson.OPT_SERIALIZE_NUMPY


def json_default(value: object) -> object:
    """Values orjson does not know: pandas' missing value as null, anything else as text."""
    if value is pd.NA or value is pd.NaT:
        return None
    return str(value)


def _dumps(value: object) -> bytes:
    return orjson.dumps(value, default=json_default, option=_OPTIONS)


def encode_objects(values: Sequence[object] | np.ndarray) -> np.ndarray:
    """JSON text of each value (texts, or None/nan as null).

    A column of texts none of which holds a double quote is encoded in one call and cut at the
    ``","`` between its members (inside such texts that sequence cannot occur). Any other
    column is encoded once per distinct value.
    """
    cells = values.tolist() if isinstance(values, np.ndarray) else list(values)
    if cells and set(map(type, cells)) == {str}:
        text = orjson.dumps(cells)
        if b'\\"' not in text:
            # JSON text never holds a raw NUL byte (control characters are escaped): it marks
            # the cuts, and each member keeps its quotes.
            out = np.empty(len(cells), dtype=object)
            out[:] = text[1:-1].replace(b'","', b'"\x00"').split(b"\x00")
            return out
    codes, uniques = pd.factorize(np.asarray(cells, dtype=object), use_na_sentinel=True)
    table = np.empty(len(uniques) + 1, dtype=object)
    table[:-1] = [_dumps(u) for u in uniques]
    table[-1] = _NULL  # code -1: missing
    return table[codes]


def encode_numbers(values: np.ndarray, *, integer: bool = False) -> np.ndarray:
    """JSON text of each number; nan and infinities as null, ``integer`` ones without a point.

    A size beyond the 64-bit integer range (an effect of 1e-12 needs some 1e25 units) is written
    in exponent form, as the double it was computed as: its trailing digits would be invented.
    """
    x = np.asarray(values, dtype=float)
    out = np.empty(len(x), dtype=object)
    if not len(x):
        return out
    # orjson writes floats as the shortest text that reads back to the same double, and numpy
    # nan and infinities as null.
    out[:] = orjson.dumps(x, option=_OPTIONS)[1:-1].split(b",")
    if integer:
        whole = np.isfinite(x) & (np.abs(x) < 2.0**63)
        if whole.any():
            out[whole] = orjson.dumps(x[whole].astype(np.int64), option=_OPTIONS)[1:-1].split(b",")
    return out


class RowLists:
    """JSON arrays per row from a long table: ``items[k]`` (encoded) belongs to row
    ``positions[k]``. Sorted by row once (stably: the order of a row's items is kept), then
    cut for any range of rows."""

    def __init__(self, positions: np.ndarray, items: np.ndarray) -> None:
        order = np.argsort(positions, kind="stable")
        self._pos = positions[order]
        self._items = items[order]

    def lists(self, start: int, stop: int) -> np.ndarray:
        """``[...]`` for each row ``start`` to ``stop`` (``[]`` where a row has no items)."""
        out = np.full(stop - start, _EMPTY_LIST, dtype=object)
        lo, hi = np.searchsorted(self._pos, [start, stop])
        if lo == hi:
            return out
        pos, values = self._pos[lo:hi], self._items[lo:hi].tolist()
        # Rows with items: where each row's run begins and ends in the sorted table.
        rows, first = np.unique(pos, return_index=True)
        ends = np.append(first[1:], len(pos)).tolist()
        out[rows - start] = [
            b"[" + b",".join(values[a:b]) + b"]" for a, b in zip(first.tolist(), ends, strict=True)
        ]
        return out


def _key(name: str, first: bool) -> bytes:
    return (b"{" if first else b",") + orjson.dumps(name) + b":"


def _rows(pieces: Sequence[tuple[bytes, np.ndarray]], end: bytes) -> list[bytes]:
    """Rows of JSON text: for each row, ``prefix`` and the row's text of every piece, then
    ``end``.

    One ``bytes % tuple`` per row with a template made of the prefixes: the row's pieces are
    copied once, at C speed, into a buffer of the right size.
    """
    template = b"%b".join(prefix.replace(b"%", b"%%") for prefix, _ in pieces)
    template += b"%b" + end.replace(b"%", b"%%")
    columns = [texts.tolist() for _, texts in pieces]
    return list(map(template.__mod__, zip(*columns, strict=True)))


def study_chunks(
    result: AuditResult, chunk: int = 10_000, start: int = 0, stop: int | None = None
) -> Iterator[bytes]:
    """The members of ``studies``, comma-separated (no brackets), ``chunk`` studies at a time,
    for the studies at positions ``start`` to ``stop`` (default: all).

    Each study: ``study_id``, ``row``, ``design``, ``status``, ``errors`` (sentences),
    ``error_details`` (column, value, reason), ``notes``, ``metrics`` (name -> value, null
    where not computed) and ``flags`` (rule, severity, message), in input order.
    """
    table = result.table
    n = len(table)
    first, last = start, n if stop is None else min(stop, n)

    def within(frame: pd.DataFrame) -> pd.DataFrame:
        pos = frame["pos"].to_numpy(dtype=np.int64)
        return frame[(pos >= first) & (pos < last)]

    in_range = within(result.errors.assign(_sentence=result.error_sentences()))
    errors = in_range.drop(columns="_sentence")
    error_pos = errors["pos"].to_numpy(dtype=np.int64)
    error_texts = RowLists(error_pos, encode_objects(in_range["_sentence"].to_numpy(dtype=object)))
    error_details = RowLists(error_pos, _encode_records(errors, ("column", "value", "reason")))
    notes = within(result.notes)
    note_texts = RowLists(
        notes["pos"].to_numpy(dtype=np.int64), encode_objects(notes["text"].to_numpy(dtype=object))
    )
    findings = within(result.findings)
    flags = RowLists(
        findings["pos"].to_numpy(dtype=np.int64),
        _encode_records(findings, ("rule", "severity", "message")),
    )
    names = list(result.metrics.columns)
    grouped = _object_metrics(names)
    # Columns as plain arrays once (texts as objects, None where not computed), sliced per chunk.
    columns = {
        name: (
            result.metrics[name].to_numpy(dtype=float)
            if pd.api.types.is_numeric_dtype(result.metrics[name].dtype)
            else np.array(
                [v if isinstance(v, str) else None for v in result.metrics[name].tolist()],
                dtype=object,
            )
        )
        for name in names
    }
    ids = table["study_id"].to_numpy(dtype=object)
    designs = table["design"].to_numpy(dtype=object)
    rows = table["_row"].to_numpy(dtype=float)
    status = np.asarray(result.status, dtype=object)
    for start in range(first, last, chunk):
        stop = min(last, start + chunk)
        pieces = [
            (_key("study_id", True), encode_objects(ids[start:stop])),
            (_key("row", False), encode_numbers(rows[start:stop], integer=True)),
            (_key("design", False), encode_objects(designs[start:stop])),
            (_key("status", False), encode_objects(status[start:stop])),
            (_key("errors", False), error_texts.lists(start, stop)),
            (_key("error_details", False), error_details.lists(start, stop)),
            (_key("notes", False), note_texts.lists(start, stop)),
        ]
        j = 0
        for name in names:
            if name in grouped.members:
                if name != grouped.first:
                    continue
                # The object-valued metric, in the place of its first column.
                key, texts = grouped.key, grouped.objects(columns, start, stop)
            else:
                key = name
                column = columns[name][start:stop]
                if column.dtype == object:
                    texts = encode_objects(column)
                else:
                    texts = encode_numbers(column, integer=name in INTEGER_METRICS)
            prefix = _key(key, j == 0)
            pieces.append((b',"metrics":' + prefix if j == 0 else prefix, texts))
            j += 1
        flags_key = (b"}" if names else b',"metrics":{}') + _key("flags", False)
        pieces.append((flags_key, flags.lists(start, stop)))
        yield b",".join(_rows(pieces, b"}"))


class _ObjectMetric:
    """Metric columns the JSON shows as one object: ``reference_power_0.2``,
    ``reference_power_0.5``, ... become ``"reference_power": {"0.2": p, "0.5": p}`` (the
    contract's shape; CSV and workbook keep one column each). This is the one place where the
    JSON's metric objects are assembled."""

    def __init__(self, names: list[str]) -> None:
        from audit.metrics import REFERENCE_PREFIX, reference_columns

        self.key = REFERENCE_PREFIX.rstrip("_")
        self.parts = reference_columns(names)
        self.members = {column for _, column in self.parts}
        self.first = self.parts[0][1] if self.parts else None

    def objects(self, columns: dict[str, np.ndarray], start: int, stop: int) -> np.ndarray:
        pieces = [
            (_key(k, i == 0), encode_numbers(columns[c][start:stop]))
            for i, (k, c) in enumerate(self.parts)
        ]
        out = np.empty(stop - start, dtype=object)
        out[:] = _rows(pieces, b"}")
        # Not computed at all (an invalid row, a design without a standardized unit): null, as
        # every other metric that is not computed.
        known = np.zeros(stop - start, dtype=bool)
        for _, column in self.parts:
            known |= np.isfinite(columns[column][start:stop])
        out[~known] = _NULL
        return out


def _object_metrics(names: list[str]) -> _ObjectMetric:
    return _ObjectMetric(names)


def _encode_records(frame: pd.DataFrame, keys: tuple[str, ...]) -> np.ndarray:
    """One JSON object per row of ``frame`` with the fields ``keys`` (all texts)."""
    if not len(frame):
        return np.array([], dtype=object)
    pieces = [
        (_key(k, i == 0), encode_objects(frame[k].to_numpy(dtype=object)))
        for i, k in enumerate(keys)
    ]
    out = np.empty(len(frame), dtype=object)
    out[:] = _rows(pieces, b"}")
    return out
