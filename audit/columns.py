"""The input columns as ``study-audit columns`` prints them, from the specs that validate input."""

from __future__ import annotations

from typing import TYPE_CHECKING

from rich import box
from rich.table import Table
from rich.text import Text

from audit.designs import DESIGNS
from audit.errors import ConfigError
from audit.inputs import column_rows

if TYPE_CHECKING:
    from rich.console import Console

__all__ = ["render_columns"]


def render_columns(console: Console, design: str | None = None) -> None:
    """Print every input column (or those ``design`` reads): name, group, meaning with the
    values allowed and the default, and the designs that read it.

    Raises
    ------
    ConfigError
        ``design`` is not a design name.
    """
    if design is not None and design not in DESIGNS:
        raise ConfigError(
            f"--design: unknown design '{design}'; the designs are {', '.join(DESIGNS)}."
        )
    rows = column_rows(design)
    title = "Input columns" + (f" read by {design}" if design else "")
    table = Table(
        title=Text(title, style="audit.title"),
        title_justify="left",
        box=box.SIMPLE_HEAD,
        header_style="audit.header",
        show_lines=False,
        expand=False,
    )
    table.add_column("column", no_wrap=True, style="audit.rule_id")
    table.add_column("meaning; designs that read it", overflow="fold")
    for name, group, meaning, users in rows:
        cell = Text(meaning)
        cell.append(f"\n{group}; read by: {users}", style="audit.label")
        table.add_row(name, cell)
    console.print(table)
    console.print(
        Text(
            "Header names match case-insensitively, spaces, dashes and underscores alike; other "
            "columns are kept in the exports and may be tested by rules (rules/README.md). "
            "`study-audit template FILE.xlsx` writes a workbook with these columns.",
            style="audit.muted",
        )
    )
