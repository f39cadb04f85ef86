"""Time-to-event comparison of two groups by the hazard ratio (log-rank / Cox test).

Schoenfeld [1]_: with D events and a share p of patients allocated to group 1, the log hazard
ratio is estimated with variance ``1 / (D·p·(1 − p))``, and the test is a z test on that scale.
Power therefore depends on the number of events, not on the number of patients; patients enter
only through the allocation share and, for required sizes, through the share of patients who
have an event.

Sizes: ``planned_n1`` / ``planned_n2`` count patients (allocation p = n1 / (n1 + n2), 1:1 when
blank) and ``planned_events`` / ``realized_events`` count events. ``events_required_plan`` is
the Schoenfeld number of events; ``n_required_plan`` turns it into patients through the planned
event share (planned events / planned patients), each group rounded up.

References
----------
.. [1] Schoenfeld, D. A. (1983). Sample-size formula for the proportional-hazards regression
   model. Biometrics 39:499-503.
"""

from __future__ import annotations

from typing import ClassVar

import numpy as np
import pandas as pd

from audit.designs._base import Design, NullReasons, Scenario, TestSpec, _column
from audit.designs._power import t_ncp_for_power, t_power

__all__ = ["Survival", "schoenfeld_events"]


def schoenfeld_events(
    hazard_ratio: np.ndarray,
    share: np.ndarray,
    alpha: np.ndarray,
    sides: np.ndarray,
    power: np.ndarray,
) -> np.ndarray:
    """Continuous number of events for the target power: ``(M / ln HR)² / (p (1 − p))``.

    ``M`` is the normal multiplier that gives the target power (``z(1 − alpha/sides) + z(power)``
    up to the far tail of a two-sided test, which is counted); round up for a count.

    Examples
    --------
    Schoenfeld (1983): 1:1, alpha .05 two-sided, power .80, HR 0.75 needs 380 events:

    >>> int(np.ceil(schoenfeld_events(0.75, 0.5, 0.05, 2, 0.8)))
    380
    """
    hazard_ratio, share, alpha, sides, power = np.broadcast_arrays(
        *(np.asarray(a, dtype=float) for a in (hazard_ratio, share, alpha, sides, power))
    )
    multiplier = t_ncp_for_power(power, np.inf, alpha, sides)
    with np.errstate(divide="ignore", invalid="ignore"):
        log_hr = np.log(hazard_ratio)
        return (multiplier / log_hr) ** 2 / (share * (1.0 - share))


class Survival(Design):
    """Hazard ratio between two groups, Schoenfeld's variance for the log hazard ratio.

    The analysis scale is the log hazard ratio (:meth:`to_analysis`); the planned direction is
    that of ``ln HR`` (benefit when HR < 1), and the SESOI and MDE are hazard ratios pointing the
    same way (a SESOI of 0.8 or 1.25 means the same magnitude). For ``n_required_realized`` the
    nuisance parameter is the share of patients with an event: the planned patients with the
    realized event share give the events the plan would have had.
    """

    margin_tests = True
    name = "survival"
    family = "survival"
    title = "two groups, time to event (hazard ratio, Schoenfeld)"
    effect_unit = "hazard ratio"
    standardized_as = "log HR"
    stage_keys = ("n1", "n2", "events")
    size_keys = ("n1", "n2")
    ratio_keys: ClassVar[dict[str, tuple[str, str]]] = {
        "events_ratio": ("planned_events", "realized_events"),
    }
    # A Cox model's Wald z or a log-rank z (chi2 on 1 df is its square).
    statistic_types = frozenset({"z", "chi2"})
    statistic_rule = "log HR = z x Schoenfeld's SE 1 / sqrt(D p (1 - p)) at the realized events"
    scale_label = "log hazard ratio"

    def effect_from_statistic(
        self, rows: pd.DataFrame, sc: Scenario, statistic: np.ndarray, df: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        return self._statistic_times_se(sc, statistic)

    def at_standardized(
        self, sc: Scenario, magnitude: np.ndarray, direction: np.ndarray
    ) -> tuple[Scenario, np.ndarray]:
        # The standardized unit is the log hazard ratio.
        direction = np.asarray(direction, dtype=float)
        return sc, np.exp(direction * np.abs(magnitude))

    is_ratio = True
    noun = "hazard ratio"

    # -- reading --------------------------------------------------------------------------------

    def sources(self, stage: str) -> dict[str, str]:
        # Only the events are needed for power; patient counts are named where they matter
        # (see null_explanations), so a blank allocation is not blamed for a null power.
        return {"events": f"{stage}_events"}

    def orient(self, value: np.ndarray, direction: np.ndarray) -> np.ndarray:
        return self.from_analysis(direction * np.abs(self.to_analysis(value)))

    def to_analysis(self, effect: np.ndarray) -> np.ndarray:
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.log(np.asarray(effect, dtype=float))

    def from_analysis(self, value: np.ndarray) -> np.ndarray:
        return np.exp(np.asarray(value, dtype=float))

    def row_checks(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str, str]]:
        out = [
            (_column(rows, c) <= 0, c, "a hazard ratio must be greater than 0")
            for c in self.effect_columns
        ]
        for stage in ("planned", "realized"):
            total = _column(rows, f"{stage}_n1") + _column(rows, f"{stage}_n2")
            out.append(
                (
                    _column(rows, f"{stage}_events") > total,
                    f"{stage}_events",
                    f"cannot exceed the number of patients ({stage}_n1 + {stage}_n2)",
                )
            )
        return out

    def fallback_notes(self, rows: pd.DataFrame) -> list[tuple[np.ndarray, str]]:
        out = []
        for stage in ("planned", "realized"):
            blank = np.isnan(_column(rows, f"{stage}_n1") + _column(rows, f"{stage}_n2"))
            events = ~np.isnan(_column(rows, f"{stage}_events"))
            text = f"{stage}_n1/{stage}_n2 not both given: 1:1 allocation assumed for the events"
            if stage == "realized":
                text += " (or the planned allocation)"
            out.append((blank & events, text))
        return out

    # -- maths ----------------------------------------------------------------------------------

    def _share(self, sc: Scenario) -> np.ndarray:
        """Allocation share p of group 1 (1:1 when the patient counts are not both given)."""
        with np.errstate(divide="ignore", invalid="ignore"):
            p = sc["n1"] / (sc["n1"] + sc["n2"])
        return np.where(np.isfinite(p) & (p > 0) & (p < 1), p, 0.5)

    def scenario(self, rows: pd.DataFrame, stage: str) -> Scenario:
        sc = super().scenario(rows, stage)
        share = self._share(sc)
        if stage == "realized":
            # A realized allocation not reported is taken as planned.
            planned = self._share(self.scenario(rows, "planned"))
            given = np.isfinite(sc["n1"] + sc["n2"])
            share = np.where(given, share, planned)
        sc["share"] = share
        return sc

    def total_size(self, sc: Scenario) -> np.ndarray:
        return sc["n1"] + sc["n2"]

    def se(self, sc: Scenario, effect: np.ndarray | None = None) -> np.ndarray:
        """Schoenfeld's SE of the log hazard ratio, ``1 / sqrt(D p (1 − p))``."""
        p = sc["share"]
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(sc["events"] > 0, 1.0 / np.sqrt(sc["events"] * p * (1.0 - p)), np.nan)

    def power(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        with np.errstate(divide="ignore", invalid="ignore"):
            ncp = test.direction * self.to_analysis(effect) / self.se(sc)
        out = np.full(ncp.shape, np.nan)
        ok = np.isfinite(ncp)
        out[ok] = t_power(ncp[ok], np.inf, test.alpha[ok], test.sides[ok])
        return out

    def mde(self, sc: Scenario, test: TestSpec) -> np.ndarray:
        """Hazard ratio detectable with the realized events, in the planned direction."""
        multiplier = t_ncp_for_power(test.power, np.inf, test.alpha, test.sides)
        return self.from_analysis(test.direction * multiplier * self.se(sc))

    def standardize(self, sc: Scenario, effect: np.ndarray) -> np.ndarray:
        return self.to_analysis(effect)

    def events_required(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        """Schoenfeld's events for the target power at the allocation of ``sc``, rounded up."""
        d = schoenfeld_events(effect, sc["share"], test.alpha, test.sides, test.power)
        # Guard against rounding noise at exact integers.
        return np.where(np.isfinite(d) & (d > 0), np.ceil(d * (1.0 - 1e-12)), np.nan)

    def required_size(self, sc: Scenario, effect: np.ndarray, test: TestSpec) -> np.ndarray:
        """Patients for the required events, through the event share of ``sc``.

        ``N = events_required / (events / patients)``, split by the allocation share and each
        group rounded up; nan when the scenario lacks patient counts or events.
        """
        events = self.events_required(sc, effect, test)
        with np.errstate(divide="ignore", invalid="ignore"):
            event_share = sc["events"] / (sc["n1"] + sc["n2"])
            total = events / event_share
            p = sc["share"]
            out = np.ceil(total * p * (1.0 - 1e-12)) + np.ceil(total * (1.0 - p) * (1.0 - 1e-12))
        return np.where(np.isfinite(out) & (event_share > 0), out, np.nan)

    def replanned(self, plan: Scenario, real: Scenario) -> Scenario:
        """Planned patients and allocation with the realized event share: the events the plan
        would have had at the event rate actually observed."""
        with np.errstate(divide="ignore", invalid="ignore"):
            real_event_share = real["events"] / (real["n1"] + real["n2"])
        return {**plan, "events": (plan["n1"] + plan["n2"]) * real_event_share}

    def extra_metrics(
        self, plan: Scenario, real: Scenario, effect: np.ndarray, test: TestSpec
    ) -> dict[str, np.ndarray]:
        return {"events_required_plan": self.events_required(plan, effect, test)}

    def null_explanations(
        self,
        rows: pd.DataFrame,
        plan: Scenario,
        real: Scenario,
        effect: np.ndarray,
        test: TestSpec,
    ) -> dict[str, NullReasons]:
        def blank(stage: str, *keys: str) -> tuple[tuple[np.ndarray, str], ...]:
            return tuple((np.isnan(_column(rows, f"{stage}_{k}")), f"{stage}_{k}") for k in keys)

        effect_blank = (np.isnan(effect), "planned_effect")
        no_effect = (
            effect == 1.0,
            "the planned hazard ratio is 1, so no number of events suffices",
        )
        weak = (test.power <= test.alpha, "the target power does not exceed alpha")
        plan_patients = blank("planned", "n1", "n2")
        real_share = blank("realized", "events", "n1", "n2")
        # Power of the plan at the realized event share needs the planned patients too.
        replan_inputs = (*plan_patients, *real_share, effect_blank)
        return {
            "events_required_plan": NullReasons(
                inputs=(effect_blank,), conditions=(weak, no_effect)
            ),
            "n_required_plan": NullReasons(inputs=plan_patients, conditions=(no_effect,)),
            "plan_discrepancy": NullReasons(inputs=plan_patients, conditions=(no_effect,)),
            "n_ratio": NullReasons(inputs=(*plan_patients, *blank("realized", "n1", "n2"))),
            "n_required_realized": NullReasons(
                inputs=replan_inputs, conditions=(weak, no_effect), replace=True
            ),
            "power_if_planned_size": NullReasons(inputs=replan_inputs, replace=True),
            "power_cost_nuisance": NullReasons(
                inputs=(*blank("planned", "events"), *replan_inputs), replace=True
            ),
            "power_cost_attrition": NullReasons(inputs=replan_inputs, replace=True),
        }
