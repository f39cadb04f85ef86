"""A Pearson correlation tested against zero through Fisher's z transformation.

``z = atanh(r)`` is approximately normal with standard error ``1 / sqrt(n - 3)`` [1]_, so power,
MDE and required size follow from the normal test on ``atanh(r) * sqrt(n - 3)``; the required
size has a closed form.

Convention: sizes are rounded up, so r = .30 (alpha .05 two-sided, power .80) needs 85, the
value of the Fisher-z formula (84.93 before rounding). Cohen's printed table [2]_ shows 84 for
this cell (from memory): it rounds to the nearest unit and uses a slightly different
approximation, so his table can differ from ours by one or two at small n.

References
----------
.. [1] Fisher, R. A. (1921). On the "probable error" of a coefficient of correlation deduced
   from a small sample. Metron 1:3-32.
.. [2] Cohen, J. (1988). Statistical Power Analysis for the Behavioral Sciences, 2nd ed., ch. 3.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from audit.designs._base import Design, Scenario, TestSpec, _column
from audit.designs._power import t_ncp_for_power, t_power

__all__ = ["Correlation"]


class Correlation(Design):
    """Pearson r against zero, Fisher z test; ``n`` (``planned_n1``) counts pairs of values.

    The analysis scale is Fisher's z (:meth:`to_analysis`), where ``se = 1 / sqrt(n - 3)``.

    Examples
    --------
    r = .30, alpha .05 two-sided, power .80:

    >>> spec = TestSpec(*(np.array([v]) for v in (0.05, 2.0, 0.8, 1.0)))
    >>> Correlation().required_size({"n1": np.array([np.nan])}, np.array([0.3]), spec)
    array([85.])
    """

    name = "correlation"
    family = "correlation"
    title = "Pearson correlation against zero (Fisher z test)"
    effect_unit = "Pearson r"
    standardized_as = "r"
    stage_keys = ("n1",)
    size_keys = ("n1",)
    one_group = True
    statistic_types = frozenset({"t", "z", "f", "r"})
    se_from_sizes = True
    statistic_rule = "r = t / sqrt(t^2 + df) for a t; atanh r = z / sqrt(n - 3) for a z"
    scale_label = "Fisher z"

    def effect_from_statistic(
        self, rows: pd.DataFrame, sc: Scenario, statistic: np.ndarray, df: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        """Fisher's z of r from the t test of r (``r = t / sqrt(t^2 + df)``, exact) or from the
        z test on Fisher's scale (``atanh r = z / sqrt(n - 3)``); SE ``1 / sqrt(n - 3)``."""
        se = self.se(sc)
        t = np.asarray(statistic, dtype=float)
        df = np.broadcast_to(np.asarray(df, dtype=float), t.shape)
        with np.errstate(divide="ignore", invalid="ignore"):
            from_t = np.arctanh(t / np.sqrt(t * t + df))
            effect = np.where(np.isfinite(df), from_t, t * se)
        return effect, se

    def at_standardized(
        self, sc: Scenario, magnitude: np.ndarray, direction: np.ndarray
    ) -> tuple[Scenario, np.ndarray]:
        direction = np.asarray(direction, dtype=float)
        return sc, direction * np.abs(magnitude)

    def to_analysis(self, effect: np.ndarray) -> np.ndarray:
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.arctanh(np.asarray(effect, dtype=float))

    def from_analysis(self, value: np.ndarray) -> np.ndarray:
        return np.tanh(np.asarray(value, dtype=float))

    def row_checks(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str, str]]:
        out = [
            (
                np.abs(_column(rows, column)) >= 1,
                column,
                "a correlation must lie strictly between -1 and 1",
            )
            for column in self.effect_columns
        ]
        for stage in ("planned", "realized"):
            out.append(
                (
                    _column(rows, f"{stage}_n1") < 4,
                    f"{stage}_n1",
                    "must be at least 4 (Fisher's z needs n - 3 > 0)",
                )
            )
        return out

    def se(self, sc: Scenario, effect: np.ndarray | None = None) -> np.ndarray:
        """``1 / sqrt(n - 3)`` on Fisher's z scale."""
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(sc["n1"] > 3, 1.0 / np.sqrt(sc["n1"] - 3.0), np.nan)

    def power(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        with np.errstate(divide="ignore", invalid="ignore"):
            ncp = test.direction * self.to_analysis(effect) / self.se(sc)
        out = np.full(ncp.shape, np.nan)
        ok = np.isfinite(ncp)
        out[ok] = t_power(ncp[ok], np.inf, test.alpha[ok], test.sides[ok])
        return out

    def _multiplier(self, test: TestSpec) -> np.ndarray:
        return t_ncp_for_power(test.power, np.inf, test.alpha, test.sides)

    def mde(self, sc: Scenario, test: TestSpec) -> np.ndarray:
        return self.from_analysis(test.direction * self._multiplier(test) * self.se(sc))

    def standardize(self, sc: Scenario, effect: np.ndarray) -> np.ndarray:
        return np.asarray(effect, dtype=float)

    def required_size(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        """``ceil((M / atanh r)² + 3)`` with ``M`` the normal multiplier for the target power."""
        with np.errstate(divide="ignore", invalid="ignore"):
            z = test.direction * self.to_analysis(effect)
            n = (self._multiplier(test) / z) ** 2 + 3.0
        # Guard against rounding noise at exact integers (85.0000000001 -> 85).
        return np.where((z > 0) & np.isfinite(n), np.ceil(n * (1.0 - 1e-12)), np.nan)
