"""Terminal report of an audit with rich: what is shown is built first as plain data, then laid
out.

Colours are named styles (see ``THEME``); every distinction a colour makes is also written in
words (severity names, "not audited"), so ``NO_COLOR``, a plain pipe and a narrow terminal read
the same content. Large portfolios are summarised: counts and distributions over every study,
then at most ``limit`` studies and invalid rows listed, most severe first.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
from rich.console import Console, Group
from rich.padding import Padding
from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn
from rich.table import Table
from rich.text import Text
from rich.theme import Theme

from audit._format import format_number
from audit.designs import design_of
from audit.metrics import METRICS, REFERENCE_PREFIX
from audit.portfolio import BLANK_GROUP
from audit.result import MAX_LISTED, flagged_rows, listing_order
from audit.rules import CONTRACT_METRICS, SEVERITIES, SEVERITY_RANK, Rule, RuleSet, known_columns
from audit.schema import COLUMNS
from audit.terminal import clean, clean_frame, clean_value

if TYPE_CHECKING:
    from audit.pipeline import AuditResult

__all__ = [
    "EFFECT_COLUMNS",
    "MAX_LISTED",
    "PAIR_LABELS",
    "RESULT_COLUMNS",
    "THEME",
    "StageBar",
    "build_overview",
    "format_number",
    "make_console",
    "pair_ratio",
    "planned_realized_pairs",
    "render_report",
    "render_rule",
    "render_rules",
    "render_study",
]

THEME = Theme(
    {
        "audit.title": "bold",
        "audit.section": "bold cyan",
        "audit.header": "bold",
        "audit.label": "dim",
        "audit.invalid": "magenta",
        "audit.low": "red",
        "audit.ok": "green",
        "audit.muted": "dim",
        "audit.bar": "cyan",
        "audit.rule_id": "bold",
        "audit.severity.serious": "bold red",
        "audit.severity.warning": "yellow",
        "audit.severity.note": "blue",
        "audit.waiting": "dim italic",
    }
)

#: At most this many ids of studies without findings are named.
MAX_CLEAN_NAMED = 20

#: Bands of design-based power for the portfolio's distribution, as [low, high).
_BAR_WIDTH = 30
#: Below this width the studies with findings are stacked instead of tabulated.
NARROW = 80


def make_console(*, stderr: bool = False) -> Console:
    """The console the command line prints to (honours ``NO_COLOR`` and the terminal width)."""
    # No markup: user values (a title such as "[/]" or "[link=...]") are shown as written.
    return Console(theme=THEME, stderr=stderr, highlight=False, markup=False)


def _severity(severity: str) -> Text:
    return Text(severity, style=f"audit.severity.{severity}")


def _pct(share: float | None) -> str:
    return "-" if share is None or not math.isfinite(share) else f"{share:.0%}"


# -- building: plain data about what to show ------------------------------------------------------


@dataclass
class StudyEntry:
    """One study as the report lists it: identity, key numbers, findings (most severe first)."""

    pos: int
    row: int
    study_id: str
    design: str
    worst: str
    findings: list[tuple[str, str, str]]  # severity, rule id, message
    key_numbers: list[str]


@dataclass
class RuleCount:
    rule: str
    severity: str
    studies: int
    state: str  # "active", "waiting for ...", "failed: ..."
    judged: int | None = None  # audited rows whose condition was known (true or false)


@dataclass
class FamilyLine:
    """One outcome family as the report shows it (numbers from ``portfolio["families"]``)."""

    name: str
    studies: int
    pooled: str
    scale: str
    median_power: str
    reference: str
    remarks: list[str]
    tested: bool


@dataclass
class Overview:
    """Everything the portfolio report shows, computed over all rows before any rendering."""

    source: str
    sheet: str | None
    studies: int
    audited: int
    invalid: int
    blank_rows: int
    rules_in_force: int
    rule_files: list[str]
    waiting: dict[str, list[str]]
    disabled: list[str]
    power_known: int
    power_quartiles: tuple[float, float, float] | None
    at_target: int
    power_bands: list[tuple[str, int]]
    mde_rows: list[tuple[str, str, int, float, float, float]]
    rule_counts: list[RuleCount]
    by_worst: dict[str, int]
    flagged_total: int
    flagged: list[StudyEntry]
    clean_ids: list[str]
    clean_total: int
    invalid_rows: list[tuple[int, str, list[str]]]
    problems: list[tuple[str, str, str]] = field(default_factory=list)
    results_lines: list[str] = field(default_factory=list)
    input_notes: list[str] = field(default_factory=list)
    basis_line: str | None = None
    reference_line: str | None = None
    families: list[FamilyLine] = field(default_factory=list)


def _results_lines(portfolio: dict) -> list[str]:
    """Reported results across the portfolio: CI verdicts, exaggeration, excess significance."""
    lines = []
    verdicts = portfolio.get("ci_verdict_counts") or {}
    if verdicts:
        order = (
            "detected",
            "excludes_sesoi",
            "excludes_planned_effect",
            "non_inferior",
            "equivalent",
            "inferior",
            "not_equivalent",
            "inconclusive",
        )
        counts = " · ".join(f"{k} {verdicts[k]:,}" for k in order if verdicts.get(k))
        lines.append(f"{sum(verdicts.values()):,} studies with a confidence interval: {counts}")
    exaggeration = portfolio.get("median_exaggeration")
    if exaggeration is not None and math.isfinite(exaggeration):
        lines.append(
            f"median exaggeration ratio of a significant estimate at the planned effect: "
            f"{exaggeration:.2f}"
        )
    excess = portfolio.get("excess_significance")
    if excess:
        lines.append(
            f"excess significance: {_plural(excess['observed'], 'significant result')} observed, "
            f"{excess['expected']:.1f} expected; one-sided p = {format_number(excess['p_value'])}"
            f" ({excess['method']}; basis: {excess['basis']})"
        )
        deficit = excess.get("deficit")
        if deficit:
            lines.append(deficit_sentence(deficit))
    elif portfolio.get("excess_significance_note"):
        lines.append(portfolio["excess_significance_note"])
    return lines


#: Below this lower-tail probability a shortfall of significant results is called a deficit.
DEFICIT_LEVEL = 0.05


def deficit_sentence(deficit: dict, basis: str = "planned") -> str:
    """What a shortfall of significant results says, in words (``basis``: the effects the
    powers were computed at, ``planned`` or ``pooled``)."""
    counts = (
        f"{_plural(deficit['observed'], 'significant result')} against "
        f"{deficit['expected']:.1f} expected; P(this few or fewer) = "
        f"{format_number(deficit['p_value'])}"
    )
    if deficit["p_value"] < DEFICIT_LEVEL:
        why = (
            "the pooled effect overstates what these studies could see (a pooled estimate "
            "inflated by the largest or most selected results), or significant results went "
            "unreported"
            if basis == "pooled"
            else "the planned effects look optimistic for these studies, or significant "
            "results went unreported"
        )
        return (
            f"far fewer results are significant than the studies' powers predict ({counts}): " + why
        )
    return f"fewer results are significant than predicted ({counts}), within chance"


def _text(value: object) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return ""
    return str(value)


def key_numbers(result: AuditResult, pos: int) -> list[str]:
    """The few numbers a reviewer looks at first for a study, as short phrases."""
    m = result.metrics.iloc[pos]
    target = result.table["target_power"].iat[pos]
    out = []
    power = m.get("power_at_planned_effect", np.nan)
    pooled = m.get("power_at_pooled_effect", np.nan)
    hypothesis = result.table["hypothesis"].iat[pos] if "hypothesis" in result.table else None
    margin_test = hypothesis in ("non_inferiority", "equivalence")
    if margin_test:
        word = "non-inferiority" if hypothesis == "non_inferiority" else "equivalence"
        out.append(f"{word}, margin {format_number(result.table['margin'].iat[pos])}")
    if math.isfinite(power):
        out.append(f"power {power:.2f} (target {target:.2f})")
    elif math.isfinite(pooled):
        out.append(f"power {pooled:.2f} at the family's pooled effect")
    sesoi_power = m.get("power_at_sesoi", np.nan)
    if math.isfinite(sesoi_power):
        out.append(f"at SESOI {sesoi_power:.2f}")
    mde = m.get("mde", np.nan)
    if math.isfinite(mde):
        design = design_of(result.table, pos)
        unit = design.standardized_as if design is not None else None
        # A ratio measure is named: the number alone would read as a difference.
        named = (
            f"{design.noun} " if design is not None and design.measure and design.is_ratio else ""
        )
        std = m.get("mde_std", np.nan)
        show_std = unit and math.isfinite(std) and not math.isclose(abs(std), abs(mde))
        # mde and mde_std carry the same sign (the direction used); either way: magnitudes.
        extra = f" ({unit} {format_number(std)})" if show_std else ""
        either = " either way" if m.get("direction_used") == "either" else ""
        out.append(f"MDE {named}{format_number(mde)}{either}{extra}")
    detectable = m.get("detectable_margin", np.nan)
    if margin_test and math.isfinite(detectable):
        out.append(f"detectable margin {format_number(detectable)}")
    ratio = m.get("n_ratio", np.nan)
    if math.isfinite(ratio):
        out.append(f"size {ratio:.0%} of plan")
    return out


def build_overview(result: AuditResult, *, limit: int = MAX_LISTED) -> Overview:
    """Compute what the portfolio report shows; vectorised over studies, loops only over the
    at most ``limit`` studies listed."""
    table, valid = result.table, result.valid
    p = result.portfolio
    # Portfolio statistics come from the portfolio block (audit.portfolio): laid out here only.
    spread = p["power_distribution"]
    bands = [(f"{b['low']:.2f} – {b['high']:.2f}", int(b["studies"])) for b in spread["bands"]]
    quartiles = spread["quartiles"]
    mde_rows = [
        (name, d["unit"] or "-", d["studies"], d["median"], d["quartiles"][0], d["quartiles"][2])
        for name, d in p["mde_std_distribution"].items()
    ]

    findings = result.findings
    problems = result.rule_problems
    failed = dict(zip(problems["rule"], problems["problem"], strict=True)) if len(problems) else {}
    studies_per_rule = findings.groupby("rule")["pos"].nunique().to_dict() if len(findings) else {}
    rule_counts = []
    for rule in result.rules:
        if rule.id in result.rules_waiting:
            state = "waiting for " + ", ".join(result.rules_waiting[rule.id])
        elif rule.id in failed:
            state = "failed: " + failed[rule.id]
        else:
            state = "active"
        rule_counts.append(
            RuleCount(
                rule.id,
                rule.severity,
                int(studies_per_rule.get(rule.id, 0)),
                state,
                result.rules_judged.get(rule.id),
            )
        )

    # For the listing order only; the counts are the portfolio's.
    flagged_pos, flagged_worst, flagged_count = flagged_rows(findings, len(table))
    by_worst = dict(p["studies_by_worst_finding"])
    order = listing_order(flagged_pos, flagged_worst, flagged_count)
    listed = flagged_pos[order][:limit]
    worst = np.full(len(table), -1)
    worst[flagged_pos] = flagged_worst
    entries = []
    if len(listed):
        grouped = {
            pos: group
            for pos, group in findings[findings["pos"].isin(listed)].groupby("pos", sort=False)
        }
        for pos in listed:
            group = grouped[pos]
            ranks = group["severity"].map(SEVERITY_RANK).to_numpy()
            rows = group.iloc[np.argsort(-ranks, kind="stable")]
            entries.append(
                StudyEntry(
                    pos=int(pos),
                    row=int(table["_row"].iat[pos]),
                    study_id=_text(table["study_id"].iat[pos]),
                    design=_text(table["design"].iat[pos]),
                    worst=SEVERITIES[worst[pos]],
                    findings=list(
                        zip(rows["severity"], rows["rule"], rows["message"], strict=True)
                    ),
                    key_numbers=key_numbers(result, int(pos)),
                )
            )
    clean = np.flatnonzero((worst < 0) & valid)
    clean_ids = [_text(table["study_id"].iat[i]) for i in clean[:MAX_CLEAN_NAMED]]

    bad = np.flatnonzero(~valid)
    # Sentences for the listed rows only (grouping them for every row costs more at 100k).
    listed = bad[:limit]
    listed_errors: dict[int, list[str]] = {int(i): [] for i in listed}
    if len(listed):
        keep = result.errors["pos"].isin(listed).to_numpy()
        sentences = result.error_sentences()[keep]
        for pos, sentence in zip(result.errors["pos"].to_numpy()[keep], sentences, strict=True):
            listed_errors[int(pos)].append(sentence)
    invalid_rows = [
        (int(table["_row"].iat[i]), _text(table["study_id"].iat[i]), listed_errors[int(i)])
        for i in listed
    ]
    return Overview(
        source=str(result.settings.get("source", "")),
        sheet=result.settings.get("sheet"),
        studies=int(p["studies"]),
        audited=int(p["audited"]),
        invalid=int(p["invalid"]),
        blank_rows=int(p.get("blank_rows_skipped", 0)),
        rules_in_force=len(result.rules),
        rule_files=list(result.settings.get("rule_files", [])),
        waiting=dict(result.rules_waiting),
        disabled=list(result.settings.get("rules_disabled", [])),
        power_known=int(spread["studies"]),
        power_quartiles=tuple(quartiles) if quartiles else None,
        at_target=int(spread["at_target"]),
        power_bands=bands,
        mde_rows=mde_rows,
        rule_counts=rule_counts,
        by_worst=by_worst,
        flagged_total=len(flagged_pos),
        flagged=entries,
        clean_ids=clean_ids,
        clean_total=len(clean),
        invalid_rows=invalid_rows,
        problems=[
            (r, s, msg)
            for r, s, msg in zip(
                problems["rule"], problems["severity"], problems["problem"], strict=True
            )
        ],
        results_lines=_results_lines(p),
        input_notes=[str(n) for n in result.settings.get("input_notes", [])],
        basis_line=_basis_line(p),
        reference_line=_reference_line(p),
        families=_family_lines(p),
    )


def _basis_line(portfolio: dict) -> str | None:
    """The power distribution that falls back on the pooled or a reference effect, in words
    (only where some study has no planned effect)."""
    spread = portfolio.get("power_distribution_by_basis")
    if not spread or not spread.get("quartiles"):
        return None
    counts = spread["basis_counts"]
    if not counts.get("pooled") and not counts.get("reference"):
        return None
    q1, med, q3 = spread["quartiles"]
    parts = [f"{counts['planned']:,} at the planned effect"]
    if counts.get("pooled"):
        parts.append(f"{counts['pooled']:,} at their family's pooled effect")
    if counts.get("reference"):
        parts.append(
            f"{counts['reference']:,} at the reference effect {spread['reference_effect']}"
        )
    return (
        f"with the pooled or a reference effect where a study has no planned effect: median "
        f"{med:.2f}, middle half {q1:.2f} – {q3:.2f} over {spread['studies']:,} studies "
        f"({', '.join(parts)})"
    )


def _reference_line(portfolio: dict) -> str | None:
    medians = portfolio.get("median_reference_power") or {}
    shown = [f"{k}: {v:.2f}" for k, v in medians.items() if v is not None]
    if not shown:
        return None
    return (
        "median design-based power at the reference effects (each design's standardized unit): "
        + " · ".join(shown)
    )


def _family_lines(portfolio: dict) -> list[FamilyLine]:
    out = []
    for name, f in (portfolio.get("families") or {}).items():
        pooled = "-"
        if f["pooled_estimate"] is not None:
            pooled = f"{format_number(f['pooled_estimate'])} ± {format_number(f['pooled_se'])}"
        power = f["median_power_at_pooled_effect"]
        refs = [
            "-" if v is None else f"{v:.2f}"
            for v in (f.get("median_reference_power") or {}).values()
        ]
        remarks = []
        if f["not_pooled"]:
            remarks.append(f"not pooled: {f['not_pooled']}")
        if f["pooling"] == "random" and f["tau2"] is not None:
            remarks.append(
                f"between-study variance tau² = {format_number(f['tau2'])} "
                f"({f['results_pooled']} results pooled)"
            )
        excess = f.get("excess_significance")
        if excess:
            remarks.append(
                f"excess significance: {_plural(excess['observed'], 'significant result')} "
                f"observed, {excess['expected']:.1f} expected at the pooled effect; one-sided "
                f"p = {format_number(excess['p_value'])}"
            )
            if excess.get("deficit"):
                remarks.append(deficit_sentence(excess["deficit"], basis="pooled"))
        out.append(
            FamilyLine(
                name=name,
                studies=int(f["studies"]),
                pooled=pooled,
                scale=f["scale"] or "-",
                median_power="-" if power is None else f"{power:.2f}",
                reference="/".join(refs) or "-",
                remarks=remarks,
                tested=excess is not None,
            )
        )
    return out


# -- rendering ------------------------------------------------------------------------------------


def _section(console: Console, title: str) -> None:
    console.print()
    console.rule(Text(title, style="audit.section"), align="left", style="audit.muted")


def _subheading(console: Console, title: str, detail: str = "") -> None:
    text = Text(title, style="audit.header")
    if detail:
        text.append(f" — {detail}")
    console.print(Padding(text, (0, 1, 0, 1)))


def _grid() -> Table:
    grid = Table.grid(padding=(0, 2))
    grid.add_column(style="audit.label", no_wrap=True)
    grid.add_column(overflow="fold")
    return grid


def _plural(n: int, word: str, plural: str | None = None) -> str:
    return f"{n:,} {word if n == 1 else (plural or word + 's')}"


def _render_header(view: Overview, console: Console, fail_on: str | None) -> None:
    console.print(Text("study-audit report", style="audit.title"))
    grid = _grid()
    source = view.source + (f" (sheet {view.sheet})" if view.sheet else "")
    grid.add_row("file", source)
    studies = (
        f"{_plural(view.studies, 'row')}: {view.audited:,} audited, {view.invalid:,} not audited"
    )
    if view.blank_rows:
        studies += f"; {_plural(view.blank_rows, 'blank row')} skipped"
    grid.add_row("studies", studies)
    files = "bundled" + "".join(f" + {f}" for f in view.rule_files)
    rules = f"{view.rules_in_force} in force ({files})"
    if view.waiting:
        rules += f", of which {len(view.waiting)} waiting for metrics not computed yet"
    if view.disabled:
        rules += "; switched off: " + ", ".join(view.disabled)
    grid.add_row("rules", rules)
    grid.add_row(
        "defaults",
        "alpha 0.05, two-sided, target power 0.80, one comparison — where a row leaves them blank",
    )
    if fail_on:
        grid.add_row("exit status", f"1 if any finding is {fail_on} or more severe")
    for i, note in enumerate(view.input_notes):
        grid.add_row("input" if i == 0 else "", note)
    console.print(Padding(grid, (0, 0, 0, 1)))


def _render_portfolio(view: Overview, console: Console) -> None:
    _section(console, "Portfolio")
    _subheading(
        console,
        "Design-based power at the planned effect",
        f"{view.power_known:,} of {view.audited:,} audited studies",
    )
    if view.power_quartiles is not None:
        q1, med, q3 = view.power_quartiles
        share = view.at_target / view.power_known
        console.print(
            Padding(
                f"median {med:.2f}, middle half {q1:.2f} – {q3:.2f}; "
                f"{view.at_target:,} of {view.power_known:,} ({share:.0%}) reach their own target",
                (0, 1, 0, 3),
            )
        )
        top = max(c for _, c in view.power_bands) or 1
        bands = Table.grid(padding=(0, 2))
        bands.add_column(no_wrap=True)
        bands.add_column(justify="right", no_wrap=True)
        bands.add_column(no_wrap=True, overflow="crop")
        for label, count in view.power_bands:
            bar = "█" * math.ceil(_BAR_WIDTH * count / top) if count else ""
            bands.add_row(label, f"{count:,}", Text(bar, style="audit.bar"))
        console.print(Padding(bands, (0, 0, 0, 3)))
    if view.basis_line:
        console.print(Padding(view.basis_line, (0, 1, 0, 3)))
    if view.reference_line:
        console.print(Padding(view.reference_line, (0, 1, 0, 3)))
    console.print()
    _subheading(console, "Standardized MDE", "at the target power, in each design's standard units")
    if view.mde_rows:
        mde = Table(box=None, padding=(0, 1), pad_edge=False, header_style="audit.label")
        for name, justify in (
            ("design", "left"),
            ("unit", "left"),
            ("studies", "right"),
            ("median", "right"),
            ("middle half", "right"),
        ):
            mde.add_column(name, justify=justify, no_wrap=True)
        for name, unit, count, med, q1, q3 in view.mde_rows:
            mde.add_row(
                name,
                unit,
                f"{count:,}",
                format_number(med),
                f"{format_number(q1)} – {format_number(q3)}",
            )
        console.print(Padding(mde, (0, 0, 0, 3)))
    else:
        console.print("   none computed")
    console.print()
    if view.results_lines:
        _subheading(console, "Reported results")
        for line in view.results_lines:
            console.print(Padding(line, (0, 1, 0, 3)))
        console.print()
    _subheading(console, "Findings by rule")
    counts = Table(box=None, padding=(0, 1), pad_edge=False, header_style="audit.label")
    counts.add_column("rule", no_wrap=True)
    counts.add_column("severity", no_wrap=True)
    counts.add_column("studies", justify="right", no_wrap=True)
    counts.add_column("judged", justify="right", no_wrap=True)
    for rc in view.rule_counts:
        if rc.state == "active":
            cell = Text(f"{rc.studies:,}")
            judged = Text("" if rc.judged is None else f"{rc.judged:,}")
        else:
            cell = Text(rc.state.split(" ")[0], style="audit.waiting")
            judged = Text("")
        counts.add_row(rc.rule, _severity(rc.severity), cell, judged)
    console.print(Padding(counts, (0, 0, 0, 3)))
    console.print(
        Padding(
            Text(
                "judged: audited studies on which the rule's condition could be decided (the "
                "others lack a value it needs, such as a planned effect or a SESOI)",
                "audit.muted",
            ),
            (0, 1, 0, 3),
        )
    )
    waiting = [rc for rc in view.rule_counts if rc.state.startswith("waiting")]
    if waiting:
        needs = "; ".join(
            f"{rc.rule} needs {rc.state.removeprefix('waiting for ')}" for rc in waiting
        )
        console.print(
            Padding(
                Text(
                    f"waiting: metrics this version does not compute yet ({needs})", "audit.muted"
                ),
                (0, 1, 0, 3),
            )
        )
    worst = " · ".join(f"{s} {c:,}" for s, c in view.by_worst.items())
    console.print(
        Padding(Text(f"audited studies by their most severe finding: {worst}"), (0, 1, 0, 3))
    )


def _render_families(view: Overview, console: Console, references: str) -> None:
    """The outcome families: each one's pooled estimate (± its SE, on its analysis scale), the
    median power of its studies at it and at the reference effects, and remarks (why a family
    was not pooled, its own test of excess significance)."""
    if not view.families:
        return
    _section(console, f"Outcome families ({len(view.families):,})")
    shown = view.families[:MAX_LISTED]
    if console.width < NARROW:
        for f in shown:
            pooled = (
                f"pooled {f.pooled} ({f.scale}) · power at it {f.median_power}"
                if f.pooled != "-"
                else "not pooled"
            )
            line = Text.assemble(
                (f.name, "audit.header"),
                f" · {_plural(f.studies, 'study', 'studies')} · {pooled} · at {references} "
                f"{f.reference}",
            )
            console.print(Padding(line, (0, 1, 0, 3)))
    table = Table(box=None, padding=(0, 1), pad_edge=False, header_style="audit.label")
    table.add_column("family", min_width=10, ratio=3)
    table.add_column("studies", justify="right", no_wrap=True)
    table.add_column("pooled", justify="right", no_wrap=True)
    table.add_column("scale", min_width=10, ratio=3)
    table.add_column("at pooled", justify="right", no_wrap=True)
    table.add_column(f"at {references}", justify="right", no_wrap=True)
    for f in shown:
        table.add_row(f.name, f"{f.studies:,}", f.pooled, f.scale, f.median_power, f.reference)
    if console.width >= NARROW:
        console.print(Padding(table, (0, 0, 0, 3)))
    if len(view.families) > len(shown):
        console.print(
            Text(
                f"   {len(view.families) - len(shown):,} more families are not listed; "
                "the JSON export (portfolio.families) holds them all.",
                style="audit.muted",
            )
        )
    console.print(
        Padding(
            Text(
                "pooled: estimate ± SE on the family's analysis scale; at pooled, at 0.2/...: "
                "median design-based power of its studies at the pooled estimate and at the "
                "reference effects (standardized units)",
                "audit.muted",
            ),
            (0, 1, 0, 3),
        )
    )
    for f in shown:
        for remark in f.remarks:
            line = Text.assemble((f.name, "audit.header"), f": {remark}")
            console.print(Padding(line, (0, 1, 0, 3)))
    untested = [f for f in view.families if not f.tested and f.median_power != "-"]
    if untested:
        console.print(
            Padding(
                Text(
                    f"{_plural(len(untested), 'pooled family', 'pooled families')} not tested "
                    "for excess significance: too few studies with both a result and a power",
                    "audit.muted",
                ),
                (0, 1, 0, 3),
            )
        )


def _render_flagged(view: Overview, console: Console) -> None:
    shown = len(view.flagged)
    title = f"Studies with findings ({view.flagged_total:,}), most severe first"
    _section(console, title)
    widths = _flagged_widths(view.flagged, console.width)
    if not view.flagged:
        console.print(" none")
    elif console.width < NARROW or widths is None:
        _render_flagged_stacked(view.flagged, console)
    else:
        table = Table(
            show_lines=True,
            header_style="audit.header",
            pad_edge=False,
            expand=True,
        )
        # Widths set here, not by ratios (rich's ratios override minimum widths): each column
        # holds its longest unbreakable piece (a design name, a number with its unit), so that
        # nothing is cut to an ellipsis or split.
        study_w, keys_w, findings_w = widths
        table.add_column("study", no_wrap=True, width=study_w)
        table.add_column("key numbers", width=keys_w, overflow="fold")
        table.add_column("findings", width=findings_w, overflow="fold")
        for entry in view.flagged:
            study = Text(entry.study_id, style="audit.rule_id")
            study.append(f"\nrow {entry.row}\n{entry.design}", style="audit.muted")
            lines = Text()
            for i, (severity, rule, message) in enumerate(entry.findings):
                if i:
                    lines.append("\n")
                lines.append(severity, style=f"audit.severity.{severity}")
                lines.append(f" {rule}", style="audit.rule_id")
                lines.append(f"\n{message}")
            table.add_row(study, "\n".join(entry.key_numbers), lines)
        console.print(table)
    if view.flagged_total > shown:
        console.print(
            Text(
                f" {view.flagged_total - shown:,} more studies with findings are not "
                "listed; the --json and --csv exports hold every study.",
                style="audit.muted",
            )
        )
    if view.clean_total:
        more = (
            f" and {view.clean_total - len(view.clean_ids)} more"
            if view.clean_total > len(view.clean_ids)
            else ""
        )
        console.print(
            f" No findings for {_plural(view.clean_total, 'audited study', 'audited studies')}: "
            f"{', '.join(view.clean_ids)}{more}."
        )


#: Borders and padding of the three-column findings table: four rules and a space on each
#: inner side of a rule (the outer edges have no padding).
_FLAGGED_CHROME = 4 + 4


def _longest_word(texts: Iterable[str]) -> int:
    return max((len(word) for text in texts for word in text.split()), default=0)


def _flagged_widths(entries: list[StudyEntry], width: int) -> tuple[int, int, int] | None:
    """Content widths of the findings table's columns at a terminal ``width`` that cut
    nothing — the study column holds each id, row and design name whole, the others their
    longest word — the room left shared 2:5; None where the table cannot give that."""
    study = max(
        (len(t) for e in entries for t in (e.study_id, f"row {e.row}", e.design)), default=0
    )
    keys = max(_longest_word(t for e in entries for t in e.key_numbers), 12)
    texts = (t for e in entries for sev, rule, msg in e.findings for t in (f"{sev} {rule}", msg))
    findings = max(_longest_word(texts), 20)
    study = max(study, 8)
    rest = width - _FLAGGED_CHROME - study
    if rest < keys + findings:
        return None
    keys = max(keys, min(rest - findings, round(rest * 2 / 7)))
    return study, keys, rest - keys


def _render_flagged_stacked(entries: list[StudyEntry], console: Console) -> None:
    """Studies with findings one under the other, for terminals too narrow for the table."""
    for entry in entries:
        head = Text(entry.study_id, style="audit.rule_id")
        head.append(f" · row {entry.row} · {entry.design}", style="audit.muted")
        console.print(Padding(head, (1, 1, 0, 1)))
        console.print(Padding(Text(" · ".join(entry.key_numbers)), (0, 1, 0, 3)))
        for severity, rule, message in entry.findings:
            console.print(
                Padding(
                    Text.assemble(_severity(severity), " ", (rule, "audit.rule_id")),
                    (0, 1, 0, 3),
                )
            )
            console.print(Padding(Text(message), (0, 1, 0, 5)))
    console.print()


def _render_invalid(view: Overview, console: Console) -> None:
    if not view.invalid:
        return
    _section(console, f"Rows not audited ({view.invalid:,})")
    table = Table(box=None, padding=(0, 2), pad_edge=False, header_style="audit.label")
    table.add_column("row", justify="right", no_wrap=True)
    table.add_column("study", no_wrap=True)
    table.add_column("why", overflow="fold")
    for row, study_id, reasons in view.invalid_rows:
        table.add_row(
            str(row),
            Text(study_id or "(no study_id)", style="audit.invalid"),
            "\n".join(reasons),
        )
    console.print(Padding(table, (0, 0, 0, 1)))
    if view.invalid > len(view.invalid_rows):
        console.print(
            Text(
                f" {view.invalid - len(view.invalid_rows):,} more rows not audited; "
                "the exports list them all with their errors.",
                style="audit.muted",
            )
        )


def _render_problems(view: Overview, console: Console) -> None:
    if not view.problems:
        return
    _section(console, "Rules that could not be evaluated")
    for rule, severity, problem in view.problems:
        console.print(
            Text.assemble(
                " ",
                (rule, "audit.rule_id"),
                f" ({severity}): {problem}. ",
                (
                    "Its studies were not checked; the run treats it as a finding of its "
                    "severity for --fail-on.",
                    "audit.muted",
                ),
            )
        )


def _render_groups(result: AuditResult, console: Console) -> None:
    """The portfolio summary per value of each ``--group-by`` column (``result.groups``, from
    :func:`audit.portfolio.group_summaries`): one line per value, at most ``MAX_LISTED``."""
    headers = dict(zip(result.groups, result.settings.get("group_by", []), strict=False))
    for column, groups in result.groups.items():
        _section(console, f"By {headers.get(column, column)} ({_plural(len(groups), 'group')})")
        table = Table(box=None, padding=(0, 1), pad_edge=False, header_style="audit.label")
        longest = max((len(v) for v in groups), default=1)
        table.add_column(headers.get(column, column), overflow="fold", min_width=min(longest, 26))
        for name in ("studies", "audited", "power", "at target", "serious", "warning"):
            table.add_column(name, justify="right", no_wrap=True)
        tested = []
        for value, g in list(groups.items())[:MAX_LISTED]:
            excess = g.get("excess_significance")
            worst = g["studies_by_worst_finding"]
            median = g["median_power_at_planned_effect"]
            table.add_row(
                Text(value, style="audit.muted" if value == BLANK_GROUP else ""),
                f"{g['studies']:,}",
                f"{g['audited']:,}",
                "-" if median is None else f"{median:.2f}",
                _pct(g["share_at_target_power"]),
                f"{worst['serious']:,}",
                f"{worst['warning']:,}",
            )
            if excess:
                tested.append(
                    f"{value}: {_plural(excess['observed'], 'significant result')} against "
                    f"{excess['expected']:.1f} expected, one-sided p = "
                    f"{format_number(excess['p_value'])}"
                )
        console.print(Padding(table, (0, 0, 0, 1)))
        if len(groups) > MAX_LISTED:
            console.print(
                Padding(
                    Text(
                        f"{len(groups) - MAX_LISTED:,} more groups in the JSON, HTML and "
                        "workbook exports",
                        "audit.muted",
                    ),
                    (0, 1, 0, 1),
                )
            )
        if tested:
            console.print(
                Padding("excess significance within a group: " + "; ".join(tested), (0, 1, 0, 1))
            )
        console.print(
            Padding(
                Text(
                    "power: median design-based power at the planned effect; at target: share "
                    "of those studies at their own target; serious / warning: audited studies "
                    "by their most severe finding",
                    "audit.muted",
                ),
                (0, 1, 0, 1),
            )
        )


def _render_caveats(result: AuditResult, console: Console) -> None:
    """The closing section: the caveats that apply to this audit (see :mod:`audit.caveats`)."""
    _section(console, "Reading these results")
    for i, caveat in enumerate(result.caveats):
        top = 1 if i else 0
        console.print(
            Padding(
                Text.assemble((caveat["title"], "audit.header"), " ", caveat["text"]),
                (top, 1, 0, 1),
            )
        )


def terminal_safe(result: AuditResult) -> AuditResult:
    """A copy of ``result`` whose user values (cells, errors, notes, messages, settings, rule
    texts) hold no escape sequence or control character (:mod:`audit.terminal`), for the
    renderers that print to a terminal. The frames are copied only where a column needs it."""
    return replace(
        result,
        table=clean_frame(result.table),
        errors=clean_frame(result.errors),
        notes=clean_frame(result.notes),
        findings=clean_frame(result.findings),
        rule_problems=clean_frame(result.rule_problems),
        portfolio=clean_value(result.portfolio),
        settings=clean_value(result.settings),
        rules=[_safe_rule(r) for r in result.rules],
    )


def _safe_rule(rule: Rule) -> Rule:
    texts = {"title": rule.title, "rationale": rule.rationale, "source": rule.source}
    cleaned = {k: clean_value(v) for k, v in texts.items()}
    references = clean_value(rule.references)
    if cleaned == texts and references == rule.references:
        return rule
    return replace(rule, references=references, **cleaned)


def render_report(
    result: AuditResult,
    console: Console,
    *,
    fail_on: str | None = None,
    limit: int = MAX_LISTED,
) -> None:
    """The full report: header, portfolio, studies with findings, rows not audited, caveats."""
    result = terminal_safe(result)
    view = build_overview(result, limit=limit)
    _render_header(view, console, fail_on)
    _render_portfolio(view, console)
    effects = result.settings.get("reference_effects") or []
    _render_families(view, console, "/".join(f"{e:g}" for e in effects) or "reference")
    _render_groups(result, console)
    _render_problems(view, console)
    _render_flagged(view, console)
    _render_invalid(view, console)
    _render_caveats(result, console)


# -- one study in depth ---------------------------------------------------------------------------


def planned_realized_pairs() -> list[tuple[str, str, str]]:
    """(label, planned column, realized column) for every planned/realized pair of the input,
    as the study view and the HTML report show them."""
    names = {c.name: c for c in COLUMNS}
    out = []
    for c in COLUMNS:
        if c.name.startswith("planned_"):
            key = c.name.removeprefix("planned_")
            if f"realized_{key}" in names:
                label = key.replace("_", " ")
                out.append((PAIR_LABELS.get(label, label), c.name, f"realized_{key}"))
    return out


def pair_ratio(planned: object, realized: object) -> str:
    """realized / planned as shown beside a pair; blank unless both are numbers."""
    if isinstance(planned, float) and isinstance(realized, float):
        if planned and math.isfinite(planned * realized):
            return format_number(realized / planned)
    return ""


PAIR_LABELS = {
    "n1": "size, group 1",
    "n2": "size, group 2",
    "sd": "outcome SD",
    "p1": "control proportion",
    "icc": "ICC",
    "cluster size": "mean cluster size",
    "events": "events",
    "se": "standard error",
    "p2": "intervention proportion",
    "rate1": "control event rate",
}
EFFECT_COLUMNS = (
    "planned_effect",
    "sesoi",
    "planned_p1",
    "planned_p2",
    "effect_scale",
    "planned_rate1",
    "planned_rate2",
    "exposure",
    "dispersion",
    "periods",
    "period_correlation",
)
RESULT_COLUMNS = (
    "observed_effect",
    "observed_se",
    "observed_ci_low",
    "observed_ci_high",
    "observed_p",
    "reported_power",
    "observed_events1",
    "observed_events2",
)


def plan_reproduction(result: AuditResult, pos: int) -> str:
    """Which published method reproduces the study's planned size, in a sentence ('' where
    the calculation could not be redone): laid out from plan_reproduced_by and its kin."""
    m = result.metrics.iloc[pos]
    closest = m.get("plan_closest_method")
    required = m.get("n_required_closest", np.nan)
    discrepancy = m.get("plan_discrepancy_closest", np.nan)
    if not isinstance(closest, str) or not math.isfinite(required):
        return ""
    planned = format_number(round(required * (1.0 + discrepancy)))
    dropout = result.table["planned_dropout"].iat[pos] if "planned_dropout" in result.table else 0
    allowance = (
        f" with the stated {dropout:.0%} dropout allowance"
        if isinstance(dropout, float) and dropout > 0
        else ""
    )
    needs = f"{format_number(required)} units for the target power{allowance}"
    by = m.get("plan_reproduced_by")
    if isinstance(by, str):
        return f"reproduced by {by}: {needs}, planned {planned} ({discrepancy:+.1%})"
    tolerance = result.settings.get("plan_reproduction_tolerance")
    within = f" within {tolerance:.0%}" if isinstance(tolerance, float) else ""
    return (
        f"not reproduced{within} by any listed method; the closest, {closest}, requires "
        f"{needs}, planned {planned} ({discrepancy:+.1%})"
    )


def _cell(value: object) -> str:
    if value is None:
        return ""
    if isinstance(value, (float, np.floating)):
        return "" if math.isnan(value) else format_number(float(value))
    return str(value)


def _not_applicable(result: AuditResult, pos: int) -> set[str]:
    """Metrics the study's notes declare not applicable to its design."""
    out: set[str] = set()
    for text in result.notes.loc[result.notes["pos"] == pos, "text"]:
        if text.startswith("not applicable to "):
            out.update(text.split(": ", 1)[1].split(", "))
        elif ": not applicable" in text:
            out.add(text.split(":", 1)[0])
    return out


def render_study(result: AuditResult, console: Console, positions: Sequence[int]) -> None:
    """One study in depth: planned versus realized, every metric with its meaning, each finding
    with its rationale, and the notes on what could not be computed."""
    result = terminal_safe(result)
    rules = {r.id: r for r in result.rules}
    meanings = {**known_columns(), **CONTRACT_METRICS, **METRICS}
    errors = result.error_texts()
    notes = result.by_row(result.notes, "text")
    for pos in positions:
        row = result.table.iloc[pos]
        sid = _text(row["study_id"])
        console.print(Text(f"study-audit: study {sid}", style="audit.title"))
        grid = _grid()
        grid.add_row("file", f"{result.settings.get('source', '')}, row {int(row['_row'])}")
        if _text(row.get("title")):
            grid.add_row("title", _text(row["title"]))
        design = design_of(result.table, pos)
        grid.add_row(
            "design",
            _text(row["design"]) + (f" — {design.title}" if design is not None else ""),
        )
        if design is not None and design.measure is not None:
            grid.add_row("effects", f"{design.measure.replace('_', ' ')}: {design.effect_unit}")
        sides = "one-sided" if float(row["sides"]) == 1.0 else "two-sided"
        grid.add_row(
            "test",
            f"alpha {_cell(row['alpha'])} {sides}, {_cell(row['comparisons'])} comparison(s), "
            f"target power {_cell(row['target_power'])}",
        )
        if row.get("hypothesis") in ("non_inferiority", "equivalence"):
            shown = (
                f"non-inferiority, margin {_cell(row['margin'])} (one-sided test at alpha; "
                f"interval at {1 - 2 * float(row['alpha']):.0%})"
                if row["hypothesis"] == "non_inferiority"
                else f"equivalence, margin ±{_cell(row['margin'])} (two one-sided tests at "
                f"alpha; interval at {1 - 2 * float(row['alpha']):.0%})"
            )
            grid.add_row("hypothesis", shown)
        study_findings = result.findings[result.findings["pos"] == pos]
        status = str(result.status[pos])
        if status == "audited":
            status += f", {_plural(len(study_findings), 'finding')}"
        grid.add_row("status", status)
        console.print(Padding(grid, (0, 0, 0, 1)))

        if status.startswith("invalid"):
            _section(console, "Why this row was not audited")
            for text in errors[pos]:
                console.print(f" - {text}")
            console.print()
            continue

        _section(console, "Planned versus realized")
        table = Table(box=None, padding=(0, 2), pad_edge=False, header_style="audit.label")
        table.add_column("quantity", no_wrap=True)
        for name in ("planned", "realized", "realized / planned"):
            table.add_column(name, justify="right", no_wrap=True)
        for label, planned, realized in planned_realized_pairs():
            a, b = row.get(planned), row.get(realized)
            if _cell(a) == "" and _cell(b) == "":
                continue
            table.add_row(label, _cell(a), _cell(b), pair_ratio(a, b))
        console.print(Padding(table, (0, 0, 0, 1)))
        effects = [f"{c} {_cell(row[c])}" for c in EFFECT_COLUMNS if _cell(row.get(c)) != ""]
        if effects:
            console.print(" effects: " + ", ".join(effects))
        reported = [f"{c} {_cell(row[c])}" for c in RESULT_COLUMNS if _cell(row.get(c)) != ""]
        if reported:
            console.print(" reported result: " + ", ".join(reported))
        reproduction = plan_reproduction(result, pos)
        if reproduction:
            console.print(Padding(Text("sample size: " + reproduction), (0, 1, 0, 1)))

        _section(console, "Metrics")
        metrics = Table(box=None, padding=(0, 2), pad_edge=False, header_style="audit.label")
        metrics.add_column("metric", no_wrap=True)
        # Long texts (a method's name, reported_p_recomputed_from) wrap within the column
        # rather than squeeze the meanings.
        metrics.add_column("value", justify="right", max_width=24, overflow="fold")
        metrics.add_column("meaning", overflow="fold")
        not_applicable = _not_applicable(result, pos)
        for name in result.metrics.columns:
            value = result.metrics[name].iat[pos]
            if name in not_applicable and not _cell(value):
                continue  # defined for other designs only; the notes list them
            metrics.add_row(name, _cell(value) or "-", meanings.get(name, _meaning(name)))
        console.print(Padding(metrics, (0, 0, 0, 1)))

        _section(console, "Findings")
        if not len(study_findings):
            console.print(" none")
        ranks = study_findings["severity"].map(SEVERITY_RANK).to_numpy()
        for _, finding in study_findings.iloc[np.argsort(-ranks, kind="stable")].iterrows():
            rule = rules.get(finding["rule"])
            heading = Text.assemble(
                _severity(finding["severity"]),
                " ",
                (finding["rule"], "audit.rule_id"),
                (f" — {rule.title}" if rule else ""),
            )
            console.print(Padding(heading, (0, 1, 0, 1)))
            body = [Text(str(finding["message"]))]
            if rule is not None:
                body.append(Text.assemble(("Why: ", "audit.label"), _paragraph(rule.rationale)))
                body.extend(Text(f"- {ref}", style="audit.muted") for ref in rule.references)
            console.print(Padding(Group(*body), (0, 1, 1, 3)))

        if notes[pos]:
            _section(console, "Notes")
            for text in notes[pos]:
                console.print(Padding(Text(f"- {text}"), (0, 1, 0, 1)))
        console.print()
    console.print(
        Text(
            "The audit supports, and does not replace, the judgment of a qualified statistician.",
            style="audit.muted",
        )
    )


def _meaning(name: str) -> str:
    """The meaning of a metric column not in :data:`METRICS` (power at a reference effect)."""
    if name.startswith(REFERENCE_PREFIX):
        effect = name.removeprefix(REFERENCE_PREFIX)
        return (
            f"design-based power of the realized design at the standardized effect {effect} "
            "(in the design's standardized unit: d, d_z, h, r, f, f2 or log hazard ratio)"
        )
    return ""


def _paragraph(text: str) -> str:
    """A TOML multi-line paragraph as one flowing line (rich wraps it to the width)."""
    return " ".join(text.split())


# -- rules ----------------------------------------------------------------------------------------


def _rule_state(rule: Rule) -> str:
    if not rule.enabled:
        return "switched off"
    missing = rule.missing(known_columns().keys() - CONTRACT_METRICS.keys() | METRICS.keys())
    own = rule.own_columns()
    state = "waits for " + ", ".join(missing) if missing else "active"
    if own:
        state += "; reads the file's own column " + ", ".join(own)
    return state


def _source_label(source: str) -> str:
    """Bundled rule files by their name in the rules folder; a user's file as given."""
    from audit.rules import default_rule_files

    bundled = {str(p): p.name for p in default_rule_files()}
    return f"rules/{bundled[source]} (bundled)" if source in bundled else source


def render_rules(ruleset: RuleSet, console: Console) -> None:
    """The list of rules: id, severity, what it flags, whether it can fire in this version."""
    files = "bundled" + "".join(f" + {f}" for f in ruleset.files)
    console.print(Text(f"study-audit rules ({len(ruleset)}; {files})", style="audit.title"))
    table = Table(box=None, padding=(0, 2), pad_edge=False, header_style="audit.label")
    table.add_column("rule", no_wrap=True, style="audit.rule_id")
    table.add_column("severity", no_wrap=True)
    table.add_column("flags a study when", overflow="fold")
    for rule in map(_safe_rule, ruleset.rules.values()):
        state = _rule_state(rule)
        what = Text(rule.title)
        if state != "active":
            what.append(f" ({state})", style="audit.waiting")
        table.add_row(rule.id, _severity(rule.severity), what)
    console.print(table)
    console.print(
        Text(
            "study-audit rules ID shows a rule in full: its condition, parameters, "
            "rationale and references.",
            style="audit.muted",
        )
    )


def render_rule(rule: Rule, console: Console) -> None:
    """One rule in full: its definition is its documentation."""
    rule = _safe_rule(rule)
    console.print(Text.assemble((rule.id, "audit.title"), "  ", _severity(rule.severity)))
    console.print(rule.title)
    grid = _grid()
    grid.add_row("flags when", rule.condition_text())
    grid.add_row("message", Text(clean(rule.message.text)))
    if rule.supersedes:
        grid.add_row("replaces", ", ".join(rule.supersedes) + " on the studies it flags")
    grid.add_row("state", _rule_state(rule))
    grid.add_row("defined in", _source_label(rule.source))
    if rule.overridden_by:
        grid.add_row("changed by", ", ".join(rule.overridden_by))
    console.print(Padding(grid, (1, 0, 0, 1)))
    _section(console, "Parameters")
    if rule.parameters:
        params = Table(box=None, padding=(0, 2), pad_edge=False, header_style="audit.label")
        params.add_column("name", no_wrap=True)
        params.add_column("value", justify="right", no_wrap=True)
        params.add_column("allowed", no_wrap=True)
        params.add_column("meaning", overflow="fold")
        for p in rule.parameters.values():
            params.add_row(
                p.name, format_number(p.value), f"{p.low:g} – {p.high:g}", Text(clean(p.meaning))
            )
        console.print(Padding(params, (0, 0, 0, 1)))
    else:
        console.print(" none")
    _section(console, "Why it matters")
    console.print(Padding(Text(_paragraph(rule.rationale)), (0, 1, 0, 1)))
    _section(console, "References")
    for ref in rule.references or ("none given",):
        console.print(Padding(Text(f"- {ref}"), (0, 1, 0, 1)))


# -- progress -------------------------------------------------------------------------------------


class StageBar:
    """A transient progress bar over the stages of a run, on the console it is given.

    Use as a context manager; call the instance with each stage name as the stage starts.
    """

    def __init__(self, console: Console, stages: Sequence[str]) -> None:
        self.stages = list(stages)
        self.progress = Progress(
            TextColumn("{task.description:<18}"),
            BarColumn(),
            TextColumn("{task.completed}/{task.total}"),
            TimeElapsedColumn(),
            console=console,
            transient=True,
        )
        self.task = self.progress.add_task("starting", total=len(self.stages))

    def __enter__(self) -> StageBar:
        self.progress.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.progress.stop()

    def __call__(self, stage: str) -> None:
        done = self.stages.index(stage) if stage in self.stages else None
        if done is None:
            self.progress.advance(self.task)
        else:
            self.progress.update(self.task, completed=done)
        self.progress.update(self.task, description=stage)


def study_ids_hint(result: AuditResult, n: int = 5) -> str:
    """A few study ids of the portfolio, for an error message about an unknown id."""
    ids = [str(v) for v in pd.Series(result.table["study_id"]).dropna().head(n)]
    return ", ".join(ids) + (", ..." if len(result.table) > n else "")
