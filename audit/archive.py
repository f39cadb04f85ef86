"""Workbook archives inspected before any XML is parsed: declared sizes, packing ratio, number of
parts, document type declarations, and which worksheets need the careful parser.
"""

from __future__ import annotations

import zipfile
from pathlib import Path

from audit.errors import InputError
from audit.rawtable import MAX_ARCHIVE_MEMBERS, MAX_PACKING_RATIO, MAX_UNPACKED_BYTES

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


def scan_archive(path: Path, archive: zipfile.ZipFile) -> dict[str, bool]:
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
