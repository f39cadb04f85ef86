"""Two independent proportions compared with a z test (normal approximation).

The effect is given in the row's ``effect_measure``: the risk difference ``p2 - p1`` (the
default), the risk ratio ``p2 / p1`` or the odds ratio (group 2 against the control group 1);
whatever the measure, the test is the one below on the pair of proportions the effect implies,
so an odds ratio or risk ratio plan needs the same size as the risk difference it implies. The
test
statistic divides the observed difference by its standard error under H0, with the variance
pooled over both groups; under the alternative the difference is normal with the unpooled
variance. This is the usual sample-size formula for two proportions [1]_. With the continuity
correction the observed difference is shrunk by ``(1/n1 + 1/n2) / 2`` before the comparison,
which gives exactly the corrected sample-size formula of Fleiss, Levin & Paik [1]_ (see
:func:`proportions_power`).

References
----------
.. [1] Fleiss, J. L., Levin, B. & Paik, M. C. (2003). Statistical Methods for Rates and
   Proportions, 3rd ed., section 4.2 (sample sizes for comparing two proportions).
.. [2] Cohen, J. (1988). Statistical Power Analysis for the Behavioral Sciences, 2nd ed., ch. 6
   (the arcsine effect size h).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import special

from audit.designs._base import (
    Design,
    NullReasons,
    Scenario,
    TestSpec,
    _column,
    allocation_ratio,
)
from audit.designs._binary import (
    MEASURES,
    RATIO_MEASURES,
    counts_result,
    from_log,
    measure_of,
    p2_from,
    to_log,
    wald_se,
)
from audit.designs._solve import smallest_size, solve_increasing

__all__ = ["MEASURE_UNITS", "TwoProportions", "cohens_h", "fleiss_n1", "proportions_power"]

#: The effect unit of each effect measure, as the outputs name it.
MEASURE_UNITS = {
    "risk_difference": "risk difference p2 - p1",
    "risk_ratio": "risk ratio p2 / p1",
    "odds_ratio": "odds ratio (p2 / (1 - p2)) / (p1 / (1 - p1))",
}
#: What an effect in each measure is called in a sentence ("an odds ratio of 0.7").
MEASURE_NOUNS = {
    "risk_difference": "risk difference",
    "risk_ratio": "risk ratio",
    "odds_ratio": "odds ratio",
}


def cohens_h(p1: np.ndarray, p2: np.ndarray) -> np.ndarray:
    """Cohen's h, the difference of arcsine-transformed proportions: ``2 asin √p2 − 2 asin √p1``.

    Examples
    --------
    >>> round(float(cohens_h(0.10, 0.20)), 4)
    0.2838
    """
    p1 = np.asarray(p1, dtype=float)
    p2 = np.asarray(p2, dtype=float)
    with np.errstate(invalid="ignore"):
        return 2.0 * np.arcsin(np.sqrt(p2)) - 2.0 * np.arcsin(np.sqrt(p1))


def _standard_errors(
    n1: np.ndarray, n2: np.ndarray, p1: np.ndarray, p2: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """SE of ``p2 - p1`` under H0 (pooled), under the alternative (unpooled), and 1/n1 + 1/n2."""
    with np.errstate(divide="ignore", invalid="ignore"):
        inverse = 1.0 / n1 + 1.0 / n2
        pooled = (n1 * p1 + n2 * p2) / (n1 + n2)
        se0 = np.sqrt(pooled * (1.0 - pooled) * inverse)
        se1 = np.sqrt(p1 * (1.0 - p1) / n1 + p2 * (1.0 - p2) / n2)
    return se0, se1, inverse


def proportions_power(
    n1: np.ndarray,
    n2: np.ndarray,
    p1: np.ndarray,
    p2: np.ndarray,
    alpha: np.ndarray,
    sides: np.ndarray,
    corrected: np.ndarray,
    direction: np.ndarray = 1.0,
) -> np.ndarray:
    """Power of the two-proportion z test with the variance pooled under H0.

    Parameters
    ----------
    n1, n2 : array_like
        Group sizes (control, intervention), > 0; need not be whole numbers.
    p1, p2 : array_like
        True proportions in the two groups, in [0, 1]; nan is returned outside.
    alpha : array_like
        Significance level of the comparison.
    sides : array_like
        1 or 2.
    corrected : array_like of bool
        Apply the continuity correction.
    direction : array_like
        +1 or -1: the side a one-sided test looks at (the sign of the planned ``p2 - p1``).

    Returns
    -------
    ndarray
        ``Φ((sΔ − k − c·SE0) / SE1) + [sides = 2] Φ((−sΔ − k − c·SE0) / SE1)`` with
        ``Δ = p2 − p1``, ``s`` the direction, ``c = z(1 − alpha/sides)``, ``SE0`` the pooled
        and ``SE1`` the unpooled standard error, and ``k = (1/n1 + 1/n2) / 2`` with the
        continuity correction (0 without).

    Notes
    -----
    Without the correction the power at ``Δ = 0`` is ``alpha`` (there ``SE0 = SE1``); the
    corrected test is conservative and has a smaller size. Setting the first term equal to the
    target power and solving for ``n1`` (with ``n2 = r n1``) gives, without the correction,
    ``n' = (c √((1 + r) p̄ q̄) + z_β √(r p1 q1 + p2 q2))² / (r Δ²)`` with
    ``p̄ = (p1 + r p2) / (1 + r)``, and with it ``n'/4 · (1 + √(1 + 2(r + 1) / (r n' |Δ|)))²``:
    the formulas of Fleiss, Levin & Paik (2003), section 4.2. The second term (the far
    rejection tail of a two-sided test) is counted as well, as for every design here.

    Examples
    --------
    Fleiss, Levin & Paik: 199 per group detect 0.10 against 0.20 with power .80:

    >>> round(float(proportions_power(199, 199, 0.10, 0.20, 0.05, 2, False)), 4)
    0.8001
    """
    n1, n2, p1, p2, alpha, sides, corrected, direction = np.broadcast_arrays(
        *(np.asarray(a, dtype=float) for a in (n1, n2, p1, p2, alpha, sides, corrected, direction))
    )
    se0, se1, inverse = _standard_errors(n1, n2, p1, p2)
    c = -special.ndtri(alpha / sides)
    shift = np.where(corrected > 0, 0.5 * inverse, 0.0)
    delta = direction * (p2 - p1)
    with np.errstate(divide="ignore", invalid="ignore"):
        upper = special.ndtr((delta - shift - c * se0) / se1)
        lower = np.where(sides == 2, special.ndtr((-delta - shift - c * se0) / se1), 0.0)
    out = np.clip(upper + lower, 0.0, 1.0)
    inside = (p1 >= 0) & (p1 <= 1) & (p2 >= 0) & (p2 <= 1) & (n1 > 0) & (n2 > 0)
    return np.where(inside, out, np.nan)


def fleiss_n1(
    p1: np.ndarray,
    p2: np.ndarray,
    ratio: np.ndarray,
    alpha: np.ndarray,
    sides: np.ndarray,
    power: np.ndarray,
    corrected: np.ndarray,
) -> np.ndarray:
    """Continuous size of group 1 from the closed-form formulas (one rejection tail).

    ``ratio`` is ``n2 / n1``. See :func:`proportions_power` for the formulas; this is their
    direct evaluation, used as the starting point of the exact solution.

    Examples
    --------
    >>> round(float(fleiss_n1(0.10, 0.20, 1.0, 0.05, 2, 0.8, False)), 1)
    199.0
    """
    p1, p2, r, alpha, sides, power, corrected = np.broadcast_arrays(
        *(np.asarray(a, dtype=float) for a in (p1, p2, ratio, alpha, sides, power, corrected))
    )
    with np.errstate(divide="ignore", invalid="ignore"):
        delta = np.abs(p2 - p1)
        pooled = (p1 + r * p2) / (1.0 + r)
        c = -special.ndtri(alpha / sides)
        zb = special.ndtri(power)
        root = c * np.sqrt((1.0 + r) * pooled * (1.0 - pooled)) + zb * np.sqrt(
            r * p1 * (1.0 - p1) + p2 * (1.0 - p2)
        )
        n = root * root / (r * delta * delta)
        corrected_n = n / 4.0 * (1.0 + np.sqrt(1.0 + 2.0 * (r + 1.0) / (r * n * delta))) ** 2
    return np.where(corrected > 0, corrected_n, n)


def _power_of_n1(n1, p1, p2, ratio, alpha, sides, corrected, direction):
    return proportions_power(n1, n1 * ratio, p1, p2, alpha, sides, corrected, direction)


def _power_of_difference(m, n1, n2, p1, alpha, sides, corrected, direction):
    return proportions_power(n1, n2, p1, p1 + direction * m, alpha, sides, corrected, direction)


class TwoProportions(Design):
    """Two independent proportions; z test with the variance pooled under H0 (Fleiss).

    Group 1 is the control group: ``planned_p1`` / ``realized_p1`` are its event proportions.
    Effects (``planned_effect``, ``sesoi``, ``mde``, the reported result) are in the row's
    ``effect_measure``; one instance handles one measure (see :meth:`Design.variants`), and its
    analysis scale is the measure's (log for the ratios). The realized design holds the planned
    *measure* fixed on the realized control rate (``realized_p1``, else ``observed_events1`` /
    ``realized_n1``, else ``planned_p1``): the risk difference for ``risk_difference``, the
    relative effect for the ratios, so the intervention rate moves with the control rate.
    ``planned_p2`` gives the planned intervention rate; where it is blank, ``planned_effect``
    gives the effect instead. The continuity correction is chosen per row
    (``continuity_correction``) or by the run default.
    """

    name = "two_proportions"
    family = "proportions"
    title = "two independent proportions (z test, variance pooled under H0)"
    effect_unit = MEASURE_UNITS["risk_difference"]
    standardized_as = "h"
    stage_keys = ("n1", "n2", "p1")
    nuisance_keys = ("p1",)
    extra_inputs = (
        "planned_p2",
        "realized_p2",
        "continuity_correction",
        "effect_measure",
        "observed_events1",
        "observed_events2",
    )
    measures = MEASURES
    # The variance of a risk difference depends on where it lies: detecting a rise from p1 is
    # not as hard as detecting a fall of the same size.
    symmetric = False
    # The z test of the design (chi2 on 1 df is its square).
    statistic_types = frozenset({"z", "chi2"})
    statistic_rule = (
        "the risk difference whose z test (variance pooled under H0, continuity correction "
        "as the row says) from realized_p1 and the realized group sizes equals the statistic"
    )
    scale_label = "risk difference"

    margin_tests = True

    def margin_support(self) -> str | None:
        # Only the risk difference is done (Blackwelder's unpooled variance); ratio margins
        # would need their own variance under the margin and are refused rather than guessed.
        if self.measure != "risk_difference":
            return (
                f"{self.name} tests margins on the risk difference only (effect_measure "
                f"{self.measure} is not supported for non-inferiority or equivalence yet)"
            )
        return None

    def __init__(self, measure: str = "risk_difference") -> None:
        if measure not in MEASURES:
            raise ValueError(f"unknown effect measure {measure!r}")
        self.measure = measure
        self.effect_unit = MEASURE_UNITS[measure]
        self._variants: dict[str, TwoProportions] = {measure: self}

    def with_measure(self, measure: str | None) -> TwoProportions:
        measure = measure if measure in MEASURES else self.measures[0]
        if measure not in self._variants:
            variant = type(self)(measure)
            variant._variants = self._variants
            self._variants[measure] = variant
        return self._variants[measure]

    @property
    def noun(self) -> str:
        """What an effect of this variant is called in a sentence."""
        return MEASURE_NOUNS[self.measure]

    @property
    def is_ratio(self) -> bool:
        return self.measure in RATIO_MEASURES

    def intervention_rate(self, p1: np.ndarray, effect: np.ndarray) -> np.ndarray:
        """``p2`` from the control rate and an effect in this variant's measure."""
        return p2_from(self.measure, p1, effect)

    # -- reading --------------------------------------------------------------------------------

    def scenario(self, rows: pd.DataFrame, stage: str) -> Scenario:
        sc = super().scenario(rows, stage)
        if stage == "realized":
            with np.errstate(divide="ignore", invalid="ignore"):
                counted = _column(rows, "observed_events1") / self.arm_units(rows, "1")
            counted = np.where((counted >= 0) & (counted <= 1), counted, np.nan)
            fallback = np.where(np.isnan(counted), _column(rows, "planned_p1"), counted)
            sc["p1"] = np.where(np.isnan(sc["p1"]), fallback, sc["p1"])
        # Set per row or by the run default (audit_table fills it in); off when absent.
        cc = _column(rows, "continuity_correction")
        sc["continuity_correction"] = np.where(np.isnan(cc), 0.0, cc)
        return sc

    def arm_units(self, rows: pd.DataFrame, arm: str) -> np.ndarray:
        """Units analysed in an arm (``arm`` "1" or "2"), the denominators of its events."""
        return _column(rows, f"realized_n{arm}")

    def sources(self, stage: str) -> dict[str, str]:
        out = super().sources(stage)
        if stage == "realized":
            out["p1"] = "realized_p1 (or observed_events1 / realized_n1, or planned_p1)"
        return out

    def planned_effect(self, rows: pd.DataFrame) -> np.ndarray:
        p1 = _column(rows, "planned_p1")
        p2 = _column(rows, "planned_p2")
        return np.where(np.isnan(p2), _column(rows, "planned_effect"), self._measure(p1, p2))

    def analysis_scale(self, rows: pd.DataFrame) -> np.ndarray:
        # Results are pooled only with results in the same measure (the log of a ratio).
        label = {"risk_ratio": "log risk ratio", "odds_ratio": "log odds ratio"}.get(
            self.measure, self.scale_label
        )
        return np.full(len(rows), label, dtype=object)

    def _measure(self, p1: np.ndarray, p2: np.ndarray) -> np.ndarray:
        if self.measure == "risk_difference":
            return p2 - p1  # exactly today's arithmetic
        return measure_of(self.measure, p1, p2)

    def effect_sources(self) -> str:
        return "planned_p2 (or planned_effect)"

    def orient(self, value: np.ndarray, direction: np.ndarray) -> np.ndarray:
        if not self.is_ratio:
            return direction * np.abs(value)
        return self.from_analysis(direction * np.abs(self.to_analysis(value)))

    def to_analysis(self, effect: np.ndarray) -> np.ndarray:
        return to_log(self.measure, effect)

    def from_analysis(self, value: np.ndarray) -> np.ndarray:
        return from_log(self.measure, value)

    def row_checks(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str, str]]:
        p1 = _column(rows, "planned_p1")
        p2 = _column(rows, "planned_p2")
        effect = _column(rows, "planned_effect")
        sesoi = _column(rows, "sesoi")
        noun = self.noun
        out = []
        with np.errstate(invalid="ignore", divide="ignore"):
            if self.is_ratio:
                for column in ("planned_effect", "sesoi", "observed_effect"):
                    out.append(
                        (_column(rows, column) <= 0, column, f"{noun}s must be greater than 0")
                    )
                for column in ("observed_ci_low", "observed_ci_high"):
                    out.append(
                        (
                            _column(rows, column) <= 0,
                            column,
                            f"the limits of a {noun}'s interval must be greater than 0 (give "
                            "them on the ratio scale, not the log scale)",
                        )
                    )
                # Values rounded for print (an odds ratio of 2.25 from 0.10 and 0.20) agree.
                implied = self._measure(p1, p2)
                differs = np.abs(np.log(effect) - np.log(implied)) > 0.005
            else:
                implied = p2 - p1
                differs = np.abs(effect - implied) > 1e-9
                out.append(
                    (np.abs(sesoi) >= 1, "sesoi", "a risk difference must lie strictly within ±1")
                )
            reached = self.intervention_rate(p1, effect)
            # A ratio at or below 0 has its own message above.
            usable = effect > 0 if self.is_ratio else np.isfinite(effect)
            out.append(
                (
                    ~np.isnan(p2) & ~np.isnan(effect) & differs,
                    "planned_effect",
                    f"disagrees with the {noun} of planned_p2 against planned_p1; give one or "
                    "make them agree",
                )
            )
            out.append(
                (
                    np.isnan(p2) & ~np.isnan(p1) & usable & ~((reached > 0) & (reached < 1)),
                    "planned_effect",
                    f"with planned_p1 this {noun} gives an intervention proportion outside (0, 1)",
                )
            )
        out.extend(self._count_checks(rows))
        return out

    def unit_words(self) -> str:
        """The denominator of an arm's events, as notes name it."""
        return "realized_n1"

    def _count_checks(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str, str]]:
        out = []
        for k in ("1", "2"):
            out.append(
                (
                    _column(rows, f"observed_events{k}") > self.arm_units(rows, k),
                    f"observed_events{k}",
                    f"cannot exceed the arm size ({self.unit_words().replace('1', k)})",
                )
            )
        return out

    def fallback_notes(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str]]:
        real = _column(rows, "realized_p1")
        plan = _column(rows, "planned_p1")
        units = self.arm_units(rows, "1")
        events = _column(rows, "observed_events1") / np.where(units > 0, units, np.nan)
        cc = _column(rows, "continuity_correction")
        effect = self.planned_effect(rows)
        held = {
            "risk_difference": "the planned risk difference is held fixed on it (the "
            "intervention rate moves by the same difference)",
            "risk_ratio": "the planned risk ratio is held fixed on it (the relative effect: the "
            "intervention rate moves in proportion)",
            "odds_ratio": "the planned odds ratio is held fixed on it (the relative effect on the "
            "odds scale)",
        }[self.measure]
        known = np.where(np.isnan(real), events, real)
        with np.errstate(invalid="ignore"):
            moved = ~np.isnan(effect) & ~np.isnan(plan) & (np.abs(known - plan) > 1e-12)
        return [
            (
                np.isnan(real) & np.isfinite(events),
                f"realized_p1 not reported: the control rate of observed_events1 / "
                f"{self.unit_words()} is used for the realized design",
            ),
            (
                np.isnan(real) & np.isnan(events) & ~np.isnan(plan),
                "realized_p1 not reported: the planned control rate is used for the realized "
                "design",
            ),
            (moved, f"the realized control rate differs from the planned one: {held}"),
            (cc > 0, "continuity-corrected z test (Fleiss, Levin & Paik)"),
        ]

    # -- the reported result from counts ------------------------------------------------------

    def counted_result(self, rows: pd.DataFrame) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The reported result from events per arm (or the realized proportions) and the arm
        sizes: ``(effect, se, source)``, effect in the measure, SE on the analysis scale,
        ``source`` 1 for events, 2 for proportions, 0 where neither gives it."""
        n1, n2 = self.arm_units(rows, "1"), self.arm_units(rows, "2")
        e1, e2 = _column(rows, "observed_events1"), _column(rows, "observed_events2")
        by_events = np.isfinite(e1 + e2 + n1 + n2)
        by_rates = ~by_events & np.isfinite(
            _column(rows, "realized_p1") + _column(rows, "realized_p2") + n1 + n2
        )
        e1 = np.where(by_events, e1, _column(rows, "realized_p1") * n1)
        e2 = np.where(by_events, e2, _column(rows, "realized_p2") * n2)
        res = counts_result(self.measure, e1, n1, e2, n2)
        inflate = self.result_inflation(rows)
        source = np.where(by_events, 1, np.where(by_rates, 2, 0))
        ok = (source > 0) & np.isfinite(res.effect) & np.isfinite(res.se * inflate)
        return (
            np.where(ok, res.effect, np.nan),
            np.where(ok, res.se * inflate, np.nan),
            np.where(ok, source, 0),
        )

    def count_columns(self) -> str:
        return "observed_events1/2 and realized_n1/2"

    def rate_columns(self) -> str:
        return "realized_p1/2 and realized_n1/2"

    def partial_counts(self, rows: pd.DataFrame) -> np.ndarray:
        """Rows that give part of a result from counts (some events, or an intervention rate)."""
        return (
            np.isfinite(_column(rows, "observed_events1"))
            | np.isfinite(_column(rows, "observed_events2"))
            | np.isfinite(_column(rows, "realized_p2"))
        )

    def result_inflation(self, rows: pd.DataFrame) -> np.ndarray:
        """Factor on the SE of a result computed from counts (1: independent units)."""
        return np.ones(len(rows))

    def counted_note(self) -> str:
        corr = "0.5 added to every cell where a cell is empty (Haldane)"
        return {
            "risk_difference": f"difference of the proportions, Wald SE; {corr}",
            "risk_ratio": f"ratio of the proportions, SE of the log risk ratio; {corr}",
            "odds_ratio": f"odds ratio, Woolf SE of the log odds ratio; {corr}",
        }[self.measure]

    # -- maths ----------------------------------------------------------------------------------

    def _test_args(self, sc: Scenario, test: TestSpec) -> tuple[np.ndarray, ...]:
        return (test.alpha, test.sides, sc["continuity_correction"], test.direction)

    def se(self, sc: Scenario, effect: np.ndarray | None = None) -> np.ndarray:
        """SE of the estimate on the analysis scale (unpooled, at ``p1`` and the ``p2`` the
        effect implies): of the risk difference, or of the log ratio."""
        p2 = self.intervention_rate(sc["p1"], effect)
        if self.measure == "risk_difference":
            _, se1, _ = _standard_errors(sc["n1"], sc["n2"], sc["p1"], p2)
            return np.where((p2 >= 0) & (p2 <= 1), se1, np.nan)
        return wald_se(self.measure, sc["n1"], sc["n2"], sc["p1"], p2)

    def power(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        return proportions_power(
            sc["n1"],
            sc["n2"],
            sc["p1"],
            self.intervention_rate(sc["p1"], effect),
            *self._test_args(sc, test),
        )

    def mde(self, sc: Scenario, test: TestSpec) -> np.ndarray:
        """Effect detectable from the control rate ``p1``, in the planned direction, in the
        variant's measure.

        The risk difference is solved for (power rises with it at a fixed ``p1``) and then
        expressed in the measure. nan where no difference that keeps ``p2`` within [0, 1]
        reaches the target power.
        """
        p1 = sc["p1"]
        room = np.where(test.direction > 0, 1.0 - p1, p1)
        ok = (
            np.isfinite(p1)
            & np.isfinite(sc["n1"])
            & np.isfinite(sc["n2"])
            & (room > 0)
            & (test.power > test.alpha)
            & (test.power < 1)
        )
        out = np.full(len(p1), np.nan)
        if not ok.any():
            return out
        args = tuple(a[ok] for a in (sc["n1"], sc["n2"], p1, *self._test_args(sc, test)))
        with np.errstate(divide="ignore", invalid="ignore"):
            # Normal approximation with the control-group variance in both groups.
            z = -special.ndtri(test.alpha[ok] / test.sides[ok]) + special.ndtri(test.power[ok])
            guess = z * np.sqrt(p1[ok] * (1.0 - p1[ok]) * (1.0 / args[0] + 1.0 / args[1]))
        guess = np.clip(guess, 1e-6, 0.5 * room[ok])
        magnitude = solve_increasing(
            _power_of_difference, test.power[ok], guess, lower=0.0, upper=room[ok], args=args
        )
        out[ok] = test.direction[ok] * magnitude
        if self.measure == "risk_difference":
            return out
        with np.errstate(invalid="ignore"):
            return self._measure(p1, p1 + out)

    def standardize(self, sc: Scenario, effect: np.ndarray) -> np.ndarray:
        """Cohen's h between ``p1`` and the ``p2`` the effect implies (whatever the measure)."""
        return cohens_h(sc["p1"], self.intervention_rate(sc["p1"], effect))

    def at_standardized(
        self, sc: Scenario, magnitude: np.ndarray, direction: np.ndarray
    ) -> tuple[Scenario, np.ndarray]:
        """The risk difference from ``p1`` whose Cohen's h is ``direction x magnitude``:
        ``p2 = sin^2(asin(sqrt(p1)) + h / 2)``; nan where that leaves [0, 1]."""
        direction = np.asarray(direction, dtype=float)
        with np.errstate(invalid="ignore"):
            angle = np.arcsin(np.sqrt(sc["p1"])) + direction * np.abs(magnitude) / 2.0
            p2 = np.sin(angle) ** 2
        inside = (angle >= 0) & (angle <= np.pi / 2)
        with np.errstate(divide="ignore", invalid="ignore"):
            effect = self._measure(sc["p1"], p2)  # in the row's measure
        return sc, np.where(inside, effect, np.nan)

    def effect_from_statistic(
        self, rows: pd.DataFrame, sc: Scenario, statistic: np.ndarray, df: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        """The risk difference ``D`` whose z statistic equals the one reported, and ``|D| / |z|``.

        With ``w2 = n2 / (n1 + n2)``, ``k = 1/n1 + 1/n2``, the pooled proportion is
        ``p1 + w2 D`` and the statistic ``z = (|D| - h) / sqrt(pbar (1 - pbar) k)`` (``h`` the
        continuity correction, 0 without), so ``u = |D|`` solves the quadratic
        ``(1 + c w2^2) u^2 - (2h + c w2 s (1 - 2 p1)) u + h^2 - c p1 (1 - p1) = 0`` with
        ``c = z^2 k`` and ``s`` the sign of z; its larger root is the one (at least ``h``).
        Needs the observed control rate ``realized_p1`` (the planned one would give a wrong
        result). The SE is the one the test implies, so that the interval is dual to it. For a
        risk or odds ratio the same ``p2`` gives the measure, on the log scale, with the Wald
        SE of that log at the observed proportions (the test's own SE is that of a difference).
        """
        n1, n2 = self._statistic_sizes(sc)
        return self._from_z(rows, sc, np.asarray(statistic, dtype=float), n1, n2)

    def _statistic_sizes(self, sc: Scenario) -> tuple[np.ndarray, np.ndarray]:
        """The sizes the reported z refers to (units; effective units for cluster trials)."""
        return sc["n1"], sc["n2"]

    def _from_z(
        self, rows: pd.DataFrame, sc: Scenario, z: np.ndarray, n1: np.ndarray, n2: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        p1 = _column(rows, "realized_p1")
        with np.errstate(divide="ignore", invalid="ignore"):
            k = 1.0 / n1 + 1.0 / n2
            w2 = n2 / (n1 + n2)
            corrected = sc.get("continuity_correction", np.zeros(len(z)))
            h = np.where(corrected > 0, 0.5 * k, 0.0)
            sign = np.sign(z)
            c = z * z * k
            a = 1.0 + c * w2 * w2
            b = -(2.0 * h + c * w2 * sign * (1.0 - 2.0 * p1))
            cc = h * h - c * p1 * (1.0 - p1)
            u = (-b + np.sqrt(b * b - 4.0 * a * cc)) / (2.0 * a)
            u = np.where(z == 0, 0.0, u)
            effect = sign * u
            p2 = p1 + effect
            se = np.where(z != 0, u / np.abs(z), np.sqrt(p1 * (1.0 - p1) * k))
        ok = np.isfinite(effect) & (p2 >= 0) & (p2 <= 1) & (u >= h)
        if self.is_ratio:
            with np.errstate(divide="ignore", invalid="ignore"):
                effect = self.to_analysis(self._measure(p1, p2))
                se = wald_se(self.measure, n1, n2, p1, p2)
            ok &= np.isfinite(effect) & np.isfinite(se)
        return np.where(ok, effect, np.nan), np.where(ok, se, np.nan)

    def required_size(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        """Smallest total size reaching the target power, allocation kept, groups rounded up.

        Solved exactly on :func:`proportions_power` (both tails), starting from the closed
        form of Fleiss, Levin & Paik; the two agree wherever the far tail is negligible.
        """
        n1 = self.first_group_size(sc, effect, test)
        out = np.full(len(effect), np.nan)
        ok = np.isfinite(n1)
        # Guard against solver noise at exact integers (198.9999999999 -> 199, not 200).
        n1 = n1[ok] * (1.0 - 1e-10)
        out[ok] = np.ceil(n1) + np.ceil(n1 * allocation_ratio(sc)[ok] * (1.0 - 1e-12))
        return out

    def first_group_size(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        """The continuous control-group size at which the exact power reaches the target, the
        allocation of ``sc`` kept (nan where no size does); :meth:`required_size` rounds it."""
        n = len(effect)
        out = np.full(n, np.nan)
        p1 = sc["p1"]
        p2 = self.intervention_rate(p1, effect)
        r = allocation_ratio(sc)
        cc = sc["continuity_correction"]
        with np.errstate(invalid="ignore"):
            ok = (
                np.isfinite(p2)
                & (p2 >= 0)
                & (p2 <= 1)
                & (test.direction * (p2 - p1) > 0)
                & (test.power > test.alpha)
                & (test.power < 1)
            )
        if not ok.any():
            return out
        guess = fleiss_n1(p1, p2, r, test.alpha, test.sides, test.power, cc)
        lower = np.maximum(1.0, 1.0 / r)
        args = (p1, p2, r, test.alpha, test.sides, cc, test.direction)
        n1 = smallest_size(
            _power_of_n1,
            test.power[ok],
            np.where(np.isfinite(guess[ok]), guess[ok], lower[ok]),
            lower=lower[ok],
            args=tuple(a[ok] for a in args),
        )
        out[ok] = n1
        return out

    def null_explanations(
        self,
        rows: pd.DataFrame,
        plan: Scenario,
        real: Scenario,
        effect: np.ndarray,
        test: TestSpec,
    ) -> dict[str, NullReasons]:
        noun = self.noun
        with np.errstate(invalid="ignore"):
            off_real = np.isnan(self.intervention_rate(real["p1"], effect)) & ~np.isnan(
                real["p1"] + effect
            )
            sesoi = self.orient(_column(rows, "sesoi"), test.direction)
            off_sesoi = np.isnan(self.intervention_rate(real["p1"], sesoi)) & ~np.isnan(
                real["p1"] + sesoi
            )
        outside = (
            f"the planned {noun} on the realized control rate gives an intervention rate "
            "outside [0, 1]"
        )
        effect_blank = (np.isnan(effect), self.effect_sources())
        no_mde = (
            test.power > test.alpha,
            f"no {noun} in the direction used (with no direction: on one of the two "
            "sides) reaches the target power from this control rate",
        )
        return {
            "power_at_planned_effect": NullReasons(conditions=((off_real, outside),)),
            "power_at_sesoi": NullReasons(
                conditions=(
                    (
                        off_sesoi,
                        f"the SESOI ({noun}) on the realized control rate gives an intervention "
                        "rate outside [0, 1]",
                    ),
                )
            ),
            "mde": NullReasons(conditions=(no_mde,)),
            "mde_std": NullReasons(conditions=(no_mde,)),
            "se_plan": NullReasons(inputs=(effect_blank,)),
            "se_realized": NullReasons(inputs=(effect_blank,), conditions=((off_real, outside),)),
            "precision_ratio": NullReasons(
                inputs=(effect_blank,), conditions=((off_real, outside),)
            ),
            "n_required_realized": NullReasons(conditions=((off_real, outside),)),
            "power_if_planned_size": NullReasons(conditions=((off_real, outside),)),
            "power_cost_nuisance": NullReasons(conditions=((off_real, outside),)),
            "power_cost_attrition": NullReasons(conditions=((off_real, outside),)),
        }
