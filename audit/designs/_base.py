"""The interface every study design implements, and the shared t-test machinery.

A *design* turns the columns of one design's rows into *scenarios* — the planned design and the
realized design, as dictionaries of numpy arrays with one entry per row — and answers, for any
scenario and all rows at once:

* ``se``: the expected standard error of the effect estimate, in effect units;
* ``power``: the power at a given effect;
* ``mde``: the minimal detectable effect at the target power (signed: in the planned direction);
* ``required_size``: the total number of units the target power needs at a given effect.

Missing inputs are nan and propagate to nan results; :mod:`audit.metrics` turns those into notes
naming the missing columns. Nothing here loops over rows.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import pandas as pd
from scipy import special

from audit.designs._power import (
    TABLE_MIN_DF,
    NcpLookup,
    t_critical,
    t_ncp_for_power,
    t_power,
)
from audit.designs._solve import smallest_size

__all__ = ["Design", "NullReasons", "Scenario", "TDesign", "TestSpec"]

Scenario = dict[str, np.ndarray]


@dataclass(frozen=True)
class NullReasons:
    """Why a metric may come out null, for the notes (see :meth:`Design.null_explanations`).

    Attributes
    ----------
    inputs : ``(blank_mask, column label)`` pairs: a null value where the mask is set is
        explained as "missing <label>".
    conditions : ``(mask, reason)`` pairs, tried in order for null values no blank input
        explains.
    replace : True when these are the metric's only reasons (the generic ones, read from the
        scenario keys, would name the wrong columns); otherwise they are added to the generic
        ones, conditions first.
    """

    inputs: tuple[tuple[np.ndarray, str], ...] = ()
    conditions: tuple[tuple[np.ndarray, str], ...] = ()
    replace: bool = False


@dataclass(frozen=True)
class TestSpec:
    """Per-row settings of the significance test, as float arrays.

    Attributes
    ----------
    alpha : significance level of one comparison (``alpha / comparisons``, Bonferroni).
    sides : 1.0 or 2.0.
    power : the target power.
    direction : +1.0 or -1.0 on the analysis scale: the way the study hoped the effect goes
        (the ``direction`` column, else the sign of the planned effect). One-sided tests look
        this way and MDEs are reported with this sign. +1.0 where ``either`` is set.
    either : True where the row says neither (no ``direction`` and no signed planned effect):
        the test is two-sided, a SESOI is a band around zero and an MDE is a magnitude.
    """

    __test__ = False  # not a pytest test class, despite the name

    alpha: np.ndarray
    sides: np.ndarray
    power: np.ndarray
    direction: np.ndarray
    either: np.ndarray | None = None

    def __post_init__(self) -> None:
        if self.either is None:
            object.__setattr__(self, "either", np.zeros(np.shape(self.direction), dtype=bool))

    def subset(self, mask: np.ndarray) -> TestSpec:
        return TestSpec(
            self.alpha[mask],
            self.sides[mask],
            self.power[mask],
            self.direction[mask],
            self.either[mask],
        )

    def with_power(self, power: np.ndarray) -> TestSpec:
        """The same tests with another target power."""
        return TestSpec(self.alpha, self.sides, power, self.direction, self.either)

    def with_direction(self, direction: np.ndarray) -> TestSpec:
        """The same tests looking the other way where ``direction`` says so."""
        return TestSpec(self.alpha, self.sides, self.power, direction, self.either)


#: Values of the ``direction`` column, as the sign they give on the analysis scale.
DIRECTIONS = {"increase": 1.0, "decrease": -1.0}

#: Input columns every design reads (the test, the reported result, identity).
COMMON_INPUTS = frozenset(
    {
        "study_id",
        "title",
        "design",
        "alpha",
        "sides",
        "target_power",
        "comparisons",
        "direction",
        "hypothesis",
        "margin",
        "control_effect",
        "sesoi",
        "observed_effect",
        "observed_se",
        "observed_ci_low",
        "observed_ci_high",
        "observed_ci_level",
        "observed_p",
        "reported_power",
        "outcome_family",
        # A reported test statistic (audit/reported.py); arm means are read by mean designs.
        "observed_statistic",
        "statistic_type",
        "statistic_df1",
        "statistic_df2",
    }
)


def _column(rows: pd.DataFrame, name: str) -> np.ndarray:
    """Float array of a typed column; all-nan when the file lacks the column."""
    if name in rows.columns:
        return rows[name].to_numpy(dtype=float, na_value=np.nan)
    return np.full(len(rows), np.nan)


def _directions(rows: pd.DataFrame) -> np.ndarray:
    """The ``direction`` column as +1 / -1, nan where blank."""
    if "direction" not in rows.columns:
        return np.full(len(rows), np.nan)
    text = rows["direction"].to_numpy(dtype=object)
    return np.array([DIRECTIONS.get(v, np.nan) for v in text], dtype=float)


def _hypotheses(rows: pd.DataFrame) -> np.ndarray:
    """The ``hypothesis`` column as text; superiority where absent or blank."""
    if "hypothesis" not in rows.columns:
        return np.full(len(rows), "superiority", dtype=object)
    values = rows["hypothesis"].to_numpy(dtype=object)
    return np.where(pd.isna(values), "superiority", values)


def _margin_rows(rows: pd.DataFrame) -> np.ndarray:
    return np.isin(_hypotheses(rows), ("non_inferiority", "equivalence"))


def allocation_ratio(sc: Scenario) -> np.ndarray:
    """n2 / n1 of a two-group scenario; 1 (equal groups) where the sizes are not given."""
    with np.errstate(divide="ignore", invalid="ignore"):
        r = sc["n2"] / sc["n1"]
    return np.where(np.isfinite(r) & (r > 0), r, 1.0)


class Design:
    """Base class of a study design; see the module docstring for the contract.

    Subclasses set the class attributes and implement the methods that raise
    ``NotImplementedError``. Register a new design in :mod:`audit.designs`.
    """

    #: Name used in the ``design`` column.
    name: ClassVar[str]
    #: Family used to group portfolio summaries (e.g. ``median_mde_std``).
    family: ClassVar[str]
    #: Short human description, for reports and the input template.
    title: ClassVar[str]
    #: Unit of ``planned_effect``, ``sesoi``, ``mde`` for this design.
    effect_unit: ClassVar[str]
    #: Name of the standardized effect (``mde_std``), or None when there is none.
    standardized_as: ClassVar[str | None]
    #: Scenario keys read from ``planned_<key>`` / ``realized_<key>`` columns.
    stage_keys: ClassVar[tuple[str, ...]] = ()
    #: Scenario keys read from one shared column (same for plan and realization).
    shared_keys: ClassVar[tuple[str, ...]] = ()
    #: Keys the size columns use (``n1``, ``n2``); the realized-size ratio compares their sums.
    size_keys: ClassVar[tuple[str, ...]] = ("n1", "n2")
    #: Ratio metrics (realized / planned) this design reports, as
    #: ``metric -> (planned column, realized column)``; computed from the columns as written, so a
    #: blank realized value gives a null ratio even where the realized design falls back on the
    #: planned value.
    ratio_keys: ClassVar[dict[str, tuple[str, str]]] = {}
    #: Scenario keys that describe nuisance parameters (replaced by realized values for
    #: ``n_required_realized``).
    nuisance_keys: ClassVar[tuple[str, ...]] = ()
    #: Metrics that make no sense for this design, with the reason given in notes.
    not_applicable: ClassVar[dict[str, str]] = {}
    #: Effect columns of the input that hold values in this design's effect unit.
    effect_columns: ClassVar[tuple[str, ...]] = ("planned_effect", "sesoi")
    #: Input columns the design reads beyond its scenario keys and effect columns.
    extra_inputs: ClassVar[tuple[str, ...]] = ()
    #: False for tests without a direction (F tests): effects are magnitudes.
    has_direction: ClassVar[bool] = True
    #: True when power and MDE depend only on the effect's magnitude on the analysis scale; a
    #: row with no direction then needs no look at the other side (see audit.metrics).
    symmetric: ClassVar[bool] = True
    #: Columns whose sizes follow the one-group convention (total N in ``planned_n1``).
    one_group: ClassVar[bool] = False
    #: Values of the ``effect_measure`` column the design takes, its default first; empty for a
    #: design with one effect unit (which then does not read the column).
    measures: ClassVar[tuple[str, ...]] = ()
    #: The effect measure of this instance (one of ``measures``); None for one-unit designs.
    measure: str | None = None

    @property
    def is_ratio(self) -> bool:
        """Effects are ratios: no effect is 1 and the analysis scale is the log."""
        return False

    @property
    def noun(self) -> str | None:
        """What an effect is called in a sentence ("a hazard ratio of 0.8"), if the design
        names it itself."""
        return None

    # -- variants by effect measure ------------------------------------------------------------

    def with_measure(self, measure: str | None) -> Design:
        """This design with its effects in ``measure``: itself for a design with one effect unit
        or a measure it does not take (see :meth:`variants`)."""
        return self

    def variants(self, rows: pd.DataFrame) -> list[tuple[Design, np.ndarray]]:
        """``(design, mask)``: the rows of each effect measure, with the design that reads them.

        A design with one effect unit is one variant (itself, all rows); a design with
        ``measures`` splits its rows by the ``effect_measure`` column (blank: the default).
        Everything downstream works on one variant at a time, so a variant's effect unit,
        analysis scale and checks are those of its measure for all of its rows. Rows naming a
        measure the design does not take are in no variant (validation rejects them).
        """
        everything = np.ones(len(rows), dtype=bool)
        if not self.measures:
            return [(self, everything)]
        if "effect_measure" in rows.columns:
            values = rows["effect_measure"].to_numpy(dtype=object)
            values = np.where(pd.isna(values), self.measures[0], values)
        else:
            values = np.full(len(rows), self.measures[0], dtype=object)
        out = []
        for measure in self.measures:
            mask = values == measure
            if mask.any():
                out.append((self.with_measure(measure), mask))
        return out

    #: True where the design audits non-inferiority and equivalence rows (a signed effect on an
    #: analysis scale with an SE that does not depend on the null hypothesis' boundary; see
    #: audit/hypotheses.py). Other designs reject such rows (validation names the column).
    margin_tests: ClassVar[bool] = False

    def margin_support(self) -> str | None:
        """None where this variant audits margin hypotheses; else why not (for the error)."""
        if not self.margin_tests:
            return f"{self.name} has no non-inferiority or equivalence test yet"
        return None

    #: Kinds of reported test statistic (``statistic_type``) the design reads.
    statistic_types: ClassVar[frozenset[str]] = frozenset({"t", "z", "f", "chi2"})
    #: True where the standard error on the analysis scale follows from the sizes alone (Fisher's
    #: z): a reported statistic then gives the effect, never the SE.
    se_from_sizes: ClassVar[bool] = False
    #: How :meth:`effect_from_statistic` turns a statistic into an effect (for the notes).
    statistic_rule: ClassVar[str] = ""
    #: Label of the analysis scale for pooling (None: results of this design are not pooled).
    scale_label: ClassVar[str | None] = None
    #: True where the design's results are on whatever scale the row's SE is (the estimate
    #: design): in a family they take the scale of the family's other results.
    scale_follows_family: ClassVar[bool] = False

    # -- reading --------------------------------------------------------------------------------

    def scenario(self, rows: pd.DataFrame, stage: str) -> Scenario:
        """Arrays for one stage (``"planned"`` or ``"realized"``) of the design."""
        sc = {key: _column(rows, f"{stage}_{key}") for key in self.stage_keys}
        sc.update({key: _column(rows, key) for key in self.shared_keys})
        return sc

    def sources(self, stage: str) -> dict[str, str]:
        """Column(s) each scenario key of a stage comes from, for notes about missing values."""
        out = {key: f"{stage}_{key}" for key in self.stage_keys}
        out.update({key: key for key in self.shared_keys})
        return out

    def planned_effect(self, rows: pd.DataFrame) -> np.ndarray:
        """The effect the study was powered for, in effect units (nan if not given)."""
        return _column(rows, "planned_effect")

    def effect_sources(self) -> str:
        return "planned_effect"

    def effect_sign(self, effect: np.ndarray) -> np.ndarray:
        """+1 or -1: the sign of a planned effect on the analysis scale; 0 where it is blank
        or null (no effect), which says nothing about the hoped-for direction."""
        with np.errstate(invalid="ignore", divide="ignore"):
            a = self.to_analysis(np.asarray(effect, dtype=float))
        return np.where(np.isfinite(a), np.sign(a), 0.0)

    def inputs(self) -> frozenset[str]:
        """Every input column this design reads (the rest it ignores, with a note)."""
        staged = {f"{stage}_{k}" for k in self.stage_keys for stage in ("planned", "realized")}
        own = staged | set(self.shared_keys) | set(self.effect_columns) | set(self.extra_inputs)
        if self.size_keys:
            # A design with sample sizes reproduces the plan's calculation, allowance included.
            own.add("planned_dropout")
        common = COMMON_INPUTS if self.has_direction else COMMON_INPUTS - {"direction"}
        return common | own

    def check_rows(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str, str | np.ndarray]]:
        """Row checks: ``(bad_mask, column, reason)`` triples (a reason is one text or one per
        row): the direction, then the design's own :meth:`row_checks`; each effect measure's
        rows by its own variant."""
        parts = self.variants(rows)
        if len(parts) == 1 and parts[0][1].all():
            return parts[0][0]._checks(rows)
        out = []
        for variant, mask in parts:
            for bad, column, reason in variant._checks(rows.loc[mask]):
                full = np.zeros(len(rows), dtype=bool)
                full[mask] = np.asarray(bad, dtype=bool)
                reasons = np.asarray(reason, dtype=object)
                if reasons.ndim:
                    spread = np.full(len(rows), "", dtype=object)
                    spread[mask] = reasons
                    reasons = spread
                out.append((full, column, reasons if reasons.ndim else reason))
        return out

    def _checks(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str, str | np.ndarray]]:
        """:meth:`check_rows` for rows of this variant only: the direction, then the design's
        own :meth:`row_checks`. (Validation adds the checks of a reported test statistic and
        of the columns the design would ignore to a wrong result: audit.reported,
        audit.inputs.)"""
        out = self._margin_checks(rows)
        # On a non-inferiority row the planned true difference may lie on the worse side of no
        # effect (a slightly worse new treatment), and the direction says which way is better.
        margin = _margin_rows(rows)
        if self.has_direction and "direction" in rows.columns:
            given = _directions(rows)
            sign = self.effect_sign(self.planned_effect(rows))
            word = np.where(sign > 0, "an increase", "a decrease")
            opposite = np.isfinite(given) & (given * sign < 0) & ~margin
            if opposite.any():
                reason = np.full(len(rows), "", dtype=object)
                reason[opposite] = (
                    f"contradicts the planned effect ({self.effect_sources()}), which is "
                    + word[opposite].astype(object)
                    + "; give one or make them agree"
                )
                out.append((opposite, "direction", reason))
        if self.has_direction:
            sides = _column(rows, "sides")
            unknown = ~np.isfinite(_directions(rows)) & (
                self.effect_sign(self.planned_effect(rows)) == 0
            )
            out.append(
                (
                    (sides == 1) & unknown & ~margin,
                    "sides",
                    "a one-sided test needs a direction: fill direction (increase or decrease) "
                    "or a signed planned effect",
                )
            )
        out.extend(self.row_checks(rows))
        return out

    def row_checks(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str, str]]:
        """Design-specific row checks: ``(bad_mask, column, reason)`` triples."""
        return []

    def _margin_checks(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str, str]]:
        """Checks of non-inferiority and equivalence rows: a design that can test them, a
        margin, a one-sided level and (non-inferiority) which way is better."""
        hypothesis = _hypotheses(rows)
        ni = hypothesis == "non_inferiority"
        eq = hypothesis == "equivalence"
        margin_rows = ni | eq
        if not margin_rows.any():
            return []
        out: list[tuple[np.ndarray, str, str]] = []
        why = self.margin_support()
        if why is not None:
            out.append(
                (margin_rows, "hypothesis", why + "; audit it as superiority or leave it out")
            )
            return out
        margin = _column(rows, "margin")
        out.append(
            (
                ni & np.isnan(margin),
                "margin",
                "blank: a non-inferiority row needs its margin (a positive magnitude in effect "
                "units, e.g. 0.1 for ten percentage points)",
            )
        )
        out.append(
            (
                eq & np.isnan(margin),
                "margin",
                "blank: an equivalence row needs its margin (a positive magnitude in effect "
                "units; the equivalence range is -margin to +margin)",
            )
        )
        out.append(
            (
                margin_rows & (margin <= 0) & ~(self.is_ratio & (margin == 0)),
                "margin",
                "must be a positive magnitude in effect units (the audit puts it on the worse "
                "side itself): give it without a sign",
            )
        )
        if self.is_ratio:
            out.append(
                (
                    margin_rows & (margin == 0),
                    "margin",
                    "a ratio margin must be above 0 (given above 1, e.g. 1.25)",
                )
            )
            out.append(
                (
                    margin_rows & (margin == 1.0),
                    "margin",
                    "a ratio margin of 1 is no margin: give it above 1 (e.g. 1.25)",
                )
            )
        sides = _column(rows, "sides")
        out.append(
            (
                ni & (sides == 2),
                "sides",
                "a non-inferiority test is one-sided: give sides 1 (or blank) and its one-sided "
                "alpha (a 95% interval goes with a one-sided 0.025)",
            )
        )
        out.append(
            (
                eq & (sides == 2),
                "sides",
                "an equivalence test is two one-sided tests, each at alpha: give sides 1 (or "
                "blank) and alpha per test (a 90% interval goes with alpha 0.05)",
            )
        )
        if self.has_direction:
            unknown = ~np.isfinite(_directions(rows)) & (
                self.effect_sign(self.planned_effect(rows)) == 0
            )
            out.append(
                (
                    ni & unknown,
                    "direction",
                    "blank: a non-inferiority row must say which way is better (increase or "
                    "decrease), or give a signed planned effect",
                )
            )
        return out

    def orient(self, value: np.ndarray, direction: np.ndarray) -> np.ndarray:
        """An effect given as a magnitude (the SESOI), pointed in the planned direction."""
        return direction * np.abs(value)

    def to_analysis(self, effect: np.ndarray) -> np.ndarray:
        """Effect in effect units -> the analysis scale, on which the estimate is approximately
        normal with standard error ``se`` (identity here; log for hazard ratios, Fisher's z for
        correlations)."""
        return np.asarray(effect, dtype=float)

    def from_analysis(self, value: np.ndarray) -> np.ndarray:
        """Inverse of :meth:`to_analysis`."""
        return np.asarray(value, dtype=float)

    def analysis_df(self, sc: Scenario) -> np.ndarray:
        """Degrees of freedom of the test on the analysis scale (``inf``: a z test), used to read
        reported confidence intervals and p-values; nan where the scenario leaves them unknown."""
        size = len(next(iter(sc.values()))) if sc else 0
        return np.full(size, np.inf)

    def fallback_notes(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str]]:
        """Notes about values assumed where a row left a column blank: ``(mask, text)``."""
        return []

    def analysis_scale(self, rows: pd.DataFrame) -> np.ndarray:
        """Per row, the name of the analysis scale its results are on (:attr:`scale_label`);
        results are pooled only with results on a scale of the same name."""
        return np.full(len(rows), self.scale_label, dtype=object)

    # -- results as reported (audit/reported.py) -------------------------------------------------

    def effect_from_statistic(
        self, rows: pd.DataFrame, sc: Scenario, statistic: np.ndarray, df: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        """The effect on the analysis scale, and its SE, that a reported test statistic implies.

        ``statistic`` is a signed t (``df`` finite) or z (``df`` infinite) of the study's
        comparison, positive for group 2 above group 1; ``sc`` is the realized design. nan
        where the design cannot tell (this default: designs opt in).
        """
        nan = np.full(np.shape(statistic), np.nan)
        return nan, nan.copy()

    def _statistic_times_se(self, sc: Scenario, statistic: np.ndarray) -> tuple[np.ndarray, ...]:
        """``effect = statistic x SE`` with the design's SE, for designs whose SE does not depend
        on the effect: the test statistic is the estimate over that SE."""
        se = self.se(sc, None)
        with np.errstate(invalid="ignore"):
            return np.asarray(statistic, dtype=float) * se, se

    def effect_from_means(
        self, rows: pd.DataFrame, sc: Scenario
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The effect on the analysis scale, its test's SE and df, from reported arm means and
        SDs (``observed_mean1/2``, ``observed_sd1/2``); nan where the design reads none."""
        nan = np.full(len(rows), np.nan)
        return nan, nan.copy(), nan.copy()

    def at_standardized(
        self, sc: Scenario, magnitude: np.ndarray, direction: np.ndarray
    ) -> tuple[Scenario, np.ndarray]:
        """A scenario and an effect (effect units) for a standardized effect of ``magnitude``
        (in :attr:`standardized_as` units) pointed in ``direction``, so that
        ``power(*at_standardized(...), test)`` is the power at that standardized effect. nan
        effects where the design has no standardized unit (this default)."""
        return sc, np.full(np.shape(direction), np.nan)

    # -- maths ----------------------------------------------------------------------------------

    def total_size(self, sc: Scenario) -> np.ndarray:
        return sum((sc[k] for k in self.size_keys), np.zeros_like(sc[self.size_keys[0]]))

    def se(self, sc: Scenario, effect: np.ndarray) -> np.ndarray:
        """Expected standard error of the estimate on the analysis scale (see
        :meth:`to_analysis`); ``effect`` matters only where the SE depends on it (proportions)."""
        raise NotImplementedError

    def power(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        raise NotImplementedError

    def mde(self, sc: Scenario, test: TestSpec) -> np.ndarray:
        raise NotImplementedError

    def standardize(self, sc: Scenario, effect: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def required_size(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        raise NotImplementedError

    def replanned(self, plan: Scenario, real: Scenario) -> Scenario:
        """The planned design with the realized nuisance parameters where they were reported."""
        out = dict(plan)
        for key in self.nuisance_keys:
            out[key] = np.where(np.isnan(real[key]), np.nan, real[key])
        return out

    def extra_metrics(
        self, plan: Scenario, real: Scenario, effect: np.ndarray, test: TestSpec
    ) -> dict[str, np.ndarray]:
        """Design-specific metrics beyond the common set (e.g. events for survival)."""
        return {}

    def null_explanations(
        self,
        rows: pd.DataFrame,
        plan: Scenario,
        real: Scenario,
        effect: np.ndarray,
        test: TestSpec,
    ) -> dict[str, NullReasons]:
        """Design-specific reasons for null metrics, by metric name.

        Added to (or, with ``replace``, replacing) the generic reasons of :mod:`audit.metrics`,
        which name the scenario keys' :meth:`sources`. A metric the generic notes do not know
        (one of :meth:`extra_metrics`) needs its reasons here.
        """
        return {}


class TDesign(Design):
    """A design analysed by a t test on ``effect / se`` with ``df`` degrees of freedom.

    Subclasses give ``se_unit`` (SE for a unit of the outcome scale), ``df`` and how the sizes
    scale with the first group's size (``with_n1``); power, MDE and required size follow.
    """

    standardized_as = "d"
    statistic_rule = (
        "effect = the statistic as a t (an F on 1 df: its square root) x the standard error of "
        "the realized design (with its SD, or in SD units where effects are standardized)"
    )

    def sd(self, sc: Scenario) -> np.ndarray:
        raise NotImplementedError

    def effect_from_statistic(
        self, rows: pd.DataFrame, sc: Scenario, statistic: np.ndarray, df: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        return self._statistic_times_se(sc, statistic)

    def at_standardized(
        self, sc: Scenario, magnitude: np.ndarray, direction: np.ndarray
    ) -> tuple[Scenario, np.ndarray]:
        # In SD units the SD is 1, so power at a standardized effect needs no SD at all.
        direction = np.asarray(direction, dtype=float)
        return {**sc, "sd": np.ones(direction.shape)}, direction * np.abs(magnitude)

    def df(self, sc: Scenario) -> np.ndarray:
        raise NotImplementedError

    def analysis_df(self, sc: Scenario) -> np.ndarray:
        return self.df(sc)

    def min_n1(self, sc: Scenario) -> np.ndarray:
        """Smallest first-group size of a testable design: ``df >= 1``, a unit in each group."""
        raise NotImplementedError

    def with_n1(self, sc: Scenario, n1: np.ndarray) -> Scenario:
        """The scenario with the first group resized to ``n1`` and the allocation kept."""
        raise NotImplementedError

    def rounded_total(self, sc: Scenario, n1: np.ndarray) -> np.ndarray:
        """Total units when the continuous solution ``n1`` is rounded up per group."""
        raise NotImplementedError

    def se(self, sc: Scenario, effect: np.ndarray | None = None) -> np.ndarray:
        raise NotImplementedError

    def power(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        with np.errstate(divide="ignore", invalid="ignore"):
            ncp = test.direction * effect / self.se(sc)
        out = np.full(ncp.shape, np.nan)
        ok = np.isfinite(ncp) & (self.df(sc) > 0)
        out[ok] = t_power(ncp[ok], self.df(sc)[ok], test.alpha[ok], test.sides[ok])
        return out

    def mde(self, sc: Scenario, test: TestSpec) -> np.ndarray:
        se = self.se(sc)
        df = self.df(sc)
        ok = np.isfinite(se) & (df > 0)
        out = np.full(se.shape, np.nan)
        out[ok] = t_ncp_for_power(test.power[ok], df[ok], test.alpha[ok], test.sides[ok])
        return test.direction * out * se

    def standardize(self, sc: Scenario, effect: np.ndarray) -> np.ndarray:
        with np.errstate(divide="ignore", invalid="ignore"):
            return effect / self.sd(sc)

    def required_size(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        """Smallest total size reaching the target power, each group rounded up.

        The first group's size is solved on the continuous scale (df continuous), keeping the
        allocation ratio of ``sc`` (:meth:`first_group_size`); each group is then rounded up.
        Because power rises with the size at a fixed allocation, the rounded sizes reach the
        target.
        """
        n1 = self.first_group_size(sc, effect, test)
        out = np.full(len(effect), np.nan)
        done = np.isfinite(n1)
        if done.any():
            # Guard against solver noise at exact integers (64.0000000001 -> 64, not 65).
            sub = {k: v[done] for k, v in sc.items()}
            out[done] = self.rounded_total(sub, n1[done] * (1.0 - 1e-10))
        return out

    def first_group_size(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        """The continuous first-group size at which the exact power reaches the target, the
        allocation of ``sc`` kept (nan where no size does); :meth:`required_size` rounds it."""
        n = len(effect)
        unit = self.with_n1(sc, np.ones(n))
        with np.errstate(divide="ignore", invalid="ignore"):
            # SE at n1 = 1 scales as 1 / sqrt(n1): the normal approximation sizes the start.
            se1 = self.se(unit)
            z = -special.ndtri(test.alpha / test.sides) + special.ndtri(test.power)
            guess = (z * se1 / np.abs(effect)) ** 2
            # One refinement with the t distribution at the df of that first guess (normal
            # approximation to the noncentral t, Abramowitz & Stegun 26.7.10): the bracket
            # search then starts within a fraction of a per cent of the root.
            df0 = self.df(self.with_n1(sc, guess))
            usable = np.isfinite(df0) & (df0 >= 1)
            c = t_critical(test.alpha, test.sides, np.where(usable, df0, np.inf))
            spread = np.sqrt(1.0 + c * c / (2.0 * np.where(usable, df0, np.inf)))
            multiplier = c + special.ndtri(test.power) * spread
            guess = np.where(usable, (multiplier * se1 / np.abs(effect)) ** 2, guess)
        lower = self.min_n1(sc)
        ok = (
            np.isfinite(guess)
            & (guess > 0)
            & (test.power > test.alpha)
            & (test.direction * effect > 0)
            & np.isfinite(lower)
        )
        n1 = np.full(n, np.nan)
        if not ok.any():
            return n1
        # Sizes with df >= TABLE_MIN_DF: the SE scales as 1 / sqrt(n1), so the target is reached
        # where |effect| sqrt(n1) / se1 equals the noncentrality the test needs at df(n1). That
        # noncentrality changes slowly with df, so the fixed point
        #     n1 <- (ncp_needed(df(n1)) * se1 / |effect|)^2
        # converges in a few steps, each a table look-up (t_ncp_for_power) rather than a search
        # over noncentral t evaluations.
        fast = ok & (guess >= lower * 2.0)
        if fast.any():
            n1[fast] = self._size_by_fixed_point(sc, effect, test, fast, se1, guess)
        # Small designs, and anything the fixed point did not settle, are searched directly.
        ok = ok & ~np.isfinite(n1)
        if ok.any():
            n1[ok] = self._size_by_search(sc, effect, test, ok, guess, lower)
        return n1

    def _size_by_fixed_point(
        self,
        sc: Scenario,
        effect: np.ndarray,
        test: TestSpec,
        mask: np.ndarray,
        se1: np.ndarray,
        guess: np.ndarray,
    ) -> np.ndarray:
        """Continuous first-group sizes by fixed-point iteration (nan where it does not apply)."""
        sub = {k: v[mask] for k, v in sc.items()}
        scale = se1[mask] / np.abs(effect[mask])
        alpha, sides, power = test.alpha[mask], test.sides[mask], test.power[mask]
        n1 = guess[mask].copy()
        settled = np.zeros(len(n1), dtype=bool)
        lookup = NcpLookup(power, alpha, sides)
        for _ in range(40):
            df = self.df(self.with_n1(sub, n1))
            usable = df >= TABLE_MIN_DF
            needed = lookup.at(np.where(usable, df, np.inf))
            with np.errstate(invalid="ignore", over="ignore"):
                new = (needed * scale) ** 2
                step = np.abs(new - n1) / n1
            settled = usable & np.isfinite(new) & (step < 1e-13)
            n1 = np.where(usable & np.isfinite(new), new, np.nan)
            if (settled | np.isnan(n1)).all():
                break
        # A root with df below the table's range is left to the direct search.
        df = self.df(self.with_n1(sub, n1))
        return np.where(settled & (df >= TABLE_MIN_DF), n1, np.nan)

    def _size_by_search(
        self,
        sc: Scenario,
        effect: np.ndarray,
        test: TestSpec,
        ok: np.ndarray,
        guess: np.ndarray,
        lower: np.ndarray,
    ) -> np.ndarray:
        """Continuous first-group sizes by a bracketed search on the exact power."""
        sub = {k: v[ok] for k, v in sc.items()}
        sub_test = test.subset(ok)

        def power_at(n1: np.ndarray, eff: np.ndarray, *rest: np.ndarray) -> np.ndarray:
            # scipy's solver hands over only the still-active elements; rebuild that subset.
            fields = dict(zip(sub.keys(), rest[:-4], strict=True))
            alpha, sides, target_power, direction = rest[-4:]
            s = self.with_n1(fields, n1)
            return self.power(s, eff, TestSpec(alpha, sides, target_power, direction))

        args = (
            effect[ok],
            *sub.values(),
            sub_test.alpha,
            sub_test.sides,
            sub_test.power,
            sub_test.direction,
        )
        # A very large effect may reach the target with the smallest usable design already.
        return smallest_size(
            power_at,
            sub_test.power,
            np.maximum(guess[ok], lower[ok] * 1.01),
            lower=lower[ok],
            upper=1e12,
            args=args,
        )
