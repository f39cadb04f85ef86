"""Per-study metrics: apply each design's vectorised maths to its rows, one column per quantity.

Every metric that comes out null gets a note saying why: the input columns it needed that the row
left blank, or the condition that makes it undefined. Rows are processed one *design* at a time
(a handful of groups), never one row at a time.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from audit.designs import DESIGNS, Design, Scenario, TestSpec

__all__ = ["METRICS", "compute_metrics", "test_settings"]

#: Metric name -> meaning, in report order. Names are part of the output contract.
METRICS: dict[str, str] = {
    "plan_power": "power of the planned design at the planned effect",
    "n_required_plan": "units needed at the planned parameters for the target power "
    "(sum over groups, each rounded up)",
    "plan_discrepancy": "planned size / required size - 1 (does the stated calculation reproduce?)",
    "power_at_planned_effect": "design-based power of the realized design at the planned effect",
    "power_at_sesoi": "design-based power of the realized design at the SESOI",
    "mde": "minimal detectable effect at the target power with the realized design "
    "(effect units, in the planned direction)",
    "mde_std": "the MDE standardized (d, d_z, h, r, f, f2 or log hazard ratio by design)",
    "se_plan": "expected standard error of the estimate under the plan",
    "se_realized": "expected standard error of the estimate as realized",
    "precision_ratio": "se_plan / se_realized (below 1: less precise than planned)",
    "n_ratio": "realized / planned size",
    "sd_ratio": "realized / planned SD",
    "n_required_realized": "units needed had the realized nuisance parameters (SD, ICC, control "
    "rate) been used in planning",
    "power_if_planned_size": "power at the planned effect with the planned size but the realized "
    "nuisance parameters",
    "power_cost_nuisance": "plan_power - power_if_planned_size: power lost to nuisance parameters "
    "that differed from the plan",
    "power_cost_attrition": "power_if_planned_size - power_at_planned_effect: power lost to the "
    "size falling short of the plan",
    "icc_ratio": "realized / planned intracluster correlation (cluster designs)",
    "events_required_plan": "events needed at the planned hazard ratio for the target power "
    "(survival)",
    "events_ratio": "realized / planned number of events (survival)",
    "cluster_size_ratio": "realized / planned mean cluster size (cluster designs)",
}


@dataclass
class MetricTable:
    """Metric columns aligned with the validated table, and notes about null values."""

    values: pd.DataFrame
    notes: pd.DataFrame  # columns pos, text


def test_settings(rows: pd.DataFrame, design: Design) -> TestSpec:
    """The per-row test settings: Bonferroni alpha, sides, target power, planned direction."""
    alpha = rows["alpha"].to_numpy(dtype=float) / rows["comparisons"].to_numpy(dtype=float)
    effect = design.planned_effect(rows)
    direction = design.direction(effect)
    return TestSpec(
        alpha=alpha,
        sides=rows["sides"].to_numpy(dtype=float),
        power=rows["target_power"].to_numpy(dtype=float),
        direction=direction,
    )


class _Notes:
    """Collects (position, text) notes with vectorised string building."""

    def __init__(self) -> None:
        self.pos: list[np.ndarray] = []
        self.text: list[np.ndarray] = []

    def add(self, positions: np.ndarray, text: str | np.ndarray) -> None:
        positions = np.asarray(positions)
        if positions.size:
            self.pos.append(positions)
            self.text.append(np.broadcast_to(np.asarray(text, dtype=object), positions.shape))

    def frame(self) -> pd.DataFrame:
        if not self.pos:
            return pd.DataFrame({"pos": np.empty(0, dtype=int), "text": np.empty(0, dtype=object)})
        return pd.DataFrame({"pos": np.concatenate(self.pos), "text": np.concatenate(self.text)})


def _missing_labels(parts: list[tuple[np.ndarray, str]], size: int) -> np.ndarray:
    """Per row, the comma-joined labels whose mask is True ('' when none)."""
    merged: dict[str, np.ndarray] = {}
    for mask, label in parts:
        merged[label] = merged[label] | mask if label in merged else mask
    labels = np.full(size, "", dtype=object)
    for label, mask in merged.items():
        if mask.any():
            sep = np.where(labels[mask] == "", "", ", ")
            labels[mask] = labels[mask] + sep + label
    return labels


def _explain_nulls(
    notes: _Notes,
    positions: np.ndarray,
    metric: str,
    value: np.ndarray,
    inputs: list[tuple[np.ndarray, str]],
    conditions: list[tuple[np.ndarray, str]],
) -> None:
    """Note, for each null value, the blank inputs or else the first condition that explains it."""
    null = np.isnan(value)
    if not null.any():
        return
    labels = _missing_labels([(m & null, lab) for m, lab in inputs], len(value))
    has_missing = null & (labels != "")
    if has_missing.any():
        notes.add(
            positions[has_missing],
            metric + ": not computed, missing " + labels[has_missing],
        )
    rest = null & ~has_missing
    for mask, reason in conditions:
        hit = rest & mask
        notes.add(positions[hit], f"{metric}: {reason}")
        rest &= ~hit
    notes.add(positions[rest], f"{metric}: could not be computed from the values given")


def compute_metrics(table: pd.DataFrame, valid: np.ndarray) -> MetricTable:
    """Compute every metric for the valid rows of a validated table.

    Parameters
    ----------
    table : the ``table`` of :class:`audit.schema.Validated`.
    valid : which rows passed validation; other rows get null metrics and no notes.
    """
    n = len(table)
    values = pd.DataFrame(index=table.index)
    for name in METRICS:
        values[name] = np.full(n, np.nan)
    notes = _Notes()
    design_col = table["design"].to_numpy(dtype=object)
    for name, design in DESIGNS.items():
        mask = valid & (design_col == name)
        if not mask.any():
            continue
        positions = np.flatnonzero(mask)
        rows = table.iloc[positions]
        computed = _design_metrics(design, rows, positions, notes)
        for metric, arr in computed.items():
            if metric not in values.columns:
                values[metric] = np.full(n, np.nan)
            values.iloc[positions, values.columns.get_loc(metric)] = arr
    return MetricTable(values, notes.frame())


def _design_metrics(
    design: Design, rows: pd.DataFrame, positions: np.ndarray, notes: _Notes
) -> dict[str, np.ndarray]:
    test = test_settings(rows, design)
    plan = design.scenario(rows, "planned")
    real = design.scenario(rows, "realized")
    effect = design.planned_effect(rows)
    sesoi = design.orient(_col(rows, "sesoi"), test.direction)
    replan = design.replanned(plan, real)

    with np.errstate(divide="ignore", invalid="ignore"):
        out: dict[str, np.ndarray] = {}
        out["plan_power"] = design.power(plan, effect, test)
        out["n_required_plan"] = design.required_size(plan, effect, test)
        planned_total = design.total_size(plan)
        out["plan_discrepancy"] = planned_total / out["n_required_plan"] - 1.0
        out["power_at_planned_effect"] = design.power(real, effect, test)
        out["power_at_sesoi"] = design.power(real, sesoi, test)
        out["mde"] = design.mde(real, test)
        out["mde_std"] = design.standardize(real, out["mde"])
        out["se_plan"] = design.se(plan, effect)
        out["se_realized"] = design.se(real, effect)
        out["precision_ratio"] = out["se_plan"] / out["se_realized"]
        out["n_ratio"] = design.total_size(real) / planned_total
        for metric, (planned_col, realized_col) in design.ratio_keys.items():
            out[metric] = _col(rows, realized_col) / _col(rows, planned_col)
        # Without nuisance parameters to replace, the replanned design is the plan itself.
        same = replan.keys() == plan.keys() and all(replan[k] is plan[k] for k in plan)
        out["n_required_realized"] = (
            out["n_required_plan"] if same else design.required_size(replan, effect, test)
        )
        out["power_if_planned_size"] = design.power(replan, effect, test)
        out["power_cost_nuisance"] = out["plan_power"] - out["power_if_planned_size"]
        out["power_cost_attrition"] = out["power_if_planned_size"] - out["power_at_planned_effect"]
        out.update(design.extra_metrics(plan, real, effect, test))

    for metric, reason in design.not_applicable.items():
        out[metric] = np.full(len(rows), np.nan)
        notes.add(positions, f"{metric}: not applicable, {reason}")
    # Metrics defined only for other designs (events for survival, ICC for cluster trials): one
    # note lists them rather than one note each.
    foreign = [m for m in METRICS if m not in out]
    if foreign:
        notes.add(positions, f"not applicable to {design.name}: {', '.join(foreign)}")

    _note_nulls(design, rows, positions, notes, out, plan, real, effect, sesoi, test)
    for mask, text in design.fallback_notes(rows):
        notes.add(positions[np.asarray(mask, dtype=bool)], text)
    return out


def _col(rows: pd.DataFrame, name: str) -> np.ndarray:
    return rows[name].to_numpy(dtype=float) if name in rows.columns else np.full(len(rows), np.nan)


def _note_nulls(
    design: Design,
    rows: pd.DataFrame,
    positions: np.ndarray,
    notes: _Notes,
    out: dict[str, np.ndarray],
    plan: Scenario,
    real: Scenario,
    effect: np.ndarray,
    sesoi: np.ndarray,
    test: TestSpec,
) -> None:
    """Attach a reason to every null metric (skipping those declared not applicable)."""
    plan_src = design.sources("planned")
    real_src = design.sources("realized")

    def blank(sc: Scenario, src: dict[str, str], keys: tuple[str, ...] | None = None):
        keys = tuple(sc) if keys is None else keys
        return [(np.isnan(sc[k]), src[k]) for k in keys if k in src]

    no_sizes = tuple(k for k in plan if k in plan_src and k not in design.size_keys)
    eff_missing = (np.isnan(effect), design.effect_sources())
    sesoi_missing = (np.isnan(_col(rows, "sesoi")), "sesoi")
    weak_target = (test.power <= test.alpha, "the target power does not exceed alpha")
    zero_effect = (effect == 0, "the planned effect is zero, so no finite size reaches the target")
    unreachable = (np.ones(len(rows), dtype=bool), "the target power is not reachable")

    plan_all = blank(plan, plan_src)
    real_all = blank(real, real_src)
    replan = design.replanned(plan, real)
    replan_src = {**plan_src, **{k: real_src[k] for k in design.nuisance_keys}}
    replan_needs = blank(replan, replan_src, no_sizes)
    specs: dict[str, tuple[list, list]] = {
        "plan_power": ([*plan_all, eff_missing], []),
        "n_required_plan": (
            [*blank(plan, plan_src, no_sizes), eff_missing],
            [weak_target, zero_effect, unreachable],
        ),
        "plan_discrepancy": (
            [
                *blank(plan, plan_src, design.size_keys),
                *blank(plan, plan_src, no_sizes),
                eff_missing,
            ],
            [weak_target, zero_effect],
        ),
        "power_at_planned_effect": ([*real_all, eff_missing], []),
        "power_at_sesoi": ([*real_all, sesoi_missing], []),
        "mde": (real_all, [weak_target]),
        "mde_std": (real_all, [weak_target]),
        "se_plan": (plan_all, []),
        "se_realized": (real_all, []),
        "precision_ratio": ([*plan_all, *real_all], []),
        "n_ratio": (
            [*blank(plan, plan_src, design.size_keys), *blank(real, real_src, design.size_keys)],
            [],
        ),
        "n_required_realized": (
            [*replan_needs, eff_missing],
            [weak_target, zero_effect, unreachable],
        ),
        "power_if_planned_size": ([*blank(replan, replan_src), eff_missing], []),
        "power_cost_nuisance": ([*plan_all, *blank(replan, replan_src), eff_missing], []),
        "power_cost_attrition": ([*blank(replan, replan_src), *real_all, eff_missing], []),
    }
    for metric, (planned_col, realized_col) in design.ratio_keys.items():
        specs[metric] = (
            [
                (np.isnan(_col(rows, planned_col)), planned_col),
                (np.isnan(_col(rows, realized_col)), realized_col),
            ],
            [],
        )
    for metric, extra in design.null_explanations(rows, plan, real, effect, test).items():
        if metric in specs and not extra.replace:
            base_inputs, base_conditions = specs[metric]
            specs[metric] = (
                [*base_inputs, *extra.inputs],
                [*extra.conditions, *base_conditions],
            )
        else:
            specs[metric] = (list(extra.inputs), list(extra.conditions))
    for metric, value in out.items():
        if metric in design.not_applicable:
            continue
        inputs, conditions = specs.get(metric, ([*plan_all, *real_all], []))
        _explain_nulls(notes, positions, metric, value, inputs, conditions)
