"""Audit rules as data: load and check rule files (TOML), evaluate them vectorised -> findings.

A rule file holds new rules as ``[[rule]]`` tables and changes to existing rules as
``[override.RULE-ID]`` tables::

    [[rule]]
    id = "power-below-target"
    severity = "warning"                      # note < warning < serious
    title = "one line: what the rule flags"
    message = "power is {power_at_planned_effect:.2f}, below {target_power:.2f}"
    rationale = "why it matters, in a paragraph"
    references = ["Author (year). Title. Journal."]
    when = { column = "power_at_planned_effect", below = "target_power", margin = "tolerance" }

    [rule.parameters.tolerance]
    value = 0.01
    range = [0.0, 0.5]
    meaning = "shortfalls up to this much power are ignored"

    [override.mde-exceeds-sesoi]
    severity = "serious"
    sesoi_multiple = 1.5                      # a parameter, by name

Conditions are data, never code: a *test* names a ``column`` (a metric, an input column of the
contract, or one of the file's own columns, such as ``study_type``) and
one comparison — ``below``, ``at_most``, ``above``, ``at_least`` (against a number, a parameter
or another column; optionally ``magnitude = true`` to compare absolute values, ``factor`` to
multiply the threshold, ``margin`` to move it away from the column's value), ``is`` (text, or a
list of texts) or ``blank`` (true/false) — and tests combine with ``all``, ``any`` and ``not``.
Logic is three-valued: a comparison with a blank value is *unknown*, never true, and ``not``
keeps it unknown, so a blank cell never raises a flag by accident.

A rule (or an override) may add an exemption, ``unless = { column = "study_type", is = "pilot" }``:
the rule then raises no flag where that condition is true; a blank or unknown exemption does not
exempt. A condition naming a column that is neither a contract column nor a metric names one of
the file's own columns: a file without it is a configuration error naming the column (the rule
would otherwise be judged on nothing), never a rule that silently does not fire.

Message templates quote columns and parameters as ``{name}`` (3 significant digits) or
``{name:spec}`` with a Python format specification (``{n_ratio:.0%}``). A rule that names a
metric the tool does not compute yet *waits*: it is listed, and raises no flag, until the metric
exists.
"""

from __future__ import annotations

import difflib
import math
import re
import tomllib
from collections.abc import Callable, Collection, Iterable, Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, ClassVar

import numpy as np
import pandas as pd

from audit._format import format_number
from audit.errors import ConfigError
from audit.metrics import METRICS, TEXT_METRICS
from audit.rawtable import normalise_header
from audit.schema import COLUMNS

__all__ = [
    "CONTRACT_METRICS",
    "SEVERITIES",
    "SEVERITY_RANK",
    "Evaluation",
    "Parameter",
    "Rule",
    "RuleSet",
    "evaluate_rules",
    "load_rules",
    "resolve_rules",
]

SEVERITIES = ("note", "warning", "serious")
SEVERITY_RANK = {s: i for i, s in enumerate(SEVERITIES)}

#: Metric names of the output contract (DESIGN.md section 5) that rules may name even where
#: this version does not compute them yet; a rule naming one waits until it exists.
CONTRACT_METRICS: dict[str, str] = {
    "type_s": "Type S error rate of a significant estimate (Gelman & Carlin 2014)",
    "exaggeration": "expected exaggeration ratio of a significant estimate (Type M)",
    "observed_power": "power at the observed effect: a transform of the p-value, never evidence",
    "ci_verdict": "what the reported CI shows: detected, excludes_planned_effect, "
    "excludes_sesoi or inconclusive; against a margin: non_inferior, inferior, equivalent, "
    "not_equivalent or inconclusive",
    "events_required_plan": "events needed at the planned hazard ratio (survival)",
    "icc_ratio": "realized / planned intracluster correlation (cluster designs)",
    "events_ratio": "realized / planned number of events (survival)",
}

#: Columns holding text: only ``is`` and ``blank`` apply to them.
TEXT_COLUMNS = frozenset(
    {c.name for c in COLUMNS if c.kind in ("text", "design", "choice") and c.name != "sides"}
    | TEXT_METRICS
)

_ID = re.compile(r"^[a-z][a-z0-9]*(?:-[a-z0-9]+)+$")
_NAME = re.compile(r"^[a-z][a-z0-9_]*$")
_FIELD = re.compile(r"\{([A-Za-z_][A-Za-z0-9_]*)(?::([^{}]*))?\}")
#: Largest width or precision a message field may ask for (``{n_ratio:>12.3f}``): a message
#: is a sentence, and ``{n_ratio:>2000000000}`` would write two gigabytes per finding.
MAX_FORMAT_WIDTH = 100
_SPEC_NUMBER = re.compile(r"\d+")
_NUMERIC_OPS = {"below": "<", "at_most": "≤", "above": ">", "at_least": "≥"}
_RULE_KEYS = {
    "id": "kebab-case identifier that says what the rule flags",
    "severity": "note, warning or serious",
    "title": "one line: what the rule flags",
    "when": "the condition, as data (see `study-audit rules` and DEVELOPERS.md)",
    "message": "one-line message template quoting the numbers, e.g. {power_at_planned_effect}",
    "rationale": "a paragraph: why the finding matters and where the threshold comes from",
    "references": "list of references (may be empty in a user's own rule)",
}
_RULE_OPTIONAL = {"parameters", "supersedes", "enabled", "unless"}
_PARAMETER_KEYS = {"value", "range", "meaning"}
_OVERRIDE_RESERVED = {"severity", "enabled", "unless"}


def known_columns() -> dict[str, str]:
    """Every name a rule may test or quote: input columns, metrics, contract metrics to come."""
    names = {c.name: c.meaning for c in COLUMNS}
    names.update(CONTRACT_METRICS)
    names.update(METRICS)
    return names


_KNOWN = known_columns()


def _suggest(name: str, valid: Iterable[str]) -> str:
    close = difflib.get_close_matches(name, list(valid), n=1)
    return f" (did you mean '{close[0]}'?)" if close else ""


# -- conditions -----------------------------------------------------------------------------------


class _Data:
    """Column access for one evaluation: metrics first, then the validated input table."""

    def __init__(self, table: pd.DataFrame, metrics: pd.DataFrame) -> None:
        self.table = table
        self.metrics = metrics
        self.n = len(table)
        self._numeric: dict[str, np.ndarray] = {}
        self._text: dict[str, np.ndarray] = {}

    def has(self, name: str) -> bool:
        return name in self.metrics.columns or name in self.table.columns

    def raw(self, name: str) -> np.ndarray:
        frame = self.metrics if name in self.metrics.columns else self.table
        return frame[name].to_numpy()

    def numeric(self, name: str) -> np.ndarray:
        if name not in self._numeric:
            values = self.raw(name)
            if values.dtype.kind in "fiub":
                out = values.astype(float)
            else:
                # Text-typed columns ('sides' is "1"/"2", a file's own column as written):
                # plain numbers, trimmed; anything else is blank (the test is unknown).
                text = pd.Series(values, dtype=object).str.strip()
                out = pd.to_numeric(text, errors="coerce").to_numpy(dtype=float)
            self._numeric[name] = out
        return self._numeric[name]

    def text(self, name: str) -> np.ndarray:
        """The column as trimmed texts (blank cells as they are), made once per evaluation."""
        if name not in self._text:
            self._text[name] = _trimmed(self.raw(name))
        return self._text[name]

    def blank(self, name: str) -> np.ndarray:
        values = self.raw(name)
        if values.dtype.kind in "fiub":
            return np.isnan(values.astype(float))
        text = self.text(name)
        return pd.isna(text) | (text == "")


def _trimmed(values: np.ndarray) -> np.ndarray:
    """``str(value).strip()`` of each value, missing values kept; a column of texts (the usual
    case: a few distinct texts over many rows) is trimmed once per distinct text."""
    series = pd.Series(values, dtype=object)
    blank = series.isna().to_numpy()
    if pd.api.types.infer_dtype(series, skipna=True) in ("string", "empty"):
        codes, uniques = pd.factorize(series, use_na_sentinel=True)
        table = np.append(np.asarray([u.strip() for u in uniques.tolist()], dtype=object), None)
        out = table[codes]
        out[blank] = series.to_numpy(dtype=object)[blank]
        return out
    return series.where(blank, series.astype(str).str.strip()).to_numpy(dtype=object)


#: (true, false) masks; a row in neither is unknown.
Truth = tuple[np.ndarray, np.ndarray]


class Condition:
    """A condition over the rows; subclasses are the tests and their combinations."""

    def evaluate(self, data: _Data, params: Mapping[str, float]) -> Truth:
        raise NotImplementedError

    def names(self) -> set[str]:
        """Column and parameter names the condition reads."""
        raise NotImplementedError

    def literals(self) -> list[float]:
        """Numbers written into the condition itself rather than as named parameters."""
        return []

    def describe(self, params: Collection[str] = ()) -> str:
        """The condition in words; ``params`` are the names that are parameters, not columns."""
        raise NotImplementedError


@dataclass(frozen=True)
class Compare(Condition):
    """``column`` compared with a threshold: a number, a parameter or another column."""

    column: str
    op: str
    operand: float | str
    magnitude: bool = False
    factor: float | str | None = None
    margin: float | str | None = None

    def _value(self, ref: float | str | None, data: _Data, params: Mapping[str, float]):
        if ref is None or isinstance(ref, float):
            return ref
        if ref in params:
            return float(params[ref])
        return data.numeric(ref)

    def evaluate(self, data: _Data, params: Mapping[str, float]) -> Truth:
        x = data.numeric(self.column)
        threshold = np.broadcast_to(
            np.asarray(self._value(self.operand, data, params), dtype=float), x.shape
        )
        if self.magnitude:
            x, threshold = np.abs(x), np.abs(threshold)
        factor = self._value(self.factor, data, params)
        if factor is not None:
            threshold = threshold * factor
        margin = self._value(self.margin, data, params)
        if margin is not None:
            # The margin moves the threshold away from the value: "below by more than margin".
            threshold = (
                threshold - margin if self.op in ("below", "at_most") else threshold + margin
            )
        known = ~np.isnan(x) & ~np.isnan(threshold)
        with np.errstate(invalid="ignore"):
            hit = {
                "below": np.less,
                "at_most": np.less_equal,
                "above": np.greater,
                "at_least": np.greater_equal,
            }[self.op](x, threshold)
        true = hit & known
        return true, known & ~true

    def names(self) -> set[str]:
        refs = (self.operand, self.factor, self.margin)
        return {self.column} | {r for r in refs if isinstance(r, str)}

    def literals(self) -> list[float]:
        return [r for r in (self.operand, self.factor, self.margin) if isinstance(r, float)]

    def describe(self, params: Collection[str] = ()) -> str:
        def show(ref: float | str) -> str:
            return format_number(ref) if isinstance(ref, float) else ref

        left, right = self.column, show(self.operand)
        if self.magnitude:
            left = f"|{left}|"
            if isinstance(self.operand, str) and self.operand not in params:
                right = f"|{right}|"
        if self.factor is not None:
            right = f"{show(self.factor)} × {right}"
        if self.margin is not None:
            sign = "−" if self.op in ("below", "at_most") else "+"
            right = f"{right} {sign} {show(self.margin)}"
        return f"{left} {_NUMERIC_OPS[self.op]} {right}"


@dataclass(frozen=True)
class IsText(Condition):
    """``column`` equals one of the given texts (trimmed, case-sensitive)."""

    column: str
    values: tuple[str, ...]

    def evaluate(self, data: _Data, params: Mapping[str, float]) -> Truth:
        text = data.text(self.column)
        known = ~pd.isna(text)
        true = known & np.isin(text.astype(str), self.values)
        return true, known & ~true

    def names(self) -> set[str]:
        return {self.column}

    def describe(self, params: Collection[str] = ()) -> str:
        quoted = " or ".join(f"'{v}'" for v in self.values)
        return f"{self.column} is {quoted}"


@dataclass(frozen=True)
class Blank(Condition):
    """``column`` is blank (``blank = true``) or given (``blank = false``); never unknown."""

    column: str
    blank: bool

    def evaluate(self, data: _Data, params: Mapping[str, float]) -> Truth:
        empty = data.blank(self.column)
        true = empty if self.blank else ~empty
        return true, ~true

    def names(self) -> set[str]:
        return {self.column}

    def describe(self, params: Collection[str] = ()) -> str:
        return f"{self.column} is {'blank' if self.blank else 'given'}"


@dataclass(frozen=True)
class AllOf(Condition):
    parts: tuple[Condition, ...]
    joiner: ClassVar[str] = "and"

    def evaluate(self, data: _Data, params: Mapping[str, float]) -> Truth:
        true = np.ones(data.n, dtype=bool)
        false = np.zeros(data.n, dtype=bool)
        for part in self.parts:
            t, f = part.evaluate(data, params)
            true &= t
            false |= f
        return true & ~false, false

    def names(self) -> set[str]:
        return set().union(*(p.names() for p in self.parts))

    def literals(self) -> list[float]:
        return [x for p in self.parts for x in p.literals()]

    def describe(self, params: Collection[str] = ()) -> str:
        def wrap(p: Condition) -> str:
            text = p.describe(params)
            return f"({text})" if isinstance(p, (AllOf, AnyOf)) else text

        return f" {self.joiner} ".join(wrap(p) for p in self.parts)


@dataclass(frozen=True)
class AnyOf(AllOf):
    joiner: ClassVar[str] = "or"

    def evaluate(self, data: _Data, params: Mapping[str, float]) -> Truth:
        true = np.zeros(data.n, dtype=bool)
        false = np.ones(data.n, dtype=bool)
        for part in self.parts:
            t, f = part.evaluate(data, params)
            true |= t
            false &= f
        return true, false & ~true


@dataclass(frozen=True)
class Not(Condition):
    part: Condition

    def evaluate(self, data: _Data, params: Mapping[str, float]) -> Truth:
        true, false = self.part.evaluate(data, params)
        return false, true

    def names(self) -> set[str]:
        return self.part.names()

    def literals(self) -> list[float]:
        return self.part.literals()

    def describe(self, params: Collection[str] = ()) -> str:
        return f"not ({self.part.describe(params)})"


# -- message templates ----------------------------------------------------------------------------


#: A part of a message: literal text, a ``(name, spec)`` field, or an optional clause given as
#: its alternatives (each a tuple of parts without clauses).
Part = str | tuple[str, str | None] | list[tuple]

_CLAUSE = re.compile(r"\[([^\[\]]*)\]")


def _parse_parts(text: str) -> tuple:
    """Literal text and ``(name, spec)`` fields, in order."""
    parts: list = []
    start = 0
    for m in _FIELD.finditer(text):
        if m.start() > start:
            parts.append(text[start : m.start()])
        parts.append((m.group(1), m.group(2)))
        start = m.end()
    if start < len(text):
        parts.append(text[start:])
    return tuple(parts)


@dataclass(frozen=True)
class Template:
    """A one-line message with ``{name}`` / ``{name:spec}`` fields, filled per flagged row.

    Text in square brackets that quotes a field is an optional clause: it is left out of a
    row's message when any field in it is blank. ``|`` separates alternatives inside one
    clause; the first whose fields are all given is used (``[the planned effect {a}|the SESOI
    {b}]``). Bracketed text without a field (``[0, 1]``) is plain text. A blank field outside
    a clause prints ``n/a``: the bundled rules put every field that can be blank in a clause.
    """

    text: str
    fields: tuple[tuple[str, str | None], ...]
    parts: tuple = ()

    @classmethod
    def parse(cls, text: str, where: str) -> Template:
        if "\n" in text.strip():
            raise ConfigError(f"{where}: the message must be one line.")
        text = text.strip()
        fields = tuple((m.group(1), m.group(2)) for m in _FIELD.finditer(text))
        if "{" in _FIELD.sub("", text) or "}" in _FIELD.sub("", text):
            raise ConfigError(
                f"{where}: the message has a brace that is not a field; fields look like "
                "{name} or {name:.2f}."
            )
        parts: list = []
        start = 0
        for m in _CLAUSE.finditer(text):
            inner = m.group(1)
            if not _FIELD.search(inner):
                continue  # plain bracketed text, kept as written
            if m.start() > start:
                parts.extend(_parse_parts(text[start : m.start()]))
            parts.append([_parse_parts(alt) for alt in inner.split("|")])
            start = m.end()
        parts.extend(_parse_parts(text[start:]))
        return cls(text, fields, tuple(parts))

    def names(self) -> set[str]:
        return {name for name, _ in self.fields}

    def render(
        self,
        values: Mapping[str, np.ndarray],
        size: int,
        against: Mapping[str, np.ndarray] | None = None,
    ) -> np.ndarray:
        """Messages for ``size`` rows; ``values`` maps each field name to its row values.

        ``against`` maps a field to the threshold it was compared with (per row): the field is
        then printed with as many more decimals (up to four) as it takes not to read equal to
        the threshold printed the same way, so that "0.4996 (below 0.50)" never reads
        "0.50 (below 0.50)". Fields are formatted as columns; the pieces are joined per row.
        """
        against = against or {}
        texts: dict[tuple[str, str | None], np.ndarray] = {}
        blank: dict[str, np.ndarray] = {}
        for name, spec in self.fields:
            column = np.asarray(values[name])
            if name not in blank:
                blank[name] = _blank_values(column)
            if (name, spec) not in texts:
                texts[name, spec] = _format_column(column, spec, against.get(name))

        def joined(parts: tuple) -> np.ndarray:
            out = np.full(size, "", dtype=object)
            for part in parts:
                out = out + (part if isinstance(part, str) else texts[part])
            return out

        out = np.full(size, "", dtype=object)
        for part in self.parts:
            if isinstance(part, str):
                out = out + part
            elif isinstance(part, tuple):
                out = out + texts[part]
            else:
                chosen = np.full(size, "", dtype=object)
                done = np.zeros(size, dtype=bool)
                for alternative in part:
                    names = [p[0] for p in alternative if isinstance(p, tuple)]
                    ok = ~done
                    for name in names:
                        ok &= ~blank[name]
                    if ok.any():
                        chosen = np.where(ok, joined(alternative), chosen)
                    done |= ok
                out = out + chosen
        return out


def _blank_values(values: np.ndarray) -> np.ndarray:
    """Where a field's values are blank (nan, None, empty text)."""
    arr = np.asarray(values)
    if arr.dtype.kind == "f":
        return np.isnan(arr)
    if arr.dtype.kind in "iub":
        return np.zeros(arr.shape, dtype=bool)
    return np.array(
        [v is None or (isinstance(v, float) and math.isnan(v)) or v == "" for v in arr],
        dtype=bool,
    )


def _sharpened_specs(values: np.ndarray, threshold: np.ndarray, spec: str | None) -> list[str]:
    """Per row, ``spec`` with enough more decimals that the value does not print as the
    threshold does (at most four more); a spec that is not a fixed, per cent or general one is
    left alone."""
    m = re.fullmatch(r"(?P<head>.*?)\.(?P<digits>\d+)(?P<kind>[fg%])", spec or ".3g")
    if m is None:
        return [spec or ""] * len(values)
    head, digits, kind = m.group("head"), int(m.group("digits")), m.group("kind")
    specs = [f"{head}.{d}{kind}" for d in range(digits, digits + 5)]
    out = [specs[0]] * len(values)
    thresholds = np.broadcast_to(threshold, values.shape)
    # Only values that print as their threshold at the spec's own precision need more digits
    # (thresholds are a few distinct numbers: each printed once).
    shown = {t: format(t, specs[0]) for t in set(thresholds.tolist())}
    for i, (v, t) in enumerate(zip(values.tolist(), thresholds.tolist(), strict=True)):
        if v == t or not (math.isfinite(v) and math.isfinite(t)):
            continue
        if format(v, specs[0]) != shown[t]:
            continue
        d = 1
        while d < 4 and format(v, specs[d]) == format(t, specs[d]):
            d += 1
        out[i] = specs[d]
    return out


def _format_column(
    values: np.ndarray, spec: str | None, threshold: np.ndarray | None = None
) -> np.ndarray:
    """Format a column of values; float columns take a fast path (one ``format`` call per value,
    no type checks), other columns go value by value through :func:`_format`. With a
    ``threshold`` the numbers are sharpened against it (:func:`_sharpened_specs`)."""
    arr = np.asarray(values)
    if arr.dtype.kind != "f":
        return np.array([_format(v, spec) for v in arr], dtype=object)
    missing = np.isnan(arr)
    clean = np.where(missing, 0.0, arr)
    if threshold is not None:
        specs = _sharpened_specs(clean, np.asarray(threshold, dtype=float), spec)
        out = np.array([format(v, f) for v, f in zip(clean.tolist(), specs, strict=True)],
                       dtype=object)  # fmt: skip
        if not spec:  # the default style keeps whole numbers whole
            whole = (clean == np.round(clean)) & (np.abs(clean) >= 10) & np.isfinite(clean)
            out[whole] = [str(int(v)) for v in clean[whole].tolist()]
    elif spec:
        out = np.array([format(v, spec) for v in clean.tolist()], dtype=object)
    else:
        # format_number: three significant digits, whole numbers from 10 up as integers.
        out = np.array([f"{v:.3g}" for v in clean.tolist()], dtype=object)
        whole = (clean == np.round(clean)) & (np.abs(clean) >= 10) & np.isfinite(clean)
        out[whole] = [str(int(v)) for v in clean[whole].tolist()]
        out[np.isinf(clean)] = "-"
    out[missing] = "n/a"
    return out


def _format(value: Any, spec: str | None) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "n/a"
    if isinstance(value, str):
        if spec:
            try:  # a number held as text, like the 'sides' choice "2"
                return format(float(value), spec)
            except ValueError:
                return format(value, spec)
        return value
    if isinstance(value, (int, float, np.integer, np.floating)):
        return format(float(value), spec) if spec else format_number(float(value))
    return str(value)


# -- rules ----------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Parameter:
    """A named threshold of a rule: its value, the allowed range and what it means."""

    name: str
    value: float
    low: float
    high: float
    meaning: str


@dataclass(frozen=True)
class Rule:
    """One audit rule: definition and documentation in one (see the module docstring)."""

    id: str
    severity: str
    title: str
    when: Condition
    message: Template
    rationale: str
    references: tuple[str, ...]
    parameters: Mapping[str, Parameter] = field(default_factory=dict)
    supersedes: tuple[str, ...] = ()
    enabled: bool = True
    source: str = ""
    overridden_by: tuple[str, ...] = ()
    #: Exemption: no flag where this condition is true (a blank or unknown one does not exempt).
    unless: Condition | None = None

    def condition_text(self) -> str:
        """The condition in words, with parameter names as written in the rule."""
        text = self.when.describe(set(self.parameters))
        if self.unless is not None:
            text += f", unless {self.unless.describe(set(self.parameters))}"
        return text

    def evaluate(self, data: _Data) -> Truth:
        """Rows where the rule fires (true), where it does not (false); others are unknown.

        An exempt row (``unless`` true) is false: judged, and not flagged. An unknown
        exemption leaves the rule's own condition in force, so a blank cell never exempts.
        """
        params = self.param_values()
        true, false = self.when.evaluate(data, params)
        if self.unless is not None:
            exempt, _ = self.unless.evaluate(data, params)
            true, false = true & ~exempt, false | exempt
        return true, false

    def own_columns(self) -> list[str]:
        """The file's own columns the rule reads (names that are no contract column or
        metric), in name order."""
        return sorted(c for c in self.columns() if c not in _KNOWN)

    def param_values(self) -> dict[str, float]:
        return {name: p.value for name, p in self.parameters.items()}

    def compared(self) -> list[tuple[str, float | str, bool]]:
        """``(column, threshold, magnitude)`` of each comparison in the condition (threshold as
        written: a number, a parameter or a column; magnitude: absolute values compared), for
        messages that quote both."""
        out = []
        stack = [self.when]
        while stack:
            c = stack.pop()
            if isinstance(c, Compare):
                out.append((c.column, c.operand, c.magnitude))
            elif isinstance(c, AllOf):
                stack.extend(c.parts)
            elif isinstance(c, Not):
                stack.append(c.part)
        return out

    def columns(self) -> set[str]:
        """Columns (metrics or inputs) the rule reads, in its condition or its message."""
        names = self.when.names() | self.message.names()
        if self.unless is not None:
            names |= self.unless.names()
        return names - set(self.parameters)

    def missing(self, available: Iterable[str]) -> list[str]:
        """Columns the rule needs that are not among ``available`` (it waits for them); the
        file's own columns are not waited for (a file without them is an error)."""
        have = set(available)
        return sorted(c for c in self.columns() if c not in have and c in _KNOWN)


@dataclass
class RuleSet:
    """The rules of a run, by id, in listing order, with the files they came from."""

    rules: dict[str, Rule]
    files: list[str]

    def enabled(self) -> list[Rule]:
        return [r for r in self.rules.values() if r.enabled]

    def get(self, rule_id: str) -> Rule:
        if rule_id not in self.rules:
            raise ConfigError(
                f"unknown rule '{rule_id}'{_suggest(rule_id, self.rules)}; "
                f"known rules: {', '.join(self.rules)}."
            )
        return self.rules[rule_id]

    def __len__(self) -> int:
        return len(self.rules)


_TYPE_NAMES = {
    str: "text",
    float: "a number",
    int: "a number",
    bool: "true or false",
    dict: "a table",
    list: "a list",
}


def _expect(kind: type, value: Any, where: str, what: str) -> Any:
    """``value`` if it is of ``kind`` (booleans are not numbers), else a ConfigError."""
    if not isinstance(value, kind) or (isinstance(value, bool) and kind is not bool):
        raise ConfigError(
            f"{where}: {what} must be {_TYPE_NAMES.get(kind, kind.__name__)}, got {value!r}."
        )
    return value


class _Parser:
    """Builds rules from parsed TOML, checking every name against columns and parameters."""

    def __init__(self, where: str, parameters: Mapping[str, Parameter]) -> None:
        self.where = where
        self.parameters = parameters
        self.columns = known_columns()

    def column(self, name: Any) -> str:
        """A column the rule reads: a contract column or metric, else one of the file's own
        columns (checked against the file when the rule is applied)."""
        _expect(str, name, self.where, "'column'")
        if name in self.columns:
            return name
        own = normalise_header(name)
        if not own or not _NAME.match(own):
            raise ConfigError(
                f"{self.where}: column '{name}' is neither an input column, a metric nor a "
                "usable name for a column of the file (letters, digits and underscores, "
                f"starting with a letter){_suggest(name, self.columns)}."
            )
        return own

    def ref(self, value: Any, key: str) -> float | str:
        if isinstance(value, bool):
            raise ConfigError(f"{self.where}: '{key}' must be a number, parameter or column.")
        if isinstance(value, (int, float)):
            return float(value)
        _expect(str, value, self.where, f"'{key}'")
        if value in self.parameters:
            return value
        if value in self.columns:
            if value in TEXT_COLUMNS:
                raise ConfigError(f"{self.where}: '{key}' names the text column '{value}'.")
            return value
        valid = [*self.parameters, *self.columns]
        raise ConfigError(
            f"{self.where}: '{key} = \"{value}\"' is neither a parameter of this rule "
            f"({', '.join(self.parameters) or 'none'}) nor a column{_suggest(value, valid)}."
        )

    def condition(self, spec: Any) -> Condition:
        _expect(dict, spec, self.where, "a condition")
        keys = set(spec)
        for combiner, cls in (("all", AllOf), ("any", AnyOf)):
            if combiner in keys:
                if keys != {combiner}:
                    raise ConfigError(f"{self.where}: '{combiner}' stands alone in its table.")
                parts = _expect(list, spec[combiner], self.where, f"'{combiner}'")
                if not parts:
                    raise ConfigError(f"{self.where}: '{combiner}' needs at least one condition.")
                return cls(tuple(self.condition(p) for p in parts))
        if "not" in keys:
            if keys != {"not"}:
                raise ConfigError(f"{self.where}: 'not' stands alone in its table.")
            return Not(self.condition(spec["not"]))
        if "column" not in keys:
            raise ConfigError(
                f"{self.where}: a condition is a test with a 'column', or 'all', 'any' or 'not' "
                f"(got keys {', '.join(sorted(keys)) or 'none'})."
            )
        column = self.column(spec["column"])
        ops = keys & {*_NUMERIC_OPS, "is", "blank"}
        if len(ops) != 1:
            raise ConfigError(
                f"{self.where}: the test on '{column}' needs exactly one of "
                f"{', '.join([*_NUMERIC_OPS, 'is', 'blank'])}."
            )
        (op,) = ops
        modifiers = keys - {"column", op}
        allowed = {"magnitude", "factor", "margin"} if op in _NUMERIC_OPS else set()
        if modifiers - allowed:
            raise ConfigError(
                f"{self.where}: unexpected {', '.join(sorted(modifiers - allowed))} in the test "
                f"on '{column}'" + (f"; allowed: {', '.join(sorted(allowed))}." if allowed else ".")
            )
        if op == "blank":
            return Blank(column, _expect(bool, spec["blank"], self.where, "'blank'"))
        own = column not in self.columns
        if op == "is":
            if column not in TEXT_COLUMNS and not own:
                raise ConfigError(
                    f"{self.where}: 'is' compares text; '{column}' is a number (use below, "
                    "at_most, above or at_least)."
                )
            values = spec["is"] if isinstance(spec["is"], list) else [spec["is"]]
            return IsText(column, tuple(_expect(str, v, self.where, "'is'") for v in values))
        if column in TEXT_COLUMNS:
            raise ConfigError(
                f"{self.where}: '{column}' holds text; compare it with 'is' or 'blank'."
            )
        # A file's own column compared as a number: its cells are read as plain numbers
        # (2019, 0.3); a cell that is not one leaves the test unknown for that row.
        return Compare(
            column,
            op,
            self.ref(spec[op], op),
            magnitude=_expect(bool, spec.get("magnitude", False), self.where, "'magnitude'"),
            factor=self.ref(spec["factor"], "factor") if "factor" in spec else None,
            margin=self.ref(spec["margin"], "margin") if "margin" in spec else None,
        )


def _parameter(name: str, spec: Any, where: str) -> Parameter:
    if not _NAME.match(name) or name in _OVERRIDE_RESERVED:
        raise ConfigError(
            f"{where}: parameter name '{name}' must be snake_case and not severity, enabled "
            "or unless."
        )
    if name in known_columns():
        raise ConfigError(f"{where}: parameter '{name}' has the name of a column; rename it.")
    _expect(dict, spec, where, f"parameter '{name}'")
    missing = _PARAMETER_KEYS - set(spec)
    extra = set(spec) - _PARAMETER_KEYS
    if missing or extra:
        raise ConfigError(
            f"{where}: parameter '{name}' needs exactly value, range and meaning"
            + (f" (missing {', '.join(sorted(missing))})" if missing else "")
            + (f" (unexpected {', '.join(sorted(extra))})" if extra else "")
            + "."
        )
    rng = spec["range"]
    if (
        not isinstance(rng, list)
        or len(rng) != 2
        or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in rng)
        or rng[0] > rng[1]
    ):
        raise ConfigError(f"{where}: parameter '{name}' range must be [low, high], got {rng!r}.")
    meaning = _expect(str, spec["meaning"], where, f"parameter '{name}' meaning").strip()
    if not meaning:
        raise ConfigError(f"{where}: parameter '{name}' needs a meaning.")
    param = Parameter(name, 0.0, float(rng[0]), float(rng[1]), meaning)
    return _set_value(param, spec["value"], where)


def _set_value(param: Parameter, value: Any, where: str) -> Parameter:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or math.isnan(value):
        raise ConfigError(f"{where}: parameter '{param.name}' must be a number, got {value!r}.")
    if not param.low <= value <= param.high:
        raise ConfigError(
            f"{where}: parameter '{param.name}' = {value:g} is outside its allowed range "
            f"[{param.low:g}, {param.high:g}] ({param.meaning})."
        )
    return replace(param, value=float(value))


def _severity(value: Any, where: str) -> str:
    if value not in SEVERITIES:
        raise ConfigError(
            f"{where}: severity must be one of {', '.join(SEVERITIES)}, got {value!r}."
        )
    return value


def parse_rule(spec: Any, source: str) -> Rule:
    """Build and check one rule from a ``[[rule]]`` table."""
    _expect(dict, spec, source, "each [[rule]]")
    rid = spec.get("id")
    where = f"{source}: rule '{rid}'" if isinstance(rid, str) else f"{source}: a rule"
    missing = [k for k in _RULE_KEYS if k not in spec]
    if missing:
        raise ConfigError(
            f"{where} lacks {', '.join(missing)}; a rule needs "
            + "; ".join(f"{k} ({v})" for k, v in _RULE_KEYS.items())
            + "."
        )
    unknown = set(spec) - set(_RULE_KEYS) - _RULE_OPTIONAL
    if unknown:
        valid = [*_RULE_KEYS, *sorted(_RULE_OPTIONAL)]
        raise ConfigError(
            f"{where}: unknown key {', '.join(sorted(unknown))}; valid keys: {', '.join(valid)}."
        )
    _expect(str, rid, where, "id")
    if not _ID.match(rid):
        raise ConfigError(
            f"{where}: the id must be kebab-case words (like 'power-below-target'), got '{rid}'."
        )
    params_spec = _expect(dict, spec.get("parameters", {}), where, "parameters")
    parameters = {name: _parameter(name, p, where) for name, p in params_spec.items()}
    parser = _Parser(where, parameters)
    when = parser.condition(spec["when"])
    unless = parser.condition(spec["unless"]) if "unless" in spec else None
    message = Template.parse(_expect(str, spec["message"], where, "message"), where)
    for name, fmt in message.fields:
        if name not in parameters:
            parser.column(name)
        own = name not in parser.columns and name not in parameters
        sample: Any = "text" if name in TEXT_COLUMNS or (own and not fmt) else 0.5
        if any(len(n) > 3 or int(n) > MAX_FORMAT_WIDTH for n in _SPEC_NUMBER.findall(fmt or "")):
            raise ConfigError(
                f"{where}: bad format '{{{name}:{fmt[:40]}}}' in the message: a width or "
                f"precision above {MAX_FORMAT_WIDTH} (a message is one sentence)."
            )
        try:
            format(sample, fmt or "")
        except ValueError as exc:
            raise ConfigError(
                f"{where}: bad format '{{{name}:{fmt}}}' in the message: {exc}."
            ) from None
    references = _expect(list, spec["references"], where, "references")
    for ref in references:
        _expect(str, ref, where, "each reference")
    supersedes = spec.get("supersedes", [])
    _expect(list, supersedes, where, "supersedes")
    for ref in supersedes:
        _expect(str, ref, where, "each superseded rule id")
    unused = set(parameters) - when.names() - message.names()
    if unless is not None:
        unused -= unless.names()
    if unused:
        raise ConfigError(f"{where}: parameter {', '.join(sorted(unused))} is never used.")
    text = {k: _expect(str, spec[k], where, k).strip() for k in ("title", "rationale")}
    for key, value in text.items():
        if not value:
            raise ConfigError(f"{where}: {key} is empty.")
    return Rule(
        id=rid,
        severity=_severity(spec["severity"], where),
        title=text["title"],
        when=when,
        message=message,
        rationale=text["rationale"],
        references=tuple(references),
        parameters=parameters,
        supersedes=tuple(supersedes),
        enabled=_expect(bool, spec.get("enabled", True), where, "enabled"),
        source=source,
        unless=unless,
    )


def _apply_override(rule: Rule, spec: Any, source: str) -> Rule:
    where = f"{source}: override of '{rule.id}'"
    _expect(dict, spec, where, "an override")
    changes: dict[str, Any] = {"overridden_by": (*rule.overridden_by, source)}
    params = dict(rule.parameters)
    for key, value in spec.items():
        if key == "severity":
            changes["severity"] = _severity(value, where)
        elif key == "enabled":
            changes["enabled"] = _expect(bool, value, where, "enabled")
        elif key == "unless":
            # An exemption added to the rule's own (either exempts): files stack.
            extra = _Parser(where, params).condition(value)
            before = changes.get("unless", rule.unless)
            changes["unless"] = extra if before is None else AnyOf((before, extra))
        elif key in params:
            params[key] = _set_value(params[key], value, where)
        else:
            valid = ["severity", "enabled", "unless", *params]
            raise ConfigError(
                f"{where}: unknown setting '{key}'{_suggest(key, valid)}; "
                f"valid: {', '.join(valid)}."
            )
    return replace(rule, parameters=params, **changes)


def _read_toml(source: str | Path | Mapping[str, Any]) -> tuple[str, Mapping[str, Any]]:
    if isinstance(source, Mapping):
        return "<rules given in Python>", source
    path = Path(source)
    try:
        with path.open("rb") as handle:
            return str(path), tomllib.load(handle)
    except FileNotFoundError:
        raise ConfigError(f"rules file {path}: no such file.") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"rules file {path} is not valid TOML: {exc}.") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"rules file {path} cannot be read: {exc}.") from None


def _merge(rules: dict[str, Rule], source: str | Path | Mapping[str, Any]) -> str:
    name, doc = _read_toml(source)
    unknown = set(doc) - {"rule", "override"}
    if unknown:
        raise ConfigError(
            f"{name}: unknown top-level key {', '.join(sorted(unknown))}; a rules file has "
            "[[rule]] tables (new rules) and [override.RULE-ID] tables (changes)."
        )
    for spec in _expect(list, doc.get("rule", []), name, "'rule' ([[rule]] tables)"):
        rule = parse_rule(spec, name)
        if rule.id in rules:
            raise ConfigError(
                f"{name}: rule '{rule.id}' is already defined in {rules[rule.id].source}; to "
                f"change it write [override.{rule.id}], or give the new rule its own id."
            )
        rules[rule.id] = rule
    for rid, spec in _expect(dict, doc.get("override", {}), name, "'override'").items():
        if rid not in rules:
            raise ConfigError(
                f"{name}: override of unknown rule '{rid}'{_suggest(rid, rules)}; "
                f"known rules: {', '.join(rules)}."
            )
        rules[rid] = _apply_override(rules[rid], spec, name)
    return name


def default_rule_files() -> list[Path]:
    """The bundled rule files, in name order."""
    from audit.resources import bundled_dir

    return sorted(bundled_dir("rules").glob("*.toml"))


def load_rules(
    sources: Iterable[str | Path | Mapping[str, Any]] = (), *, defaults: bool = True
) -> RuleSet:
    """The bundled rules (unless ``defaults=False``) plus ``sources``, applied in order.

    Each source is a TOML file path or an already parsed mapping of the same shape.

    Raises
    ------
    ConfigError
        A file is missing or malformed, a rule lacks a field, a name is unknown, an override
        names an unknown rule or parameter, or a value is outside its range.
    """
    rules: dict[str, Rule] = {}
    files: list[str] = []
    for path in default_rule_files() if defaults else []:
        _merge(rules, path)
    for source in sources:
        files.append(_merge(rules, source))
    for rule in rules.values():
        for other in rule.supersedes:
            if other not in rules:
                raise ConfigError(
                    f"{rule.source}: rule '{rule.id}' supersedes unknown rule '{other}'."
                )
    order = sorted(rules.values(), key=lambda r: (-SEVERITY_RANK[r.severity], r.id))
    return RuleSet({r.id: r for r in order}, files)


def resolve_rules(rules: Any) -> RuleSet:
    """What ``audit_table(rules=...)`` accepts: None (the bundled rules), a :class:`RuleSet`, or
    one or more extra rule files / parsed mappings applied on top of the bundled rules."""
    if rules is None:
        return load_rules()
    if isinstance(rules, RuleSet):
        return rules
    if isinstance(rules, (str, Path, Mapping)):
        return load_rules([rules])
    return load_rules(list(rules))


# -- evaluation -----------------------------------------------------------------------------------


def check_own_columns(rules: Iterable[Rule], columns: Iterable[str]) -> None:
    """Raise a ConfigError when a rule reads a column of its own that the file lacks.

    The rule would be judged on nothing: an exemption would exempt no row, a condition would
    never fire, and the audit would not say so. Every such column of every rule is named.
    """
    have = set(columns)
    lacking = [(rule, name) for rule in rules for name in rule.own_columns() if name not in have]
    if not lacking:
        return
    listed = "; ".join(
        f"rule '{rule.id}' ({rule.overridden_by[-1] if rule.overridden_by else rule.source}) "
        f"reads '{name}'{_suggest(name, [*have, *_KNOWN])}"
        for rule, name in lacking
    )
    own = sorted(c for c in have if c not in _KNOWN and not c.startswith("_"))
    raise ConfigError(
        f"{listed}, which is neither an input column, a metric nor a column of this file "
        f"(the file's own columns: {', '.join(own) or 'none'})."
    )


_FINDING_COLUMNS = ["pos", "rule", "severity", "message"]


@dataclass
class Evaluation:
    """What the rules found.

    Attributes
    ----------
    findings : ``pos``, ``rule``, ``severity``, ``message``, ordered by row then rule.
    problems : ``rule``, ``severity``, ``problem``: rules that failed internally (the run went on).
    waiting : rule id -> the metric columns it needs that this run does not have.
    judged : rule id -> audited rows on which its condition was known (true or false, not
        unknown for want of a value): the rows the rule could judge.
    """

    findings: pd.DataFrame
    problems: pd.DataFrame
    waiting: dict[str, list[str]]
    judged: dict[str, int] = field(default_factory=dict)


def evaluate_rules(
    ruleset: RuleSet,
    table: pd.DataFrame,
    metrics: pd.DataFrame,
    valid: np.ndarray,
    *,
    on_rule: Callable[[Rule], None] | None = None,
) -> Evaluation:
    """Apply every enabled rule to the valid rows, each as a few vectorised masks.

    Messages are formatted only for flagged rows. A rule that raises becomes a line of
    ``problems`` and the other rules still run. Where a rule fires, the findings of the rules it
    ``supersedes`` on the same row are dropped (a serious finding replaces its milder twin).
    """
    data = _Data(table.reset_index(drop=True), metrics.reset_index(drop=True))
    valid = np.asarray(valid, dtype=bool)
    parts: list[pd.DataFrame] = []
    problems: list[dict[str, str]] = []
    waiting: dict[str, list[str]] = {}
    fired: dict[str, np.ndarray] = {}
    judged: dict[str, int] = {}
    enabled = ruleset.enabled()
    check_own_columns(enabled, data.table.columns)
    for order, rule in enumerate(enabled):
        if on_rule is not None:
            on_rule(rule)
        missing = [c for c in sorted(rule.columns()) if not data.has(c)]
        if missing:
            waiting[rule.id] = missing
            continue
        try:
            params = rule.param_values()
            true, false = rule.evaluate(data)
            pos = np.flatnonzero(true & valid)
            known = int(((true | false) & valid).sum())
            values = {
                name: (np.full(len(pos), params[name]) if name in params else data.raw(name)[pos])
                for name in rule.message.names()
            }
            against = {}
            for column, ref, magnitude in rule.compared():
                if column not in values or values[column].dtype.kind != "f":
                    continue
                threshold = (
                    data.numeric(ref)[pos]
                    if isinstance(ref, str) and ref not in params
                    else np.full(len(pos), float(params.get(ref, ref)))
                )
                if magnitude:
                    # A signed value against a threshold on its magnitude: the threshold on
                    # the value's side ("-10.3%", not "-10%", beyond 10%).
                    threshold = np.abs(threshold) * np.where(values[column] < 0, -1.0, 1.0)
                against[column] = threshold
            messages = rule.message.render(values, len(pos), against)
        except Exception as exc:  # a broken rule must not stop the audit
            problems.append(
                {
                    "rule": rule.id,
                    "severity": rule.severity,
                    "problem": f"{type(exc).__name__}: {exc}",
                }
            )
            continue
        fired[rule.id] = pos
        judged[rule.id] = known
        parts.append(
            pd.DataFrame(
                {
                    "pos": pos,
                    "rule": rule.id,
                    "severity": rule.severity,
                    "message": messages,
                    "_order": order,
                }
            )
        )
    findings = (
        pd.concat(parts, ignore_index=True)
        if parts
        else pd.DataFrame({c: pd.Series(dtype=object) for c in [*_FINDING_COLUMNS, "_order"]})
    )
    for rule in enabled:
        if rule.id in fired and rule.supersedes and len(findings):
            drop = findings["rule"].isin(rule.supersedes) & findings["pos"].isin(fired[rule.id])
            findings = findings[~drop.to_numpy()]
    if len(findings):
        findings = findings.sort_values(["pos", "_order"], kind="stable")
        findings["pos"] = findings["pos"].astype(int)
    findings = findings.drop(columns="_order").reset_index(drop=True)
    # Text columns as objects, however pandas inferred the parts (an empty part, a part of
    # one message), so that evaluations of parts of a table concatenate to that of the whole.
    findings = findings.astype({c: object for c in ("rule", "severity", "message")})
    problem_frame = pd.DataFrame(problems, columns=["rule", "severity", "problem"])
    return Evaluation(findings, problem_frame, waiting, judged)
