"""A blank, documented input workbook: ``study-audit template OUT.xlsx``.

Sheets: ``studies`` (the input sheet, first so that ``check`` reads it: grouped headers, drop-down
lists, range checks), ``guide`` (every column explained: group, meaning, allowed values, which
designs use it) and ``examples`` (one filled, invented example row per design, auditable with
``--sheet examples``).
"""

from __future__ import annotations

from pathlib import Path

from openpyxl import Workbook
from openpyxl.comments import Comment
from openpyxl.styles import Alignment, Font, PatternFill
from openpyxl.utils import get_column_letter
from openpyxl.worksheet.datavalidation import DataValidation

from audit.designs import DESIGNS
from audit.export import atomic_output
from audit.schema import COLUMNS, Column

__all__ = ["EXAMPLES", "GROUPS", "write_template"]

#: Column groups in sheet order, with their heading and a pale fill (readable in grey print).
GROUPS: dict[str, tuple[str, str]] = {
    "identity": ("Identity", "E8EEF4"),
    "test": ("Test settings", "EEF2E6"),
    "sizes": ("Sizes", "F6EFE2"),
    "variability": ("Variability", "F1E8F1"),
    "effects": ("Effects", "E6F1F0"),
    "results": ("Results", "F3EDE4"),
}

#: Rows of the input sheet that carry drop-downs and range checks.
_CHECKED_ROWS = 5000

#: One invented example per design (a fictional funder's completed studies).
EXAMPLES: tuple[dict[str, object], ...] = (
    {"study_id": "EX-01", "title": "Sleep hygiene course and insomnia score", "design":
     "two_means", "alpha": 0.05, "sides": 2, "target_power": 0.8, "planned_n1": 64,
     "planned_n2": 64, "realized_n1": 55, "realized_n2": 57, "planned_sd": 6, "realized_sd": 7.1,
     "planned_effect": 3, "sesoi": 2, "observed_effect": 2.2, "observed_se": 1.3,
     "observed_p": 0.09},
    {"study_id": "EX-02", "title": "Standing desks and afternoon fatigue (crossover)", "design":
     "paired_means", "planned_n1": 30, "realized_n1": 27, "planned_sd": 10, "realized_sd": 12,
     "planned_effect": 5.5, "sesoi": 4},
    {"study_id": "EX-03", "title": "Mean commute time against the regional target", "design":
     "one_mean", "planned_n1": 50, "realized_n1": 48, "planned_sd": 12, "realized_sd": 11,
     "planned_effect": -5, "sesoi": 4},
    {"study_id": "EX-04", "title": "Text reminders and vaccination uptake", "design":
     "two_proportions", "planned_n1": 220, "planned_n2": 220, "realized_n1": 205,
     "realized_n2": 210, "planned_p1": 0.4, "planned_p2": 0.53, "realized_p1": 0.46,
     "sesoi": 0.1},
    {"study_id": "EX-05", "title": "Screen time and sleep onset latency", "design": "correlation",
     "planned_n1": 85, "realized_n1": 79, "planned_effect": 0.3, "sesoi": 0.2},
    {"study_id": "EX-06", "title": "Three feedback formats and essay grades", "design": "k_means",
     "groups": 3, "planned_n1": 159, "realized_n1": 150, "planned_effect": 0.25},
    {"study_id": "EX-07", "title": "Soil moisture predictors of yield (two tested terms)",
     "design": "regression", "predictors": 2, "covariates": 3, "planned_n1": 120,
     "realized_n1": 112, "planned_effect": 0.09},
    {"study_id": "EX-08", "title": "Classroom-randomised phonics programme", "design":
     "cluster_two_means", "planned_n1": 12, "planned_n2": 12, "realized_n1": 11,
     "realized_n2": 12, "planned_cluster_size": 25, "realized_cluster_size": 22,
     "planned_icc": 0.05, "realized_icc": 0.08, "cluster_size_cv": 0.3, "planned_sd": 15,
     "realized_sd": 15, "planned_effect": 6},
    {"study_id": "EX-09", "title": "Early mobilisation and time to discharge", "design":
     "survival", "planned_n1": 300, "planned_n2": 300, "realized_n1": 290, "realized_n2": 288,
     "planned_events": 380, "realized_events": 301, "planned_effect": 0.75, "sesoi": 0.85},
    {"study_id": "EX-10", "title": "Growth-curve slope difference from a mixed model", "design":
     "estimate", "planned_se": 0.04, "realized_se": 0.05, "df": 180, "planned_effect": 0.12,
     "sesoi": 0.08},
    {"study_id": "EX-11", "title": "Oral care protocol and ventilator pneumonia (odds ratio)",
     "design": "two_proportions", "effect_measure": "odds_ratio", "planned_n1": 420,
     "planned_n2": 420, "realized_n1": 401, "realized_n2": 398, "planned_p1": 0.18,
     "planned_effect": 0.6, "observed_events1": 70, "observed_events2": 49},
    {"study_id": "EX-12", "title": "School handwashing and illness absence (schools randomised)",
     "design": "cluster_two_proportions", "planned_n1": 16, "planned_n2": 16, "realized_n1": 15,
     "realized_n2": 16, "planned_cluster_size": 60, "planned_icc": 0.02, "realized_icc": 0.04,
     "planned_p1": 0.3, "planned_p2": 0.22},
    {"study_id": "EX-13", "title": "Balance classes and falls per resident-year", "design":
     "two_rates", "planned_n1": 250, "planned_n2": 250, "realized_n1": 231, "realized_n2": 228,
     "planned_rate1": 2.4, "planned_rate2": 1.8, "realized_rate1": 2.1, "exposure": 1,
     "dispersion": 0.8},
    {"study_id": "EX-14", "title": "Stimulation and gait speed (AB/BA crossover)", "design":
     "crossover", "planned_n1": 30, "realized_n1": 26, "planned_sd": 5.4, "realized_sd": 6.1,
     "planned_effect": 3},
    {"study_id": "EX-15", "title": "Two dressings on paired ulcers and healing", "design":
     "paired_proportions", "planned_n1": 150, "realized_n1": 138, "planned_p1": 0.1,
     "planned_p2": 0.22, "realized_p1": 0.13},
    {"study_id": "EX-16", "title": "Ward roll-out of a mobility programme (stepped wedge)",
     "design": "stepped_wedge", "planned_n1": 12, "realized_n1": 12, "periods": 5,
     "planned_cluster_size": 15, "planned_sd": 10, "planned_icc": 0.05, "realized_icc": 0.09,
     "planned_effect": 3},
)  # fmt: skip


def _ordered_columns() -> list[Column]:
    order = list(GROUPS)
    return sorted(COLUMNS, key=lambda c: order.index(c.group) if c.group in order else len(order))


#: Columns of non-inferiority and equivalence tests: used by the designs that can test them.
_MARGIN_COLUMNS = ("hypothesis", "margin", "control_effect")


def _designs_using(column: str) -> list[str]:
    """Designs that read ``column`` (each design's declared :meth:`Design.inputs`); the margin
    columns by the designs that test margins (for binary designs: the risk difference)."""
    if column in _MARGIN_COLUMNS:
        return [name for name, design in DESIGNS.items() if design.margin_support() is None]
    return [name for name, design in DESIGNS.items() if column in design.inputs()]


def _allowed(spec: Column) -> str:
    if spec.kind == "text":
        return "text"
    text = spec.range_text()
    if spec.proportion:
        text += "; 0.8 or 80%"
    if spec.default is not None:
        text += f"; blank = {spec.default}"
    return text


def _validation(spec: Column, cells: str) -> DataValidation | None:
    if spec.kind in ("design", "choice"):
        dv = DataValidation(
            type="list", formula1='"' + ",".join(spec.choices) + '"', allow_blank=True
        )
    elif spec.kind in ("number", "integer") and (spec.low is not None or spec.high is not None):
        kind = "whole" if spec.kind == "integer" else "decimal"
        if spec.low is not None and spec.high is not None:
            dv = DataValidation(
                type=kind,
                operator="between",
                formula1=f"{spec.low:g}",
                formula2=f"{spec.high:g}",
                allow_blank=True,
            )
        else:
            dv = DataValidation(
                type=kind, operator="greaterThanOrEqual", formula1=f"{spec.low:g}", allow_blank=True
            )
    else:
        return None
    dv.error = f"{spec.name} must be {spec.range_text()}."
    dv.errorTitle = f"Check {spec.name}"
    dv.prompt = spec.meaning
    dv.promptTitle = spec.name
    dv.showErrorMessage = True
    dv.showInputMessage = True
    dv.add(cells)
    return dv


def write_template(path: str | Path) -> None:
    """Write the blank input workbook to ``path`` (atomically)."""
    wb = Workbook()
    ws = wb.active
    ws.title = "studies"
    columns = _ordered_columns()
    bold = Font(bold=True)
    for j, spec in enumerate(columns, start=1):
        cell = ws.cell(row=1, column=j, value=spec.name)
        heading, colour = GROUPS.get(spec.group, (spec.group, "FFFFFF"))
        cell.font = bold
        cell.fill = PatternFill("solid", fgColor=colour)
        cell.comment = Comment(f"{heading}: {spec.meaning}", "study-audit")
        letter = get_column_letter(j)
        ws.column_dimensions[letter].width = max(12, len(spec.name) + 2)
        dv = _validation(spec, f"{letter}2:{letter}{_CHECKED_ROWS + 1}")
        if dv is not None:
            ws.add_data_validation(dv)
    ws.freeze_panes = "C2"

    guide = wb.create_sheet("guide")
    guide.append(["column", "group", "meaning", "allowed values", "used by designs"])
    for cell in guide[1]:
        cell.font = bold
    for spec in columns:
        heading, colour = GROUPS.get(spec.group, (spec.group, "FFFFFF"))
        using = _designs_using(spec.name)
        users = "all" if len(using) == len(DESIGNS) else ", ".join(using)
        guide.append([spec.name, heading, spec.meaning, _allowed(spec), users or "-"])
        guide.cell(row=guide.max_row, column=2).fill = PatternFill("solid", fgColor=colour)
    guide.append([])
    guide.append(
        [
            "design",
            "",
            "what it is",
            "effect unit",
            "standardized as",
            "non-inferiority, equivalence",
        ]
    )
    guide.cell(row=guide.max_row, column=1).font = bold
    for name, design in DESIGNS.items():
        why = design.margin_support()
        guide.append(
            [
                name,
                "",
                design.title,
                design.effect_unit,
                design.standardized_as or "-",
                "yes (hypothesis, margin)" if why is None else "no: " + why,
            ]
        )
    for letter, width in zip("ABCDEF", (24, 14, 70, 40, 40, 40), strict=True):
        guide.column_dimensions[letter].width = width
    for row in guide.iter_rows(min_row=2):
        for cell in row:
            cell.alignment = Alignment(wrap_text=True, vertical="top")

    examples = wb.create_sheet("examples")
    names = [c.name for c in columns]
    examples.append(names)
    for cell in examples[1]:
        cell.font = bold
    for example in EXAMPLES:
        if example["design"] in DESIGNS:
            examples.append([example.get(n) for n in names])
    examples.freeze_panes = "C2"

    with atomic_output(path, "wb") as handle:
        wb.save(handle)
