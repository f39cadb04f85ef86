"""The 2×2 (AB/BA) crossover trial: each subject has both treatments, in a randomized order.

Each subject gives a period difference ``d = y(period 1) − y(period 2)``; with ``σ_d`` its SD
(``planned_sd``) and ``n`` subjects split equally between the sequences AB and BA, the treatment
effect is estimated by ``(mean d_AB − mean d_BA) / 2`` with variance ``σ_d² / 4 · (1/n_AB +
1/n_BA) = σ_d² / n``, and tested with a t test on ``n − 2`` degrees of freedom (the period effect
is removed by the comparison of the sequences) [1]_ [2]_. It is the two-sample t test on half
the period differences, ``n/2`` subjects per sequence.

Sizes: ``planned_n1`` / ``realized_n1`` hold the total number of subjects (both sequences);
required sizes are rounded up to an even number (two equal sequences). Where a row gives the SD
of one period's outcome between subjects and the correlation ``ρ`` of a subject's two periods
(``period_correlation``), ``σ_d = σ √(2 (1 − ρ))``, with a note. Carry-over is assumed absent
(the usual planning assumption; a washout is the design's answer to it).

References
----------
.. [1] Jones, B. & Kenward, M. G. (2003). Design and Analysis of Cross-Over Trials, 2nd ed.
   Chapman & Hall, chapter 2.
.. [2] Senn, S. (2002). Cross-over Trials in Clinical Research, 2nd ed. Wiley, chapter 3.
.. [3] Julious, S. A. (2004). Sample sizes for clinical trials with Normal data. Statistics in
   Medicine 23:1921-1986 (section 5: crossover trials).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from audit.designs._base import Scenario, _column
from audit.designs.means import _OneGroup

__all__ = ["Crossover", "period_difference_sd"]


def period_difference_sd(sd: np.ndarray, correlation: np.ndarray) -> np.ndarray:
    """SD of a subject's period difference from the SD of one period's outcome and the
    correlation of the two periods: ``σ √(2 (1 − ρ))``.

    Examples
    --------
    >>> round(float(period_difference_sd(10.0, 0.5)), 12)
    10.0
    """
    sd, correlation = (np.asarray(a, dtype=float) for a in (sd, correlation))
    with np.errstate(invalid="ignore"):
        return sd * np.sqrt(2.0 * (1.0 - correlation))


class Crossover(_OneGroup):
    """2×2 crossover: ``se = σ_d / √n``, t on ``n − 2`` df, ``n`` subjects in two sequences."""

    margin_tests = True
    name = "crossover"
    family = "means"
    title = "2x2 crossover (AB/BA; t test on period differences, n - 2 df)"
    effect_unit = (
        "difference between the treatments (outcome units, or d on the SD of period differences)"
    )
    standardized_as = "d_z"
    extra_inputs = ("effect_scale", "period_correlation")

    def scenario(self, rows: pd.DataFrame, stage: str) -> Scenario:
        sc = super().scenario(rows, stage)
        rho = _column(rows, "period_correlation")
        converted = np.isfinite(rho) & ~self._standardized(rows)
        sc["sd"] = np.where(converted, period_difference_sd(sc["sd"], rho), sc["sd"])
        return sc

    @staticmethod
    def _standardized(rows: pd.DataFrame) -> np.ndarray:
        if "effect_scale" not in rows.columns:
            return np.zeros(len(rows), dtype=bool)
        return (rows["effect_scale"] == "d").to_numpy(dtype=bool, na_value=False)

    def fallback_notes(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str]]:
        rho = _column(rows, "period_correlation")
        standardized = self._standardized(rows)
        return [
            *super().fallback_notes(rows),
            (
                np.isfinite(rho) & ~standardized,
                "planned_sd and realized_sd read as the SD of one period's outcome between "
                "subjects and converted with period_correlation to the SD of a subject's period "
                "difference, sd x sqrt(2 (1 - correlation))",
            ),
            (
                np.isfinite(rho) & standardized,
                "period_correlation not used: with effect_scale d the effects are already in "
                "units of the SD of period differences",
            ),
        ]

    def se(self, sc: Scenario, effect: np.ndarray | None = None) -> np.ndarray:
        with np.errstate(divide="ignore", invalid="ignore"):
            return sc["sd"] / np.sqrt(sc["n1"])

    def df(self, sc: Scenario) -> np.ndarray:
        return sc["n1"] - 2.0

    def min_n1(self, sc: Scenario) -> np.ndarray:
        # One df needs three subjects; two sequences need at least one subject each.
        return np.full(len(sc["n1"]), 3.0)

    def rounded_total(self, sc: Scenario, n1: np.ndarray) -> np.ndarray:
        # Two equal sequences: the next even number.
        return 2.0 * np.ceil(n1 / 2.0)

    def row_checks(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str, str]]:
        out = []
        for stage in ("planned", "realized"):
            n = _column(rows, f"{stage}_n1")
            out.append(
                (
                    n < 3,
                    f"{stage}_n1",
                    "must be at least 3 subjects (both sequences; the t test needs n - 2 > 0 df)",
                )
            )
        return out
