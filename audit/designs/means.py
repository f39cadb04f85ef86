"""Designs comparing means with a t test: one mean, paired means, two independent means.

Effects are mean differences on the outcome's scale (``effect_scale = raw``) or standardized
mean differences (``effect_scale = d``, the SD then taken as 1). A realized SD that was not
reported falls back to the planned SD, with a note.

References
----------
.. [1] Cohen, J. (1988). Statistical Power Analysis for the Behavioral Sciences, 2nd ed., ch. 2.
.. [2] Borm, G. F., Fransen, J. & Lemmens, W. A. (2007). A simple sample size formula for analysis
   of covariance in randomized clinical trials. J. Clin. Epidemiol. 60:1234-1238.
"""

from __future__ import annotations

from typing import ClassVar

import numpy as np
import pandas as pd

from audit.designs._base import Scenario, TDesign, _column, allocation_ratio

__all__ = ["OneMean", "PairedMeans", "TwoMeans", "standardized_rows"]


#: Columns that hold values in outcome units (or SDs of them) on a mean design's row.
OUTCOME_UNIT_COLUMNS = (
    "planned_sd",
    "realized_sd",
    "planned_effect",
    "sesoi",
    "observed_effect",
    "observed_se",
    "observed_ci_low",
    "observed_ci_high",
    "observed_mean1",
    "observed_mean2",
    "observed_sd1",
    "observed_sd2",
)

#: Arm means and SDs, read by the designs that compare two groups (paired: the two means).
ARM_COLUMNS = ("observed_mean1", "observed_mean2", "observed_sd1", "observed_sd2")


def _standardized_rows(rows: pd.DataFrame) -> np.ndarray:
    """Rows whose effects are standardized: ``effect_scale = d``, or nothing in outcome units."""
    declared = np.zeros(len(rows), dtype=bool)
    if "effect_scale" in rows.columns:
        declared = (rows["effect_scale"] == "d").to_numpy(dtype=bool, na_value=False)
    return declared | _read_as_d(rows, declared)


#: Public name: which rows of a mean design have standardized effects (d, d_z).
standardized_rows = _standardized_rows


def _read_as_d(rows: pd.DataFrame, declared: np.ndarray) -> np.ndarray:
    """Rows left on the raw scale that give nothing in outcome units (no SD, effect, SESOI,
    estimate, interval or arm means; a study known only by its sizes, test statistic or p).
    Their only unit is the SD, so they are read as ``effect_scale = d``: their MDE, result and
    pooled effects come out as standardized mean differences (a note says so)."""
    nothing = ~declared
    for column in OUTCOME_UNIT_COLUMNS:
        if column in rows.columns:
            nothing &= np.isnan(_column(rows, column))
    return nothing


class _MeanDesign(TDesign):
    """Shared reading of SDs and the effect scale."""

    stage_keys = ("n1", "sd")
    extra_inputs = ("effect_scale",)
    ratio_keys: ClassVar[dict[str, tuple[str, str]]] = {"sd_ratio": ("planned_sd", "realized_sd")}
    nuisance_keys = ("sd",)
    #: Names of the analysis scale on the raw and on the standardized scale (for pooling).
    raw_scale: ClassVar[str] = "mean difference (outcome units)"
    std_scale: ClassVar[str] = "d"

    def analysis_scale(self, rows: pd.DataFrame) -> np.ndarray:
        std = _standardized_rows(rows)
        return np.where(std, self.std_scale, self.raw_scale).astype(object)

    def scenario(self, rows: pd.DataFrame, stage: str) -> Scenario:
        sc = super().scenario(rows, stage)
        planned_sd = _column(rows, "planned_sd")
        if stage == "realized":
            sc["sd"] = np.where(np.isnan(sc["sd"]), planned_sd, sc["sd"])
        # Standardized effects are in SD units: the SD is 1 by definition.
        sc["sd"] = np.where(_standardized_rows(rows), 1.0, sc["sd"])
        return sc

    def sources(self, stage: str) -> dict[str, str]:
        out = super().sources(stage)
        out["sd"] = "planned_sd" if stage == "planned" else "realized_sd (or planned_sd)"
        return out

    def sd(self, sc: Scenario) -> np.ndarray:
        return sc["sd"]

    def fallback_notes(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str]]:
        """Notes about assumptions made where the row left a value blank."""
        real = _column(rows, "realized_sd")
        plan = _column(rows, "planned_sd")
        raw = ~_standardized_rows(rows)
        declared = np.zeros(len(rows), dtype=bool)
        if "effect_scale" in rows.columns:
            declared = (rows["effect_scale"] == "d").to_numpy(dtype=bool, na_value=False)
        return [
            (
                raw & np.isnan(real) & ~np.isnan(plan),
                "realized_sd not reported: the planned SD is used for the realized design",
            ),
            (
                _read_as_d(rows, declared),
                "effect_scale read as d: the row gives nothing in outcome units (no SD, effect, "
                "SESOI, estimate, interval or arm means), so its MDE and any result derived from "
                "a test statistic are standardized mean differences",
            ),
        ]


class _OneGroup(_MeanDesign):
    size_keys = ("n1",)
    one_group = True

    def se(self, sc: Scenario, effect: np.ndarray | None = None) -> np.ndarray:
        with np.errstate(divide="ignore", invalid="ignore"):
            return sc["sd"] / np.sqrt(sc["n1"])

    def df(self, sc: Scenario) -> np.ndarray:
        return sc["n1"] - 1.0

    def min_n1(self, sc: Scenario) -> np.ndarray:
        # The smallest testable design has one degree of freedom (n = 2); below it the t
        # distribution, and so power, is not defined.
        return np.full(len(sc["n1"]), 2.0)

    def with_n1(self, sc: Scenario, n1: np.ndarray) -> Scenario:
        return {**sc, "n1": np.broadcast_to(n1, sc["n1"].shape).astype(float)}

    def rounded_total(self, sc: Scenario, n1: np.ndarray) -> np.ndarray:
        return np.ceil(n1)

    def row_checks(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str, str]]:
        out = []
        for stage in ("planned", "realized"):
            n = _column(rows, f"{stage}_n1")
            out.append((n < 2, f"{stage}_n1", "must be at least 2 (the t test needs n - 1 > 0 df)"))
        return out


class OneMean(_OneGroup):
    """One-sample t test of a mean against a fixed value.

    ``se = sd / sqrt(n)``, ``df = n - 1``; the effect is the difference from the null value.
    """

    margin_tests = True
    name = "one_mean"
    family = "means"
    title = "one mean against a fixed value (one-sample t test)"
    effect_unit = "difference from the null value (outcome units, or d)"
    standardized_as = "d"
    raw_scale = "difference from the null value (outcome units)"
    std_scale = "d (one sample)"


class PairedMeans(_OneGroup):
    """Paired t test on within-pair differences.

    ``sd`` is the SD of the differences, so the standardized effect is Cohen's ``d_z``;
    ``n`` counts pairs; ``df = n - 1``.
    """

    margin_tests = True
    name = "paired_means"
    family = "means"
    title = "paired means (t test on within-pair differences)"
    effect_unit = "mean within-pair difference (outcome units, or d_z)"
    standardized_as = "d_z"
    std_scale = "d_z"
    # The two means; their SDs do not give the SD of the differences (that needs the
    # correlation), so observed_sd1/2 are not read (a note names them where given).
    extra_inputs = ("effect_scale", "observed_mean1", "observed_mean2")

    def effect_from_means(
        self, rows: pd.DataFrame, sc: Scenario
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``mean2 - mean1`` with SE ``realized_sd / sqrt(n)`` (``realized_sd`` is the SD of the
        within-pair differences); standardized: ``d_z = (mean2 - mean1) / realized_sd``."""
        diff = _column(rows, "observed_mean2") - _column(rows, "observed_mean1")
        sd_diff = _column(rows, "realized_sd")
        n = sc["n1"]
        std = _standardized_rows(rows)
        with np.errstate(divide="ignore", invalid="ignore"):
            se = sd_diff / np.sqrt(n)
            effect = np.where(std, diff / sd_diff, diff)
            se = np.where(std, 1.0 / np.sqrt(n), se)
        se = np.where(np.isfinite(sd_diff) & (sd_diff > 0), se, np.nan)
        return effect, se, n - 1.0


class _TwoGroups(_MeanDesign):
    """Two groups (of units or of clusters) sized together, the planned allocation kept.

    Subclasses give ``df_spent``: n1 + n2 minus the test's df.
    """

    extra_inputs = ("effect_scale", *ARM_COLUMNS)
    # A point-biserial r is the two-sample t in other words: t = r sqrt(N - 2) / sqrt(1 - r^2).
    statistic_types = frozenset({"t", "z", "f", "chi2", "r"})

    def df_spent(self, sc: Scenario) -> np.ndarray:
        raise NotImplementedError

    def unadjusted(self, sc: Scenario) -> Scenario:
        """The scenario of the comparison arm means describe (no covariate adjustment)."""
        return sc

    def effect_from_means(
        self, rows: pd.DataFrame, sc: Scenario
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``mean2 - mean1`` and the SE of the unadjusted t test with the pooled SD
        ``sqrt(((n1 - 1) sd1^2 + (n2 - 1) sd2^2) / (n1 + n2 - 2))`` (Borenstein et al. 2009,
        eq. 4.3); standardized: ``d = (mean2 - mean1) / pooled SD`` with the t test's SE in SD
        units. Sizes are the realized ones (units, or clusters with the design effect)."""
        m1, m2 = _column(rows, "observed_mean1"), _column(rows, "observed_mean2")
        s1, s2 = _column(rows, "observed_sd1"), _column(rows, "observed_sd2")
        n1, n2 = sc["n1"], sc["n2"]
        std = _standardized_rows(rows)
        with np.errstate(divide="ignore", invalid="ignore"):
            pooled = np.sqrt(((n1 - 1.0) * s1**2 + (n2 - 1.0) * s2**2) / (n1 + n2 - 2.0))
            pooled = np.where(pooled > 0, pooled, np.nan)
            comparison = self.unadjusted({**sc, "sd": pooled})
            se = self.se(comparison)
            diff = m2 - m1
            effect = np.where(std, diff / pooled, diff)
            se = np.where(std, se / pooled, se)
        return effect, se, self.df(comparison)

    def min_n1(self, sc: Scenario) -> np.ndarray:
        # At least one degree of freedom and one unit (or cluster) per group.
        r = allocation_ratio(sc)
        return np.maximum((1.0 + self.df_spent(sc)) / (1.0 + r), np.maximum(1.0, 1.0 / r))

    def with_n1(self, sc: Scenario, n1: np.ndarray) -> Scenario:
        n1 = np.broadcast_to(n1, sc["n1"].shape).astype(float)
        return {**sc, "n1": n1, "n2": n1 * allocation_ratio(sc)}

    def rounded_total(self, sc: Scenario, n1: np.ndarray) -> np.ndarray:
        return np.ceil(n1) + np.ceil(n1 * allocation_ratio(sc) * (1.0 - 1e-12))


class TwoMeans(_TwoGroups):
    """Two independent groups compared with a t test, optionally covariate-adjusted (ANCOVA).

    ``se = sd * sqrt(1 - R^2) * sqrt(1/n1 + 1/n2)`` and ``df = n1 + n2 - 2 - q`` with ``q``
    covariates explaining a share ``R^2`` of the outcome variance [2]_. Without covariates this is
    the pooled two-sample t test [1]_. The standardized effect divides by the unadjusted SD.
    """

    margin_tests = True
    name = "two_means"
    family = "means"
    title = "two independent means (t test, optional covariate adjustment)"
    effect_unit = "difference in means (outcome units, or d)"
    standardized_as = "d"
    stage_keys = ("n1", "n2", "sd")
    shared_keys = ("covariates", "covariate_r2")

    def scenario(self, rows: pd.DataFrame, stage: str) -> Scenario:
        sc = super().scenario(rows, stage)
        r2 = sc["covariate_r2"]
        q = sc["covariates"]
        # A stated R^2 without a count is read as one covariate (the usual baseline adjustment);
        # a count without R^2 costs df but is given no variance reduction.
        sc["covariates"] = np.where(np.isnan(q), np.where(np.isnan(r2), 0.0, 1.0), q)
        sc["covariate_r2"] = np.where(np.isnan(r2), 0.0, r2)
        return sc

    def fallback_notes(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str]]:
        r2 = _column(rows, "covariate_r2")
        q = _column(rows, "covariates")
        return [
            *super().fallback_notes(rows),
            (
                ~np.isnan(r2) & np.isnan(q),
                "covariate_r2 given without covariates: one covariate assumed",
            ),
            (
                np.isnan(r2) & (q > 0),
                "covariates given without covariate_r2: no variance reduction assumed",
            ),
        ]

    def se(self, sc: Scenario, effect: np.ndarray | None = None) -> np.ndarray:
        with np.errstate(divide="ignore", invalid="ignore"):
            residual = sc["sd"] * np.sqrt(1.0 - sc["covariate_r2"])
            return residual * np.sqrt(1.0 / sc["n1"] + 1.0 / sc["n2"])

    def df(self, sc: Scenario) -> np.ndarray:
        return sc["n1"] + sc["n2"] - 2.0 - sc["covariates"]

    def df_spent(self, sc: Scenario) -> np.ndarray:
        return 2.0 + sc["covariates"]

    def unadjusted(self, sc: Scenario) -> Scenario:
        zero = np.zeros(len(sc["n1"]))
        return {**sc, "covariates": zero, "covariate_r2": zero}

    def row_checks(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str, str]]:
        q = _column(rows, "covariates")
        q = np.where(np.isnan(q), np.where(np.isnan(_column(rows, "covariate_r2")), 0, 1), q)
        out = []
        for stage in ("planned", "realized"):
            n1 = _column(rows, f"{stage}_n1")
            n2 = _column(rows, f"{stage}_n2")
            out.append(
                (
                    n1 + n2 - 2 - q < 1,
                    f"{stage}_n2",
                    "groups too small: n1 + n2 - 2 - covariates must be at least 1 (t-test df)",
                )
            )
        return out
