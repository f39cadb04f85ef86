"""Locate the files that ship with the tool: the default rules and the demo portfolio.

In a source checkout (and an editable install) they are the top-level ``rules/`` and
``demo_data/`` folders; a built wheel carries copies under ``audit/_bundled/`` (see
pyproject.toml). Both layouts are looked up, bundled copy first.
"""

from __future__ import annotations

from pathlib import Path

__all__ = ["bundled_dir"]

_PACKAGE = Path(__file__).resolve().parent


def bundled_dir(name: str) -> Path:
    """Path of the shipped folder ``name`` (``"rules"`` or ``"demo_data"``)."""
    for candidate in (_PACKAGE / "_bundled" / name, _PACKAGE.parent / name):
        if candidate.is_dir():
            return candidate
    raise FileNotFoundError(
        f"the bundled folder '{name}' is missing from this installation; reinstall study-audit"
    )
