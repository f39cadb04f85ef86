"""Read a spreadsheet or delimited text file into a raw table: headers normalised, cells as given.

Only the header and the row bookkeeping are interpreted here; cell values stay as the file wrote
them (text, or numbers for spreadsheet cells) so that :mod:`audit.schema` can report any value it
rejects exactly as the user typed it.

Files are untrusted: reviewers audit whatever spreadsheets they were sent. The format is decided
by the file's content, not its name; workbooks are inspected as zip archives before any XML is
parsed (declared sizes, packing ratio, document type declarations), and every size has a
documented limit (the ``MAX_*`` constants below). A file that cannot be used at all raises
:class:`~audit.errors.InputError` with one sentence; a problem confined to some cells is kept as
data (``RawTable.cell_problems``) for the validation to report as row errors.
"""

from __future__ import annotations

import contextlib
import csv
import gc
import io
import itertools
import re
import warnings
import zipfile
import zlib
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from audit.errors import InputError

__all__ = [
    "MAX_COLUMNS",
    "MAX_FILE_BYTES",
    "MAX_PACKING_RATIO",
    "MAX_ROWS",
    "MAX_UNPACKED_BYTES",
    "UNCACHED",
    "RawTable",
    "normalise_header",
    "raw_from_frame",
    "read_table",
]

#: Most study rows a file may hold (blank rows are not counted).
MAX_ROWS = 1_000_000
#: Most columns a table may have (a column counts when its header or any cell is filled).
MAX_COLUMNS = 1_000
#: Largest file read, in bytes (text files and workbooks alike).
MAX_FILE_BYTES = 512 * 2**20
#: Largest total uncompressed size a workbook's zip directory may declare.
MAX_UNPACKED_BYTES = 2**30
#: Largest uncompressed / compressed ratio of a workbook part larger than 1 MiB. Spreadsheet
#: programs' sheets pack about 5-20 to 1 (even a sheet of one repeated value: 17 to 1); a zip bomb
#: packs about 1000 to 1.
MAX_PACKING_RATIO = 100
_RATIO_FROM_BYTES = 2**20
#: Most parts (files) a workbook archive may hold.
MAX_ARCHIVE_MEMBERS = 10_000
#: The header row is looked for among this many non-blank rows at the top of a sheet.
HEADER_SEARCH_ROWS = 20

_DELIMITERS = ",;\t|"
_ZIP_MAGIC = b"PK\x03\x04"
_EMPTY_ZIP_MAGIC = b"PK\x05\x06"
_OLE_MAGIC = b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1"
# Markup that starts a document type declaration (entity definitions, external references).
# Spreadsheet programs never write one in a workbook part, and text in cells is escaped (&lt;),
# so finding one means the file was crafted.
_DTD_MARKERS = tuple(
    marker.encode(encoding)
    for marker in ("<!DOCTYPE", "<!ENTITY")
    for encoding in ("utf-8", "utf-16-le", "utf-16-be")
)


@dataclass
class RawTable:
    """A table as read from a file, before any validation.

    Attributes
    ----------
    data : one column per header, cells as written (str, int, float, or None for empty).
        Columns are named by :func:`normalise_header` of the header text; a second column whose
        header means the same gets the name ``<name>__<position>`` (see ``duplicates``).
    rows : the spreadsheet row number of each data row (the header is row 1 unless title rows
        stand above it).
    headers : column name -> header text as written in the file.
    source : the path read, or a description of the object given.
    sheet : the worksheet read, for spreadsheets.
    decimal_comma : True when numbers in the file use a decimal comma (``;``-separated text).
    blank_rows : spreadsheet numbers of rows skipped because every cell was empty.
    header_row : spreadsheet number of the header row.
    duplicates : column name -> the names of later columns whose header means the same.
    notes : sentences about the file as a whole (encoding assumed, title rows, merged headers).
    row_notes : ``(position, text)`` about one data row (a hidden row, a merged cell).
    cell_problems : ``(position, column, reason)`` for cells the reader found damaged; the
        validation turns them into row errors.
    source_columns : for each column of ``data``, its 0-based column index in the file.
    """

    data: pd.DataFrame
    rows: np.ndarray
    headers: dict[str, str]
    source: str
    sheet: str | None = None
    decimal_comma: bool = False
    blank_rows: list[int] = field(default_factory=list)
    header_row: int = 1
    duplicates: dict[str, list[str]] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    row_notes: list[tuple[int, str]] = field(default_factory=list)
    cell_problems: list[tuple[int, str, str]] = field(default_factory=list)
    source_columns: list[int] = field(default_factory=list)


def normalise_header(text: object) -> str:
    """Header text -> column name: case-insensitive, spaces, dashes and underscores alike.

    >>> normalise_header("  Planned-N1 ")
    'planned_n1'
    >>> normalise_header("Study ID")
    'study_id'
    """
    s = str(text).strip().lower()
    return re.sub(r"[\s\-_]+", "_", s).strip("_")


@dataclass
class _Sheet:
    """Cells of one sheet as rows of values, with what the file says about rows and merges."""

    cells: list[list[object]]
    #: Spreadsheet row number (1-based) of each entry of ``cells``.
    numbers: list[int]
    hidden: set[int] = field(default_factory=set)
    #: Merged ranges as (first row, first column, last row, last column), 1-based, inclusive.
    merges: list[tuple[int, int, int, int]] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    name: str | None = None


def read_table(path: str | Path, sheet: str | None = None) -> RawTable:
    """Read ``path`` (an .xlsx workbook, or .csv/.tsv/.txt text) into a :class:`RawTable`.

    The format is recognised from the content: a workbook named ``.csv`` is read as a workbook,
    and a text file named ``.xlsx`` as text (with a note). ``sheet`` names the worksheet; by
    default the first visible one is read.

    Raises
    ------
    InputError
        The file is missing, unreadable, empty, has no study rows, exceeds a documented limit
        or is refused as unsafe.
    """
    path = Path(path)
    if not path.exists():
        raise InputError(f"{path}: no such file.")
    if path.is_dir():
        raise InputError(f"{path} is a folder; give a .xlsx, .csv or .tsv file.")
    try:
        size = path.stat().st_size
        if size > MAX_FILE_BYTES:
            raise InputError(
                f"{path}: the file is {size / 2**20:.0f} MiB, more than the limit of "
                f"{MAX_FILE_BYTES // 2**20} MiB; split the portfolio into smaller files."
            )
        with path.open("rb") as handle:
            head = handle.read(8)
    except OSError as exc:
        raise InputError(f"{path}: the file could not be opened ({exc.strerror or exc}).") from exc
    suffix = path.suffix.lower()
    if not size:
        raise InputError(f"{path}: the file is empty.")
    if head.startswith(_OLE_MAGIC):
        raise InputError(_ole_message(path))
    if head.startswith((_ZIP_MAGIC, _EMPTY_ZIP_MAGIC)):
        found = _read_xlsx(path, sheet)
        table = _to_raw(found, str(path), found.name, decimal_comma=False)
        if suffix not in (".xlsx", ".xlsm", ".xltx", ".xltm"):
            table.notes.insert(
                0, f"the file is named '{path.name}' but is an .xlsx workbook; it was read as one"
            )
        return _require_rows(table)
    if suffix in (".xlsx", ".xlsm", ".xls", ".ods", ".xlsb"):
        if not _looks_like_text(path):
            raise InputError(
                f"{path}: named '{suffix}' but neither an .xlsx workbook nor text: the file "
                "is damaged or truncated (a workbook is a zip archive; this one has no zip "
                "signature); save it again from the spreadsheet program."
            )
    if sheet is not None:
        raise InputError(f"{path}: --sheet applies to .xlsx workbooks, not to text files.")
    text, note = _decode(path)
    delimiter = "\t" if suffix == ".tsv" else _sniff_delimiter(text)
    with _collector_paused():
        cells, problems = _parse_delimited(text, delimiter, path)
        table = _to_raw(
            _Sheet(cells, list(range(1, len(cells) + 1))),
            str(path),
            None,
            decimal_comma=delimiter == ";",
        )
        del cells  # the records, freed while the collector is paused
    if suffix in (".xlsx", ".xlsm", ".xls", ".ods", ".xlsb"):
        table.notes.insert(
            0, f"the file is named '{suffix}' but is plain text; it was read as delimited text"
        )
    if note:
        table.notes.insert(0, note)
    table.cell_problems.extend(_map_problems(problems, table))
    return _require_rows(table)


@contextlib.contextmanager
def _collector_paused() -> Iterator[None]:
    """Pause Python's cycle collector while a file becomes a table.

    Every record is a new list; at 100,000 records the collector would run hundreds of times
    and walk all the records read so far each time it reaches the oldest generation, which
    costs more than parsing them. Cycles made meanwhile are collected later, not missed.
    """
    enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if enabled:
            gc.enable()


def _require_rows(table: RawTable) -> RawTable:
    if not len(table.data):
        blank = f" ({len(table.blank_rows)} blank)" if table.blank_rows else ""
        raise InputError(
            f"{table.source}{_sheet_text(table.sheet)}: a header row (row {table.header_row}) "
            f"but no study rows below it{blank}; nothing to audit."
        )
    return table


def _sheet_text(sheet: str | None) -> str:
    return f" (sheet '{sheet}')" if sheet else ""


# -- text files ---------------------------------------------------------------------------------


def _looks_like_text(path: Path) -> bool:
    with path.open("rb") as handle:
        sample = handle.read(65536)
    if sample[:2] in (b"\xff\xfe", b"\xfe\xff") or sample.startswith(b"\xef\xbb\xbf"):
        return True
    return _control_share(sample.decode("latin-1")) < 0.01


def _control_share(text: str) -> float:
    """Share of control characters other than tab, line feed, carriage return and form feed."""
    if not text:
        return 0.0
    return len(_CONTROL.findall(text)) / len(text)


_CONTROL = re.compile(r"[\x00-\x08\x0b\x0e-\x1f]")


def _decode(path: Path) -> tuple[str, str | None]:
    """The file's text and, when it was not UTF-8, a note naming the encoding assumed."""
    data = path.read_bytes()
    text: str | None = None
    note: str | None = None
    sample = data[:4096]
    even, odd = sample[0::2], sample[1::2]
    if data[:2] in (b"\xff\xfe", b"\xfe\xff"):
        text = _try(data, "utf-16")
    elif odd and odd.count(0) > 0.4 * len(odd) and even.count(0) < 0.1 * len(even):
        # UTF-16 without a byte-order mark: every other byte of ASCII text is zero.
        text, note = _try(data, "utf-16-le"), "read as UTF-16 text (no byte-order mark)"
    elif even and even.count(0) > 0.4 * len(even) and odd.count(0) < 0.1 * len(odd):
        text, note = _try(data, "utf-16-be"), "read as UTF-16 text (no byte-order mark)"
    elif data.startswith(b"\xef\xbb\xbf"):
        text = _try(data, "utf-8-sig")
    elif (utf8 := _try(data, "utf-8")) is not None:
        text = utf8
    else:
        for encoding, label in (("cp1252", "Windows-1252"), ("latin-1", "Latin-1")):
            text = _try(data, encoding)
            if text is not None:
                note = (
                    f"the file is not UTF-8; it was read as {label} text (check accented "
                    "letters in the exports)"
                )
                break
    if text is None:
        raise InputError(f"{path}: the text encoding could not be recognised; save it as UTF-8.")
    if _control_share(text[:65536]) >= 0.01:
        raise InputError(
            f"{path}: the file is not a text table (it holds binary data); give an .xlsx, "
            ".csv or .tsv file."
        )
    return text, note


def _try(data: bytes, encoding: str) -> str | None:
    try:
        return data.decode(encoding)
    except UnicodeDecodeError:
        return None


def _sniff_delimiter(text: str) -> str:
    lines = _first_lines(text, 50)
    # The header line names study_id and design: its separator is the file's, whatever title
    # lines (with their own commas or colons) stand above it.
    for line in lines[:HEADER_SEARCH_ROWS]:
        low = line.lower()
        if "study" in low and "design" in low:
            counts = {d: line.count(d) for d in _DELIMITERS}
            best = max(counts, key=lambda d: counts[d])
            if counts[best]:
                return best
    sample = "\n".join(lines[:50])
    try:
        return csv.Sniffer().sniff(sample, delimiters=_DELIMITERS).delimiter
    except csv.Error:
        header = sample.splitlines()[0] if sample else ""
        counts = {d: header.count(d) for d in _DELIMITERS}
        best = max(counts, key=lambda d: counts[d])
        return best if counts[best] else ","


def _first_lines(text: str, count: int) -> list[str]:
    """``text.splitlines()[:count]`` without splitting the whole text."""
    size = 8192
    while size < len(text):
        lines = text[:size].splitlines()
        # The last line of a prefix may be cut short; the ones before it are whole.
        if len(lines) > count + 1:
            return lines[:count]
        size *= 4
    return text.splitlines()[:count]


def _parse_delimited(
    text: str, delimiter: str, source: object
) -> tuple[list[list[object]], list[tuple[int, int, str]]]:
    """Records of the text, and ``(record index, field index, reason)`` for suspect fields.

    The csv module keeps quoted fields intact and, unlike pandas' default, keeps blank lines, so
    the record number is the row number a spreadsheet program shows for the same file.
    """
    quoted = '"' in text
    records: list[list[object]] = []
    problems: list[tuple[int, int, str]] = []
    failure: csv.Error | None = None
    split = None if quoted else _split_lines(text, delimiter)
    if split is not None:
        records = split
    else:
        try:
            # All records at C speed; extend keeps those read before a parse error.
            records.extend(csv.reader(io.StringIO(text, newline=""), delimiter=delimiter))
        except csv.Error as exc:
            failure = exc
    if not quoted:
        # Without quote marks no cell can swallow lines: check the limits on the whole.
        if failure is not None:
            raise InputError(
                f"{source}: the file could not be read as delimited text ({failure})."
            ) from failure
        if len(records) > MAX_ROWS + HEADER_SEARCH_ROWS:
            filled = sum(1 for r in records if any(r))
            if filled > MAX_ROWS + HEADER_SEARCH_ROWS:
                raise InputError(_too_many_rows(source))
        widest = max(map(len, records), default=0)
        if widest > MAX_COLUMNS:
            for r in records:
                if len(r) > MAX_COLUMNS and any(r[MAX_COLUMNS:]):
                    raise InputError(_too_many_columns(source, len(r)))
        return records, problems
    _check_limits_in_order(records, source)
    if failure is not None:
        raise InputError(
            f"{source}: the file could not be read as delimited text near record "
            f"{len(records) + 1} ({failure}); check quote marks there."
        ) from failure
    # A line break plus the separator inside one cell is what an unbalanced quote mark
    # produces: the lines up to the next quote mark are swallowed into the cell. Each record
    # takes one line unless a cell holds a line break, so equal counts clear every record but
    # the last (a quote left open to the end of the text takes in the last line break).
    first = 0 if len(records) != _line_count(text) else max(len(records) - 1, 0)
    suspects = [
        index
        for index in range(first, len(records))
        if "\n" in (joined := "".join(records[index])) or "\r" in joined  # type: ignore[arg-type]
    ]
    if suspects:
        # A properly quoted cell may hold line breaks and the separator ("Effect of X, Y" on
        # two lines). A quote that swallowed lines closes somewhere a quote cannot close (not
        # before a separator or a line end) or never: the strict reader stops in that record.
        # Records before it are well formed.
        well_formed = _well_formed_records(text, delimiter)
        for index in suspects:
            if index >= well_formed:
                problems.extend(_swallowed(records[index], delimiter, index))  # type: ignore[arg-type]
    return records, problems


def _well_formed_records(text: str, delimiter: str) -> int:
    """How many records from the start the csv module reads in strict mode, where every quoted
    field must close right before a separator or a line end (all of them: a large number)."""
    count = 0
    try:
        for _ in csv.reader(io.StringIO(text, newline=""), delimiter=delimiter, strict=True):
            count += 1
    except csv.Error:
        return count
    return 2**62


def _split_lines(text: str, delimiter: str) -> list[list[object]] | None:
    """The records of text without quote marks, as the csv module reads them, or None where
    only the csv module can say what it makes of the text.

    Without quote marks a record is a line (ending at \\n, \\r or \\r\\n, as io.StringIO splits
    them) cut at each separator, and an empty line is an empty record; str.split does that
    in a third less time. The csv module is left what it may refuse: a line longer than its
    field size limit (it stops at the first field over the limit), and NUL characters (which
    it refused before Python 3.11).
    """
    if not text or "\x00" in text:
        return None
    if "\r" in text:
        lines = text.replace("\r\n", "\n").replace("\r", "\n").split("\n")
    else:
        lines = text.split("\n")
    if text.endswith(("\n", "\r")):
        lines.pop()  # the empty piece after the last line break is no line
    lengths = np.fromiter(map(len, lines), dtype=np.int64, count=len(lines))
    if lengths.max(initial=0) > csv.field_size_limit():
        return None
    records: list[list[object]] = list(map(str.split, lines, itertools.repeat(delimiter)))
    for i in np.flatnonzero(lengths == 0):
        records[i] = []
    return records


def _line_count(text: str) -> int:
    """Lines as io.StringIO(newline="") splits them: at \\n, \\r and \\r\\n."""
    breaks = text.count("\n") + text.count("\r") - text.count("\r\n")
    return breaks + (not text.endswith(("\n", "\r")) if text else 0)


def _check_limits_in_order(records: list[list[object]], source: object) -> None:
    """Raise for the first record past the row limit or the column limit, whichever comes first
    (a quoted file is checked record by record, as it would be read)."""
    first_row = None
    if len(records) > MAX_ROWS + HEADER_SEARCH_ROWS + 1:
        start = MAX_ROWS + HEADER_SEARCH_ROWS + 1
        first_row = next((i for i in range(start, len(records)) if any(records[i])), None)
    first_column = None
    if max(map(len, records), default=0) > MAX_COLUMNS:
        first_column = next(
            (i for i, r in enumerate(records) if len(r) > MAX_COLUMNS and any(r[MAX_COLUMNS:])),
            None,
        )
    if first_row is not None and (first_column is None or first_row <= first_column):
        raise InputError(_too_many_rows(source))
    if first_column is not None:
        raise InputError(_too_many_columns(source, len(records[first_column])))


def _swallowed(record: list[str], delimiter: str, index: int) -> list[tuple[int, int, str]]:
    out = []
    for j, value in enumerate(record):
        if ("\n" in value or "\r" in value) and delimiter in value:
            lines = len(value.splitlines())
            out.append(
                (
                    index,
                    j,
                    f"the cell runs over {lines} lines and contains the separator "
                    f"'{delimiter}': a quote mark is probably unbalanced, and the lines "
                    "after it were read into this cell; fix the quotes in the file",
                )
            )
    return out


def _map_problems(
    problems: list[tuple[int, int, str]], table: RawTable
) -> list[tuple[int, str, str]]:
    """Reader problems by record -> (position, column name, reason) for data rows."""
    if not problems:
        return []
    pos_of_row = {int(r): i for i, r in enumerate(table.rows)}
    column_of = {j: k for k, j in enumerate(table.source_columns)}
    names = list(table.data.columns)
    out = []
    for record, j, reason in problems:
        pos = pos_of_row.get(record + 1)
        k = column_of.get(j)
        if pos is not None and k is not None:
            out.append((pos, names[k], reason))
        elif record + 1 == table.header_row:
            table.notes.append(f"header cell {_column_letter(j)}: {reason}")
    return out


def _too_many_rows(source: object) -> str:
    return (
        f"{source}: the table has more than {MAX_ROWS:,} study rows, the most one run reads; "
        "split the portfolio into smaller files."
    )


def _too_many_columns(source: object, count: int) -> str:
    return (
        f"{source}: the table has {count:,} columns, more than the limit of {MAX_COLUMNS:,}; "
        "remove unused columns."
    )


# -- workbooks ----------------------------------------------------------------------------------


def _ole_message(path: Path) -> str:
    """An OLE2 compound file: a password-protected workbook or a legacy .xls one."""
    data = path.read_bytes()
    if (
        "EncryptionInfo".encode("utf-16-le") in data
        or "EncryptedPackage".encode("utf-16-le") in data
    ):
        return (
            f"{path}: the workbook is password-protected (encrypted); open it in the spreadsheet "
            "program, save a copy without a password, and audit that copy."
        )
    return (
        f"{path}: this is a legacy Excel 97-2003 (.xls) workbook, which is not read; save it as "
        ".xlsx or .csv and try again."
    )


def _check_sizes(path: Path, archive: zipfile.ZipFile) -> None:
    """Refuse an archive whose declared sizes are hostile, or that is no .xlsx workbook.

    The sizes checked are those the zip directory declares. Python's zipfile never inflates a
    part beyond its declared size (a part that tries fails its CRC check), so a check of the
    declared sizes bounds what is ever unpacked.
    """
    infos = archive.infolist()
    if len(infos) > MAX_ARCHIVE_MEMBERS:
        raise InputError(
            f"{path}: the workbook archive holds {len(infos):,} parts, more than the limit of "
            f"{MAX_ARCHIVE_MEMBERS:,}; it is not a normal spreadsheet."
        )
    total = sum(info.file_size for info in infos)
    if total > MAX_UNPACKED_BYTES:
        raise InputError(
            f"{path}: the workbook would unpack to {total / 2**20:,.0f} MiB, more than the limit "
            f"of {MAX_UNPACKED_BYTES // 2**20:,} MiB; refused (a compressed file this large is "
            "either a zip bomb or too big to audit in one run)."
        )
    for info in infos:
        if info.file_size > _RATIO_FROM_BYTES:
            ratio = info.file_size / max(info.compress_size, 1)
            if ratio > MAX_PACKING_RATIO:
                raise InputError(
                    f"{path}: the workbook part '{info.filename}' unpacks {ratio:,.0f} times its "
                    f"packed size (limit {MAX_PACKING_RATIO}); refused as a probable zip bomb."
                )
    names = {info.filename for info in infos}
    if "xl/workbook.xml" not in names and not any(n.endswith("workbook.xml") for n in names):
        kind = "an OpenDocument spreadsheet" if "content.xml" in names else "a zip archive"
        raise InputError(
            f"{path}: {kind}, not an .xlsx workbook; save it as .xlsx or .csv and try again."
        )


def _scan_archive(path: Path, archive: zipfile.ZipFile) -> dict[str, bool]:
    """Refuse a part that declares a document type; per XML part, whether it is special (a
    formula, a hidden row or a merged range)."""
    special: dict[str, bool] = {}
    for info in archive.infolist():
        if not info.filename.endswith((".xml", ".rels", ".vml")):
            continue
        dtd, special[info.filename] = _scan_part(archive, info)
        if dtd:
            raise InputError(
                f"{path}: the workbook part '{info.filename}' declares a document type "
                "(entity definitions or external references), which spreadsheet programs never "
                "write; refused as unsafe."
            )
    return special


#: What makes a worksheet need the careful reader: formulas, hidden rows, merged ranges.
_SPECIAL_MARKERS = (b"<f>", b"<f ", b"<f/", b'hidden="', b"<mergeCell")


def _scan_part(archive: zipfile.ZipFile, info: zipfile.ZipInfo) -> tuple[bool, bool]:
    """(declares a DTD, has a formula / hidden row / merge), in one streaming pass."""
    overlap = max(len(m) for m in (*_DTD_MARKERS, *_SPECIAL_MARKERS))
    tail = b""
    special = False
    with archive.open(info) as part:
        while chunk := part.read(2**20):
            window = tail + chunk
            if any(marker in window for marker in _DTD_MARKERS):
                return True, special
            special = special or any(marker in window for marker in _SPECIAL_MARKERS)
            tail = window[-overlap:]
    return False, special


def _read_xlsx(path: Path, sheet: str | None) -> _Sheet:
    """Cells of one worksheet, after the checks of :func:`_check_sizes` and :func:`_scan_archive`.

    A large worksheet is parsed by calamine in a thread (it releases the interpreter lock)
    while this thread scans the archive's XML; the parse is used only if the scan passes and
    finds the sheet plain (see :func:`_fast_worksheet`).
    """
    with path.open("rb") as handle:
        try:
            archive = zipfile.ZipFile(handle)
        except (zipfile.BadZipFile, OSError, ValueError, EOFError) as exc:
            raise InputError(
                f"{path}: the workbook is damaged or truncated ({exc}); save it again from the "
                "spreadsheet program."
            ) from exc
        with archive:
            early = _EarlyParse()
            try:
                _check_sizes(path, archive)
                with early.start(path, archive, sheet):
                    special = _scan_archive(path, archive)
            except (
                zipfile.BadZipFile,
                zipfile.LargeZipFile,
                zlib.error,
                OSError,
                EOFError,
                ValueError,
                RuntimeError,  # a part encrypted with a zip password
                NotImplementedError,  # a compression method zipfile does not know
            ) as exc:
                raise InputError(
                    f"{path}: the workbook is damaged or truncated ({exc}); save it again."
                ) from exc
            fast = _fast_worksheet(path, archive, sheet, special, early)
        if fast is not None:
            return fast
        from openpyxl import load_workbook

        handle.seek(0)
        try:
            with warnings.catch_warnings():
                # openpyxl warns about features it drops (data validation, styles); reading
                # values does not need them.
                warnings.simplefilter("ignore")
                book = load_workbook(handle, read_only=True, data_only=True)
        except Exception as exc:  # a hostile or damaged file can fail anywhere in the parser
            raise InputError(_workbook_failure(path, exc)) from exc
        try:
            return _read_sheet(path, book, sheet)
        finally:
            book.close()


def _workbook_failure(path: Path, exc: Exception) -> str:
    from defusedxml import DefusedXmlException

    # openpyxl wraps parser errors in its own; defusedxml's refusal is found down the chain.
    cause: BaseException | None = exc
    while cause is not None:
        if isinstance(cause, DefusedXmlException):
            return (
                f"{path}: the workbook declares XML entities or external references; refused "
                "as unsafe."
            )
        cause = cause.__cause__ or cause.__context__
    detail = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    if len(detail) > 120:
        detail = detail[:117] + "..."
    return (
        f"{path}: the workbook could not be read ({detail}); it may be damaged: open and save it "
        "again in the spreadsheet program."
    )


def _read_sheet(path: Path, book: object, sheet: str | None) -> _Sheet:
    from openpyxl.worksheet._read_only import ReadOnlyWorksheet

    worksheets = [ws for ws in book.worksheets if isinstance(ws, ReadOnlyWorksheet)]  # type: ignore[attr-defined]
    names = [ws.title for ws in worksheets]
    if not worksheets:
        raise InputError(f"{path}: the workbook has no worksheet with cells.")
    states = [getattr(ws, "sheet_state", "visible") for ws in worksheets]
    index, notes = _choose_sheet(path, names, states, sheet)
    ws = worksheets[index]
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            found = _parse_worksheet(path, book, ws)
    except InputError:
        raise
    except Exception as exc:  # damaged sheet XML: any parser error means the same to the user
        raise InputError(_workbook_failure(path, exc)) from exc
    found.notes[:0] = notes
    found.name = ws.title
    return found


def _choose_sheet(
    path: Path, names: list[str], states: list[str], sheet: str | None
) -> tuple[int, list[str]]:
    """Index of the worksheet to read (``sheet``, or the first visible one) and notes."""
    notes: list[str] = []
    if sheet is None:
        visible = [i for i, state in enumerate(states) if state == "visible"]
        index = visible[0] if visible else 0
        if index != 0:
            notes.append(
                f"the first sheet '{names[0]}' is hidden; the first visible sheet "
                f"'{names[index]}' was read (use --sheet to choose)"
            )
        others = [n for i, n in enumerate(names) if i != index]
        if others:
            notes.append(
                f"the workbook has {len(names)} sheets; '{names[index]}' was read, not "
                + ", ".join(f"'{n}'" for n in others)
                + " (use --sheet to choose)"
            )
        return index, notes
    matches = [i for i, n in enumerate(names) if n == sheet] or [
        i for i, n in enumerate(names) if n.strip().lower() == sheet.strip().lower()
    ]
    if not matches:
        raise InputError(f"{path}: no sheet named '{sheet}'; the sheets are: {', '.join(names)}.")
    return matches[0], notes


def _parse_worksheet(path: Path, book: object, ws: object) -> _Sheet:
    """Rows of a worksheet with hidden rows and merged ranges, in one pass over its XML.

    openpyxl's read-only worksheet trusts the sheet's declared dimensions (rows past a wrong
    ``<dimension>`` would be dropped, and a huge one pads every row) and does not report hidden
    rows or merged cells; its sheet parser does all of that, and is used directly here.
    """
    from openpyxl.worksheet._reader import FORMULA_TAG, WorkSheetParser

    class _Parser(WorkSheetParser):
        def parse_cell(self, element):  # type: ignore[no-untyped-def]
            cell = super().parse_cell(element)
            if cell["value"] is None and element.find(FORMULA_TAG) is not None:
                cell["value"] = UNCACHED
            return cell

    cells: list[list[object]] = []
    numbers: list[int] = []
    studies = 0
    with book._archive.open(ws._worksheet_path) as source:  # type: ignore[attr-defined]
        parser = _Parser(
            source,
            ws._shared_strings,  # type: ignore[attr-defined]
            data_only=True,
            epoch=book.epoch,  # type: ignore[attr-defined]
            date_formats=book._date_formats,  # type: ignore[attr-defined]
            timedelta_formats=book._timedelta_formats,  # type: ignore[attr-defined]
        )
        for number, row in parser.parse():
            # Styled but empty cells (formatting applied to a whole column) are not data.
            filled = {c["column"]: c["value"] for c in row if c["value"] is not None}
            if not filled:
                continue
            width = max(filled)
            if width > MAX_COLUMNS:
                raise InputError(_too_many_columns(path, width))
            values: list[object] = [None] * width
            for column, value in filled.items():
                values[column - 1] = value
            studies += 1
            if studies > MAX_ROWS + HEADER_SEARCH_ROWS:
                raise InputError(_too_many_rows(path))
            cells.append(values)
            numbers.append(int(number))
        hidden = {
            int(r)
            for r, attrs in parser.row_dimensions.items()
            if str(attrs.get("hidden", "0")).lower() in ("1", "true")
        }
        merges: list[tuple[int, int, int, int]] = []
        if parser.merged_cells is not None:
            for merged in parser.merged_cells.mergeCell:
                bounds = _range_bounds(merged.ref)
                if bounds is not None:
                    merges.append(bounds)
    return _Sheet(cells, numbers, hidden, merges)


#: Worksheets whose XML is at least this large (some 3,000 rows) are read with calamine.
FAST_READ_MIN_BYTES = 2_000_000


def _sheet_parts(archive: zipfile.ZipFile) -> list[tuple[str, str, str]]:
    """(name, state, part path) of each worksheet, from workbook.xml and its relationships."""
    from defusedxml import ElementTree

    main = "{http://schemas.openxmlformats.org/spreadsheetml/2006/main}"
    rel = "{http://schemas.openxmlformats.org/officeDocument/2006/relationships}"
    pkg = "{http://schemas.openxmlformats.org/package/2006/relationships}"
    book = ElementTree.fromstring(archive.read("xl/workbook.xml"))
    rels = ElementTree.fromstring(archive.read("xl/_rels/workbook.xml.rels"))
    targets = {r.get("Id"): r.get("Target", "") for r in rels.iter(f"{pkg}Relationship")}
    out = []
    for element in book.iter(f"{main}sheet"):
        target = targets.get(element.get(f"{rel}id"), "")
        part = target.lstrip("/") if target.startswith("/") else f"xl/{target}"
        out.append((element.get("name", ""), element.get("state", "visible"), part))
    return out


def _large_sheet(
    path: Path, archive: zipfile.ZipFile, sheet: str | None
) -> tuple[str, str, list[str]] | None:
    """(name, part path, notes) of the worksheet to read if its XML is large enough for
    calamine (:data:`FAST_READ_MIN_BYTES`), else None."""
    parts = _sheet_parts(archive)
    names = [name for name, _, _ in parts]
    index, notes = _choose_sheet(path, names, [state for _, state, _ in parts], sheet)
    name, _, part = parts[index]
    if archive.getinfo(part).file_size < FAST_READ_MIN_BYTES:
        return None
    return name, part, notes


def _calamine_rows(path: Path, name: str) -> list[list[object]]:
    """All rows of the worksheet ``name``, as calamine reads them."""
    import python_calamine

    workbook = python_calamine.CalamineWorkbook.from_path(str(path))
    try:
        return workbook.get_sheet_by_name(name).to_python(skip_empty_area=False)
    finally:
        workbook.close()


class _EarlyParse:
    """calamine's parse of a large worksheet, run in a thread while the archive is scanned.

    Started only after the declared sizes passed (:func:`_check_sizes`); calamine does not
    expand XML entities, so a part the scan then refuses has done no harm. Anything unusual
    (no calamine, a sheet that cannot be chosen) starts nothing, and :func:`_fast_worksheet`
    decides again after the scan, as it would without this.
    """

    def __init__(self) -> None:
        self.target: tuple[str, str, list[str]] | None = None
        self.ready = False  # target is the answer of _large_sheet
        self._rows: list[list[object]] | None = None
        self._error: BaseException | None = None
        self._thread: object = None

    @contextlib.contextmanager
    def start(self, path: Path, archive: zipfile.ZipFile, sheet: str | None) -> Iterator[None]:
        """Start the parse (where it applies); wait for it on exit."""
        import threading

        try:
            import python_calamine  # noqa: F401

            self.target, self.ready = _large_sheet(path, archive, sheet), True
        except Exception:  # decided again after the scan, with errors reported then
            self.target, self.ready = None, False
        thread = None
        if self.target is not None:
            thread = threading.Thread(target=self._parse, args=(path, self.target[0]), daemon=True)
            thread.start()
        try:
            yield
        finally:
            if thread is not None:
                thread.join()

    def _parse(self, path: Path, name: str) -> None:
        try:
            self._rows = _calamine_rows(path, name)
        except BaseException as exc:  # reported as "no fast read" (the careful path decides)
            self._error = exc

    def rows(self) -> list[list[object]]:
        """The parsed rows; the parse's exception if it failed."""
        if self._error is not None:
            raise self._error
        assert self._rows is not None
        return self._rows


def _fast_worksheet(
    path: Path,
    archive: zipfile.ZipFile,
    sheet: str | None,
    special: dict[str, bool],
    early: _EarlyParse | None = None,
) -> _Sheet | None:
    """Rows of a large, plain worksheet read by calamine (a Rust reader), or None.

    openpyxl's Python parser takes 20 s and more for 100,000 rows of 40 columns (it even parses
    a whole sheet to learn its size when the file does not declare it); calamine reads the same
    sheet in about a second. It is used only for a sheet of at least
    :data:`FAST_READ_MIN_BYTES` of XML with no formula, no hidden row and no merged range
    (checked on the XML first): those are what the openpyxl path reports on (a formula without
    a saved value, hidden rows, merges), so a sheet without them reads the same either way. The
    archive has passed the safety checks before (size, ratio, no DTD), and calamine does not
    expand XML entities in any case. ``early``: the parse already started during the checks
    (:class:`_EarlyParse`). Anything unexpected falls back on the openpyxl path.
    """
    try:
        import python_calamine  # noqa: F401
    except ImportError:  # an installation without it reads with openpyxl, only slower
        return None
    try:
        started = early is not None and early.ready
        target = early.target if started else _large_sheet(path, archive, sheet)
        if target is None or special.get(target[1], True):
            return None
        name, _, notes = target
        rows = early.rows() if started else _calamine_rows(path, name)
    except InputError:
        raise
    except Exception:  # an unusual workbook: the careful path reads it or says why not
        return None
    # calamine gives empty cells as "": blank text, as the rest of the reader takes it.
    width = max((len(r) for r in rows), default=0)
    if width > MAX_COLUMNS:
        raise InputError(_too_many_columns(path, width))
    if len(rows) > MAX_ROWS + HEADER_SEARCH_ROWS:
        raise InputError(_too_many_rows(path))
    return _Sheet(rows, list(range(1, len(rows) + 1)), notes=notes, name=name)


def _range_bounds(ref: str) -> tuple[int, int, int, int] | None:
    from openpyxl.utils.cell import range_boundaries

    try:
        min_col, min_row, max_col, max_row = range_boundaries(ref)
    except (ValueError, TypeError):
        return None
    if None in (min_col, min_row, max_col, max_row):
        return None
    return int(min_row), int(min_col), int(max_row), int(max_col)


class _Uncached:
    """Marker for a formula cell that has no cached value (the schema reports it)."""

    def __repr__(self) -> str:
        return "formula without a saved value"


UNCACHED = _Uncached()


# -- from cells to a table ----------------------------------------------------------------------


def _row_is_blank(values: list[object]) -> bool:
    """True when no cell of the row holds anything.

    Cell by cell, stopping at the first filled one: a study row's first cell (its study_id)
    usually decides, so a million rows cost a million short loops.
    """
    for value in values:
        if value is None or (isinstance(value, str) and not value.strip()):
            continue
        return False
    return True


def _blank_mask(rows: list[list[object]]) -> np.ndarray:
    """For each row, True when no cell holds anything.

    Text rows (every row of a delimited file) are joined and tested by C-level maps, with no
    Python code per row; ``str.isspace`` and ``str.strip`` agree on what whitespace is.
    """
    out = np.zeros(len(rows), dtype=bool)
    # In slices of rows, so that the joined texts never take much memory at once.
    for start in range(0, len(rows), 10_000):
        part = rows[start : start + 10_000]
        try:
            joined = list(map("".join, part))  # type: ignore[arg-type]
        except TypeError:  # numbers, None or other cell values from a workbook
            return np.fromiter(map(_row_is_blank, rows), dtype=bool, count=len(rows))
        empty = np.fromiter(map(len, joined), dtype=np.int64, count=len(part)) == 0
        out[start : start + len(part)] = empty | np.fromiter(
            map(str.isspace, joined), dtype=bool, count=len(part)
        )
    return out


def _blank_numbers(numbers: list[int], blank_row: np.ndarray, last: int) -> list[int]:
    """Spreadsheet numbers of the blank rows, in order: the rows found blank and the rows the
    sheet does not store at all (a gap in an .xlsx), which are blank rows too."""
    at = np.fromiter(numbers, dtype=np.int64, count=len(numbers))
    before = np.concatenate(([last], at[:-1]))
    # Only rows that are blank or follow a gap need a look (none, in most files).
    out: list[int] = []
    for i in np.flatnonzero(blank_row | (at - before > 1)):
        out.extend(range(int(before[i]) + 1, numbers[i]))
        if blank_row[i]:
            out.append(numbers[i])
    return out


def _frame(rows: list[list[object]], width: int) -> pd.DataFrame:
    """Rows as an object frame of ``width`` columns (0..width-1), short rows padded with None."""
    lengths = np.fromiter(map(len, rows), dtype=np.int64, count=len(rows))
    short = np.flatnonzero(lengths < width)
    if len(short):  # few rows in a usual file: only they are copied
        rows = list(rows)
        for i in short.tolist():
            rows[i] = [*rows[i], *([None] * (width - len(rows[i])))]
    # One 2-D object array filled from the rows in one step (numpy's C loop), then a frame on
    # it without a copy: a quarter of the time DataFrame(rows) takes.
    cells = np.empty((len(rows), width), dtype=object)
    if len(rows) and width:
        cells[:] = rows
    return pd.DataFrame(cells, columns=range(width), dtype=object, copy=False)


def _has_data(values: np.ndarray) -> bool:
    """True when any cell of a column is not blank; looked at per distinct value."""
    try:
        codes, uniques = pd.factorize(values)
    except TypeError:  # an unhashable cell (a list in a DataFrame given from Python)
        return not all(_is_blank(v) for v in values)
    if not all(_is_blank(v) for v in uniques):
        return True
    # factorize sets every missing-value marker aside; only None is a blank cell.
    return any(v is not None for v in values[codes < 0])


def _is_blank(value: object) -> bool:
    return value is None or (isinstance(value, str) and not value.strip())


def _find_header(sheet: _Sheet) -> int | None:
    """Index in ``sheet.cells`` of the header row.

    The header is the first row naming both ``study_id`` and ``design`` among the first
    ``HEADER_SEARCH_ROWS`` non-blank rows (title lines may stand above it); failing that, the
    first non-blank row (the validation then says which required column is missing).
    """
    first = None
    seen = 0
    for i, row in enumerate(sheet.cells):
        if all(_is_blank(v) for v in row):
            continue
        if first is None:
            first = i
        names = {normalise_header(v) for v in row if not _is_blank(v)}
        if {"study_id", "design"} <= names:
            return i
        seen += 1
        if seen >= HEADER_SEARCH_ROWS:
            break
    return first


def _header_texts(sheet: _Sheet, h: int, width: int) -> tuple[list[object], int, list[str]]:
    """Header text per column, the number of header rows (1 or 2), and notes.

    A header cell merged across several columns names a group. When the row below holds text
    only under such groups, the two rows form one header ("Planned" over "n1" gives
    "Planned n1"); otherwise the columns a merged header cell covers have no header of their own.
    """
    number = sheet.numbers[h]
    header = list(sheet.cells[h]) + [None] * (width - len(sheet.cells[h]))
    across = [m for m in sheet.merges if m[0] == number and m[3] > m[1]]
    if not across:
        return header, 1, []
    notes: list[str] = []
    group = {}
    for _r0, c0, _r1, c1 in across:
        for c in range(c0, c1 + 1):
            group[c - 1] = header[c0 - 1] if c0 - 1 < len(header) else None
    below_index = h + 1
    below = (
        list(sheet.cells[below_index]) + [None] * width
        if below_index < len(sheet.cells) and sheet.numbers[below_index] == number + 1
        else None
    )
    if below is not None:
        filled = [j for j in range(width) if not _is_blank(below[j])]
        keys = {j for j in range(width) if normalise_header(header[j]) in ("study_id", "design")}
        # Sub-headings are text, and stand where no study could: a study row always fills its
        # study_id and design cells.
        if filled and all(isinstance(below[j], str) for j in filled) and not keys & set(filled):
            names = []
            for j in range(width):
                top = group.get(j, header[j])
                bottom = below[j]
                parts = [str(p).strip() for p in (top, bottom) if not _is_blank(p)]
                names.append(" ".join(parts) if parts else None)
            notes.append(
                f"rows {number} and {number + 1} form the header: a merged group title over "
                "sub-headings (e.g. "
                + ", ".join(f"'{names[j]}'" for j in filled[:2] if names[j] is not None)
                + ")"
            )
            return names, 2, notes
    for _r0, c0, _r1, c1 in across:
        letters = f"{_column_letter(c0 - 1)}{number}:{_column_letter(c1 - 1)}{number}"
        notes.append(
            f"the header cell {letters} is merged across {c1 - c0 + 1} columns; only its first "
            f"column is named '{header[c0 - 1]}', the others have no header of their own"
        )
    return header, 1, notes


def _to_raw(
    sheet: _Sheet,
    source: str,
    sheet_name: str | None,
    *,
    decimal_comma: bool,
    header_index: int | None = None,
) -> RawTable:
    cells = sheet.cells
    h = _find_header(sheet) if header_index is None else header_index
    if h is None:
        raise InputError(
            f"{source}{_sheet_text(sheet_name)}: the file is empty (no cell holds anything)."
        )
    width = max(map(len, cells[h:]), default=0)
    header, header_rows, notes = _header_texts(sheet, h, width)
    notes = list(sheet.notes) + notes
    header_number = sheet.numbers[h]
    titles = [sheet.numbers[i] for i in range(h) if not all(_is_blank(v) for v in cells[i])]
    if titles:
        notes.append(
            f"the header is on row {header_number}; "
            + ("row " if len(titles) == 1 else "rows ")
            + ", ".join(str(t) for t in titles)
            + " above it "
            + ("was" if len(titles) == 1 else "were")
            + " read as a title, not as studies"
        )
    body = cells[h + header_rows :]
    body_numbers = sheet.numbers[h + header_rows :]
    blank_row = _blank_mask(body)
    data_rows, numbers = body, body_numbers
    if blank_row.any():
        data_rows = list(itertools.compress(body, ~blank_row))
        numbers = list(itertools.compress(body_numbers, ~blank_row))
    blank = _blank_numbers(body_numbers, blank_row, header_number + header_rows - 1)
    # One frame of every column, rows padded to the width with None; the columns kept are
    # taken from it below.
    full = _frame(data_rows, width)
    # Columns with neither header nor data (stray empty columns) are dropped; a column with data
    # but no header gets a name from its letter so that nothing is lost. (Blank rows have no
    # data, so the rows of the frame are all that need looking at.)
    names: list[str] = []
    written: list[str] = []
    keep: list[int] = []
    for j in range(width):
        text = header[j] if j < len(header) else None
        if _is_blank(text):
            if not _has_data(full[j].to_numpy()):
                continue
            text = f"column {_column_letter(j)}"
        keep.append(j)
        written.append(str(text).strip())
        names.append(normalise_header(text) or f"column_{_column_letter(j).lower()}")
    if len(keep) > MAX_COLUMNS:
        raise InputError(_too_many_columns(source, len(keep)))
    seen: dict[str, int] = {}
    duplicates: dict[str, list[str]] = {}
    for k, name in enumerate(names):
        if name in seen:
            # Two headers that mean the same column: the second is carried under a unique name
            # and the validation compares it with the first (see RawTable.duplicates).
            first = written[seen[name]]
            names[k] = f"{name}__{k + 1}"
            written[k] = f"{written[k]} (duplicate of '{first}')"
            duplicates.setdefault(name, []).append(names[k])
        else:
            seen[name] = k
    if len(data_rows) > MAX_ROWS:
        raise InputError(_too_many_rows(source))
    frame = full if keep == list(range(width)) else full.iloc[:, keep]
    frame.columns = names
    if not len(data_rows):
        frame = pd.DataFrame({name: pd.Series(dtype=object) for name in names})
    table = RawTable(
        data=frame,
        rows=np.asarray(numbers, dtype=int),
        headers=dict(zip(names, written, strict=True)),
        source=source,
        sheet=sheet_name,
        decimal_comma=decimal_comma,
        blank_rows=blank,
        header_row=header_number,
        duplicates=duplicates,
        notes=notes,
        source_columns=keep,
    )
    table.row_notes.extend(_sheet_row_notes(sheet, numbers, keep, names, header_number))
    return table


def _sheet_row_notes(
    sheet: _Sheet, numbers: list[int], keep: list[int], names: list[str], header_number: int
) -> list[tuple[int, str]]:
    """Notes on data rows that are hidden, or hold cells covered by a merged range."""
    if not sheet.hidden and not sheet.merges:
        return []
    pos_of_row = {r: i for i, r in enumerate(numbers)}
    out: list[tuple[int, str]] = []
    for r in sorted(sheet.hidden):
        if r in pos_of_row:
            out.append(
                (pos_of_row[r], "the row is hidden in the workbook; it was audited like any other")
            )
    column_of = {j + 1: names[k] for k, j in enumerate(keep)}
    for r0, c0, r1, c1 in sheet.merges:
        anchor = f"{_column_letter(c0 - 1)}{r0}"
        span = f"{anchor}:{_column_letter(c1 - 1)}{r1}"
        for r in range(max(r0, header_number + 1), r1 + 1):
            if r not in pos_of_row:
                continue
            covered = [
                column_of[c] for c in range(c0, c1 + 1) if c in column_of and (r, c) != (r0, c0)
            ]
            if covered:
                out.append(
                    (
                        pos_of_row[r],
                        f"{', '.join(covered)}: covered by the merged cell {span}, so blank in "
                        f"the file (a merged range keeps only the value of {anchor})",
                    )
                )
    return out


def _column_letter(index: int) -> str:
    letters = ""
    index += 1
    while index:
        index, rem = divmod(index - 1, 26)
        letters = chr(65 + rem) + letters
    return letters


def raw_from_frame(df: pd.DataFrame, source: str = "<DataFrame>") -> RawTable:
    """Wrap a DataFrame built in Python (a notebook) as a raw table; rows numbered as if the
    frame were a sheet with its header on row 1."""
    cells: list[list[object]] = [list(df.columns)]
    values = df.astype(object).where(df.notna(), None).to_numpy().tolist()
    cells.extend(values)
    numbers = list(range(1, len(cells) + 1))
    return _to_raw(_Sheet(cells, numbers), source, None, decimal_comma=False, header_index=0)
