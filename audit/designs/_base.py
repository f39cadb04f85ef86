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
    direction : +1.0 or -1.0, the sign of the planned effect; one-sided tests look this way and
        MDEs are reported with this sign.
    """

    __test__ = False  # not a pytest test class, despite the name

    alpha: np.ndarray
    sides: np.ndarray
    power: np.ndarray
    direction: np.ndarray

    def subset(self, mask: np.ndarray) -> TestSpec:
        return TestSpec(self.alpha[mask], self.sides[mask], self.power[mask], self.direction[mask])


def _column(rows: pd.DataFrame, name: str) -> np.ndarray:
    """Float array of a typed column; all-nan when the file lacks the column."""
    if name in rows.columns:
        return rows[name].to_numpy(dtype=float, na_value=np.nan)
    return np.full(len(rows), np.nan)


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

    def direction(self, effect: np.ndarray) -> np.ndarray:
        """+1 or -1: the side a one-sided test looks at, from the planned effect (+1 if blank)."""
        return np.where(effect < 0, -1.0, 1.0)

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

    def check_rows(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str, str]]:
        """Design-specific row checks: ``(bad_mask, column, reason)`` triples."""
        return []

    def fallback_notes(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str]]:
        """Notes about values assumed where a row left a column blank: ``(mask, text)``."""
        return []

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

    def sd(self, sc: Scenario) -> np.ndarray:
        raise NotImplementedError

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
        allocation ratio of ``sc``; each group is then rounded up. Because power rises with the
        size at a fixed allocation, the rounded sizes reach the target.
        """
        n = len(effect)
        out = np.full(n, np.nan)
        unit = self.with_n1(sc, np.ones(n))
        with np.errstate(divide="ignore", invalid="ignore"):
            # SE at n1 = 1 scales as 1 / sqrt(n1): the normal approximation sizes the start.
            se1 = self.se(unit)
            z = special.ndtri(1.0 - test.alpha / test.sides) + special.ndtri(test.power)
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
        if not ok.any():
            return out
        n1 = np.full(n, np.nan)
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
        done = np.isfinite(n1)
        if done.any():
            # Guard against solver noise at exact integers (64.0000000001 -> 64, not 65).
            sub = {k: v[done] for k, v in sc.items()}
            out[done] = self.rounded_total(sub, n1[done] * (1.0 - 1e-10))
        return out

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
