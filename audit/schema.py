"""The input contract: one spec per column (:data:`COLUMNS`), the table that validates input
(:mod:`audit.validate`), documents it (``study-audit columns``, the template's guide sheet) and
names what rules may test.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

from audit.designs import DESIGNS

__all__ = ["COLUMNS", "FLAG_VALUES", "MISSING_TOKENS", "SPECS", "Column"]

Kind = Literal["text", "design", "number", "integer", "choice", "flag"]


@dataclass(frozen=True)
class Column:
    """Specification of one contract column: type, allowed range, default and meaning."""

    name: str
    kind: Kind
    group: str
    meaning: str
    default: float | str | None = None
    low: float | None = None
    high: float | None = None
    low_open: bool = True
    high_open: bool = True
    choices: tuple[str, ...] = ()
    #: A proportion: values above 1 are almost surely percentages written without '%'.
    proportion: bool = False

    def range_text(self) -> str:
        if self.kind == "flag":
            return "yes or no (also true/false, 1/0)"
        if self.kind in ("choice", "design"):
            return "one of " + ", ".join(self.choices)
        lo = "" if self.low is None else f"{self.low:g}"
        hi = "" if self.high is None else f"{self.high:g}"
        whole = "a whole number" if self.kind == "integer" else "a number"
        if self.low is not None and self.high is not None:
            left = "(" if self.low_open else "["
            right = ")" if self.high_open else "]"
            return f"{whole} in {left}{lo}, {hi}{right}"
        if self.low is not None:
            return f"{whole} {'>' if self.low_open else '>='} {lo}"
        return whole


def _p(name: str, group: str, meaning: str, **kw: object) -> Column:
    return Column(name, "number", group, meaning, low=0.0, high=1.0, proportion=True, **kw)


def _count(name: str, group: str, meaning: str, low: float = 1.0) -> Column:
    return Column(name, "integer", group, meaning, low=low, low_open=False)


#: Every column of the input contract (DESIGN.md section 3), in the order of the template.
COLUMNS: tuple[Column, ...] = (
    Column("study_id", "text", "identity", "Unique identifier of the study (required)."),
    Column("title", "text", "identity", "Free text: the study's title or short description."),
    Column(
        "design",
        "design",
        "identity",
        "Study design; one of the design names (required).",
        choices=tuple(DESIGNS),
    ),
    _p("alpha", "test", "Significance level per comparison.", default=0.05),
    Column(
        "sides",
        "choice",
        "test",
        "1 for a one-sided, 2 for a two-sided test.",
        default="2",
        choices=("1", "2"),
    ),
    _p("target_power", "test", "Power the study aimed for.", default=0.8),
    Column(
        "comparisons",
        "integer",
        "test",
        "Number of primary comparisons sharing alpha (Bonferroni).",
        default=1.0,
        low=1.0,
        low_open=False,
    ),
    _count(
        "planned_n1",
        "sizes",
        "Planned analysable units in group 1 (one-group designs: N; cluster designs: clusters).",
    ),
    _count("planned_n2", "sizes", "Planned analysable units in group 2."),
    _count("realized_n1", "sizes", "Units actually analysed in group 1."),
    _count("realized_n2", "sizes", "Units actually analysed in group 2."),
    _p(
        "planned_dropout",
        "sizes",
        "Attrition allowance the plan states (share lost, e.g. 0.1): each group's required "
        "size is divided by 1 - dropout before it is compared with the planned size, which is "
        "then the number to recruit. Blank: none.",
        low_open=False,
    ),
    Column(
        "planned_sd",
        "number",
        "variability",
        "Outcome SD assumed in planning (paired: SD of differences).",
        low=0.0,
    ),
    Column("realized_sd", "number", "variability", "Outcome SD observed.", low=0.0),
    Column(
        "effect_scale",
        "choice",
        "effects",
        "'raw' (outcome units) or 'd' (standardized mean differences).",
        default="raw",
        choices=("raw", "d"),
    ),
    Column(
        "direction",
        "choice",
        "effects",
        "Which way the study hoped the effect goes: 'increase' or 'decrease' (for ratios: "
        "above or below 1). Blank: the sign of the planned effect, or either way when there is "
        "none (a one-sided test then needs it).",
        choices=("increase", "decrease"),
    ),
    Column(
        "hypothesis",
        "choice",
        "test",
        "What the study set out to show: 'superiority' (a difference), 'non_inferiority' (not "
        "worse than the margin; a one-sided test at alpha, so sides 1 or blank) or "
        "'equivalence' (within the margin both ways: two one-sided tests, each at alpha).",
        default="superiority",
        choices=("superiority", "non_inferiority", "equivalence"),
    ),
    Column(
        "margin",
        "number",
        "effects",
        "Non-inferiority or equivalence margin: a positive magnitude in effect units (d where "
        "effects are standardized; ratios on the ratio scale, e.g. 1.25 for a hazard ratio, a "
        "value below 1 read as its reciprocal). Required unless hypothesis is superiority.",
    ),
    Column(
        "control_effect",
        "number",
        "effects",
        "Non-inferiority: the active control's effect against placebo (from earlier trials), in "
        "effect units (ratios on the ratio scale); the margin should preserve part of it.",
    ),
    Column("planned_effect", "number", "effects", "Effect the study was powered for."),
    _p("planned_p1", "effects", "Planned control-group proportion."),
    _p("planned_p2", "effects", "Planned intervention-group proportion."),
    _p("realized_p1", "effects", "Realized control-group proportion."),
    Column("sesoi", "number", "effects", "Smallest effect size of interest, in effect units."),
    Column("groups", "integer", "sizes", "Number of groups (k_means).", low=2.0, low_open=False),
    Column(
        "predictors",
        "integer",
        "sizes",
        "Predictors tested (regression numerator df).",
        low=1.0,
        low_open=False,
    ),
    Column("covariates", "integer", "sizes", "Covariates adjusted for.", low=0.0, low_open=False),
    _p(
        "covariate_r2",
        "variability",
        "Share of outcome variance the covariates explain.",
        low_open=False,
    ),
    _p(
        "planned_icc",
        "variability",
        "Intracluster correlation assumed in planning.",
        low_open=False,
    ),
    _p("realized_icc", "variability", "Intracluster correlation observed.", low_open=False),
    Column(
        "planned_cluster_size",
        "number",
        "sizes",
        "Planned mean units per cluster.",
        low=1.0,
        low_open=False,
    ),
    Column(
        "realized_cluster_size",
        "number",
        "sizes",
        "Realized mean units per cluster.",
        low=1.0,
        low_open=False,
    ),
    Column(
        "cluster_size_cv",
        "number",
        "variability",
        "Coefficient of variation of cluster sizes.",
        default=0.0,
        low=0.0,
        low_open=False,
    ),
    Column(
        "continuity_correction",
        "flag",
        "test",
        "two_proportions: continuity-corrected z test (yes/no; blank: the run's default).",
    ),
    _count("planned_events", "sizes", "Events expected in planning (survival)."),
    _count("realized_events", "sizes", "Events observed (survival)."),
    Column(
        "planned_se", "number", "variability", "Planned standard error of the estimate.", low=0.0
    ),
    Column(
        "realized_se", "number", "variability", "Realized standard error of the estimate.", low=0.0
    ),
    Column("df", "number", "test", "Degrees of freedom of the estimate (blank: normal).", low=0.0),
    Column("observed_effect", "number", "results", "The reported effect estimate."),
    Column("observed_se", "number", "results", "Its standard error.", low=0.0),
    Column("observed_ci_low", "number", "results", "Lower confidence limit."),
    Column("observed_ci_high", "number", "results", "Upper confidence limit."),
    _p(
        "observed_ci_level",
        "results",
        "Level of the reported confidence interval (blank: 0.95, what papers report).",
    ),
    _p("observed_p", "results", "Reported p-value of the study's test.", high_open=False),
    _p(
        "reported_power",
        "results",
        "A post-hoc power value the study reported.",
        low_open=False,
        high_open=False,
    ),
    Column(
        "observed_statistic",
        "number",
        "results",
        "A reported test statistic (its kind in statistic_type): t or z signed as the "
        "difference group 2 - group 1; F and chi2 not negative; r within (-1, 1).",
    ),
    Column(
        "statistic_type",
        "choice",
        "results",
        "Kind of observed_statistic: t, z, F, chi2 or r.",
        choices=("t", "z", "f", "chi2", "r"),
    ),
    Column(
        "statistic_df1",
        "number",
        "results",
        "Degrees of freedom of the statistic: t's df, or F's and chi2's first df (blank for "
        "chi2: 1).",
        low=1.0,
        low_open=False,
    ),
    Column(
        "statistic_df2",
        "number",
        "results",
        "Second degrees of freedom of an F statistic (the error df).",
        low=1.0,
        low_open=False,
    ),
    Column("observed_mean1", "number", "results", "Observed mean of group 1 (control)."),
    Column("observed_mean2", "number", "results", "Observed mean of group 2 (intervention)."),
    Column("observed_sd1", "number", "results", "Observed SD of group 1.", low=0.0),
    Column("observed_sd2", "number", "results", "Observed SD of group 2.", low=0.0),
    Column(
        "outcome_family",
        "text",
        "results",
        "Label grouping studies of the same outcome on the same effect scale (for the pooled "
        "basis of the excess-significance test).",
    ),
    # -- binary, count and multi-period outcomes (DESIGN.md section 9.2) --
    _p(
        "realized_p2",
        "effects",
        "Realized intervention-group proportion (with realized_n1/n2 and realized_p1 it gives "
        "the reported result in effect_measure).",
    ),
    Column(
        "effect_measure",
        "choice",
        "effects",
        "two_proportions, cluster_two_proportions: the measure planned_effect, sesoi, the "
        "reported result and the MDE are in: 'risk_difference' (p2 - p1), 'risk_ratio' "
        "(p2 / p1) or 'odds_ratio'.",
        default="risk_difference",
        choices=("risk_difference", "risk_ratio", "odds_ratio"),
    ),
    _count(
        "observed_events1",
        "results",
        "Events observed in group 1 (control); with realized_n1/n2 and observed_events2 they "
        "give the reported result in effect_measure (two_rates: with exposure).",
        low=0.0,
    ),
    _count("observed_events2", "results", "Events observed in group 2 (intervention).", low=0.0),
    Column(
        "planned_rate1",
        "number",
        "effects",
        "two_rates: planned control-group event rate per unit of exposure time.",
        low=0.0,
    ),
    Column(
        "planned_rate2",
        "number",
        "effects",
        "two_rates: planned intervention-group event rate per unit of exposure time.",
        low=0.0,
    ),
    Column(
        "realized_rate1",
        "number",
        "effects",
        "two_rates: realized control-group event rate per unit of exposure time.",
        low=0.0,
    ),
    Column(
        "exposure",
        "number",
        "sizes",
        "two_rates: mean follow-up per unit, in the rates' time unit (blank: 1).",
        low=0.0,
    ),
    Column(
        "dispersion",
        "number",
        "variability",
        "two_rates: negative-binomial dispersion k (variance mu + k mu^2); blank or 0: Poisson.",
        low=0.0,
        low_open=False,
    ),
    Column(
        "periods",
        "integer",
        "sizes",
        "stepped_wedge: measurement periods (sequences = periods - 1).",
        low=2.0,
        low_open=False,
    ),
    Column(
        "period_correlation",
        "number",
        "variability",
        "crossover: correlation of a subject's two period outcomes; given, planned_sd and "
        "realized_sd are read as between-subject SDs of one period's outcome and converted to "
        "the SD of the period difference, sd * sqrt(2 (1 - correlation)).",
        low=-1.0,
        high=1.0,
    ),
)

SPECS: dict[str, Column] = {c.name: c for c in COLUMNS}

#: Accepted spellings of a yes/no column (``flag``), after lower-casing and trimming.
FLAG_VALUES: dict[str, float] = {
    "yes": 1.0,
    "y": 1.0,
    "true": 1.0,
    "1": 1.0,
    "no": 0.0,
    "n": 0.0,
    "false": 0.0,
    "0": 0.0,
}

#: Cell text meaning "not reported", compared after lower-casing and trimming.
MISSING_TOKENS = frozenset(
    {"", "na", "n/a", "n.a.", "nr", "not reported", "-", "--", "—", "–", ".", "nan", "none", "null"}
)
