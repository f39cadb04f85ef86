"""Terminal rendering of an audit with rich: rows are built first, then laid out in tables.

Colours are named styles (see ``THEME``), so ``NO_COLOR`` and plain terminals read the same
content without them.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

from rich.console import Console
from rich.table import Table
from rich.theme import Theme

if TYPE_CHECKING:
    from audit.pipeline import AuditResult

__all__ = ["THEME", "format_number", "render_overview"]

THEME = Theme(
    {
        "audit.title": "bold",
        "audit.header": "bold",
        "audit.invalid": "magenta",
        "audit.low": "red",
        "audit.ok": "green",
        "audit.muted": "dim",
    }
)

#: Past this many studies the overview lists only the first rows and says where the rest are.
MAX_LISTED = 200


def format_number(value: float | None, digits: int = 3) -> str:
    """Compact number for tables: 3 significant digits, integers as integers, '-' for none.

    >>> format_number(0.61234), format_number(128.0), format_number(None)
    ('0.612', '128', '-')
    """
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    if float(value).is_integer() and abs(value) >= 10:
        return f"{int(value):d}"
    return f"{value:.{digits}g}"


def make_console(*, stderr: bool = False) -> Console:
    return Console(theme=THEME, stderr=stderr, highlight=False)


_OVERVIEW = (
    ("power_at_planned_effect", "power at\nplanned"),
    ("power_at_sesoi", "power at\nSESOI"),
    ("mde", "MDE"),
    ("mde_std", "MDE\n(std)"),
    ("n_ratio", "size\nratio"),
    ("plan_discrepancy", "plan\ndiscrepancy"),
)


def render_overview(result: AuditResult, console: Console) -> None:
    """A plain table of the key per-study metrics, invalid rows with their errors."""
    n = len(result.table)
    p = result.portfolio
    console.print(
        f"[audit.title]study-audit[/] {result.settings.get('source', '')}: "
        f"{p['studies']} studies, {p['audited']} audited, {p['invalid']} invalid"
    )
    table = Table(show_lines=False, header_style="audit.header", pad_edge=False)
    table.add_column("row", justify="right", no_wrap=True)
    table.add_column("study", no_wrap=True)
    table.add_column("design", no_wrap=True)
    for _, label in _OVERVIEW:
        table.add_column(label, justify="right")
    errors = result.error_texts()
    metrics = result.metrics
    target = result.table["target_power"].to_numpy()
    invalid: list[tuple[int, object, list[str]]] = []
    for i in range(min(n, MAX_LISTED)):
        row = result.table.iloc[i]
        if result.status[i] != "audited":
            table.add_row(
                str(row["_row"]),
                str(row["study_id"] or ""),
                str(row["design"] or ""),
                "[audit.invalid]invalid[/]",
                *([""] * (len(_OVERVIEW) - 1)),
            )
            invalid.append((row["_row"], row["study_id"], errors[i]))
            continue
        cells = []
        for metric, _ in _OVERVIEW:
            value = metrics.iat[i, metrics.columns.get_loc(metric)]
            text = format_number(value)
            if metric == "power_at_planned_effect" and math.isfinite(value):
                style = "audit.ok" if value >= target[i] - 1e-12 else "audit.low"
                text = f"[{style}]{text}[/]"
            cells.append(text)
        table.add_row(str(row["_row"]), str(row["study_id"]), str(row["design"]), *cells)
    console.print(table)
    for row_number, study_id, texts in invalid:
        console.print(
            f"[audit.invalid]row {row_number} ({study_id or 'no study_id'}) not audited:[/] "
            + "; ".join(texts)
        )
    if n > MAX_LISTED:
        console.print(
            f"[audit.muted]{n - MAX_LISTED} more studies not listed; export them with "
            "--csv or --json.[/]"
        )
