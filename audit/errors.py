"""Typed exceptions for problems that stop a whole run (bad rows are data, never exceptions)."""

from __future__ import annotations

__all__ = ["AuditError", "ConfigError", "InputError", "OutputError"]


class AuditError(Exception):
    """Base class: a problem the user can fix, reported as one sentence without a traceback."""

    exit_code = 2


class InputError(AuditError):
    """The input file cannot be used at all (unreadable, no header, no study_id/design column)."""


class ConfigError(AuditError):
    """A rules file or an option is invalid (unknown rule id, unknown parameter, bad value)."""


class OutputError(AuditError):
    """An export cannot be written (a folder, no permission, or the input file itself)."""
