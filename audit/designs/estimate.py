"""A generic effect estimate with a known standard error (any analysis, any scale).

Used when the audit has only the SE of the primary estimate — a mixed model, a regression
coefficient, a log odds ratio. The test is a z test, or a t test when ``df`` is given.

References
----------
.. [1] Bloom, H. S. (1995). Minimum detectable effects: a simple way to report the statistical
   power of experimental designs. Evaluation Review 19:547-556.
"""

from __future__ import annotations

from typing import ClassVar

import numpy as np
import pandas as pd

from audit.designs._base import Design, Scenario, TestSpec
from audit.designs._power import t_ncp_for_power, t_power

__all__ = ["Estimate"]


class Estimate(Design):
    """Effect estimate with standard error ``se`` and ``df`` (blank: normal).

    Power is ``P(|T| > c)`` with ``T ~ t(df, effect / se)``; the MDE is the multiplier times the
    SE (Bloom's 2.80 for a two-sided test at alpha .05 and power .80 with large df [1]_).
    """

    margin_tests = True
    name = "estimate"
    family = "estimate"
    title = "effect estimate with a known standard error"
    effect_unit = "the estimate's own scale"
    standardized_as = None
    stage_keys = ("se",)
    shared_keys = ("df",)
    size_keys = ()
    statistic_types = frozenset({"t", "z", "f", "chi2"})
    statistic_rule = "effect = statistic x realized_se"
    scale_label = "the estimate's own scale"
    scale_follows_family = True
    not_applicable: ClassVar[dict[str, str]] = {
        "mde_std": "the estimate design has no standardized scale",
        "n_required_plan": "the estimate design has no sample size",
        "plan_discrepancy": "the estimate design has no sample size",
        "n_required_realized": "the estimate design has no sample size",
        "n_ratio": "the estimate design has no sample size",
    }

    def scenario(self, rows: pd.DataFrame, stage: str) -> Scenario:
        sc = super().scenario(rows, stage)
        sc["df"] = np.where(np.isnan(sc["df"]), np.inf, sc["df"])
        return sc

    def analysis_df(self, sc: Scenario) -> np.ndarray:
        return sc["df"]

    def effect_from_statistic(
        self, rows: pd.DataFrame, sc: Scenario, statistic: np.ndarray, df: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        return self._statistic_times_se(sc, statistic)

    def total_size(self, sc: Scenario) -> np.ndarray:
        return np.full(len(sc["se"]), np.nan)

    def se(self, sc: Scenario, effect: np.ndarray | None = None) -> np.ndarray:
        return sc["se"]

    def power(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        with np.errstate(divide="ignore", invalid="ignore"):
            ncp = test.direction * effect / sc["se"]
        out = np.full(ncp.shape, np.nan)
        ok = np.isfinite(ncp)
        out[ok] = t_power(ncp[ok], sc["df"][ok], test.alpha[ok], test.sides[ok])
        return out

    def mde(self, sc: Scenario, test: TestSpec) -> np.ndarray:
        ok = np.isfinite(sc["se"])
        mult = np.full(len(ok), np.nan)
        mult[ok] = t_ncp_for_power(test.power[ok], sc["df"][ok], test.alpha[ok], test.sides[ok])
        return test.direction * mult * sc["se"]

    def standardize(self, sc: Scenario, effect: np.ndarray) -> np.ndarray:
        return np.full(len(effect), np.nan)

    def required_size(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        return np.full(len(effect), np.nan)
