"""Write an :class:`~audit.pipeline.AuditResult` to files: JSON (the contract), CSV and XLSX.

Files are written atomically: to a temporary file in the target folder, then renamed over the
target, so an interrupted run never leaves a half-written file where a good one was. No export
may be written over the input file. Text that a spreadsheet program would run as a formula is
made inert in CSV and XLSX (see :func:`neutralise_formula`).
"""

from __future__ import annotations

import contextlib
import csv
import os
import re
import sys
import tempfile
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import IO, TYPE_CHECKING

import numpy as np
import pandas as pd

from audit.errors import OutputError
from audit.parallel import ChildTask, can_fork
from audit.studyjson import INTEGER_METRICS

if TYPE_CHECKING:
    from audit.pipeline import AuditResult

__all__ = [
    "CAUTION",
    "atomic_output",
    "neutralise_formula",
    "studies_frame",
    "write_csv",
    "write_json",
]

#: Said wherever results leave the tool in a form that may inform decisions about people.
CAUTION = (
    "This audit supports, and does not replace, the judgment of a qualified statistician: "
    "design-based power and detectable effects depend on the inputs given, and a study's "
    "context may justify what the numbers question."
)

_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")
_PLAIN_NUMBER = re.compile(r"^[+-]?(\d[\d,]*\.?\d*|\.\d+)([eE][+-]?\d+)?%?$")


@contextlib.contextmanager
def atomic_output(path: str | Path, mode: str = "w") -> Iterator[IO]:
    """Open ``path`` for writing through a temporary file renamed into place on success.

    ``path`` ``"-"`` writes to standard output instead.
    """
    if str(path) == "-":
        stream = sys.stdout.buffer if "b" in mode else sys.stdout
        yield stream
        stream.flush()
        return
    target = Path(path)
    if target.is_dir():
        raise OutputError(f"{target} is a folder; give a file name for the export.")
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    except OSError as exc:
        raise OutputError(f"{target}: cannot write here ({exc.strerror or exc}).") from exc
    try:
        # mkstemp creates the file readable by its owner only; give the export the mode a
        # plainly created file would have (or keep the mode of the file it replaces).
        os.chmod(tmp, target.stat().st_mode & 0o777 if target.exists() else 0o666 & ~_umask())
        encoding = None if "b" in mode else "utf-8"
        newline = None if "b" in mode else ""
        with os.fdopen(fd, mode, encoding=encoding, newline=newline) as handle:
            yield handle
        os.replace(tmp, target)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def refuse_input(result: AuditResult, path: str | Path) -> None:
    """An export must never replace the file that was audited."""
    source = result.settings.get("source")
    if str(path) == "-" or not source:
        return
    with contextlib.suppress(OSError):
        if Path(path).exists() and Path(source).exists() and os.path.samefile(path, source):
            raise OutputError(
                f"{path} is the input file; choose another name for the export (the input is "
                "never overwritten)."
            )


def neutralise_formula(value: object) -> object:
    """Text a spreadsheet would run as a formula, made inert with a leading apostrophe.

    Numbers (also negative numbers written as text) are left alone.

    >>> neutralise_formula("=HYPERLINK(\\"x\\")")
    '\\'=HYPERLINK("x")'
    >>> neutralise_formula("-5")
    '-5'
    """
    if isinstance(value, str) and value.startswith(_FORMULA_START):
        if _PLAIN_NUMBER.match(value.strip()):
            return value
        return "'" + value
    return value


#: Up to this many studies the JSON is indented for reading; beyond, it is compact.
JSON_INDENT_LIMIT = 2_000


def json_bytes(document: dict[str, object], *, indent: bool) -> bytes:
    """Encode the contract document with orjson (NaN becomes null, numpy scalars are numbers)."""
    import orjson

    from audit.studyjson import json_default

    option = orjson.OPT_SERIALIZE_NUMPY | orjson.OPT_NON_STR_KEYS
    if indent:
        option |= orjson.OPT_INDENT_2
    return orjson.dumps(document, default=json_default, option=option)


def write_json(result: AuditResult, path: str | Path) -> None:
    """The contract JSON document (DESIGN.md section 5), UTF-8.

    Indented for portfolios of up to :data:`JSON_INDENT_LIMIT` studies. Larger documents are
    compact and streamed: studies are encoded a chunk at a time while a second thread writes the
    previous chunk (file writes release the interpreter lock), so memory stays bounded and the
    disk works while the next chunk is encoded. From :data:`PARALLEL_JSON_MIN` studies, where
    the platform can fork, a child process encodes the last studies meanwhile
    (:class:`audit.parallel.ChildTask`). A result of ``audit_file(..., prepare_json=True)``
    comes with text encoded during the audit already (:class:`audit.pipeline.PreparedStudies`:
    the child's studies and, from an audit in two shares, the parent's), which is used as is.
    """
    refuse_input(result, path)
    n = len(result.table)
    prepared, result.prepared_studies = result.prepared_studies, None
    if n <= JSON_INDENT_LIMIT:
        if prepared is not None:
            prepared.close()
        data = json_bytes(result.to_dict(), indent=True)
        with atomic_output(path, "wb") as handle:
            handle.write(data)
            handle.write(b"\n")
        return
    head = json_bytes(result.document_head(), indent=False)
    tail = json_bytes(result.document_tail(), indent=False)
    if prepared is not None:  # started by the audit (audit_file(..., prepare_json=True))
        half = prepared.start
    else:
        # The child takes a little more: this process also writes the file and appends the
        # child's part to it (a forked child, on the other hand, runs some 25 % slower: its
        # first writes to memory shared with this process copy pages).
        half = int(n * PARENT_SHARE) if n >= PARALLEL_JSON_MIN and can_fork() else n

    def second_half() -> Iterator[bytes]:
        for i, part in enumerate(result.study_json(start=half)):
            yield b"," + part if i else part

    folder = None if str(path) == "-" else Path(path).resolve().parent
    with atomic_output(path, "wb") as handle:
        # The child starts before the writer thread: a forked child has only the forking thread.
        own = None
        if prepared is not None:
            started: contextlib.AbstractContextManager = contextlib.closing(prepared)
            child, own = prepared.task, prepared.own
        elif half < n:
            started = child = ChildTask(lambda out: out.writelines(second_half()), folder)
        else:
            started = contextlib.nullcontext()
        with started, _BackgroundWriter(handle) as writer:
            writer.write(head[:-1] + b',"studies":[')
            if own is not None:  # encoded by the audit already
                writer.write(lambda handle: _append_file(handle, own))
            else:
                for i, part in enumerate(result.study_json(stop=half)):
                    writer.write((b"," if i else b"") + part)
            if half < n:
                writer.write(b",")
                done = child.result()
                if done is not None:
                    writer.write(lambda handle: _append_file(handle, done))
                else:  # no child, or it failed: encode the second half here
                    for part in second_half():
                        writer.write(part)
            writer.write(b"]," + tail[1:] + b"\n")


#: From this many studies the JSON encoding is split over two processes (see audit.parallel).
PARALLEL_JSON_MIN = 20_000
#: The share of the studies this process encodes when a child encodes the rest (measured best
#: between 0.45 and 0.5 on two cores).
PARENT_SHARE = 0.47


def _append_file(handle: IO[bytes], source: IO[bytes]) -> None:
    """Append all of ``source`` (a regular file) to ``handle``: copied by the kernel where it
    can (sendfile), else read and written."""
    handle.flush()
    size = os.fstat(source.fileno()).st_size
    offset = 0
    with contextlib.suppress(OSError, AttributeError, ValueError):
        while offset < size:
            sent = os.sendfile(handle.fileno(), source.fileno(), offset, size - offset)
            if not sent:
                break
            offset += sent
    source.seek(offset)
    while block := source.read(16 * 2**20):
        handle.write(block)


class _BackgroundWriter:
    """Writes queued byte strings to a file in a thread, in order; errors surface on exit."""

    def __init__(self, handle: IO) -> None:
        import queue
        import threading

        self._handle = handle
        self._queue: queue.Queue[bytes | Callable[[IO], None] | None] = queue.Queue(maxsize=2)
        self._error: BaseException | None = None
        self._thread = threading.Thread(target=self._run, daemon=True)

    def _run(self) -> None:
        while (data := self._queue.get()) is not None:
            if self._error is None:
                try:
                    if callable(data):
                        data(self._handle)
                    else:
                        self._handle.write(data)
                except BaseException as exc:  # reported by the main thread on exit
                    self._error = exc

    def __enter__(self) -> _BackgroundWriter:
        self._thread.start()
        return self

    def write(self, data: bytes | Callable[[IO], None]) -> None:
        """Queue bytes to write, or a function to call with the file (in order)."""
        if self._error is not None:
            raise self._error
        self._queue.put(data)

    def __exit__(self, *exc: object) -> None:
        self._queue.put(None)
        self._thread.join()
        if self._error is not None and exc[0] is None:
            raise self._error


def studies_frame(result: AuditResult) -> pd.DataFrame:
    """One row per study: the user's columns as written, then status, metrics and findings."""
    raw = result.raw
    user = pd.DataFrame(
        {raw.headers[c]: raw.data[c].to_numpy(dtype=object) for c in raw.data.columns}
    )
    ours = pd.DataFrame(
        {
            "row": result.table["_row"].to_numpy(),
            "status": result.status,
        }
    )
    metrics = result.metrics.reset_index(drop=True)
    for c in INTEGER_METRICS:
        if c in metrics.columns and pd.api.types.is_float_dtype(metrics[c].dtype):
            metrics[c] = _whole_numbers(metrics[c].to_numpy())
    flags = result.by_row(
        result.findings.assign(
            text=result.findings["rule"].astype(str)
            + " ("
            + result.findings["severity"].astype(str)
            + "): "
            + result.findings["message"].astype(str)
        )
        if len(result.findings)
        else result.findings.assign(text=[]),
        "text",
    )
    tail = pd.DataFrame(
        {
            "errors": ["; ".join(e) for e in result.error_texts()],
            "notes": ["; ".join(n) for n in result.by_row(result.notes, "text")],
            "flags": ["; ".join(f) for f in flags],
        }
    )
    return pd.concat([user, ours, metrics, tail], axis=1)


def _whole_numbers(values: np.ndarray) -> pd.Series:
    """Sizes as whole numbers (blank where not computed). A size past the 64-bit range (an
    effect of 1e-12 needs some 1e25 units) stays the double it was computed as."""
    finite = np.isfinite(values)
    if (np.abs(values[finite]) < 2.0**63).all():
        return pd.Series(values, dtype="Float64").astype("Int64")
    out = np.full(len(values), None, dtype=object)
    small = finite & (np.abs(values) < 2.0**63)
    out[small] = [int(v) for v in values[small].tolist()]
    out[finite & ~small] = values[finite & ~small].tolist()
    return pd.Series(out, dtype=object)


def write_csv(result: AuditResult, path: str | Path) -> None:
    """The per-study table as CSV, formula-like text made inert.

    Written with the ``csv`` module from one plain list per column (numbers as Python floats
    and ints, written as ``repr`` writes them; blanks as None): three times faster than
    ``DataFrame.to_csv`` at 100,000 studies, with the same text. Formula-like text is looked
    for once per distinct value of a column.
    """
    refuse_input(result, path)
    frame = studies_frame(result)
    header = [neutralise_formula(str(c)) for c in frame.columns]
    columns = [_csv_cells(frame[c]) for c in frame.columns]
    with atomic_output(path) as handle:
        writer = csv.writer(handle, lineterminator="\n")
        writer.writerow(header)
        writer.writerows(zip(*columns, strict=True))


def _csv_cells(column: pd.Series) -> list[object]:
    """A column's cells for the csv module: None where blank, text made inert."""
    if pd.api.types.is_float_dtype(column.dtype) and not pd.api.types.is_extension_array_dtype(
        column.dtype
    ):
        values = column.to_numpy(dtype=float)
        cells = values.astype(object)
        cells[np.isnan(values)] = None
        return cells.tolist()
    if pd.api.types.is_integer_dtype(column.dtype) and not column.hasnans:
        return column.to_numpy(dtype=np.int64).tolist()
    cells = np.array(column.astype(object).to_numpy(dtype=object), dtype=object)  # a copy
    cells[pd.isna(cells)] = None
    codes, uniques = pd.factorize(cells, use_na_sentinel=True)
    if len(uniques) and any(isinstance(v, str) and v.startswith(_FORMULA_START) for v in uniques):
        inert = np.empty(len(uniques) + 1, dtype=object)
        inert[:-1] = [neutralise_formula(v) for v in uniques]
        inert[-1] = None
        return inert[codes].tolist()
    return cells.tolist()


#: Characters XML 1.0 (so a workbook) cannot hold; replaced by U+FFFD when a workbook is written.
ILLEGAL_XLSX = re.compile(r"[\x00-\x08\x0b\x0c\x0e-\x1f]")
