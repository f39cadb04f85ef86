"""Input columns named like output columns: an earlier audit's output is set aside, other
clashes are renamed (DESIGN.md section 9.6).

The exports put the user's columns first, then the tool's own (``row``, ``status``, the
metrics, ``errors``, ``notes``, ``flags``; the workbook adds ``highest severity`` and
``findings``). A file that holds those columns already is an export of an earlier audit, as the
README invites: its output columns are left out and computed again, so the new export has each
column once. A user column that merely shares a name with an output column (a ``status`` of the
user's own) is kept under a new header, ``<header> (input)``, and a note says so.
"""

from __future__ import annotations

import dataclasses

from audit.metrics import METRICS, REFERENCE_PREFIX
from audit.read import RawTable, normalise_header

__all__ = ["OUTPUT_COLUMNS", "set_aside_output_columns"]

#: Names (normalised) of the columns the exports add after the user's columns.
OUTPUT_COLUMNS = frozenset(
    {"row", "status", "highest_severity", "findings", "errors", "notes", "flags", *METRICS}
)


def _is_output(name: str) -> bool:
    """An export's own column: a fixed name, or a power at a reference effect (one column per
    effect the run asked for: ``reference_power_0.5``)."""
    return name in OUTPUT_COLUMNS or name.startswith(REFERENCE_PREFIX)


#: An input with ``row``, ``status`` and at least this many metric columns is an earlier export.
_EARLIER_EXPORT_METRICS = 10


def set_aside_output_columns(raw: RawTable) -> RawTable:
    """``raw`` without an earlier audit's output columns, other clashes renamed (with notes)."""
    names = {c: normalise_header(raw.headers.get(c, c)) for c in raw.data.columns}
    clashes = [c for c, name in names.items() if _is_output(name)]
    if not clashes:
        return raw
    found = {names[c] for c in clashes}
    earlier = {"row", "status"} <= found and len(found & set(METRICS)) >= _EARLIER_EXPORT_METRICS
    if earlier:
        return _dropped(raw, clashes)
    headers = dict(raw.headers)
    taken = {normalise_header(h) for h in headers.values()}
    notes = []
    for c in clashes:
        new = f"{headers.get(c, c)} (input)"
        while normalise_header(new) in taken or _is_output(normalise_header(new)):
            new += "'"
        taken.add(normalise_header(new))
        notes.append(
            f"column '{headers.get(c, c)}' has the name of an output column; it is carried "
            f"through as '{new}'"
        )
        headers[c] = new
    return dataclasses.replace(raw, headers=headers, notes=[*raw.notes, *notes])


def _dropped(raw: RawTable, columns: list[str]) -> RawTable:
    gone = set(columns)
    keep = [c for c in raw.data.columns if c not in gone]
    at = {c: j for j, c in enumerate(raw.data.columns)}
    written = ", ".join(raw.headers.get(c, c) for c in columns[:3])
    more = f" and {len(columns) - 3} more" if len(columns) > 3 else ""
    note = (
        f"{len(columns)} columns are the output of an earlier audit ({written}{more}); they are "
        "left out and computed again"
    )
    return dataclasses.replace(
        raw,
        data=raw.data[keep],
        headers={c: h for c, h in raw.headers.items() if c not in gone},
        duplicates={
            c: [d for d in later if d not in gone]
            for c, later in raw.duplicates.items()
            if c not in gone
        },
        cell_problems=[p for p in raw.cell_problems if p[1] not in gone],
        source_columns=[raw.source_columns[at[c]] for c in keep]
        if len(raw.source_columns) == len(at)
        else raw.source_columns,
        notes=[*raw.notes, note],
    )
