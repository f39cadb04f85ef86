"""Workbook archives inspected before any XML is parsed: declared sizes, packing ratio, number of
parts, document type declarations, and which worksheets need the careful parser (formulas,
hidden rows, merges, error cells, prefixed XML, a reference extent out of proportion, long text).
"""

from __future__ import annotations

import zipfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from audit.errors import InputError
from audit.rawtable import (
    MAX_ARCHIVE_MEMBERS,
    MAX_CELL_CHARS,
    MAX_COLUMNS,
    MAX_PACKING_RATIO,
    MAX_UNPACKED_BYTES,
    SHEET_ROWS,
)

ZIP_MAGIC = b"PK\x03\x04"
EMPTY_ZIP_MAGIC = b"PK\x05\x06"
OLE_MAGIC = b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1"
_RATIO_FROM_BYTES = 2**20
_DTD_MARKERS = tuple(
    marker.encode(encoding)
    for marker in ("<!DOCTYPE", "<!ENTITY")
    for encoding in ("utf-8", "utf-16-le", "utf-16-be")
)


def ole_message(path: Path) -> str:
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


def check_sizes(path: Path, archive: zipfile.ZipFile) -> None:
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


def scan_archive(
    path: Path, archive: zipfile.ZipFile, known: dict[str, PartScan] | None = None
) -> dict[str, PartScan]:
    """Refuse a part that declares a document type; per XML part, what :class:`PartScan` says.

    ``known``: parts already scanned (the worksheet to read, scanned before calamine starts).
    """
    found: dict[str, PartScan] = dict(known or {})
    for info in archive.infolist():
        if not info.filename.endswith((".xml", ".rels", ".vml")):
            continue
        if info.filename not in found:
            found[info.filename] = scan_part(archive, info)
        if found[info.filename].dtd:
            raise InputError(
                f"{path}: the workbook part '{info.filename}' declares a document type "
                "(entity definitions or external references), which spreadsheet programs never "
                "write; refused as unsafe."
            )
    return found


#: What makes a worksheet need the careful reader: formulas, hidden rows, merged ranges, error
#: cells (calamine reads an error value as an empty cell), with or without a namespace prefix
#: (``<x:f>``). A marker found in cell text only sends the sheet to the careful reader.
_SPECIAL_MARKERS = (
    b"<f>",
    b"<f ",
    b"<f/",
    b":f>",
    b":f ",
    b":f/",
    b'hidden="',
    b"mergeCell",
    b't="e"',
    b"t='e'",
    b"hidden='",
)
_REF_SPAN = 24  # bytes after r=" read to decode a reference (3 letters, 10 digits, quote)


@dataclass
class PartScan:
    """What one streaming pass over an XML part found.

    ``max_row`` / ``max_column`` are the largest row and column any ``r="..."`` reference
    names (a cell such as ``XFD30001`` or a row such as ``r="1048576"``): calamine lays a sheet
    out as a dense grid of that extent, so it is read by calamine only when the grid stays in
    proportion to the cells the XML holds (:meth:`grid_fits`). ``longest_text``: the longest run
    of bytes without markup, which bounds the longest cell text.
    """

    dtd: bool = False
    special: bool = False
    prefixed: bool = True  # no unprefixed <sheetData: calamine's reading is not relied on
    max_row: int = 0
    max_column: int = 0
    references: int = 0
    longest_text: int = 0

    def grid_fits(self) -> bool:
        """True when calamine's dense grid is small beside the cells present, and within
        the sheet and table limits (else the careful reader decides)."""
        if self.max_row > SHEET_ROWS or self.max_column > MAX_COLUMNS:
            return False
        return self.max_row * max(self.max_column, 1) <= 8 * self.references + 2**20

    def plain(self) -> bool:
        """A worksheet calamine reads exactly as the careful reader would."""
        return (
            not (self.dtd or self.special or self.prefixed)
            and self.grid_fits()
            and self.longest_text <= MAX_CELL_CHARS
        )


def scan_part(archive: zipfile.ZipFile, info: zipfile.ZipInfo) -> PartScan:
    """One streaming pass over a part: DTD, special markers, reference extent, longest text."""
    scan = PartScan()
    overlap = max(len(m) for m in (*_DTD_MARKERS, *_SPECIAL_MARKERS, b"<sheetData"))
    tail = b""
    pending = b""  # the last bytes of the previous chunk, whose references are read next time
    run = 0  # bytes without '<' at the end of what was read so far
    with archive.open(info) as part:
        while chunk := part.read(2**20):
            window = tail + chunk
            if any(marker in window for marker in _DTD_MARKERS):
                scan.dtd = True
                return scan
            scan.special = scan.special or any(m in window for m in _SPECIAL_MARKERS)
            if scan.prefixed and b"<sheetData" in window:
                scan.prefixed = False
            tail = window[-overlap:]
            pending = _references(scan, pending + chunk, final=False)
            run = _text_run(scan, chunk, run)
    _references(scan, pending, final=True)
    return scan


def _references(scan: PartScan, data: bytes, *, final: bool) -> bytes:
    """Fold the ``r="..."`` references of ``data`` into ``scan`` (numpy over the bytes); returns
    the unread end (references starting in the last bytes are read with the next chunk)."""
    limit = len(data) if final else max(len(data) - _REF_SPAN, 0)
    if limit <= 1:
        return data[limit:] if not final else b""
    raw = np.frombuffer(data + b"\0" * _REF_SPAN, dtype=np.uint8)
    n = limit
    before = raw[: n - 1]
    hit = (
        (raw[1:n] == ord("r"))
        & (raw[2 : n + 1] == ord("="))
        & ((raw[3 : n + 2] == ord('"')) | (raw[3 : n + 2] == ord("'")))
        & ((before == 32) | (before == 9) | (before == 10) | (before == 13) | (before == 58))
    )
    at = np.flatnonzero(hit) + 4  # first byte of the value
    if len(at):
        window = raw[at[:, None] + np.arange(_REF_SPAN - 4)]
        letter = (window >= 65) & (window <= 90)
        digit = (window >= 48) & (window <= 57)
        # Leading letters (a column), then digits (a row number).
        n_letters = np.argmin(np.hstack([letter, np.zeros((len(at), 1), bool)]), axis=1)
        column = np.zeros(len(at), dtype=np.int64)
        for k in range(4):  # at most 3 letters in a valid reference; 4 flags a hostile one
            use = n_letters > k
            column = np.where(use, column * 26 + (window[:, k].astype(np.int64) - 64), column)
        column = np.where(n_letters > 3, np.iinfo(np.int64).max // 4, column)
        idx = np.arange(len(at))
        row = np.zeros(len(at), dtype=np.int64)
        ended = np.zeros(len(at), dtype=bool)
        for k in range(12):  # 12 digits flag a row number beyond any sheet
            pos = np.minimum(n_letters + k, window.shape[1] - 1)
            d = digit[idx, pos] & ~ended
            row = np.where(d, row * 10 + (window[idx, pos].astype(np.int64) - 48), row)
            ended |= ~d
        scan.max_column = max(scan.max_column, int(column.max()))
        scan.max_row = max(scan.max_row, int(row.max()))
        scan.references += len(at)
    return b"" if final else data[limit:]


def _text_run(scan: PartScan, chunk: bytes, run: int) -> int:
    """Longest run of bytes without '<' (text between tags), carried across chunks."""
    raw = np.frombuffer(chunk, dtype=np.uint8)
    opens = np.flatnonzero(raw == ord("<"))
    if not len(opens):
        run += len(chunk)
        scan.longest_text = max(scan.longest_text, run)
        return run
    gaps = np.diff(opens) - 1
    longest = max(run + int(opens[0]), int(gaps.max(initial=0)))
    scan.longest_text = max(scan.longest_text, longest)
    return len(chunk) - int(opens[-1]) - 1
