"""Write an :class:`~audit.pipeline.AuditResult` to files: JSON (the contract) and CSV.

Files are written atomically: to a temporary file in the target folder, then renamed over the
target, so an interrupted run never leaves a half-written file where a good one was.
"""

from __future__ import annotations

import contextlib
import json
import os
import re
import sys
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import IO, TYPE_CHECKING

import pandas as pd

if TYPE_CHECKING:
    from audit.pipeline import AuditResult

__all__ = ["atomic_output", "neutralise_formula", "studies_frame", "write_csv", "write_json"]

_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")
_PLAIN_NUMBER = re.compile(r"^[+-]?(\d[\d,]*\.?\d*|\.\d+)([eE][+-]?\d+)?%?$")


@contextlib.contextmanager
def atomic_output(path: str | Path, mode: str = "w") -> Iterator[IO]:
    """Open ``path`` for writing through a temporary file renamed into place on success.

    ``path`` ``"-"`` writes to standard output instead.
    """
    if str(path) == "-":
        yield sys.stdout
        sys.stdout.flush()
        return
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    try:
        encoding = None if "b" in mode else "utf-8"
        newline = None if "b" in mode else ""
        with os.fdopen(fd, mode, encoding=encoding, newline=newline) as handle:
            yield handle
        os.replace(tmp, target)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


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
    """The contract JSON document (DESIGN.md section 5)."""
    document = result.to_dict()
    with atomic_output(path) as handle:
        json.dump(document, handle, indent=1, ensure_ascii=False, allow_nan=False)
        handle.write("\n")


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
    for c in ("n_required_plan", "n_required_realized", "events_required_plan"):
        if c in metrics.columns and metrics[c].dtype != object:
            metrics[c] = metrics[c].astype("Int64")
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


def write_csv(result: AuditResult, path: str | Path) -> None:
    """The per-study table as CSV, formula-like text made inert."""
    frame = studies_frame(result)
    for c in frame.columns:
        if frame[c].dtype == object or pd.api.types.is_string_dtype(frame[c]):
            frame[c] = frame[c].astype(object).map(neutralise_formula)
    with atomic_output(path) as handle:
        frame.to_csv(handle, index=False, lineterminator="\n")
