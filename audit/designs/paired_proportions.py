"""Paired binary outcomes (matched pairs, or one subject under both conditions): McNemar's test.

Only discordant pairs carry information. With ``p1`` the share of pairs in which only the
control member has the event and ``p2`` the share in which only the intervention member has it,
the difference of the marginal proportions is ``δ = p2 − p1`` and the discordant share is
``ψ = p1 + p2``. McNemar's statistic, in its z form ``(b − c) / √(b + c)``, is approximately
normal with mean ``δ√n / √ψ`` and variance ``(ψ − δ²) / ψ`` for ``n`` pairs, which gives Connor's
power and sample size [1]_:

``power = Φ((sδ√n − c√ψ) / √(ψ − δ²)) + [two-sided] Φ((−sδ√n − c√ψ) / √(ψ − δ²))``,
``n = (c√ψ + z_β √(ψ − δ²))² / δ²`` (one tail),

with ``c`` the normal critical value and ``s`` the direction. ``planned_p1`` / ``planned_p2`` are
the discordant proportions (``planned_effect`` may give ``δ`` instead of ``planned_p2``); sizes
count pairs, in ``planned_n1``. The realized design keeps the planned ``δ`` on the realized
``p1``; ``realized_p1`` / ``realized_p2`` with ``realized_n1`` give the reported result.
The standardized effect is Cohen's ``g = p2 / ψ − 1/2`` [2]_.

References
----------
.. [1] Connor, R. J. (1987). Sample size for testing differences in proportions for the
   paired-sample design. Biometrics 43:207-211.
.. [2] Cohen, J. (1988). Statistical Power Analysis for the Behavioral Sciences, 2nd ed., ch. 5.
.. [3] McNemar, Q. (1947). Note on the sampling error of the difference between correlated
   proportions or percentages. Psychometrika 12:153-157.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import special

from audit.designs._base import Design, NullReasons, Scenario, TestSpec, _column
from audit.designs._solve import smallest_size, solve_increasing

__all__ = ["PairedProportions", "connor_pairs", "mcnemar_power"]


def mcnemar_power(n, p1, p2, alpha, sides, direction=1.0) -> np.ndarray:
    """Connor's power of McNemar's test for ``n`` pairs with discordant proportions p1, p2.

    nan where the proportions are not discordant shares (negative, or summing above 1).

    Examples
    --------
    Power at no difference is alpha:

    >>> round(float(mcnemar_power(100, 0.1, 0.1, 0.05, 2)), 12)
    0.05
    """
    n, p1, p2, alpha, sides, direction = np.broadcast_arrays(
        *(np.asarray(a, dtype=float) for a in (n, p1, p2, alpha, sides, direction))
    )
    psi = p1 + p2
    delta = direction * (p2 - p1)
    c = -special.ndtri(alpha / sides)
    with np.errstate(divide="ignore", invalid="ignore"):
        spread = np.sqrt(psi - delta * delta)
        root_n = np.sqrt(n)
        upper = special.ndtr((delta * root_n - c * np.sqrt(psi)) / spread)
        lower = special.ndtr((-delta * root_n - c * np.sqrt(psi)) / spread)
    out = np.clip(upper + np.where(sides == 2, lower, 0.0), 0.0, 1.0)
    ok = (p1 >= 0) & (p2 >= 0) & (psi <= 1) & (psi > 0) & (spread > 0) & (n > 0)
    return np.where(ok, out, np.nan)


def connor_pairs(p1, p2, alpha, sides, power) -> np.ndarray:
    """Connor's continuous number of pairs (one rejection tail; round up for a count).

    Examples
    --------
    >>> round(float(connor_pairs(0.1, 0.2, 0.05, 2, 0.8)), 3)
    233.095
    """
    p1, p2, alpha, sides, power = np.broadcast_arrays(
        *(np.asarray(a, dtype=float) for a in (p1, p2, alpha, sides, power))
    )
    psi = p1 + p2
    delta = p2 - p1
    c = -special.ndtri(alpha / sides)
    zb = special.ndtri(power)
    with np.errstate(divide="ignore", invalid="ignore"):
        return (c * np.sqrt(psi) + zb * np.sqrt(psi - delta * delta)) ** 2 / (delta * delta)


def _power_of_pairs(n, p1, p2, alpha, sides, direction):
    return mcnemar_power(n, p1, p2, alpha, sides, direction)


def _power_of_difference(d, n, p1, alpha, sides, direction):
    return mcnemar_power(n, p1, p1 + direction * d, alpha, sides, direction)


class PairedProportions(Design):
    """McNemar's test for paired proportions (Connor 1987); sizes are pairs."""

    name = "paired_proportions"
    family = "proportions"
    title = "paired proportions (McNemar's test, discordant proportions; Connor)"
    effect_unit = "difference of the paired proportions p2 - p1 (discordant shares)"
    standardized_as = "g"
    stage_keys = ("n1", "p1")
    size_keys = ("n1",)
    nuisance_keys = ("p1",)
    extra_inputs = ("planned_p2", "realized_p2")
    one_group = True
    symmetric = False
    # McNemar's z, (c - b) / sqrt(b + c), or its square.
    statistic_types = frozenset({"z", "chi2"})
    statistic_rule = (
        "the difference of the discordant proportions whose McNemar z, delta sqrt(n / psi) with "
        "psi = 2 p1 + delta, is the one reported (needs realized_p1)"
    )
    scale_label = "difference of paired proportions"

    # -- results as reported --------------------------------------------------------------------

    def effect_from_statistic(
        self, rows: pd.DataFrame, sc: Scenario, statistic: np.ndarray, df: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        """``δ`` from McNemar's ``z = δ √n / √ψ``, ``ψ = 2 p1 + δ`` the discordant share with
        ``p1`` the observed control-only share: ``δ² − c δ − 2 p1 c = 0`` with ``c = z² / n``,
        the root of the sign of z; the SE is ``|δ| / |z|``, the test's own."""
        z = np.asarray(statistic, dtype=float)
        p1 = _column(rows, "realized_p1")
        with np.errstate(divide="ignore", invalid="ignore"):
            c = z * z / sc["n1"]
            root = np.sqrt(c * c + 8.0 * p1 * c)
            delta = np.where(z > 0, (c + root) / 2.0, (c - root) / 2.0)
            delta = np.where(z == 0, 0.0, delta)
            se = np.where(z != 0, np.abs(delta) / np.abs(z), np.sqrt(2.0 * p1 / sc["n1"]))
        ok = np.isfinite(delta) & (p1 + delta >= 0) & (2.0 * p1 + delta <= 1)
        return np.where(ok, delta, np.nan), np.where(ok, se, np.nan)

    def at_standardized(
        self, sc: Scenario, magnitude: np.ndarray, direction: np.ndarray
    ) -> tuple[Scenario, np.ndarray]:
        """The difference whose Cohen's g (``p2 / (p1 + p2) − 1/2``) is ``direction x
        magnitude`` from the control-only share p1: ``p2 = p1 (1/2 + g) / (1/2 − g)``."""
        g = np.asarray(direction, dtype=float) * np.abs(magnitude)
        p1 = sc["p1"]
        with np.errstate(divide="ignore", invalid="ignore"):
            p2 = p1 * (0.5 + g) / (0.5 - g)
        ok = (np.abs(g) < 0.5) & (p2 >= 0) & (p1 + p2 <= 1)
        return sc, np.where(ok, p2 - p1, np.nan)

    # -- reading --------------------------------------------------------------------------------

    def scenario(self, rows: pd.DataFrame, stage: str) -> Scenario:
        sc = super().scenario(rows, stage)
        if stage == "realized":
            sc["p1"] = np.where(np.isnan(sc["p1"]), _column(rows, "planned_p1"), sc["p1"])
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
        out = []
        p1, p2 = _column(rows, "planned_p1"), _column(rows, "planned_p2")
        effect = _column(rows, "planned_effect")
        with np.errstate(invalid="ignore"):
            out.append(
                (
                    ~np.isnan(p2) & (np.abs(effect - (p2 - p1)) > 1e-9),
                    "planned_effect",
                    "disagrees with planned_p2 - planned_p1; give one or make them agree",
                )
            )
            implied = p1 + effect
            out.append(
                (
                    np.isnan(p2) & ((implied < 0) | (p1 + implied > 1)),
                    "planned_effect",
                    "with planned_p1 it must give discordant shares of pairs: planned_p1 + "
                    "planned_effect at least 0, and planned_p1 + (planned_p1 + planned_effect) "
                    "at most 1",
                )
            )
            for stage in ("planned", "realized"):
                both = _column(rows, f"{stage}_p1") + _column(rows, f"{stage}_p2")
                out.append(
                    (
                        both > 1,
                        f"{stage}_p2",
                        f"{stage}_p1 + {stage}_p2 (the discordant shares of pairs) cannot exceed 1",
                    )
                )
        out.append(
            (np.abs(_column(rows, "sesoi")) >= 1, "sesoi", "a difference must lie within ±1")
        )
        return out

    def fallback_notes(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str]]:
        real = _column(rows, "realized_p1")
        plan = _column(rows, "planned_p1")
        with np.errstate(invalid="ignore"):
            moved = ~np.isnan(self.planned_effect(rows) + real) & (np.abs(real - plan) > 1e-12)
        return [
            (
                np.isnan(real) & ~np.isnan(plan),
                "realized_p1 not reported: the planned discordant proportion is used for the "
                "realized design",
            ),
            (
                moved,
                "the realized discordant proportion p1 differs from the planned one: the planned "
                "difference p2 - p1 is held fixed on it",
            ),
        ]

    # -- the reported result ----------------------------------------------------------------

    def counted_result(self, rows: pd.DataFrame) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The difference of the realized discordant proportions and its SE √((ψ − δ²)/n)."""
        p1, p2 = _column(rows, "realized_p1"), _column(rows, "realized_p2")
        n = _column(rows, "realized_n1")
        delta = p2 - p1
        with np.errstate(invalid="ignore", divide="ignore"):
            se = np.sqrt((p1 + p2 - delta * delta) / n)
        ok = np.isfinite(delta + se) & (se > 0)
        return np.where(ok, delta, np.nan), np.where(ok, se, np.nan), np.where(ok, 2, 0)

    def count_columns(self) -> str:
        return "realized_p1/2 and realized_n1"

    def rate_columns(self) -> str:
        return self.count_columns()

    def partial_counts(self, rows: pd.DataFrame) -> np.ndarray:
        return np.isfinite(_column(rows, "realized_p2"))

    def counted_note(self) -> str:
        return "difference of the discordant proportions, SE √((p1 + p2 − (p2 − p1)²) / n)"

    # -- maths ----------------------------------------------------------------------------------

    def se(self, sc: Scenario, effect: np.ndarray | None = None) -> np.ndarray:
        p2 = sc["p1"] + effect
        with np.errstate(invalid="ignore", divide="ignore"):
            se = np.sqrt((sc["p1"] + p2 - effect * effect) / sc["n1"])
        ok = (p2 >= 0) & (sc["p1"] + p2 <= 1)
        return np.where(ok, se, np.nan)

    def power(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        return mcnemar_power(
            sc["n1"], sc["p1"], sc["p1"] + effect, test.alpha, test.sides, test.direction
        )

    def mde(self, sc: Scenario, test: TestSpec) -> np.ndarray:
        p1, n = sc["p1"], sc["n1"]
        # Room for p2: at least 0 going down, p1 + p2 at most 1 going up.
        room = np.where(test.direction > 0, 1.0 - 2.0 * p1, p1)
        ok = np.isfinite(p1 + n) & (room > 0) & (test.power > test.alpha) & (test.power < 1)
        out = np.full(len(p1), np.nan)
        if not ok.any():
            return out
        with np.errstate(divide="ignore", invalid="ignore"):
            z = -special.ndtri(test.alpha / test.sides) + special.ndtri(test.power)
            guess = np.clip(z * np.sqrt(2.0 * p1 / n), 1e-6, 0.5 * room)
        args = (n[ok], p1[ok], test.alpha[ok], test.sides[ok], test.direction[ok])
        magnitude = solve_increasing(
            _power_of_difference, test.power[ok], guess[ok], lower=0.0, upper=room[ok], args=args
        )
        out[ok] = test.direction[ok] * magnitude
        return out

    def standardize(self, sc: Scenario, effect: np.ndarray) -> np.ndarray:
        """Cohen's g: the intervention-only share of discordant pairs minus one half."""
        p2 = sc["p1"] + effect
        with np.errstate(divide="ignore", invalid="ignore"):
            return p2 / (sc["p1"] + p2) - 0.5

    def required_size(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        """Pairs for the target power: exact on the two-tailed power, from Connor's formula."""
        n = len(effect)
        out = np.full(n, np.nan)
        p1 = sc["p1"]
        p2 = p1 + effect
        with np.errstate(invalid="ignore"):
            ok = (
                np.isfinite(p2)
                & (p2 >= 0)
                & (p1 + p2 <= 1)
                & (test.direction * effect > 0)
                & (test.power > test.alpha)
                & (test.power < 1)
            )
        if not ok.any():
            return out
        guess = connor_pairs(p1, p2, test.alpha, test.sides, test.power)
        args = (p1, p2, test.alpha, test.sides, test.direction)
        pairs = smallest_size(
            _power_of_pairs,
            test.power[ok],
            np.where(np.isfinite(guess[ok]), guess[ok], 1.0),
            lower=np.ones(int(ok.sum())),
            args=tuple(a[ok] for a in args),
        )
        out[ok] = np.ceil(pairs * (1.0 - 1e-10))
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
            p2 = real["p1"] + effect
            off = (p2 < 0) | (real["p1"] + p2 > 1)
        outside = (
            "the realized p1 with the planned difference gives discordant proportions that are "
            "not shares of pairs"
        )
        no_mde = (
            test.power > test.alpha,
            "no difference in the direction used (with no direction: on one of the two sides) "
            "reaches the target power from this discordant proportion",
        )
        return {
            "power_at_planned_effect": NullReasons(conditions=((off, outside),)),
            "se_realized": NullReasons(conditions=((off, outside),)),
            "precision_ratio": NullReasons(conditions=((off, outside),)),
            "mde": NullReasons(conditions=(no_mde,)),
            "mde_std": NullReasons(conditions=(no_mde,)),
            "n_required_realized": NullReasons(conditions=((off, outside),)),
            "power_if_planned_size": NullReasons(conditions=((off, outside),)),
            "power_cost_nuisance": NullReasons(conditions=((off, outside),)),
            "power_cost_attrition": NullReasons(conditions=((off, outside),)),
        }
