"""Cluster-randomized comparison of two means: clusters per arm, variance inflated by the design
effect.

With ``m`` the mean cluster size, ``cv`` the coefficient of variation of cluster sizes and
``ICC`` the intracluster correlation, the variance of an arm mean is that of ``n·m`` independent
units multiplied by the design effect ``1 + ((cv² + 1)·m − 1)·ICC`` [1]_ [2]_ (Kish's
``1 + (m − 1)·ICC`` when all clusters have the same size). The analysis is a t test on the
cluster-level comparison with ``J − 2`` degrees of freedom, J the number of clusters [3]_.

``planned_n1`` / ``planned_n2`` (and the realized ones) count *clusters*; required sizes are
clusters too. SDs are total SDs (between plus within clusters), so the standardized effect is
``d`` on the total SD.

References
----------
.. [1] Kish, L. (1965). Survey Sampling. Wiley, section 5.4.
.. [2] Eldridge, S. M., Ashby, D. & Kerry, S. (2006). Sample size for cluster randomized trials:
   effect of coefficient of variation of cluster size and analysis method. Int. J. Epidemiol.
   35:1292-1300.
.. [3] Bloom, H. S. (2005). Randomizing groups to evaluate place-based programs. In Learning
   More from Social Experiments, Russell Sage Foundation, ch. 4.
"""

from __future__ import annotations

from typing import ClassVar

import numpy as np
import pandas as pd

from audit.designs._base import Scenario, _column
from audit.designs.means import _TwoGroups

__all__ = ["ClusterTwoMeans", "design_effect"]


def design_effect(m: np.ndarray, icc: np.ndarray, cv: np.ndarray = 0.0) -> np.ndarray:
    """Variance inflation of a cluster sample: ``1 + ((cv² + 1)·m − 1)·ICC``.

    Parameters
    ----------
    m : array_like
        Mean cluster size (>= 1).
    icc : array_like
        Intracluster correlation, in [0, 1).
    cv : array_like
        Coefficient of variation of the cluster sizes (0: equal sizes, Kish's formula).

    Examples
    --------
    Kish's design effect for clusters of 20 at ICC 0.05:

    >>> round(float(design_effect(20, 0.05)), 10)
    1.95
    """
    m, icc, cv = (np.asarray(a, dtype=float) for a in (m, icc, cv))
    return 1.0 + ((cv * cv + 1.0) * m - 1.0) * icc


class ClusterTwoMeans(_TwoGroups):
    """Two arms of clusters compared on a mean (t test on J − 2 df, design-effect variance).

    ``se = sd · sqrt(DE) · sqrt(1/(n1·m) + 1/(n2·m))`` with n1, n2 clusters of mean size m.
    Blank realized ICC, cluster size and SD fall back on the planned values (with a note); the
    ICC and SD are the nuisance parameters replaced for ``n_required_realized``, while a
    smaller realized cluster size counts as missing units (attrition).
    """

    margin_tests = True
    name = "cluster_two_means"
    family = "cluster"
    title = "two arms of clusters, difference in means (t test on cluster df)"
    effect_unit = "difference in means (outcome units, or d on the total SD)"
    standardized_as = "d"
    stage_keys = ("n1", "n2", "sd", "icc", "cluster_size")
    shared_keys = ("cluster_size_cv",)
    nuisance_keys = ("sd", "icc")
    ratio_keys: ClassVar[dict[str, tuple[str, str]]] = {
        "sd_ratio": ("planned_sd", "realized_sd"),
        "icc_ratio": ("planned_icc", "realized_icc"),
        "cluster_size_ratio": ("planned_cluster_size", "realized_cluster_size"),
    }

    def scenario(self, rows: pd.DataFrame, stage: str) -> Scenario:
        sc = super().scenario(rows, stage)
        if stage == "realized":
            for key in ("icc", "cluster_size"):
                planned = _column(rows, f"planned_{key}")
                sc[key] = np.where(np.isnan(sc[key]), planned, sc[key])
        cv = sc["cluster_size_cv"]
        sc["cluster_size_cv"] = np.where(np.isnan(cv), 0.0, cv)
        return sc

    def sources(self, stage: str) -> dict[str, str]:
        out = super().sources(stage)
        if stage == "realized":
            out["icc"] = "realized_icc (or planned_icc)"
            out["cluster_size"] = "realized_cluster_size (or planned_cluster_size)"
        return out

    def fallback_notes(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str]]:
        out = super().fallback_notes(rows)
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
        out = []
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

    def design_effect(self, sc: Scenario) -> np.ndarray:
        return design_effect(sc["cluster_size"], sc["icc"], sc["cluster_size_cv"])

    def se(self, sc: Scenario, effect: np.ndarray | None = None) -> np.ndarray:
        with np.errstate(divide="ignore", invalid="ignore"):
            m = sc["cluster_size"]
            per_unit = 1.0 / (sc["n1"] * m) + 1.0 / (sc["n2"] * m)
            return sc["sd"] * np.sqrt(self.design_effect(sc) * per_unit)

    def df(self, sc: Scenario) -> np.ndarray:
        return sc["n1"] + sc["n2"] - 2.0

    def df_spent(self, sc: Scenario) -> np.ndarray:
        return np.full(len(sc["n1"]), 2.0)
