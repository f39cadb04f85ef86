"""Per-study metrics: apply each design's vectorised maths to its rows, one column per quantity.

Every metric that comes out null gets a note saying why: the input columns it needed that the row
left blank, or the condition that makes it undefined. Rows are processed one *design* at a time
(a handful of groups), never one row at a time.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from audit import retro
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
    "mde_sesoi_ratio": "|MDE| / |SESOI| on the design's analysis scale (log for hazard ratios, "
    "Fisher z for correlations): above 1, effects that still matter could go undetected",
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
    "excludes_planned_effect or inconclusive (the smallest reference effect excluded is named)",
    "ci_halfwidth_observed": "half-width of the result's confidence interval (test's level, "
    "analysis scale)",
    "ci_halfwidth_ratio_plan": "ci_halfwidth_observed / ci_halfwidth_plan (above 1: less "
    "precise than planned)",
    "ci_halfwidth_ratio_realized": "ci_halfwidth_observed / ci_halfwidth_realized (above 1: less "
    "precise than the realized design implies)",
    "observed_power": "power at the observed effect: a transform of the p-value shown only to "
    "make that plain (Hoenig & Heisey 2001); never evidence about the study",
    "observed_power_from_p": "the same, computed from the reported observed_p alone",
}

#: Metrics whose values are text (all others are numbers).
TEXT_METRICS = frozenset({"ci_verdict"})

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
    table : the ``table`` of :class:`audit.validate.Validated`.
    valid : which rows passed validation; other rows get null metrics and no notes.
    """
    n = len(table)
    # Plain arrays filled design by design, one frame at the end (pandas' per-column item
    # assignment costs more than the arithmetic of some designs).
    columns: dict[str, np.ndarray] = {
        name: np.full(n, None, dtype=object) if name in TEXT_METRICS else np.full(n, np.nan)
        for name in METRICS
    }
    design_col = table["design"].to_numpy(dtype=object)
    groups = [
        (design, np.flatnonzero(valid & (design_col == name))) for name, design in DESIGNS.items()
    ]
    groups = [(design, positions) for design, positions in groups if len(positions)]
    notes = _Notes()
    for (_, positions), (computed, group_notes) in zip(
        groups, _group_metrics(table, groups), strict=True
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
    table: pd.DataFrame, groups: list[tuple[Design, np.ndarray]]
) -> list[tuple[dict[str, np.ndarray], _Notes]]:
    """Metrics and notes of each group of rows (rows of one design), in the order given."""
    out = []
    for design, positions in groups:
        notes = _Notes()
        out.append((_design_metrics(design, table.iloc[positions], positions, notes), notes))
    return out


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
        out["mde_sesoi_ratio"] = np.abs(design.to_analysis(out["mde"])) / np.abs(
            design.to_analysis(sesoi)
        )
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
    foreign = [m for m in METRICS if m not in out and m not in RETRO_METRICS]
    if foreign:
        notes.add(positions, f"not applicable to {design.name}: {', '.join(foreign)}")

    _note_nulls(design, rows, positions, notes, out, plan, real, effect, sesoi, test)
    for mask, text in design.fallback_notes(rows):
        notes.add(positions[np.asarray(mask, dtype=bool)], text)
    out.update(_retro_metrics(design, rows, positions, notes, out, test, plan, real, effect, sesoi))
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
    for metric, value in out.items():
        if metric in design.not_applicable:
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
    # A p printed as a bound ("< 0.001", "n.s.") is a reported result too.
    has_result = ~np.isnan(_col(rows, "observed_p_relation"))
    for c in RESULT_COLUMNS:
        has_result |= ~np.isnan(reported[c])
    res_out: dict[str, np.ndarray] = {}

    if not se_based:
        p = reported["observed_p"]
        with np.errstate(invalid="ignore"):
            sig = np.where(np.isnan(p), np.nan, (p < alpha).astype(float))
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
        no_p = np.isnan(p)
        for m in ("result_p", "result_significant"):
            notes.add(positions[no_p], f"{m}: not computed, missing observed_p")
        return res_out

    to_a = design.to_analysis
    with np.errstate(all="ignore"):
        effect_a = to_a(effect)
        sesoi_a = to_a(sesoi)
        obs = {key: to_a(reported[f"observed_{key}"]) for key in ("effect", "ci_low", "ci_high")}
    df_real = _finite_df(design.analysis_df(real))
    df_plan = _finite_df(design.analysis_df(plan))

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
    res = retro.complete_results(
        obs["effect"],
        reported["observed_se"],
        obs["ci_low"],
        obs["ci_high"],
        reported["observed_p"],
        df=df_real,
        alpha=alpha,
        sides=sides,
        direction=d,
        ci_level=reported["observed_ci_level"],
    )
    sig = retro.significant(res.ci_low, res.ci_high, res.p, alpha=alpha, sides=sides, direction=d)
    sig = np.where(np.isnan(sig), _significance_by_bound(rows, alpha), sig)
    verdict = retro.ci_verdicts(res.ci_low, res.ci_high, sig, effect_a, sesoi_a, direction=d)
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
        statistic = d * res.effect / res.se
        statistic = np.where(
            np.isfinite(statistic),
            statistic,
            retro.statistic_from_p(reported["observed_p"], df_real, sides),
        )
    res_out["observed_power"] = retro.observed_power(statistic, df_real, alpha, sides)
    res_out["observed_power_from_p"] = retro.observed_power_from_p(
        reported["observed_p"], df_real, alpha, sides
    )

    for m in design.not_applicable:
        if m in res_out:
            res_out[m] = np.full(n, None, dtype=object) if m in TEXT_METRICS else nan.copy()
    _note_reported_power(notes, positions, reported["reported_power"], res_out)

    _note_retro(
        _RetroRows(design, rows, positions, plan, real, effect, test, effect_a, sesoi_a, df_real),
        notes,
        res_out,
        res,
        reported,
        has_result,
        sig,
    )
    return res_out


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
        "no result reported (observed_effect, observed_se, observed_ci_low/high, observed_p): "
        "not computed: " + ", ".join(listed),
    )
    some = has_result
    need_ci = "needs the effect with its SE, both CI limits, or the effect with observed_p"
    result_reasons = {
        "result_effect": "needs observed_effect or both CI limits",
        "result_se": "needs observed_se, both CI limits, or the effect with observed_p",
        "result_ci_level": need_ci,
        "result_ci_low": need_ci,
        "result_ci_high": need_ci,
        "result_p": "needs observed_p, or the effect with its SE or CI",
        "result_significant": "needs a confidence interval or observed_p",
        "ci_halfwidth_observed": need_ci,
        "observed_power": "needs the effect with its SE or CI, or observed_p",
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
        no_ref = null & np.isfinite(res.ci_low) & np.isnan(effect_a) & np.isnan(sesoi_a)
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
    level_in = np.where(
        np.isnan(reported["observed_ci_level"]), res.ci_level, reported["observed_ci_level"]
    )
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
        opposite = detected & (far < 0)
        smaller = detected & (near > 0) & (np.abs(effect_a) > far)
    notes.add(positions[opposite], "significant in the direction opposite to the planned effect")
    notes.add(
        positions[smaller],
        "significant, but the interval excludes the planned effect: the true effect is likely "
        "smaller than the study was powered for",
    )
