"""Two independent proportions compared with a z test (normal approximation).

The effect is the risk difference ``p2 - p1`` (group 2 against the control group 1). The test
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
from audit.designs._solve import smallest_size, solve_increasing

__all__ = ["TwoProportions", "cohens_h", "fleiss_n1", "proportions_power"]


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
    c = special.ndtri(1.0 - alpha / sides)
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
        c = special.ndtri(1.0 - alpha / sides)
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
    """Risk difference between two independent groups; z test with pooled variance under H0.

    Group 1 is the control group: ``planned_p1`` / ``realized_p1`` are its event proportions,
    and the realized design keeps the planned risk difference on top of the realized control
    rate (``realized_p1``, or ``planned_p1`` when not reported). ``planned_p2`` gives the
    planned intervention rate; where it is blank, ``planned_effect`` may give the risk
    difference instead. The continuity correction is chosen per row
    (``continuity_correction``) or by the run default.
    """

    name = "two_proportions"
    family = "proportions"
    title = "two independent proportions (z test, variance pooled under H0)"
    effect_unit = "risk difference p2 - p1"
    standardized_as = "h"
    stage_keys = ("n1", "n2", "p1")
    nuisance_keys = ("p1",)
    extra_inputs = ("planned_p2", "continuity_correction")
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

    # -- reading --------------------------------------------------------------------------------

    def scenario(self, rows: pd.DataFrame, stage: str) -> Scenario:
        sc = super().scenario(rows, stage)
        if stage == "realized":
            sc["p1"] = np.where(np.isnan(sc["p1"]), _column(rows, "planned_p1"), sc["p1"])
        # Set per row or by the run default (audit_table fills it in); off when absent.
        cc = _column(rows, "continuity_correction")
        sc["continuity_correction"] = np.where(np.isnan(cc), 0.0, cc)
        return sc

    def sources(self, stage: str) -> dict[str, str]:
        out = super().sources(stage)
        if stage == "realized":
            out["p1"] = "realized_p1 (or planned_p1)"
        return out

    def planned_effect(self, rows: pd.DataFrame) -> np.ndarray:
        p1 = _column(rows, "planned_p1")
        p2 = _column(rows, "planned_p2")
        return np.where(np.isnan(p2), _column(rows, "planned_effect"), p2 - p1)

    def effect_sources(self) -> str:
        return "planned_p2 (or planned_effect)"

    def row_checks(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str, str]]:
        p1 = _column(rows, "planned_p1")
        p2 = _column(rows, "planned_p2")
        effect = _column(rows, "planned_effect")
        sesoi = _column(rows, "sesoi")
        with np.errstate(invalid="ignore"):
            implied = p1 + effect
            return [
                (
                    ~np.isnan(p2) & (np.abs(effect - (p2 - p1)) > 1e-9),
                    "planned_effect",
                    "disagrees with planned_p2 - planned_p1 (the risk difference); give one or "
                    "make them agree",
                ),
                (
                    np.isnan(p2) & ((implied <= 0) | (implied >= 1)),
                    "planned_effect",
                    "planned_p1 + planned_effect must be a proportion strictly between 0 and 1",
                ),
                (np.abs(sesoi) >= 1, "sesoi", "a risk difference must lie strictly within ±1"),
            ]

    def fallback_notes(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str]]:
        real = _column(rows, "realized_p1")
        plan = _column(rows, "planned_p1")
        cc = _column(rows, "continuity_correction")
        return [
            (
                np.isnan(real) & ~np.isnan(plan),
                "realized_p1 not reported: the planned control rate is used for the realized "
                "design",
            ),
            (cc > 0, "continuity-corrected z test (Fleiss, Levin & Paik)"),
        ]

    # -- maths ----------------------------------------------------------------------------------

    def _test_args(self, sc: Scenario, test: TestSpec) -> tuple[np.ndarray, ...]:
        return (test.alpha, test.sides, sc["continuity_correction"], test.direction)

    def se(self, sc: Scenario, effect: np.ndarray | None = None) -> np.ndarray:
        """SE of the estimated risk difference (unpooled, at ``p1`` and ``p1 + effect``)."""
        p2 = sc["p1"] + effect
        _, se1, _ = _standard_errors(sc["n1"], sc["n2"], sc["p1"], p2)
        return np.where((p2 >= 0) & (p2 <= 1), se1, np.nan)

    def power(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        return proportions_power(
            sc["n1"], sc["n2"], sc["p1"], sc["p1"] + effect, *self._test_args(sc, test)
        )

    def mde(self, sc: Scenario, test: TestSpec) -> np.ndarray:
        """Risk difference detectable from the control rate ``p1``, in the planned direction.

        nan where no difference that keeps ``p2`` within [0, 1] reaches the target power.
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
            z = special.ndtri(1.0 - test.alpha[ok] / test.sides[ok]) + special.ndtri(test.power[ok])
            guess = z * np.sqrt(p1[ok] * (1.0 - p1[ok]) * (1.0 / args[0] + 1.0 / args[1]))
        guess = np.clip(guess, 1e-6, 0.5 * room[ok])
        magnitude = solve_increasing(
            _power_of_difference, test.power[ok], guess, lower=0.0, upper=room[ok], args=args
        )
        out[ok] = test.direction[ok] * magnitude
        return out

    def standardize(self, sc: Scenario, effect: np.ndarray) -> np.ndarray:
        """Cohen's h between ``p1`` and ``p1 + effect``."""
        return cohens_h(sc["p1"], sc["p1"] + effect)

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
        return sc, np.where(inside, p2 - sc["p1"], np.nan)

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
        result). The SE is the one the test implies, so that the interval is dual to it.
        """
        z = np.asarray(statistic, dtype=float)
        p1 = _column(rows, "realized_p1")
        n1, n2 = sc["n1"], sc["n2"]
        with np.errstate(divide="ignore", invalid="ignore"):
            k = 1.0 / n1 + 1.0 / n2
            w2 = n2 / (n1 + n2)
            h = np.where(sc["continuity_correction"] > 0, 0.5 * k, 0.0)
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
        return np.where(ok, effect, np.nan), np.where(ok, se, np.nan)

    def required_size(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        """Smallest total size reaching the target power, allocation kept, groups rounded up.

        Solved exactly on :func:`proportions_power` (both tails), starting from the closed
        form of Fleiss, Levin & Paik; the two agree wherever the far tail is negligible.
        """
        n = len(effect)
        out = np.full(n, np.nan)
        p1 = sc["p1"]
        p2 = p1 + effect
        r = allocation_ratio(sc)
        cc = sc["continuity_correction"]
        ok = (
            np.isfinite(p2)
            & (p2 >= 0)
            & (p2 <= 1)
            & (test.direction * effect > 0)
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
        # Guard against solver noise at exact integers (198.9999999999 -> 199, not 200).
        n1 = n1 * (1.0 - 1e-10)
        out[ok] = np.ceil(n1) + np.ceil(n1 * r[ok] * (1.0 - 1e-12))
        return out

    def null_explanations(
        self,
        rows: pd.DataFrame,
        plan: Scenario,
        real: Scenario,
        effect: np.ndarray,
        test: TestSpec,
    ) -> dict[str, NullReasons]:
        with np.errstate(invalid="ignore"):
            off_real = ((real["p1"] + effect) < 0) | ((real["p1"] + effect) > 1)
            sesoi = self.orient(_column(rows, "sesoi"), test.direction)
            off_sesoi = ((real["p1"] + sesoi) < 0) | ((real["p1"] + sesoi) > 1)
        outside = "the realized control rate plus the planned risk difference lies outside [0, 1]"
        effect_blank = (np.isnan(effect), self.effect_sources())
        no_mde = (
            test.power > test.alpha,
            "no risk difference in the direction used (with no direction: on one of the two "
            "sides) reaches the target power from this control rate",
        )
        return {
            "power_at_planned_effect": NullReasons(conditions=((off_real, outside),)),
            "power_at_sesoi": NullReasons(
                conditions=(
                    (off_sesoi, "the realized control rate plus the SESOI lies outside [0, 1]"),
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
