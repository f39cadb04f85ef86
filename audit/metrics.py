"""Per-study metrics: apply each design's vectorised maths to its rows, one column per quantity.

Every metric that comes out null gets a note saying why: the input columns it needed that the row
left blank, or the condition that makes it undefined. Rows are processed one *design* at a time
(a handful of groups), never one row at a time.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from audit import hypotheses, plan_methods, retro
from audit import reported as reported_forms
from audit._format import format_number
from audit.designs import Design, Scenario, TestSpec, design_groups
from audit.designs._base import _directions
from audit.inputs import ignored_notes

__all__ = ["METRICS", "compute_metrics", "directed_mde", "direction_words", "test_settings"]

#: Metric name -> meaning, in report order. Names are part of the output contract.
METRICS: dict[str, str] = {
    "direction_used": "the direction the audit used: increase or decrease (from the direction "
    "column, else the planned effect's sign; for ratios below 1 is a decrease), or either (no "
    "direction given: the SESOI is a band around no effect and MDEs are magnitudes)",
    "planned_effect_used": "the planned effect in effect units as the audit used it "
    "(planned_effect, or from planned_p2 / planned_rate2 in the row's effect measure: a risk "
    "difference, risk ratio or odds ratio for binary designs, a rate ratio for two_rates)",
    "sesoi_used": "the SESOI as the audit used it: pointed in the direction used, a magnitude "
    "when either (a band from -sesoi to sesoi; for ratios 1/sesoi to sesoi)",
    "plan_power": "power of the planned design at the planned effect",
    "n_required_plan": "units needed at the planned parameters for the target power "
    "(sum over groups, each rounded up)",
    "plan_discrepancy": "planned size / required size - 1 (does the stated calculation "
    "reproduce?), the required size by the audit's own method and, with planned_dropout, "
    "divided by 1 - dropout in each group",
    "n_required_with_dropout": "n_required_plan with the plan's dropout allowance: each group "
    "divided by 1 - planned_dropout and rounded up (the same as n_required_plan without one)",
    "plan_reproduced_by": "the published method whose required size is closest to the planned "
    "size (ties to the audit's own), if it is within the tolerance of rule "
    "sample-size-not-reproducible; blank when no listed method reproduces the plan",
    "plan_discrepancy_closest": "planned size / required size - 1 under the closest published "
    "method (plan_closest_method), within the tolerance or not",
    "plan_closest_method": "the published method whose required size is closest to the planned "
    "size, within the tolerance or not",
    "n_required_closest": "units the closest published method requires (with the dropout "
    "allowance, as compared)",
    "power_at_planned_effect": "design-based power of the realized design at the planned effect",
    "power_at_sesoi": "design-based power of the realized design at the SESOI",
    "power_at_pooled_effect": "design-based power of the realized design at the pooled estimate "
    "of the row's outcome_family (fixed or random effects, as excess_pooling says)",
    "mde": "minimal detectable effect at the target power with the realized design "
    "(effect units, signed in the direction used; a magnitude when either, taken on the harder "
    "side where the two sides differ)",
    "detectable_margin": "non-inferiority and equivalence rows: the smallest margin the realized "
    "design demonstrates with the target power at the planned true difference (effect units; "
    "ratios above 1; d where effects are standardized); replaces mde for these rows",
    "margin_share_of_control_effect": "non-inferiority rows: the margin as a share of the "
    "active control's effect (control_effect), both on the analysis scale (log for ratios)",
    "mde_sesoi_ratio": "|MDE| / |SESOI| on the design's analysis scale (log for hazard ratios, "
    "Fisher z for correlations): above 1, effects that still matter could go undetected",
    "mde_std": "the MDE standardized (d, d_z, h, r, f, f2, log hazard ratio, log rate ratio or "
    "Cohen's g by design; h for proportions whatever the effect measure), with the MDE's sign",
    "se_plan": "expected standard error of the estimate under the plan",
    "se_realized": "expected standard error of the estimate as realized",
    "precision_ratio": "se_plan / se_realized (below 1: less precise than planned)",
    "n_ratio": "realized / planned size (planned analysable units: the planned size x (1 - "
    "planned_dropout) where the plan states an allowance)",
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
    # -- retrospective design analysis (audit/retro.py) --
    "type_s": "Type S error rate: probability that a significant estimate has the wrong sign, "
    "at the planned effect with the realized SE (normal, Gelman & Carlin 2014)",
    "exaggeration": "expected exaggeration ratio (Type M): mean |estimate| / |planned effect| "
    "among significant estimates, realized SE (normal, Gelman & Carlin 2014)",
    "type_s_at_sesoi": "Type S error rate at the SESOI with the realized SE",
    "exaggeration_at_sesoi": "expected exaggeration ratio at the SESOI with the realized SE",
    "ci_halfwidth_plan": "half-width of the confidence interval the plan implied "
    "(test's level, analysis scale: log for ratios)",
    "ci_halfwidth_realized": "half-width of the confidence interval the realized design implies "
    "(test's level, analysis scale)",
    # -- the reported result, completed (audit/retro.py) --
    "result_effect": "the observed effect: as reported, or derived from the CI (see notes)",
    "result_se": "its standard error on the analysis scale: as reported, or derived from the CI "
    "or from the effect and p (see notes)",
    "result_ci_level": "level of the confidence interval dual to the study's test: "
    "1 - 2 alpha / sides (Bonferroni alpha)",
    "result_ci_low": "lower limit of that interval (effect units): the reported one when it has "
    "that level, else effect - q x SE",
    "result_ci_high": "upper limit of that interval (effect units)",
    "result_p": "p-value of the study's test: as reported, or derived from the effect and SE",
    "result_significant": "1 if the study's test rejects at its own alpha (the interval decides "
    "where known, else p), 0 if not",
    "ci_verdict": "what the interval rules out: detected, excludes_sesoi, "
    "excludes_planned_effect or inconclusive (the smallest reference effect excluded is named); "
    "non-inferiority rows: non_inferior, inferior or inconclusive, equivalence rows: "
    "equivalent, not_equivalent or inconclusive (the interval at level 1 - 2 alpha against the "
    "margin)",
    "ci_halfwidth_observed": "half-width of the result's confidence interval (test's level, "
    "analysis scale)",
    "ci_halfwidth_ratio_plan": "ci_halfwidth_observed / ci_halfwidth_plan (above 1: less "
    "precise than planned)",
    "ci_halfwidth_ratio_realized": "ci_halfwidth_observed / ci_halfwidth_realized (above 1: less "
    "precise than the realized design implies)",
    "observed_power": "power at the observed effect: a transform of the p-value shown only to "
    "make that plain (Hoenig & Heisey 2001); never evidence about the study",
    "observed_power_from_p": "the same, computed from the reported observed_p alone",
    # -- the reported p checked against the other reported numbers (audit/reported.py) --
    "reported_p_recomputed": "the p-value the other reported numbers give (the test statistic, "
    "else the estimate with its SE or interval, else the arm means, else d with the sizes), at "
    "face value; null where no p was reported",
    "reported_p_discrepancy": "how far the reported p is from the recomputed one once the "
    "rounding of printed numbers is allowed for: 1 where they agree, else the factor between "
    "the nearest ends of the two ranges",
    "reported_p_as_given": "the reported p as read: p = x, p < x, p > x or n.s.",
    "reported_p_recomputed_from": "which reported numbers reported_p_recomputed comes from",
}

#: Metrics computed over the portfolio after the per-design metrics (audit/portfolio.py): one
#: pooled estimate per outcome family.
PORTFOLIO_METRICS = ("power_at_pooled_effect",)

#: Prefix of the metric columns of power at each reference effect (``reference_power_0.5``);
#: the JSON gathers them into one object ``reference_power`` (audit/jsonout.py).
REFERENCE_PREFIX = "reference_power_"

#: Default reference effects, in each design's standardized unit (Cohen's small, medium and
#: large d; the same numbers in every unit unless the run says otherwise).
REFERENCE_EFFECTS = (0.2, 0.5, 0.8)

#: Metrics whose values are text (all others are numbers).
TEXT_METRICS = frozenset(
    {
        "ci_verdict",
        "direction_used",
        "plan_reproduced_by",
        "plan_closest_method",
        "reported_p_as_given",
        "reported_p_recomputed_from",
    }
)

#: Metrics of the reproduction of the stated calculation (audit/plan_methods.py): null for the
#: same reasons as plan_discrepancy.
REPRODUCTION_METRICS = (
    "n_required_with_dropout",
    "plan_reproduced_by",
    "plan_discrepancy_closest",
    "plan_closest_method",
    "n_required_closest",
)


#: Metrics about the reported result: they need one of observed_effect, observed_se, the CI or
#: observed_p, and get one grouped note on rows that report none of them.
RESULT_METRICS = (
    "result_effect",
    "result_se",
    "result_ci_level",
    "result_ci_low",
    "result_ci_high",
    "result_p",
    "result_significant",
    "ci_verdict",
    "ci_halfwidth_observed",
    "ci_halfwidth_ratio_plan",
    "ci_halfwidth_ratio_realized",
    "observed_power",
    "observed_power_from_p",
    "reported_p_recomputed",
    "reported_p_discrepancy",
    "reported_p_as_given",
    "reported_p_recomputed_from",
)

#: All metrics computed by :func:`_retro_metrics` (their null notes are made there).
RETRO_METRICS = (
    "type_s",
    "exaggeration",
    "type_s_at_sesoi",
    "exaggeration_at_sesoi",
    "ci_halfwidth_plan",
    "ci_halfwidth_realized",
    *RESULT_METRICS,
)

#: Inputs that make up a reported result.
RESULT_COLUMNS = (
    "observed_effect",
    "observed_se",
    "observed_ci_low",
    "observed_ci_high",
    "observed_p",
)


@dataclass
class MetricTable:
    """Metric columns aligned with the validated table, and notes about null values (each
    row's notes in the order they were made; rows not in order)."""

    values: pd.DataFrame
    notes: pd.DataFrame  # columns pos, text


def test_settings(rows: pd.DataFrame, design: Design) -> TestSpec:
    """The per-row test settings: Bonferroni alpha, sides, target power and direction.

    The direction is the ``direction`` column where given, else the sign of the planned effect
    on the analysis scale; with neither the row has no direction (``either``), which validation
    allows for two-sided tests only. Tests without a direction (F) look the one way they have.
    """
    alpha = rows["alpha"].to_numpy(dtype=float) / rows["comparisons"].to_numpy(dtype=float)
    if design.has_direction:
        given = _directions(rows)
        direction = np.where(
            np.isfinite(given), given, design.effect_sign(design.planned_effect(rows))
        )
    else:
        direction = np.ones(len(rows))
    either = direction == 0
    return TestSpec(
        alpha=alpha,
        sides=rows["sides"].to_numpy(dtype=float),
        power=rows["target_power"].to_numpy(dtype=float),
        direction=np.where(either, 1.0, direction),
        either=either,
    )


def direction_words(test: TestSpec) -> np.ndarray:
    """``direction_used`` of each row: increase, decrease or either."""
    words = np.where(test.direction < 0, "decrease", "increase").astype(object)
    words[test.either] = "either"
    return words


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
        # An object column: pandas would otherwise convert every text to its string type.
        text = pd.Series(np.concatenate(self.text), dtype=object)
        return pd.DataFrame({"pos": np.concatenate(self.pos), "text": text})


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
    conditions: list[tuple[np.ndarray, str | np.ndarray]],
) -> None:
    """Note, for each null value, the blank inputs or else the first condition that explains it.

    A condition's reason is one text, or a text per row (an object array aligned with
    ``value``).
    """
    null = pd.isna(value) if value.dtype == object else np.isnan(value)
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
        if isinstance(reason, np.ndarray):
            notes.add(positions[hit], metric + ": " + reason[hit])
        else:
            notes.add(positions[hit], f"{metric}: {reason}")
        rest &= ~hit
    notes.add(positions[rest], f"{metric}: could not be computed from the values given")


def reference_column(effect: float) -> str:
    """The metric column of power at a reference effect: ``reference_power_0.5``."""
    return f"{REFERENCE_PREFIX}{effect:g}"


def reference_columns(columns: list[str] | pd.Index) -> list[tuple[str, str]]:
    """``(key, column)`` of each reference-power column of a metric table, in order (the key
    is the effect as the JSON object ``reference_power`` names it: ``"0.5"``)."""
    return [(c[len(REFERENCE_PREFIX) :], c) for c in columns if c.startswith(REFERENCE_PREFIX)]


def compute_metrics(
    table: pd.DataFrame,
    valid: np.ndarray,
    *,
    plan_tolerance: float | None = None,
    reference_effects: tuple[float, ...] = REFERENCE_EFFECTS,
) -> MetricTable:
    """Compute every metric for the valid rows of a validated table.

    Parameters
    ----------
    table : the ``table`` of :class:`audit.validate.Validated`.
    valid : which rows passed validation; other rows get null metrics and no notes.
    plan_tolerance : the largest |planned / required - 1| with which a published method
        reproduces the plan (``plan_reproduced_by``): the ``max_discrepancy`` of rule
        sample-size-not-reproducible in force, which the pipeline passes from the resolved
        rules (:func:`audit.plan_methods.tolerance_in_force`); default: the bundled rule's.
    reference_effects : standardized effects (each design's unit) for ``reference_power_<x>``.
    """
    if plan_tolerance is None:
        plan_tolerance = plan_methods.bundled_tolerance()
    n = len(table)
    # Plain arrays filled design by design, one frame at the end (pandas' per-column item
    # assignment costs more than the arithmetic of some designs).
    columns: dict[str, np.ndarray] = {
        name: np.full(n, None, dtype=object) if name in TEXT_METRICS else np.full(n, np.nan)
        for name in METRICS
    }
    for effect in reference_effects:
        columns[reference_column(effect)] = np.full(n, np.nan)
    # One group per design and effect measure (a design with one effect unit is one group).
    groups = design_groups(table, np.flatnonzero(valid))
    notes = _Notes()
    for (_, positions), (computed, group_notes) in zip(
        groups, _group_metrics(table, groups, plan_tolerance, tuple(reference_effects)), strict=True
    ):
        notes.pos.extend(group_notes.pos)
        notes.text.extend(group_notes.text)
        for metric, arr in computed.items():
            if metric not in columns:
                columns[metric] = np.full(n, np.nan)
            columns[metric][positions] = arr
    values = pd.DataFrame(
        {
            # Text metrics stay object columns with None for "not computed" (a str column
            # would turn None into nan).
            name: pd.Series(arr, index=table.index, dtype=object) if arr.dtype == object else arr
            for name, arr in columns.items()
        },
        index=table.index,
    )
    return MetricTable(values, notes.frame())


def _group_metrics(
    table: pd.DataFrame,
    groups: list[tuple[Design, np.ndarray]],
    plan_tolerance: float,
    reference_effects: tuple[float, ...] = REFERENCE_EFFECTS,
) -> list[tuple[dict[str, np.ndarray], _Notes]]:
    """Metrics and notes of each group of rows (rows of one design), in the order given."""
    out = []
    for design, positions in groups:
        notes = _Notes()
        rows = table.iloc[positions]
        margin = hypotheses.margin_rows(rows)
        if not margin.any():
            computed = _design_metrics(
                design, rows, positions, notes, plan_tolerance, reference_effects
            )
        else:
            # Non-inferiority and equivalence rows have metrics of their own meaning; the
            # superiority rows of the design are computed as before.
            computed = {}
            for mask, func in ((~margin, _design_metrics), (margin, _margin_metrics)):
                if not mask.any():
                    continue
                part = func(
                    design, rows.iloc[mask], positions[mask], notes, plan_tolerance,
                    reference_effects,
                )  # fmt: skip
                for metric, values in part.items():
                    if metric not in computed:
                        computed[metric] = (
                            np.full(len(rows), None, dtype=object)
                            if values.dtype == object
                            else np.full(len(rows), np.nan)
                        )
                    computed[metric][mask] = values
        out.append((computed, notes))
    return out


def _design_metrics(
    design: Design,
    rows: pd.DataFrame,
    positions: np.ndarray,
    notes: _Notes,
    plan_tolerance: float,
    reference_effects: tuple[float, ...] = REFERENCE_EFFECTS,
) -> dict[str, np.ndarray]:
    test = test_settings(rows, design)
    recruited = design.scenario(rows, "planned")
    plan = _analysable(design, recruited, _col(rows, "planned_dropout"))
    real = design.scenario(rows, "realized")
    effect = design.planned_effect(rows)
    sesoi = _sesoi_on_harder_side(design, real, _col(rows, "sesoi"), test)
    replan = design.replanned(plan, real)

    with np.errstate(divide="ignore", invalid="ignore"):
        out: dict[str, np.ndarray] = {}
        out["plan_power"] = design.power(plan, effect, test)
        # The stated calculation is redone against the planned size as written (with a
        # dropout allowance, the number to recruit).
        planned_total = design.total_size(recruited)
        reproduction = None
        if design.size_keys:
            # Every published method of the design, the audit's own among them (its size is
            # n_required_plan), against the planned size with the stated dropout allowance.
            reproduction = plan_methods.reproduce(
                design,
                recruited,
                effect,
                test,
                planned_total,
                _col(rows, "planned_dropout"),
                plan_tolerance,
            )
            out.update(reproduction.metrics)
        else:
            out["n_required_plan"] = design.required_size(plan, effect, test)
            out["plan_discrepancy"] = planned_total / out["n_required_plan"] - 1.0
        out["power_at_planned_effect"] = design.power(real, effect, test)
        out["power_at_sesoi"] = design.power(real, sesoi, test)
        out["mde"], out["mde_std"] = directed_mde(design, real, test)
        out["mde_sesoi_ratio"] = np.abs(design.to_analysis(out["mde"])) / np.abs(
            design.to_analysis(sesoi)
        )
        out["se_plan"] = design.se(plan, effect)
        out["se_realized"] = design.se(real, effect)
        out["precision_ratio"] = out["se_plan"] / out["se_realized"]
        # Against the planned analysable units (after a stated dropout allowance).
        out["n_ratio"] = design.total_size(real) / design.total_size(plan)
        for metric, (planned_col, realized_col) in design.ratio_keys.items():
            out[metric] = _col(rows, realized_col) / _col(rows, planned_col)
        # Without nuisance parameters to replace, the replanned design is the plan itself.
        same = replan.keys() == plan.keys() and all(replan[k] is plan[k] for k in plan)
        out["n_required_realized"] = (
            out["n_required_plan"] if same else design.required_size(replan, effect, test)
        )
        out["power_if_planned_size"] = design.power(replan, effect, test)
        out["power_cost_nuisance"] = _difference(out["plan_power"], out["power_if_planned_size"])
        out["power_cost_attrition"] = _difference(
            out["power_if_planned_size"], out["power_at_planned_effect"]
        )
        out.update(design.extra_metrics(plan, real, effect, test))
        out["direction_used"] = direction_words(test)
        out["planned_effect_used"] = effect
        out["sesoi_used"] = sesoi

    for metric, reason in design.not_applicable.items():
        out[metric] = (
            np.full(len(rows), None, dtype=object)
            if metric in TEXT_METRICS
            else np.full(len(rows), np.nan)
        )
        notes.add(positions, f"{metric}: not applicable, {reason}")
    # Metrics defined only for other designs (events for survival, ICC for cluster trials): one
    # note lists them rather than one note each.
    foreign = [
        m for m in METRICS if m not in out and m not in RETRO_METRICS and m not in PORTFOLIO_METRICS
    ]
    if foreign:
        notes.add(positions, f"not applicable to {design.name}: {', '.join(foreign)}")

    more = {}
    if reproduction is not None:
        more = _note_reproduction(notes, positions, rows, reproduction, planned_total)
    _note_nulls(design, rows, positions, notes, out, plan, real, effect, sesoi, test, more)
    out.update(_reference_power(design, rows, positions, notes, real, test, reference_effects))
    if "power_at_pooled_effect" not in design.not_applicable:
        # Rows in a family are given their power when the family is pooled (audit/portfolio.py).
        no_family = pd.isna(rows["outcome_family"]).to_numpy(dtype=bool)
        notes.add(
            positions[no_family], "power_at_pooled_effect: not computed, missing outcome_family"
        )
    for column in ("margin", "control_effect"):
        notes.add(
            positions[np.isfinite(_col(rows, column))],
            f"{column} not used: the row tests superiority (set hypothesis to non_inferiority "
            "or equivalence to test against a margin)",
        )
    # Texts: one for all masked rows, or one per masked row.
    for mask, text in [*design.fallback_notes(rows), *ignored_notes(design, rows)]:
        notes.add(positions[np.asarray(mask, dtype=bool)], text)
    out.update(_retro_metrics(design, rows, positions, notes, out, test, plan, real, effect, sesoi))
    return out


#: Metrics that have no meaning on a non-inferiority or equivalence row (the margin replaces the
#: effect to detect; no superiority test is run), noted once per row.
MARGIN_NOT_APPLICABLE = (
    "mde",
    "mde_std",
    "mde_sesoi_ratio",
    "power_at_sesoi",
    "type_s",
    "exaggeration",
    "type_s_at_sesoi",
    "exaggeration_at_sesoi",
    "observed_power",
    "observed_power_from_p",
    "reported_p_recomputed",
    "reported_p_discrepancy",
    "reported_p_as_given",
    "reported_p_recomputed_from",
)

#: Reported inputs a margin row does not use: a p-value or test statistic may test the margin or
#: no difference, and the paper rarely says which; the interval (or estimate and SE) decides.
MARGIN_UNUSED_RESULTS = ("observed_p", "observed_p_relation", "observed_statistic")


def _margin_metrics(
    design: Design,
    rows: pd.DataFrame,
    positions: np.ndarray,
    notes: _Notes,
    plan_tolerance: float,
    reference_effects: tuple[float, ...] = REFERENCE_EFFECTS,
) -> dict[str, np.ndarray]:
    """Metrics of non-inferiority and equivalence rows (audit/hypotheses.py): power, sizes and
    the reproduction of the plan for the margin test, ``detectable_margin`` in place of the
    MDE, and the reported interval read against the margin."""
    n = len(rows)
    test = test_settings(rows, design)
    mt = hypotheses.margin_test(design, rows, test)
    one_sided = mt.one_sided()
    recruited = design.scenario(rows, "planned")
    plan = _analysable(design, recruited, _col(rows, "planned_dropout"))
    real = design.scenario(rows, "realized")
    replan = design.replanned(plan, real)
    effect = mt.truth_effect
    methods = hypotheses.size_methods(design, mt)
    planned_total = design.total_size(recruited)
    out: dict[str, np.ndarray] = {}
    reproduction = None
    with np.errstate(divide="ignore", invalid="ignore"):
        out["plan_power"] = hypotheses.power(design, plan, mt)
        if methods is not None:
            reproduction = plan_methods.reproduce(
                design,
                recruited,
                effect,
                one_sided,
                planned_total,
                _col(rows, "planned_dropout"),
                plan_tolerance,
                entry=methods,
            )
            out.update(reproduction.metrics)
            again = plan_methods.reproduce(
                design, replan, effect, one_sided, planned_total, np.full(n, np.nan),
                plan_tolerance, entry=methods,
            )  # fmt: skip
            out["n_required_realized"] = again.metrics["n_required_plan"]
            if design.name == "survival":
                # Events of the default method, before they are turned into patients.
                sizes = methods.methods[0].size(
                    plan_methods.PlanInputs(design, plan, effect, one_sided)
                )
                out["events_required_plan"] = np.where(
                    np.isfinite(sizes) & (sizes > 0), np.ceil(sizes * (1.0 - 1e-12)), np.nan
                )
        out["power_at_planned_effect"] = hypotheses.power(design, real, mt)
        out["detectable_margin"] = hypotheses.detectable_margin(design, real, mt)
        out["se_plan"] = design.se(plan, effect)
        out["se_realized"] = design.se(real, effect)
        out["precision_ratio"] = out["se_plan"] / out["se_realized"]
        out["n_ratio"] = design.total_size(real) / design.total_size(plan)
        for metric, (planned_col, realized_col) in design.ratio_keys.items():
            out[metric] = _col(rows, realized_col) / _col(rows, planned_col)
        out["power_if_planned_size"] = hypotheses.power(design, replan, mt)
        out["power_cost_nuisance"] = _difference(out["plan_power"], out["power_if_planned_size"])
        out["power_cost_attrition"] = _difference(
            out["power_if_planned_size"], out["power_at_planned_effect"]
        )
        out["direction_used"] = np.where(
            mt.equivalence, "either", direction_words(one_sided)
        ).astype(object)
        out["planned_effect_used"] = design.planned_effect(rows)
        out["sesoi_used"] = np.full(n, np.nan)
        control = design.to_analysis(_col(rows, "control_effect"))
        out["margin_share_of_control_effect"] = np.where(
            mt.equivalence | (control == 0), np.nan, mt.margin / np.abs(control)
        )
    for metric, reason in design.not_applicable.items():
        out[metric] = (
            np.full(n, None, dtype=object) if metric in TEXT_METRICS else np.full(n, np.nan)
        )
        notes.add(positions, f"{metric}: not applicable, {reason}")
    foreign = [
        m
        for m in METRICS
        if m not in out
        and m not in RETRO_METRICS
        and m not in PORTFOLIO_METRICS
        and m not in MARGIN_NOT_APPLICABLE
        and m not in design.not_applicable
    ]
    if foreign:
        notes.add(positions, f"not applicable to {design.name}: {', '.join(foreign)}")

    more: dict[str, list[tuple[np.ndarray, str | np.ndarray]]] = {}
    if reproduction is not None:
        more = _note_reproduction(notes, positions, rows, reproduction, planned_total)
    beyond = (~mt.equivalence & (mt.better * mt.truth <= -mt.margin)) | (
        mt.equivalence & (np.abs(mt.truth) >= mt.margin)
    )
    beyond_text = (
        "the planned true difference lies at or beyond the margin, so no size reaches the "
        "target power"
    )
    for metric in ("n_required_plan", "n_required_realized", "plan_discrepancy"):
        more.setdefault(metric, [])
        more[metric] = [(beyond, beyond_text), *more[metric]]
    own_notes = ("planned_effect_used", "sesoi_used", "margin_share_of_control_effect")
    shown = {m: v for m, v in out.items() if m not in own_notes}
    _note_nulls(design, rows, positions, notes, shown, plan, real, effect, effect, one_sided, more)
    _explain_nulls(
        notes,
        positions,
        "planned_effect_used",
        out["planned_effect_used"],
        [],
        [
            (
                np.ones(n, dtype=bool),
                "no planned true difference given: the margin test is powered at no difference",
            )
        ],
    )
    control_given = np.isfinite(_col(rows, "control_effect"))
    _explain_nulls(
        notes,
        positions,
        "margin_share_of_control_effect",
        out["margin_share_of_control_effect"],
        [(~control_given, "control_effect")],
        [
            (mt.equivalence, "not applicable, an equivalence margin preserves no control effect"),
            (np.ones(n, dtype=bool), "not defined, control_effect is no effect"),
        ],
    )
    sesoi_given = np.isfinite(_col(rows, "sesoi"))
    notes.add(
        positions[sesoi_given],
        "sesoi not used: a non-inferiority or equivalence test is judged against its margin",
    )
    notes.add(
        positions[~sesoi_given],
        "sesoi_used: not applicable, a non-inferiority or equivalence test is judged against "
        "its margin",
    )
    flipped = design.is_ratio & (_col(rows, "margin") < 1.0)
    notes.add(
        positions[flipped],
        "margin below 1 read as its reciprocal: ratio margins are given above 1 (margin "
        + pd.Series(mt.margin_effect[flipped]).map(format_number).to_numpy(dtype=object)
        + " used)",
    )
    equivalence_direction = mt.equivalence & np.isfinite(_directions(rows))
    notes.add(
        positions[equivalence_direction],
        "direction not used: an equivalence test looks both ways",
    )
    if "power_at_pooled_effect" not in design.not_applicable:
        out["power_at_pooled_effect"] = np.full(n, np.nan)
        notes.add(
            positions,
            "power_at_pooled_effect: not applicable, the pooled estimate is a superiority "
            "effect and this row tests a margin",
        )
    for x in reference_effects:
        out[reference_column(x)] = np.full(n, np.nan)
    if reference_effects:
        notes.add(
            positions,
            "reference_power: not applicable, the reference effects are superiority effects and "
            "this row tests a margin",
        )

    # The reported result, at level 1 - 2 alpha, against the margin.
    used = rows.copy()
    dropped = np.zeros(n, dtype=bool)
    for column in MARGIN_UNUSED_RESULTS:
        if column in used.columns:
            dropped |= np.isfinite(_col(used, column))
            used[column] = np.nan
    notes.add(
        positions[dropped],
        "observed_p and observed_statistic not used: on a non-inferiority or equivalence row "
        "they may test the margin or no difference; the interval (or estimate and SE) is read "
        "against the margin",
    )
    part = _Notes()
    res_out = _retro_metrics(
        design, used, positions, part, out, one_sided, plan, real, effect, np.full(n, np.nan)
    )
    skip = (*MARGIN_NOT_APPLICABLE, "ci_verdict", "result_significant", "result_p")
    for pos, text in zip(part.pos, part.text, strict=True):
        keep = ~np.array(
            [t.startswith(skip) or t.startswith("significant") or "disagree" in t for t in text],
            dtype=bool,
        )
        notes.add(pos[keep], text[keep])
    with np.errstate(divide="ignore", invalid="ignore"):
        low = design.to_analysis(res_out["result_ci_low"])
        high = design.to_analysis(res_out["result_ci_high"])
        estimate = design.to_analysis(res_out["result_effect"])
    verdict = hypotheses.ci_verdicts(low, high, mt)
    res_out["ci_verdict"] = verdict
    shown_ok = np.isin(verdict.astype(str), ["non_inferior", "equivalent"])
    res_out["result_significant"] = np.where(pd.isna(verdict), np.nan, shown_ok.astype(float))
    res_out["result_p"] = hypotheses.margin_p(
        estimate, res_out["result_se"], _finite_df(design.analysis_df(real)), mt
    )
    unknown = pd.isna(verdict)
    notes.add(
        positions[unknown],
        "ci_verdict: not computed, no confidence interval (needs the effect with its SE or both "
        "CI limits) to read against the margin",
    )
    notes.add(
        positions[unknown],
        "result_significant: not computed, needs a confidence interval to read against the margin",
    )
    notes.add(
        positions[np.isnan(res_out["result_p"])],
        "result_p: not computed, needs the effect with its SE or both CI limits",
    )
    for m in MARGIN_NOT_APPLICABLE:
        value = res_out.get(m, out.get(m))
        template = np.full(n, None, dtype=object) if m in TEXT_METRICS else np.full(n, np.nan)
        if m in res_out:
            res_out[m] = template
        else:
            out[m] = template
        del value
    words = np.where(mt.equivalence, "an equivalence", "a non-inferiority").astype(object)
    notes.add(
        positions,
        "not applicable to "
        + words
        + " row (the margin replaces the effect to detect; see detectable_margin): "
        + ", ".join(m for m in MARGIN_NOT_APPLICABLE),
    )
    out.update(res_out)
    return out


def _note_reproduction(
    notes: _Notes,
    positions: np.ndarray,
    rows: pd.DataFrame,
    reproduction: plan_methods.Reproduction,
    planned_total: np.ndarray,
) -> dict[str, list[tuple[np.ndarray, np.ndarray]]]:
    """Notes on reproducing the stated calculation; the reason a blank plan_reproduced_by
    has where the methods give sizes but none is within the tolerance."""
    texts, unmatched, reason = plan_methods.reproduction_notes(
        reproduction, planned_total, _col(rows, "planned_dropout")
    )
    for mask, text in texts:
        notes.add(positions[mask], text)
    return {"plan_reproduced_by": [(unmatched, reason)]}


def _reference_power(
    design: Design,
    rows: pd.DataFrame,
    positions: np.ndarray,
    notes: _Notes,
    real: Scenario,
    test: TestSpec,
    effects: tuple[float, ...],
) -> dict[str, np.ndarray]:
    """Design-based power of the realized design at each reference effect, given in the
    design's standardized unit (d, d_z, h, r, f, f2 or log HR) and pointed in the direction
    used; a row with no direction on a design whose two sides differ gets the harder side."""
    out: dict[str, np.ndarray] = {}
    n = len(rows)
    # Portfolios repeat designs (the same sizes and test): each distinct one is computed once,
    # distinct as the standardized effect sees it (a t design's SD does not matter).
    with np.errstate(all="ignore"):
        seen, _ = design.at_standardized(real, np.ones(n), test.direction)
    first, codes = _distinct(
        *(seen[k] for k in sorted(seen)), test.alpha, test.sides, test.direction, test.either
    )
    few = {k: v[first] for k, v in real.items()}
    few_test = test.subset(first)
    sc = few
    for x in effects:
        magnitude = np.full(len(first), float(x))
        with np.errstate(all="ignore"):
            sc, eff = design.at_standardized(few, magnitude, few_test.direction)
            power = design.power(sc, eff, few_test)
            if not design.symmetric and few_test.either.any():
                flipped = few_test.with_direction(
                    np.where(few_test.either, -few_test.direction, 1.0)
                )
                sc2, eff2 = design.at_standardized(few, magnitude, flipped.direction)
                other = design.power(sc2, eff2, flipped)
                power = np.where(few_test.either & (other < power), other, power)
        out[reference_column(x)] = power[codes]
    sc = {k: v[codes] for k, v in sc.items()}
    if not effects:
        return out
    if design.standardized_as is None:
        notes.add(
            positions,
            f"reference_power: not applicable, {design.name} has no standardized unit",
        )
        return out
    null = np.zeros(n, dtype=bool)
    for values in out.values():
        null |= np.isnan(values)
    src = design.sources("realized")
    # The inputs power at a standardized effect needs (a t design's SD is not among them).
    inputs = [(np.isnan(sc[k]), src[k]) for k in sc if k in src]
    unreachable = (
        np.ones(n, dtype=bool),
        "the reference effect leaves the range the design allows (a proportion beyond [0, 1] "
        "from the realized control rate)",
    )
    _explain_nulls(
        notes, positions, "reference_power", np.where(null, np.nan, 0.0), inputs, [unreachable]
    )
    return out


def _distinct(*arrays: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The first position of each distinct combination of the arrays' values, and each
    position's combination (its index into those first positions)."""
    columns = [np.asarray(a, dtype=float).reshape(-1) for a in arrays]
    n = len(columns[0]) if columns else 0
    if n < 64:
        return np.arange(n), np.arange(n)
    frame = pd.DataFrame(dict(enumerate(columns)))
    codes = frame.groupby(list(frame.columns), sort=False, dropna=False).ngroup().to_numpy()
    codes = codes.astype(np.intp)
    first = np.empty(codes.max() + 1, dtype=np.intp)
    first[codes[::-1]] = np.arange(n - 1, -1, -1)
    return first, codes


def _analysable(design: Design, plan: Scenario, dropout: np.ndarray) -> Scenario:
    """The planned design as analysed: with a stated dropout allowance the planned sizes are
    the numbers to recruit, and the plan expected ``size x (1 − dropout)`` analysable units
    (clusters, for cluster designs) in each group."""
    if not design.size_keys or not np.isfinite(dropout).any():
        return plan
    keep = np.where(np.isfinite(dropout), 1.0 - dropout, 1.0)
    return {**plan, **{k: plan[k] * keep for k in design.size_keys if k in plan}}


def _difference(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``a - b`` for two powers, with rounding noise (the same power reached along two paths of
    arithmetic, 1e-17 apart) shown as the zero it is."""
    d = a - b
    return np.where(np.abs(d) < 1e-12, 0.0, d)


def _sesoi_on_harder_side(
    design: Design, real: Scenario, sesoi: np.ndarray, test: TestSpec
) -> np.ndarray:
    """The SESOI in effect units, pointed in the direction used.

    A row with no direction has a SESOI band on both sides of no effect; where the design is
    not symmetric (a risk difference from a control rate) the SESOI is pointed at the side on
    which the realized design has the lower power, so that power at the SESOI and Type S/M at
    it are not flattered by the easier side.
    """
    out = design.orient(sesoi, test.direction)
    if design.symmetric or not test.either.any():
        return out
    flipped = test.with_direction(np.where(test.either, -test.direction, test.direction))
    other = design.orient(sesoi, flipped.direction)
    with np.errstate(invalid="ignore"):
        harder = test.either & (design.power(real, other, flipped) < design.power(real, out, test))
    return np.where(harder, other, out)


def directed_mde(design: Design, real: Scenario, test: TestSpec) -> tuple[np.ndarray, np.ndarray]:
    """The MDE and its standardized value, signed in the direction used.

    Where a row has no direction the MDE is a magnitude: the larger of the two sides' MDEs on
    the analysis scale (the side harder to detect; the same on both sides for a symmetric
    design), written as a positive value (a ratio above 1).
    """
    mde = design.mde(real, test)
    if not test.either.any():
        return mde, design.standardize(real, mde)
    if not design.symmetric:
        flipped = test.with_direction(np.where(test.either, -test.direction, test.direction))
        other = design.mde(real, flipped)
        with np.errstate(invalid="ignore"):
            larger = np.abs(design.to_analysis(other)) > np.abs(design.to_analysis(mde))
        # A side on which no effect reaches the target leaves no MDE "either way".
        harder = np.where(larger, other, mde)
        mde = np.where(test.either, np.where(np.isnan(other), np.nan, harder), mde)
    std = design.standardize(real, mde)
    with np.errstate(invalid="ignore"):
        magnitude = design.from_analysis(np.abs(design.to_analysis(mde)))
    return np.where(test.either, magnitude, mde), np.where(test.either, np.abs(std), std)


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
    more: dict[str, list[tuple[np.ndarray, str | np.ndarray]]] | None = None,
) -> None:
    """Attach a reason to every null metric (skipping those declared not applicable).

    ``more`` adds conditions (tried first) to the reasons of some metrics.
    """
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
        "planned_effect_used": ([eff_missing], []),
        "sesoi_used": ([sesoi_missing], []),
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
        "mde_sesoi_ratio": ([*real_all, sesoi_missing], [weak_target]),
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
    # The reproduction metrics need what plan_discrepancy (or n_required_plan) needs.
    for metric in REPRODUCTION_METRICS:
        base = "n_required_plan" if metric == "n_required_with_dropout" else "plan_discrepancy"
        specs.setdefault(metric, specs[base])
    for metric, conditions in (more or {}).items():
        inputs, rest = specs[metric]
        specs[metric] = (inputs, [*conditions, *rest])
    for metric, value in out.items():
        # direction_used is always known (where applicable).
        if metric in design.not_applicable or metric == "direction_used":
            continue
        inputs, conditions = specs.get(metric, ([*plan_all, *real_all], []))
        _explain_nulls(notes, positions, metric, value, inputs, conditions)


# -- retrospective inference: Type S/M, the reported result, CI verdicts, precision ------------


def _finite_df(df: np.ndarray) -> np.ndarray:
    """Degrees of freedom with unknown or unusable values read as a z test."""
    df = np.asarray(df, dtype=float)
    return np.where(np.isfinite(df) & (df > 0), df, np.inf)


def _texts(mask: np.ndarray, fmt, first: np.ndarray, second: np.ndarray) -> np.ndarray:
    """``fmt(a, b)`` for the masked rows, formatted once per distinct pair of values (notes
    quote a level and a df, of which a portfolio has a handful)."""
    if not mask.any():
        return np.empty(0, dtype=object)
    key = np.empty(int(mask.sum()), dtype=complex)
    key.real = np.asarray(first, dtype=float)[mask]
    second = np.asarray(second, dtype=float)[mask]
    key.imag = np.where(np.isinf(second), -1.0, second)  # -1: no df or level takes it
    codes, uniq = pd.factorize(key, use_na_sentinel=False)
    labels = np.array(
        [fmt(u.real, np.inf if u.imag == -1.0 else u.imag) for u in uniq], dtype=object
    )
    return labels[codes]


def _distribution(df: float) -> str:
    return "normal" if not np.isfinite(df) else f"t, {df:g} df"


def _reference(level: float, df: float) -> str:
    return f"{level * 100:.4g}% level, {_distribution(df)}"


def _test_reference(sides: float, df: float) -> str:
    return f"{_sided(sides)}, {_distribution(df)}"


def _sided(sides: float) -> str:
    return "two-sided" if sides == 2 else "one-sided"


def _retro_metrics(
    design: Design,
    rows: pd.DataFrame,
    positions: np.ndarray,
    notes: _Notes,
    out: dict[str, np.ndarray],
    test: TestSpec,
    plan: Scenario,
    real: Scenario,
    effect: np.ndarray,
    sesoi: np.ndarray,
) -> dict[str, np.ndarray]:
    """Type S/M, the completed result, its CI verdict, precision and observed power.

    Everything is computed on the design's analysis scale (:meth:`Design.to_analysis`), where the
    estimate is approximately normal with the design's standard error and the null value is 0.
    A design that declares ``se_realized`` not applicable (F-test designs) has no signed effect
    and SE: only ``result_p`` and ``result_significant`` apply to it.
    """
    n = len(rows)
    nan = np.full(n, np.nan)
    d = test.direction
    alpha, sides = test.alpha, test.sides
    se_based = "se_realized" not in design.not_applicable
    reported = {c: _col(rows, c) for c in (*RESULT_COLUMNS, "observed_ci_level", "reported_power")}
    _result_from_counts(design, rows, positions, notes, reported)
    # A p printed as a bound ("< 0.001", "n.s.") is a reported result too.
    has_result = ~np.isnan(_col(rows, "observed_p_relation"))
    for c in RESULT_COLUMNS:  # as reported, or filled in from events per arm
        has_result |= ~np.isnan(reported[c])
    for c in reported_forms.RESULT_FORMS:
        has_result |= ~np.isnan(_col(rows, c))
    res_out: dict[str, np.ndarray] = {}

    to_a = design.to_analysis
    with np.errstate(all="ignore"):
        effect_a = to_a(effect)
        sesoi_a = to_a(sesoi)
        obs = {key: to_a(reported[f"observed_{key}"]) for key in ("effect", "ci_low", "ci_high")}
    df_real = _finite_df(design.analysis_df(real))
    df_plan = _finite_df(design.analysis_df(plan))
    # A test statistic or arm means, read as the effect, SE and p they imply (audit/reported.py).
    derived = reported_forms.derive_results(
        design,
        rows,
        real,
        test,
        df_real,
        {
            "effect": obs["effect"],
            "ci_low": obs["ci_low"],
            "ci_high": obs["ci_high"],
            "observed_se": reported["observed_se"],
            "observed_p": reported["observed_p"],
        },
    )
    check = reported_forms.check_reported_p(
        design, rows, real, test, df_real, derived.statistic_info
    )
    res_out["reported_p_recomputed"] = check.recomputed
    res_out["reported_p_discrepancy"] = check.discrepancy
    res_out["reported_p_as_given"] = check.as_given
    res_out["reported_p_recomputed_from"] = check.source
    for mask, text in [*derived.notes, *check.notes]:
        notes.add(positions[np.asarray(mask, dtype=bool)], _selected(mask, text))
    _note_p_check(notes, positions, check, has_result | (not se_based), rows)

    if not se_based:
        p = derived.p
        with np.errstate(invalid="ignore"):
            # The reported statistic decides over a reported p (the p is derived from it).
            p_test = np.where(np.isfinite(derived.p_test), derived.p_test, p)
            sig = np.where(np.isnan(p_test), np.nan, (p_test < alpha).astype(float))
        sig = np.where(np.isnan(sig), _significance_by_bound(rows, alpha), sig)
        res_out["result_p"] = p
        res_out["result_significant"] = sig
        na = [m for m in RETRO_METRICS if m not in res_out]
        for m in na:
            res_out[m] = np.full(n, None, dtype=object) if m in TEXT_METRICS else nan.copy()
        notes.add(
            positions,
            f"not applicable to {design.name} (its test has no single signed effect and "
            f"standard error): {', '.join(na)}",
        )
        for m, values in (("result_p", p), ("result_significant", sig)):
            notes.add(
                positions[np.isnan(values)],
                f"{m}: not computed, missing observed_p (or observed_statistic)",
            )
        return res_out

    # Design analysis: Type S / M at the planned effect and at the SESOI, realized SE.
    with np.errstate(all="ignore"):
        se_sesoi = design.se(real, sesoi)
    at_plan = retro.sign_and_magnitude_errors(d * effect_a, out["se_realized"], alpha, sides)
    at_sesoi = retro.sign_and_magnitude_errors(d * sesoi_a, se_sesoi, alpha, sides)
    res_out["type_s"] = at_plan.type_s
    res_out["exaggeration"] = at_plan.exaggeration
    res_out["type_s_at_sesoi"] = at_sesoi.type_s
    res_out["exaggeration_at_sesoi"] = at_sesoi.exaggeration
    with np.errstate(invalid="ignore"):
        q_plan = retro.critical_value(alpha / sides, df_plan)
        q_real = retro.critical_value(alpha / sides, df_real)
    res_out["ci_halfwidth_plan"] = q_plan * out["se_plan"]
    res_out["ci_halfwidth_realized"] = q_real * out["se_realized"]

    # The reported result, completed.
    df_result = _finite_df(derived.df)
    res = retro.complete_results(
        np.where(np.isnan(obs["effect"]), derived.effect, obs["effect"]),
        np.where(np.isnan(reported["observed_se"]), derived.se, reported["observed_se"]),
        obs["ci_low"],
        obs["ci_high"],
        derived.p,
        df=df_result,
        alpha=alpha,
        sides=sides,
        direction=d,
        ci_level=_reported_level(reported["observed_ci_level"]),
    )
    by_interval = retro.significant(
        res.ci_low, res.ci_high, res.p, alpha=alpha, sides=sides, direction=d
    )
    # A reported interval or SE decides; otherwise the study's own test does, through its most
    # direct p (the statistic's, the arm means' t test, the reported p, the t test of d), which
    # an interval derived from that p may not match exactly (a standardized difference's SE).
    interval_given = np.isfinite(reported["observed_se"]) | (
        np.isfinite(obs["ci_low"]) & np.isfinite(obs["ci_high"])
    )
    with np.errstate(invalid="ignore"):
        by_test = (derived.p_test < alpha).astype(float)
    sig = np.where(interval_given | np.isnan(derived.p_test), by_interval, by_test)
    sig = np.where(np.isnan(sig), _significance_by_bound(rows, alpha), sig)
    verdict = retro.ci_verdicts(
        res.ci_low, res.ci_high, sig, effect_a, sesoi_a, direction=d, either=test.either
    )
    with np.errstate(all="ignore"):
        res_out["result_effect"] = np.where(
            np.isnan(reported["observed_effect"]),
            design.from_analysis(res.effect),
            reported["observed_effect"],
        )
        res_out["result_se"] = res.se
        res_out["result_ci_level"] = np.where(np.isfinite(res.ci_low), res.ci_level, np.nan)
        res_out["result_ci_low"] = design.from_analysis(res.ci_low)
        res_out["result_ci_high"] = design.from_analysis(res.ci_high)
        res_out["result_p"] = res.p
        res_out["result_significant"] = sig
        res_out["ci_verdict"] = verdict
        halfwidth = (res.ci_high - res.ci_low) / 2.0
        res_out["ci_halfwidth_observed"] = halfwidth
        res_out["ci_halfwidth_ratio_plan"] = halfwidth / res_out["ci_halfwidth_plan"]
        res_out["ci_halfwidth_ratio_realized"] = halfwidth / res_out["ci_halfwidth_realized"]
        statistic = np.where(
            np.isfinite(derived.statistic), d * derived.statistic, d * res.effect / res.se
        )
        statistic = np.where(
            np.isfinite(statistic),
            statistic,
            retro.statistic_from_p(res.p, df_result, sides),
        )
    res_out["observed_power"] = retro.observed_power(statistic, df_result, alpha, sides)
    res_out["observed_power_from_p"] = retro.observed_power_from_p(
        reported["observed_p"], df_real, alpha, sides
    )

    for m in design.not_applicable:
        if m in res_out:
            res_out[m] = np.full(n, None, dtype=object) if m in TEXT_METRICS else nan.copy()
    _note_reported_power(notes, positions, reported["reported_power"], res_out)

    _note_retro(
        _RetroRows(design, rows, positions, plan, real, effect, test, effect_a, sesoi_a, df_result),
        notes,
        res_out,
        res,
        reported,
        has_result,
        sig,
    )
    return res_out


def _result_from_counts(
    design: Design,
    rows: pd.DataFrame,
    positions: np.ndarray,
    notes: _Notes,
    reported: dict[str, np.ndarray],
) -> None:
    """Fill in the reported result from events per arm (or the realized proportions) where the
    row reports no estimate, SE or interval, with a note; where it reports one, the counts are
    not used, with a note too. Designs without counts (no ``counted_result``) are left alone."""
    counted = getattr(design, "counted_result", None)
    if counted is None:
        return
    effect, se, source = counted(rows)
    given = (
        np.isfinite(reported["observed_effect"])
        | np.isfinite(reported["observed_se"])
        | np.isfinite(reported["observed_ci_low"])
        | np.isfinite(reported["observed_ci_high"])
    )
    use = (source > 0) & ~given
    reported["observed_effect"] = np.where(use, effect, reported["observed_effect"])
    reported["observed_se"] = np.where(use, se, reported["observed_se"])
    how = design.counted_note()
    names = {1: design.count_columns(), 2: design.rate_columns()}
    for code, columns in names.items():
        notes.add(
            positions[use & (source == code)],
            f"observed_effect and observed_se derived from {columns} ({how})",
        )
        notes.add(
            positions[given & (source == code)],
            f"{columns} not used for the result: the reported observed_effect, observed_se or "
            "interval is used",
        )
    partial = design.partial_counts(rows) & (source == 0)
    notes.add(
        positions[partial],
        f"{design.count_columns()} incomplete: the result needs both arms' events and sizes; "
        "not used",
    )


def _selected(mask: np.ndarray, text: object) -> object:
    """A note's text for the rows of ``mask``: one text, or the masked part of one per row."""
    if isinstance(text, np.ndarray) and text.shape == np.shape(mask):
        return text[np.asarray(mask, dtype=bool)]
    return text


def _note_p_check(
    notes: _Notes,
    positions: np.ndarray,
    check: reported_forms.PCheck,
    has_result: np.ndarray,
    rows: pd.DataFrame,
) -> None:
    """Why ``reported_p_recomputed`` (and the other reported_p metrics) are null on a row that
    reports a result."""
    given = np.isfinite(_col(rows, "observed_p")) | np.isfinite(_col(rows, "observed_p_relation"))
    notes.add(
        positions[has_result & ~given],
        "not computed (no p-value reported to check): reported_p_recomputed, "
        "reported_p_discrepancy, reported_p_as_given, reported_p_recomputed_from",
    )
    notes.add(
        positions[has_result & given & np.isnan(check.discrepancy)],
        "not computed (no other reported form of the result to recompute the reported p from; "
        "a test statistic, the estimate with its SE or interval, or arm means and SDs would "
        "do): reported_p_recomputed, reported_p_discrepancy, reported_p_recomputed_from",
    )


#: Level of a reported interval whose level is not given: what papers report.
DEFAULT_CI_LEVEL = 0.95


def _reported_level(level: np.ndarray) -> np.ndarray:
    """The level of each reported interval: as given, else :data:`DEFAULT_CI_LEVEL`."""
    return np.where(np.isnan(level), DEFAULT_CI_LEVEL, level)


#: How far (a share of the half-width) a reported estimate may lie from the middle of its
#: interval, on the analysis scale, before a note says so (rounding of printed numbers stays
#: well within it; a ratio's interval read on the wrong scale, or a typo, does not).
OFF_CENTRE_SHARE = 0.15


def _note_off_centre(
    design: Design, positions: np.ndarray, notes: _Notes, reported: dict[str, np.ndarray]
) -> None:
    """Note a reported estimate that lies far from the middle of its reported interval on the
    analysis scale, where intervals are symmetric: the numbers may be on another scale."""
    with np.errstate(all="ignore"):
        e = design.to_analysis(reported["observed_effect"])
        lo = design.to_analysis(reported["observed_ci_low"])
        hi = design.to_analysis(reported["observed_ci_high"])
        share = np.abs(e - (lo + hi) / 2.0) / ((hi - lo) / 2.0)
    off = np.isfinite(share) & (share > OFF_CENTRE_SHARE)
    if not off.any():
        return
    scale = {"survival": "log hazard ratio", "correlation": "Fisher z"}.get(design.name)
    if scale is None and design.is_ratio:
        scale = f"log {design.noun}"
    where = f"the {scale} scale" if scale else "the scale of the estimate"
    hint = (
        "an odds or risk ratio's interval is symmetric on the log scale, so give such results "
        "on that scale, or with a design that reads ratios (effect_measure for proportions)"
        if scale is None
        else "check that the estimate and its limits are on the scale of the design"
    )
    texts = [
        f"observed_effect {format_number(v)} lies far from the middle of its interval "
        f"({format_number(a)} to {format_number(b)}) on {where}, where intervals are symmetric: "
        f"{hint}; the interval gives the SE and the verdict, the estimate is used as reported"
        for v, a, b in zip(
            reported["observed_effect"][off],
            reported["observed_ci_low"][off],
            reported["observed_ci_high"][off],
            strict=True,
        )
    ]
    notes.add(positions[off], np.array(texts, dtype=object))


def _significance_by_bound(rows: pd.DataFrame, alpha: np.ndarray) -> np.ndarray:
    """Significance from a p printed as a bound ("< 0.001", "n.s."), nan where it cannot tell:
    below a bound at or under alpha is significant, above one at or over alpha is not."""
    bound, relation = _col(rows, "observed_p_bound"), _col(rows, "observed_p_relation")
    with np.errstate(invalid="ignore"):
        return np.where(
            (relation < 0) & (bound <= alpha),
            1.0,
            np.where((relation > 0) & ((bound >= alpha) | np.isnan(bound)), 0.0, np.nan),
        )


#: How far a reported post-hoc power may be from the observed power and still "match" it.
_REPORTED_POWER_TOLERANCE = 0.05


def _note_reported_power(
    notes: _Notes, positions: np.ndarray, reported: np.ndarray, res_out: dict[str, np.ndarray]
) -> None:
    """Say whether a reported post-hoc power is the observed power (a transform of p)."""
    implied = np.where(
        np.isfinite(res_out["observed_power_from_p"]),
        res_out["observed_power_from_p"],
        res_out["observed_power"],
    )
    given = np.isfinite(reported)
    known = given & np.isfinite(implied)
    with np.errstate(invalid="ignore"):
        close = known & (np.abs(reported - implied) <= _REPORTED_POWER_TOLERANCE)
    if not given.any():
        return
    text = np.array([f"{r:.2f}" for r in np.where(given, reported, 0.0)], dtype=object)
    imp = np.array([f"{v:.2f}" for v in np.where(known, implied, 0.0)], dtype=object)
    notes.add(
        positions[close],
        "reported_power "
        + text[close]
        + " matches the observed power implied by the result ("
        + imp[close]
        + "): it is the p-value in another form (Hoenig & Heisey 2001)",
    )
    far = known & ~close
    notes.add(
        positions[far],
        "reported_power "
        + text[far]
        + " differs from the observed power implied by the result ("
        + imp[far]
        + "): it may have been computed at a planned effect, which would be legitimate",
    )
    notes.add(
        positions[given & ~known],
        "reported_power given without a result to compare it with (no effect with SE or p)",
    )


@dataclass
class _RetroRows:
    """One design's rows as the retrospective metrics see them (for their notes)."""

    design: Design
    rows: pd.DataFrame
    positions: np.ndarray
    plan: Scenario
    real: Scenario
    effect: np.ndarray
    test: TestSpec
    effect_a: np.ndarray
    sesoi_a: np.ndarray
    df_real: np.ndarray


def _note_retro(
    ctx: _RetroRows,
    notes: _Notes,
    res_out: dict[str, np.ndarray],
    res: retro.CompletedResults,
    reported: dict[str, np.ndarray],
    has_result: np.ndarray,
    sig: np.ndarray,
) -> None:
    """Notes for the retrospective metrics: why each is null, and what was derived from what."""
    design, rows, positions = ctx.design, ctx.rows, ctx.positions
    effect_a, sesoi_a, df_real = ctx.effect_a, ctx.sesoi_a, ctx.df_real
    d, alpha, sides = ctx.test.direction, ctx.test.alpha, ctx.test.sides
    skip = set(design.not_applicable)
    real_src = design.sources("realized")
    plan_src = design.sources("planned")
    real_all = [(np.isnan(ctx.real[k]), real_src[k]) for k in ctx.real if k in real_src]
    plan_all = [(np.isnan(ctx.plan[k]), plan_src[k]) for k in ctx.plan if k in plan_src]
    eff_missing = (np.isnan(ctx.effect), design.effect_sources())
    sesoi_missing = (np.isnan(_col(rows, "sesoi")), "sesoi")
    zero = "the effect is zero, so a significant estimate has no sign to get wrong"
    design_specs = {
        "type_s": ([*real_all, eff_missing], [(effect_a == 0, f"not defined: {zero}")]),
        "exaggeration": ([*real_all, eff_missing], [(effect_a == 0, f"not defined: {zero}")]),
        "type_s_at_sesoi": ([*real_all, sesoi_missing], [(sesoi_a == 0, f"not defined: {zero}")]),
        "exaggeration_at_sesoi": (
            [*real_all, sesoi_missing],
            [(sesoi_a == 0, f"not defined: {zero}")],
        ),
        "ci_halfwidth_plan": (plan_all, []),
        "ci_halfwidth_realized": (real_all, []),
    }
    for metric, (inputs, conditions) in design_specs.items():
        if metric not in skip:
            _explain_nulls(notes, positions, metric, res_out[metric], inputs, conditions)

    # Rows that report no result: one note for the whole group of result metrics.
    none = ~has_result
    listed = [m for m in RESULT_METRICS if m not in skip]
    notes.add(
        positions[none],
        "no result reported (observed_effect, observed_se, observed_ci_low/high, observed_p, "
        "observed_statistic, observed_mean1/2): not computed: " + ", ".join(listed),
    )
    some = has_result
    need_ci = "needs the effect with its SE, both CI limits, or the effect with observed_p"
    result_reasons = {
        "result_effect": "needs observed_effect, both CI limits, the arm means or a signed test "
        "statistic the realized design can scale",
        "result_se": "needs observed_se, both CI limits, the arm SDs, or the effect with "
        "observed_p or a test statistic",
        "result_ci_level": need_ci,
        "result_ci_low": need_ci,
        "result_ci_high": need_ci,
        "result_p": "needs observed_p, a test statistic, or the effect with its SE or CI",
        "result_significant": "needs a confidence interval, observed_p or a test statistic",
        "ci_halfwidth_observed": need_ci,
        "observed_power": "needs the effect with its SE or CI, observed_p or a test statistic",
        "observed_power_from_p": "observed_p not reported",
    }
    for metric, reason in result_reasons.items():
        if metric in skip:
            continue
        hit = some & np.isnan(res_out[metric])
        notes.add(positions[hit], f"{metric}: not computed, {reason}")
    for metric, other in (
        ("ci_halfwidth_ratio_plan", "ci_halfwidth_plan"),
        ("ci_halfwidth_ratio_realized", "ci_halfwidth_realized"),
    ):
        if metric in skip:
            continue
        hit = some & np.isnan(res_out[metric])
        why = np.where(
            np.isnan(res_out["ci_halfwidth_observed"]), need_ci, f"{other} not computed"
        ).astype(object)
        notes.add(positions[hit], f"{metric}: not computed, " + why[hit])
    if "ci_verdict" not in skip:
        verdict = res_out["ci_verdict"]
        null = some & pd.isna(verdict)
        no_ref = (
            null
            & np.isfinite(res.ci_low)
            & (np.isnan(effect_a) | ctx.test.either)
            & np.isnan(sesoi_a)
        )
        notes.add(
            positions[no_ref],
            "ci_verdict: not significant, and there is no planned_effect or sesoi to compare "
            "the interval with",
        )
        notes.add(
            positions[null & ~no_ref],
            "ci_verdict: not computed, no confidence interval (" + need_ci + ") and no "
            "significant observed_p",
        )

    # What was derived from what.
    scale = " on the analysis scale" if type(design).to_analysis is not Design.to_analysis else ""
    level_in = _reported_level(reported["observed_ci_level"])
    mask = res.effect_from == retro.FROM_CI
    notes.add(
        positions[mask], f"observed_effect derived: midpoint of the confidence interval{scale}"
    )
    mask = res.se_from == retro.FROM_CI
    notes.add(
        positions[mask],
        "observed_se derived from the confidence interval ("
        + _texts(mask, _reference, level_in, df_real)
        + ")",
    )
    mask = res.se_from == retro.FROM_P
    notes.add(
        positions[mask],
        "observed_se derived from observed_effect and observed_p ("
        + _texts(mask, _test_reference, sides, df_real)
        + ")",
    )
    mask = res.p_from == retro.FROM_EFFECT_SE
    notes.add(
        positions[mask],
        "observed_p derived from the effect and its standard error ("
        + _texts(mask, _test_reference, sides, df_real)
        + ")",
    )
    reported_ci = np.isfinite(reported["observed_ci_low"]) & np.isfinite(
        reported["observed_ci_high"]
    )
    mask = (res.ci_from == retro.FROM_EFFECT_SE) & reported_ci
    notes.add(
        positions[mask],
        "the reported interval is not at the level of the study's test; result_ci_low/high are "
        "the interval at that level ("
        + _texts(mask, _reference, res.ci_level, df_real)
        + "), effect ± q × SE",
    )
    mask = (res.ci_from == retro.FROM_EFFECT_SE) & ~reported_ci
    notes.add(
        positions[mask],
        "confidence interval derived as effect ± q × SE ("
        + _texts(mask, _reference, res.ci_level, df_real)
        + ")",
    )
    notes.add(
        positions[res.ci_unused],
        "only one confidence limit reported: the interval is not used",
    )
    _note_off_centre(design, positions, notes, reported)
    # Consistency and direction of the verdict.
    with np.errstate(invalid="ignore"):
        by_p = reported["observed_p"] < alpha
    disagree = (
        np.isfinite(reported["observed_p"])
        & (res.ci_from == retro.REPORTED)
        & (by_p != (sig == 1.0))
    )
    notes.add(
        positions[disagree],
        "the reported p-value and confidence interval disagree about significance at the "
        "study's alpha; the interval decides result_significant and ci_verdict",
    )
    detected = sig == 1.0
    with np.errstate(invalid="ignore"):
        near = np.minimum(d * res.ci_low, d * res.ci_high)
        far = np.maximum(d * res.ci_low, d * res.ci_high)
        opposite = detected & (far < 0) & ~ctx.test.either
        smaller = detected & (near > 0) & (np.abs(effect_a) > far)
    notes.add(positions[opposite], "significant in the direction opposite to the one used")
    notes.add(
        positions[smaller],
        "significant, but the interval excludes the planned effect: the true effect is likely "
        "smaller than the study was powered for",
    )
