"""Which input columns a design reads, and what a row fills that its design does not.

A column a row fills but its design does not read is never ignored silently (DESIGN.md 9.2): it
is named in a note, or is a row error where ignoring it would give a wrong answer — clustering
on an individually randomised design (its power would be far too high), covariate adjustment a
design cannot take, per-group sizes on a design that takes the whole sample in ``planned_n1``,
an effect measure or a standardized scale a design does not have. Each design declares what it
reads (:meth:`audit.designs.Design.inputs`).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from audit.designs import DESIGNS, Design
from audit.schema import COLUMNS, SPECS

__all__ = [
    "ADJUSTMENT_INPUTS",
    "CLUSTER_INPUTS",
    "column_rows",
    "designs_using",
    "filled",
    "ignored_errors",
    "ignored_notes",
]

#: Columns that describe clustering: read only by cluster designs. Elsewhere ignoring them would
#: give the power of an individually randomised trial, far too high (an error, not a note).
CLUSTER_INPUTS = frozenset(
    {
        "planned_icc",
        "realized_icc",
        "planned_cluster_size",
        "realized_cluster_size",
        "cluster_size_cv",
    }
)
#: Columns whose neglect would misstate the analysis (its residual variance or df).
ADJUSTMENT_INPUTS = frozenset({"covariates", "covariate_r2"})


def filled(rows: pd.DataFrame, name: str) -> np.ndarray:
    """Where a column holds a value that says something: given, and not its default."""
    if name not in rows.columns:
        return np.zeros(len(rows), dtype=bool)
    spec = SPECS.get(name)
    values = rows[name]
    if values.dtype.kind in "fiub":
        x = values.to_numpy(dtype=float, na_value=np.nan)
        if spec is not None and spec.kind == "flag":
            return x == 1.0  # "no" asks nothing of a design that has no such option
        given = np.isfinite(x)
        if spec is not None and isinstance(spec.default, float):
            given &= x != spec.default
        return given
    given = values.notna().to_numpy(dtype=bool).copy()
    if spec is not None and spec.default is not None:
        given &= (values != spec.default).to_numpy(dtype=bool, na_value=False)
    return given


def ignored_errors(design: Design, rows: pd.DataFrame) -> list[tuple[np.ndarray, str, str]]:
    """Filled columns the design cannot use and whose neglect would give a wrong result."""
    used = design.inputs()
    out = []
    cluster = ", ".join(n for n, d in DESIGNS.items() if CLUSTER_INPUTS <= d.inputs())
    adjusting = ", ".join(n for n, d in DESIGNS.items() if "covariate_r2" in d.inputs())
    for column in sorted((CLUSTER_INPUTS | ADJUSTMENT_INPUTS) - used):
        given = filled(rows, column)
        if column in CLUSTER_INPUTS:
            why = (
                f"is filled, but {design.name} assumes individual randomisation and would "
                f"ignore the clustering (its power would be far too high): use a cluster "
                f"design ({cluster}) or leave the clustering columns blank"
            )
        else:
            why = (
                f"is filled, but {design.name} cannot take covariate adjustment and would "
                f"ignore it: leave covariates and covariate_r2 blank (power then refers to "
                f"the unadjusted analysis), use a design that adjusts ({adjusting}), or "
                "give the adjusted standard error with the estimate design"
            )
        out.append((given, column, why))
    if design.one_group:
        for column in ("planned_n2", "realized_n2"):
            out.append(
                (
                    filled(rows, column),
                    column,
                    f"is filled, but {design.name} takes the whole sample in "
                    f"{column.replace('n2', 'n1')} (N, not per group): put the total there "
                    "and leave this column blank",
                )
            )
    if "effect_measure" not in used and "effect_measure" in rows.columns:
        out.append(
            (
                filled(rows, "effect_measure"),
                "effect_measure",
                f"is filled, but {design.name} has effects in one unit only "
                f"({design.effect_unit}): leave effect_measure blank and give effects in that "
                "unit, or use a design that takes the measure",
            )
        )
    if "effect_scale" not in used:
        scale = rows["effect_scale"] if "effect_scale" in rows.columns else None
        if scale is not None:
            d = (scale == "d").to_numpy(dtype=bool, na_value=False)
            out.append(
                (
                    d,
                    "effect_scale",
                    f"is 'd', but {design.name} has no standardized-mean-difference scale: "
                    f"give effects in its own unit ({design.effect_unit})",
                )
            )
    return out


def ignored_notes(design: Design, rows: pd.DataFrame) -> list[tuple[np.ndarray, np.ndarray]]:
    """``(mask, text)``: for each row, the filled columns this design does not read."""
    used = design.inputs() | CLUSTER_INPUTS | ADJUSTMENT_INPUTS | {"effect_scale", "effect_measure"}
    if design.one_group:
        used |= {"planned_n2", "realized_n2"}
    parts = [
        (filled(rows, c.name), c.name)
        for c in COLUMNS
        if c.name not in used and c.name in rows.columns
    ]
    if not parts:
        return []
    labels = np.full(len(rows), "", dtype=object)
    for mask, name in parts:
        if mask.any():
            sep = np.where(labels[mask] == "", "", ", ")
            labels[mask] = labels[mask] + sep + name
    hit = labels != ""
    text = (f"filled but not used by {design.name}, which ignores them: " + labels[hit]).astype(
        object
    )
    return [(hit, text)]


def designs_using(name: str) -> tuple[str, ...]:
    """The designs that read the input column ``name`` (in the order of ``DESIGNS``)."""
    return tuple(d for d, design in DESIGNS.items() if name in design.inputs())


def column_rows(design: str | None = None) -> list[tuple[str, str, str, str]]:
    """The input columns as ``study-audit columns`` lists them: name, meaning (with the values
    allowed and the default), and the designs that read the column ("all" where every one
    does), in the order of :data:`audit.schema.COLUMNS` — the same specs that validate input.

    ``design`` keeps only the columns that design reads.
    """
    every = tuple(DESIGNS)
    rows = []
    for column in COLUMNS:
        users = designs_using(column.name)
        if design is not None and design not in users:
            continue
        allowed = "text" if column.kind == "text" else column.range_text()
        meaning = f"{column.meaning} Values: {allowed}"
        if column.default not in (None, ""):
            default = column.default
            meaning += (
                f"; blank means {default:g}"
                if isinstance(default, float)
                else (f"; blank means {default}")
            )
        others = [d for d in every if d not in users]
        if not others:
            users_text = "all"
        elif len(others) <= 2 and len(users) > len(others):
            users_text = "all but " + ", ".join(others)
        else:
            users_text = ", ".join(users) or "none"
        rows.append((column.name, column.group, meaning + ".", users_text))
    return rows
