"""Published sample-size methods per design: reproduce a stated calculation the way its authors
may have made it.

Recalculated sample sizes of published trials often differ from the reported ones, and the
commonest reason is an unstated method rather than an error: the normal approximation instead of
the exact t, Cohen's arcsine h instead of the pooled z test, Freedman's events instead of
Schoenfeld's, a continuity correction, a dropout allowance [1]_. This module keeps, for each
design, the methods a planner commonly used (:data:`PLAN_METHODS`), each a vectorised function of
the row's planned inputs, and :func:`reproduce` says which of them comes closest to the planned
size and whether it is within the tolerance of the rule ``sample-size-not-reproducible``.

How a method is written
-----------------------
A method's ``size`` function takes the rows' :class:`PlanInputs` and returns the *continuous*
solution in the design's sizing unit (the first group's size for two-group designs, the total N
for one-group and F designs, the number of events for ``survival``), nan where it has none. The
design's ``groups`` function (one per design, shared by its methods) rounds that solution the way
the design's own ``required_size`` does — each group rounded up, the planned allocation kept —
and returns the groups as ``(size, how many such groups)`` pairs. A stated dropout allowance is
applied to each rounded group (``ceil(size / (1 − dropout))``), as a planner would.

Registering the methods of a new design is one call::

    register(
        "crossover",
        one_group,
        PlanMethod("exact t", design_size, "...", default=True),
        PlanMethod("normal approximation", normal_one_group, "..."),
    )

where ``design_size`` is the design's own calculation (:meth:`TDesign.first_group_size`). A
design with sample sizes but no registered methods is still checked, by its own
``required_size`` alone (the method then reads "the audit's default method").

References
----------
.. [1] Charles, P., Giraudeau, B., Dechartres, A., Baron, G. & Ravaud, P. (2009). Reporting of
   sample size calculation in randomised controlled trials: review. BMJ 338:b1732.
"""

from __future__ import annotations

import functools
import tomllib
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy import special

from audit._format import format_number
from audit.designs import DESIGNS, Design, Scenario, TestSpec
from audit.designs._base import allocation_ratio
from audit.designs._exact_r import exact_r_size
from audit.designs._power import f_power, t_ncp_for_power
from audit.designs._solve import smallest_size
from audit.designs.cluster import design_effect
from audit.designs.proportions import cohens_h
from audit.designs.survival import schoenfeld_events

__all__ = [
    "COMMON_DROPOUTS",
    "FALLBACK_NAME",
    "PLAN_METHODS",
    "RULE_ID",
    "DesignMethods",
    "PlanInputs",
    "PlanMethod",
    "Reproduction",
    "bundled_tolerance",
    "methods_for",
    "register",
    "reproduce",
    "reproduction_notes",
    "tolerance_in_force",
]

#: The rule whose ``max_discrepancy`` is the tolerance a method must meet.
RULE_ID = "sample-size-not-reproducible"
PARAMETER = "max_discrepancy"
#: Dropout allowances tried, as a guess, on a plan that states none and reproduces with none.
COMMON_DROPOUTS = (0.10, 0.15, 0.20)
#: The method of a design that has no registered methods: its own ``required_size``.
FALLBACK_NAME = "the audit's default method"


@functools.cache
def bundled_tolerance() -> float:
    """``max_discrepancy`` of the bundled rule file (the default of :func:`reproduce`)."""
    from audit.resources import bundled_dir

    doc = tomllib.loads((bundled_dir("rules") / f"{RULE_ID}.toml").read_text(encoding="utf-8"))
    return float(doc["rule"][0]["parameters"][PARAMETER]["value"])


def tolerance_in_force(ruleset: Any) -> float:
    """``max_discrepancy`` of the rule in a resolved rule set (a user's override counts, also
    when the rule is switched off: the metrics still say which method reproduces the plan)."""
    rule = getattr(ruleset, "rules", {}).get(RULE_ID)
    if rule is None or PARAMETER not in rule.parameters:
        return bundled_tolerance()
    return float(rule.parameters[PARAMETER].value)


# -- the registry ---------------------------------------------------------------------------------


@dataclass(frozen=True)
class PlanInputs:
    """The planned inputs of one design's rows, as methods read them (arrays, one per row)."""

    design: Design
    plan: Scenario
    effect: np.ndarray
    test: TestSpec

    @functools.cached_property
    def z_alpha(self) -> np.ndarray:
        """Critical value of the z test: ``z(1 − alpha / sides)``."""
        return -special.ndtri(self.test.alpha / self.test.sides)

    @functools.cached_property
    def z_power(self) -> np.ndarray:
        """``z(power)``: with :attr:`z_alpha`, the textbook normal multiplier."""
        return special.ndtri(self.test.power)

    @functools.cached_property
    def usable(self) -> np.ndarray:
        """Rows a closed form applies to: a target power above alpha (and below 1), and a
        planned effect pointing the way the test looks."""
        with np.errstate(invalid="ignore", divide="ignore"):
            towards = self.test.direction * self.design.to_analysis(self.effect) > 0
        return (self.test.power > self.test.alpha) & (self.test.power < 1) & towards

    @functools.cached_property
    def ratio(self) -> np.ndarray:
        """Allocation n2 / n1 of the plan (1 where the sizes are not given)."""
        return allocation_ratio(self.plan) if "n2" in self.plan else np.ones(len(self.effect))

    def full(self, value: float) -> np.ndarray:
        return np.full(len(self.effect), float(value))


#: Continuous solution of a method, in the design's sizing unit (nan where it has none).
SizeFunction = Callable[[PlanInputs], np.ndarray]
#: A row mask (where a method applies, or where it is the audit's default).
RowMask = Callable[[PlanInputs], np.ndarray]
#: Rounded groups of a solution: ``(size, count)`` pairs, the total being sum(size * count).
Groups = list[tuple[np.ndarray, np.ndarray | float]]
GroupFunction = Callable[[PlanInputs, np.ndarray], Groups]


@dataclass(frozen=True)
class PlanMethod:
    """A published sample-size method of one design.

    Attributes
    ----------
    name : the method in words, as ``plan_reproduced_by`` reports it (contract text).
    size : the continuous solution (see the module docstring).
    reference : where the method is published.
    applies : rows the method applies to (default: all); elsewhere its size is nan.
    default : where it is the audit's own method (True: every row); ties go to it.
    """

    name: str
    size: SizeFunction
    reference: str
    applies: RowMask | None = None
    default: RowMask | bool = False

    def default_mask(self, inputs: PlanInputs) -> np.ndarray:
        if callable(self.default):
            return np.asarray(self.default(inputs), dtype=bool)
        return np.full(len(inputs.effect), bool(self.default))


@dataclass(frozen=True)
class DesignMethods:
    """The methods of one design, in order of preference for ties, and its rounding."""

    groups: GroupFunction
    methods: tuple[PlanMethod, ...]


#: Design name -> its published methods. Add a design with :func:`register`.
PLAN_METHODS: dict[str, DesignMethods] = {}


def register(design: str, groups: GroupFunction, *methods: PlanMethod) -> None:
    """Register the methods of ``design`` (replacing any registered before).

    ``groups`` rounds a continuous solution into groups as the design's ``required_size``
    does; the methods are listed in order of preference for ties after the default (which
    must be one of them, for every row).
    """
    if not methods:
        raise ValueError(f"{design}: register at least one method")
    names = [m.name for m in methods]
    if len(set(names)) != len(names):
        raise ValueError(f"{design}: method names must differ: {names}")
    PLAN_METHODS[design] = DesignMethods(groups, tuple(methods))


def _required_total(inputs: PlanInputs) -> np.ndarray:
    return inputs.design.required_size(inputs.plan, inputs.effect, inputs.test)


def _as_one_group(inputs: PlanInputs, total: np.ndarray) -> Groups:
    return [(total, 1.0)]


def methods_for(design: Design) -> DesignMethods:
    """The registered methods of ``design``; for a design with none, its own calculation."""
    found = PLAN_METHODS.get(design.name)
    if found is not None:
        return found
    own = PlanMethod(FALLBACK_NAME, _required_total, "the design's own method", default=True)
    return DesignMethods(_as_one_group, (own,))


# -- rounding, as the designs' own required_size does it -------------------------------------------

#: Guards against solver noise at exact integers (64.0000000001 -> 64, not 65), as the designs.
_SOLVED = 1.0 - 1e-10
_CLOSED = 1.0 - 1e-12


def two_groups(inputs: PlanInputs, n1: np.ndarray) -> Groups:
    """Group 1 of continuous size ``n1`` and group 2 at the planned allocation, each rounded
    up (the t, z and cluster designs' convention)."""
    x = n1 * _SOLVED
    return [(np.ceil(x), 1.0), (np.ceil(x * inputs.ratio * _CLOSED), 1.0)]


def one_group(inputs: PlanInputs, n: np.ndarray) -> Groups:
    """One sample of continuous size ``n``, rounded up."""
    return [(np.ceil(n * _SOLVED), 1.0)]


def _one_group_closed(inputs: PlanInputs, n: np.ndarray) -> Groups:
    # A closed form (Fisher's z) carries rounding noise only.
    return [(np.ceil(n * _CLOSED), 1.0)]


def equal_groups(inputs: PlanInputs, total: np.ndarray) -> Groups:
    """``groups`` equal groups holding the continuous total N, each rounded up (k means)."""
    k = inputs.plan["groups"]
    with np.errstate(invalid="ignore", divide="ignore"):
        return [(np.ceil(total * _SOLVED / k), k)]


def patients_for_events(inputs: PlanInputs, events: np.ndarray) -> Groups:
    """Events rounded up, turned into patients through the planned event share (planned
    events / planned patients) and split by the allocation share, each group rounded up
    (the survival design's convention)."""
    plan = inputs.plan
    d = np.where(np.isfinite(events) & (events > 0), np.ceil(events * _CLOSED), np.nan)
    with np.errstate(invalid="ignore", divide="ignore"):
        event_share = plan["events"] / (plan["n1"] + plan["n2"])
        total = np.where(event_share > 0, d / event_share, np.nan)
    p = plan["share"]
    return [(np.ceil(total * p * _CLOSED), 1.0), (np.ceil(total * (1.0 - p) * _CLOSED), 1.0)]


# -- methods --------------------------------------------------------------------------------------


def design_size(inputs: PlanInputs) -> np.ndarray:
    """The design's own exact calculation (t designs and proportions: the continuous first
    group's size)."""
    design: Any = inputs.design
    return design.first_group_size(inputs.plan, inputs.effect, inputs.test)


def _bounded(inputs: PlanInputs, n: np.ndarray) -> np.ndarray:
    """A closed-form size where it applies, at least the smallest testable design."""
    design: Any = inputs.design
    with np.errstate(invalid="ignore"):
        n = np.maximum(n, design.min_n1(inputs.plan))
    return np.where(inputs.usable & np.isfinite(n) & (n > 0), n, np.nan)


def _residual_variance(inputs: PlanInputs) -> np.ndarray:
    sd = inputs.plan["sd"]
    r2 = inputs.plan.get("covariate_r2", np.zeros(len(sd)))
    return sd * sd * (1.0 - r2)


def _normal_one_group(inputs: PlanInputs) -> np.ndarray:
    with np.errstate(invalid="ignore", divide="ignore"):
        z = inputs.z_alpha + inputs.z_power
        return z * z * inputs.plan["sd"] ** 2 / inputs.effect**2


def normal_one_group(inputs: PlanInputs) -> np.ndarray:
    """``n = ((z_α + z_β) σ / δ)²``."""
    return _bounded(inputs, _normal_one_group(inputs))


def guenther_one_group(inputs: PlanInputs) -> np.ndarray:
    """Normal size plus ``z_α² / 2`` (Guenther 1981)."""
    return _bounded(inputs, _normal_one_group(inputs) + inputs.z_alpha**2 / 2.0)


def _normal_two_groups(inputs: PlanInputs) -> np.ndarray:
    with np.errstate(invalid="ignore", divide="ignore"):
        z = inputs.z_alpha + inputs.z_power
        spread = _residual_variance(inputs) * (1.0 + 1.0 / inputs.ratio)
        return z * z * spread / inputs.effect**2


def normal_two_groups(inputs: PlanInputs) -> np.ndarray:
    """``n1 = (z_α + z_β)² σ² (1 − R²) (1 + 1/r) / δ²`` (R² = 0 without covariates)."""
    return _bounded(inputs, _normal_two_groups(inputs))


def guenther_two_groups(inputs: PlanInputs) -> np.ndarray:
    """Normal size plus ``z_α² / (2 (1 + r))`` in group 1: ``z_α² / 4`` per group at 1:1
    (Guenther 1981), the whole sample's ``z_α² / 2`` shared by allocation otherwise."""
    extra = inputs.z_alpha**2 / (2.0 * (1.0 + inputs.ratio))
    return _bounded(inputs, _normal_two_groups(inputs) + extra)


def _adjusted(inputs: PlanInputs) -> np.ndarray:
    """Rows planned with covariate adjustment (a count or an R² stated)."""
    plan = inputs.plan
    return (plan["covariates"] > 0) | (plan["covariate_r2"] > 0)


def _unadjusted(inputs: PlanInputs) -> np.ndarray:
    return ~_adjusted(inputs)


def _cluster_individuals_to_clusters(inputs: PlanInputs, individuals: np.ndarray) -> np.ndarray:
    """Group 1's individuals inflated by the design effect, in clusters of the planned size."""
    plan = inputs.plan
    deff = design_effect(plan["cluster_size"], plan["icc"], plan["cluster_size_cv"])
    with np.errstate(invalid="ignore", divide="ignore"):
        return individuals * deff / plan["cluster_size"]


def _cluster_normal(inputs: PlanInputs) -> np.ndarray:
    with np.errstate(invalid="ignore", divide="ignore"):
        z = inputs.z_alpha + inputs.z_power
        sd = inputs.plan["sd"]
        individuals = z * z * sd * sd * (1.0 + 1.0 / inputs.ratio) / inputs.effect**2
    return _cluster_individuals_to_clusters(inputs, individuals)


def cluster_normal(inputs: PlanInputs) -> np.ndarray:
    """Individuals by the normal approximation × design effect, in clusters of size m."""
    return _bounded(inputs, _cluster_normal(inputs))


def cluster_normal_plus_one(inputs: PlanInputs) -> np.ndarray:
    """:func:`cluster_normal` plus one cluster per arm (Hayes & Bennett 1999)."""
    return _bounded(inputs, _cluster_normal(inputs) + 1.0)


def cluster_exact_t_individuals(inputs: PlanInputs) -> np.ndarray:
    """Individuals by the exact two-sample t (individual df) × design effect, in clusters."""
    k = len(inputs.effect)
    individual = {
        "n1": np.ones(k),
        "n2": inputs.ratio.copy(),
        "sd": inputs.plan["sd"],
        "covariates": np.zeros(k),
        "covariate_r2": np.zeros(k),
    }
    two_means: Any = DESIGNS["two_means"]
    n = two_means.first_group_size(individual, inputs.effect, inputs.test)
    return _bounded(inputs, _cluster_individuals_to_clusters(inputs, n))


def _with_correction(corrected: float) -> SizeFunction:
    def size(inputs: PlanInputs) -> np.ndarray:
        plan = {**inputs.plan, "continuity_correction": inputs.full(corrected)}
        design: Any = inputs.design
        return design.first_group_size(plan, inputs.effect, inputs.test)

    return size


def _intervention_rate(inputs: PlanInputs) -> np.ndarray:
    """p2 implied by the control rate and the planned effect in the row's effect measure."""
    design: Any = inputs.design
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        return design.intervention_rate(inputs.plan["p1"], inputs.effect)


def _proportions_bounded(inputs: PlanInputs, n1: np.ndarray) -> np.ndarray:
    p1 = inputs.plan["p1"]
    p2 = _intervention_rate(inputs)
    inside = (p1 > 0) & (p1 < 1) & (p2 > 0) & (p2 < 1)
    with np.errstate(invalid="ignore"):
        n1 = np.maximum(n1, np.maximum(1.0, 1.0 / inputs.ratio))
    return np.where(inputs.usable & inside & np.isfinite(n1), n1, np.nan)


def proportions_unpooled(inputs: PlanInputs) -> np.ndarray:
    """``n1 = (z_α + z_β)² (p1 q1 + p2 q2 / r) / (p2 − p1)²``: unpooled variance under H0."""
    p1 = inputs.plan["p1"]
    p2 = _intervention_rate(inputs)
    with np.errstate(invalid="ignore", divide="ignore"):
        z = inputs.z_alpha + inputs.z_power
        n1 = z * z * (p1 * (1 - p1) + p2 * (1 - p2) / inputs.ratio) / (p2 - p1) ** 2
    return _proportions_bounded(inputs, n1)


def proportions_arcsine(inputs: PlanInputs) -> np.ndarray:
    """``n1 = (z_α + z_β)² (1 + 1/r) / h²`` with Cohen's h (variance of 2 asin √p is 1/n)."""
    p1 = inputs.plan["p1"]
    with np.errstate(invalid="ignore", divide="ignore"):
        h = cohens_h(p1, _intervention_rate(inputs))
        z = inputs.z_alpha + inputs.z_power
        n1 = z * z * (1.0 + 1.0 / inputs.ratio) / (h * h)
    return _proportions_bounded(inputs, n1)


def fisher_z(inputs: PlanInputs) -> np.ndarray:
    """``n = (M / atanh r)² + 3``, M the normal multiplier for the target power (both tails)."""
    test = inputs.test
    with np.errstate(invalid="ignore", divide="ignore"):
        z = test.direction * np.arctanh(inputs.effect)
        n = (t_ncp_for_power(test.power, np.inf, test.alpha, test.sides) / z) ** 2 + 3.0
    return np.where((z > 0) & np.isfinite(n), n, np.nan)


def exact_r(inputs: PlanInputs) -> np.ndarray:
    """Smallest n whose exact test of r = 0 reaches the target power (see
    :mod:`audit.designs._exact_r`), searched from the Fisher-z size."""
    test = inputs.test
    rho = test.direction * inputs.effect
    return exact_r_size(rho, test.alpha, test.sides, test.power, fisher_z(inputs))


def f_design_total(inputs: PlanInputs) -> np.ndarray:
    """The F designs' own calculation: the continuous total N (noncentral F, λ = f² N)."""
    design: Any = inputs.design
    return design.continuous_total(inputs.plan, inputs.effect, inputs.test)


def _f2(inputs: PlanInputs) -> np.ndarray:
    design: Any = inputs.design
    return design.f2(inputs.effect)


def noncentral_chi2(inputs: PlanInputs) -> np.ndarray:
    """``N = λ / f²`` with λ the noncentrality at which a chi-square test on the numerator df
    reaches the target power: the large-sample limit of the F test (denominator df infinite)."""
    design: Any = inputs.design
    test = inputs.test
    dfn = design.dfn(inputs.plan)
    f2 = _f2(inputs)
    with np.errstate(invalid="ignore", divide="ignore"):
        critical = special.chdtri(dfn, test.alpha)
        lam = special.chndtrinc(critical, dfn, 1.0 - test.power)
        total = np.maximum(lam / f2, design.spent(inputs.plan) + 1.0)
    ok = (test.power > test.alpha) & (test.power < 1) & (f2 > 0) & np.isfinite(total)
    return np.where(ok, total, np.nan)


def _covariates_given(inputs: PlanInputs) -> np.ndarray:
    return inputs.plan["covariates"] > 0


def _power_cohen_lambda(total, f2, dfn, spent, q, alpha):
    return f_power(f2 * (total - q), dfn, total - spent, alpha)


def regression_cohen_lambda(inputs: PlanInputs) -> np.ndarray:
    """N at which the F test reaches the target power with Cohen's noncentrality
    ``λ = f² (u + v + 1) = f² (N − q)`` (q covariates partialled out)."""
    design: Any = inputs.design
    test = inputs.test
    plan = inputs.plan
    q, f2 = plan["covariates"], _f2(inputs)
    dfn, spent = design.dfn(plan), design.spent(plan)
    out = np.full(len(f2), np.nan)
    ok = (test.power > test.alpha) & (test.power < 1) & (f2 > 0) & (q > 0)
    ok &= np.isfinite(dfn) & np.isfinite(spent)
    if ok.any():
        guess = noncentral_chi2(inputs)[ok] + q[ok]
        out[ok] = smallest_size(
            _power_cohen_lambda,
            test.power[ok],
            np.where(np.isfinite(guess), guess, spent[ok] + 2.0),
            lower=spent[ok] + 1.0,
            args=(f2[ok], dfn[ok], spent[ok], q[ok], test.alpha[ok]),
        )
    return out


def schoenfeld(inputs: PlanInputs) -> np.ndarray:
    """Events ``(M / ln HR)² / (p (1 − p))`` (the survival design's own calculation)."""
    test = inputs.test
    with np.errstate(invalid="ignore", divide="ignore"):
        return schoenfeld_events(
            inputs.effect, inputs.plan["share"], test.alpha, test.sides, test.power
        )


def freedman(inputs: PlanInputs) -> np.ndarray:
    """Events ``(z_α + z_β)² (1 + φ HR)² / (φ (1 − HR)²)``, φ = n2 / n1 (Freedman 1982)."""
    p = inputs.plan["share"]
    hr = inputs.effect
    with np.errstate(invalid="ignore", divide="ignore"):
        phi = (1.0 - p) / p
        z = inputs.z_alpha + inputs.z_power
        d = z * z * (1.0 + phi * hr) ** 2 / (phi * (1.0 - hr) ** 2)
    return np.where(inputs.usable & np.isfinite(d) & (d > 0), d, np.nan)


def _fleiss_default(corrected: bool) -> RowMask:
    def mask(inputs: PlanInputs) -> np.ndarray:
        return (inputs.plan["continuity_correction"] > 0) == corrected

    return mask


# The references, numbered as in docs/methods/plan-reproduction.md.
_COHEN = "Cohen (1988), Statistical Power Analysis for the Behavioral Sciences, 2nd ed."
_NORMAL = "the normal approximation to the t test (e.g. Chow, Shao & Wang 2008, ch. 3)"
_GUENTHER = "Guenther, W. C. (1981). The American Statistician 35:243-244"
_BORM = "Borm, Fransen & Lemmens (2007). J. Clin. Epidemiol. 60:1234-1238"
_DONNER = "Donner & Klar (2000), Design and Analysis of Cluster Randomization Trials, ch. 5"
_HAYES = "Hayes, R. J. & Bennett, S. (1999). Int. J. Epidemiol. 28:319-326"
_FLEISS = "Fleiss, Levin & Paik (2003), Statistical Methods for Rates and Proportions, 4.2"
_FISHER = "Fisher (1921), Metron 1:3-32"
_HOTELLING = "Hotelling (1953), J. R. Statist. Soc. B 15:193-232 (exact distribution of r)"
_SCHOENFELD = "Schoenfeld, D. A. (1983). Biometrics 39:499-503"
_FREEDMAN = "Freedman, L. S. (1982). Statistics in Medicine 1:121-129"

_EXACT_T = PlanMethod("exact t", design_size, "noncentral t, " + _COHEN, default=True)
_NORMAL_ONE = PlanMethod("normal approximation", normal_one_group, _NORMAL)
_GUENTHER_ONE = PlanMethod(
    "normal approximation, Guenther correction", guenther_one_group, _GUENTHER
)
for _name in ("one_mean", "paired_means"):
    register(_name, one_group, _EXACT_T, _NORMAL_ONE, _GUENTHER_ONE)

register(
    "two_means",
    two_groups,
    PlanMethod("exact t", design_size, "noncentral t, " + _COHEN, _unadjusted, _unadjusted),
    PlanMethod("normal approximation", normal_two_groups, _NORMAL, _unadjusted),
    PlanMethod(
        "normal approximation, Guenther correction", guenther_two_groups, _GUENTHER, _unadjusted
    ),
    PlanMethod("ANCOVA, noncentral t", design_size, _BORM, _adjusted, _adjusted),
    PlanMethod("ANCOVA, normal approximation × (1 − R²)", normal_two_groups, _BORM, _adjusted),
)

register(
    "cluster_two_means",
    two_groups,
    PlanMethod("exact t on clusters", design_size, "noncentral t on J − 2 df", default=True),
    PlanMethod("design effect × normal approximation", cluster_normal, _DONNER),
    PlanMethod("design effect × exact t", cluster_exact_t_individuals, _DONNER),
    PlanMethod(
        "design effect × normal approximation, one extra cluster per arm",
        cluster_normal_plus_one,
        _HAYES,
    ),
)

register(
    "two_proportions",
    two_groups,
    PlanMethod("Fleiss", _with_correction(0.0), _FLEISS, default=_fleiss_default(False)),
    PlanMethod(
        "Fleiss continuity correction",
        _with_correction(1.0),
        _FLEISS,
        default=_fleiss_default(True),
    ),
    PlanMethod("normal approximation, unpooled variance", proportions_unpooled, _FLEISS),
    PlanMethod("arcsine (Cohen's h)", proportions_arcsine, _COHEN + ", ch. 6"),
)

register(
    "correlation",
    _one_group_closed,
    PlanMethod("Fisher z", fisher_z, _FISHER, default=True),
    PlanMethod("exact r", exact_r, _HOTELLING),
)

_F = PlanMethod("noncentral F", f_design_total, "λ = f² N, " + _COHEN, default=True)
_CHI2 = PlanMethod("noncentral chi-square (large sample)", noncentral_chi2, _COHEN + ", 9.4")
register("k_means", equal_groups, _F, _CHI2)
register(
    "regression",
    one_group,
    _F,
    PlanMethod(
        "noncentral F, λ = f²(N − q)", regression_cohen_lambda, _COHEN + ", 9.3",
        _covariates_given,
    ),
    _CHI2,
)  # fmt: skip

register(
    "survival",
    patients_for_events,
    PlanMethod("Schoenfeld", schoenfeld, _SCHOENFELD, default=True),
    PlanMethod("Freedman", freedman, _FREEDMAN),
)


# -- the designs of binary, count and multi-period outcomes ------------------------------------

_JULIOUS = "Julious, S. A. (2004). Statistics in Medicine 23:1921-1986, section 5"
_CONNOR = "Connor, R. J. (1987). Biometrics 43:207-211"
_MIETTINEN = "Miettinen, O. S. (1968). Biometrics 24:339-352, as given by Connor (1987)"
_DONNER_BB = "Donner, Birkett & Buck (1981). Am. J. Epidemiol. 114:906-914"
_RATES = "Zhu, H. & Lakkis, H. (2014). Statistics in Medicine 33:376-387"
_HUSSEY = "Hussey, M. A. & Hughes, J. P. (2007). Contemporary Clinical Trials 28:182-191"
_WOERTMAN = "Woertman, W. et al. (2013). J. Clin. Epidemiol. 66:752-758"


def two_sequences(inputs: PlanInputs, n: np.ndarray) -> Groups:
    """A crossover's subjects in two equal sequences, each rounded up (an even total)."""
    with np.errstate(invalid="ignore"):
        return [(np.ceil(n * _SOLVED / 2.0), 2.0)]


def whole_sequences(inputs: PlanInputs, clusters: np.ndarray) -> Groups:
    """A stepped wedge's clusters in equal sequences (``periods − 1``), each rounded up, at
    least two clusters in all (the stepped-wedge design's convention)."""
    s = inputs.plan["periods"] - 1.0
    with np.errstate(invalid="ignore", divide="ignore"):
        per = np.maximum(np.ceil(clusters * _CLOSED / s), np.ceil(2.0 / s))
    return [(np.where(np.isfinite(clusters), per, np.nan), s)]


def own_total(inputs: PlanInputs) -> np.ndarray:
    """The design's own required size (already whole, rounded by the design)."""
    return _required_total(inputs)


def paired_miettinen(inputs: PlanInputs) -> np.ndarray:
    """Pairs ``(z_α √ψ + z_β √(ψ − δ² (3 + ψ) / (4 ψ)))² / δ²`` (Miettinen's variance of the
    McNemar statistic under the alternative), ψ = p1 + p2 the discordant share."""
    p1 = inputs.plan["p1"]
    with np.errstate(invalid="ignore", divide="ignore"):
        delta = inputs.effect
        psi = 2.0 * p1 + delta
        spread = psi - delta * delta * (3.0 + psi) / (4.0 * psi)
        n = (inputs.z_alpha * np.sqrt(psi) + inputs.z_power * np.sqrt(spread)) ** 2 / delta**2
    ok = inputs.usable & (p1 >= 0) & (p1 + delta >= 0) & (psi <= 1) & (spread > 0)
    return np.where(ok & np.isfinite(n), np.maximum(n, 1.0), np.nan)


def _rate_variances(inputs: PlanInputs) -> tuple[np.ndarray, np.ndarray]:
    """Per-first-group-unit variances of the log rate ratio: at the true rates (V1) and at the
    pooled rate of both arms (V0, the rates equal under H0)."""
    plan = inputs.plan
    t, k, rate1, r = plan["exposure"], plan["dispersion"], plan["rate1"], inputs.ratio
    with np.errstate(invalid="ignore", divide="ignore"):
        rate2 = rate1 * inputs.effect
        v1 = (1.0 / (rate1 * t) + k) + (1.0 / (rate2 * t) + k) / r
        pooled = (rate1 + r * rate2) / (1.0 + r)
        v0 = (1.0 / (pooled * t) + k) * (1.0 + 1.0 / r)
    return v1, v0


def rates_true_variance(inputs: PlanInputs) -> np.ndarray:
    """The two_rates design's own size: ``n1 = V1 (M / θ)²``, V1 at the true rates, M the
    normal multiplier with both tails (Zhu & Lakkis' variance under the alternative)."""
    test = inputs.test
    v1, _ = _rate_variances(inputs)
    multiplier = t_ncp_for_power(test.power, np.inf, test.alpha, test.sides)
    with np.errstate(invalid="ignore", divide="ignore"):
        n1 = v1 * (multiplier / np.log(inputs.effect)) ** 2
    return np.where(inputs.usable & np.isfinite(n1) & (n1 > 0), n1, np.nan)


def rates_null_variance(inputs: PlanInputs) -> np.ndarray:
    """``n1 = (z_α √V0 + z_β √V1)² / θ²``: the variance at the pooled rate under H0 for the
    critical value, at the true rates for the power (the pooled form of the Wald test)."""
    v1, v0 = _rate_variances(inputs)
    with np.errstate(invalid="ignore", divide="ignore"):
        n1 = (inputs.z_alpha * np.sqrt(v0) + inputs.z_power * np.sqrt(v1)) ** 2
        n1 = n1 / np.log(inputs.effect) ** 2
    return np.where(inputs.usable & np.isfinite(n1) & (n1 > 0), n1, np.nan)


def stepped_wedge_hussey(inputs: PlanInputs) -> np.ndarray:
    """Clusters ``c (M / θ)²`` with ``c / I`` Hussey & Hughes' variance (the design's own)."""
    from audit.designs.stepped_wedge import stepped_wedge_variance

    plan, test = inputs.plan, inputs.test
    c = stepped_wedge_variance(1.0, plan["periods"], plan["cluster_size"], plan["sd"], plan["icc"])
    multiplier = t_ncp_for_power(test.power, np.inf, test.alpha, test.sides)
    with np.errstate(invalid="ignore", divide="ignore"):
        clusters = c * (multiplier / inputs.effect) ** 2
    return np.where(inputs.usable & np.isfinite(clusters), clusters, np.nan)


def stepped_wedge_woertman(inputs: PlanInputs) -> np.ndarray:
    """Woertman's design effect on an individually randomised trial sized by the normal
    approximation, each arm rounded up first: ``I = N_ind · DE_sw / m`` with
    ``DE_sw = (1 + ρ(k m + m − 1)) / (1 + ρ(k m / 2 + m − 1)) · 3 (1 − ρ) / (2 (k − 1/k))``,
    k = periods − 1 steps, one baseline period and one period per step, m per cluster-period."""
    plan = inputs.plan
    rho, m, k = plan["icc"], plan["cluster_size"], plan["periods"] - 1.0
    with np.errstate(invalid="ignore", divide="ignore"):
        z = inputs.z_alpha + inputs.z_power
        per_arm = np.ceil(2.0 * (z * plan["sd"] / inputs.effect) ** 2 * _CLOSED)
        de = (1.0 + rho * (k * m + m - 1.0)) / (1.0 + rho * (k * m / 2.0 + m - 1.0))
        de = de * 3.0 * (1.0 - rho) / (2.0 * (k - 1.0 / k))
        clusters = 2.0 * per_arm * de / m
    return np.where(inputs.usable & np.isfinite(clusters), clusters, np.nan)


def _cluster_fleiss(inputs: PlanInputs) -> np.ndarray:
    """Control-arm clusters: Fleiss's individually randomised size × design effect / m."""
    from audit.designs.proportions import fleiss_n1

    plan, test = inputs.plan, inputs.test
    p1 = plan["p1"]
    p2 = _intervention_rate(inputs)
    with np.errstate(invalid="ignore", divide="ignore"):
        units = fleiss_n1(p1, p2, inputs.ratio, test.alpha, test.sides, test.power, 0.0)
        deff = design_effect(plan["cluster_size"], plan["icc"], plan["cluster_size_cv"])
        clusters = units * deff / plan["cluster_size"]
    inside = (p1 > 0) & (p1 < 1) & (p2 > 0) & (p2 < 1)
    return np.where(inputs.usable & inside & np.isfinite(clusters), clusters, np.nan)


def cluster_fleiss(inputs: PlanInputs) -> np.ndarray:
    """Individually randomised size (Fleiss) × design effect, in clusters of size m."""
    return np.maximum(_cluster_fleiss(inputs), 1.0)


def cluster_fleiss_plus_one(inputs: PlanInputs) -> np.ndarray:
    """:func:`cluster_fleiss` plus one cluster per arm (Hayes & Bennett 1999)."""
    return np.maximum(_cluster_fleiss(inputs) + 1.0, 1.0)


register(
    "crossover",
    two_sequences,
    PlanMethod("exact t", design_size, "noncentral t on n − 2 df, " + _JULIOUS, default=True),
    PlanMethod("normal approximation", normal_one_group, _JULIOUS),
    PlanMethod("normal approximation, Guenther correction", guenther_one_group, _GUENTHER),
)
register(
    "paired_proportions",
    one_group,
    PlanMethod("Connor", own_total, _CONNOR, default=True),
    PlanMethod("Miettinen", paired_miettinen, _MIETTINEN),
)
register(
    "two_rates",
    two_groups,
    PlanMethod("Wald test, variance at the true rates", rates_true_variance, _RATES, default=True),
    PlanMethod("Wald test, variance under H0 (pooled rate)", rates_null_variance, _RATES),
)
register(
    "stepped_wedge",
    whole_sequences,
    PlanMethod("Hussey & Hughes", stepped_wedge_hussey, _HUSSEY, default=True),
    PlanMethod("Woertman design effect × normal approximation", stepped_wedge_woertman, _WOERTMAN),
)
register(
    "cluster_two_proportions",
    two_groups,
    PlanMethod("t on clusters, design-effect variance", design_size, _DONNER_BB, default=True),
    PlanMethod("design effect × Fleiss", cluster_fleiss, _DONNER_BB),
    PlanMethod(
        "design effect × Fleiss, one extra cluster per arm", cluster_fleiss_plus_one, _HAYES
    ),
)


# -- reproducing a plan ---------------------------------------------------------------------------


def _total(groups: Groups) -> np.ndarray:
    return sum((size * count for size, count in groups), np.zeros_like(groups[0][0]))


def _inflated(groups: Groups, dropout: np.ndarray) -> np.ndarray:
    """Units to recruit: each rounded group divided by 1 − dropout and rounded up again."""
    keep = 1.0 - dropout
    with np.errstate(invalid="ignore", divide="ignore"):
        return sum(
            (np.ceil(size / keep * _CLOSED) * count for size, count in groups),
            np.zeros_like(groups[0][0]),
        )


@dataclass
class Reproduction:
    """Required sizes of every method for one design's rows, and which comes closest.

    Attributes
    ----------
    names : the methods' names, in the design's order.
    groups : per method, its rounded groups (``(size, count)`` pairs, analysable units).
    required : (methods, rows) analysable totals, nan where a method has none.
    recruited : (methods, rows) totals after the dropout allowance (= ``required`` without).
    discrepancy : (methods, rows) planned total / recruited − 1.
    default : per row, the index of the audit's own method.
    closest : per row, the index of the closest method (-1 where none has a size).
    tolerance : the tolerance in force.
    metrics : the metric columns (see :data:`audit.metrics.METRICS`).
    guess : per row, ``(dropout, method index, recruited, discrepancy)`` of the common
        allowance that would reproduce a plan stating none (nan where none would).
    """

    names: list[str]
    groups: list[Groups]
    required: np.ndarray
    recruited: np.ndarray
    discrepancy: np.ndarray
    default: np.ndarray
    closest: np.ndarray
    tolerance: float
    metrics: dict[str, np.ndarray] = field(default_factory=dict)
    guess: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray] | None = None


def _closest(discrepancy: np.ndarray, default: np.ndarray) -> np.ndarray:
    """Index of the smallest |discrepancy| per row, ties to ``default`` and then to the
    earlier method; -1 where no method has a value."""
    size = np.where(np.isnan(discrepancy), np.inf, np.abs(discrepancy))
    best = size.min(axis=0)
    # Equal sizes arrive through different arithmetic: a relative 1e-12 counts as a tie.
    tied = size <= best * (1.0 + 1e-12) + 1e-15
    rows = np.arange(discrepancy.shape[1])
    out = np.where(tied[default, rows], default, np.argmax(tied, axis=0))
    return np.where(np.isfinite(best), out, -1)


def reproduce(
    design: Design,
    plan: Scenario,
    effect: np.ndarray,
    test: TestSpec,
    planned_total: np.ndarray,
    dropout: np.ndarray,
    tolerance: float | None = None,
    entry: DesignMethods | None = None,
) -> Reproduction:
    """Required sizes by every method of ``design`` and the metrics of reproduction.

    Parameters
    ----------
    design, plan, effect, test
        The design, its planned scenario, the planned effect and the test settings.
    planned_total : array_like
        The planned size (the sum over groups, as ``n_required_plan`` counts).
    dropout : array_like
        The plan's dropout allowance in [0, 1); nan (blank) is none.
    tolerance : float, optional
        Largest |discrepancy| that counts as reproduced; default: the bundled rule's
        ``max_discrepancy``.
    entry : DesignMethods, optional
        The methods to try; default: the design's registered ones (:func:`methods_for`).
        Non-inferiority and equivalence rows pass their own (audit/hypotheses.py).

    Returns
    -------
    Reproduction
        With ``metrics``: ``n_required_plan`` (the audit's own method, analysable units),
        ``n_required_with_dropout``, ``plan_discrepancy`` (planned ÷ that − 1),
        ``plan_reproduced_by``, ``plan_discrepancy_closest``, ``plan_closest_method`` and
        ``n_required_closest``.

    Notes
    -----
    Each method's continuous solution is rounded by the design's groups function; a stated
    dropout divides each rounded group by ``1 − dropout``, rounded up again. The closest method
    has the smallest |planned ÷ required − 1|; ties go to the audit's own method, then to the
    method listed first. It reproduces the plan when that is at most ``tolerance`` (the rule
    fires above it, so the two cannot disagree).
    """
    tolerance = bundled_tolerance() if tolerance is None else float(tolerance)
    entry = methods_for(design) if entry is None else entry
    inputs = PlanInputs(design, plan, np.asarray(effect, dtype=float), test)
    k = len(inputs.effect)
    keep = np.where(np.isnan(dropout), 0.0, dropout)
    groups: list[Groups] = []
    defaults = []
    for method in entry.methods:
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            if method.applies is None:
                solution = method.size(inputs)
            else:
                applies = np.asarray(method.applies(inputs), dtype=bool)
                solution = np.full(k, np.nan)
                if applies.any():
                    # A method that does not apply to a row is not asked about it at all.
                    sub = _subset(inputs, applies)
                    solution[applies] = method.size(sub)
            groups.append(entry.groups(inputs, np.asarray(solution, dtype=float)))
        defaults.append(method.default_mask(inputs))
    with np.errstate(invalid="ignore", divide="ignore"):
        required = np.vstack([_total(g) for g in groups])
        recruited = np.vstack([_inflated(g, keep) for g in groups])
        discrepancy = planned_total / recruited - 1.0
    default_mask = np.vstack(defaults)
    default = np.where(default_mask.any(axis=0), np.argmax(default_mask, axis=0), 0)
    closest = _closest(discrepancy, default)
    rows = np.arange(k)
    names = np.array([m.name for m in entry.methods], dtype=object)
    known = closest >= 0
    pick = np.where(known, closest, 0)
    closest_disc = np.where(known, discrepancy[pick, rows], np.nan)
    within = known & (np.abs(closest_disc) <= tolerance)
    reproduced_by = np.full(k, None, dtype=object)
    reproduced_by[within] = names[pick[within]]
    closest_name = np.full(k, None, dtype=object)
    closest_name[known] = names[pick[known]]
    out = Reproduction(
        names=list(names),
        groups=groups,
        required=required,
        recruited=recruited,
        discrepancy=discrepancy,
        default=default,
        closest=closest,
        tolerance=tolerance,
    )
    out.metrics = {
        "n_required_plan": required[default, rows],
        "n_required_with_dropout": recruited[default, rows],
        "plan_discrepancy": discrepancy[default, rows],
        "plan_reproduced_by": reproduced_by,
        "plan_discrepancy_closest": closest_disc,
        "plan_closest_method": closest_name,
        "n_required_closest": np.where(known, recruited[pick, rows], np.nan),
    }
    unstated = np.isnan(dropout) & known & ~within
    if unstated.any():
        out.guess = _guess_dropout(groups, planned_total, default, unstated, tolerance)
    return out


def _subset(inputs: PlanInputs, mask: np.ndarray) -> PlanInputs:
    return PlanInputs(
        inputs.design,
        {key: value[mask] for key, value in inputs.plan.items()},
        inputs.effect[mask],
        inputs.test.subset(mask),
    )


def _guess_dropout(
    groups: Sequence[Groups],
    planned_total: np.ndarray,
    default: np.ndarray,
    rows: np.ndarray,
    tolerance: float,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """The common allowance (and method) that reproduces a plan stating none, if one does:
    the smallest |discrepancy| over :data:`COMMON_DROPOUTS` and the methods, ties to the
    smaller allowance, then to the default method, then to the method listed first."""
    k = len(planned_total)
    best = (np.full(k, np.nan), np.full(k, -1), np.full(k, np.nan), np.full(k, np.nan))
    best_size = np.full(k, np.inf)
    for allowance in COMMON_DROPOUTS:
        with np.errstate(invalid="ignore", divide="ignore"):
            recruited = np.vstack([_inflated(g, np.full(k, allowance)) for g in groups])
            discrepancy = planned_total / recruited - 1.0
        closest = _closest(discrepancy, default)
        idx = np.arange(k)
        pick = np.where(closest >= 0, closest, 0)
        disc = np.where(closest >= 0, discrepancy[pick, idx], np.nan)
        size = np.where(np.isnan(disc), np.inf, np.abs(disc))
        # Strictly better only: an equal fit keeps the smaller allowance.
        better = rows & (size <= tolerance) & (size < best_size * (1.0 - 1e-12) - 1e-15)
        best_size = np.where(better, size, best_size)
        best[0][better] = allowance
        best[1][better] = pick[better]
        best[2][better] = recruited[pick, idx][better]
        best[3][better] = disc[better]
    return best


# -- what the notes say ---------------------------------------------------------------------------


def _ints(values: np.ndarray) -> np.ndarray:
    """Sizes as text (object array), as the report prints them; '-' where not finite."""
    values = np.asarray(values, dtype=float)
    out = np.full(len(values), "-", dtype=object)
    # Whole numbers of ordinary size in one conversion; anything else as format_number does.
    plain = np.isfinite(values) & (np.abs(values) < 1e15) & (values == np.round(values))
    out[plain] = values[plain].astype(np.int64).astype(str).astype(object)
    rest = np.isfinite(values) & ~plain
    out[rest] = [format_number(v) for v in values[rest].tolist()]
    return out


def _percents(values: np.ndarray) -> np.ndarray:
    """Signed percentages with one decimal ('+12.3%', '-0.4%'; object array)."""
    values = np.asarray(values, dtype=float)
    out = np.full(len(values), "-", dtype=object)
    ok = np.isfinite(values) & (np.abs(values) < 1e12)
    tenths = np.round(values[ok] * 1000.0).astype(np.int64)
    sign = np.where(tenths < 0, "-", "+").astype(object)
    whole = (np.abs(tenths) // 10).astype(str).astype(object)
    decimal = (np.abs(tenths) % 10).astype(str).astype(object)
    out[ok] = sign + whole + "." + decimal + "%"
    return out


def _per_value(values: np.ndarray, text: Callable[[float], str]) -> np.ndarray:
    """``text(v)`` for each value, formatted once per distinct value (object array)."""
    codes, uniques = pd.factorize(np.asarray(values, dtype=float))
    return np.array([text(float(u)) for u in uniques], dtype=object)[codes]


def _share(value: float) -> str:
    return f"{value * 100:.4g}%"


def reproduction_notes(
    rep: Reproduction, planned_total: np.ndarray, dropout: np.ndarray
) -> tuple[list[tuple[np.ndarray, np.ndarray]], np.ndarray, np.ndarray]:
    """The notes about reproducing the plan, and why ``plan_reproduced_by`` is blank.

    Returns ``(notes, unmatched, reason)``: ``notes`` are ``(mask, text per masked row)``
    pairs (a dropout allowance applied; a plan that reproduces only with another method than
    the audit's own; a guessed allowance); ``unmatched`` marks rows where methods give sizes
    but none is within the tolerance, and ``reason`` (an object array over all rows) says so
    with each method's size.
    """
    k = len(planned_total)
    m = rep.metrics
    notes: list[tuple[np.ndarray, np.ndarray]] = []
    planned = _ints(planned_total)

    stated = (dropout > 0) & np.isfinite(m["n_required_plan"])
    if stated.any():
        text = (
            _per_value(
                dropout[stated],
                lambda d: (
                    f"planned_dropout {_share(d)}: each group's required size is divided "
                    f"by 1 − {d:g} and rounded up before it is compared with the planned size, "
                    "which is read as the number to recruit; the plan's power, SE, the size "
                    "ratio and the power costs use the analysable units the allowance leaves "
                    "(the planned sizes x (1 − dropout)): "
                ),
            )
            + _ints(m["n_required_plan"][stated])
            + " analysable units need "
            + _ints(m["n_required_with_dropout"][stated])
            + " recruited"
        )
        notes.append((stated, text))

    default_disc = m["plan_discrepancy"]
    names = np.array(rep.names, dtype=object)
    with np.errstate(invalid="ignore"):
        other = (
            pd.notna(m["plan_reproduced_by"])
            & (rep.closest != rep.default)
            & ~(np.abs(default_disc) <= rep.tolerance)
        )
    if other.any():
        pick = rep.closest[other]
        text = (
            "the planned size reproduces only with another published method: "
            + names[pick]
            + " requires "
            + _ints(m["n_required_closest"][other])
            + " units ("
            + _percents(m["plan_discrepancy_closest"][other])
            + "); the audit's own method, "
            + names[rep.default[other]]
            + ", requires "
            + _ints(m["n_required_with_dropout"][other])
            + " ("
            + _percents(default_disc[other])
            + "), which plan_discrepancy reports"
        )
        notes.append((other, text))

    if rep.guess is not None:
        allowance, method, recruited, disc = rep.guess
        hit = np.isfinite(allowance)
        if hit.any():
            text = (
                "a guess, the row stating no dropout allowance: the planned size ("
                + planned[hit]
                + ") would reproduce with "
                + names[method[hit]]
                + " and a "
                + _per_value(allowance[hit], _share)
                + " dropout allowance ("
                + _ints(recruited[hit])
                + " to recruit, "
                + _percents(disc[hit])
                + "); fill planned_dropout if the protocol states one"
            )
            notes.append((hit, text))

    unmatched = (rep.closest >= 0) & pd.isna(m["plan_reproduced_by"])
    reason = np.full(k, "", dtype=object)
    if unmatched.any():
        listed = np.full(int(unmatched.sum()), "", dtype=object)
        for i, name in enumerate(rep.names):
            size = rep.recruited[i, unmatched]
            given = np.isfinite(size)
            sep = np.where(listed[given] == "", "", "; ")
            listed[given] = (
                listed[given]
                + sep
                + name
                + " "
                + _ints(size[given])
                + " ("
                + _percents(rep.discrepancy[i, unmatched][given])
                + ")"
            )
        reason[unmatched] = (
            f"no listed method reproduces the planned size within {_share(rep.tolerance)}: "
            + planned[unmatched]
            + " planned; required by "
            + listed
        )
    return notes, unmatched, reason
