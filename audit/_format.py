"""Number formatting shared by rule messages and the terminal report."""

from __future__ import annotations

import math

__all__ = ["format_number"]


def format_number(value: object, digits: int = 3) -> str:
    """Compact number: 3 significant digits, whole numbers from 10 up as integers, '-' for none.

    >>> format_number(0.61234), format_number(128.0), format_number(None), format_number(5.0)
    ('0.612', '128', '-', '5')
    """
    if value is None:
        return "-"
    try:
        number = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return str(value)
    if not math.isfinite(number):
        return "-"
    if number.is_integer() and abs(number) >= 10:
        return f"{int(number):d}"
    return f"{number:.{digits}g}"
