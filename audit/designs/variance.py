"""Designs tested with an F test: a one-way comparison of k means, and regression predictors.

Both use the noncentral F distribution with noncentrality ``lambda = f² N`` (N the total sample
size): ``k_means`` on (k − 1, N − k) degrees of freedom with Cohen's f, and ``regression`` on
(u, N − u − q − 1) with Cohen's f² of the u tested predictors, q further covariates in the
model. ``f² N`` is the noncentrality of the fixed-effects model when f² is the population
``R²_change / (1 − R²_full)``. Cohen [1]_ writes ``lambda = f² (u + v + 1)`` with v the error df:
for k means and for predictors without covariates that is ``f² N`` as here; with q covariates
it is ``f² (N − q)``, a little smaller (for N = 120, q = 3, f² = 0.09: 10.53 against 10.80),
so his tables give a little less power than this design when covariates are partialled out.
We keep ``f² N`` for all rows, so that adding covariates changes only the error df.

An omnibus F test has no single estimate with a standard error and no direction: the SE-based
metrics are declared not applicable and effects are magnitudes (``direction`` is always +1).
The F test rejects in its upper tail only, at level alpha: ``sides`` is not used, and a row that
says 1 gets a note rather than an error (writing "one-sided" for an F test is common and harmless).

References
----------
.. [1] Cohen, J. (1988). Statistical Power Analysis for the Behavioral Sciences, 2nd ed.,
   ch. 8 (F tests on means, f) and ch. 9 (multiple regression, f²).
"""

from __future__ import annotations

from typing import ClassVar

import numpy as np
import pandas as pd
from scipy import special

from audit.designs._base import Design, Scenario, TestSpec, _column
from audit.designs._power import f_lambda_for_power, f_power
from audit.designs._solve import smallest_size, unique_rows

__all__ = ["KMeans", "Regression"]

_NO_SE = "an omnibus F test has no single estimate with a standard error"


def _power_of_total(
    total: np.ndarray, f2: np.ndarray, dfn: np.ndarray, spent: np.ndarray, alpha: np.ndarray
) -> np.ndarray:
    """F-test power at total size ``total``: lambda = f² N, df = (dfn, N − spent)."""
    return f_power(f2 * total, dfn, total - spent, alpha)


class _FDesign(Design):
    """Shared maths: subclasses give ``f2`` (effect -> f²), ``dfn`` and ``spent`` (N − dfd)."""

    size_keys = ("n1",)
    has_direction = False
    one_group = True
    # Only the p-value of a reported statistic is used (an omnibus test has no signed effect).
    statistic_types = frozenset({"f", "chi2", "t", "z"})
    not_applicable: ClassVar[dict[str, str]] = {
        "direction_used": "an F test has no direction (effects are magnitudes)",
        "se_plan": _NO_SE,
        "se_realized": _NO_SE,
        "precision_ratio": _NO_SE,
        "power_at_pooled_effect": "an omnibus F test has no signed effect to pool",
    }

    def f2(self, effect: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def from_f2(self, f2: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def dfn(self, sc: Scenario) -> np.ndarray:
        raise NotImplementedError

    def spent(self, sc: Scenario) -> np.ndarray:
        """Total size minus the denominator df (k for k means, u + q + 1 for regression)."""
        raise NotImplementedError

    def effect_sign(self, effect: np.ndarray) -> np.ndarray:
        return np.ones(np.shape(effect))

    def fallback_notes(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str]]:
        return [
            (
                _column(rows, "sides") == 1,
                "sides = 1 not used: the F test rejects in its upper tail only, at level alpha",
            )
        ]

    def row_checks(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str, str]]:
        out = [
            (_column(rows, c) < 0, c, f"must be >= 0 ({self.standardized_as} is a magnitude)")
            for c in self.effect_columns
        ]
        return out

    def se(self, sc: Scenario, effect: np.ndarray | None = None) -> np.ndarray:
        return np.full(len(sc["n1"]), np.nan)

    def power(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        dfn = self.dfn(sc)
        dfd = sc["n1"] - self.spent(sc)
        lam = self.f2(effect) * sc["n1"]
        ok = np.isfinite(lam) & (lam >= 0) & (dfn > 0) & (dfd > 0)
        out = np.full(len(lam), np.nan)
        out[ok] = f_power(lam[ok], dfn[ok], dfd[ok], test.alpha[ok])
        return out

    def mde(self, sc: Scenario, test: TestSpec) -> np.ndarray:
        """The effect whose noncentrality ``f² N`` gives the target power at the realized N."""
        dfn = self.dfn(sc)
        dfd = sc["n1"] - self.spent(sc)
        lam = f_lambda_for_power(test.power, dfn, dfd, test.alpha)
        with np.errstate(invalid="ignore"):
            return self.from_f2(lam / sc["n1"])

    def standardize(self, sc: Scenario, effect: np.ndarray) -> np.ndarray:
        return np.asarray(effect, dtype=float)

    def at_standardized(
        self, sc: Scenario, magnitude: np.ndarray, direction: np.ndarray
    ) -> tuple[Scenario, np.ndarray]:
        # The standardized unit is the effect unit (f, or f^2); effects are magnitudes.
        return sc, np.broadcast_to(np.abs(magnitude), np.shape(direction)).astype(float)

    def round_total(self, sc: Scenario, total: np.ndarray) -> np.ndarray:
        return np.ceil(total)

    def required_size(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        """Smallest total N reaching the target power (continuous, then :meth:`round_total`)."""
        total = self.continuous_total(sc, effect, test)
        out = np.full(len(effect), np.nan)
        ok = np.isfinite(total)
        sub = {k: v[ok] for k, v in sc.items()}
        out[ok] = self.round_total(sub, total[ok] * (1.0 - 1e-10))
        return out

    def continuous_total(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        """The continuous total N at which the F test reaches the target power (nan where none
        does); :meth:`required_size` rounds it."""
        n = len(effect)
        out = np.full(n, np.nan)
        f2 = self.f2(effect)
        dfn = self.dfn(sc)
        spent = self.spent(sc)
        ok = (
            np.isfinite(f2)
            & (f2 > 0)
            & np.isfinite(dfn)
            & np.isfinite(spent)
            & (test.power > test.alpha)
            & (test.power < 1)
        )
        if not ok.any():
            return out
        # Portfolios repeat settings; solve once per distinct combination.
        (f2u, dfnu, spentu, alphau, poweru), inverse = unique_rows(
            f2[ok], dfn[ok], spent[ok], test.alpha[ok], test.power[ok]
        )
        # Start from the large-sample limit: dfn * F tends to a noncentral chi-square, whose
        # noncentrality for the target power has a direct inverse. Finite error df need a
        # slightly larger N (about 2 % at N = 150), which the bracket search covers.
        critical = special.chdtri(dfnu, alphau)
        guess = special.chndtrinc(critical, dfnu, 1.0 - poweru) / f2u
        # At least one denominator df (N > spent), and a power still below target there.
        lower = spentu + 1.0
        total = smallest_size(
            _power_of_total, poweru, guess, lower=lower, args=(f2u, dfnu, spentu, alphau)
        )
        out[ok] = total[inverse]
        return out


class KMeans(_FDesign):
    """One-way comparison of k means (F test), Cohen's f; ``planned_n1`` is the total N.

    Power at ``f`` is ``P(F' > F_crit)`` with ``F' ~ F(k − 1, N − k, f² N)``. Required sizes
    assume equal groups: ``N = k · ceil(N*/k)`` from the continuous solution ``N*``.

    Examples
    --------
    f = 0.25 with 3 groups, alpha .05, power .80: N* = 157.2, so 3 groups of 53:

    >>> spec = TestSpec(*(np.array([v]) for v in (0.05, 2.0, 0.8, 1.0)))
    >>> sc = {"n1": np.array([np.nan]), "groups": np.array([3.0])}
    >>> KMeans().required_size(sc, np.array([0.25]), spec)
    array([159.])
    """

    name = "k_means"
    family = "variance"
    title = "k independent means (one-way F test)"
    effect_unit = "Cohen's f"
    standardized_as = "f"
    stage_keys = ("n1",)
    shared_keys = ("groups",)

    def f2(self, effect: np.ndarray) -> np.ndarray:
        return np.asarray(effect, dtype=float) ** 2

    def from_f2(self, f2: np.ndarray) -> np.ndarray:
        return np.sqrt(f2)

    def dfn(self, sc: Scenario) -> np.ndarray:
        return sc["groups"] - 1.0

    def spent(self, sc: Scenario) -> np.ndarray:
        return sc["groups"]

    def round_total(self, sc: Scenario, total: np.ndarray) -> np.ndarray:
        k = sc["groups"]
        return k * np.ceil(total / k)

    def row_checks(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str, str]]:
        k = _column(rows, "groups")
        out = super().row_checks(rows)
        for stage in ("planned", "realized"):
            out.append(
                (
                    _column(rows, f"{stage}_n1") <= k,
                    f"{stage}_n1",
                    "the total N must exceed the number of groups (N - k error df)",
                )
            )
        return out


class Regression(_FDesign):
    """F test of u predictors in a linear regression with q further covariates, Cohen's f².

    ``f²`` is the effect of the tested predictors net of the covariates (Cohen's
    ``R²_change / (1 − R²_full)``); power at ``f²`` is ``P(F' > F_crit)`` with
    ``F' ~ F(u, N − u − q − 1, f² N)``. ``covariate_r2`` is therefore not used.
    """

    name = "regression"
    family = "variance"
    title = "predictors in a linear regression (F test on R² change)"
    effect_unit = "Cohen's f²"
    standardized_as = "f2"
    stage_keys = ("n1",)
    shared_keys = ("predictors", "covariates")
    # Read only to say, in a note, that f² is already net of the covariates.
    extra_inputs = ("covariate_r2",)

    def scenario(self, rows: pd.DataFrame, stage: str) -> Scenario:
        sc = super().scenario(rows, stage)
        sc["covariates"] = np.where(np.isnan(sc["covariates"]), 0.0, sc["covariates"])
        return sc

    def f2(self, effect: np.ndarray) -> np.ndarray:
        return np.asarray(effect, dtype=float)

    def from_f2(self, f2: np.ndarray) -> np.ndarray:
        return np.asarray(f2, dtype=float)

    def dfn(self, sc: Scenario) -> np.ndarray:
        return sc["predictors"]

    def spent(self, sc: Scenario) -> np.ndarray:
        return sc["predictors"] + sc["covariates"] + 1.0

    def row_checks(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str, str]]:
        u = _column(rows, "predictors")
        q = np.nan_to_num(_column(rows, "covariates"))
        out = super().row_checks(rows)
        for stage in ("planned", "realized"):
            out.append(
                (
                    _column(rows, f"{stage}_n1") < u + q + 2,
                    f"{stage}_n1",
                    "too small: N - predictors - covariates - 1 must be at least 1 (error df)",
                )
            )
        return out

    def fallback_notes(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str]]:
        return [
            *super().fallback_notes(rows),
            (
                ~np.isnan(_column(rows, "covariate_r2")),
                "covariate_r2 not used for regression: f² of the tested predictors is already "
                "net of the covariates",
            ),
        ]
