"""Text shown in a terminal: user values without control characters.

A cell may hold an escape sequence (``ESC ] 52 ; c ; ... BEL`` asks a terminal to set the
clipboard; others move the cursor, retitle the window or hide text) or a bidirectional override
that shows text in another order than it is stored. Everything printed to a terminal (the
report, ``--study``, ``respond`` and the messages on standard error) goes through
:func:`clean`; the exports (JSON, CSV, workbook) keep the values as they were read.

Removed: whole escape sequences (CSI ``ESC [ ... final``, OSC/DCS/APC/PM/SOS strings up to
their terminator, two-character ``ESC x``), then every other C0 control but line feed and tab,
DEL, the C1 controls (U+0080 to U+009F) and the bidirectional controls (U+061C, U+200E,
U+200F, U+202A to U+202E, U+2066 to U+2069).
"""

from __future__ import annotations

import re

import numpy as np
import pandas as pd

__all__ = ["clean", "clean_frame", "clean_line", "clean_value", "has_unsafe"]

_SEQUENCE = re.compile(
    r"\x1b\[[0-?]*[ -/]*[@-~]?"  # CSI: parameters, intermediates, final byte
    r"|\x9b[0-?]*[ -/]*[@-~]?"  # CSI as one C1 character
    r"|[\x1b][\]PX^_][^\x07\x1b\x9c]*(?:\x07|\x1b\\|\x9c)?"  # OSC, DCS, SOS, PM, APC strings
    r"|[\x90\x98\x9d\x9e\x9f][^\x07\x1b\x9c]*(?:\x07|\x1b\\|\x9c)?"  # the same as C1 characters
    r"|\x1b[ -~]?"  # ESC and one more character (or a lone ESC)
)
_CONTROLS = "\x00-\x08\x0b-\x1f\x7f-\x9f\u061c\u200e\u200f\u202a-\u202e\u2066-\u2069"
_CONTROL = re.compile(f"[{_CONTROLS}]")
_UNSAFE = _CONTROL
_LINE_BREAKS = re.compile(r"[\n\t]")


def has_unsafe(text: str) -> bool:
    """True when ``text`` holds anything :func:`clean` removes."""
    return _UNSAFE.search(text) is not None


def clean(text: str) -> str:
    """``text`` without escape sequences and control characters (line feeds and tabs kept)."""
    if not has_unsafe(text):
        return text
    return _CONTROL.sub("", _SEQUENCE.sub("", text))


def clean_line(text: str) -> str:
    """:func:`clean`, with line feeds and tabs as spaces (a message that is one line)."""
    return _LINE_BREAKS.sub(" ", clean(text))


def clean_value(value: object) -> object:
    """Strings cleaned; lists, tuples and dicts cleaned inside; anything else as it is."""
    if isinstance(value, str):
        return clean(value)
    if isinstance(value, dict):
        return {clean_value(k): clean_value(v) for k, v in value.items()}
    if isinstance(value, list):
        return [clean_value(v) for v in value]
    if isinstance(value, tuple):
        return tuple(clean_value(v) for v in value)
    return value


def clean_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """A copy of ``frame`` whose text cells (and category labels) are cleaned; the frame itself
    when nothing needs cleaning. Columns are tested at C speed; only columns holding an unsafe
    character are rewritten."""
    out = frame
    for name in frame.columns:
        column = frame[name]
        if isinstance(column.dtype, pd.CategoricalDtype):
            labels = column.cat.categories
            if labels.dtype == object and _any_unsafe(labels.to_numpy()):
                if out is frame:
                    out = frame.copy()
                renamed = [clean_value(v) for v in labels]
                if len(set(renamed)) == len(renamed):
                    out[name] = column.cat.rename_categories(renamed)
                else:  # two labels that differ only in removed characters
                    out[name] = column.astype(object).map(clean_value)
        elif column.dtype == object and _any_unsafe(column.to_numpy()):
            if out is frame:
                out = frame.copy()
            out[name] = column.map(clean_value)
    if _any_unsafe(np.asarray([str(c) for c in frame.columns], dtype=object)):
        if out is frame:
            out = frame.copy()
        out.columns = [clean_value(c) for c in frame.columns]
    return out


def _any_unsafe(values: np.ndarray) -> bool:
    return has_unsafe("\n".join(map(str, values.tolist())))
