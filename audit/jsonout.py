"""The JSON document of the output contract, encoded column by column.

A study object holds about sixty values (identity, status, messages and forty metrics). Built as
one Python dict per study and then encoded, a 100k-study portfolio spends seconds creating and
discarding dicts. Here each column is encoded for a whole chunk of studies in one call (orjson
encodes a numpy float array in C; a column of texts is encoded once per distinct text, each text
by orjson on its own, so no content of a cell can change the document's structure), the pieces
are laid out row by row with one ``bytes % tuple`` per study, and the chunk is joined once.
Messages per study (errors, notes, flags) are grouped by row from their long tables.

The JSON file and :meth:`audit.result.AuditResult.to_dict` (which decodes this text) come from
this one encoder, so they cannot disagree. This module reads a result; it imports nothing of the
pipeline.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator, Sequence
from typing import TYPE_CHECKING

import numpy as np
import orjson
import pandas as pd

if TYPE_CHECKING:
    from audit.result import AuditResult

__all__ = [
    "INTEGER_METRICS",
    "JSON_INDENT_LIMIT",
    "SCHEMA_VERSION",
    "document_bytes",
    "document_frame",
    "document_parts",
    "indented",
    "json_default",
    "portfolio_document",
    "schema_text",
    "study_chunks",
]

#: Version of the document's JSON Schema (audit/output.schema.json, ``study-audit schema``),
#: written as the document's top-level ``schema_version``: a key removed or renamed changes the
#: major number, a key added the minor one.
SCHEMA_VERSION = "1.0"

#: Up to this many studies the JSON is indented for reading; beyond, it is compact.
JSON_INDENT_LIMIT = 2_000

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
    """JSON text of each value (texts, or None/nan as null), one orjson call per distinct value.

    Each text is encoded on its own: nothing in a cell (quotes, ``","``, backslashes, control
    characters) can reach the structure of the document.
    """
    cells = np.asarray(values, dtype=object) if not isinstance(values, pd.Categorical) else values
    codes, uniques = pd.factorize(cells, use_na_sentinel=True)
    table = np.empty(len(uniques) + 1, dtype=object)
    table[:-1] = [_dumps(u) for u in np.asarray(uniques, dtype=object).tolist()]
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
    """JSON arrays per row from a long table (``pos`` and the items' fields): sorted by row
    once (stably: the order of a row's items is kept), then, for any range of rows, the items
    of those rows encoded by ``encode(order)`` (``order``: the table's row numbers, in order).
    Only one range's items are encoded at a time, so the text of a large portfolio's millions
    of notes never exists all at once."""

    def __init__(self, positions: np.ndarray, encode: Callable[[np.ndarray], np.ndarray]) -> None:
        self._order = np.argsort(positions, kind="stable")
        self._pos = positions[self._order]
        self._encode = encode

    def lists(self, start: int, stop: int) -> np.ndarray:
        """``[...]`` for each row ``start`` to ``stop`` (``[]`` where a row has no items)."""
        out = np.full(stop - start, _EMPTY_LIST, dtype=object)
        lo, hi = np.searchsorted(self._pos, [start, stop])
        if lo == hi:
            return out
        pos = self._pos[lo:hi]
        values = self._encode(self._order[lo:hi]).tolist()
        # Rows with items: where each row's run begins and ends in the sorted table.
        rows, first = np.unique(pos, return_index=True)
        ends = np.append(first[1:], len(pos)).tolist()
        out[rows - start] = [
            b"[" + b",".join(values[a:b]) + b"]" for a, b in zip(first.tolist(), ends, strict=True)
        ]
        return out


def _texts_by_code(column: pd.Series) -> Callable[[np.ndarray], np.ndarray]:
    """An encoder of some cells of a text column (by row number): a categorical column's texts
    are encoded once per category, up front; others per distinct text of the rows asked for."""
    if isinstance(column.dtype, pd.CategoricalDtype):
        categories = column.cat.categories.to_numpy(dtype=object)
        table = np.empty(len(categories) + 1, dtype=object)
        table[:-1] = [_dumps(u) for u in categories.tolist()]
        table[-1] = _NULL
        codes = column.cat.codes.to_numpy()
        return lambda rows: table[codes[rows]]
    cells = column.to_numpy(dtype=object)
    return lambda rows: encode_objects(cells[rows])


def _records_by_row(
    frame: pd.DataFrame, keys: tuple[str, ...]
) -> Callable[[np.ndarray], np.ndarray]:
    """An encoder of some rows of ``frame`` as JSON objects with the text fields ``keys``."""
    fields = [(k, _texts_by_code(frame[k])) for k in keys]

    def encode(rows: np.ndarray) -> np.ndarray:
        pieces = [(_key(k, i == 0), texts(rows)) for i, (k, texts) in enumerate(fields)]
        out = np.empty(len(rows), dtype=object)
        out[:] = _rows(pieces, b"}")
        return out

    return encode


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

    def positions(frame: pd.DataFrame) -> np.ndarray:
        return frame["pos"].to_numpy(dtype=np.int64)

    errors = result.errors
    sentences = pd.Series(result.error_sentences(), dtype=object)
    error_texts = RowLists(positions(errors), _texts_by_code(sentences))
    error_details = RowLists(
        positions(errors), _records_by_row(errors, ("column", "value", "reason"))
    )
    notes = result.notes
    note_texts = RowLists(positions(notes), _texts_by_code(notes["text"]))
    findings = result.findings
    flags = RowLists(
        positions(findings), _records_by_row(findings, ("rule", "severity", "message"))
    )
    names = list(result.metrics.columns)
    grouped = _ObjectMetric(names)
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
        out[~known] = b"null"
        return out


def _jsonable(value: object) -> object:
    """Portfolio values as JSON values: numpy scalars as numbers, nan and infinities as null."""
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return None if not math.isfinite(float(value)) else float(value)
    return value


def portfolio_document(result: AuditResult) -> dict[str, object]:
    """The ``portfolio`` block as the JSON document holds it (plain JSON values)."""
    return orjson.loads(_encode({"p": _jsonable(result.portfolio)}))["p"]


def _encode(document: dict[str, object], *, indent: bool = False) -> bytes:
    option = orjson.OPT_SERIALIZE_NUMPY | orjson.OPT_NON_STR_KEYS
    if indent:
        option |= orjson.OPT_INDENT_2
    return orjson.dumps(document, default=json_default, option=option)


def _head(result: AuditResult) -> bytes:
    """The keys before ``studies`` (compact), without the closing brace."""
    from audit import __version__

    head = {
        "tool": "study-audit",
        "version": __version__,
        "schema_version": SCHEMA_VERSION,
        "settings": result.settings,
    }
    return _encode(head)[:-1]


def _tail(result: AuditResult) -> bytes:
    """The keys after ``studies`` (compact), without the opening brace."""
    tail: dict[str, object] = {"portfolio": _jsonable(result.portfolio)}
    if result.groups:
        # --group-by: {column: {value: the portfolio summary over that value's rows}}.
        tail["groups"] = _jsonable(result.groups)
    tail["caveats"] = result.caveats
    return _encode(tail)[1:]


def document_frame(result: AuditResult) -> tuple[bytes, bytes]:
    """The compact document's text before the members of ``studies`` and after them (the
    settings, the portfolio block, the groups and the caveats of ``result``)."""
    return _head(result) + b',"studies":[', b"]," + _tail(result)


def document_parts(result: AuditResult, chunk: int = 10_000) -> Iterator[bytes]:
    """The compact JSON document in pieces: head, ``chunk`` studies at a time, tail."""
    head, tail = document_frame(result)
    yield head
    for i, part in enumerate(study_chunks(result, chunk)):
        yield b"," + part if i else part
    yield tail


def indented(compact: bytes) -> bytes:
    """A compact document laid out for reading (two spaces)."""
    return _encode(orjson.loads(compact), indent=True)


def document_bytes(result: AuditResult, *, indent: bool = False) -> bytes:
    """The whole JSON document; ``indent`` lays it out for reading (two spaces)."""
    compact = b"".join(document_parts(result))
    return indented(compact) if indent else compact


def schema_text() -> str:
    """The JSON Schema (draft 2020-12) of the document, as shipped with the package."""
    from importlib.resources import files

    return files("audit").joinpath("output.schema.json").read_text(encoding="utf-8")
