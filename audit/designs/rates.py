"""Two independent event rates (counts per unit of exposure): the rate ratio on the log scale.

Each unit of arm k is followed for a mean exposure ``t`` and has events at rate ``λk`` per unit of
time; counts are Poisson, or negative binomial with dispersion ``k`` (variance ``μ + kμ²``,
``μ = λ t``). The log of an arm's estimated rate then has variance ``(1/(λ t) + k) / n`` for
``n`` units [1]_ [2]_, so the log rate ratio ``θ = ln(λ2 / λ1)`` has

``SE = √((1/(λ1 t) + k) / n1 + (1/(λ2 t) + k) / n2)``,

and the test is the Wald z test on ``θ`` with this variance at the true rates (Zhu & Lakkis'
variance under the alternative, used under H0 too) [2]_. Power, MDE and required size follow
from the normal distribution; both tails of a two-sided test are counted. ``planned_rate1`` /
``realized_rate1`` are the control rates, ``planned_rate2`` the planned intervention rate, and
the effect unit is the rate ratio ``λ2 / λ1``. The realized design holds the planned rate ratio
fixed on the realized control rate.

References
----------
.. [1] Signorini, D. F. (1991). Sample size for Poisson regression. Biometrika 78:446-450.
.. [2] Zhu, H. & Lakkis, H. (2014). Sample size calculation for comparing two negative binomial
   rates. Statistics in Medicine 33:376-387.
.. [3] Keene, O. N., Jones, M. R. K., Lane, P. W. & Anderson, J. (2007). Analysis of
   exacerbation rates in asthma and chronic obstructive pulmonary disease: example from the
   TRISTAN study. Pharmaceutical Statistics 6:89-97.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from audit.designs._base import Design, NullReasons, Scenario, TestSpec, _column, allocation_ratio
from audit.designs._power import t_ncp_for_power, t_power
from audit.designs._solve import solve_increasing

__all__ = ["TwoRates", "rate_ratio_power", "rate_ratio_se"]

#: Added to both arms' events where an arm has none, before the log rate ratio is formed.
ZERO_EVENTS_CORRECTION = 0.5


def rate_ratio_se(n1, n2, rate1, rate2, exposure, dispersion) -> np.ndarray:
    """SE of the estimated log rate ratio: ``√((1/(λ1 t) + k)/n1 + (1/(λ2 t) + k)/n2)``.

    Examples
    --------
    Poisson, 100 units per arm followed for one year at 0.5 and 0.4 events a year:

    >>> round(float(rate_ratio_se(100, 100, 0.5, 0.4, 1.0, 0.0)), 6)
    0.212132
    """
    n1, n2, r1, r2, t, k = np.broadcast_arrays(
        *(np.asarray(a, dtype=float) for a in (n1, n2, rate1, rate2, exposure, dispersion))
    )
    with np.errstate(divide="ignore", invalid="ignore"):
        var = (1.0 / (r1 * t) + k) / n1 + (1.0 / (r2 * t) + k) / n2
        se = np.sqrt(var)
    return np.where(np.isfinite(se) & (se > 0), se, np.nan)


def rate_ratio_power(n1, n2, rate1, ratio, exposure, dispersion, alpha, sides, direction=1.0):
    """Power of the Wald z test of the log rate ratio at a true rate ratio ``ratio``."""
    with np.errstate(divide="ignore", invalid="ignore"):
        se = rate_ratio_se(n1, n2, rate1, np.asarray(rate1) * ratio, exposure, dispersion)
        ncp = np.asarray(direction, dtype=float) * np.log(ratio) / se
    ncp, alpha, sides = np.broadcast_arrays(ncp, np.asarray(alpha, float), np.asarray(sides, float))
    out = np.full(ncp.shape, np.nan)
    ok = np.isfinite(ncp)
    out[ok] = t_power(ncp[ok], np.inf, alpha[ok], sides[ok])
    return out


def _power_of_log_ratio(theta, n1, n2, rate1, exposure, dispersion, alpha, sides, direction):
    return rate_ratio_power(
        n1, n2, rate1, np.exp(direction * theta), exposure, dispersion, alpha, sides, direction
    )


class TwoRates(Design):
    """Rate ratio of two independent arms (Poisson or negative binomial counts)."""

    name = "two_rates"
    family = "rates"
    title = "two independent event rates (rate ratio, Poisson or negative binomial)"
    effect_unit = "rate ratio rate2 / rate1"
    standardized_as = "log RR"
    stage_keys = ("n1", "n2", "rate1")
    shared_keys = ("exposure", "dispersion")
    nuisance_keys = ("rate1",)
    extra_inputs = ("planned_rate2", "observed_events1", "observed_events2")
    # The variance depends on the rates: a fall in the rate is harder to detect than a rise of
    # the same ratio.
    symmetric = False

    is_ratio = True
    noun = "rate ratio"
    # A Wald (or score) z of the log rate ratio, or its square.
    statistic_types = frozenset({"z", "chi2"})
    statistic_rule = (
        "log rate ratio θ = z x SE(θ), the SE of the realized design at the rates θ implies "
        "(solved by fixed-point iteration)"
    )
    scale_label = "log rate ratio"

    # -- results as reported --------------------------------------------------------------------

    def effect_from_statistic(
        self, rows: pd.DataFrame, sc: Scenario, statistic: np.ndarray, df: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        """``θ`` with ``θ = z SE(θ)``: the SE of the log rate ratio depends on the intervention
        rate ``λ1 e^θ``, so the equation is iterated from the SE at no effect (it changes
        slowly with θ; 60 steps settle it to rounding wherever the SE is finite)."""
        z = np.asarray(statistic, dtype=float)
        theta = np.zeros(len(z))
        with np.errstate(all="ignore"):
            for _ in range(60):
                theta = z * self.se(sc, np.exp(theta))
            se = self.se(sc, np.exp(theta))
        ok = np.isfinite(theta) & np.isfinite(se) & (np.abs(theta - z * se) < 1e-9)
        return np.where(ok, theta, np.nan), np.where(ok, se, np.nan)

    def at_standardized(
        self, sc: Scenario, magnitude: np.ndarray, direction: np.ndarray
    ) -> tuple[Scenario, np.ndarray]:
        # The standardized unit is the log rate ratio.
        direction = np.asarray(direction, dtype=float)
        return sc, np.exp(direction * np.abs(magnitude))

    # -- reading --------------------------------------------------------------------------------

    def scenario(self, rows: pd.DataFrame, stage: str) -> Scenario:
        sc = super().scenario(rows, stage)
        sc["exposure"] = np.where(np.isnan(sc["exposure"]), 1.0, sc["exposure"])
        sc["dispersion"] = np.where(np.isnan(sc["dispersion"]), 0.0, sc["dispersion"])
        if stage == "realized":
            with np.errstate(divide="ignore", invalid="ignore"):
                counted = _column(rows, "observed_events1") / (
                    _column(rows, "realized_n1") * sc["exposure"]
                )
            counted = np.where(np.isfinite(counted) & (counted > 0), counted, np.nan)
            fallback = np.where(np.isnan(counted), _column(rows, "planned_rate1"), counted)
            sc["rate1"] = np.where(np.isnan(sc["rate1"]), fallback, sc["rate1"])
        return sc

    def sources(self, stage: str) -> dict[str, str]:
        out = super().sources(stage)
        del out["exposure"], out["dispersion"]  # blank has a meaning: 1 and Poisson
        if stage == "realized":
            out["rate1"] = "realized_rate1 (or observed_events1 / realized_n1 / exposure, or "
            out["rate1"] += "planned_rate1)"
        return out

    def planned_effect(self, rows: pd.DataFrame) -> np.ndarray:
        r1 = _column(rows, "planned_rate1")
        r2 = _column(rows, "planned_rate2")
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(np.isnan(r2), _column(rows, "planned_effect"), r2 / r1)

    def effect_sources(self) -> str:
        return "planned_rate2 (or planned_effect)"

    def orient(self, value: np.ndarray, direction: np.ndarray) -> np.ndarray:
        return self.from_analysis(direction * np.abs(self.to_analysis(value)))

    def to_analysis(self, effect: np.ndarray) -> np.ndarray:
        effect = np.asarray(effect, dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(effect > 0, np.log(np.where(effect > 0, effect, 1.0)), np.nan)

    def from_analysis(self, value: np.ndarray) -> np.ndarray:
        with np.errstate(over="ignore"):
            return np.exp(np.asarray(value, dtype=float))

    def row_checks(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str, str]]:
        out = [
            (_column(rows, c) <= 0, c, "a rate ratio must be greater than 0")
            for c in ("planned_effect", "sesoi", "observed_effect")
        ]
        out += [
            (
                _column(rows, c) <= 0,
                c,
                "the limits of a rate ratio's interval must be greater than 0 (give them on the "
                "ratio scale, not the log scale)",
            )
            for c in ("observed_ci_low", "observed_ci_high")
        ]
        out += [
            (_column(rows, c) == 0, c, "an event rate must be greater than 0")
            for c in ("planned_rate1", "planned_rate2", "realized_rate1")
        ]
        out.append((_column(rows, "exposure") == 0, "exposure", "must be greater than 0"))
        with np.errstate(divide="ignore", invalid="ignore"):
            implied = _column(rows, "planned_rate2") / _column(rows, "planned_rate1")
            given = _column(rows, "planned_effect")
            differs = np.abs(np.log(given) - np.log(implied)) > 0.005
        out.append(
            (
                differs,
                "planned_effect",
                "disagrees with planned_rate2 / planned_rate1 (the rate ratio); give one or make "
                "them agree",
            )
        )
        return out

    def fallback_notes(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str]]:
        real = _column(rows, "realized_rate1")
        plan = _column(rows, "planned_rate1")
        counted = ~np.isnan(_column(rows, "observed_events1") + _column(rows, "realized_n1"))
        effect = self.planned_effect(rows)
        known = self.scenario(rows, "realized")["rate1"]
        with np.errstate(invalid="ignore"):
            moved = ~np.isnan(effect + plan) & (np.abs(known - plan) > 1e-12 * plan)
        k = _column(rows, "dispersion")
        return [
            (
                np.isnan(_column(rows, "exposure")),
                "exposure not given: rates are read as events per unit over the whole follow-up "
                "(exposure 1)",
            ),
            (np.isnan(k) | (k == 0), "Poisson counts (no dispersion given)"),
            (
                np.isnan(real) & counted,
                "realized_rate1 not reported: the control rate of observed_events1 / realized_n1 "
                "/ exposure is used for the realized design",
            ),
            (
                np.isnan(real) & ~counted & ~np.isnan(plan),
                "realized_rate1 not reported: the planned control rate is used for the realized "
                "design",
            ),
            (
                moved,
                "the realized control rate differs from the planned one: the planned rate ratio "
                "is held fixed on it (the intervention rate moves in proportion)",
            ),
        ]

    # -- the reported result from counts ------------------------------------------------------

    def counted_result(self, rows: pd.DataFrame) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Rate ratio and SE of its log from the events per arm, the units and the exposure;
        0.5 is added to both arms' events where an arm has none."""
        sc = self.scenario(rows, "realized")
        n1, n2 = _column(rows, "realized_n1"), _column(rows, "realized_n2")
        e1, e2 = _column(rows, "observed_events1"), _column(rows, "observed_events2")
        ok = np.isfinite(e1 + e2 + n1 + n2) & (n1 > 0) & (n2 > 0)
        add = np.where(ok & ((e1 == 0) | (e2 == 0)), ZERO_EVENTS_CORRECTION, 0.0)
        k = sc["dispersion"]
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = ((e2 + add) / n2) / ((e1 + add) / n1)
            se = np.sqrt(1.0 / (e1 + add) + 1.0 / (e2 + add) + k / n1 + k / n2)
        ok &= np.isfinite(ratio) & np.isfinite(se)
        return np.where(ok, ratio, np.nan), np.where(ok, se, np.nan), np.where(ok, 1, 0)

    def count_columns(self) -> str:
        return "observed_events1/2, realized_n1/2 and exposure"

    def rate_columns(self) -> str:
        return self.count_columns()

    def partial_counts(self, rows: pd.DataFrame) -> np.ndarray:
        return np.isfinite(_column(rows, "observed_events1")) | np.isfinite(
            _column(rows, "observed_events2")
        )

    def counted_note(self) -> str:
        return (
            "ratio of the events per unit, SE of the log rate ratio √(1/e1 + 1/e2 + k/n1 + "
            "k/n2) with the row's dispersion k; 0.5 added to both arms' events where an arm has "
            "none"
        )

    # -- maths ----------------------------------------------------------------------------------

    def _args(self, sc: Scenario) -> tuple[np.ndarray, ...]:
        return (sc["n1"], sc["n2"], sc["rate1"], sc["exposure"], sc["dispersion"])

    def se(self, sc: Scenario, effect: np.ndarray | None = None) -> np.ndarray:
        with np.errstate(invalid="ignore"):
            rate2 = sc["rate1"] * effect
        return rate_ratio_se(
            sc["n1"], sc["n2"], sc["rate1"], rate2, sc["exposure"], sc["dispersion"]
        )

    def power(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        return rate_ratio_power(
            *self._args(sc)[:3],
            effect,
            *self._args(sc)[3:],
            test.alpha,
            test.sides,
            test.direction,
        )

    def mde(self, sc: Scenario, test: TestSpec) -> np.ndarray:
        """Rate ratio detectable with the realized design, in the planned direction (solved on
        the log scale: the SE depends on the intervention rate)."""
        n = len(sc["n1"])
        out = np.full(n, np.nan)
        args = self._args(sc)
        ok = np.isfinite(sum(args)) & (test.power > test.alpha) & (test.power < 1)
        if not ok.any():
            return out
        multiplier = t_ncp_for_power(test.power, np.inf, test.alpha, test.sides)
        with np.errstate(invalid="ignore"):
            guess = multiplier * rate_ratio_se(*args[:3], args[2], *args[3:])
        sub = (*(a[ok] for a in args), test.alpha[ok], test.sides[ok], test.direction[ok])
        theta = solve_increasing(
            _power_of_log_ratio, test.power[ok], guess[ok], lower=0.0, upper=50.0, args=sub
        )
        out[ok] = self.from_analysis(test.direction[ok] * theta)
        return out

    def standardize(self, sc: Scenario, effect: np.ndarray) -> np.ndarray:
        return self.to_analysis(effect)

    def required_size(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        """Units (both arms) for the target power, allocation kept, each arm rounded up.

        Closed form: with ``r = n2 / n1`` the variance is ``v / n1``,
        ``v = (1/(λ1 t) + k) + (1/(λ2 t) + k) / r``, so ``n1 = v (M / θ)²`` with ``M`` the normal
        multiplier of the target power (both tails of a two-sided test counted).
        """
        r = allocation_ratio(sc)
        multiplier = t_ncp_for_power(test.power, np.inf, test.alpha, test.sides)
        t, k, r1 = sc["exposure"], sc["dispersion"], sc["rate1"]
        with np.errstate(divide="ignore", invalid="ignore"):
            theta = self.to_analysis(effect)
            v = (1.0 / (r1 * t) + k) + (1.0 / (r1 * effect * t) + k) / r
            n1 = v * (multiplier / theta) ** 2 * (1.0 - 1e-12)
            total = np.ceil(n1) + np.ceil(n1 * r * (1.0 - 1e-12))
        ok = (
            np.isfinite(total)
            & (test.direction * theta > 0)
            & (test.power > test.alpha)
            & (test.power < 1)
        )
        return np.where(ok, total, np.nan)

    def null_explanations(
        self,
        rows: pd.DataFrame,
        plan: Scenario,
        real: Scenario,
        effect: np.ndarray,
        test: TestSpec,
    ) -> dict[str, NullReasons]:
        no_effect = (effect == 1.0, "the planned rate ratio is 1, so no size suffices")
        no_mde = (
            test.power > test.alpha,
            "no rate ratio in the direction used (with no direction: on one of the two sides) "
            "reaches the target power: below 1, the Wald test of the log rate ratio loses power "
            "again as the intervention arm's expected events vanish",
        )
        return {
            "mde": NullReasons(conditions=(no_mde,)),
            "mde_std": NullReasons(conditions=(no_mde,)),
            "n_required_plan": NullReasons(conditions=(no_effect,)),
            "plan_discrepancy": NullReasons(conditions=(no_effect,)),
            "n_required_realized": NullReasons(conditions=(no_effect,)),
        }
