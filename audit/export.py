"""Write an :class:`~audit.result.AuditResult` to files: JSON (the contract) and CSV.

Files are written atomically: to a temporary file in the target folder, then renamed over the
target, so an interrupted run never leaves a half-written file where a good one was. No export
may be written over the input file. Text that a spreadsheet program would run as a formula is
made inert in CSV and XLSX (see :func:`neutralise_formula`).
"""

from __future__ import annotations

import contextlib
import csv
import dataclasses
import io
import itertools
import os
import re
import sys
import tempfile
from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import IO, TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from audit.errors import OutputError
from audit.jsonout import (
    INTEGER_METRICS,
    JSON_INDENT_LIMIT,
    document_frame,
    indented,
    study_chunks,
)

if TYPE_CHECKING:
    from audit.result import AuditResult

__all__ = [
    "CAUTION",
    "CsvExport",
    "JsonExport",
    "atomic_output",
    "files_read",
    "neutralise_formula",
    "pending_temporary_files",
    "refuse_overwrite",
    "remove_pending_temporary_files",
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

    ``path`` ``"-"`` writes to standard output instead. A path that exists and is not a regular
    file (``/dev/null``, a named pipe, a terminal) is written directly: renaming a file over a
    device would replace the device. A failed write (a full disk) is an :class:`OutputError`
    and leaves no temporary file; so does a run stopped by a signal the command line handles
    (see :func:`pending_temporary_files`).
    """
    if str(path) == "-":
        stream = sys.stdout.buffer if "b" in mode else sys.stdout
        yield stream
        stream.flush()
        return
    target = Path(path)
    if target.is_dir():
        raise OutputError(f"{target} is a folder; give a file name for the export.")
    encoding = None if "b" in mode else "utf-8"
    newline = None if "b" in mode else ""
    if target.exists() and not target.is_file():
        try:
            with open(target, mode, encoding=encoding, newline=newline) as handle:
                yield handle
        except OSError as exc:
            raise OutputError(_write_failure(target, exc)) from exc
        return
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    except OSError as exc:
        raise OutputError(f"{target}: cannot write here ({exc.strerror or exc}).") from exc
    _PENDING.add(tmp)
    try:
        # mkstemp creates the file readable by its owner only; give the export the mode a
        # plainly created file would have (or keep the mode of the file it replaces).
        os.chmod(tmp, target.stat().st_mode & 0o777 if target.exists() else 0o666 & ~_umask())
        with os.fdopen(fd, mode, encoding=encoding, newline=newline) as handle:
            yield handle
        os.replace(tmp, target)
    except OSError as exc:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise OutputError(_write_failure(target, exc)) from exc
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise
    finally:
        _PENDING.discard(tmp)


#: Temporary files of the exports being written (removed if the run is stopped by a signal).
_PENDING: set[str] = set()


def pending_temporary_files() -> list[str]:
    """The temporary files :func:`atomic_output` has open now (for a signal handler)."""
    return sorted(_PENDING)


def remove_pending_temporary_files() -> None:
    """Remove the temporary files of unfinished exports (the targets are left as they were)."""
    for tmp in list(_PENDING):
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        _PENDING.discard(tmp)


def _write_failure(target: Path, exc: OSError) -> str:
    reason = exc.strerror or str(exc) or type(exc).__name__
    return f"{target}: the export could not be written ({reason}); nothing was replaced."


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def refuse_overwrite(path: str | Path, reads: Iterable[tuple[str, str | Path | None]]) -> None:
    """No output may replace a file the run reads: ``reads`` pairs a description ("the input
    file", "the rules file") with a path. The same file under another name or through a link
    counts.

    Raises
    ------
    OutputError
        ``path`` is one of the files read.
    """
    if str(path) == "-":
        return
    target = Path(path)
    for what, source in reads:
        if source is None or str(source) in ("", "-"):
            continue
        try:
            same = target.exists() and Path(source).exists() and os.path.samefile(target, source)
        except OSError:
            same = False
        if same:
            raise OutputError(
                f"{path} is {what} this run reads; choose another name for the output (no "
                "output replaces a file the run reads)."
            )


def files_read(result: AuditResult) -> list[tuple[str, str | Path | None]]:
    """The files a result was made from: its input and the rules files given by the user."""
    reads: list[tuple[str, str | Path | None]] = [("the input file", result.settings.get("source"))]
    reads += [("a rules file", f) for f in result.settings.get("rule_files", [])]
    return reads


def refuse_input(result: AuditResult, path: str | Path) -> None:
    """An export must never replace the file that was audited, nor a rules file of the run."""
    refuse_overwrite(path, files_read(result))


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


def write_json(result: AuditResult, path: str | Path) -> None:
    """The contract JSON document (DESIGN.md section 5), UTF-8, from :mod:`audit.jsonout`.

    Indented for portfolios of up to :data:`~audit.jsonout.JSON_INDENT_LIMIT` studies. Larger
    documents are compact and streamed: studies are encoded a chunk at a time while a second
    thread writes the previous chunk (file writes release the interpreter lock), so the memory
    the text takes stays bounded (see :class:`JsonExport`, of which this is one part).
    """
    with JsonExport(path, files_read(result)) as export:
        export.add(result)
        export.finish(result)


class JsonExport:
    """The contract JSON document written a part of the studies at a time (``add``), put in place
    by ``finish``: the same bytes as :func:`write_json` of the whole result, without the whole
    result.

    The head (tool, version, settings) is written with the first part, whose settings are the
    whole result's (``source``: the name the input is given in the document, where it differs
    from the path read); ``finish`` checks that they are, then writes the tail (portfolio,
    groups, caveats). A document of up to :data:`~audit.jsonout.JSON_INDENT_LIMIT` studies is
    kept until ``finish`` and indented. The file is written by a second thread while the next
    studies are encoded.

    Raises
    ------
    OutputError
        ``path`` is a file the run reads (``reads``, see :func:`refuse_overwrite`) or a folder.
    """

    def __init__(
        self,
        path: str | Path,
        reads: Iterable[tuple[str, str | Path | None]],
        source: str | None = None,
    ) -> None:
        refuse_overwrite(path, reads)
        self._path = path
        self._source = source
        self._stack = contextlib.ExitStack()
        self._pending: list[bytes] | None = []  # the studies while few enough to indent
        self._count = 0  # studies added
        self._written = False  # whether a study was written to the file
        self._head = b""
        self._writer: _BackgroundWriter | None = None
        self._finished = False

    def __enter__(self) -> JsonExport:
        return self

    def __exit__(self, *exc: object) -> bool | None:
        if exc[0] is None and not self._finished:  # a document without its tail: not put in place
            unfinished = RuntimeError("the JSON export was not finished")
            self._stack.__exit__(RuntimeError, unfinished, None)
            return None
        return self._stack.__exit__(*exc)  # type: ignore[arg-type]

    def _head_of(self, result: AuditResult) -> tuple[bytes, bytes]:
        if self._source is not None:
            result = dataclasses.replace(
                result, settings={**result.settings, "source": self._source}
            )
        return document_frame(result)

    @property
    def streamed(self) -> bool:
        """Whether the document has begun to be written (to a file, only once put in place)."""
        return self._writer is not None

    def add(self, result: AuditResult) -> None:
        """Encode and write the studies of ``result``, the next rows of the table."""
        self._count += len(result.table)
        if self._pending is not None and self._count <= JSON_INDENT_LIMIT:
            self._pending.extend(study_chunks(result))
            return
        if self._writer is None:
            self._head = self._head_of(result)[0]
            handle = self._stack.enter_context(atomic_output(self._path, "wb"))
            self._writer = self._stack.enter_context(_BackgroundWriter(handle))
            self._writer.write(self._head)
        pending, self._pending = self._pending or [], None
        for chunk in itertools.chain(pending, study_chunks(result)):  # one chunk at a time
            self._writer.write(b"," + chunk if self._written else chunk)
            self._written = True

    def finish(self, result: AuditResult) -> None:
        """Write the tail of the whole ``result`` and put the document in place."""
        head, tail = self._head_of(result)
        self._finished = True
        if self._writer is None:  # few studies: the document indented, in one piece
            data = indented(head + b",".join(self._pending or ()) + tail)
            with atomic_output(self._path, "wb") as handle:
                handle.write(data)
                handle.write(b"\n")
            return
        if head != self._head:
            raise RuntimeError("the settings of the JSON document changed after its first part")
        self._writer.write(tail + b"\n")
        self._stack.close()


class _BackgroundWriter:
    """Writes queued byte strings to a file in a thread, in order; errors surface on exit."""

    def __init__(self, handle: IO) -> None:
        import queue
        import threading

        self._handle = handle
        self._queue: queue.Queue[bytes | None] = queue.Queue(maxsize=2)
        self._error: BaseException | None = None
        self._thread = threading.Thread(target=self._run, daemon=True)

    def _run(self) -> None:
        while (data := self._queue.get()) is not None:
            if self._error is None:
                try:
                    self._handle.write(data)
                except BaseException as exc:  # reported by the main thread on exit
                    self._error = exc

    def __enter__(self) -> _BackgroundWriter:
        self._thread.start()
        return self

    def write(self, data: bytes) -> None:
        """Queue bytes to write (in order)."""
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
    """The per-study table as CSV, formula-like text made inert (see :class:`CsvExport`)."""
    with CsvExport(path, files_read(result)) as export:
        export.add(result)


class CsvExport:
    """The per-study table as CSV, written one part of the studies at a time (``add``), the
    file put in place when the context closes without an error.

    Written with the ``csv`` module from one plain list per column (numbers as Python floats
    and ints, written as ``repr`` writes them; blanks as None): three times faster than
    ``DataFrame.to_csv`` at 100,000 studies, with the same text. Formula-like text is looked
    for once per distinct value of a column.

    Lines end with ``\\n``, so the csv module quotes cells holding ``\\n`` but not those holding
    a carriage return alone, which a spreadsheet program reads as a line break: a cell
    ``"harmless\\r=cmd..."`` would start a new row with a live formula. Rows with such a cell are
    written by a writer whose line ends hold ``\\r`` too (so it quotes them), then ended with
    ``\\n`` like the others.

    Raises
    ------
    OutputError
        ``path`` is a file the run reads (``reads``, see :func:`refuse_overwrite`) or a folder.
    """

    def __init__(self, path: str | Path, reads: Iterable[tuple[str, str | Path | None]]) -> None:
        refuse_overwrite(path, reads)
        self._path = path
        self._stack = contextlib.ExitStack()
        self._header: list[str] | None = None

    def __enter__(self) -> CsvExport:
        self._handle = self._stack.enter_context(atomic_output(self._path))
        self._writer = csv.writer(self._handle, lineterminator="\n")
        return self

    def __exit__(self, *exc: object) -> bool | None:
        return self._stack.__exit__(*exc)  # type: ignore[arg-type]

    @property
    def streamed(self) -> bool:
        """Whether rows have begun to be written (to a file, only once put in place)."""
        return self._header is not None

    def add(self, result: AuditResult) -> None:
        """Append the studies of ``result`` (the header with the first ones)."""
        frame = studies_frame(result)
        header = [neutralise_formula(str(c)) for c in frame.columns]
        if self._header is None:
            self._header = header
            _write_rows(self._handle, self._writer, [header], np.array(["\r" in h for h in header]))
        elif header != self._header:
            raise ValueError("a part of the studies has other columns than the first")
        columns, returns = zip(*(_csv_cells(frame[c]) for c in frame.columns), strict=True)
        rows = list(zip(*columns, strict=True))
        carriage = np.zeros(len(rows), dtype=bool)
        for mask in returns:
            if mask is not None:
                carriage |= mask
        _write_rows(self._handle, self._writer, rows, carriage)


def _write_rows(handle: IO[str], writer: Any, rows: list, carriage: np.ndarray) -> None:
    """``rows`` through ``writer``; those marked in ``carriage`` quoted where a cell holds \\r."""
    if not carriage.any():
        writer.writerows(rows)
        return
    quoting = io.StringIO()
    careful = csv.writer(quoting, lineterminator="\r\n")
    start = 0
    for i in np.flatnonzero(carriage).tolist():
        writer.writerows(rows[start:i])
        quoting.seek(0)
        quoting.truncate()
        careful.writerow(rows[i])
        handle.write(quoting.getvalue()[:-2] + "\n")
        start = i + 1
    writer.writerows(rows[start:])


def _csv_cells(column: pd.Series) -> tuple[list[object], np.ndarray | None]:
    """A column's cells for the csv module (None where blank, text made inert), and which
    cells hold a carriage return (None: none can)."""
    if pd.api.types.is_float_dtype(column.dtype) and not pd.api.types.is_extension_array_dtype(
        column.dtype
    ):
        values = column.to_numpy(dtype=float)
        cells = values.astype(object)
        # Blank where not computed, and where not finite: "inf" is no number a spreadsheet
        # reads, and the JSON export writes null there too.
        cells[~np.isfinite(values)] = None
        return cells.tolist(), None
    if pd.api.types.is_integer_dtype(column.dtype) and not column.hasnans:
        return column.to_numpy(dtype=np.int64).tolist(), None
    cells = np.array(column.astype(object).to_numpy(dtype=object), dtype=object)  # a copy
    cells[pd.isna(cells)] = None
    floats = np.fromiter(map(isinstance, cells.tolist(), itertools.repeat(float)), dtype=bool)
    if floats.any():  # a number held among text (a user column given as a frame)
        cells[np.flatnonzero(floats)[~np.isfinite(cells[floats].astype(float))]] = None
    codes, uniques = pd.factorize(cells, use_na_sentinel=True)
    texts = np.asarray(uniques, dtype=object).tolist()
    with_return = [i for i, v in enumerate(texts) if isinstance(v, str) and "\r" in v]
    carriage = np.isin(codes, with_return) if with_return else None
    if any(isinstance(v, str) and v.startswith(_FORMULA_START) for v in texts):
        inert = np.empty(len(texts) + 1, dtype=object)
        inert[:-1] = [neutralise_formula(v) for v in texts]
        inert[-1] = None
        return inert[codes].tolist(), carriage
    return cells.tolist(), carriage


#: Characters XML 1.0 (so a workbook) cannot hold; replaced by U+FFFD when a workbook is written.
ILLEGAL_XLSX = re.compile(r"[\x00-\x08\x0b\x0c\x0e-\x1f]")
