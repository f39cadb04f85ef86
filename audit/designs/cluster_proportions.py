"""Cluster-randomized comparison of two proportions: clusters per arm, design-effect variance.

With ``m`` the mean cluster size, ``cv`` the coefficient of variation of cluster sizes and ICC
the intracluster correlation of the binary outcome, an arm of ``n`` clusters carries the
information of ``n·m / DE`` independent units, ``DE = 1 + ((cv² + 1)·m − 1)·ICC`` [1]_ [2]_ (as
for ``cluster_two_means``). The test is the two-proportion test of ``two_proportions`` (the
variance pooled under H0) on those effective sizes, referred to a t distribution on ``J − 2``
degrees of freedom, J the number of clusters:

``power = P(T > c·SE0/SE1) + [two-sided] P(T < −c·SE0/SE1)``, ``T`` noncentral t on ``J − 2`` df
with noncentrality ``Δ / SE1``, ``c`` the t critical value, ``SE0`` the pooled and ``SE1`` the
unpooled SE of the risk difference at the effective sizes.

With many clusters this is the individually randomized sample size multiplied by the design
effect (Donner, Birkett & Buck 1981 [3]_); with few, the t reference on cluster df costs the
clusters a small-sample analysis needs. Effects are in the row's ``effect_measure`` as for
``two_proportions``; sizes (``planned_n1`` ...) count clusters, and so do required sizes.

References
----------
.. [1] Kish, L. (1965). Survey Sampling. Wiley, section 5.4.
.. [2] Eldridge, S. M., Ashby, D. & Kerry, S. (2006). Sample size for cluster randomized trials:
   effect of coefficient of variation of cluster size and analysis method. Int. J. Epidemiol.
   35:1292-1300.
.. [3] Donner, A., Birkett, N. & Buck, C. (1981). Randomization by cluster: sample size
   requirements and analysis. Am. J. Epidemiol. 114:906-914.
"""

from __future__ import annotations

from typing import ClassVar

import numpy as np
import pandas as pd
from scipy import special

from audit.designs._base import Scenario, TestSpec, _column, allocation_ratio
from audit.designs._binary import wald_se
from audit.designs._power import _t_power_at_critical, t_critical
from audit.designs._solve import smallest_size, solve_increasing
from audit.designs.cluster import design_effect
from audit.designs.proportions import TwoProportions, _standard_errors, fleiss_n1

__all__ = ["ClusterTwoProportions", "cluster_proportions_power"]


def cluster_proportions_power(
    n1: np.ndarray,
    n2: np.ndarray,
    m: np.ndarray,
    de: np.ndarray,
    p1: np.ndarray,
    p2: np.ndarray,
    alpha: np.ndarray,
    sides: np.ndarray,
    direction: np.ndarray = 1.0,
) -> np.ndarray:
    """Power of the cluster two-proportion test (see the module docstring).

    Parameters
    ----------
    n1, n2 : clusters per arm (``n1 + n2 > 2``).
    m : mean cluster size; de : the design effect.
    p1, p2 : true proportions (control, intervention).
    alpha, sides, direction : the test (``direction`` the side a one-sided test looks at).

    Examples
    --------
    Power at no difference is alpha:

    >>> round(float(cluster_proportions_power(10, 10, 30, 2.45, 0.2, 0.2, 0.05, 2)), 12)
    0.05
    """
    n1, n2, m, de, p1, p2, alpha, sides, direction = np.broadcast_arrays(
        *(np.asarray(a, dtype=float) for a in (n1, n2, m, de, p1, p2, alpha, sides, direction))
    )
    out = np.full(n1.shape, np.nan)
    df = n1 + n2 - 2.0
    with np.errstate(divide="ignore", invalid="ignore"):
        se0, se1, _ = _standard_errors(n1 * m / de, n2 * m / de, p1, p2)
        ok = (
            (df > 0)
            & (p1 >= 0)
            & (p1 <= 1)
            & (p2 >= 0)
            & (p2 <= 1)
            & np.isfinite(se0 / se1)
            & (se1 > 0)
            & (de > 0)
        )
    if not ok.any():
        return out
    c = t_critical(alpha[ok], sides[ok], df[ok]) * se0[ok] / se1[ok]
    ncp = direction[ok] * (p2[ok] - p1[ok]) / se1[ok]
    out[ok] = _t_power_at_critical(ncp, df[ok], c, sides[ok])
    return out


def _power_of_clusters(n1, p1, p2, ratio, m, de, alpha, sides, direction):
    return cluster_proportions_power(n1, n1 * ratio, m, de, p1, p2, alpha, sides, direction)


def _power_of_difference(d, n1, n2, m, de, p1, alpha, sides, direction):
    return cluster_proportions_power(n1, n2, m, de, p1, p1 + direction * d, alpha, sides, direction)


class ClusterTwoProportions(TwoProportions):
    """Two arms of clusters compared on a proportion (cluster df, design-effect variance).

    Blank realized ICC and cluster size fall back on the planned values (with a note); the
    control rate and the ICC are the nuisance parameters replaced for ``n_required_realized``.
    The continuity correction is not offered (it is not defined for the design-effect test).
    """

    margin_tests = False

    def margin_support(self) -> str | None:
        return f"{self.name} has no non-inferiority or equivalence test yet"

    name = "cluster_two_proportions"
    family = "cluster"
    title = "two arms of clusters, proportions (design effect, t on cluster df)"
    stage_keys = ("n1", "n2", "p1", "icc", "cluster_size")
    shared_keys = ("cluster_size_cv",)
    nuisance_keys = ("p1", "icc")
    ratio_keys: ClassVar[dict[str, tuple[str, str]]] = {
        "icc_ratio": ("planned_icc", "realized_icc"),
        "cluster_size_ratio": ("planned_cluster_size", "realized_cluster_size"),
    }
    extra_inputs = (
        "planned_p2",
        "realized_p2",
        "effect_measure",
        "observed_events1",
        "observed_events2",
    )

    def scenario(self, rows: pd.DataFrame, stage: str) -> Scenario:
        sc = super().scenario(rows, stage)
        if stage == "realized":
            for key in ("icc", "cluster_size"):
                planned = _column(rows, f"planned_{key}")
                sc[key] = np.where(np.isnan(sc[key]), planned, sc[key])
        cv = sc["cluster_size_cv"]
        sc["cluster_size_cv"] = np.where(np.isnan(cv), 0.0, cv)
        sc["continuity_correction"] = np.zeros(len(rows))
        return sc

    def arm_units(self, rows: pd.DataFrame, arm: str) -> np.ndarray:
        """Units of an arm: clusters times the mean cluster size (realized, else planned)."""
        size = _column(rows, "realized_cluster_size")
        size = np.where(np.isnan(size), _column(rows, "planned_cluster_size"), size)
        return _column(rows, f"realized_n{arm}") * size

    def unit_words(self) -> str:
        return "realized_n1 clusters x cluster size"

    def sources(self, stage: str) -> dict[str, str]:
        out = super().sources(stage)
        if stage == "realized":
            out["p1"] = (
                "realized_p1 (or observed_events1 / (realized_n1 x cluster size), or planned_p1)"
            )
            out["icc"] = "realized_icc (or planned_icc)"
            out["cluster_size"] = "realized_cluster_size (or planned_cluster_size)"
        return out

    def fallback_notes(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str]]:
        out = [
            (mask, text)
            for mask, text in super().fallback_notes(rows)
            if not text.startswith("continuity")
        ]
        for key, what in (("icc", "ICC"), ("cluster_size", "mean cluster size")):
            real = _column(rows, f"realized_{key}")
            plan = _column(rows, f"planned_{key}")
            out.append(
                (
                    np.isnan(real) & ~np.isnan(plan),
                    f"realized_{key} not reported: the planned {what} is used for the realized "
                    "design",
                )
            )
        return out

    def row_checks(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str, str]]:
        out = super().row_checks(rows)
        for stage in ("planned", "realized"):
            n1 = _column(rows, f"{stage}_n1")
            n2 = _column(rows, f"{stage}_n2")
            out.append(
                (
                    n1 + n2 < 3,
                    f"{stage}_n2",
                    "too few clusters: n1 + n2 - 2 must be at least 1 (t-test df; n1 and n2 "
                    "count clusters)",
                )
            )
        return out

    def count_columns(self) -> str:
        return "observed_events1/2 and the arms' units (realized_n1/2 clusters x cluster size)"

    def rate_columns(self) -> str:
        return "realized_p1/2 and the arms' units (realized_n1/2 clusters x cluster size)"

    def result_inflation(self, rows: pd.DataFrame) -> np.ndarray:
        sc = self.scenario(rows, "realized")
        with np.errstate(invalid="ignore"):
            return np.sqrt(self.design_effect(sc))

    def counted_note(self) -> str:
        return super().counted_note() + "; SE times the square root of the realized design effect"

    # -- maths ----------------------------------------------------------------------------------

    def design_effect(self, sc: Scenario) -> np.ndarray:
        return design_effect(sc["cluster_size"], sc["icc"], sc["cluster_size_cv"])

    def analysis_df(self, sc: Scenario) -> np.ndarray:
        return sc["n1"] + sc["n2"] - 2.0

    def _statistic_sizes(self, sc: Scenario) -> tuple[np.ndarray, np.ndarray]:
        # A cluster analysis' z refers to the information of n m / DE independent units.
        return self._effective(sc)

    def _effective(self, sc: Scenario) -> tuple[np.ndarray, np.ndarray]:
        with np.errstate(divide="ignore", invalid="ignore"):
            per = sc["cluster_size"] / self.design_effect(sc)
        return sc["n1"] * per, sc["n2"] * per

    def se(self, sc: Scenario, effect: np.ndarray | None = None) -> np.ndarray:
        p2 = self.intervention_rate(sc["p1"], effect)
        return wald_se(self.measure, *self._effective(sc), sc["p1"], p2)

    def power(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        return cluster_proportions_power(
            sc["n1"],
            sc["n2"],
            sc["cluster_size"],
            self.design_effect(sc),
            sc["p1"],
            self.intervention_rate(sc["p1"], effect),
            test.alpha,
            test.sides,
            test.direction,
        )

    def mde(self, sc: Scenario, test: TestSpec) -> np.ndarray:
        p1 = sc["p1"]
        de = self.design_effect(sc)
        room = np.where(test.direction > 0, 1.0 - p1, p1)
        ok = (
            np.isfinite(p1 + sc["n1"] + sc["n2"] + sc["cluster_size"] + de)
            & (sc["n1"] + sc["n2"] > 2)
            & (room > 0)
            & (test.power > test.alpha)
            & (test.power < 1)
        )
        out = np.full(len(p1), np.nan)
        if not ok.any():
            return out
        args = tuple(
            a[ok]
            for a in (
                sc["n1"],
                sc["n2"],
                sc["cluster_size"],
                de,
                p1,
                test.alpha,
                test.sides,
                test.direction,
            )
        )
        e1, e2 = self._effective(sc)
        with np.errstate(divide="ignore", invalid="ignore"):
            z = -special.ndtri(test.alpha[ok] / test.sides[ok]) + special.ndtri(test.power[ok])
            guess = z * np.sqrt(p1[ok] * (1.0 - p1[ok]) * (1.0 / e1[ok] + 1.0 / e2[ok]))
        guess = np.clip(guess, 1e-6, 0.5 * room[ok])
        magnitude = solve_increasing(
            _power_of_difference, test.power[ok], guess, lower=0.0, upper=room[ok], args=args
        )
        out[ok] = test.direction[ok] * magnitude
        if self.measure == "risk_difference":
            return out
        with np.errstate(invalid="ignore"):
            return self._measure(p1, p1 + out)

    def required_size(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        """Clusters (both arms) reaching the target power, allocation kept, arms rounded up."""
        n1 = self.first_group_size(sc, effect, test) * (1.0 - 1e-10)
        r = allocation_ratio(sc)
        with np.errstate(invalid="ignore"):
            return np.ceil(n1) + np.ceil(n1 * r * (1.0 - 1e-12))

    def first_group_size(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        """The continuous number of control clusters at which the power reaches the target, the
        allocation kept (nan where none does); :meth:`required_size` rounds it."""
        n = len(effect)
        out = np.full(n, np.nan)
        p1 = sc["p1"]
        p2 = self.intervention_rate(p1, effect)
        r = allocation_ratio(sc)
        m = sc["cluster_size"]
        de = self.design_effect(sc)
        with np.errstate(invalid="ignore"):
            ok = (
                np.isfinite(p2 + m + de)
                & (test.direction * (p2 - p1) > 0)
                & (test.power > test.alpha)
                & (test.power < 1)
            )
        if not ok.any():
            return out
        with np.errstate(divide="ignore", invalid="ignore"):
            # Individually randomized units times the design effect, in clusters.
            units = fleiss_n1(p1, p2, r, test.alpha, test.sides, test.power, 0.0)
            guess = units * de / m
        # At least one df and one cluster per arm.
        lower = np.maximum(3.0 / (1.0 + r), np.maximum(1.0, 1.0 / r))
        args = (p1, p2, r, m, de, test.alpha, test.sides, test.direction)
        out[ok] = smallest_size(
            _power_of_clusters,
            test.power[ok],
            np.where(np.isfinite(guess[ok]), np.maximum(guess[ok], lower[ok]), lower[ok]),
            lower=lower[ok],
            args=tuple(a[ok] for a in args),
        )
        return out
