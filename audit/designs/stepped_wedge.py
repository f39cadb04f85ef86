"""Cross-sectional stepped-wedge cluster trial: Hussey & Hughes' variance of the effect.

``I`` clusters are followed over ``T`` periods (``periods``); all start in the control condition
and ``S = T − 1`` sequences cross to the intervention one period after another, the clusters
spread evenly over the sequences, until all are treated in the last period. Each cluster-period
has ``m`` different individuals (``planned_cluster_size``: a cross-sectional design). With a
total SD ``σ_t`` and an intracluster correlation ``ρ``, the between-cluster variance is
``τ² = ρ σ_t²`` and the variance of a cluster-period mean ``σ² = (1 − ρ) σ_t² / m``. For the
linear mixed model with fixed period effects, Hussey & Hughes [1]_ give the variance of the
generalized least squares estimate of the effect,

``Var(θ̂) = I σ² (σ² + T τ²) / ((I U − W) σ² + (U² + I T U − T W − I V) τ²)``,

``U = Σ_ij X_ij``, ``W = Σ_j (Σ_i X_ij)²``, ``V = Σ_i (Σ_j X_ij)²`` for the treatment indicators
``X_ij``. With the clusters spread evenly (a share ``1/S`` in each sequence) these sums are
``U = I T/2``, ``W = I² (S + 1)(2S + 1)/(6S)``, ``V = I (S + 1)(2S + 1)/6``, so the variance is
``c / I`` for a constant ``c`` of the periods, ``m``, ``σ_t`` and ``ρ``. The test is the z test of
Hussey & Hughes; power, MDE and required clusters follow in closed form. Required clusters are
rounded up to a multiple of the sequences (equal sequences); a realized number that is not a
multiple is read as if the shares were equal.

References
----------
.. [1] Hussey, M. A. & Hughes, J. P. (2007). Design and analysis of stepped wedge cluster
   randomized trials. Contemporary Clinical Trials 28:182-191.
.. [2] Hemming, K., Haines, T. P., Chilton, P. J., Girling, A. J. & Lilford, R. J. (2015). The
   stepped wedge cluster randomised trial: rationale, design, analysis, and reporting. BMJ
   350:h391.
"""

from __future__ import annotations

from typing import ClassVar

import numpy as np
import pandas as pd

from audit.designs._base import Scenario, TestSpec, _column
from audit.designs._power import t_ncp_for_power
from audit.designs.means import _MeanDesign

__all__ = ["SteppedWedge", "stepped_wedge_variance"]


def stepped_wedge_variance(clusters, periods, cluster_size, sd, icc) -> np.ndarray:
    """Hussey & Hughes' variance of the effect estimate, clusters spread evenly over the
    ``periods − 1`` sequences (see the module docstring).

    Examples
    --------
    With no clustering (ICC 0) the design compares treated and control cluster-periods:

    >>> round(float(stepped_wedge_variance(12, 4, 20, 1.0, 0.0)), 10)
    0.009375
    """
    i, t, m, sd, icc = np.broadcast_arrays(
        *(np.asarray(a, dtype=float) for a in (clusters, periods, cluster_size, sd, icc))
    )
    s = t - 1.0
    with np.errstate(divide="ignore", invalid="ignore"):
        sigma2 = (1.0 - icc) * sd * sd / m
        tau2 = icc * sd * sd
        u = t / 2.0
        w = (s + 1.0) * (2.0 * s + 1.0) / (6.0 * s)
        v = (s + 1.0) * (2.0 * s + 1.0) / 6.0
        denominator = (u - w) * sigma2 + (u * u + t * u - t * w - v) * tau2
        var = sigma2 * (sigma2 + t * tau2) / (i * denominator)
    return np.where(np.isfinite(var) & (var > 0), var, np.nan)


class SteppedWedge(_MeanDesign):
    """Cross-sectional stepped wedge; ``planned_n1`` = clusters, z test (Hussey & Hughes)."""

    name = "stepped_wedge"
    family = "cluster"
    title = "cross-sectional stepped wedge (Hussey & Hughes variance, z test)"
    effect_unit = "difference in means (outcome units, or d on the total SD)"
    standardized_as = "d"
    stage_keys = ("n1", "sd", "icc", "cluster_size")
    shared_keys = ("periods", "cluster_size_cv")
    size_keys = ("n1",)
    nuisance_keys = ("sd", "icc")
    one_group = True
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
        sc["cluster_size_cv"] = np.zeros(len(rows))  # unequal sizes are rejected by row_checks
        return sc

    def sources(self, stage: str) -> dict[str, str]:
        out = super().sources(stage)
        del out["cluster_size_cv"]
        if stage == "realized":
            out["icc"] = "realized_icc (or planned_icc)"
            out["cluster_size"] = "realized_cluster_size (or planned_cluster_size)"
        return out

    def fallback_notes(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str]]:
        out = super().fallback_notes(rows)
        for key, what in (("icc", "ICC"), ("cluster_size", "cluster-period size")):
            real = _column(rows, f"realized_{key}")
            plan = _column(rows, f"planned_{key}")
            out.append(
                (
                    np.isnan(real) & ~np.isnan(plan),
                    f"realized_{key} not reported: the planned {what} is used for the realized "
                    "design",
                )
            )
        n = _column(rows, "realized_n1")
        s = _column(rows, "periods") - 1.0
        with np.errstate(invalid="ignore"):
            uneven = np.isfinite(n + s) & (np.mod(n, s) != 0)
        out.append(
            (
                uneven,
                "realized_n1 is not a multiple of the sequences (periods - 1): the variance is "
                "that of clusters spread evenly over the sequences",
            )
        )
        return out

    def row_checks(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str, str]]:
        out = []
        for stage in ("planned", "realized"):
            out.append(
                (
                    _column(rows, f"{stage}_n1") < 2,
                    f"{stage}_n1",
                    "must be at least 2 clusters",
                )
            )
        out.append(
            (
                _column(rows, "periods") == 2,
                "periods",
                "is 2: with one sequence every cluster crosses over at once, and the effect "
                "cannot be told from the change between the periods; a stepped wedge needs at "
                "least 3 periods",
            )
        )
        out.append(
            (
                _column(rows, "cluster_size_cv") > 0,
                "cluster_size_cv",
                "is above 0, but the stepped-wedge variance here (Hussey & Hughes) is for equal "
                "cluster-period sizes: leave it blank or 0, or give the analysis' standard error "
                "with the estimate design",
            )
        )
        return out

    # -- maths ----------------------------------------------------------------------------------

    def se(self, sc: Scenario, effect: np.ndarray | None = None) -> np.ndarray:
        var = stepped_wedge_variance(
            sc["n1"], sc["periods"], sc["cluster_size"], sc["sd"], sc["icc"]
        )
        return np.sqrt(var)

    def df(self, sc: Scenario) -> np.ndarray:
        return np.full(len(sc["n1"]), np.inf)

    def required_size(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        """Clusters for the target power, a multiple of the sequences: the variance is ``c / I``,
        so ``I = c (M / θ)²`` with ``M`` the normal multiplier of the target power."""
        c = stepped_wedge_variance(1.0, sc["periods"], sc["cluster_size"], sc["sd"], sc["icc"])
        multiplier = t_ncp_for_power(test.power, np.inf, test.alpha, test.sides)
        s = sc["periods"] - 1.0
        with np.errstate(divide="ignore", invalid="ignore"):
            clusters = c * (multiplier / effect) ** 2 * (1.0 - 1e-12)
            out = s * np.ceil(clusters / s)
        ok = (
            np.isfinite(out)
            & (test.direction * effect > 0)
            & (test.power > test.alpha)
            & (test.power < 1)
        )
        # At least two clusters, still a multiple of the sequences.
        return np.where(ok, np.maximum(out, s * np.ceil(2.0 / s)), np.nan)
